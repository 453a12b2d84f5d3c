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
import zipfile
from pathlib import Path

import numpy as np

from . import __version__
from .errors import CacheError
from .state import state_from_arrays, state_to_arrays

CACHE_FORMAT = "splashdraft-cache"
CACHE_VERSION = 1
MANIFEST_NAME = "manifest.json"
CHECKPOINT_NAME = "checkpoint.npz"

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
)

#: PLY scalar type names (both spellings of the 1994 description) -> numpy little-endian type.
_PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "<i2", "int16": "<i2", "ushort": "<u2", "uint16": "<u2",
    "int": "<i4", "int32": "<i4", "uint": "<u4", "uint32": "<u4",
    "float": "<f4", "float32": "<f4", "double": "<f8", "float64": "<f8",
}  # fmt: skip

#: The packed record of one particle in a frame file (36 bytes).
FRAME_DTYPE = np.dtype([(name, _PLY_TYPES[kind]) for name, kind in PLY_PROPERTIES])

_MAX_HEADER_BYTES = 64 * 1024
_INT32_MAX = np.iinfo(np.int32).max


#: Name of a frame file as a Python format string (also read by Blender's Format String node).
FRAME_FILE_PATTERN = "points_{frame:04d}.ply"


def frame_file_name(frame):
    """``points_0001.ply`` style name of a frame file (4+ digits, zero padded)."""
    return FRAME_FILE_PATTERN.format(frame=int(frame))


def ply_header(count):
    """ASCII header (bytes) of a frame file with ``count`` particles."""
    lines = ["ply", "format binary_little_endian 1.0", "comment splashdraft points v1"]
    lines.append(f"element vertex {int(count)}")
    lines += [f"property {kind} {name}" for name, kind in PLY_PROPERTIES]
    lines.append("end_header")
    return ("\n".join(lines) + "\n").encode("ascii")


def frame_bytes(positions, velocities, ids, density, pressure):
    """Encode one frame as PLY bytes (header + packed records).

    Args:
        positions, velocities: (N, 3) float, m and m/s (stored as float32).
        ids: (N,) int particle ids, 0 <= id < 2**31 (stored as int32).
        density, pressure: (N,) float, kg/m^3 and Pa (stored as float32).

    Returns:
        bytes: the whole file; ``len(ply_header(N)) + 36 * N`` long.

    Raises:
        CacheError: arrays of the wrong shape, or ids outside int32.
    """
    positions = np.asarray(positions).reshape(-1, 3) if np.size(positions) else np.zeros((0, 3))
    velocities = np.asarray(velocities).reshape(-1, 3) if np.size(velocities) else np.zeros((0, 3))
    ids = np.asarray(ids).reshape(-1)
    density = np.asarray(density).reshape(-1)
    pressure = np.asarray(pressure).reshape(-1)
    n = len(positions)
    lengths = {"velocities": len(velocities), "ids": len(ids), "density": len(density), "pressure": len(pressure)}
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
            if words[1] == "list" or len(words) != 3 or words[1] not in _PLY_TYPES:
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
    missing = [name for name, _ in PLY_PROPERTIES if name not in [p for p, _ in props]]
    if missing:
        raise CacheError(f"{source}: PLY vertex lacks properties {', '.join(missing)}; not a splashdraft frame")
    return count, np.dtype(props), newline + 1


def parse_frame(data, source="frame"):
    """Decode PLY bytes into a dict of arrays.

    Returns:
        dict with ``positions`` (N, 3), ``velocities`` (N, 3), ``density``,
        ``pressure`` (N,) as float32 and ``ids`` (N,) int32 (whatever types
        the header declares, converted).

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
    return {
        "positions": np.stack([records["x"], records["y"], records["z"]], axis=1).astype(np.float32),
        "velocities": np.stack([records["vx"], records["vy"], records["vz"]], axis=1).astype(np.float32),
        "ids": records["id"].astype(np.int32),
        "density": records["density"].astype(np.float32),
        "pressure": records["pressure"].astype(np.float32),
    }


def read_ply(path):
    """Read one frame file (no checksum check); see ``parse_frame``."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise CacheError(f"{path}: frame file is missing; bake the cache again") from exc
    except OSError as exc:
        raise CacheError(f"{path}: cannot read frame file ({exc.strerror}); check its permissions") from exc
    return parse_frame(data, str(path))


def sha256_bytes(data):
    return hashlib.sha256(data).hexdigest()


def write_atomic(path, data):
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


def _load_manifest(folder):
    path = Path(folder) / MANIFEST_NAME
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise CacheError(f"{path}: no manifest; {folder} is not a bake folder (bake into it first)") from exc
    except OSError as exc:
        raise CacheError(f"{path}: cannot read the manifest ({exc.strerror}); check its permissions") from exc
    try:
        manifest = json.loads(text)
    except json.JSONDecodeError as exc:
        raise CacheError(f"{path}: manifest is not valid JSON ({exc}); bake the cache again") from exc
    if not isinstance(manifest, dict) or manifest.get("format") != CACHE_FORMAT:
        raise CacheError(f"{path}: format is not {CACHE_FORMAT!r}; this is not a splashdraft cache")
    if manifest.get("version") != CACHE_VERSION:
        raise CacheError(
            f"{path}: cache version {manifest.get('version')!r}, this engine reads version {CACHE_VERSION}; "
            "bake the cache again"
        )
    frames = manifest.get("frames")
    if not isinstance(frames, dict):
        raise CacheError(f"{path}: 'frames' is missing or not an object; bake the cache again")
    for key, entry in frames.items():
        if not key.lstrip("-").isdigit() or not isinstance(entry, dict) or not {"file", "sha256"} <= set(entry):
            raise CacheError(f"{path}: frame entry {key!r} is malformed; bake the cache again")
    return manifest


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

    def frame_path(self, frame):
        """Path of frame ``frame``'s PLY file (it is listed in the manifest)."""
        return self.folder / self._entry(frame)["file"]

    def read_frame(self, frame):
        """Read frame ``frame``, verifying its sha256; returns the dict of ``parse_frame``.

        Raises:
            CacheError naming the file when it is not listed, missing, or its
            checksum or layout is wrong.
        """
        entry = self._entry(frame)
        path = self.folder / entry["file"]
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

    def read_checkpoint(self):
        """The State saved after the last finished frame, and that frame number."""
        return read_checkpoint(self.folder / CHECKPOINT_NAME)

    def disk_bytes(self):
        """Bytes on disk of the manifest, the listed frames and the checkpoint."""
        paths = [self.folder / MANIFEST_NAME, self.folder / CHECKPOINT_NAME]
        paths += [self.folder / entry["file"] for entry in self.manifest["frames"].values()]
        return sum(p.stat().st_size for p in paths if p.exists())


def open_cache(folder):
    """Open a bake folder for reading; raises CacheError naming what is wrong."""
    folder = Path(folder)
    if not folder.is_dir():
        raise CacheError(f"{folder}: cache folder does not exist; bake into it first or check the path")
    return CacheReader(folder)


def read_checkpoint(path):
    """Load ``checkpoint.npz``: returns (State, frame, scene_hash).

    Raises:
        CacheError when the file is missing or not a valid checkpoint.
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {key: archive[key] for key in archive.files}
    except FileNotFoundError as exc:
        raise CacheError(f"{path}: no checkpoint to resume from; bake without --resume") from exc
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        raise CacheError(f"{path}: checkpoint is unreadable ({exc}); delete it and bake without --resume") from exc
    if "checkpoint__frame" not in arrays:
        raise CacheError(f"{path}: checkpoint has no frame number; delete it and bake without --resume")
    state = state_from_arrays(arrays, source=str(path))
    scene_hash = str(arrays["checkpoint__scene_hash"]) if "checkpoint__scene_hash" in arrays else ""
    return state, int(arrays["checkpoint__frame"]), scene_hash


def checkpoint_bytes(state, frame, scene_hash):
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
        keep_frames: keep the frames already listed in an existing manifest
            (resume or subrange); otherwise the bake starts a fresh manifest.
        overwrite: allow replacing a cache of a different scene or solver.

    Raises:
        CacheError: the folder cannot be created or written, or holds another
            scene's cache and ``overwrite`` is false.
    """

    def __init__(self, folder, header, keep_frames=False, overwrite=False):
        self.folder = Path(folder)
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise CacheError(
                f"output folder {self.folder}: cannot create it ({exc.strerror}); choose a writable --out folder"
            ) from exc
        if not os.access(self.folder, os.W_OK | os.X_OK):
            raise CacheError(f"output folder {self.folder}: not writable; choose a writable --out folder")
        previous = None
        if (self.folder / MANIFEST_NAME).exists():
            previous = _load_manifest(self.folder)
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
            self.manifest["frames"] = dict(previous["frames"])
            created = previous.get("created", created)
        elif previous is not None:
            self._remove_listed_frames(previous)
        self.manifest["created"] = created
        self.manifest["complete"] = False
        self._write_manifest()

    def _remove_listed_frames(self, previous):
        # A fresh bake replaces the old one; old frames must not linger as if current.
        for entry in previous["frames"].values():
            try:
                (self.folder / entry["file"]).unlink()
            except FileNotFoundError:
                pass
        try:
            (self.folder / CHECKPOINT_NAME).unlink()
        except FileNotFoundError:
            pass

    def _write_manifest(self):
        self.manifest["updated"] = _now()
        text = json.dumps(self.manifest, indent=1, sort_keys=False) + "\n"
        self._write(self.folder / MANIFEST_NAME, text.encode("utf-8"))

    def _write(self, path, data):
        try:
            write_atomic(path, data)
        except OSError as exc:
            raise CacheError(
                f"{path}: cannot write ({exc.strerror}); free disk space or choose another --out folder"
            ) from exc

    def write_frame(self, frame, arrays, time, substeps, seconds, extra=None):
        """Write frame ``frame`` and list it in the manifest.

        Args:
            frame: frame number.
            arrays: ``positions``, ``velocities``, ``ids``, ``density``, ``pressure`` (see ``frame_bytes``).
            time: simulated time of the frame, s. substeps: solver substeps taken to reach it.
            seconds: wall-clock seconds spent on it.
            extra: further JSON-ready entries for the frame's manifest record
                (the bake adds ``energy``, ``solver``).
        """
        names = ("positions", "velocities", "ids", "density", "pressure")
        data = frame_bytes(*(arrays[name] for name in names))
        name = frame_file_name(frame)
        self._write(self.folder / name, data)
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

    def write_checkpoint(self, state, frame):
        """Save the state after frame ``frame`` for --resume (atomically)."""
        data = checkpoint_bytes(state, frame, self.manifest["scene_hash"])
        self._write(self.folder / CHECKPOINT_NAME, data)

    def mark_complete(self, is_complete=True):
        self.manifest["complete"] = bool(is_complete)
        self._write_manifest()
