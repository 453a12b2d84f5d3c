"""The command line through ``main([...])``: exit status, stdout (machine output) and stderr (people).

Conventions checked (DEVELOPERS.md, docs/style.md "Command line"): ``--json`` output
is the only thing on stdout; human text, progress and the final summary line go to
stderr; exit codes are engine.errors.EXIT_CODES and are listed in ``--help``. Disk
figures are checked against the PLY description (Turk 1994, "The PLY Polygon File
Format"; Bourke) [from memory]: thirteen 4-byte properties per vertex = 52 bytes, plus
the ASCII header; and against the size of a frame actually written.
"""

import json
from pathlib import Path

import numpy as np
import pytest

from engine.cli import main
from engine.errors import EXIT_CODES
from tests.test_bake import ToySolver, run, write_tiny_scene


def run_cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in err
    return code, out, err


def test_help_lists_every_exit_code(capsys):
    code, out, _ = run_cli(["--help"], capsys)
    assert code == 0
    for status, meaning in EXIT_CODES.items():
        assert f"{status:>3}  {meaning}" in out
    for command in ("bake", "info", "estimate", "validate", "demo", "compare"):
        assert command in out
    code, out, _ = run_cli(["bake", "--help"], capsys)
    assert code == 0 and "Default: sph." in out and "--resume" in out and "exit status" in out


def test_info_text_and_json(tmp_path, capsys):
    """info reports the frames, the per-frame particle counts (as listed in the manifest and as read
    back from the PLY files), the disk use (sum of file sizes) and the solver settings."""
    scene = write_tiny_scene(tmp_path)
    run(scene, tmp_path / "bake", solver=ToySolver())
    code, out, err = run_cli(["info", tmp_path / "bake", "--json"], capsys)
    assert code == 0
    info = json.loads(out)
    assert info["frames"] == 6 and info["first_frame"] == 1 and info["last_frame"] == 6 and info["complete"]
    assert info["solver"] == "sph" and info["settings"] == ToySolver().settings()
    assert info["disk_bytes"] == sum(p.stat().st_size for p in (tmp_path / "bake").rglob("*") if p.is_file())
    from engine.cache import read_ply

    counts = [len(read_ply(tmp_path / "bake" / f"points_{f:04d}.ply")["ids"]) for f in range(1, 7)]
    assert info["particles"]["min"] == min(counts) and info["particles"]["max"] == max(counts)
    assert "frames: 6 (1..6 of 1..6)" in err
    assert err.strip().splitlines()[-1].startswith("6 frames,")
    code, out, err = run_cli(["info", tmp_path / "bake"], capsys)
    assert code == 0 and out == "" and "solver sph, complete" in err


def test_estimate_json_matches_the_written_files(tmp_path, capsys):
    """estimate's particle count equals the particles of frame 1 actually baked (the fill), and its
    bytes per frame equal that frame file's size: the header plus 52 bytes per particle."""
    scene = write_tiny_scene(tmp_path)
    code, out, err = run_cli(["estimate", scene, "--json"], capsys)
    assert code == 0
    estimate = json.loads(out)
    run(scene, tmp_path / "bake", solver=ToySolver(), frames="1:1")
    first = tmp_path / "bake" / "points_0001.ply"
    from engine.cache import read_ply

    count = len(read_ply(first)["ids"])
    assert estimate["particles"] == count > 0
    assert estimate["frame_bytes"] == first.stat().st_size
    header = first.read_bytes().split(b"end_header\n")[0] + b"end_header\n"
    assert estimate["frame_bytes"] == len(header) + 52 * count
    assert estimate["disk_bytes"] == 6 * estimate["frame_bytes"]
    assert estimate["memory_bytes"] > count * 1000 and estimate["seconds"] > 0
    assert "rough" in err and err.strip().splitlines()[-1].startswith(f"estimate: 6 frames, {count} particles")


def test_compare_is_dispatched(capsys):
    code, out, _ = run_cli(["compare", "--help"], capsys)
    assert code == 0 and "dir_a" in out.lower()


def test_demo_scene_is_written_and_loads(tmp_path):
    """The demo shot's files load as a valid scene; closed outward meshes (checked by the loader:
    positive divergence-theorem volume); the full preset lands in the 20-40k particle range asked
    for, the small preset is small. Particle counts come from the World's own fill."""
    from engine.demo import write_demo_scene
    from engine.geometry import check_mesh
    from engine.mesh_io import read_mesh
    from engine.scene import load_scene
    from engine.world import build_world

    small = load_scene(write_demo_scene(tmp_path / "small", preset="small"))
    assert 500 < build_world(small).estimate_particles()["total"] < 3000
    full_path = write_demo_scene(tmp_path / "full")
    boulder = check_mesh(*read_mesh(Path(full_path).parent / "meshes" / "boulder.obj"))
    assert boulder.is_closed and boulder.volume > 0
    full = load_scene(full_path)
    assert full.bounds.faces["z_max"] == "open" and all(full.bounds.faces[f] == "wall" for f in
                                                       ("x_min", "x_max", "y_min", "y_max", "z_min"))  # fmt: skip
    assert 20000 <= build_world(full).estimate_particles()["total"] <= 40000
    assert (full.frame_end - full.frame_start + 1) / full.fps >= 2.0
    again = write_demo_scene(tmp_path / "again")
    assert Path(again).read_bytes() == Path(full_path).read_bytes()
    assert (Path(again).parent / "meshes" / "boulder.obj").read_bytes() == \
        (Path(full_path).parent / "meshes" / "boulder.obj").read_bytes(), "the boulder must be deterministic"


def test_bake_through_main_with_the_real_solver(tmp_path, capsys):
    """``bake`` with DFSPH on a tiny scene: exit 0, nothing on stdout, JSON events then the summary
    line on stderr; the cache reads back with the frames asked for."""
    scene = write_tiny_scene(tmp_path, frame_end=4)
    code, out, err = run_cli(["bake", scene, "--out", tmp_path / "bake", "--progress", "json"], capsys)
    assert code == 0 and out == ""
    lines = err.strip().splitlines()
    events = [json.loads(line) for line in lines[:-1]]
    assert [e["event"] for e in events] == ["start", "frame", "frame", "frame", "frame", "finished"]
    assert lines[-1].startswith("baked: 4 frames written (last frame 4), ") and str(tmp_path / "bake") in lines[-1]
    from engine.cache import open_cache

    cache = open_cache(tmp_path / "bake")
    assert cache.frames == [1, 2, 3, 4] and cache.manifest["solver"]["name"] == "sph"
    assert cache.manifest["solver"]["settings"]["cfl_factor"] == 0.4
    density = cache.read_frame(4)["density"]
    assert np.all(np.isfinite(density)) and np.all(density > 0)


def test_validate_reports_and_maps_the_verdict_to_the_exit_status(capsys, monkeypatch):
    """The CLI side of ``validate``: it prints simulated against published values with the error and
    exits 7 (EXIT_CODES) when the case is outside tolerance, 0 inside; --json is the result on
    stdout. The case run is replaced by a fixed result here (the physics is tested in test_sph.py and
    by the validation cases themselves); the published values are the first two Martin & Moyce 1952
    front points (physics-references.md 6a, secondary transcription [S])."""
    from engine import validate

    def fake_run_case(name, progress=None):
        simulated = {"0.41": 1.05, "0.84": 1.31}
        rms = float(np.sqrt(np.mean([(1.05 - 1.11) ** 2, (1.31 - 1.22) ** 2])))
        return {"case": name, "passed": rms <= limit, "metrics": {"front_rms_error": rms,
                "front_at_table_T": simulated, "published_Z": {"0.41": 1.11, "0.84": 1.22}},
                "tolerances": {"front_rms_error": limit}, "source": "Martin & Moyce 1952"}  # fmt: skip

    monkeypatch.setattr(validate, "run_case", fake_run_case)
    limit = 0.05
    code, out, err = run_cli(["validate", "dam-break", "--json"], capsys)
    assert code == 7 and json.loads(out)["passed"] is False
    assert "case dam-break: OUTSIDE tolerance" in err and "front_rms_error: 0.0764853 (tolerance 0.05)" in err
    assert "0.84              1.31              1.22       +0.09" in err
    assert "error: validation case dam-break fell outside the published tolerance" in err
    limit = 0.15
    code, out, err = run_cli(["validate", "dam-break"], capsys)
    assert code == 0 and out == "" and "1 of 1 cases within tolerance" in err
    code, _, err = run_cli(["validate", "no-such-case"], capsys)
    assert code == 64 and "choose one of hydrostatic, dam-break, sloshing, impact or 'all'" in err
