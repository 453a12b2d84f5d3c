"""The bad-input catalogue through the command line: each gives its named error and exit status.

Source of the expected behaviour: the project's error contract (DEVELOPERS.md and
engine/errors.py EXIT_CODES: 2 invalid scene or mesh, 3 budget exceeded, 4 cache
missing, corrupt or unwritable, 64 usage), checked as the user sees it: one
``error: ...`` line on stderr that names the object and the fix, the documented
exit status, and never a Python traceback. The broken meshes are built here from a
closed box (mesh_io.box_mesh) by deleting one triangle (an open surface: 3 edges
used once, Euler's count for a removed face), flattening it to z = 0 (volume 0 by
the divergence theorem) and writing a NaN coordinate.
"""

import json
from pathlib import Path

import numpy as np
import pytest

from engine.cli import main
from engine.mesh_io import box_mesh, write_obj
from tests.test_bake import ToySolver, run, write_tiny_scene


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    folder = tmp_path_factory.mktemp("bad")
    base_path = write_tiny_scene(folder)
    base = json.loads(base_path.read_text())
    vertices, triangles = box_mesh((0, 0, 0), (0.1, 0.15, 0.15))
    write_obj(folder / "meshes" / "open.obj", vertices, triangles[:-1])
    write_obj(folder / "meshes" / "flat.obj", vertices * np.array([1.0, 1.0, 0.0]), triangles)
    nan_vertices = vertices.copy()
    nan_vertices[3, 1] = np.nan
    text = "".join(f"v {x!r} {y!r} {z!r}\n" for x, y, z in nan_vertices)
    text += "".join(f"f {a + 1} {b + 1} {c + 1}\n" for a, b, c in triangles)
    (folder / "meshes" / "nan.obj").write_text(text)

    def variant(name, change):
        data = json.loads(json.dumps(base))
        change(data)
        path = folder / f"{name}.json"
        path.write_text(json.dumps(data))
        return path

    return {
        "good": base_path,
        "open": variant("open", lambda d: d["emitters"][0].update(mesh="meshes/open.obj")),
        "flat": variant("flat", lambda d: d["emitters"][0].update(mesh="meshes/flat.obj")),
        "nan": variant("nan", lambda d: d["emitters"][0].update(mesh="meshes/nan.obj")),
        "empty": variant("empty", lambda d: d.update(emitters=[])),
        "spacing": variant("spacing", lambda d: d.update(particle_spacing=-0.01)),
        "unknown": variant("unknown", lambda d: d.update(colour="blue")),
        "budget": variant("budget", lambda d: d.update(budget={"max_particles": 50})),
        "folder": folder,
    }


def run_cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in err and "Traceback" not in out
    return code, out, err


CATALOGUE = [
    ("open", 2, r'emitter "block": mesh is not closed \(3 open edges\); close it'),
    ("flat", 2, r'emitter "block": mesh has zero volume'),
    ("nan", 2, r'emitter "block": mesh has 1 vertices with NaN'),
    ("empty", 2, r"the scene has no emitters; add a fill or stream emitter"),
    ("spacing", 2, r"particle_spacing: must be > 0, got -0.01"),
    ("unknown", 2, r'unknown key "colour"'),
    ("budget", 3, r"scene 'tiny': about 60 particles exceed the budget of 50; raise particle_spacing"),
]


@pytest.mark.parametrize("name, code, message", CATALOGUE, ids=[c[0] for c in CATALOGUE])
@pytest.mark.parametrize("command", ["bake", "estimate"])
def test_bad_scene_gives_named_error_and_exit_status(scenes, capsys, tmp_path, name, code, message, command):
    import re

    argv = [command, scenes[name]] + (["--out", tmp_path / "out", "--progress", "none"] if command == "bake" else [])
    status, out, err = run_cli(argv, capsys)
    assert status == code
    lines = err.strip().splitlines()
    assert lines[-1].startswith("error: ") and re.search(message, lines[-1]), err
    assert out == ""
    assert not (tmp_path / "out" / "manifest.json").exists(), "nothing is baked from a bad scene"


def test_budget_override_on_the_command_line(scenes, capsys, tmp_path):
    status, _, err = run_cli(["estimate", scenes["good"], "--max-particles", 30], capsys)
    assert status == 3 and "budget of 30" in err
    status, _, _ = run_cli(["estimate", scenes["budget"], "--max-particles", 1000], capsys)
    assert status == 0


def test_unwritable_output_folder(scenes, capsys, tmp_path):
    blocker = tmp_path / "plain_file"
    blocker.write_text("x")
    status, _, err = run_cli(["bake", scenes["good"], "--out", blocker / "bake", "--progress", "none"], capsys)
    assert status == 4
    assert "error: output folder" in err and "choose a writable --out folder" in err


def test_missing_and_corrupt_cache_frames(scenes, capsys, tmp_path):
    run(scenes["good"], tmp_path / "bake", solver=ToySolver())
    status, _, _ = run_cli(["info", tmp_path / "bake", "--verify"], capsys)
    assert status == 0
    frame = tmp_path / "bake" / "points_0004.ply"
    data = bytearray(frame.read_bytes())
    data[-1] ^= 0xFF
    frame.write_bytes(bytes(data))
    status, _, err = run_cli(["info", tmp_path / "bake", "--verify"], capsys)
    assert status == 4 and "points_0004.ply: frame 4 is corrupt (sha256 does not match" in err
    frame.unlink()
    status, _, err = run_cli(["info", tmp_path / "bake", "--verify"], capsys)
    assert status == 4 and "points_0004.ply: frame 4 is listed in the manifest but the file is missing" in err
    status, _, err = run_cli(["info", tmp_path / "nowhere"], capsys)
    assert status == 4 and "cache folder does not exist" in err


def test_corrupt_checkpoint_on_resume(scenes, capsys, tmp_path):
    run(scenes["good"], tmp_path / "bake", solver=ToySolver(), frames="1:3")
    (tmp_path / "bake" / "checkpoint.npz").write_bytes(b"not a zip archive")
    status, _, err = run_cli(["bake", scenes["good"], "--out", tmp_path / "bake", "--resume", "--progress", "none"],
                             capsys)  # fmt: skip
    assert status == 4 and "checkpoint.npz: checkpoint is unreadable" in err and "without --resume" in err


def test_usage_errors_exit_64(scenes, capsys, tmp_path):
    for argv in (["bake", scenes["good"]], ["frobnicate"], ["bake", scenes["good"], "--out", tmp_path, "--solver", "x"],
                 ["estimate", scenes["good"], "--max-particles", "many"], []):  # fmt: skip
        status, _, err = run_cli(argv, capsys)
        assert status == 64, argv
        assert "error:" in err
    status, _, err = run_cli(["bake", scenes["good"], "--out", tmp_path / "o", "--frames", "3-5"], capsys)
    assert status == 64 and "expected two frame numbers as A:B" in err
    status, _, err = run_cli(["bake", scenes["good"], "--out", tmp_path / "o", "--frames", "2:99"], capsys)
    assert status == 64 and "runs from frame 1 to 6" in err


def test_missing_scene_file(capsys, tmp_path):
    status, _, err = run_cli(["bake", tmp_path / "nope.json", "--out", tmp_path / "o"], capsys)
    assert status == 2 and "scene file not found" in err
