"""Point caches: PLY frames, manifest, checksums, checkpoints, atomic writes.

The PLY checks use an independent reference parser written here from the format
description: Turk 1994, "The PLY Polygon File Format" (Stanford Graphics Lab),
as kept by Paul Bourke, "PLY - Polygon File Format" (paulbourke.net) [from
memory]: an ASCII header "ply", "format binary_little_endian 1.0",
"element vertex N", one "property <type> <name>" line per field, "end_header"
and a newline, then N packed records in header order, little-endian, with
char/uchar 1, short/ushort 2, int/uint/float 4, double 8 bytes. The reference
parser uses the standard library's ``struct`` module only, not numpy's
structured dtypes that engine/cache.py uses.
"""

import json
import os
import struct

import numpy as np
import pytest

from engine import cache
from engine.cache import CacheWriter, frame_bytes, open_cache, parse_frame, read_ply
from engine.errors import CacheError
from engine.state import State

STRUCT_CODES = {"char": "b", "uchar": "B", "short": "h", "ushort": "H", "int": "i", "uint": "I",
                "float": "f", "double": "d"}  # fmt: skip


def reference_parse(data):
    """Minimal PLY reader after Turk 1994 / Bourke: returns (format, [(type, name)], rows as tuples)."""
    position = 0
    lines = []
    while True:
        end = data.index(b"\n", position)
        line = data[position:end].decode("ascii")
        position = end + 1
        lines.append(line)
        if line == "end_header":
            break
    assert lines[0] == "ply"
    fmt = next(line.split()[1] for line in lines if line.startswith("format"))
    count = next(int(line.split()[2]) for line in lines if line.startswith("element vertex"))
    props = [tuple(line.split()[1:3]) for line in lines if line.startswith("property")]
    record = "<" + "".join(STRUCT_CODES[kind] for kind, _ in props)
    size = struct.calcsize(record)
    rows = [struct.unpack_from(record, data, position + k * size) for k in range(count)]
    assert len(data) == position + count * size, "trailing or missing bytes"
    return fmt, props, rows


def reference_write(props, rows, comments=()):
    """Minimal PLY writer after the same description (used to feed our reader other layouts)."""
    header = ["ply", "format binary_little_endian 1.0", *[f"comment {c}" for c in comments],
              f"element vertex {len(rows)}", *[f"property {kind} {name}" for kind, name in props], "end_header"]  # fmt: skip
    record = "<" + "".join(STRUCT_CODES[kind] for kind, _ in props)
    return ("\n".join(header) + "\n").encode("ascii") + b"".join(struct.pack(record, *row) for row in rows)


def random_frame(n, seed=0):
    rng = np.random.default_rng(seed)
    return {
        "positions": rng.normal(size=(n, 3)),
        "velocities": rng.normal(size=(n, 3)),
        "ids": rng.permutation(10 * n + 1)[:n],
        "density": 1000 + rng.normal(size=n),
        "pressure": rng.uniform(0, 5000, size=n),
    }


def encode(frame):
    return frame_bytes(frame["positions"], frame["velocities"], frame["ids"], frame["density"], frame["pressure"])


def test_frame_is_readable_by_an_independent_ply_parser():
    """Our frame bytes parse with a struct-based reader written from the PLY description (Turk 1994;
    Bourke) [from memory]: the header declares exactly the DEVELOPERS.md property list, the data is
    52 bytes per particle (13 four-byte properties), and every value is the float32/int32 rounding of the
    input (exact match); the white-water properties, not given here, are written as zeros."""
    frame = random_frame(57, seed=1)
    data = encode(frame)
    fmt, props, rows = reference_parse(data)
    assert fmt == "binary_little_endian"
    assert props == [("float", "x"), ("float", "y"), ("float", "z"), ("float", "vx"), ("float", "vy"),
                     ("float", "vz"), ("int", "id"), ("float", "density"), ("float", "pressure"),
                     ("int", "zone"), ("float", "trapped_air"), ("float", "wave_crest"), ("float", "foam")]  # fmt: skip
    table = np.array(rows, dtype=np.float64)
    np.testing.assert_array_equal(table[:, 0:3], frame["positions"].astype(np.float32))
    np.testing.assert_array_equal(table[:, 3:6], frame["velocities"].astype(np.float32))
    np.testing.assert_array_equal(table[:, 6], frame["ids"])
    np.testing.assert_array_equal(table[:, 7], frame["density"].astype(np.float32))
    np.testing.assert_array_equal(table[:, 8], frame["pressure"].astype(np.float32))
    np.testing.assert_array_equal(table[:, 9:], 0.0)


def test_round_trip_through_our_reader():
    """parse_frame(frame_bytes(x)) == float32(x) exactly (float32 storage is the documented precision)."""
    frame = random_frame(101, seed=2)
    back = parse_frame(encode(frame))
    np.testing.assert_array_equal(back["positions"], frame["positions"].astype(np.float32))
    np.testing.assert_array_equal(back["velocities"], frame["velocities"].astype(np.float32))
    np.testing.assert_array_equal(back["ids"], frame["ids"])
    np.testing.assert_array_equal(back["density"], frame["density"].astype(np.float32))
    np.testing.assert_array_equal(back["pressure"], frame["pressure"].astype(np.float32))


def test_empty_frame_is_a_valid_ply():
    """A frame with no particles is a valid PLY with N = 0 (DEVELOPERS.md), per the reference parser."""
    data = encode(random_frame(0))
    fmt, props, rows = reference_parse(data)
    assert rows == [] and len(props) == 13
    assert parse_frame(data)["positions"].shape == (0, 3)


def test_reader_accepts_other_property_orders_types_and_comments():
    """A header with comments, doubles and a different property order (all legal PLY per Turk 1994)
    written by the reference writer reads back with the right values."""
    props = [("double", "z"), ("double", "x"), ("double", "y"), ("uint", "id"), ("float", "pressure"),
             ("float", "density"), ("float", "vz"), ("float", "vy"), ("float", "vx"), ("uchar", "flag")]  # fmt: skip
    rows = [(0.5, 1.5, 2.5, 7, 10.0, 999.0, -1.0, -2.0, -3.0, 1), (3.0, 4.0, 5.0, 9, 0.0, 1001.0, 0, 0, 0.25, 0)]
    back = parse_frame(reference_write(props, rows, comments=["from another tool"]))
    np.testing.assert_array_equal(back["positions"], [[1.5, 2.5, 0.5], [4.0, 5.0, 3.0]])
    np.testing.assert_array_equal(back["velocities"], [[-3.0, -2.0, -1.0], [0.25, 0.0, 0.0]])
    np.testing.assert_array_equal(back["ids"], [7, 9])
    np.testing.assert_array_equal(back["density"], [999.0, 1001.0])


def test_truncated_and_non_ply_files_are_named(tmp_path):
    data = encode(random_frame(10))
    path = tmp_path / "points_0003.ply"
    path.write_bytes(data[:-5])
    with pytest.raises(CacheError, match=r"points_0003\.ply: truncated .*10 particles"):
        read_ply(path)
    path.write_bytes(b"solid ascii stl\n")
    with pytest.raises(CacheError, match=r"points_0003\.ply: not a PLY file"):
        read_ply(path)
    path.write_bytes(data.replace(b"binary_little_endian", b"binary_big_endian   "))
    with pytest.raises(CacheError, match="expected binary_little_endian"):
        read_ply(path)


HEADER = {
    "scene_name": "unit",
    "scene_hash": "a" * 64,
    "solver": {"name": "sph", "settings": {"cfl_factor": 0.4}},
    "fps": 24,
    "frame_start": 1,
    "frame_end": 3,
    "particle_spacing": 0.05,
    "rest_density": 1000.0,
}


def write_cache(folder, frames=(1, 2, 3), header=HEADER, **kwargs):
    writer = CacheWriter(folder, dict(header), **kwargs)
    written = {}
    for frame in frames:
        data = random_frame(20 + frame, seed=frame)
        writer.write_frame(frame, data, time=(frame - 1) / 24, substeps=frame, seconds=0.1)
        written[frame] = data
    return writer, written


def test_writer_and_reader_round_trip_with_manifest(tmp_path):
    """Manifest fields and frame entries follow DEVELOPERS.md; each listed sha256 equals the
    sha256 (FIPS 180-4, via hashlib) of the file's bytes; read_frame returns the data."""
    import hashlib

    writer, written = write_cache(tmp_path / "bake")
    writer.mark_complete()
    reader = open_cache(tmp_path / "bake")
    manifest = json.loads((tmp_path / "bake" / "manifest.json").read_text())
    for key in ("format", "version", "engine_version", "scene_name", "scene_hash", "solver", "fps", "frame_start",
                "frame_end", "particle_spacing", "rest_density", "attributes", "frames", "created", "updated",
                "complete"):  # fmt: skip
        assert key in manifest, key
    assert manifest["format"] == "splashdraft-cache" and manifest["version"] == 1 and manifest["complete"]
    assert manifest["attributes"] == ["x", "y", "z", "vx", "vy", "vz", "id", "density", "pressure",
                                      "zone", "trapped_air", "wave_crest", "foam"]
    assert reader.frames == [1, 2, 3]
    for frame, data in written.items():
        entry = manifest["frames"][str(frame)]
        assert entry["file"] == f"points_{frame:04d}.ply"
        assert entry["particles"] == 20 + frame and entry["substeps"] == frame
        assert hashlib.sha256(reader.frame_path(frame).read_bytes()).hexdigest() == entry["sha256"]
        np.testing.assert_array_equal(reader.read_frame(frame)["ids"], data["ids"])
    assert reader.disk_bytes() == sum(p.stat().st_size for p in (tmp_path / "bake").iterdir())


def test_corrupted_frame_is_detected_by_checksum(tmp_path):
    """Flipping one data byte (a value still parses) must fail the sha256 check, naming the file."""
    write_cache(tmp_path / "bake")
    path = tmp_path / "bake" / "points_0002.ply"
    data = bytearray(path.read_bytes())
    data[-3] ^= 0x01
    path.write_bytes(bytes(data))
    reader = open_cache(tmp_path / "bake")
    reader.read_frame(1)
    with pytest.raises(CacheError, match=r"points_0002\.ply: frame 2 is corrupt \(sha256"):
        reader.read_frame(2)


def test_missing_frame_is_named(tmp_path):
    write_cache(tmp_path / "bake")
    (tmp_path / "bake" / "points_0003.ply").unlink()
    reader = open_cache(tmp_path / "bake")
    with pytest.raises(CacheError, match=r"points_0003\.ply: frame 3 is listed in the manifest but the file is missing"):
        reader.read_frame(3)
    with pytest.raises(CacheError, match=r"frame 9 is not in the cache \(frames present: 1\.\.3\)"):
        reader.read_frame(9)


def test_bad_manifest_and_missing_folder_are_named(tmp_path):
    with pytest.raises(CacheError, match="cache folder does not exist"):
        open_cache(tmp_path / "nowhere")
    (tmp_path / "empty").mkdir()
    with pytest.raises(CacheError, match="no manifest"):
        open_cache(tmp_path / "empty")
    write_cache(tmp_path / "bake")
    (tmp_path / "bake" / "manifest.json").write_text('{"format": "splashdraft-cache", "version": 1, "frames": ')
    with pytest.raises(CacheError, match=r"manifest\.json: manifest is not valid JSON"):
        open_cache(tmp_path / "bake")


def test_writes_leave_no_temporary_files(tmp_path):
    writer, _ = write_cache(tmp_path / "bake")
    writer.write_checkpoint(State(0.1, np.zeros((2, 3)), np.ones((2, 3)), np.arange(2)), 3)
    writer.mark_complete()
    names = sorted(p.name for p in (tmp_path / "bake").iterdir())
    assert names == ["checkpoint.npz", "manifest.json", "points_0001.ply", "points_0002.ply", "points_0003.ply"]


def test_failed_write_keeps_the_old_file_and_removes_the_temporary(tmp_path, monkeypatch):
    """If the rename fails (disk full, killed), the previous manifest survives intact and no temp file stays."""
    write_cache(tmp_path / "bake")
    before = (tmp_path / "bake" / "manifest.json").read_bytes()

    def failing_replace(source, target):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(cache.os, "replace", failing_replace)
    writer = CacheWriter.__new__(CacheWriter)
    writer.folder = tmp_path / "bake"
    writer.manifest = json.loads(before)
    with pytest.raises(CacheError, match=r"manifest\.json: cannot write \(No space left on device\)"):
        writer._write_manifest()
    assert (tmp_path / "bake" / "manifest.json").read_bytes() == before
    assert not [p for p in (tmp_path / "bake").iterdir() if ".tmp" in p.name]


def test_refuses_to_overwrite_another_scenes_cache(tmp_path):
    write_cache(tmp_path / "bake")
    other = dict(HEADER, scene_name="other", scene_hash="b" * 64)
    with pytest.raises(CacheError, match="holds a cache of scene 'unit'.*pass --overwrite"):
        CacheWriter(tmp_path / "bake", other)
    CacheWriter(tmp_path / "bake", other, overwrite=True)
    reader = open_cache(tmp_path / "bake")
    assert reader.frames == [] and reader.manifest["scene_name"] == "other"
    assert not list((tmp_path / "bake").glob("points_*.ply")), "old frames must not linger"


def test_unwritable_output_folder_is_a_cache_error(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    with pytest.raises(CacheError, match=r"output folder .*a_file.*: cannot create it .*choose a writable --out"):
        CacheWriter(blocker / "bake", dict(HEADER))


def test_checkpoint_round_trip_is_exact(tmp_path):
    """The checkpoint keeps float64 state bit for bit (npz stores raw bytes), with its frame and scene hash."""
    rng = np.random.default_rng(5)
    state = State(
        time=0.123456789, positions=rng.normal(size=(7, 3)), velocities=rng.normal(size=(7, 3)),
        ids=np.arange(7, dtype=np.int64) + 3, next_id=10, removed=2,
        particle_arrays={"kappa": rng.normal(size=7), "history": rng.normal(size=(7, 2, 3)).astype(np.float32)},
        scalars={"layers_emitted": 4.0},
    )  # fmt: skip
    writer = CacheWriter(tmp_path / "bake", dict(HEADER))
    writer.write_checkpoint(state, 17)
    back, frame, scene_hash = open_cache(tmp_path / "bake").read_checkpoint()
    assert frame == 17 and scene_hash == HEADER["scene_hash"]
    assert back.time == state.time and back.next_id == 10 and back.removed == 2
    np.testing.assert_array_equal(back.positions, state.positions)
    np.testing.assert_array_equal(back.particle_arrays["kappa"], state.particle_arrays["kappa"])
    assert back.particle_arrays["history"].dtype == np.float32
    assert back.scalars == {"layers_emitted": 4.0}
    (tmp_path / "bake" / "checkpoint.npz").write_bytes(b"PK\x03\x04 broken")
    with pytest.raises(CacheError, match=r"checkpoint\.npz: checkpoint is unreadable"):
        open_cache(tmp_path / "bake").read_checkpoint()
    assert not os.path.exists(tmp_path / "bake" / ".checkpoint.npz.tmp")
