"""The add-on's bpy-free wedge helpers (``addon.wedge_jobs``, wedge folders in ``addon.versions``).

Oracle: the real engine command line. The wedge worker is started through the add-on's own argv
(``wedge_jobs.wedge_command``, Python's isolated mode ``-I`` as Blender does) and its JSON events,
exactly as the engine writes them, are folded into ``WedgeProgress``; the engine's own wedge
manifest and cache manifests decide what ``list_versions`` must list.
"""

import json
import sys

import pytest

from tools import blender_env

PKG = blender_env.load_package()
from splashdraft_src.addon import jobs, versions, wedge_jobs  # noqa: E402  (needs load_package first)

from tests.test_bake import write_tiny_scene  # noqa: E402

ROOT = blender_env.ROOT


def test_rows_become_vary_arguments_and_bad_rows_are_named():
    rows = [("fluid.viscosity", " 0.01, 0.05 "), ("", ""), ("emitters.Water.speed", "1,2")]
    assert wedge_jobs.vary_arguments(rows) == ["fluid.viscosity=0.01, 0.05", "emitters.Water.speed=1,2"]
    with pytest.raises(ValueError, match="wedge row 2: Values is empty; fill it in or remove the row"):
        wedge_jobs.vary_arguments([("fluid.viscosity", "0.01"), ("particle_spacing", " ")])
    with pytest.raises(ValueError, match='wedge row 2: "fluid.viscosity" is already in an earlier row'):
        wedge_jobs.vary_arguments([("fluid.viscosity", "0.01"), ("fluid.viscosity", "0.02")])
    with pytest.raises(ValueError, match="wedge row 1: .* a value is listed twice"):
        wedge_jobs.vary_arguments([("fluid.viscosity", "0.01, 0.01")])
    with pytest.raises(ValueError, match="wedge row 1: .*KEY must be a dotted scene path"):
        wedge_jobs.vary_arguments([("fluid/viscosity", "1")])
    with pytest.raises(ValueError, match="no settings to vary"):
        wedge_jobs.vary_arguments([("", "")])


def test_wedge_worker_events_fill_the_progress_and_each_variant_is_a_version(tmp_path):
    """The engine's wedge, started with the add-on's argv, reports every variant; its folder then lists
    one version per variant, after the plain versions of the shot (by number)."""
    scene = write_tiny_scene(tmp_path / "scene", frame_end=3)
    shot = tmp_path / "shot"
    (shot / "v001_sph").mkdir(parents=True)  # an earlier bake that never wrote a frame
    wedge_dir = versions.next_version_dir(shot, "wedge")
    assert wedge_dir.name == "v002_wedge"
    argv = wedge_jobs.wedge_command(python=sys.executable, python_args=("-I",), extension_root=ROOT,
                                    scene_path=scene, out_dir=wedge_dir, vary=["fluid.viscosity=0.01,0.04"])  # fmt: skip
    assert argv[-2:] == ["--workers", "0"] and "--progress" in argv
    job = jobs.BakeJob(argv, cwd=str(tmp_path))
    progress = wedge_jobs.WedgeProgress()
    changed = []
    job.wait(on_event=lambda event: changed.append(wedge_jobs.apply_wedge_event(progress, event)))
    wedge_jobs.settle_wedge(progress, job.returncode, job.progress.other_lines)
    assert job.returncode == 0, job.progress.other_lines
    assert progress.state == "finished" and progress.complete == 2 and progress.fraction == 1.0
    assert "2 variants complete" in progress.status_text()
    assert {name for name in changed if name} == {"v00_viscosity-0.01", "v01_viscosity-0.04"}
    listed = versions.list_versions(shot)
    assert [v["name"] for v in listed] == ["v001_sph", "v002_wedge/v00_viscosity-0.01",
                                           "v002_wedge/v01_viscosity-0.04"]  # fmt: skip
    manifest = json.loads((wedge_dir / "wedge.json").read_text())
    for version, variant in zip(listed[1:], manifest["variants"]):
        assert version["path"] == wedge_dir / variant["name"]
        assert version["frames"] == variant["frames_done"] == 3 and version["complete"]
        assert version["solver"] == "sph" and version["particles"] == variant["particles"]
    assert versions.next_version_dir(shot, "sph").name == "v003_sph"


def test_a_refused_wedge_settles_as_failed_with_the_engines_message(tmp_path):
    scene = write_tiny_scene(tmp_path / "scene", frame_end=2)
    argv = wedge_jobs.wedge_command(python=sys.executable, python_args=("-I",), extension_root=ROOT,
                                    scene_path=scene, out_dir=tmp_path / "v001_wedge",
                                    vary=["emitters.tap.speed=1,2"])  # fmt: skip
    job = jobs.BakeJob(argv, cwd=str(tmp_path))
    progress = wedge_jobs.WedgeProgress()
    job.wait(on_event=lambda event: wedge_jobs.apply_wedge_event(progress, event))
    wedge_jobs.settle_wedge(progress, job.returncode, job.progress.other_lines)
    assert job.returncode == 64
    assert progress.state == "failed" and "'emitters.tap' names nothing in the scene" in progress.message
    assert versions.wedge_variants(tmp_path / "v001_wedge") is None  # no manifest: not a wedge version
