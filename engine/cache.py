"""Bake folders: per-frame PLY point files, the manifest, checkpoints and the reader.

One bake is one folder (``splashdraft-cache``, version 1; see DEVELOPERS.md):

    DIR/manifest.json        what was baked, and a sha256 per finished frame
    DIR/points_0001.ply      one binary little-endian PLY per finished frame
    DIR/checkpoint.npz       state after the last finished frame (for --resume)

Crash safety: every file is written under a temporary name in the same folder
and renamed with ``os.replace`` (atomic on POSIX and Windows), so a reader sees
either the old file or the new one, never half of one. A frame counts as baked
only once the manifest lists it with its checksum; the manifest is rewritten
after each frame.

PLY layout: Turk 1994, "The PLY Polygon File Format" (Stanford; the format
description is also kept by Paul Bourke, "PLY - Polygon File Format"). Header
lines in ASCII up to ``end_header\\n``, then N records of the properties below,
packed without padding, little-endian.
"""

import datetime
import hashlib
import io
import json
import os
import re
from pathlib import Path
from typing import NoReturn, Optional

import numpy as np

from . import __version__
from .errors import CacheError
from .inputs import LIMITS, finite_number, path_inside, read_json, read_npz, whole_number
from .state import state_from_arrays, state_to_arrays

CACHE_FORMAT = "splashdraft-cache"
CACHE_VERSION = 1
MANIFEST_NAME = "manifest.json"
CHECKPOINT_NAME = "checkpoint.npz"
#: The copy of the baked scene kept in the cache folder (meshes and motion beside it as npz).
#: The file name of a scene in the scene format, wherever one is written (cache copy, add-on export,
#: training shots, wedge variants).
SCENE_FILE = "scene.json"
SCENE_FOLDER = "scene"
SCENE_COPY = SCENE_FOLDER + "/" + SCENE_FILE

#: PLY properties of a frame, in file order: (name, PLY type). Units: m, m/s, -, kg/m^3, Pa.
PLY_PROPERTIES = (
    ("x", "float"),
    ("y", "float"),
    ("z", "float"),
    ("vx", "float"),
    ("vy", "float"),
    ("vz", "float"),
    ("id", "int"),
    ("density", "float"),
    ("pressure", "float"),
    ("zone", "int"),
    ("trapped_air", "float"),
    ("wave_crest", "float"),
    ("foam", "float"),
)
#: Properties a frame must have; the white-water ones (``engine.whitewater``) came later and are
#: read when present (caches baked before them lack them).
REQUIRED_PROPERTIES = PLY_PROPERTIES[:9]
#: The white-water properties: name -> numpy type of the array ``parse_frame`` returns.
WHITEWATER_PROPERTIES = {"zone": np.int8, "trapped_air": np.float32, "wave_crest": np.float32, "foam": np.float32}

#: PLY scalar type names (both spellings of the 1994 description) -> numpy little-endian type.
_PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "<i2", "int16": "<i2", "ushort": "<u2", "uint16": "<u2",
    "int": "<i4", "int32": "<i4", "uint": "<u4", "uint32": "<u4",
    "float": "<f4", "float32": "<f4", "double": "<f8", "float64": "<f8",
}  # fmt: skip

#: The packed record of one particle in a frame file (52 bytes).
FRAME_DTYPE = np.dtype([(name, _PLY_TYPES[kind]) for name, kind in PLY_PROPERTIES])

_MAX_HEADER_BYTES = 64 * 1024
_INT32_MAX = np.iinfo(np.int32).max


#: Name of a frame file as a Python format string (also read by Blender's Format String node).
FRAME_FILE_PATTERN = "points_{frame:04d}.ply"


def frame_file_name(frame) -> str:
    """``points_0001.ply`` style name of a frame file (4+ digits, zero padded)."""
    return FRAME_FILE_PATTERN.format(frame=int(frame))


def ply_header(count) -> bytes:
    """ASCII header (bytes) of a frame file with ``count`` particles."""
    lines = ["ply", "format binary_little_endian 1.0", "comment splashdraft points v1"]
    lines.append(f"element vertex {int(count)}")
    lines += [f"property {kind} {name}" for name, kind in PLY_PROPERTIES]
    lines.append("end_header")
    return ("\n".join(lines) + "\n").encode("ascii")


def frame_bytes(positions, velocities, ids, density, pressure, whitewater=None) -> bytes:
    """Encode one frame as PLY bytes (header + packed records).

    Args:
        positions, velocities: (N, 3) float, m and m/s (stored as float32).
        ids: (N,) int particle ids, 0 <= id < 2**31 (stored as int32).
        density, pressure: (N,) float, kg/m^3 and Pa (stored as float32).
        whitewater: dict with (N,) ``zone``, ``trapped_air``, ``wave_crest``, ``foam``
            (``engine.whitewater``); None writes zeros.

    Returns:
        bytes: the whole file; ``len(ply_header(N)) + 52 * N`` long.

    Raises:
        CacheError: arrays of the wrong shape, or ids outside int32.
    """
    positions = np.asarray(positions).reshape(-1, 3) if np.size(positions) else np.zeros((0, 3))
    velocities = np.asarray(velocities).reshape(-1, 3) if np.size(velocities) else np.zeros((0, 3))
    ids = np.asarray(ids).reshape(-1)
    density = np.asarray(density).reshape(-1)
    pressure = np.asarray(pressure).reshape(-1)
    n = len(positions)
    extras = {name: np.asarray(whitewater[name]).reshape(-1) for name in WHITEWATER_PROPERTIES} if whitewater \
        else {name: np.zeros(n) for name in WHITEWATER_PROPERTIES}
    lengths = {"velocities": len(velocities), "ids": len(ids), "density": len(density), "pressure": len(pressure)}
    lengths.update({name: len(values) for name, values in extras.items()})
    for name, length in lengths.items():
        if length != n:
            raise CacheError(
                f"frame data: {name} has {length} rows but positions has {n}; "
                "the solver must return one value per particle"
            )
    if n and (ids.min() < 0 or ids.max() > _INT32_MAX):
        raise CacheError(
            f"frame data: particle ids span {ids.min()}..{ids.max()}, outside the PLY int range; "
            "bake fewer emitted particles"
        )
    records = np.empty(n, FRAME_DTYPE)
    for axis, name in enumerate("xyz"):
        records[name] = positions[:, axis]
        records["v" + name] = velocities[:, axis]
    records["id"] = ids
    records["density"] = density
    records["pressure"] = pressure
    for name, values in extras.items():
        records[name] = values
    return ply_header(n) + records.tobytes()


def _parse_header(data, source):
    """Parse a PLY header; returns (vertex count, record dtype, data offset).

    Accepts comment and obj_info lines, either spelling of the scalar types,
    and any property order; needs binary little-endian and a first element
    ``vertex`` with scalar properties only.
    """
    if not data.startswith(b"ply\n") and not data.startswith(b"ply\r\n"):
        raise CacheError(f"{source}: not a PLY file (no 'ply' magic line); bake this frame again")
    end = data.find(b"end_header", 0, _MAX_HEADER_BYTES)
    if end < 0:
        raise CacheError(f"{source}: PLY header has no end_header line (file truncated?); bake this frame again")
    newline = data.find(b"\n", end)
    if newline < 0:
        raise CacheError(f"{source}: PLY header is truncated after end_header; bake this frame again")
    try:
        lines = data[:end].decode("ascii").replace("\r", "").split("\n")
    except UnicodeDecodeError as exc:
        raise CacheError(f"{source}: PLY header is not ASCII ({exc}); bake this frame again") from exc
    fmt = None
    elements = []  # [name, count, [(prop, dtype)]]
    for number, line in enumerate(lines[1:], start=2):
        words = line.split()
        if not words or words[0] in ("comment", "obj_info"):
            continue
        if words[0] == "format":
            fmt = words[1:]
        elif words[0] == "element" and len(words) == 3:
            try:
                count = int(words[2])
            except ValueError:
                count = -1
            if count < 0:
                raise CacheError(f"{source}: header line {number} has a bad element count {words[2]!r}")
            elements.append([words[1], count, []])
        elif words[0] == "property" and elements:
            if len(words) != 3 or words[1] not in _PLY_TYPES:
                raise CacheError(
                    f"{source}: header line {number} {line!r} is not a scalar property this reader knows"
                )
            elements[-1][2].append((words[2], _PLY_TYPES[words[1]]))
        else:
            raise CacheError(f"{source}: header line {number} {line!r} is not valid PLY")
    if fmt != ["binary_little_endian", "1.0"]:
        raise CacheError(f"{source}: PLY format {' '.join(fmt or ['missing'])!r}, expected binary_little_endian 1.0")
    if not elements or elements[0][0] != "vertex":
        raise CacheError(f"{source}: PLY has no leading 'element vertex'; not a point cache frame")
    _, count, props = elements[0]
    names = [p for p, _ in props]
    if len(set(names)) != len(names):
        raise CacheError(f"{source}: PLY vertex declares a property twice; not a splashdraft frame")
    missing = [name for name, _ in REQUIRED_PROPERTIES if name not in [p for p, _ in props]]
    if missing:
        raise CacheError(f"{source}: PLY vertex lacks properties {', '.join(missing)}; not a splashdraft frame")
    return count, np.dtype(props), newline + 1


def parse_frame(data, source="frame") -> dict:
    """Decode PLY bytes into a dict of arrays.

    Returns:
        dict with ``positions`` (N, 3), ``velocities`` (N, 3), ``density``,
        ``pressure`` (N,) as float32 and ``ids`` (N,) int32 (whatever types
        the header declares, converted); and ``zone`` (int8), ``trapped_air``,
        ``wave_crest``, ``foam`` (float32) when the file has them.

    Raises:
        CacheError naming ``source`` when the header is invalid or the data is short.
    """
    count, dtype, offset = _parse_header(data, source)
    need = count * dtype.itemsize
    have = len(data) - offset
    if have < need:
        raise CacheError(
            f"{source}: truncated ({have} data bytes, header promises {count} particles = {need} bytes); "
            "bake this frame again"
        )
    records = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
    arrays = {
        "positions": np.stack([records["x"], records["y"], records["z"]], axis=1).astype(np.float32),
        "velocities": np.stack([records["vx"], records["vy"], records["vz"]], axis=1).astype(np.float32),
        "ids": records["id"].astype(np.int32),
        "density": records["density"].astype(np.float32),
        "pressure": records["pressure"].astype(np.float32),
    }
    for name, kind in WHITEWATER_PROPERTIES.items():
        if name in dtype.names:
            arrays[name] = records[name].astype(kind)
    return arrays


def read_ply(path) -> dict:
    """Read one frame file (no checksum check); see ``parse_frame``."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise CacheError(f"{path}: frame file is missing; bake the cache again") from exc
    except OSError as exc:
        raise CacheError(f"{path}: cannot read frame file ({exc.strerror}); check its permissions") from exc
    return parse_frame(data, str(path))


def sha256_bytes(data) -> str:
    return hashlib.sha256(data).hexdigest()


def write_atomic(path, data) -> None:
    """Write ``data`` (bytes) to ``path`` via a temporary file in the same folder and ``os.replace``.

    The temporary file is removed if anything fails, so no partial file is
    left under either name.
    """
    path = Path(path)
    temporary = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    try:
        with open(temporary, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    except BaseException:
        # Re-raised at once; the clean-up must also run on KeyboardInterrupt.
        try:
            temporary.unlink()
        except OSError:
            pass
        raise


def _now():
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


#: Frame file names this engine writes (and the only ones it ever deletes): points_ + 4+ digits + .ply.
FRAME_FILE_RE = re.compile(r"points_(-?\d{4,})\.ply")
#: Temporary names of ``write_atomic``: ``.<name>.tmp-<pid>``.
TEMPORARY_RE = re.compile(r"\.(.+)\.tmp-(\d+)")
#: Array files of the stored scene copy.
SCENE_ARRAY_RE = re.compile(r"(emitter|collider)\d+_(mesh|transforms|vertices)\.npz")
_SHA256_RE = re.compile(r"[0-9a-f]{64}")


def _load_manifest(folder):
    path = Path(folder) / MANIFEST_NAME
    if not path.is_file():
        raise CacheError(f"{path}: no manifest; {folder} is not a bake folder (bake into it first)")
    manifest = read_json(path, CacheError, "manifest", "bake the cache again")
    return validate_manifest(manifest, path)


def read_manifest(folder) -> dict:
    """The validated manifest of the bake folder ``folder`` (see ``validate_manifest``).

    Raises:
        CacheError naming the file and what is wrong: no manifest, unreadable JSON, a bad field.
    """
    return _load_manifest(folder)


def manifest_or_problem(folder) -> tuple[Optional[dict], Optional[str]]:
    """``read_manifest`` for listings that must show every bake folder, finished, running or damaged.

    Returns:
        (manifest, None) when the manifest reads and validates; (None, None) when there is no manifest
        yet (a bake that has not finished its first frame); else (None, the CacheError's message).
    """
    if not (Path(folder) / MANIFEST_NAME).exists():
        return None, None
    try:
        return _load_manifest(folder), None
    except CacheError as exc:
        return None, str(exc)


def validate_manifest(manifest, path) -> dict:
    """Check a parsed manifest as strictly as a scene; returns it unchanged or raises CacheError.

    Every field this engine reads must have its documented type and range
    (the scene's ranges for fps, frames, spacing and density); each frame
    entry must name exactly its own file (``points_<frame>.ply``), with a
    sha256, a particle count, and the time of its frame. Keys this engine does
    not read are left alone.
    """
    def fail(field, problem) -> NoReturn:
        raise CacheError(f"{path}: {field}: {problem}; bake the cache again")

    if not isinstance(manifest, dict) or manifest.get("format") != CACHE_FORMAT:
        raise CacheError(f"{path}: format is not {CACHE_FORMAT!r}; this is not a splashdraft cache")
    if manifest.get("version") != CACHE_VERSION or isinstance(manifest.get("version"), bool):
        raise CacheError(
            f"{path}: cache version {manifest.get('version')!r}, this engine reads version {CACHE_VERSION}; "
            "bake the cache again"
        )
    for key in ("scene_name", "scene_hash"):
        if not isinstance(manifest.get(key), str) or len(manifest[key]) > 1000:
            fail(key, f"expected a string, got {_short(manifest.get(key))}")
    solver = manifest.get("solver")
    if not isinstance(solver, dict) or solver.get("name") not in ("sph", "learned"):
        fail("solver", f"expected {{\"name\": \"sph\" | \"learned\", \"settings\": {{...}}}}, got {_short(solver)}")
    if not isinstance(solver.get("settings", {}), dict):
        fail("solver.settings", f"expected an object, got {_short(solver.get('settings'))}")
    if finite_number(manifest.get("fps"), *LIMITS["fps"]) is None:
        fail("fps", f"expected a number in {LIMITS['fps']}, got {_short(manifest.get('fps'))}")
    for key in ("frame_start", "frame_end"):
        if whole_number(manifest.get(key), *LIMITS["frame"]) is None:
            fail(key, f"expected a whole number in {LIMITS['frame']}, got {_short(manifest.get(key))}")
    if manifest["frame_end"] < manifest["frame_start"]:
        fail("frame_end", f"{manifest['frame_end']} is before frame_start {manifest['frame_start']}")
    for key, limit in (("particle_spacing", "particle_spacing"), ("rest_density", "rest_density")):
        if finite_number(manifest.get(key), *LIMITS[limit]) is None:
            fail(key, f"expected a number in {LIMITS[limit]}, got {_short(manifest.get(key))}")
    if not isinstance(manifest.get("complete", False), bool):
        fail("complete", f"expected true or false, got {_short(manifest.get('complete'))}")
    if "scene_file" in manifest and not isinstance(manifest["scene_file"], str):
        fail("scene_file", f"expected a path string, got {_short(manifest['scene_file'])}")
    frames = manifest.get("frames")
    if not isinstance(frames, dict):
        fail("frames", "missing or not an object")
    fps, start, end = float(manifest["fps"]), manifest["frame_start"], manifest["frame_end"]
    for key, entry in frames.items():
        where = f"frame entry {key!r}"
        try:
            frame = int(key) if len(key) <= 12 else None
        except ValueError:
            frame = None
        if frame is None or str(frame) != key or not start <= frame <= end:
            fail(where, f"not a frame number from {start} to {end}")
        if not isinstance(entry, dict):
            fail(where, f"expected an object, got {_short(entry)}")
        if entry.get("file") != frame_file_name(frame):
            fail(where, f"file {_short(entry.get('file'))} is not this frame's file {frame_file_name(frame)!r}")
        if not isinstance(entry.get("sha256"), str) or not _SHA256_RE.fullmatch(entry["sha256"]):
            fail(where, f"sha256 {_short(entry.get('sha256'))} is not 64 hex digits")
        if whole_number(entry.get("particles"), 0, LIMITS["max_particles"][1]) is None:
            fail(where, f"particles {_short(entry.get('particles'))} is not a whole number >= 0")
        time = finite_number(entry.get("time"))
        if time is None or abs(time - (frame - start) / fps) > 1e-6 * max(1.0, abs(time)):
            fail(where, f"time {_short(entry.get('time'))} is not the time of frame {frame} at {fps:g} fps")
        for name in ("substeps", "seconds"):
            if name in entry and finite_number(entry[name], 0) is None:
                fail(where, f"{name} {_short(entry[name])} is not a number >= 0")
    return manifest


def _short(value):
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


class CacheReader:
    """An open bake folder (see ``open_cache``)."""

    def __init__(self, folder):
        self.folder = Path(folder)
        self.manifest = _load_manifest(self.folder)
        self.frames = sorted(int(key) for key in self.manifest["frames"])

    def _entry(self, frame):
        entry = self.manifest["frames"].get(str(int(frame)))
        if entry is None:
            span = f"{self.frames[0]}..{self.frames[-1]}" if self.frames else "none"
            raise CacheError(
                f"{self.folder}: frame {frame} is not in the cache (frames present: {span}); "
                "bake that range (--frames or --resume)"
            )
        return entry

    def frame_path(self, frame) -> Path:
        """Path of frame ``frame``'s PLY file (it is listed in the manifest)."""
        return path_inside(self.folder, self._entry(frame)["file"], CacheError, "frame file")

    def read_frame(self, frame) -> dict:
        """Read frame ``frame``, verifying its sha256; returns the dict of ``parse_frame``.

        Raises:
            CacheError naming the file when it is not listed, missing, or its
            checksum or layout is wrong.
        """
        entry = self._entry(frame)
        path = self.frame_path(frame)
        try:
            data = path.read_bytes()
        except FileNotFoundError as exc:
            raise CacheError(
                f"{path}: frame {frame} is listed in the manifest but the file is missing; "
                "bake the cache again"
            ) from exc
        except OSError as exc:
            raise CacheError(f"{path}: cannot read frame {frame} ({exc.strerror}); check its permissions") from exc
        if sha256_bytes(data) != entry["sha256"]:
            raise CacheError(
                f"{path}: frame {frame} is corrupt (sha256 does not match the manifest); bake the cache again"
            )
        return parse_frame(data, str(path))

    def read_checkpoint(self) -> tuple:
        """The State saved after the last finished frame, and that frame number."""
        return read_checkpoint(self.folder / CHECKPOINT_NAME)

    def disk_bytes(self) -> int:
        """Bytes on disk of the manifest, the listed frames, the checkpoint and the stored scene copy."""
        paths = [self.folder / MANIFEST_NAME, self.folder / CHECKPOINT_NAME]
        paths += [self.frame_path(frame) for frame in self.frames]
        scene_folder = self.folder / SCENE_FOLDER
        if scene_folder.is_dir() and not scene_folder.is_symlink():
            paths += [p for p in scene_folder.iterdir() if p.name == SCENE_FILE or SCENE_ARRAY_RE.fullmatch(p.name)]
        return sum(p.stat().st_size for p in paths if p.is_file())


def open_cache(folder) -> "CacheReader":
    """Open a bake folder for reading; raises CacheError naming what is wrong."""
    folder = Path(folder)
    if "\x00" in str(folder) or not folder.is_dir():
        raise CacheError(f"{folder}: cache folder does not exist; bake into it first or check the path")
    return CacheReader(folder)


def read_checkpoint(path) -> tuple:
    """Load ``checkpoint.npz``: returns (State, frame, scene_hash).

    Raises:
        CacheError when the file is missing or not a valid checkpoint.
    """
    path = Path(path)
    if not path.is_file():
        raise CacheError(f"{path}: no checkpoint to resume from; bake without --resume")
    fix = "delete it and bake without --resume"
    arrays = read_npz(path, None, CacheError, f"{path}: checkpoint", fix, text_keys=("checkpoint__scene_hash",))
    frame = arrays.get("checkpoint__frame")
    if frame is None or frame.shape != () or frame.dtype.kind not in "iu":
        raise CacheError(f"{path}: checkpoint has no frame number; {fix}")
    frame = int(frame)
    if whole_number(frame, *LIMITS["frame"]) is None:
        raise CacheError(f"{path}: checkpoint frame {frame} is outside {LIMITS['frame']}; {fix}")
    for key, value in arrays.items():
        if key != "checkpoint__scene_hash" and value.dtype.kind == "f" and not np.all(np.isfinite(value)):
            raise CacheError(f"{path}: checkpoint array {key!r} holds NaN or infinite values; {fix}")
    state = state_from_arrays(arrays, source=str(path))
    scene_hash = str(arrays["checkpoint__scene_hash"]) if "checkpoint__scene_hash" in arrays else ""
    return state, frame, scene_hash


def verify_frames(reader) -> tuple[list, list]:
    """Read every listed frame of an open cache and check it against its manifest entry.

    A frame is good when its file exists, its sha256 matches, and its PLY
    parses with the entry's particle count (its name and time were checked
    with the manifest). Returns (sorted good frames, list of problems as text).
    """
    good, problems = [], []
    for frame in reader.frames:
        try:
            arrays = reader.read_frame(frame)
        except CacheError as exc:
            problems.append(str(exc))
            continue
        expected = reader.manifest["frames"][str(frame)]["particles"]
        if len(arrays["ids"]) != expected:
            problems.append(f"frame {frame}: {len(arrays['ids'])} particles, the manifest lists {expected}")
            continue
        good.append(frame)
    return good, problems


def checkpoint_matches_frame(state, arrays) -> bool:
    """True when a checkpoint State is the state a frame file was written from (count, ids, positions)."""
    return (
        len(state.ids) == len(arrays["ids"])
        and np.array_equal(state.ids.astype(np.int64), arrays["ids"].astype(np.int64))
        and np.array_equal(state.positions.astype(np.float32), arrays["positions"])
        and np.array_equal(state.velocities.astype(np.float32), arrays["velocities"])
    )


def checkpoint_bytes(state, frame, scene_hash) -> bytes:
    """The npz bytes of a checkpoint (State npz form + frame number + scene hash)."""
    arrays = state_to_arrays(state)
    arrays["checkpoint__frame"] = np.int64(frame)
    arrays["checkpoint__scene_hash"] = np.array(scene_hash)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


class CacheWriter:
    """Writes one bake folder frame by frame (see the module docstring).

    Args:
        folder: the bake folder; created if missing.
        header: manifest fields fixed for the bake: ``scene_name``, ``scene_hash``,
            ``solver`` ({name, settings}), ``fps``, ``frame_start``, ``frame_end``,
            ``particle_spacing``, ``rest_density``.
        keep_frames: frames of the existing manifest to keep (resume or subrange;
            ``True`` keeps all of them); otherwise the bake starts a fresh manifest
            and removes the old bake's frame files and checkpoint.
        overwrite: allow replacing a cache of a different scene or solver, or one
            whose manifest cannot be read.

    Only files inside ``folder`` whose names this engine writes are ever
    removed or replaced (``points_<frame>.ply``, ``checkpoint.npz``,
    ``manifest.json`` and their temporary names); stale temporary files left by
    a killed bake are removed here.

    Raises:
        CacheError: the folder cannot be created or written, or holds another
            scene's cache (or an unreadable manifest) and ``overwrite`` is false.
    """

    def __init__(self, folder, header, keep_frames=False, overwrite=False):
        self.folder = Path(folder)
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise CacheError(
                f"output folder {self.folder}: cannot create it ({exc.strerror}); choose a writable --out folder"
            ) from exc
        if not self.folder.is_dir() or not os.access(self.folder, os.W_OK | os.X_OK):
            raise CacheError(f"output folder {self.folder}: not writable; choose a writable --out folder")
        remove_stale_temporaries(self.folder)
        previous = None
        has_manifest = (self.folder / MANIFEST_NAME).exists()
        if has_manifest:
            try:
                previous = _load_manifest(self.folder)
            except CacheError as exc:
                if keep_frames or not overwrite:
                    raise CacheError(
                        f"output folder {self.folder}: holds a cache that cannot be read ({exc}); "
                        "choose another --out folder or pass --overwrite to replace it"
                    ) from None
        if previous is not None:
            same = (
                previous.get("scene_hash") == header["scene_hash"]
                and previous.get("solver", {}).get("name") == header["solver"]["name"]
            )
            if not same and not overwrite:
                raise CacheError(
                    f"output folder {self.folder}: holds a cache of scene {previous.get('scene_name')!r} "
                    f"(solver {previous.get('solver', {}).get('name')!r}) that differs from this bake; "
                    "choose another --out folder or pass --overwrite"
                )
            if not same and keep_frames:
                raise CacheError(
                    f"output folder {self.folder}: its cache was baked from a different scene or solver, "
                    "so it cannot be resumed; bake from the first frame"
                )
        created = _now()
        self.manifest = {"format": CACHE_FORMAT, "version": CACHE_VERSION, "engine_version": __version__}
        self.manifest.update(header)
        self.manifest["attributes"] = [name for name, _ in PLY_PROPERTIES]
        self.manifest["frames"] = {}
        if previous is not None and keep_frames:
            kept = previous["frames"]
            if keep_frames is not True:
                kept = {key: entry for key, entry in kept.items() if int(key) in set(keep_frames)}
            self.manifest["frames"] = dict(kept)
            created = previous.get("created", created)
        elif has_manifest:
            self._remove_old_bake()
        self.manifest["created"] = created
        self.manifest["complete"] = False
        self._write_manifest()

    def _remove_old_bake(self):
        # A fresh bake replaces the old one; old frames must not linger as if current. Only names this
        # engine writes, found in this folder itself, are removed: never a path read from the old manifest.
        for path in self.folder.iterdir():
            if FRAME_FILE_RE.fullmatch(path.name) or path.name == CHECKPOINT_NAME:
                try:
                    if path.is_file() or path.is_symlink():
                        path.unlink()
                except FileNotFoundError:
                    pass

    def _write_manifest(self):
        self.manifest["updated"] = _now()
        text = json.dumps(self.manifest, indent=1, sort_keys=False) + "\n"
        self._write(MANIFEST_NAME, text.encode("utf-8"))

    def _write(self, name, data):
        # Every file of the bake goes through here: its name is resolved and must stay inside the folder.
        path = path_inside(self.folder, name, CacheError, "file")
        try:
            write_atomic(path, data)
        except OSError as exc:
            raise CacheError(
                f"{path}: cannot write ({exc.strerror}); free disk space or choose another --out folder"
            ) from exc

    def write_frame(self, frame, arrays, time, substeps, seconds, extra=None) -> int:
        """Write frame ``frame`` and list it in the manifest.

        Args:
            frame: frame number.
            arrays: ``positions``, ``velocities``, ``ids``, ``density``, ``pressure`` and, when
                computed, ``zone``, ``trapped_air``, ``wave_crest``, ``foam`` (see ``frame_bytes``).
            time: simulated time of the frame, s. substeps: solver substeps taken to reach it.
            seconds: wall-clock seconds spent on it.
            extra: further JSON-ready entries for the frame's manifest record
                (the bake adds ``energy``, ``solver``).
        """
        names = ("positions", "velocities", "ids", "density", "pressure")
        whitewater = {name: arrays[name] for name in WHITEWATER_PROPERTIES} if "zone" in arrays else None
        data = frame_bytes(*(arrays[name] for name in names), whitewater=whitewater)
        name = frame_file_name(frame)
        self._write(name, data)
        self.manifest["frames"][str(int(frame))] = {
            "file": name,
            "particles": int(len(arrays["ids"])),
            "sha256": sha256_bytes(data),
            "time": float(time),
            "substeps": int(substeps),
            "seconds": round(float(seconds), 4),
            **(extra or {}),
        }
        self._write_manifest()
        return len(data)

    def write_checkpoint(self, state, frame) -> None:
        """Save the state after frame ``frame`` for --resume (atomically)."""
        data = checkpoint_bytes(state, frame, self.manifest["scene_hash"])
        self._write(CHECKPOINT_NAME, data)

    def write_scene_copy(self, scene) -> None:
        """Store the scene being baked in ``scene/`` of the cache folder (``engine.compare`` reads it).

        Every mesh and motion array is written as npz under a name made from its object's index
        (``emitter0_mesh.npz``, ``collider1_transforms.npz``), so the copy is self-contained, names
        only files inside the folder, and loads with the same ``scene_hash``.
        """
        from .scene import scene_to_dict

        folder = path_inside(self.folder, SCENE_FOLDER, CacheError, "scene folder")
        try:
            folder.mkdir(exist_ok=True)
        except OSError as exc:
            raise CacheError(f"{folder}: cannot create it ({exc.strerror}); choose a writable --out folder") from exc
        remove_stale_temporaries(folder)
        data = scene_to_dict(scene)
        objects = [("emitter", i, item, obj) for i, (item, obj) in enumerate(zip(data["emitters"], scene.emitters))]
        objects += [("collider", i, item, obj) for i, (item, obj) in enumerate(zip(data["colliders"], scene.colliders))]
        for kind, index, item, obj in objects:
            arrays = {"mesh": {"vertices": getattr(obj, "vertices", None), "triangles": getattr(obj, "triangles", None)},
                      "transforms": {"matrices": getattr(obj, "transforms", None)},
                      "vertices": {"vertices": getattr(obj, "frame_vertices", None)}}  # fmt: skip
            for field, content in arrays.items():
                if field not in item or item[field] is None or any(v is None for v in content.values()):
                    continue
                name = f"{kind}{index}_{field}.npz"
                buffer = io.BytesIO()
                np.savez(buffer, **{key: np.asarray(value) for key, value in content.items()})
                self._write(f"{SCENE_FOLDER}/{name}", buffer.getvalue())
                item[field] = name
        text = json.dumps(data, indent=1) + "\n"
        self._write(SCENE_COPY, text.encode("utf-8"))
        written = {v for item in data["emitters"] + data["colliders"] for v in item.values() if isinstance(v, str)}
        for path in folder.iterdir():  # arrays of objects an older scene had
            if SCENE_ARRAY_RE.fullmatch(path.name) and path.name not in written and path.is_file():
                path.unlink()

    def missing_frames(self) -> list:
        """Frames from frame_start to frame_end that the manifest does not list."""
        listed = {int(key) for key in self.manifest["frames"]}
        span = range(int(self.manifest["frame_start"]), int(self.manifest["frame_end"]) + 1)
        return [frame for frame in span if frame not in listed]

    def mark_complete(self, is_complete=True) -> bool:
        """Mark the cache complete; it stays incomplete while any frame of its range is missing."""
        self.manifest["complete"] = bool(is_complete) and not self.missing_frames()
        self._write_manifest()
        return self.manifest["complete"]


def remove_stale_temporaries(folder) -> list:
    """Remove temporary files of ``write_atomic`` in ``folder`` left by a process that no longer runs.

    Only ``.<name>.tmp-<pid>`` files whose ``<name>`` this engine writes are
    touched. Returns the names removed.
    """
    removed = []
    try:
        entries = list(Path(folder).iterdir())
    except OSError:
        return removed
    ours = (MANIFEST_NAME, CHECKPOINT_NAME, SCENE_FILE)
    for path in entries:
        match = TEMPORARY_RE.fullmatch(path.name)
        name = match.group(1) if match else ""
        if not (name in ours or FRAME_FILE_RE.fullmatch(name) or SCENE_ARRAY_RE.fullmatch(name)):
            continue
        if _process_is_running(int(match.group(2))):
            continue
        try:
            path.unlink()
            removed.append(path.name)
        except OSError:
            pass
    return removed


def _process_is_running(pid):
    if pid == os.getpid():
        return True
    if os.name != "posix":
        return False  # os.kill(pid, 0) would end the process on Windows; a killed bake is the usual case
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    except OSError:
        return False
    return True
