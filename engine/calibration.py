"""How fast this computer bakes: measured, kept per machine, read by ``engine.estimate``.

A bake's time is modelled as

    seconds = startup + (frames - 1) * (overhead + steps_per_frame * particles / rate)

with ``rate`` in particle-steps per second (solver substeps for the reference, learned steps for
the preview), ``overhead`` the seconds every frame costs whatever its size (writing it, the
white-water measures, the model call) and ``startup`` the seconds before the first frame is
written (scene, world, settling, model load). All three come from measured bakes on this
machine, never from a constant:

- ``calibrate(solver)`` bakes a fixed shot of our own (``calibration_scene``: a block of water
  released in a box) at two sizes, about 430 and 3,400 particles, 6 frames after the first
  (under ten seconds on 2 cores): the two per-frame times give ``rate`` and ``overhead`` (a
  straight line through two points), the larger bake ``startup``;
- ``record_bake(solver, manifest, seconds)`` takes the figures from any finished bake (the add-on
  calls it after each bake), so the estimate follows the shots the artist bakes: one size gives
  one equation, so the kept ``overhead`` stays and ``rate`` is fitted again.

Per-frame figures come from the manifest (``frames[f].substeps``, ``.seconds``, ``.particles``,
frames after the first); ``startup`` = the bake's wall time less those frame seconds.

The figures are kept in one JSON file per user (``calibration_path()``: ``$SPLASHDRAFT_CALIBRATION``
if set, else ``$XDG_CACHE_HOME/splashdraft/calibration.json`` or ``~/.cache/...``), under a key
naming this machine (host name, architecture, core count) and the engine version, so a copied home
folder or a new engine does not reuse another machine's or version's speed. A missing or
unreadable file means "not measured"; it never stops an estimate.
"""

import datetime
import hashlib
import json
import math
import os
import platform
import tempfile
import time
from pathlib import Path
from typing import TYPE_CHECKING

from . import __version__

if TYPE_CHECKING:
    from .scene import Scene

CALIBRATION_FORMAT = "splashdraft-calibration"
#: Largest calibration file read (it holds a few numbers per machine and solver).
MAX_BYTES = 1_000_000


def calibration_path() -> Path:
    """Where the per-machine figures are kept (see the module docstring)."""
    override = os.environ.get("SPLASHDRAFT_CALIBRATION")
    if override:
        return Path(override)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "splashdraft" / "calibration.json"


def machine_key() -> str:
    """A short name for this machine and engine version (host, architecture, cores, version), hashed.

    ``platform.processor()`` is left out: on Linux it starts a ``uname -p`` process.
    """
    text = "|".join([platform.node(), platform.machine(), str(os.cpu_count()), __version__])
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def _read(path):
    try:
        if path.stat().st_size > MAX_BYTES:
            return {}
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict) or data.get("format") != CALIBRATION_FORMAT or not isinstance(data.get("machines"), dict):
        return {}
    return data


def load(solver, path=None) -> dict | None:
    """This machine's figures for ``solver``: dict with ``rate``, ``overhead_seconds``,
    ``startup_seconds``, ``source``, ``measured``; None when not measured (or the file is damaged)."""
    data = _read(Path(path) if path is not None else calibration_path())
    entry = data.get("machines", {}).get(machine_key(), {}).get(solver) if data else None
    if not isinstance(entry, dict):
        return None
    rate, startup, overhead = entry.get("rate"), entry.get("startup_seconds"), entry.get("overhead_seconds", 0.0)
    numbers = (rate, startup, overhead)
    if not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in numbers):
        return None
    if rate <= 0 or startup < 0 or overhead < 0:
        return None
    return {"rate": float(rate), "overhead_seconds": float(overhead), "startup_seconds": float(startup),
            "source": str(entry.get("source", "")), "measured": str(entry.get("measured", ""))}


def save(solver, rate, startup_seconds, source, path=None, overhead_seconds=0.0) -> Path | None:
    """Keep ``rate`` (particle-steps/s), ``overhead_seconds`` (per frame) and ``startup_seconds``
    for ``solver`` on this machine.

    Returns the file written, or None when it could not be written (the estimate then stays rough;
    a calibration is never worth failing a bake for).
    """
    path = Path(path) if path is not None else calibration_path()
    data = _read(path) or {"format": CALIBRATION_FORMAT, "version": 1, "machines": {}}
    entry = {"rate": float(rate), "overhead_seconds": float(overhead_seconds),
             "startup_seconds": float(startup_seconds), "source": str(source)[:300],
             "measured": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
             "machine": platform.node()[:100]}
    data["machines"].setdefault(machine_key(), {})[solver] = entry
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        temporary = path.with_name(f".{path.name}.tmp-{os.getpid()}")
        temporary.write_text(json.dumps(data, indent=1) + "\n", encoding="utf-8")
        os.replace(temporary, path)
    except OSError:
        return None
    return path


def frame_figures(manifest, seconds) -> tuple[int, int, float, float] | None:
    """(frames, particle-steps, frame seconds, startup seconds) of a finished bake, over the frames
    after the first; None without such a frame with a positive time."""
    frames = manifest.get("frames", {})
    keys = sorted(frames, key=int)[1:]
    work = sum(int(frames[k].get("particles", 0)) * max(int(frames[k].get("substeps", 0)), 1) for k in keys)
    spent = sum(float(frames[k].get("seconds", 0.0)) for k in keys)
    if not keys or work <= 0 or spent <= 0:
        return None
    return len(keys), work, spent, max(float(seconds) - spent, 0.0)


def figures_from_manifest(manifest, seconds, overhead_seconds=0.0) -> tuple[float, float] | None:
    """(rate, startup seconds) of a finished bake, given a per-frame overhead; None when unusable.

    rate = particle-steps / (frame seconds - frames x overhead); when the overhead would take all
    the time, it is dropped (rate = particle-steps / frame seconds).
    """
    figures = frame_figures(manifest, seconds)
    if figures is None:
        return None
    count, work, spent, startup = figures
    working = spent - count * overhead_seconds
    return work / (working if working > 0.1 * spent else spent), startup


def fit_two_sizes(small, large) -> tuple[float, float]:
    """(rate, overhead seconds) of the line through two bakes' mean (particle-steps, seconds) per frame.

    Falls back to overhead 0 and the larger bake's rate when the points do not give a rising line
    with a non-negative overhead (a noisy machine).
    """
    (work_a, time_a), (work_b, time_b) = small, large
    if work_b > work_a and time_b > time_a:
        rate = (work_b - work_a) / (time_b - time_a)
        overhead = time_a - work_a / rate
        if overhead >= 0:
            return rate, overhead
    return work_b / time_b, 0.0


def record_bake(solver, manifest, seconds, path=None) -> Path | None:
    """Keep the figures of a finished bake (the kept per-frame overhead stays); returns the file or None."""
    kept = load(solver, path)
    overhead = kept["overhead_seconds"] if kept is not None else 0.0
    figures = figures_from_manifest(manifest, seconds, overhead)
    if figures is None:
        return None
    name = manifest.get("scene_name", "?")
    return save(solver, *figures, source=f"bake of {name!r}", path=path, overhead_seconds=overhead)


#: Spacings of the two calibration bakes (about 430 and 3,400 particles).
CALIBRATION_SPACINGS = (0.03, 0.016)


def calibration_scene(spacing=0.02) -> "Scene":
    """The calibration shot (our own): a 0.2 x 0.3 x 0.3 m block released in a 0.6 x 0.3 x 0.5 m box."""
    from .mesh_io import box_mesh
    from .scene import scene_from_dict

    vertices, triangles = box_mesh((0.0, 0.0, 0.0), (0.2, 0.3, 0.3))
    return scene_from_dict({
        "format": "splashdraft-scene", "version": 1, "name": "calibration_block", "fps": 24,
        "frame_start": 1, "frame_end": 7, "particle_spacing": spacing,
        "bounds": {"min": [0, 0, 0], "max": [0.6, 0.3, 0.5]},
        "emitters": [{"name": "block", "type": "fill",
                      "mesh": {"vertices": vertices.tolist(), "triangles": triangles.tolist()}}],
    })  # fmt: skip


def _bake_figures(solver, scene):
    """``frame_figures`` of a bake of ``scene`` in a temporary folder, and its particle count."""
    from .bake import bake
    from .cache import open_cache

    with tempfile.TemporaryDirectory(prefix="splashdraft_calibration_") as folder:
        started = time.monotonic()
        bake(scene, solver, Path(folder) / "bake", use_signals=False)
        seconds = time.monotonic() - started
        manifest = open_cache(Path(folder) / "bake").manifest
    return frame_figures(manifest, seconds), manifest["frames"]["1"]["particles"]


def calibrate(solver, path=None, scenes=None) -> dict:
    """Bake the calibration shot at two sizes with ``solver`` and keep the fitted figures.

    Args:
        solver: "sph" or "learned". path: the calibration file (default ``calibration_path()``).
        scenes: (small, large) Scenes to bake instead of the calibration shot (tests).

    Returns:
        dict with ``rate``, ``overhead_seconds``, ``startup_seconds``, ``source``.

    Raises:
        SplashdraftError from a bake (e.g. the learned model is missing).
    """
    scenes = scenes if scenes is not None else tuple(calibration_scene(s) for s in CALIBRATION_SPACINGS)
    (small, _), (large, particles) = (_bake_figures(solver, scene) for scene in scenes)
    rate, overhead = fit_two_sizes((small[1] / small[0], small[2] / small[0]),
                                   (large[1] / large[0], large[2] / large[0]))
    source = f"calibration shot, {particles} particles"
    save(solver, rate, large[3], source=source, path=path, overhead_seconds=overhead)
    return {"rate": rate, "overhead_seconds": overhead, "startup_seconds": large[3], "source": source}
