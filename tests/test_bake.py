"""The bake loop: frames, progress events, cancel, resume, subranges, errors, killed bakes.

Oracles: an uninterrupted bake of the same scene (a resumed or split bake must
write byte-identical frame files, i.e. equal sha256, the property
DEVELOPERS.md asks for), the PLY bytes on disk read back through the cache
reader, and the event list of DEVELOPERS.md ("Progress events"). The loop is
tested with the real scene loader and World and two solvers: a small
deterministic test double whose velocity depends on a warm-start array kept
in State (so a loop that lost State data on resume would change the frames),
and the real DFSPH solver on a tiny scene. Killed bakes run the real command
line in a subprocess (``python -m engine bake``) and are sent SIGTERM or
SIGKILL after a couple of frames.
"""

import dataclasses
import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from engine.bake import bake
from engine.cache import open_cache
from engine.errors import CacheError, SolverError, UsageError
from engine.mesh_io import box_mesh, write_obj
from engine.progress import JsonProgress
from engine.scene import load_scene
from engine.world import build_world

ROOT = Path(__file__).resolve().parents[1]


def write_tiny_scene(folder, frame_end=6, spacing=0.025, block=((0.0, 0.0, 0.0), (0.1, 0.15, 0.15)), name="tiny"):
    """A water block in a 0.3 x 0.15 x 0.3 m open-topped box (about 200 particles at 0.025 m)."""
    folder = Path(folder)
    (folder / "meshes").mkdir(parents=True, exist_ok=True)
    write_obj(folder / "meshes" / "block.obj", *box_mesh(*block))
    scene = {
        "format": "splashdraft-scene", "version": 1, "name": name, "fps": 24, "frame_start": 1,
        "frame_end": frame_end, "particle_spacing": spacing,
        "bounds": {"min": [0, 0, 0], "max": [0.3, 0.15, 0.3]},
        "emitters": [{"name": "block", "type": "fill", "mesh": "meshes/block.obj"}],
    }  # fmt: skip
    path = folder / f"{name}.json"
    path.write_text(json.dumps(scene))
    return path


class ToySolver:
    """Deterministic test double: gravity plus a drag driven by a warm-start array in State.

    Fixed substep 1/96 s; memory_i <- 0.5 memory_i + sin(10 z_i); v_z -= 0.1 memory_i dt.
    A loop that dropped or altered ``particle_arrays`` between frames would change the frames.
    """

    name = "sph"

    def __init__(self, fail_at=None):
        self.fail_at = fail_at

    def settings(self):
        return {"kind": "toy", "substep": 1.0 / 96.0}

    def start(self, world):
        state = world.initial_state()
        return dataclasses.replace(state, particle_arrays={"toy_memory": np.zeros(state.count)})

    def advance(self, state, world, t_end):
        if self.fail_at is not None and t_end >= self.fail_at:
            raise SolverError(f"toy solver: blew up at t = {t_end}; lower solver.max_time_step")
        substeps = 0
        while state.time < t_end - 1e-12:
            dt = min(1.0 / 96.0, t_end - state.time)
            memory = 0.5 * state.particle_arrays["toy_memory"] + np.sin(10.0 * state.positions[:, 2])
            velocities = state.velocities + dt * np.asarray(world.gravity)
            velocities[:, 2] -= 0.1 * memory * dt
            state = dataclasses.replace(
                state, time=state.time + dt, positions=state.positions + dt * velocities, velocities=velocities,
                particle_arrays={"toy_memory": memory},
            )  # fmt: skip
            state = world.enforce_bounds(state)
            substeps += 1
        return dataclasses.replace(state, time=t_end), type("Stats", (), {"substeps": substeps})()

    def frame_attributes(self, state, world):
        return {"density": np.full(state.count, 1000.0), "pressure": state.particle_arrays["toy_memory"]}


def run(scene_path, out, solver=None, **kwargs):
    scene = load_scene(scene_path)
    return bake(scene, "sph", out, world=build_world(scene), solver=solver or ToySolver(), use_signals=False, **kwargs)


def checksums(folder):
    manifest = json.loads((Path(folder) / "manifest.json").read_text())
    return {int(k): v["sha256"] for k, v in manifest["frames"].items()}


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tiny")
    scene = write_tiny_scene(folder)
    reference = folder / "reference"
    result = run(scene, reference)
    return scene, reference, result


def test_full_bake_writes_every_frame(tiny):
    """Frames frame_start..frame_end, frame f at t = (f - frame_start) / fps (DEVELOPERS.md), complete."""
    scene, reference, result = tiny
    cache = open_cache(reference)
    assert cache.frames == [1, 2, 3, 4, 5, 6] and cache.manifest["complete"] and not result.is_cancelled
    for frame in cache.frames:
        assert cache.manifest["frames"][str(frame)]["time"] == pytest.approx((frame - 1) / 24, abs=1e-12)
    assert cache.manifest["solver"] == {"name": "sph", "settings": ToySolver().settings()}
    assert cache.manifest["scene_file"] == str(Path(scene).resolve())
    first = cache.read_frame(1)
    # 4 x 6 x 6 lattice sites less those within one spacing of four walls: 3 x 4 x 5.
    assert first["positions"].shape[0] == result.particles == 60
    assert np.all(first["velocities"] == 0.0)
    assert cache.read_frame(6)["positions"][:, 2].mean() < first["positions"][:, 2].mean() - 0.01, "must fall"


def test_resume_after_stop_is_bit_identical(tiny, tmp_path):
    """Stop after frame 3 (should_stop), resume: every frame's sha256 equals the uninterrupted bake's."""
    scene, reference, _ = tiny
    calls = []
    stopped = run(scene, tmp_path / "bake", should_stop=lambda: len(calls) >= 2 or calls.append(1))
    assert stopped.is_cancelled and stopped.last_written == 3
    assert open_cache(tmp_path / "bake").manifest["complete"] is False
    resumed = run(scene, tmp_path / "bake", resume=True)
    assert not resumed.is_cancelled and resumed.frames_written == 3
    assert checksums(tmp_path / "bake") == checksums(reference)
    assert open_cache(tmp_path / "bake").manifest["complete"] is True


def test_subranges_continue_bit_identically(tiny, tmp_path):
    """--frames 1:2 then 3:6 gives the same frames as one bake; a gap is refused with the fix."""
    scene, reference, _ = tiny
    run(scene, tmp_path / "bake", frames="1:2")
    with pytest.raises(CacheError, match=r"cannot start at frame 5: the cache's checkpoint is at frame 2; bake --frames 3:6"):
        run(scene, tmp_path / "bake", frames=(5, 6))
    run(scene, tmp_path / "bake", frames=(3, 6))
    assert checksums(tmp_path / "bake") == checksums(reference)
    with pytest.raises(UsageError, match=r"--frames 0:3: scene 'tiny' runs from frame 1 to 6"):
        run(scene, tmp_path / "bake", frames="0:3")
    with pytest.raises(CacheError, match="no cache to continue from for --resume"):
        run(scene, tmp_path / "nothing", resume=True)


def test_resume_of_a_finished_bake_writes_nothing(tiny, tmp_path):
    scene, reference, _ = tiny
    run(scene, tmp_path / "bake")
    again = run(scene, tmp_path / "bake", resume=True)
    assert again.frames_written == 0 and not again.is_cancelled
    assert checksums(tmp_path / "bake") == checksums(reference)


def test_resume_refuses_an_edited_scene(tiny, tmp_path):
    scene, _, _ = tiny
    run(scene, tmp_path / "bake", frames="1:2")
    data = json.loads(Path(scene).read_text())
    data["fluid"] = {"rest_density": 998.2}
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(data))
    (tmp_path / "meshes").mkdir()
    (tmp_path / "meshes" / "block.obj").write_bytes((Path(scene).parent / "meshes" / "block.obj").read_bytes())
    with pytest.raises(CacheError, match="different version of scene 'tiny'"):
        run(edited, tmp_path / "bake", resume=True)


def test_solver_error_keeps_finished_frames_and_reports_an_event(tiny, tmp_path):
    """A SolverError at frame 4 leaves frames 1..3 readable; the JSON stream ends with an error event."""
    scene, reference, _ = tiny
    stream = io.StringIO()
    with pytest.raises(SolverError, match="toy solver: blew up"):
        run(scene, tmp_path / "bake", solver=ToySolver(fail_at=3 / 24), progress=JsonProgress(stream))
    cache = open_cache(tmp_path / "bake")
    assert cache.frames == [1, 2, 3]
    for frame in cache.frames:
        cache.read_frame(frame)
    assert {f: checksums(reference)[f] for f in (1, 2, 3)} == checksums(tmp_path / "bake")
    events = [json.loads(line) for line in stream.getvalue().splitlines()]
    assert events[-1]["event"] == "error" and "toy solver" in events[-1]["message"]


def test_json_progress_events_follow_the_contract(tiny, tmp_path):
    """Event names and keys exactly as listed in DEVELOPERS.md; one JSON object per line."""
    scene, _, _ = tiny
    stream = io.StringIO()
    run(scene, tmp_path / "bake", progress=JsonProgress(stream))
    events = [json.loads(line) for line in stream.getvalue().splitlines()]
    assert set(events[0]) == {"event", "frames", "solver", "particles"} and events[0]["frames"] == [1, 6]
    frames = [e for e in events if e["event"] == "frame"]
    assert [e["frame"] for e in frames] == [1, 2, 3, 4, 5, 6]
    assert [e["done"] for e in frames] == [1, 2, 3, 4, 5, 6] and {e["total"] for e in frames} == {6}
    for event in frames:
        assert set(event) == {"event", "frame", "done", "total", "particles", "substeps", "seconds", "eta"}
    assert frames[-1]["eta"] == 0.0 and frames[1]["substeps"] == 4
    assert set(events[-1]) == {"event", "frames", "cache", "seconds"} and events[-1]["event"] == "finished"
    assert events[-1]["frames"] == 6


# --------------------------------------------------------------------------- the real command line, killed


def _start_cli_bake(scene, out):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen(
        [sys.executable, "-m", "engine", "bake", str(scene), "--solver", "sph", "--out", str(out), "--progress", "json"],
        cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip


def _wait_for_frames(process, count, timeout=120):
    """Read JSON events from the bake's stderr until ``count`` frame events have arrived."""
    seen = []
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        line = process.stderr.readline()
        if not line:
            break
        if line.startswith("{"):
            event = json.loads(line)
            seen.append(event)
            if sum(e["event"] == "frame" for e in seen) >= count:
                return seen
    raise AssertionError(f"bake did not reach {count} frames: {seen}")


@pytest.mark.parametrize("how", ["SIGTERM", "SIGKILL"])
def test_killed_cli_bake_leaves_a_readable_cache(tmp_path, how):
    """A real ``python -m engine bake`` (DFSPH, tiny scene) killed after two frames.

    SIGTERM: the frame in progress is finished, exit status 130 (engine.errors.EXIT_CODES), a
    ``cancelled`` event names the last frame, and --resume finishes the shot. SIGKILL (no clean-up
    at all): every frame the manifest lists still reads with a matching checksum, no temporary file
    is mistaken for a frame, and --resume continues from the checkpoint.
    """
    scene = write_tiny_scene(tmp_path, frame_end=240)
    out = tmp_path / "bake"
    process = _start_cli_bake(scene, out)
    try:
        _wait_for_frames(process, 2)
        process.send_signal(getattr(signal, how))
        _, rest = process.communicate(timeout=120)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    cache = open_cache(out)
    assert cache.frames, "at least the first frames must be in the cache"
    assert cache.frames == list(range(1, cache.frames[-1] + 1))
    for frame in cache.frames:
        cache.read_frame(frame)
    if how == "SIGTERM":
        assert process.returncode == 130, rest
        events = [json.loads(line) for line in rest.splitlines() if line.startswith("{")]
        assert events and events[-1] == {"event": "cancelled", "last_frame": cache.frames[-1]}
        assert cache.frames[-1] < 240
        assert "Traceback" not in rest
    else:
        assert process.returncode == -signal.SIGKILL
    target = cache.frames[-1] + 2
    resumed = subprocess.run(
        [sys.executable, "-m", "engine", "bake", str(scene), "--out", str(out), "--resume", "--frames", f"1:{target}",
         "--progress", "none"],
        cwd=ROOT, env=dict(os.environ, PYTHONPATH=str(ROOT)), capture_output=True, text=True, timeout=300,
    )  # fmt: skip
    assert resumed.returncode == 0, resumed.stderr
    assert open_cache(out).frames[-1] >= target
    assert [p.name for p in out.rglob("*") if ".tmp-" in p.name] == [], "the resumed bake removes stale temporaries"


def test_progress_bar_redraws_in_place_on_a_terminal_and_prints_lines_otherwise():
    """On a terminal the frame line is redrawn with a carriage return (no newline until the end);
    in a log (not a TTY) each frame is its own line. Both show frame, particles, substeps, s/frame, ETA."""
    from engine.progress import BarProgress

    for is_terminal in (True, False):
        stream = io.StringIO()
        bar = BarProgress(stream, is_terminal=is_terminal)
        bar.start(frames=(1, 3), solver="sph", particles=1200)
        bar.frame(frame=1, done=1, total=3, particles=1200, substeps=0, seconds=0.5, eta=float("nan"))
        bar.frame(frame=2, done=2, total=3, particles=1200, substeps=11, seconds=2.0, eta=75.0)
        bar.finished(frames=3, cache="out/x", seconds=4.0)
        text = stream.getvalue()
        assert "frame 2 [################........] 2/3 | 1,200 particles | 11 substeps | 2.00 s/frame | ETA 1m15s" in text
        assert text.endswith("finished 3 frames in 4.0s; cache in out/x\n")
        assert (text.count("\r") == 2) is is_terminal
        assert text.count("\n") == (3 if is_terminal else 4)  # splitlines() would also split at \r


def test_real_sph_resume_is_bit_identical(tmp_path):
    """DFSPH (engine.sph) on a tiny scene: a bake stopped after frame 3 and resumed from its checkpoint
    writes frames whose sha256 equal an uninterrupted bake's, so no warm-start data (kappa, drift,
    emitter counters) lives outside State (the Solver protocol in DEVELOPERS.md)."""
    scene = write_tiny_scene(tmp_path, frame_end=7, block=((0.0, 0.0, 0.0), (0.15, 0.15, 0.2)))
    full = bake(scene, "sph", tmp_path / "full", use_signals=False)
    assert full.frames_written == 7
    calls = []
    stopped = bake(scene, "sph", tmp_path / "split", use_signals=False,
                   should_stop=lambda: len(calls) >= 2 or calls.append(1))  # fmt: skip
    assert stopped.is_cancelled and stopped.last_written == 3
    bake(scene, "sph", tmp_path / "split", resume=True, use_signals=False)
    assert checksums(tmp_path / "split") == checksums(tmp_path / "full")
    moved = open_cache(tmp_path / "full").read_frame(7)["positions"]
    assert np.abs(moved - open_cache(tmp_path / "full").read_frame(1)["positions"]).max() > 0.01
