"""Wedges: one scene baked once per combination of setting values, each into its own cache folder.

    python -m engine wedge SCENE --vary fluid.viscosity=0.01,0.05 --vary emitters.spout.speed=1,2 --out DIR

A ``--vary KEY=V1,V2,...`` names a scene field by its dotted path in the scene
JSON: ``fluid.viscosity``, ``particle_spacing``, ``solver.cfl_factor``,
``bounds.faces.z_max``; list items with names are picked by name
(``emitters.spout.speed``, ``colliders.boulder.friction``) and numeric
lists by index (``gravity.2``). Each value is read as JSON when it parses
(``0.05``, ``true``) and as text otherwise (``open``). The wedge is the cross
product of all ``--vary`` lists, in the order given.

Folder layout (``splashdraft-wedge``, version 1)::

    DIR/wedge.json               the wedge manifest (below); written only by the process that runs the wedge
    DIR/scenes/<variant>/        each variant's scene file (meshes referenced from the base scene's folder)
    DIR/<variant>/               each variant's bake, in the usual cache layout (DEVELOPERS.md)
    DIR/contact_sheet.png        one frame per variant, each tile labelled with its settings

``wedge.json`` holds ``format``, ``version``, ``scene_file``, ``scene_hash`` (of the base scene),
``solver``, ``model`` (or null), ``frames`` ([a, b] or null), ``vary`` ([{``key``, ``values``}]),
``variants`` ([{``name``, ``settings`` {key: value}, ``scene_file``, ``cache``, ``state``
(pending | running | partial | complete | failed), ``frames_done``, ``frames_total``, ``frames_written``
(by the last bake of the variant: fewer than the shot's frames when it was resumed),
``particles``, ``seconds`` (bake wall time), ``worker``, ``error``}]), ``created``, ``updated``.

Re-running the same command resumes: complete variants are skipped and partial ones continue from
their checkpoint (``engine.bake`` with ``resume``; the bake is deterministic, so a resumed variant
writes the same frames as an uninterrupted one). A wedge folder holding a wedge of another scene,
solver or set of values is refused by name.

Where the variants run (serial in this process, or on Dask) is ``engine.farm``'s business; this
module plans variants, bakes one variant, and summarises.
"""

import itertools
import json
import os
import re
import time
from pathlib import Path

import numpy as np

from .cache import MANIFEST_NAME, SCENE_FILE, open_cache, write_atomic
from .errors import CacheError, SceneError, SplashdraftError, UsageError
from .inputs import read_json

WEDGE_FORMAT = "splashdraft-wedge"
WEDGE_VERSION = 1
WEDGE_MANIFEST = "wedge.json"
SHEET_NAME = "contact_sheet.png"
MAX_VARIANTS = 1000


# --------------------------------------------------------------------------- planning


def parse_vary(text) -> tuple[str, list]:
    """'fluid.viscosity=0.01,0.05' -> ('fluid.viscosity', [0.01, 0.05]); UsageError otherwise."""
    key, sep, values = str(text).partition("=")
    key = key.strip()
    if not sep or not key or not values.strip():
        raise UsageError(f"--vary {text!r}: expected KEY=V1,V2,... e.g. --vary fluid.viscosity=0.01,0.05")
    if not re.fullmatch(r"[A-Za-z0-9_.\- ]+", key) or ".." in key or key.startswith(".") or key.endswith("."):
        raise UsageError(f"--vary {text!r}: KEY must be a dotted scene path such as fluid.viscosity "
                         "or emitters.spout.speed")  # fmt: skip
    parsed = []
    for item in values.split(","):
        item = item.strip()
        if not item:
            raise UsageError(f"--vary {text!r}: an empty value between commas; list values as V1,V2,...")
        try:
            value = json.loads(item)
        except ValueError:
            value = item
        if isinstance(value, float) and not np.isfinite(value):
            raise UsageError(f"--vary {text!r}: value {item!r} is not a finite number")
        parsed.append(value)
    if len(set(json.dumps(v) for v in parsed)) != len(parsed):
        raise UsageError(f"--vary {text!r}: a value is listed twice; list each value once")
    return key, parsed


def set_scene_value(data, key, value) -> None:
    """Set the dotted ``key`` in a scene dict (in place); named list items are found by their name.

    Raises:
        UsageError: a path step that does not exist (naming the choices).
    """
    parts = key.split(".")
    node = data
    for depth, part in enumerate(parts):
        where = ".".join(parts[: depth + 1])
        last = depth == len(parts) - 1
        if isinstance(node, list):
            named = [item for item in node if isinstance(item, dict) and item.get("name") == part]
            if named:
                index = node.index(named[0])
            elif part.isdigit() and int(part) < len(node):
                index = int(part)
            else:
                names = [str(item.get("name")) for item in node if isinstance(item, dict)]
                choices = ", ".join(names) if names else f"indices 0..{len(node) - 1}"
                raise UsageError(f"--vary {key}: {where!r} names nothing in the scene; choose one of {choices}")
            if last:
                node[index] = value
            else:
                node = node[index]
        elif isinstance(node, dict):
            if last:
                node[part] = value
            else:
                if part not in node:
                    node[part] = {}  # an optional block the scene left out, e.g. "fluid"; validated below
                node = node[part]
        else:
            raise UsageError(f"--vary {key}: {'.'.join(parts[:depth])!r} is a value, not a block; "
                             "shorten the key")  # fmt: skip


def _value_text(value):
    return value if isinstance(value, str) else json.dumps(value)


def variant_name(index, settings) -> str:
    """Folder name of a variant: 'v03_viscosity-0.05_speed-2' (path-safe, at most 80 characters)."""
    words = [f"{key.split('.')[-1]}-{_value_text(value)}" for key, value in settings.items()]
    text = re.sub(r"[^A-Za-z0-9._-]+", "", "_".join(words))[:72]
    return f"v{index:02d}_{text}" if text else f"v{index:02d}"


def label_of(settings) -> str:
    """Tile label: 'viscosity=0.05 speed=2'."""
    return " ".join(f"{key.split('.')[-1]}={_value_text(value)}" for key, value in settings.items())


def plan_variants(scene_file, vary, out_dir, solver_name) -> list[dict]:
    """Write every variant's scene file and return the wedge plan.

    Args:
        scene_file: the base scene (path).
        vary: [(key, [values])] in the order given.
        out_dir: the wedge folder.
        solver_name: "sph" or "learned" (each variant is checked for it, and its work bounded, here).

    Returns:
        list of dicts: name, settings {key: value}, scene_file (absolute), cache (absolute).

    Raises:
        UsageError: a --vary key that names nothing, or too many variants.
        SceneError: a variant whose scene is invalid (the message names the variant and the field).
    """
    from .bake import check_scene_for_solver
    from .estimate import check_work
    from .scene import load_scene, save_scene, scene_from_dict

    scene_file = Path(scene_file).resolve()
    base = read_json(scene_file, SceneError, "scene file", "check the path")
    load_scene(scene_file)  # the base scene itself must be valid
    keys = [key for key, _ in vary]
    if len(set(keys)) != len(keys):
        raise UsageError("--vary: a key is given twice; list all its values in one --vary KEY=V1,V2,...")
    combos = list(itertools.product(*[values for _, values in vary]))
    if len(combos) > MAX_VARIANTS:
        raise UsageError(f"--vary: {len(combos)} combinations, more than {MAX_VARIANTS}; vary fewer values")
    out_dir = Path(out_dir).resolve()
    plan = []
    for index, combo in enumerate(combos):
        settings = dict(zip(keys, combo))
        name = variant_name(index, settings)
        data = json.loads(json.dumps(base))
        for key, value in settings.items():
            set_scene_value(data, key, value)
        base_name = str(data.get("name", "shot"))
        data["name"] = f"{base_name}-{name}"[:100]
        try:
            scene = scene_from_dict(data, scene_file.parent, source=str(scene_file), allow_inline=False)
            check_scene_for_solver(scene, solver_name)
            check_work(scene, None)
        except SplashdraftError as exc:
            raise type(exc)(f"wedge variant {name} ({label_of(settings)}): {exc}") from None
        target = out_dir / "scenes" / name / SCENE_FILE
        plan.append({"name": name, "settings": settings, "scene_file": str(target), "cache": str(out_dir / name),
                     "scene": scene})  # fmt: skip
    for variant in plan:  # written only once every variant is valid
        save_scene(variant["scene_file"], variant.pop("scene"))
    return plan


# --------------------------------------------------------------------------- one variant


def variant_progress(cache_dir) -> tuple[int, bool]:
    """(frames listed in the variant's manifest, manifest complete?) or (0, False) when it has none yet.

    Read without verifying checksums: for progress reports only (the bake verifies on resume).
    """
    path = Path(cache_dir) / MANIFEST_NAME
    try:
        manifest = json.loads(path.read_text())
        return len(manifest.get("frames", {})), manifest.get("complete") is True
    except (OSError, ValueError, AttributeError):
        return 0, False


def is_variant_complete(cache_dir, first, last) -> bool:
    """True when the cache holds every frame first..last (listed, on disk) and says it is complete."""
    try:
        cache = open_cache(cache_dir)
    except CacheError:
        return False
    frames = set(cache.frames)
    return (cache.manifest.get("complete") is True and all(f in frames for f in range(first, last + 1))
            and all(cache.frame_path(f).is_file() for f in range(first, last + 1)))  # fmt: skip


def bake_variant(job, should_stop=None) -> dict:
    """Bake (or resume, or skip) one variant; returns a plain dict of what happened.

    Args:
        job: dict with name, scene_file, cache, solver, frames ([a, b] or None), model (or None).
        should_stop: callable polled after each frame (cancel).

    Returns:
        dict: name, state (complete | cancelled | failed | skipped), frames_written, last_written,
        particles, seconds, notes, worker (host:pid), error (or None).

    A cache with a manifest and a checkpoint is resumed; one that is already complete is skipped.
    Engine errors come back as ``state`` failed with the message (the wedge goes on with the others).
    """
    import socket

    from .bake import bake, load_scene_any, resolve_frames
    from .solvers import make_solver

    started = time.monotonic()
    worker = f"{socket.gethostname()}:{os.getpid()}"
    report = {"name": job["name"], "state": "failed", "frames_written": 0, "last_written": None,
              "particles": 0, "seconds": 0.0, "notes": [], "worker": worker, "error": None}  # fmt: skip
    try:
        scene = load_scene_any(job["scene_file"])
        first, last = resolve_frames(scene, job.get("frames"))
        cache = Path(job["cache"])
        if is_variant_complete(cache, first, last):
            report.update(state="skipped", last_written=last, seconds=time.monotonic() - started)
            return report
        resume = (cache / MANIFEST_NAME).is_file() and (cache / "checkpoint.npz").is_file()
        # A farm worker's share of the cores (engine.farm.worker_environment); unset: the solver's default.
        threads = os.environ.get("SPLASHDRAFT_THREADS", "").strip()
        solver = make_solver(job["solver"], model=job.get("model"), threads=int(threads) if threads.isdigit() else None)
        result = bake(scene, job["solver"], cache, frames=job.get("frames"), resume=resume,
                      should_stop=should_stop, use_signals=False, solver=solver)  # fmt: skip
        report.update(
            state="cancelled" if result.is_cancelled else "complete", frames_written=result.frames_written,
            last_written=result.last_written, particles=result.particles, notes=list(result.notes),
        )  # fmt: skip
    except SplashdraftError as exc:
        report["error"] = f"{type(exc).__name__}: {exc}"
    report["seconds"] = time.monotonic() - started
    return report


# --------------------------------------------------------------------------- the wedge manifest


def _now():
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")


def new_manifest(scene_file, solver_name, model, frames, vary, plan) -> dict:
    from .scene import scene_hash

    return {
        "format": WEDGE_FORMAT, "version": WEDGE_VERSION,
        "scene_file": str(Path(scene_file).resolve()), "scene_hash": scene_hash(scene_file),
        "solver": solver_name, "model": None if model is None else str(model),
        "frames": None if frames is None else [int(frames[0]), int(frames[1])],
        "vary": [{"key": key, "values": values} for key, values in vary],
        "variants": [
            {"name": v["name"], "settings": v["settings"], "scene_file": v["scene_file"], "cache": v["cache"],
             "state": "pending", "frames_done": 0, "frames_total": None, "particles": 0, "seconds": None,
             "worker": None, "error": None}
            for v in plan
        ],
        "created": _now(), "updated": _now(),
    }  # fmt: skip


def check_same_wedge(out_dir, manifest) -> dict | None:
    """Refuse a wedge folder that holds a wedge of another scene, solver, model, frames or values."""
    path = Path(out_dir) / WEDGE_MANIFEST
    if not path.is_file():
        return None
    old = read_json(path, CacheError, "wedge manifest", "remove the folder or choose another --out")
    if not isinstance(old, dict) or old.get("format") != WEDGE_FORMAT:
        raise CacheError(f"{path}: not a {WEDGE_FORMAT} manifest; choose another --out folder")
    for field in ("scene_hash", "solver", "model", "frames", "vary"):
        if old.get(field) != manifest[field]:
            raise CacheError(
                f"{out_dir}: holds a wedge with another {field} ({json.dumps(old.get(field))[:80]} -> "
                f"{json.dumps(manifest[field])[:80]}); re-run the same command to resume it, or choose another --out"
            )
    manifest["created"] = old.get("created", manifest["created"])
    return old


def write_manifest(out_dir, manifest) -> None:
    manifest["updated"] = _now()
    write_atomic(Path(out_dir) / WEDGE_MANIFEST, (json.dumps(manifest, indent=1) + "\n").encode())


def apply_report(entry, report, frames_total) -> None:
    """Fold one bake_variant report into the manifest entry of its variant."""
    done, _ = variant_progress(entry["cache"])
    state = {"skipped": "complete", "complete": "complete", "cancelled": "partial"}.get(report["state"], "failed")
    entry.update(state=state, frames_done=done, frames_total=frames_total, worker=report.get("worker"),
                 error=report.get("error"), frames_written=int(report.get("frames_written", 0)))  # fmt: skip
    if report["state"] != "skipped" or entry.get("seconds") is None:
        entry["seconds"] = round(float(report.get("seconds", 0.0)), 3)
    if report.get("particles"):
        entry["particles"] = int(report["particles"])


# --------------------------------------------------------------------------- summary


def summary_rows(manifest) -> list[dict]:
    """One plain dict per variant for the table and --json."""
    rows = []
    for v in manifest["variants"]:
        rows.append({"variant": v["name"], "settings": v["settings"], "state": v["state"],
                     "frames": v["frames_done"], "frames_total": v["frames_total"],
                     "frames_written": v.get("frames_written", 0), "particles": v["particles"],
                     "seconds": v["seconds"], "worker": v["worker"], "cache": v["cache"], "error": v["error"]})  # fmt: skip
    return rows


def format_table(rows, keys) -> str:
    """A plain-text table: variant, one column per varied key, state, frames, particles, seconds."""
    header = ["variant"] + [k.split(".")[-1] for k in keys] + ["state", "frames", "particles", "seconds"]
    body = []
    for r in rows:
        seconds = "-" if r["seconds"] is None else f"{r['seconds']:.1f}"
        total = "?" if r["frames_total"] is None else r["frames_total"]
        body.append([r["variant"]] + [_value_text(r["settings"][k]) for k in keys]
                    + [r["state"], f"{r['frames']}/{total}", f"{r['particles']:,}", seconds])  # fmt: skip
    widths = [max(len(str(row[i])) for row in [header] + body) for i in range(len(header))]
    lines = ["  ".join(str(cell).ljust(w) for cell, w in zip(row, widths)).rstrip() for row in [header] + body]
    return "\n".join(lines)


# --------------------------------------------------------------------------- contact sheet


def render_tile(positions, velocities, lower, upper, size=(240, 180), spacing=None) -> np.ndarray:
    """Side view (x right, z up) of particles as dots coloured by speed, inside the shot's bounds.

    An orthographic projection onto the x-z plane, drawn far to near in y so nearer particles
    are on top; colour runs from deep blue (still) to white (the frame's fastest).

    Args:
        positions, velocities: (N, 3) float arrays (m, m/s).
        lower, upper: (3,) bounds corners (m).
        size: (width, height) pixels of the tile.
        spacing: particle spacing (m); each particle is a square of about one spacing (2 to 6 pixels).

    Returns:
        (height, width, 3) uint8 image.
    """
    width, height = size
    image = np.full((height, width, 3), 245, np.uint8)
    lower, upper = np.asarray(lower, float), np.asarray(upper, float)
    extent = np.maximum(upper - lower, 1e-9)
    scale = min((width - 8) / extent[0], (height - 24) / extent[2])
    x0 = (width - scale * extent[0]) / 2
    z0 = height - 4
    # The bounds box outline.
    left, right = int(x0), int(x0 + scale * extent[0])
    top, bottom = int(z0 - scale * extent[2]), int(z0)
    image[top:bottom + 1, [left, min(right, width - 1)]] = 150
    image[[max(top, 0), min(bottom, height - 1)], left:right + 1] = 150
    if len(positions):
        p = np.asarray(positions, float)
        speed = np.linalg.norm(np.asarray(velocities, float), axis=1)
        share = speed / max(float(speed.max()), 1e-9)
        order = np.argsort(-p[:, 1])
        px = np.clip((x0 + scale * (p[order, 0] - lower[0])).astype(int), 0, width - 2)
        pz = np.clip((z0 - scale * (p[order, 2] - lower[2])).astype(int), 0, height - 2)
        s = share[order][:, None]
        colour = ((1 - s) * np.array([20, 70, 170]) + s * np.array([235, 245, 255])).astype(np.uint8)
        dot = 2 if spacing is None else int(np.clip(round(scale * spacing), 2, 6))
        px, pz = np.minimum(px, width - dot), np.minimum(pz, height - dot)
        for dx in range(dot):
            for dz in range(dot):
                image[pz + dz, px + dx] = colour
    return image


def write_contact_sheet(manifest, frame, path, columns=None) -> Path:
    """One tile per variant at ``frame`` (a grey tile with 'no frame' where it is missing); returns the path."""
    from .pngplot import _text, png_bytes

    variants = manifest["variants"]
    columns = columns or int(np.ceil(np.sqrt(len(variants))))
    rows = int(np.ceil(len(variants) / columns))
    tile_w, tile_h, label_h = 240, 180, 34
    sheet = np.full((rows * (tile_h + label_h), columns * tile_w, 3), 255, np.uint8)
    for i, v in enumerate(variants):
        r, c = divmod(i, columns)
        y, x = r * (tile_h + label_h), c * tile_w
        try:
            cache = open_cache(v["cache"])
            data = cache.read_frame(frame)
            from .scene import load_scene

            scene = load_scene(v["scene_file"])
            tile = render_tile(data["positions"], data["velocities"], scene.bounds.lower, scene.bounds.upper,
                               (tile_w, tile_h), scene.particle_spacing)  # fmt: skip
            caption = f"{v['name'][:3]} f{frame} n{len(data['positions'])}"
        except SplashdraftError:
            tile = np.full((tile_h, tile_w, 3), 200, np.uint8)
            caption = f"{v['name'][:3]} no frame {frame}"
        sheet[y + label_h:y + label_h + tile_h, x:x + tile_w] = tile
        _text(sheet, x + 4, y + 3, caption[:38], colour=(0, 0, 0), scale=2)
        label = label_of(v["settings"])
        _text(sheet, x + 4, y + 18, label[:58], colour=(20, 20, 120), scale=2 if len(label) <= 29 else 1)
    write_atomic(path, png_bytes(sheet))
    return Path(path)
