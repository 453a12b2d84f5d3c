"""The bake loop: scene -> world + solver -> one cached frame after another.

``bake`` writes frame ``frame_start`` (the initial state, t = 0) and then, for
each following frame f, advances the solver to t = (f - frame_start) / fps,
writes the frame's PLY, lists it in the manifest and saves the checkpoint.

Cancel: SIGINT (Ctrl-C), SIGTERM and, on Windows, SIGBREAK only raise a flag
(as does ``should_stop()`` returning true); the frame being computed is
finished and written, then the bake returns with ``is_cancelled`` set (the
command line exits with status 130). A second signal interrupts at once; the
atomic writes of ``engine.cache`` still leave every finished frame readable.

Resume: the checkpoint holds the full State after the last finished frame.
Between frames the loop keeps nothing but that State, and it continues from
the State *as reloaded from its checkpoint form* (``state_to_arrays`` then
``state_from_arrays``) even in an uninterrupted bake, so a resumed bake and an
uninterrupted one run the solver on identical inputs and write bit-identical
frames (for a deterministic solver that keeps its warm-start data in State, as
the Solver protocol requires).
"""

import dataclasses
import json
import signal
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING, NamedTuple, Optional

import numpy as np

from . import energy
from .cache import MANIFEST_NAME, CacheWriter, checkpoint_matches_frame, open_cache, verify_frames
from .errors import CacheError, SolverError, SplashdraftError, UsageError
from .progress import SilentProgress
from .solvers import SOLVER_NAMES, make_solver
from .state import state_from_arrays, state_to_arrays

if TYPE_CHECKING:
    from .scene import Scene


@dataclasses.dataclass(frozen=True)
class BakeResult:
    """What one call of ``bake`` did.

    Attributes:
        cache_dir: the bake folder.
        solver: solver name.
        first_frame, last_frame: the range asked for.
        last_written: the last frame now in the cache (None if none was written).
        frames_written: frames written by this call.
        particles: particles in the last written frame.
        seconds: wall-clock seconds of this call.
        is_cancelled: stopped early by a signal or ``should_stop``.
        notes: what the bake found and did about it (frames baked again after a failed check,
            a cache left incomplete), one sentence each.
    """

    cache_dir: str
    solver: str
    first_frame: int
    last_frame: int
    last_written: int
    frames_written: int
    particles: int
    seconds: float
    is_cancelled: bool
    notes: tuple = ()


def load_scene_any(scene) -> "Scene":
    """A Scene object from a path (str or Path) or a Scene itself."""
    if isinstance(scene, (str, Path)):
        from .scene import load_scene

        return load_scene(scene)
    return scene


def scene_hash(scene) -> str:
    """sha256 (hex) of the canonical scene JSON plus the bytes of every file it references."""
    from .scene import scene_hash as hash_of_scene

    return hash_of_scene(scene)


#: Weakest gravity (m/s^2) the learned preview accepts: its features and step scale with sqrt(d / g).
LEARNED_MIN_GRAVITY = 0.01


def check_scene_for_solver(scene, solver_name) -> None:
    """Raise SceneError when ``scene`` cannot be baked by ``solver_name`` (checked before anything is built)."""
    from .errors import SceneError

    gravity = float(np.linalg.norm(scene.gravity))
    if solver_name == "learned" and not gravity >= LEARNED_MIN_GRAVITY:
        raise SceneError(
            f"scene {scene.name!r}: gravity has length {gravity:g} m/s^2; the learned preview needs gravity of at "
            f"least {LEARNED_MIN_GRAVITY:g} m/s^2 (it scales by sqrt(spacing / g)); give the scene gravity or "
            "bake it with --solver sph"
        )


def frame_time(scene, frame) -> float:
    """Simulated time (s) of ``frame``: (frame - frame_start) / fps."""
    return (int(frame) - scene.frame_start) / scene.fps


def resolve_frames(scene, frames) -> tuple[int, int]:
    """(first, last) frames of a bake; ``frames`` is None, (a, b) or "a:b"."""
    if frames is None:
        return scene.frame_start, scene.frame_end
    if isinstance(frames, str):
        frames = parse_frame_range(frames)
    first, last = int(frames[0]), int(frames[1])
    if not scene.frame_start <= first <= last <= scene.frame_end:
        raise UsageError(
            f"--frames {first}:{last}: scene {scene.name!r} runs from frame {scene.frame_start} to "
            f"{scene.frame_end}; pick a range inside it with A <= B"
        )
    return first, last


def parse_frame_range(text) -> tuple[int, int]:
    """'12:40' -> (12, 40); raises UsageError for anything else."""
    parts = str(text).split(":")
    try:
        if len(parts) != 2:
            raise ValueError
        return int(parts[0]), int(parts[1])
    except ValueError:
        raise UsageError(f"--frames {text!r}: expected two frame numbers as A:B, e.g. 1:48") from None


class StopFlag:
    """Set by SIGINT/SIGTERM (while installed) or by hand; a second signal raises KeyboardInterrupt."""

    def __init__(self):
        self.is_set = False
        self._previous = {}

    def _handle(self, signum, frame):
        if self.is_set:
            raise KeyboardInterrupt
        self.is_set = True

    def install(self) -> "StopFlag":
        if threading.current_thread() is not threading.main_thread():
            return self  # signal handlers can only be set from the main thread
        for name in ("SIGINT", "SIGTERM", "SIGBREAK"):
            number = getattr(signal, name, None)
            if number is not None:
                self._previous[number] = signal.signal(number, self._handle)
        return self

    def restore(self) -> None:
        for number, handler in self._previous.items():
            signal.signal(number, handler)
        self._previous = {}


def _reloaded(state):
    """The state as a resume would see it: through the checkpoint's array form."""
    return state_from_arrays(state_to_arrays(state), source="in-memory state")


def _check_state(state, frame):
    if state.count and not (np.isfinite(state.positions).all() and np.isfinite(state.velocities).all()):
        raise SolverError(
            f"frame {frame}: the solver produced non-finite positions or velocities; "
            "reduce solver.max_time_step or solver.cfl_factor in the scene"
        )


def _manifest_header(scene, solver, last, hash_hex, source):
    header = {
        "scene_name": scene.name,
        "scene_hash": hash_hex,
        "solver": {"name": solver.name, "settings": _json_ready(solver.settings())},
        "fps": scene.fps,
        "frame_start": scene.frame_start,
        "frame_end": last,
        "particle_spacing": scene.particle_spacing,
        "rest_density": scene.fluid.rest_density,
    }
    if source is not None:
        header["scene_file"] = str(Path(source).resolve())
    return header


def _json_ready(value):
    """Settings as plain JSON types (numpy scalars and tuples converted), so they compare after a reload."""
    return json.loads(json.dumps(value, default=lambda v: v.tolist() if hasattr(v, "tolist") else str(v)))


def bake(scene, solver_name, out_dir, frames=None, resume=False, progress=None, should_stop=None,
         max_particles=None, overwrite=False, use_signals=True, world=None, solver=None) -> BakeResult:
    """Bake ``scene`` with solver ``solver_name`` into the folder ``out_dir``.

    Args:
        scene: scene file path or a loaded Scene.
        solver_name: "sph" or "learned".
        out_dir: bake folder (created if missing).
        frames: None (the whole shot), (a, b) or "a:b". ``a`` must be the
            scene's frame_start, or the cache in ``out_dir`` must hold a
            checkpoint at frame a - 1 or later, from which the bake continues.
        resume: continue from the checkpoint in ``out_dir`` up to ``b``.
        progress: a reporter from ``engine.progress`` (default silent).
        should_stop: callable polled after each frame; true stops the bake.
        max_particles: overrides ``scene.budget.max_particles``.
        overwrite: allow replacing another scene's or solver's cache.
        use_signals: install the SIGINT/SIGTERM stop flag while baking (main thread only).
        world, solver: an already built World / Solver object to use instead of
            building them from the scene and ``solver_name`` (for callers that
            hold them already, and for tests).

    Returns:
        BakeResult.

    Raises:
        SceneError, MeshError, BudgetError, CacheError, SolverError, ModelError,
        UsageError. Frames finished before an error stay in the cache.
    """
    progress = progress or SilentProgress()
    try:
        return _bake(scene, solver_name, Path(out_dir), frames, resume, progress, should_stop, max_particles,
                     overwrite, use_signals, world, solver)  # fmt: skip
    except SplashdraftError as exc:
        progress.error(str(exc))
        raise
    except Exception as exc:
        progress.error(f"internal error: {type(exc).__name__}: {exc}")
        raise


@dataclasses.dataclass(frozen=True)
class _Start:
    """Where a bake starts: at the scene's first frame, or after an existing cache's checkpoint.

    Attributes:
        first: the first frame of the range baked (``BakeResult.first_frame``).
        continue_from: (State, frame) of the checkpoint to continue from, or None.
        kept_frames: frames of the existing cache verified and kept.
        last_in_cache: the existing cache's ``frame_end`` (None when starting afresh).
        notes: what the checks found and did about it, one sentence each.
    """

    first: int
    continue_from: Optional[tuple] = None
    kept_frames: tuple = ()
    last_in_cache: Optional[int] = None
    notes: tuple = ()


class _Run(NamedTuple):
    """What the frame loop did."""

    written: int
    last_written: Optional[int]
    particles: int
    is_cancelled: bool
    notes: tuple


def _bake(scene, solver_name, out_dir, frames, resume, progress, should_stop, max_particles, overwrite,
          use_signals, world, solver) -> BakeResult:
    started = time.monotonic()
    source = scene if isinstance(scene, (str, Path)) else getattr(scene, "source", None)
    scene = load_scene_any(scene)
    first, last = resolve_frames(scene, frames)
    if solver_name not in SOLVER_NAMES:
        make_solver(solver_name)  # raises the UsageError naming the choices
    check_scene_for_solver(scene, solver_name)
    hash_hex = scene_hash(scene)
    start = _Start(first)
    if resume or first > scene.frame_start:
        start = _plan_continuation(scene, solver_name, out_dir, frames, resume, first, last, hash_hex)
    world, solver, initial_state = _build(scene, solver_name, world, solver, max_particles)
    header = _open_header(scene, solver, world, last, hash_hex, source, start, out_dir, solver_name, progress)
    writer = CacheWriter(out_dir, header, keep_frames=start.kept_frames if start.continue_from is not None else False,
                         overwrite=overwrite or bool(start.notes))  # fmt: skip
    writer.write_scene_copy(scene)
    run = _run_frames(scene, solver, world, writer, header, start, initial_state, last, progress, should_stop,
                      use_signals, started)  # fmt: skip
    return BakeResult(
        cache_dir=str(out_dir), solver=solver.name, first_frame=start.first, last_frame=last,
        last_written=run.last_written, frames_written=run.written, particles=run.particles,
        seconds=time.monotonic() - started, is_cancelled=run.is_cancelled, notes=start.notes + run.notes,
    )  # fmt: skip


def _plan_continuation(scene, solver_name, out_dir, frames, resume, first, last, hash_hex) -> _Start:
    """Check the cache in ``out_dir`` for ``--resume`` or a later first frame; say where the bake starts.

    Raises:
        CacheError: no cache there, or one of another scene version, another solver, or a checkpoint
        before ``first - 1``.
    """
    if not (out_dir / MANIFEST_NAME).is_file():
        why = "--resume" if resume else f"--frames {first}:{last}"
        raise CacheError(
            f"{out_dir}: no cache to continue from for {why} (no {MANIFEST_NAME}); "
            f"bake from frame {scene.frame_start} first, without --resume"
        )
    reader = open_cache(out_dir)
    state, checkpoint_frame, checkpoint_hash = reader.read_checkpoint()
    if checkpoint_hash != hash_hex or reader.manifest.get("scene_hash") != hash_hex:
        raise CacheError(
            f"{out_dir}: its cache was baked from a different version of scene {scene.name!r}; "
            "bake again from the first frame (without --resume) or into another --out folder"
        )
    if reader.manifest["solver"]["name"] != solver_name:
        raise CacheError(
            f"{out_dir}: its cache was baked with the {reader.manifest['solver'].get('name')!r} solver, "
            f"not {solver_name!r}; resume with the same --solver or bake into another --out folder"
        )
    if checkpoint_frame < first - 1:
        raise CacheError(
            f"{out_dir}: cannot start at frame {first}: the cache's checkpoint is at frame {checkpoint_frame}; "
            f"bake --frames {checkpoint_frame + 1}:{last} (or --resume) instead"
        )
    if resume and frames is None:
        first = scene.frame_start
    last_in_cache = reader.manifest["frame_end"]
    good, problems = verify_frames(reader)
    continue_frame = _continue_frame(reader, good, state, checkpoint_frame, scene.frame_start, problems)
    if continue_frame is None:
        # No verified state to continue from: bake again from the first frame (deterministic, so frames
        # that were good come out bit-identical) rather than keep a cache with holes or a wrong state.
        note = (f"the cache could not be continued ({'; '.join(problems[:3])}); "
                f"baked again from frame {scene.frame_start}")  # fmt: skip
        return _Start(scene.frame_start, last_in_cache=last_in_cache, notes=(note,))
    kept_frames = [f for f in good if f <= max(continue_frame, checkpoint_frame) or f > last]
    notes = (f"frames baked again after checks: {'; '.join(problems[:3])}",) if problems else ()
    return _Start(first, continue_from=(state, checkpoint_frame), kept_frames=kept_frames,
                  last_in_cache=last_in_cache, notes=notes)  # fmt: skip


def _build(scene, solver_name, world, solver, max_particles) -> tuple:
    """(world, solver, initial State): built from the scene unless given, after the work and budget checks."""
    from .estimate import check_budget

    if world is None:
        from .estimate import check_work
        from .world import build_world

        check_work(scene, max_particles)  # closed form, before any allocation
        world = build_world(scene)
    check_budget(scene, world, max_particles=max_particles)
    if solver is None:
        solver = make_solver(solver_name)
    # start() also resolves the solver's settings for the manifest; a resume discards its state.
    return world, solver, solver.start(world)


def _open_header(scene, solver, world, last, hash_hex, source, start, out_dir, solver_name, progress) -> dict:
    """The manifest header of this bake, with the solver's range warnings (also sent to ``progress``).

    Raises:
        CacheError: a continued cache was baked with other solver settings.
    """
    header = _manifest_header(scene, solver, last, hash_hex, source)
    header["warnings"] = list(solver.range_warnings(world)) if hasattr(solver, "range_warnings") else []
    for warning in header["warnings"]:
        progress.note(f"warning: {warning}")
    if start.continue_from is not None:
        header["frame_end"] = max(last, int(start.last_in_cache))
        previous_settings = open_cache(out_dir).manifest.get("solver", {}).get("settings")
        if previous_settings is not None and previous_settings != header["solver"]["settings"]:
            raise CacheError(
                f"{out_dir}: the {solver_name} solver settings differ from the ones this cache was baked with; "
                "bake again from the first frame (without --resume)"
            )
    return header


def _run_frames(scene, solver, world, writer, header, start, initial_state, last, progress, should_stop,
                use_signals, started) -> _Run:
    """Write the first frame (unless continuing), then advance and write each frame up to ``last``.

    Stops after the frame being computed when the stop flag or ``should_stop`` says so; a second signal
    (KeyboardInterrupt) stops at once. Finished frames are on disk either way.
    """
    stop = StopFlag()
    if use_signals:
        stop.install()
    written = 0
    last_written = None
    particles = 0
    notes = ()
    try:
        state, current, written = _first_state(scene, solver, world, writer, start, initial_state, last, progress)
        last_written, particles = current, state.count
        total = last - current + written
        loop_started = time.monotonic()
        for frame in range(current + 1, last + 1):
            if stop.is_set or (should_stop is not None and should_stop()):
                break
            frame_started = time.monotonic()
            state, stats = solver.advance(state, world, frame_time(scene, frame))
            _check_state(state, frame)
            substeps = int(getattr(stats, "substeps", 0))
            state = _write(writer, solver, world, state, frame, substeps, time.monotonic() - frame_started, stats)
            state = _reloaded(state)
            written += 1
            last_written, particles = frame, state.count
            now = time.monotonic()
            done_here = frame - current
            eta = (now - loop_started) / done_here * (last - frame)
            progress.frame(
                frame=frame, done=written, total=total, particles=state.count,
                substeps=substeps, seconds=now - frame_started, eta=eta,
            )  # fmt: skip
        is_cancelled = last_written is None or last_written < last
        if is_cancelled:
            progress.cancelled(last_frame=last_written)
        else:
            if not writer.mark_complete(True):
                missing = writer.missing_frames()
                notes = (f"{len(missing)} frames of {header['frame_start']}..{header['frame_end']} are not in the "
                         f"cache (first {missing[0]}); it stays incomplete: bake them with --resume",)  # fmt: skip
            progress.finished(frames=written, cache=str(writer.folder), seconds=time.monotonic() - started)
    except KeyboardInterrupt:
        # A second Ctrl-C: stop at once; finished frames are safe on disk.
        is_cancelled = True
        progress.cancelled(last_frame=last_written)
    finally:
        stop.restore()
    return _Run(written, last_written, particles, is_cancelled, notes)


def _first_state(scene, solver, world, writer, start, initial_state, last, progress) -> tuple:
    """(State, its frame, frames written): the first frame written from the solver's initial state, or the
    checkpoint's state when continuing; tells ``progress`` the bake has started."""
    if start.continue_from is not None:
        state, current = start.continue_from
        state = _reloaded(state)
        progress.start(frames=(current + 1, last), solver=solver.name, particles=state.count)
        return state, current, 0
    state = _reloaded(initial_state)
    current = scene.frame_start
    progress.start(frames=(scene.frame_start, last), solver=solver.name, particles=state.count)
    frame_started = time.monotonic()
    state = _write(writer, solver, world, state, current, 0, 0.0)
    progress.frame(
        frame=current, done=1, total=last - scene.frame_start + 1, particles=state.count,
        substeps=0, seconds=time.monotonic() - frame_started,
        eta=float("nan"),
    )  # fmt: skip
    return state, current, 1


def _continue_frame(reader, good, state, checkpoint_frame, frame_start, problems):
    """The frame a resume may continue from, or None when it must bake from the first frame.

    The checkpoint is usable when every frame from the first to the checkpoint's is present and
    verified (checksum, count, name and time; ``verify_frames``) and the checkpoint holds exactly the
    particles of its own frame file (count, ids in order, positions and velocities).
    """
    good_set = set(good)
    prefix = frame_start - 1
    while prefix + 1 in good_set:
        prefix += 1
    if checkpoint_frame > prefix:
        missing = prefix + 1
        problems.append(f"the checkpoint is at frame {checkpoint_frame} but frame {missing} is missing or bad")
        return None
    if not checkpoint_matches_frame(state, reader.read_frame(checkpoint_frame)):
        problems.append(f"the checkpoint does not hold the particles of frame {checkpoint_frame}")
        return None
    if abs(state.time - (checkpoint_frame - frame_start) / reader.manifest["fps"]) > 1e-9 * max(1.0, state.time):
        problems.append(f"the checkpoint's time {state.time:g} s is not the time of frame {checkpoint_frame}")
        return None
    return prefix


def _solver_record(stats):
    """The manifest's per-frame ``solver`` entry from a solver's step stats (None: the first frame)."""
    if stats is None:
        return {}
    names = ("iterations", "pressure_iterations", "drift_iterations", "retried_substeps",
             "unconverged_substeps", "max_density_error", "steps", "steps_below_range")
    return {name: _json_ready(getattr(stats, name)) for name in names if hasattr(stats, name)}


def frame_whitewater(state, world, neighbours=None) -> dict:
    """Zone and white-water potentials of a state's particles (``engine.whitewater``), any solver.

    ``neighbours``: optional (pairs, counts) within H at the state's positions, with the boundary
    of ``world.boundary_at(state.time)``, found already (``whitewater``'s argument)."""
    from .whitewater import ATTRIBUTES, whitewater

    boundary = world.boundary_at(state.time).positions if hasattr(world, "boundary_at") else None
    result = whitewater(state.positions, state.velocities, world.particle_spacing, boundary, neighbours)
    return {name: result[name] for name in ATTRIBUTES}


def _write(writer, solver, world, state, frame, substeps, seconds, stats=None):
    """Write one frame's PLY + manifest entry, then the checkpoint (in that order; see ``engine.cache``).

    Every frame also carries the white-water attributes (``frame_whitewater``), whatever the solver;
    a solver whose ``frame_attributes`` also returns ``whitewater_neighbours`` (its own search at the
    frame's positions, see ``frame_whitewater``) saves the white-water search.

    The manifest entry carries the energy audit (``engine.energy.frame_audit``) and the
    solver's counts for the frame; the state's over-energy flags are updated first, so
    the checkpoint carries them.
    """
    top = energy.ceiling(world)
    state = energy.flag_over(state, world, top)
    attributes = solver.frame_attributes(state, world)
    arrays = {
        "positions": state.positions,
        "velocities": state.velocities,
        "ids": state.ids,
        "density": attributes["density"],
        "pressure": attributes["pressure"],
    }
    arrays.update(frame_whitewater(state, world, attributes.get("whitewater_neighbours")))
    extra = {"energy": energy.frame_audit(state, world, top), "solver": _solver_record(stats)}
    writer.write_frame(frame, arrays, time=state.time, substeps=substeps, seconds=seconds, extra=extra)
    writer.write_checkpoint(state, frame)
    return state
