"""Property-based and fuzz tests of every reader of files from disk.

Property (hypothesis, generated inputs): whatever a scene file, a mesh file (PLY header and body,
npz arrays) or a cache manifest holds, its reader returns a valid result or raises the engine's
named error for that kind of file (engine/errors.py); nothing else escapes, and a result that is
returned satisfies the reader's documented contract (shapes, dtypes, ranges). The oracle is that
contract, stated in DEVELOPERS.md and the readers' docstrings.

Fuzz sample: a fixed-seed run of tools/fuzz_inputs.py (every mutation family, through the loaders
and the command line) must show no traceback, hang, silently wrong cache or write outside --out.
The full run of 5,000+ cases is the tool's own command (see its docstring).
"""

import io
import json
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from engine.cache import MANIFEST_NAME, CacheReader, verify_frames
from engine.errors import CacheError, MeshError, SceneError
from engine.inputs import LIMITS
from engine.mesh_io import read_mesh
from engine.scene import load_scene

ROOT = Path(__file__).resolve().parents[1]
from tools import fuzz_inputs

FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                        HealthCheck.too_slow])  # fmt: skip

json_values = st.recursive(
    st.none() | st.booleans() | st.integers(min_value=-(10**30), max_value=10**30)
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=20),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=8), children, max_size=4),
    max_leaves=12,
)  # fmt: skip


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzzbase")
    fuzz_inputs.write_base(folder)
    return folder


@FAST
@given(data=st.data())
def test_scene_reader_returns_a_valid_scene_or_a_scene_error(base, data):
    scene = fuzz_inputs.base_scene()
    paths = [p for p in fuzz_inputs.leaf_paths(scene) if p]
    where = data.draw(st.sampled_from(paths))
    fuzz_inputs.set_path(scene, where, data.draw(json_values))
    path = base / "h_scene.json"
    path.write_text(json.dumps(scene))
    try:
        loaded = load_scene(path)
    except SceneError:
        return
    low, high = LIMITS["fps"]
    assert low <= loaded.fps <= high
    assert LIMITS["particle_spacing"][0] <= loaded.particle_spacing <= LIMITS["particle_spacing"][1]
    assert np.all(loaded.bounds.lower < loaded.bounds.upper) and np.all(np.abs(loaded.bounds.upper) <= 1e5)
    for emitter in loaded.stream_emitters:
        assert abs(np.linalg.norm(emitter.direction) - 1.0) < 1e-9 and 0 < emitter.speed <= LIMITS["speed"][1]


_PLY_TYPES = ["char", "uchar", "short", "ushort", "int", "uint", "float", "double", "int8", "float64", "bogus"]


@FAST
@given(
    vertex_count=st.integers(min_value=-5, max_value=10**13) | st.integers(0, 10),
    face_count=st.integers(min_value=-5, max_value=10**13) | st.integers(0, 10),
    count_type=st.sampled_from(_PLY_TYPES), item_type=st.sampled_from(_PLY_TYPES),
    coord_type=st.sampled_from(_PLY_TYPES), fmt=st.sampled_from(["binary_little_endian", "binary_big_endian", "ascii"]),
    body=st.binary(max_size=400),
)  # fmt: skip
def test_ply_mesh_reader_returns_a_valid_mesh_or_a_mesh_error(tmp_path_factory, vertex_count, face_count, count_type,
                                                             item_type, coord_type, fmt, body):  # fmt: skip
    header = (f"ply\nformat {fmt} 1.0\nelement vertex {vertex_count}\nproperty {coord_type} x\n"
              f"property {coord_type} y\nproperty {coord_type} z\nelement face {face_count}\n"
              f"property list {count_type} {item_type} vertex_indices\nend_header\n")  # fmt: skip
    path = tmp_path_factory.mktemp("ply") / "m.ply"
    path.write_bytes(header.encode() + body)
    _check_mesh_reader(path)


@FAST
@given(
    dtype=st.sampled_from(["<f8", "<f4", "<i8", "|u1", "|b1", "<U3", "|S2", "<c16", "O", "[('a', '<f8')]"]),
    shape=st.lists(st.integers(min_value=0, max_value=10**7), min_size=0, max_size=3),
    payload=st.binary(max_size=300), key=st.sampled_from(["vertices", "triangles", "other"]),
)  # fmt: skip
def test_npz_mesh_reader_returns_a_valid_mesh_or_a_mesh_error(tmp_path_factory, dtype, shape, payload, key):
    """Hand-made npy headers (any dtype, any claimed shape) over arbitrary bytes."""
    header = io.BytesIO()
    descr = eval(dtype) if dtype.startswith("[") else dtype  # noqa: S307 -- a literal from the list above
    np.lib.format.write_array_header_1_0(header, {"descr": descr, "fortran_order": False, "shape": tuple(shape)})
    path = tmp_path_factory.mktemp("npz") / "m.npz"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr(f"{key}.npy", header.getvalue() + payload)
        archive.writestr("triangles.npy" if key != "triangles" else "vertices.npy", _npy(np.zeros((1, 3), np.int64)))
    _check_mesh_reader(path)


def _npy(array):
    buffer = io.BytesIO()
    np.save(buffer, array)
    return buffer.getvalue()


def _check_mesh_reader(path):
    try:
        vertices, triangles = read_mesh(path)
    except MeshError:
        return
    assert vertices.dtype == np.float64 and vertices.ndim == 2 and vertices.shape[1] == 3
    assert triangles.dtype == np.int64 and triangles.ndim == 2 and triangles.shape[1] == 3
    assert len(triangles) == 0 or (triangles.min() >= 0 and triangles.max() < len(vertices))


@pytest.fixture(scope="module")
def baked(tmp_path_factory):
    from engine.bake import bake

    folder = tmp_path_factory.mktemp("fuzzcache")
    scene = fuzz_inputs.write_base(folder)
    bake(scene, "sph", folder / "cache", use_signals=False)
    return folder / "cache", json.loads((folder / "cache" / MANIFEST_NAME).read_text())


@FAST
@given(data=st.data())
def test_manifest_reader_returns_a_true_reader_or_a_cache_error(baked, data):
    """Any field of a real manifest replaced by any JSON value: open + verify either refuses with a
    CacheError or every frame it calls good is a frame of its own range, listed under its own name."""
    folder, manifest = baked
    manifest = json.loads(json.dumps(manifest))
    paths = [p for p in fuzz_inputs.leaf_paths(manifest) if p]
    fuzz_inputs.set_path(manifest, data.draw(st.sampled_from(paths)), data.draw(json_values))
    original = (folder / MANIFEST_NAME).read_text()
    try:
        (folder / MANIFEST_NAME).write_text(json.dumps(manifest))
        try:
            reader = CacheReader(folder)
            good, _ = verify_frames(reader)
        except CacheError:
            return
        for frame in good:
            assert reader.manifest["frame_start"] <= frame <= reader.manifest["frame_end"]
            assert reader.frame_path(frame).name == f"points_{frame:04d}.ply"
    finally:
        (folder / MANIFEST_NAME).write_text(original)


def test_fuzz_sample_has_no_traceback_hang_wrong_result_or_outside_write(tmp_path):
    """A fixed-seed sample of tools/fuzz_inputs.py: 300 cases through loaders and the command line,
    plus 4 as real processes."""
    report = fuzz_inputs.fuzz(300, seed=7, limit=5.0, processes=4, work=tmp_path)
    assert report["totals"]["named"] > 300 and report["totals"]["accepted"] > 50, fuzz_inputs.format_table(report)
    assert fuzz_inputs.is_clean(report), json.dumps(report["examples"], indent=1)[:3000]
