"""Fuzz the engine's inputs: mutated scene files, meshes, motion arrays and caches.

Usage (from the repository root, with the project's venv):

    .venv/bin/python -m tools.fuzz_inputs --cases 5000 --seed 1 --json out/fuzz.json
    .venv/bin/python -m tools.fuzz_inputs --cases 200 --subprocess 20    # a quick look

Every case is a folder holding a small valid shot (a fill block, a disc stream, a rigid collider
with an npz transform, a PLY collider) and, for the cache families, a finished bake of it; one
mutation is applied, then the case runs through the loaders (``load_scene``, ``estimate_scene``,
``open_cache`` + ``verify_frames``) and through the command line (``engine.cli.main`` in this
process: ``estimate``, ``bake --frames 1:2``, ``info --verify``, ``compare``, ``bake --resume``),
each under a time limit (``--limit``, default 5 s). ``--subprocess N`` also runs N sampled
cases as real ``python -m engine`` processes with the same limit.

Outcomes, per run of a case through one entry point:

- ``named``: a ``SplashdraftError`` (loaders) or a non-zero documented exit status with one
  ``error: ...`` line that is not an internal error (command line);
- ``accepted``: the input was valid and the call succeeded;
- ``traceback``: any other exception, or the command line's ``internal error`` line;
- ``hang``: the time limit passed;
- ``wrong``: accepted but the result is not true (a resumed or verified cache whose frames differ
  from the reference bake, a cache marked complete with frames missing);
- ``outside``: any file outside the case's ``out`` folder was created, changed or deleted.

Prints a table (family x outcome) and writes the JSON of all counts and the first examples of
every outcome other than named/accepted. Exit status 0 when there are no tracebacks, hangs, wrong
results or outside writes, 1 otherwise.
"""

import argparse
import contextlib
import hashlib
import io
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import zipfile
from collections import Counter, defaultdict
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

from engine.bake import bake  # noqa: E402
from engine.cache import checkpoint_bytes, open_cache, read_checkpoint, verify_frames  # noqa: E402
from engine.cli import main as cli_main  # noqa: E402
from engine.errors import EXIT_CODES, SplashdraftError  # noqa: E402
from engine.estimate import estimate_scene  # noqa: E402
from engine.mesh_io import box_mesh, write_npz, write_obj, write_ply  # noqa: E402
from engine.scene import load_scene  # noqa: E402

OUTCOMES = ("named", "accepted", "traceback", "hang", "wrong", "outside")


class Hang(BaseException):
    """Raised by the alarm when a case runs past its limit (BaseException: no handler may swallow it)."""


def _alarm(signum, frame):
    raise Hang


# --------------------------------------------------------------------------- the base shot


def base_scene():
    """The valid shot every scene case starts from (about 150 particles at 0.03 m)."""
    return {
        "format": "splashdraft-scene", "version": 1, "name": "fuzz_base", "fps": 24, "frame_start": 1,
        "frame_end": 3, "particle_spacing": 0.03, "seed": 0, "gravity": [0.0, 0.0, -9.81],
        "fluid": {"rest_density": 1000.0, "viscosity": 0.02},
        "bounds": {"min": [0, 0, 0], "max": [0.4, 0.2, 0.4], "faces": {"z_max": "open"}},
        "solver": {"cfl_factor": 0.4, "max_time_step": 0.004, "min_time_step": 1e-5,
                   "density_tolerance": 0.0005, "divergence_tolerance": 0.001, "max_iterations": 100},
        "budget": {"max_particles": 20000},
        "emitters": [
            {"name": "block", "type": "fill", "mesh": "meshes/block.obj", "velocity": [0, 0, 0], "jitter": 0.0},
            {"name": "spout", "type": "stream", "shape": "disc", "center": [0.3, 0.1, 0.3], "direction": [0, 0, -1],
             "radius": 0.03, "speed": 1.0, "frame_start": 1, "frame_end": 2, "transforms": "meshes/spout.npz"},
        ],
        "colliders": [
            {"name": "rock", "mesh": "meshes/rock.ply", "motion": "static", "friction": 0.0},
            {"name": "paddle", "mesh": "meshes/paddle.npz", "motion": "rigid", "transforms": "meshes/paddle_t.npz"},
        ],
    }  # fmt: skip


def write_base(folder):
    """Write the base shot's scene file and meshes into ``folder``; returns the scene path."""
    meshes = folder / "meshes"
    meshes.mkdir(parents=True, exist_ok=True)
    write_obj(meshes / "block.obj", *box_mesh((0.03, 0.03, 0.03), (0.15, 0.15, 0.15)))
    write_ply(meshes / "rock.ply", *box_mesh((0.25, 0.05, 0.0), (0.32, 0.12, 0.06)))
    write_npz(meshes / "paddle.npz", *box_mesh((0.0, 0.0, 0.0), (0.04, 0.04, 0.04)))
    moves = np.repeat(np.eye(4)[None], 3, axis=0)
    moves[:, 0, 3] = [0.2, 0.22, 0.24]
    moves[:, 2, 3] = 0.25
    np.savez(meshes / "paddle_t.npz", matrices=moves)
    np.savez(meshes / "spout.npz", matrices=np.repeat(np.eye(4)[None], 2, axis=0))
    path = folder / "scene.json"
    path.write_text(json.dumps(base_scene(), indent=1))
    return path


# --------------------------------------------------------------------------- mutations

NASTY_VALUES = [
    None, True, False, "", "x", "../../escape", "/etc/passwd", "a\x00b", "ä" * 300, -1, 0, 1, 2**63, -(2**63),
    1e-300, -1e-300, 1e300, -1e300, 1e308, 1e36, 1e32, 0.5, -0.5, [], {}, [1], [1e308, 1e308, 1e308],
    [1e307, 0, 0], [0, 0, 0], {"a": 1}, [[[[]]]],
]  # fmt: skip
#: Raw JSON text spliced in for a value (what json.dumps cannot write).
NASTY_TEXT = ["NaN", "Infinity", "-Infinity", "7" * 5000, "1e999", "[" * 2000 + "]" * 2000, '"' + "a" * 100000 + '"']


def leaf_paths(value, prefix=()):
    """Every path to a value in a JSON structure (dict keys and list indices), containers included."""
    paths = [prefix]
    if isinstance(value, dict):
        for key, child in value.items():
            paths += leaf_paths(child, prefix + (key,))
    elif isinstance(value, list):
        for index, child in enumerate(value):
            paths += leaf_paths(child, prefix + (index,))
    return paths


def _get(data, path):
    for key in path:
        data = data[key]
    return data


def set_path(data, path, value):
    target = data
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value


def delete_path(data, path):
    target = data
    for key in path[:-1]:
        target = target[key]
    del target[path[-1]]


def mutate_scene_json(rng, folder):
    """Scene file families: a value replaced, raw text spliced, a key deleted or added, bytes flipped."""
    path = folder / "scene.json"
    data = base_scene()
    paths = [p for p in leaf_paths(data) if p]
    kind = rng.choice(["value", "value", "scale", "scale", "scale", "text", "delete", "add", "bytes", "truncate",
                       "nesting"])  # fmt: skip
    if kind == "scale":  # plausible but extreme: a number times 10^k, perhaps negated
        paths = [p for p in paths if isinstance(_get(data, p), (int, float)) and not isinstance(_get(data, p), bool)]
    where = rng.choice(paths)
    if kind == "scale":
        value = _get(data, where) * 10.0 ** rng.randint(-12, 12) * rng.choice([1, 1, 1, -1])
        set_path(data, where, int(value) if isinstance(_get(data, where), int) and abs(value) < 1e18 else value)
        path.write_text(json.dumps(data))
    elif kind == "value":
        set_path(data, where, rng.choice(NASTY_VALUES))
        path.write_text(json.dumps(data))
    elif kind == "text":
        marker = "__SPLICE__"
        set_path(data, where, marker)
        path.write_text(json.dumps(data).replace(f'"{marker}"', rng.choice(NASTY_TEXT)))
    elif kind == "delete":
        delete_path(data, where)
        path.write_text(json.dumps(data))
    elif kind == "add":
        parent = where[:-1]
        target = data
        for key in parent:
            target = target[key]
        if isinstance(target, dict):
            target["unexpected_" + str(rng.randrange(100))] = rng.choice(NASTY_VALUES)
        else:
            target.append(rng.choice(NASTY_VALUES))
        path.write_text(json.dumps(data))
    elif kind == "bytes":
        raw = bytearray(json.dumps(data).encode())
        for _ in range(rng.randint(1, 8)):
            raw[rng.randrange(len(raw))] = rng.randrange(256)
        path.write_bytes(bytes(raw))
    elif kind == "truncate":
        raw = json.dumps(data).encode()
        path.write_bytes(raw[: rng.randrange(len(raw))])
    else:
        depth = rng.choice([100, 5000, 100000])
        path.write_text("[" * depth + json.dumps(data) + "]" * depth)
    return f"scene {kind} at {'/'.join(map(str, where))}"


def _npy(array_or_header):
    buffer = io.BytesIO()
    if isinstance(array_or_header, dict):
        np.lib.format.write_array_header_1_0(buffer, array_or_header)
    else:
        np.save(buffer, array_or_header, allow_pickle=True)
    return buffer.getvalue()


def nasty_npz(rng, key, good, companions=None):
    """Bytes of an npz that holds ``key`` in some broken way (or a wrong key), plus the valid ``companions``."""
    companions = companions or {}
    kind = rng.choice(["garbage_zip", "strings", "records", "objects", "huge_header", "wrong_key", "nan",
                       "huge_values", "shape", "empty", "truncated", "bool", "int_overflow", "benign_float32"])
    if kind == "benign_float32":  # valid: the same array as float32 (and int32 triangles)
        buffer = io.BytesIO()
        np.savez(buffer, **{key: good.astype(np.float32)}, **{k: v.astype(np.int32) for k, v in companions.items()})
        return buffer.getvalue(), kind
    if kind == "garbage_zip":
        return b"PK\x03\x04" + bytes(rng.randrange(256) for _ in range(200)), kind
    if kind == "truncated":
        buffer = io.BytesIO()
        np.savez(buffer, **{key: good}, **companions)
        data = buffer.getvalue()
        return data[: rng.randrange(len(data))], kind
    arrays = {
        "strings": np.array(["a", "b", "c"]),
        "records": np.zeros(3, dtype=[("x", "f8"), ("y", "i4")]),
        "objects": np.array([{"a": 1}, None], dtype=object),
        "nan": np.where(np.ones_like(good, bool), np.nan, good),
        "huge_values": good * 1e300 + 1e300,
        "shape": np.zeros((2, 5, 7)),
        "empty": np.zeros((0,) + good.shape[1:]),
        "bool": np.ones(good.shape, bool),
        "int_overflow": np.full(good.shape, np.iinfo(np.int64).max),
    }
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        if kind == "huge_header":
            archive.writestr(f"{key}.npy", _npy({"descr": "<f8", "fortran_order": False, "shape": (10**12, 4, 4)}))
        elif kind == "wrong_key":
            archive.writestr("other.npy", _npy(good))
        else:
            archive.writestr(f"{key}.npy", _npy(arrays[kind]))
        for name, array in companions.items():
            archive.writestr(f"{name}.npy", _npy(array))
    return buffer.getvalue(), kind


def mutate_mesh(rng, folder):
    """Mesh families: OBJ, PLY and npz meshes and npz transforms, broken in format-specific ways."""
    meshes = folder / "meshes"
    target = rng.choice(["obj", "ply", "npz_mesh", "transforms"])
    if target == "obj":
        lines = (meshes / "block.obj").read_text().splitlines()
        kind = rng.choice(["bad_index", "huge_index", "nan", "huge_coord", "bytes", "few", "empty", "benign"])
        if kind == "benign":  # still valid: comments, groups, normals and texture indices the reader ignores
            lines = ["# fuzz", "o block", "s off", "vn 0 0 1"] + [
                line if not line.startswith("f ") else "f " + " ".join(f"{t}/{t}/1" for t in line.split()[1:])
                for line in lines
            ]  # fmt: skip
        elif kind == "bad_index":
            lines.append(f"f 1 2 {rng.choice(['-999', '0', 'x', '99999999999999999999'])}")
        elif kind == "huge_index":
            lines.append("f 1 2 " + "9" * 5000)
        elif kind == "nan":
            lines[1] = "v nan 0 0"
        elif kind == "huge_coord":
            lines[1] = f"v {rng.choice(['1e307', '1e309', '-1e300'])} 0 0"
        elif kind == "few":
            lines.append("f 1")
        elif kind == "empty":
            lines = []
        text = "\n".join(lines).encode()
        if kind == "bytes":
            raw = bytearray(text)
            for _ in range(rng.randint(1, 20)):
                raw[rng.randrange(len(raw))] = rng.randrange(256)
            text = bytes(raw)
        (meshes / "block.obj").write_bytes(text)
        return f"obj {kind}"
    if target == "ply":
        data = (meshes / "rock.ply").read_bytes()
        end = data.index(b"end_header\n") + len(b"end_header\n")
        header, body = data[:end].decode(), data[end:]
        kind = rng.choice(["count_-1", "count_huge", "list_-1", "list_huge", "type", "body_flip", "truncate",
                           "format", "dup_prop", "benign_ascii"])  # fmt: skip
        if kind == "benign_ascii":  # the same mesh as ascii PLY with a comment: valid
            vertices = np.frombuffer(body[: 8 * 24], "<f8").reshape(8, 3)
            faces = np.frombuffer(body[8 * 24 :], dtype=[("n", "u1"), ("i", "<i4", (3,))])["i"]
            header = header.replace("binary_little_endian", "ascii").replace("comment", "comment fuzz\ncomment")
            body = ("\n".join(" ".join(repr(float(x)) for x in v) for v in vertices) + "\n"
                    + "\n".join("3 " + " ".join(str(int(i)) for i in f) for f in faces) + "\n").encode()
        elif kind == "count_-1":
            header = header.replace("element vertex 8", "element vertex -1")
        elif kind == "count_huge":
            header = header.replace("element face 12", "element face " + rng.choice(["99999999999", "9" * 5000]))
        elif kind in ("list_-1", "list_huge"):
            header = header.replace("property list uchar int", "property list int int")
            count = -1 if kind == "list_-1" else 2**30
            faces = np.frombuffer(body[8 * 24 :], dtype=[("n", "u1"), ("i", "<i4", (3,))])
            out = bytearray()
            for row, face in enumerate(faces):
                out += np.int32(count if row == 0 else 3).tobytes() + face["i"].astype("<i4").tobytes()
            body = body[: 8 * 24] + bytes(out)
        elif kind == "type":
            header = header.replace("property double x", "property quaternion x")
        elif kind == "body_flip":
            raw = bytearray(body)
            for _ in range(rng.randint(1, 30)):
                raw[rng.randrange(len(raw))] = rng.randrange(256)
            body = bytes(raw)
        elif kind == "truncate":
            body = body[: rng.randrange(len(body))]
        elif kind == "format":
            header = header.replace("binary_little_endian", rng.choice(["ascii", "binary_big_endian", "bogus"]))
        else:
            header = header.replace("property double y", "property double x")
        (meshes / "rock.ply").write_bytes(header.encode() + body)
        return f"ply {kind}"
    if target == "npz_mesh":
        with np.load(meshes / "paddle.npz") as archive:
            good, triangles = archive["vertices"], archive["triangles"]
        data, kind = nasty_npz(rng, "vertices", good, {"triangles": triangles})
        (meshes / "paddle.npz").write_bytes(data)
        return f"npz mesh {kind}"
    good = np.load(meshes / "paddle_t.npz")["matrices"]
    data, kind = nasty_npz(rng, "matrices", good)
    (meshes / rng.choice(["paddle_t.npz", "spout.npz"])).write_bytes(data)
    return f"transforms {kind}"


def mutate_cache(rng, out, reference_manifest):
    """Cache families: manifest fields, frame entries, frame files, checkpoint, temporary files."""
    manifest = json.loads(json.dumps(reference_manifest))
    kind = rng.choice(["field", "field", "entry", "swap", "escape", "frame_file", "checkpoint", "checkpoint_later",
                       "tmp", "manifest_bytes", "extra_frame"])  # fmt: skip
    frames = manifest["frames"]
    keys = sorted(frames, key=int)
    detail = kind
    if kind == "field":
        field = rng.choice(["fps", "frame_start", "frame_end", "particle_spacing", "rest_density", "solver",
                            "scene_hash", "complete", "frames", "format", "version", "scene_file"])  # fmt: skip
        manifest[field] = rng.choice(NASTY_VALUES)
        detail = f"field {field}"
    elif kind == "entry":
        key = rng.choice(keys)
        field = rng.choice(["file", "particles", "sha256", "time", "substeps", "seconds"])
        frames[key][field] = rng.choice(NASTY_VALUES)
        detail = f"entry {field}"
    elif kind == "swap":
        a, b = rng.sample(keys, 2)
        frames[a], frames[b] = frames[b], frames[a]
    elif kind == "escape":
        key = rng.choice(keys)
        frames[key]["file"] = rng.choice(["../victim.txt", str(out.parent / "victim.txt"), "scene/../../victim.txt"])
    elif kind == "frame_file":
        key = rng.choice(keys)
        path = out / frames[key]["file"]
        how = rng.choice(["delete", "flip", "truncate", "empty"])
        if how == "delete":
            path.unlink()
        elif how == "flip":
            raw = bytearray(path.read_bytes())
            raw[rng.randrange(len(raw))] ^= 0xFF
            path.write_bytes(bytes(raw))
        elif how == "truncate":
            path.write_bytes(path.read_bytes()[:100])
        else:
            path.write_bytes(b"")
        detail = f"frame file {how}"
    elif kind == "checkpoint":
        data, how = nasty_npz(rng, "positions", np.zeros((4, 3)))
        (out / "checkpoint.npz").write_bytes(data)
        detail = f"checkpoint {how}"
    elif kind == "checkpoint_later":
        state, frame, hash_hex = read_checkpoint(out / "checkpoint.npz")
        (out / "checkpoint.npz").write_bytes(checkpoint_bytes(state, frame + rng.choice([1, 5, 10**6]), hash_hex))
    elif kind == "tmp":
        (out / f".points_0002.ply.tmp-{_dead_pid()}").write_bytes(b"half")
    elif kind == "extra_frame":
        frames[str(rng.choice([0, 99, -5]))] = dict(frames[keys[0]])
    if kind == "manifest_bytes":
        raw = bytearray(json.dumps(manifest).encode())
        for _ in range(rng.randint(1, 10)):
            raw[rng.randrange(len(raw))] = rng.randrange(256)
        (out / "manifest.json").write_bytes(bytes(raw))
    else:
        (out / "manifest.json").write_text(json.dumps(manifest))
    return f"cache {detail}"


_DEAD = []


def _dead_pid():
    if not _DEAD:
        process = subprocess.Popen([sys.executable, "-c", "pass"])
        process.wait()
        _DEAD.append(process.pid)
    return _DEAD[0]


# --------------------------------------------------------------------------- running


def snapshot(folder, skip):
    """{relative path: sha256} of every file under ``folder`` except under ``skip``."""
    result = {}
    for path in folder.rglob("*"):
        if path.is_file() and skip not in path.parents and path != skip:
            result[str(path.relative_to(folder))] = hashlib.sha256(path.read_bytes()).hexdigest()
    return result


def timed(limit, call):
    """Run ``call()`` with an alarm after ``limit`` seconds: ("ok", value) | ("hang", None) | ("exc", exc)."""
    signal.setitimer(signal.ITIMER_REAL, limit)
    try:
        return "ok", call()
    except Hang:
        return "hang", None
    except BaseException as exc:  # noqa: BLE001 -- the fuzzer classifies whatever escapes
        return "exc", exc
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)


def run_cli(argv, limit):
    """(outcome, text) of ``engine.cli.main(argv)`` in this process."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        status, value = timed(limit, lambda: cli_main([str(a) for a in argv]))
    text = err.getvalue()
    if status == "hang":
        return "hang", text[-300:]
    if status == "exc":
        return "traceback", f"{type(value).__name__}: {value}"[:300]
    if value == 0:
        return "accepted", ""
    lines = [line for line in text.splitlines() if line.startswith("error: ") or ": error: " in line]
    if value in EXIT_CODES and len(lines) == 1 and "internal error" not in lines[0] and "Traceback" not in text:
        return "named", lines[0][:200]
    return "traceback", text[-300:]


def run_loader(call, limit):
    status, value = timed(limit, call)
    if status == "hang":
        return "hang", ""
    if status == "exc":
        if isinstance(value, SplashdraftError):
            return "named", str(value)[:200]
        return "traceback", f"{type(value).__name__}: {value}"[:300]
    return "accepted", ""


def _file_sha(path):
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return None


def cache_is_true(out, reference, is_repaired):
    """What the engine says of a cache must hold: every frame ``verify_frames`` calls good has the
    reference bake's bytes on disk; after a resume the engine answered 0 to (``is_repaired``), every
    frame is there with those bytes and the manifest says complete."""
    try:
        cache = open_cache(out)
        good, _ = verify_frames(cache)
    except SplashdraftError:
        return not is_repaired  # it says it is broken: not a lie, unless it just claimed to have baked it
    ref = open_cache(reference)
    for frame in good:
        if _file_sha(cache.frame_path(frame)) != _file_sha(ref.frame_path(frame)):
            return False
    if is_repaired:
        return cache.manifest["complete"] is True and good == ref.frames
    return True


class Fuzzer:
    def __init__(self, work, limit, seed):
        self.work = Path(work)
        self.limit = limit
        self.rng = random.Random(seed)
        self.counts = defaultdict(Counter)
        self.examples = defaultdict(list)
        self.base = self.work / "base"
        self.scene = write_base(self.base)
        self.reference = self.base / "reference"
        bake(self.scene, "sph", self.reference, use_signals=False)
        self.reference_manifest = json.loads((self.reference / "manifest.json").read_text())

    def record(self, family, entry, outcome, detail, mutation):
        self.counts[f"{family} / {entry}"][outcome] += 1
        if outcome not in ("named", "accepted") and len(self.examples[outcome]) < 25:
            self.examples[outcome].append({"family": family, "entry": entry, "mutation": mutation, "detail": detail})

    def new_case(self, index):
        case = self.work / f"case{index:05d}"
        shutil.copytree(self.base, case, ignore=shutil.ignore_patterns("reference"))
        (case / "victim.txt").write_text("not the engine's")
        return case

    def run_case(self, index, use_cli=True):
        case = self.new_case(index)
        family = self.rng.choice(["scene", "scene", "mesh", "cache"])
        out = case / "out"
        if family == "cache":
            shutil.copytree(self.reference, out)
            mutation = mutate_cache(self.rng, out, self.reference_manifest)
        elif family == "scene":
            mutation = mutate_scene_json(self.rng, case)
        else:
            mutation = mutate_mesh(self.rng, case)
        before = snapshot(case, out)
        scene = case / "scene.json"
        runs = []
        if family == "cache":
            runs.append(("open_cache+verify", lambda: run_loader(lambda: verify_frames(open_cache(out)), self.limit)))
            if use_cli:
                for argv in (["info", out, "--verify", "--json"], ["compare", self.reference, out],
                             ["bake", scene, "--out", out, "--resume", "--progress", "none"]):  # fmt: skip
                    runs.append((" ".join(map(str, argv[:1] + argv[2:4])).replace(str(out), "OUT"),
                                 lambda argv=argv: run_cli(argv, self.limit)))  # fmt: skip
        else:
            runs.append(("load_scene+estimate", lambda: run_loader(lambda: estimate_scene(load_scene(scene)), self.limit)))
            if use_cli:
                runs.append(("estimate", lambda: run_cli(["estimate", scene], self.limit)))
                runs.append(("bake 1:2", lambda: run_cli(["bake", scene, "--out", out, "--frames", "1:2",
                                                          "--progress", "none"], self.limit)))  # fmt: skip
        for entry, go in runs:
            outcome, detail = go()
            is_resume = entry.startswith("bake")
            if family == "cache" and outcome == "accepted" and not cache_is_true(out, self.reference, is_resume):
                outcome, detail = "wrong", "the cache claims frames or completeness it does not hold"
            self.record(family, entry, outcome, detail, mutation)
        if snapshot(case, out) != before:
            self.record(family, "files outside --out", "outside", sorted(set(snapshot(case, out)) ^ set(before)), mutation)
        shutil.rmtree(case, ignore_errors=True)

    def run_subprocess(self, index):
        """One case as a real process (``python -m engine``), with the same limit."""
        case = self.new_case(index)
        mutation = mutate_scene_json(self.rng, case) if self.rng.random() < 0.6 else mutate_mesh(self.rng, case)
        out = case / "out"
        before = snapshot(case, out)
        for argv in (["estimate", "scene.json"], ["bake", "scene.json", "--out", "out", "--frames", "1:2",
                                                  "--progress", "none"]):  # fmt: skip
            try:
                done = subprocess.run([sys.executable, "-m", "engine", *argv], cwd=case, capture_output=True,
                                      text=True, timeout=self.limit + 3, env=dict(os.environ, PYTHONPATH=str(ROOT)))
            except subprocess.TimeoutExpired:
                self.record("process", argv[0], "hang", "", mutation)
                continue
            errors = [line for line in done.stderr.splitlines() if line.startswith("error: ")]
            if done.returncode == 0:
                outcome = "accepted"
            elif done.returncode in EXIT_CODES and len(errors) == 1 and "internal error" not in errors[0] \
                    and "Traceback" not in done.stderr:  # fmt: skip
                outcome = "named"
            else:
                outcome = "traceback"
            self.record("process", argv[0], outcome, done.stderr[-300:], mutation)
        if snapshot(case, out) != before:
            self.record("process", "files outside --out", "outside", "", mutation)
        shutil.rmtree(case, ignore_errors=True)


def fuzz(cases, seed=0, limit=5.0, processes=0, work=None, use_cli=True):
    """Run ``cases`` in-process cases and ``processes`` subprocess cases; returns the report dict."""
    signal.signal(signal.SIGALRM, _alarm)
    started = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="splashdraft-fuzz-", dir=work) as folder:
        fuzzer = Fuzzer(folder, limit, seed)
        for index in range(cases):
            fuzzer.run_case(index, use_cli=use_cli)
        for index in range(processes):
            fuzzer.run_subprocess(cases + index)
    totals = Counter()
    for counter in fuzzer.counts.values():
        totals.update(counter)
    return {
        "cases": cases, "process_cases": processes, "seed": seed, "limit_s": limit,
        "seconds": round(time.monotonic() - started, 1),
        "totals": {name: totals[name] for name in OUTCOMES},
        "by_entry": {key: {name: counter[name] for name in OUTCOMES} for key, counter in sorted(fuzzer.counts.items())},
        "examples": dict(fuzzer.examples),
    }  # fmt: skip


def format_table(report):
    width = max(len(key) for key in report["by_entry"]) + 2
    lines = [f"{'family / entry':<{width}}" + "".join(f"{name:>11}" for name in OUTCOMES)]
    for key, counts in report["by_entry"].items():
        lines.append(f"{key:<{width}}" + "".join(f"{counts[name]:>11}" for name in OUTCOMES))
    lines.append(f"{'total':<{width}}" + "".join(f"{report['totals'][name]:>11}" for name in OUTCOMES))
    lines.append(f"{report['cases']} cases in process + {report['process_cases']} as processes, seed {report['seed']}, "
                 f"limit {report['limit_s']} s per call, {report['seconds']} s")  # fmt: skip
    return "\n".join(lines)


def is_clean(report):
    return all(report["totals"][name] == 0 for name in ("traceback", "hang", "wrong", "outside"))


def main(argv=None):
    parser = argparse.ArgumentParser(description="Fuzz scene files, meshes and caches through the loaders and the "
                                     "command line; prints a table of outcomes.")  # fmt: skip
    parser.add_argument("--cases", type=int, default=5000, help="In-process cases. Default: 5000.")
    parser.add_argument("--subprocess", type=int, default=0, help="Extra cases run as real processes. Default: 0.")
    parser.add_argument("--seed", type=int, default=0, help="Random seed. Default: 0.")
    parser.add_argument("--limit", type=float, default=5.0, help="Seconds allowed per call. Default: 5.")
    parser.add_argument("--json", help="Also write the report as JSON to this file.")
    args = parser.parse_args(argv)
    report = fuzz(args.cases, seed=args.seed, limit=args.limit, processes=args.subprocess)
    print(format_table(report))
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(report, indent=1))
    print(json.dumps(report["totals"]))
    return 0 if is_clean(report) else 1


if __name__ == "__main__":
    sys.exit(main())
