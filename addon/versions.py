"""Cache versions of a shot: ``<cache root>/<shot>/v003_sph`` folders (no bpy here).

Every bake writes a new version folder, so earlier bakes stay available to
compare and swap. A version folder holds the engine's bake output
(``manifest.json``, ``points_####.ply``, ``checkpoint.npz``; see
DEVELOPERS.md) and, under ``input/``, the scene file and meshes the add-on
exported for that bake. A wedge started from the add-on is a ``v004_wedge`` folder holding the
engine's wedge layout (``wedge.json``, one cache folder per variant); each variant is a version.
"""

import re
from pathlib import Path
from typing import Optional

from ..engine.cache import SCENE_FILE, manifest_or_problem
from ..engine.errors import CacheError
from ..engine.inputs import read_json
from ..engine.wedge import WEDGE_MANIFEST

VERSION_PATTERN = re.compile(r"^v(\d{3,})_([a-z]+)$")
VARIANT_PATTERN = re.compile(r"^v\d{2,}(_[A-Za-z0-9._-]*)?$")
INPUT_FOLDER = "input"


def safe_name(text, fallback="shot") -> str:
    """``text`` reduced to letters, digits, ``_`` and ``-`` (for folder and file names)."""
    cleaned = re.sub(r"[^A-Za-z0-9_-]+", "_", str(text)).strip("_")
    return cleaned or fallback


def list_versions(shot_dir) -> list:
    """Version folders of a shot, oldest first; a wedge folder lists one version per variant.

    Returns:
        list of dicts: ``name`` ("v003_sph", or "v004_wedge/v01_viscosity-0.05" for a wedge variant),
        ``number`` (3), ``solver`` ("sph"), ``path`` (Path), ``frames`` (count of finished frames),
        ``complete`` (bool), ``particles`` (count in the last finished frame), ``readable`` (the engine's
        manifest reader accepted it), ``warnings`` (the bake's named warnings from its manifest, e.g. an
        input outside the preview model's trained range), ``problem`` (the engine's message for a damaged
        manifest, else None).
    """
    shot_dir = Path(shot_dir)
    if not shot_dir.is_dir():
        return []
    found = []
    for child in shot_dir.iterdir():
        match = VERSION_PATTERN.match(child.name)
        if not match or not child.is_dir():
            continue
        number = int(match.group(1))
        variants = wedge_variants(child)
        if variants is not None:
            found += [_version_info(f"{child.name}/{name}", number, solver, child / name) for name, solver in variants]
        else:
            found.append(_version_info(child.name, number, match.group(2), child))
    found.sort(key=lambda item: item["number"])  # stable: a wedge's variants keep their order
    return found


def wedge_variants(folder) -> Optional[list]:
    """[(variant name, solver)] of the wedge manifest in ``folder`` (engine/wedge.py layout), or None."""
    path = Path(folder) / WEDGE_MANIFEST
    if not path.is_file():
        return None
    try:
        manifest = read_json(path, CacheError, "wedge manifest", "bake the wedge again")
        solver = str(manifest.get("solver", "sph"))
        names = [str(v["name"]) for v in manifest["variants"]]
        # Only plain folder names inside the wedge folder (the engine writes v00_key-value names).
        return [(name, solver) for name in names if VARIANT_PATTERN.match(name)]
    except (CacheError, KeyError, TypeError, AttributeError):
        return None


def _version_info(name, number, solver, path) -> dict:
    info = {"name": name, "number": number, "solver": solver, "path": path, "frames": 0, "complete": False,
            "particles": 0, "readable": False, "warnings": [], "problem": None}
    # A version whose bake never started has no manifest; a damaged one is listed, empty, with the engine's message.
    manifest, info["problem"] = manifest_or_problem(path)
    if manifest is None:
        return info
    frames = manifest["frames"]
    info["frames"] = len(frames)
    info["complete"] = bool(manifest.get("complete", False))
    if frames:
        info["particles"] = int(frames[max(frames, key=int)]["particles"])
    info["warnings"] = [str(text) for text in manifest.get("warnings", []) if isinstance(text, str)]
    info["readable"] = True
    return info


def next_version_dir(shot_dir, solver) -> Path:
    """Path of the next version folder (not created): one past the highest number present."""
    numbers = [item["number"] for item in list_versions(shot_dir)]
    return Path(shot_dir) / f"v{(max(numbers) + 1) if numbers else 1:03d}_{safe_name(solver).lower()}"
