"""The add-on's bpy-free helpers: motion classification, the bake worker protocol, versions, OBJ export.

These run without Blender. The worker tests start the real engine command
line through the add-on's own boot code (``addon.jobs.bake_command``) with
Python's isolated mode ``-I``, as Blender does, so they check the contract of
DEVELOPERS.md ("Progress events", "Cache folder") end to end.
"""

import json
import signal
import sys
import time

import numpy as np
import pytest

from tools import blender_env

PKG = blender_env.load_package()
from splashdraft_src.addon import comparison, jobs, motion, versions  # noqa: E402  (needs load_package first)
from splashdraft_src.engine.cache import CacheWriter, open_cache  # noqa: E402
from splashdraft_src.engine.mesh_io import box_mesh, read_mesh  # noqa: E402
from splashdraft_src.engine.progress import JsonProgress  # noqa: E402

ROOT = blender_env.ROOT


def rotation_z(angle):
    """Closed-form rotation about z (right-handed, column vectors)."""
    c, s = np.cos(angle), np.sin(angle)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def matrix(rotation=np.eye(3), translation=(0.0, 0.0, 0.0), scale=1.0):
    out = np.eye(4)
    out[:3, :3] = rotation * scale
    out[:3, 3] = translation
    return out


CUBE = box_mesh((-0.5, -0.5, -0.5), (0.5, 0.5, 0.5))[0]


def test_static_object_is_static():
    """An object whose world vertices never change is static.

    Oracle: definition (identical samples). Tolerance: exact input.
    """
    local = np.stack([CUBE] * 4)
    matrices = np.stack([matrix(translation=(1, 2, 3))] * 4)
    assert motion.classify_motion(local, matrices) == "static"


def test_rotating_scaled_object_is_rigid_with_the_closed_form_matrices():
    """A scaled cube turning about z: rigid, and R_f = M_f M_0^-1 equals Rz(theta_f) with translation in metres.

    Oracle: closed-form rotation matrix about z (common practice, any linear
    algebra text). Tolerance 1e-9: float64 round-off of a 4x4 inverse.
    """
    angles = np.linspace(0.0, 1.0, 5)
    local = np.stack([CUBE] * 5)
    matrices = np.stack([matrix(rotation_z(a), (0.1 * i, 0.0, 0.0), scale=2.0) for i, a in enumerate(angles)])
    assert motion.classify_motion(local, matrices) == "rigid"
    relative = motion.relative_matrices(matrices, scale_length=0.01)
    for i, angle in enumerate(angles):
        np.testing.assert_allclose(relative[i, :3, :3], rotation_z(angle), atol=1e-9)
        # world_f = R_f world_0 (metres): check on the vertices themselves.
        world0 = motion.world_vertices(CUBE, matrices[0]) * 0.01
        world_f = motion.world_vertices(CUBE, matrices[i]) * 0.01
        np.testing.assert_allclose(world0 @ relative[i, :3, :3].T + relative[i, :3, 3], world_f, atol=1e-9)


def test_changing_shape_or_animated_scale_is_deforming():
    """Moving vertices (a wave) or a growing object scale cannot be a rotation + translation.

    Oracle: definition of rigid motion (distances preserved). Tolerance: the
    changes are 5 % of the size, far above the 1e-6 threshold.
    """
    waves = np.stack([CUBE + [0.0, 0.0, 0.05 * i] * (CUBE[:, :1] > 0) for i in range(3)])
    assert motion.classify_motion(waves, np.stack([np.eye(4)] * 3)) == "deforming"
    growing = np.stack([matrix(scale=1.0 + 0.05 * i) for i in range(3)])
    assert motion.classify_motion(np.stack([CUBE] * 3), growing) == "deforming"


def test_obj_written_by_the_addon_reads_back_in_the_engine(tmp_path):
    """The add-on's OBJ writer against the engine's reader (engine.mesh_io, Wavefront OBJ).

    Oracle: the engine's own mesh reader (independent code). Tolerance: %.9g
    text keeps ~1e-9 relative precision.
    """
    vertices, triangles = box_mesh((0.0, 0.0, 0.0), (0.4, 0.6, 0.5))
    motion.write_obj(tmp_path / "block.obj", vertices, triangles, name="block")
    back_vertices, back_triangles = read_mesh(tmp_path / "block.obj")
    np.testing.assert_allclose(back_vertices, vertices, rtol=1e-8)
    np.testing.assert_array_equal(back_triangles, triangles)


def test_progress_parser_reads_the_engines_own_events():
    """Events written by engine.progress.JsonProgress parse into the panel's progress.

    Oracle: the engine's event writer (DEVELOPERS.md "Progress events").
    """
    import io

    stream = io.StringIO()
    writer = JsonProgress(stream)
    writer.start((1, 4), "sph", 960)
    writer.frame(1, 1, 4, 960, 12, 0.5, 1.5)
    writer.frame(2, 2, 4, 958, 13, 0.5, float("nan"))
    lines = stream.getvalue().splitlines() + ["Traceback (most recent call last):", "  oops"]
    progress = jobs.BakeProgress()
    for line in lines:
        event = jobs.parse_event(line)
        jobs.apply_event(progress, event if event is not None else line)
    assert (progress.state, progress.first_frame, progress.last_frame) == ("running", 1, 4)
    assert (progress.frame, progress.done, progress.total, progress.particles) == (2, 2, 4, 958)
    assert progress.eta is None and progress.fraction == 0.5
    assert progress.other_lines == ["Traceback (most recent call last):", "  oops"]
    jobs.finish_on_exit(progress, 1)
    assert progress.state == "failed" and "status 1" in progress.message and "oops" in progress.message


def test_versions_are_numbered_and_read_from_engine_manifests(tmp_path):
    """Version folders: v001_sph, v002_sph ...; frame counts come from manifests written by engine.cache.

    Oracle: engine.cache.CacheWriter (independent writer of the manifest).
    """
    shot = tmp_path / "shot"
    assert versions.next_version_dir(shot, "sph").name == "v001_sph"
    header = {"scene_name": "s", "scene_hash": "h", "solver": {"name": "sph", "settings": {}}, "fps": 24,
              "frame_start": 1, "frame_end": 2, "particle_spacing": 0.05, "rest_density": 1000.0}
    writer = CacheWriter(shot / "v001_sph", header)
    for frame, count in ((1, 3), (2, 5)):
        writer.write_frame(frame, {"positions": np.zeros((count, 3)), "velocities": np.zeros((count, 3)),
                                   "ids": np.arange(count), "density": np.ones(count), "pressure": np.zeros(count)},
                           time=(frame - 1) / 24, substeps=1, seconds=0.0)
    (shot / "v007_learned").mkdir()
    (shot / "notes").mkdir()
    damaged = shot / "v004_sph"  # a manifest cut short: listed, empty, with the engine reader's message
    damaged.mkdir()
    text = (shot / "v001_sph" / "manifest.json").read_text()
    (damaged / "manifest.json").write_text(text[: len(text) // 2])
    found = versions.list_versions(shot)
    assert [(v["name"], v["frames"], v["particles"], v["readable"]) for v in found] == [
        ("v001_sph", 2, 5, True), ("v004_sph", 0, 0, False), ("v007_learned", 0, 0, False)]
    assert [v["problem"] is None for v in found] == [True, False, True]  # no manifest yet is no problem
    assert "v004_sph/manifest.json: manifest is not valid JSON" in found[1]["problem"]
    assert "bake the cache again" in found[1]["problem"]
    assert versions.next_version_dir(shot, "sph").name == "v008_sph"


def write_block_scene(folder, frame_end, spacing=0.025, budget=None):
    """A 0.1 x 0.15 x 0.15 m water block in a 0.3 x 0.15 x 0.3 m open-topped box (~200 particles)."""
    (folder / "meshes").mkdir(parents=True, exist_ok=True)
    motion.write_obj(folder / "meshes" / "block.obj", *box_mesh((0.0, 0.0, 0.0), (0.1, 0.15, 0.15)))
    scene = {"format": "splashdraft-scene", "version": 1, "name": "block", "fps": 24, "frame_start": 1,
             "frame_end": frame_end, "particle_spacing": spacing,
             "bounds": {"min": [0, 0, 0], "max": [0.3, 0.15, 0.3]},
             "emitters": [{"name": "block", "type": "fill", "mesh": "meshes/block.obj"}]}
    if budget is not None:
        scene["budget"] = {"max_particles": budget}
    path = folder / "scene.json"
    path.write_text(json.dumps(scene))
    return path


def worker_args():
    return dict(python=sys.executable, python_args=("-I",), extension_root=ROOT, wheel_site=None)


class RecordingUI:
    """Stand-in for the Blender side of jobs.tick: records what it was told."""

    def __init__(self, on_frame=None):
        self.frames, self.updates, self.finished_with, self.on_frame = [], 0, None, on_frame

    def frame_ready(self, frame):
        self.frames.append(frame)
        if self.on_frame is not None:
            self.on_frame(frame)

    def progress(self, progress):
        self.updates += 1

    def finished(self, progress):
        assert self.finished_with is None, "finished must be called once"
        self.finished_with = progress.state


def run_ticks(job, ui, timeout=240):
    start = time.monotonic()
    while jobs.tick(job, ui):
        assert time.monotonic() - start < timeout, f"bake did not end in {timeout} s: {job.progress}"
        time.sleep(0.05)


def test_worker_bakes_through_the_boot_code_and_reports_every_frame(tmp_path):
    """The isolated-mode worker (``-I``: PYTHONPATH ignored) finds the engine by its boot code and bakes.

    Oracle: DEVELOPERS.md contract: one ``frame`` event per frame and a
    manifest listing the same frames, readable through engine.cache.
    """
    scene = write_block_scene(tmp_path, frame_end=3)
    job = jobs.BakeJob(jobs.bake_command(scene_path=scene, out_dir=tmp_path / "v001_sph", **worker_args()))
    ui = RecordingUI()
    run_ticks(job, ui)
    assert job.progress.state == "finished", (job.progress.message, job.progress.other_lines)
    assert job.returncode == 0 and ui.finished_with == "finished"
    assert ui.frames == [1, 2, 3]
    reader = open_cache(tmp_path / "v001_sph")
    assert reader.frames == [1, 2, 3]
    assert len(reader.read_frame(3)["positions"]) == job.progress.particles


@pytest.mark.skipif(not hasattr(signal, "SIGTERM") or sys.platform == "win32", reason="POSIX signal test")
def test_cancel_stops_after_a_frame_and_keeps_finished_frames(tmp_path):
    """Cancel (SIGTERM) while baking: the worker ends with a ``cancelled`` event, exit status 130
    (engine.errors.EXIT_CODES), and every frame it reported is in the cache.

    Oracle: DEVELOPERS.md cache contract and the engine's documented exit codes.
    """
    scene = write_block_scene(tmp_path, frame_end=48)
    job = jobs.BakeJob(jobs.bake_command(scene_path=scene, out_dir=tmp_path / "v001_sph", **worker_args()))
    ui = RecordingUI(on_frame=lambda frame: job.cancel() if frame == 2 else None)
    run_ticks(job, ui)
    assert job.progress.state == "cancelled", (job.progress.message, job.progress.other_lines)
    assert job.returncode == 130
    reader = open_cache(tmp_path / "v001_sph")
    assert 2 <= len(reader.frames) < 48
    assert reader.frames == list(range(1, len(reader.frames) + 1)) and set(ui.frames) <= set(reader.frames)
    reader.read_frame(reader.frames[-1])  # checksum verified


def test_estimate_reports_figures_and_refuses_over_budget(tmp_path):
    """The estimate runs through the same boot code; over budget the engine's message names the fix.

    Oracle: engine.estimate (BudgetError text names particle_spacing) and the
    fill count of a 0.1 x 0.15 x 0.15 m block at 0.025 m spacing: 4 x 6 x 6 = 144
    lattice sites (cell-centred sampling; common practice), less the sites within one
    spacing of the x_min, y_min, y_max and z_min walls (engine.world.FILL_CLEARANCE):
    3 x 4 x 5 = 60, within 50 %.
    """
    scene = write_block_scene(tmp_path, frame_end=3)
    estimate, message = jobs.run_estimate(jobs.estimate_command(scene_path=scene, **worker_args()))
    assert estimate is not None, message
    assert 0.5 * 60 <= estimate["particles"] <= 1.5 * 60
    assert "particles" in jobs.summarize_estimate(estimate)
    refused = write_block_scene(tmp_path / "small_budget", frame_end=3, budget=10)
    estimate, message = jobs.run_estimate(jobs.estimate_command(scene_path=refused, **worker_args()))
    assert estimate is None and "budget" in message and "particle_spacing" in message


def test_counts_read_as_english_in_status_lines():
    """'1 particle', '2 particles', thousands separated (English grammar, common practice)."""
    assert jobs.plural(1, "particle") == "1 particle"
    assert jobs.plural(0, "particle") == "0 particles"
    assert jobs.plural(1210, "frame") == "1,210 frames"
    progress = jobs.apply_event(jobs.BakeProgress(), {"event": "frame", "frame": 1, "done": 1, "total": 1,
                                                      "particles": 1})
    assert progress.status_text().endswith("1 particle")
    done = jobs.apply_event(jobs.BakeProgress(), {"event": "finished", "frames": 1, "seconds": 2})
    assert done.status_text() == "Splashdraft: baked 1 frame in 2.0s"  # engine.progress.format_duration


def test_compare_pair_is_the_shown_version_and_the_newest_of_the_other_solver():
    """The panel measures the shown preview against the newest reference with frames (or the shown
    reference against the newest preview); nothing without both kinds."""
    rows = [{"name": "v001_sph", "solver": "sph", "frames": 4}, {"name": "v002_learned", "solver": "learned", "frames": 4},
            {"name": "v003_sph", "solver": "sph", "frames": 4}, {"name": "v004_sph", "solver": "sph", "frames": 0}]
    assert comparison.pick_pair(rows, "v002_learned") == ("v003_sph", "v002_learned")
    assert comparison.pick_pair(rows, "v001_sph") == ("v001_sph", "v002_learned")
    assert comparison.pick_pair(rows, "v004_sph") is None  # nothing baked yet
    assert comparison.pick_pair(rows[:1] + rows[2:], "v001_sph") is None


def test_compare_worker_result_matches_the_engine_and_names_a_spacing_mismatch(tmp_path):
    """The compare command through the add-on's boot code (isolated mode, as in Blender) reports one
    frame event per frame and prints the engine's own result; bakes at different spacings are
    refused with the engine's message. Oracle: engine.compare.compare_caches run in this process
    on the same caches (the add-on must pass the figures through unchanged) and the Chamfer
    distance of a cache against itself, 0 by definition (Barrow et al. 1977)."""
    from splashdraft_src.engine.compare import compare_caches

    scene = write_block_scene(tmp_path, frame_end=3)
    for name in ("v001_sph", "v002_sph"):
        job = jobs.BakeJob(jobs.bake_command(scene_path=scene, out_dir=tmp_path / name, **worker_args()))
        run_ticks(job, RecordingUI())
    argv = comparison.compare_command(reference_dir=tmp_path / "v001_sph", preview_dir=tmp_path / "v002_sph",
                                      plot_path=tmp_path / "plot.png", **worker_args())
    job = jobs.BakeJob(argv)
    ui = RecordingUI()
    run_ticks(job, ui)
    assert job.progress.state == "finished", (job.progress.message, job.progress.other_lines)
    assert ui.frames == [1, 2, 3]
    result = comparison.parse_result(job.stdout_lines)
    direct = compare_caches(tmp_path / "v001_sph", tmp_path / "v002_sph")
    assert [row["chamfer_spacings"] for row in result["frames"]] == [row["chamfer_spacings"] for row in direct["frames"]]
    assert result["max_chamfer_spacings"] == 0.0  # the bake is deterministic: the same cloud twice
    assert comparison.summary_lines(result)[3] == "Motion energy: 1.00 x reference"
    coarse = write_block_scene(tmp_path / "coarse", frame_end=3, spacing=0.05)
    job = jobs.BakeJob(jobs.bake_command(scene_path=coarse, out_dir=tmp_path / "v003_sph", **worker_args()))
    run_ticks(job, RecordingUI())
    argv = comparison.compare_command(reference_dir=tmp_path / "v003_sph", preview_dir=tmp_path / "v002_sph",
                                      plot_path=tmp_path / "plot2.png", **worker_args())
    job = jobs.BakeJob(argv)
    run_ticks(job, RecordingUI())
    assert job.progress.state == "failed" and "particle spacings differ" in job.progress.message
    assert comparison.parse_result(job.stdout_lines) is None
    # In the sidebar the version names stand for their folders.
    short = comparison.short_message(job.progress.message, {"v003_sph": tmp_path / "v003_sph",
                                                            "v002_sph": tmp_path / "v002_sph"})
    assert "(v003_sph: 0.05 m, v002_sph: 0.025 m)" in short and str(tmp_path) not in short, short
