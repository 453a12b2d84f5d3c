"""Bad input never crashes, hangs, lies or deletes (the robustness contract of DEVELOPERS.md).

Oracles: the error contract (engine/errors.py: every failure a named ``SplashdraftError`` whose
message names the field and the fix, the documented exit status, no traceback), the file system
itself (which files exist before and after a command, outside and inside ``--out``), and an
uninterrupted bake of the same scene (a resumed or repaired cache must hold byte-identical frames,
equal sha256, as DEVELOPERS.md asks). Each case here was a defect of the engine before this file
existed; the comment on each names what the old code did.
"""

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from engine.cache import CacheWriter, checkpoint_bytes, open_cache, read_checkpoint
from engine.cli import main
from engine.errors import BudgetError, MeshError, SceneError
from engine.mesh_io import read_mesh
from engine.scene import load_scene, scene_hash
from tests.test_bake import checksums, run, write_tiny_scene

ROOT = Path(__file__).resolve().parents[1]


def run_cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in err and "Traceback" not in out
    return code, out, err


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    folder = tmp_path_factory.mktemp("robust")
    scene = write_tiny_scene(folder)
    reference = folder / "reference"
    run(scene, reference)
    return scene, reference


def _copy_cache(source, target):
    target.mkdir(parents=True)
    for path in source.rglob("*"):
        if path.is_file():
            destination = target / path.relative_to(source)
            destination.parent.mkdir(parents=True, exist_ok=True)
            destination.write_bytes(path.read_bytes())
    return target


def _edit_manifest(folder, change):
    path = folder / "manifest.json"
    manifest = json.loads(path.read_text())
    change(manifest)
    path.write_text(json.dumps(manifest))


# --------------------------------------------------------------------------- nothing outside --out


def test_fresh_bake_never_deletes_files_a_manifest_points_outside_the_folder(tiny, tmp_path, capsys):
    """Old code: a fresh bake unlinked every ``file`` of the old manifest, ``../`` and absolute paths
    included. Now a manifest naming other files is refused by name, and even with --overwrite only
    the folder's own frame files are replaced."""
    scene, reference = tiny
    out = _copy_cache(reference, tmp_path / "out")
    outside = tmp_path / "precious.txt"
    absolute = tmp_path / "elsewhere" / "keep.ply"
    absolute.parent.mkdir()
    for victim in (outside, absolute):
        victim.write_text("not the engine's")

    def point_outside(manifest):
        manifest["frames"]["2"]["file"] = "../precious.txt"
        manifest["frames"]["3"]["file"] = str(absolute)

    _edit_manifest(out, point_outside)
    code, _, err = run_cli(["bake", scene, "--out", out, "--progress", "none"], capsys)
    assert code == 4 and "frame entry '2': file '../precious.txt' is not this frame's file 'points_0002.ply'" in err
    assert outside.read_text() == "not the engine's" and absolute.read_text() == "not the engine's"
    result = run(scene, out, overwrite=True)
    assert result.frames_written == 6
    assert outside.read_text() == "not the engine's" and absolute.read_text() == "not the engine's"
    assert checksums(out) == checksums(reference)


def test_stale_temporary_files_of_a_dead_bake_are_removed(tiny, tmp_path):
    """Old code: ``.name.tmp-PID`` files of a killed bake stayed forever. Only the engine's own
    temporary names of processes that no longer run are removed; other files stay."""
    scene, reference = tiny
    out = _copy_cache(reference, tmp_path / "out")
    dead = _dead_pid()
    stale = [out / f".points_0003.ply.tmp-{dead}", out / f".manifest.json.tmp-{dead}",
             out / f".checkpoint.npz.tmp-{dead}", out / "scene" / f".scene.json.tmp-{dead}"]  # fmt: skip
    foreign = [out / f".notes.txt.tmp-{dead}", out / "mine.ply"]
    for path in stale + foreign:
        path.write_bytes(b"half a file")
    run(scene, out, resume=True)
    assert [p.name for p in stale if p.exists()] == []
    assert all(p.exists() for p in foreign)


def _dead_pid():
    process = subprocess.Popen([sys.executable, "-c", "pass"])
    process.wait()
    return process.pid


@pytest.mark.parametrize("solver", ["sph", "learned"])
def test_killed_bake_resumes_bit_identically_and_leaves_no_temporary_files(tmp_path, solver):
    """A real ``python -m engine bake`` of either solver killed with SIGKILL, then resumed: every frame
    equals an uninterrupted bake's and no ``.tmp-`` file is left in the folder. A temporary file of the
    killed process is planted as if the kill had landed mid-write (old code left such files for ever)."""
    scene = write_tiny_scene(tmp_path, frame_end=24)
    full = tmp_path / "full"
    subprocess.run([sys.executable, "-m", "engine", "bake", str(scene), "--solver", solver, "--out", str(full),
                    "--progress", "none"], cwd=ROOT, check=True, capture_output=True, timeout=300)  # fmt: skip
    out = tmp_path / "killed"
    process = subprocess.Popen(
        [sys.executable, "-m", "engine", "bake", str(scene), "--solver", solver, "--out", str(out), "--progress", "json"],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    try:
        frames = 0
        while frames < 2:
            line = process.stderr.readline()
            assert line, "the bake ended before two frames"
            frames += line.startswith('{"event": "frame"')
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=60)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    assert open_cache(out).manifest["complete"] is False, "the kill landed after the bake had finished"
    (out / f".points_0004.ply.tmp-{process.pid}").write_bytes(b"ply\nhalf")
    resumed = subprocess.run([sys.executable, "-m", "engine", "bake", str(scene), "--solver", solver, "--out", str(out),
                              "--resume", "--progress", "none"], cwd=ROOT, capture_output=True, text=True,
                             timeout=300)  # fmt: skip
    assert resumed.returncode == 0, resumed.stderr
    assert checksums(out) == checksums(full)
    assert open_cache(out).manifest["complete"] is True
    assert [p.name for p in out.rglob("*") if ".tmp" in p.name] == []


# --------------------------------------------------------------------------- caches that cannot lie


def test_resume_with_a_checkpoint_claiming_a_later_frame_bakes_the_missing_frames(tiny, tmp_path):
    """Old code: a checkpoint saying frame 5 after frames 1-3 made --resume exit 0 and mark the cache
    complete with frames 4 and 5 missing. Now the resume sees the gap and bakes again."""
    scene, reference = tiny
    out = tmp_path / "out"
    calls = []
    run(scene, out, should_stop=lambda: len(calls) >= 2 or calls.append(1))
    state, frame, hash_hex = read_checkpoint(out / "checkpoint.npz")
    assert frame == 3
    (out / "checkpoint.npz").write_bytes(checkpoint_bytes(state, 5, hash_hex))
    result = run(scene, out, resume=True)
    assert any("frame 4 is missing" in note for note in result.notes), result.notes
    assert checksums(out) == checksums(reference)
    assert open_cache(out).manifest["complete"] is True


@pytest.mark.parametrize("damage", ["missing", "corrupt"])
def test_resume_repairs_a_damaged_early_frame(tiny, tmp_path, damage):
    """Old code: with frame 2 deleted or corrupted, --resume of a finished cache changed nothing and
    the cache stayed marked complete. Now every kept frame is verified and the bad one baked again."""
    scene, reference = tiny
    out = _copy_cache(reference, tmp_path / "out")
    frame = out / "points_0002.ply"
    if damage == "missing":
        frame.unlink()
    else:
        data = bytearray(frame.read_bytes())
        data[-5] ^= 0x55
        frame.write_bytes(bytes(data))
    result = run(scene, out, resume=True)
    assert result.notes and "points_0002.ply" in result.notes[0]
    assert checksums(out) == checksums(reference)
    cache = open_cache(out)
    assert cache.manifest["complete"] is True
    for number in cache.frames:
        cache.read_frame(number)


def test_swapped_frame_entries_are_refused_by_name(tiny, tmp_path, capsys):
    """Old code: swapping the manifest entries of frames 2 and 3 went unnoticed by info --verify."""
    _, reference = tiny
    out = _copy_cache(reference, tmp_path / "out")

    def swap(manifest):
        frames = manifest["frames"]
        frames["2"], frames["3"] = frames["3"], frames["2"]

    _edit_manifest(out, swap)
    code, _, err = run_cli(["info", out, "--verify"], capsys)
    assert code == 4
    assert "frame entry '2': file 'points_0003.ply' is not this frame's file 'points_0002.ply'" in err


def test_complete_only_when_every_frame_is_present(tmp_path):
    """A writer asked to mark a cache complete with frame 2 of 1..3 missing leaves it incomplete."""
    header = {"scene_name": "unit", "scene_hash": "a" * 64, "solver": {"name": "sph", "settings": {}},
              "fps": 24, "frame_start": 1, "frame_end": 3, "particle_spacing": 0.05, "rest_density": 1000.0}
    writer = CacheWriter(tmp_path / "c", header)
    empty = {"positions": np.zeros((0, 3)), "velocities": np.zeros((0, 3)), "ids": np.zeros(0, np.int64),
             "density": np.zeros(0), "pressure": np.zeros(0)}  # fmt: skip
    for frame in (1, 3):
        writer.write_frame(frame, empty, time=(frame - 1) / 24, substeps=0, seconds=0.0)
    assert writer.mark_complete() is False and writer.missing_frames() == [2]
    assert open_cache(tmp_path / "c").manifest["complete"] is False


BAD_MANIFEST_VALUES = [
    ("file is a number", lambda m: m["frames"]["1"].update(file=7)),
    ("file is null", lambda m: m["frames"]["1"].update(file=None)),
    ("particles text", lambda m: m["frames"]["1"].update(particles="many")),
    ("seconds text", lambda m: m["frames"]["1"].update(seconds="slow")),
    ("time text", lambda m: m["frames"]["1"].update(time="noon")),
    ("fps text", lambda m: m.update(fps="fast")),
    ("frame_start text", lambda m: m.update(frame_start="one")),
    ("particle_spacing text", lambda m: m.update(particle_spacing="fine")),
    ("rest_density text", lambda m: m.update(rest_density="heavy")),
    ("frame_end text", lambda m: m.update(frame_end="last")),
    ("solver a string", lambda m: m.update(solver="sph")),
    ("frame key huge", lambda m: m["frames"].update({"9" * 5000: m["frames"]["1"]})),
]


@pytest.mark.parametrize("label, change", BAD_MANIFEST_VALUES, ids=[c[0] for c in BAD_MANIFEST_VALUES])
def test_malformed_manifest_fields_are_named_errors_everywhere(tiny, tmp_path, capsys, label, change):
    """Old code: these gave tracebacks in info, --verify, compare or --resume. Now each is exit 4 with
    a message naming the manifest field."""
    scene, reference = tiny
    out = _copy_cache(reference, tmp_path / "out")
    _edit_manifest(out, change)
    for argv in (["info", out], ["info", out, "--verify", "--json"], ["compare", reference, out],
                 ["bake", scene, "--out", out, "--resume", "--progress", "none"]):  # fmt: skip
        code, _, err = run_cli(argv, capsys)
        assert code == 4, (argv, err)
        assert err.count("error: ") == 1 and "manifest.json: " in err and "bake the cache again" in err, err


def test_compare_uses_the_scene_stored_in_the_cache_and_says_so(tiny, tmp_path, capsys):
    """Old code: compare rebuilt whatever scene file the manifest named, even one edited since the bake.
    Now the bake stores the scene in its folder (same scene_hash), and compare uses and names that copy."""
    scene, reference = tiny
    stored = reference / "scene" / "scene.json"
    assert scene_hash(load_scene(stored)) == scene_hash(load_scene(scene))
    edited_folder = tmp_path / "edited"
    edited = write_tiny_scene(edited_folder, block=((0.0, 0.0, 0.0), (0.2, 0.15, 0.15)))
    out = _copy_cache(reference, tmp_path / "out")
    _edit_manifest(out, lambda m: m.update(scene_file=str(edited)))
    code, out_text, err = run_cli(["compare", reference, out, "--json"], capsys)
    assert code == 0, err
    result = json.loads(out_text)
    assert result["scene"] == f"{out / 'scene' / 'scene.json'} (the copy stored in cache B)"
    assert result["penetrating_particles"] == 0
    code, _, err = run_cli(["compare", reference, out, "--scene", edited], capsys)
    assert code == 1 and "is not the scene" in err and "its hash differs" in err


# --------------------------------------------------------------------------- scene inputs


def _scene_with(tmp_path, change):
    scene = write_tiny_scene(tmp_path)
    data = json.loads(scene.read_text())
    change(data)
    scene.write_text(json.dumps(data) if isinstance(data, dict) else data)
    return scene


def _stream(**fields):
    stream = {"name": "spout", "type": "stream", "shape": "disc", "center": [0.15, 0.07, 0.2],
              "direction": [0, 0, -1], "radius": 0.03, "speed": 1.0, "frame_start": 1, "frame_end": 3}
    stream.update(fields)
    return lambda d: d["emitters"].append(stream)


SCENE_FAULTS = [
    # (label, change, error class, message) -- old behaviour in the comment
    ("fps 1e-300", lambda d: d.update(fps=1e-300), SceneError, r"fps: must be >= 0.1, got 1e-300"),  # hang
    ("fps 1e300", lambda d: d.update(fps=1e300), SceneError, r"fps: must be <= 10000"),  # bake crash
    ("rest_density 1e300", lambda d: d["fluid"].update(rest_density=1e300) if "fluid" in d
     else d.update(fluid={"rest_density": 1e300}), SceneError, r"fluid.rest_density: must be <= 100000"),
    ("stream speed 1e36", _stream(speed=1e36), SceneError, r'emitter "spout": speed: must be <= 1000'),  # hang
    ("stream frame_end 1e32", _stream(frame_end=1e32), SceneError, r'emitter "spout": frame_end: expected a whole'),
    ("direction 1e308", _stream(direction=[1e308, 1e308, 1e308]), SceneError,
     r'emitter "spout": direction\[0\]: must be <= 1e\+06'),  # normalised to zero and accepted
    ("huge radius", _stream(radius=1e300), SceneError, r'emitter "spout": radius: must be <= 100000'),  # overflow
    ("huge bounds", lambda d: d["bounds"].update(max=[1e308, 1, 1]), SceneError, r"bounds.max\[0\]: must be <= 100000"),
    ("coordinates 1e307", lambda d: d["bounds"].update(min=[-1e307, 0, 0]), SceneError, r"bounds.min\[0\]: must be >= -100000"),
    ("frames 1e6 apart", lambda d: d.update(frame_end=999_999), SceneError, r"the shot has 999,999 frames"),
    ("name with a slash", lambda d: d.update(name="../up"), SceneError, r"name: expected a name"),
]


@pytest.mark.parametrize("label, change, error, message", SCENE_FAULTS, ids=[c[0] for c in SCENE_FAULTS])
def test_out_of_range_scene_values_are_named(tmp_path, label, change, error, message):
    scene = _scene_with(tmp_path, change)
    with pytest.raises(error, match=message):
        load_scene(scene)


@pytest.mark.parametrize("text, message", [
    ("[" * 100_000 + "]" * 100_000, r"scene file is nested too deeply"),  # RecursionError
    ('{"format": "splashdraft-scene", "version": ' + "7" * 5000 + "}", r"an integer of 5000 digits"),  # ValueError
    ('{"fps": NaN}', r"NaN is not a JSON number"),
])  # fmt: skip
def test_pathological_json_is_a_scene_error(tmp_path, text, message):
    path = tmp_path / "scene.json"
    path.write_text(text)
    with pytest.raises(SceneError, match=message):
        load_scene(path)


def test_rigid_translation_of_1e300_is_named(tmp_path):
    """Old code accepted it; the world then computed with 1e300 m translations."""
    matrices = np.repeat(np.eye(4)[None], 3, axis=0)
    matrices[:, 0, 3] = 1e300
    (tmp_path / "meshes").mkdir()
    np.savez(tmp_path / "meshes" / "far.npz", matrices=matrices)
    stream = _stream(transforms="meshes/far.npz")
    scene = _scene_with(tmp_path, stream)
    with pytest.raises(SceneError, match=r'emitter "spout": transform 0 has an entry beyond 100000'):
        load_scene(scene)


def test_tiny_spacing_is_refused_before_anything_is_allocated(tmp_path, capsys):
    """Old code built the world first (boundary samples of 1e9 walls) and failed as out of memory."""
    scene = _scene_with(tmp_path, lambda d: d.update(particle_spacing=1e-4))
    for command in ("estimate", "bake"):
        argv = [command, scene] + (["--out", tmp_path / "out", "--progress", "none"] if command == "bake" else [])
        code, _, err = run_cli(argv, capsys)
        assert code == 3, err
        assert "about 2,250,000,000 particles at spacing 0.0001 m exceed what a budget of 1,000,000" in err


# --------------------------------------------------------------------------- meshes


def _ply(header_lines, body=b""):
    return ("\n".join(["ply", "format binary_little_endian 1.0"] + header_lines + ["end_header"]) + "\n").encode() + body


MESH_FAULTS = [
    ("ply list count -1", "m.ply", _ply(["element vertex 3", "property float x", "property float y", "property float z",
                                         "element face 1", "property list int int vertex_indices"],
                                        np.zeros(9, "<f4").tobytes() + np.array([-1, 0, 1, 2], "<i4").tobytes()),
     r"list count -1 does not fit the file"),
    ("ply list count huge", "m.ply", _ply(["element vertex 3", "property float x", "property float y",
                                           "property float z", "element face 1", "property list int int vertex_indices"],
                                          np.zeros(9, "<f4").tobytes() + np.array([2**30, 0, 1, 2], "<i4").tobytes()),
     r"list count 1073741824 does not fit the file"),
    ("ply element count huge", "m.ply", _ply(["element vertex 99999999999", "property float x", "property float y",
                                              "property float z"]), r"element count 99999999999 does not fit"),
    ("npz garbage after zip magic", "m.npz", b"PK\x03\x04" + b"\x00garbage" * 20, r"npz mesh is unreadable"),
]  # fmt: skip


@pytest.mark.parametrize("label, name, data, message", MESH_FAULTS, ids=[c[0] for c in MESH_FAULTS])
def test_malformed_mesh_files_are_mesh_errors(tmp_path, label, name, data, message):
    """Old code: ValueError from numpy (list counts) and BadZipFile (npz) escaped as tracebacks."""
    path = tmp_path / name
    path.write_bytes(data)
    with pytest.raises(MeshError, match=message):
        read_mesh(path)


@pytest.mark.parametrize("vertices, message", [
    (np.array(["a", "b", "c"]), r"array 'vertices' holds <U1 values, not numbers"),
    (np.zeros(3, dtype=[("x", "f8"), ("y", "f8")]), r"array 'vertices' holds .* values, not numbers"),
])  # fmt: skip
def test_npz_meshes_of_strings_or_records_are_mesh_errors(tmp_path, vertices, message):
    path = tmp_path / "m.npz"
    np.savez(path, vertices=vertices, triangles=np.zeros((1, 3), np.int64))
    with pytest.raises(MeshError, match=message):
        read_mesh(path)


def test_npz_transforms_that_are_not_a_zip_are_scene_errors(tmp_path):
    (tmp_path / "meshes").mkdir()
    (tmp_path / "meshes" / "bad.npz").write_bytes(b"PK\x03\x04not really a zip")
    scene = _scene_with(tmp_path, _stream(transforms="meshes/bad.npz"))
    with pytest.raises(SceneError, match=r'emitter "spout": transforms file "meshes/bad.npz" is unreadable'):
        load_scene(scene)


def test_npz_array_whose_header_promises_more_than_the_file_holds(tmp_path):
    """A header claiming 10^12 rows is refused from the header, before numpy allocates them."""
    import io
    import zipfile

    buffer = io.BytesIO()
    np.lib.format.write_array_header_1_0(buffer, {"descr": "<f8", "fortran_order": False, "shape": (10**12, 3)})
    with zipfile.ZipFile(tmp_path / "m.npz", "w") as archive:
        archive.writestr("vertices.npy", buffer.getvalue())  # the header (with its magic) and no data
        archive.writestr("triangles.npy", _npy_array(np.zeros((1, 3), np.int64)))
    with pytest.raises(MeshError, match=r"array 'vertices' has shape \(1000000000000, 3\)"):
        read_mesh(tmp_path / "m.npz")


def _npy_array(array):
    import io

    buffer = io.BytesIO()
    np.save(buffer, array)
    return buffer.getvalue()


# --------------------------------------------------------------------------- command line tidiness


def test_closed_pipe_ends_quietly(tiny):
    """Old code: ``info --json | head -c 20`` printed a BrokenPipeError traceback."""
    _, reference = tiny
    result = subprocess.run(
        f"{sys.executable} -m engine info {reference} --json | head -c 20 > /dev/null; echo ${{PIPESTATUS[0]}} >&2",
        shell=True, executable="/bin/bash", cwd=ROOT, capture_output=True, text=True, timeout=120,
    )  # fmt: skip
    assert "Traceback" not in result.stderr and "BrokenPipe" not in result.stderr, result.stderr
    assert result.stderr.strip().splitlines()[-1] in ("0", "141")


def test_bake_error_is_printed_once(tmp_path, capsys):
    """Old code printed a failing bake's message twice (progress bar line and the error line)."""
    scene = _scene_with(tmp_path, lambda d: d.update(budget={"max_particles": 10}))
    code, _, err = run_cli(["bake", scene, "--out", tmp_path / "out", "--progress", "bar"], capsys)
    assert code == 3 and err.count("exceed the budget of 10") == 1, err


def test_no_write_outside_out_for_a_learned_bake_home(tmp_path):
    """onnxruntime must not leave files in the user's home during a learned bake (HOME is an empty
    folder here; after the bake it must still be empty)."""
    home = tmp_path / "home"
    home.mkdir()
    scene = write_tiny_scene(tmp_path, frame_end=2)
    env = dict(os.environ, HOME=str(home), XDG_CACHE_HOME=str(home / ".cache"))
    result = subprocess.run([sys.executable, "-m", "engine", "bake", str(scene), "--solver", "learned", "--out",
                             str(tmp_path / "out"), "--progress", "none"], cwd=ROOT, env=env, capture_output=True,
                            text=True, timeout=300)  # fmt: skip
    assert result.returncode == 0, result.stderr
    assert [str(p.relative_to(home)) for p in home.rglob("*")] == []


def test_zero_gravity_with_the_learned_solver_is_a_scene_error(tmp_path, capsys):
    """Old code: a ValueError traceback from the learned features after the world was built."""
    scene = _scene_with(tmp_path, lambda d: d.update(gravity=[0, 0, 0]))
    for command in ("estimate", "bake"):
        argv = [command, scene, "--solver", "learned"]
        argv += ["--out", tmp_path / "out", "--progress", "none"] if command == "bake" else []
        code, _, err = run_cli(argv, capsys)
        assert code == 2 and "gravity has length 0 m/s^2; the learned preview needs gravity" in err, err
        assert "--solver sph" in err


def test_budget_error_is_named_for_stream_layers(tmp_path):
    """A stream whose layer count exceeds any budget is refused by the closed-form bound (400 m/s: a
    faster stream is refused at load, faster than the solver can follow at this spacing)."""
    from engine.estimate import check_work

    scene = load_scene(_scene_with(tmp_path, _stream(speed=400.0, frame_end=20000)))
    with pytest.raises(BudgetError, match=r"particles at spacing 0.025 m exceed what a budget"):
        check_work(scene)


@pytest.mark.parametrize("key, value, message", [
    ("inputs", "all of them", r"inputs is not a JSON list"),  # AttributeError before
    ("normalisation", [1, 2], r"normalisation is not a JSON dict"),  # AttributeError before
    ("onnx_file", "../elsewhere.onnx", r"onnx_file must be a file name beside it"),  # ValueError before
    ("rounds", 10**9, r"rounds = 1000000000 is not a whole number from 1 to 100"),  # accepted before
])  # fmt: skip
def test_malformed_model_contract_fields_are_model_errors(tmp_path, key, value, message):
    from engine.errors import ModelError
    from engine.learned import LearnedSolver
    from tests.test_learned import copy_model

    path = copy_model(tmp_path, **{key: value})
    with pytest.raises(ModelError, match=message):
        LearnedSolver(model=path)


def test_zero_particle_budget_on_the_command_line_is_a_usage_error(tmp_path, capsys):
    """Old code: ``--max-particles 0`` ended in a ZeroDivisionError traceback."""
    scene = write_tiny_scene(tmp_path)
    code, _, err = run_cli(["estimate", scene, "--max-particles", 0], capsys)
    assert code == 64 and "argument --max-particles: 0 is outside 1 .. 100,000,000" in err


def test_an_emitter_faster_than_the_solver_can_follow_is_refused_at_load(tmp_path):
    """A stream at 1000 m/s at 3 cm spacing needs CFL substeps near solver.min_time_step (0.4 * 0.03 /
    1e-5 = 1200 m/s is where the step reaches it): the fuzz run found such a bake grinding for more
    than 5 s before a runaway error. The loader refuses it by name, with the limit and the fix."""
    import json as _json

    from engine.errors import SceneError
    from engine.scene import load_scene

    from tools import fuzz_inputs

    fuzz_inputs.write_base(tmp_path)
    data = _json.loads((tmp_path / "scene.json").read_text())
    data["emitters"][1]["speed"] = 1000.0
    (tmp_path / "scene.json").write_text(_json.dumps(data))
    with pytest.raises(SceneError, match=r'emitter "spout" starts liquid at 1000 m/s, faster than the 600 m/s'):
        load_scene(tmp_path / "scene.json")
    data["emitters"][1]["speed"] = 100.0
    (tmp_path / "scene.json").write_text(_json.dumps(data))
    assert load_scene(tmp_path / "scene.json").emitters[1].speed == 100.0
