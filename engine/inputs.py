"""The one validation layer for what the engine reads from disk.

Scene files, meshes, motion arrays, cache manifests and checkpoints all pass
through these small functions before any value reaches a loop or an
allocation:

- ``read_json``: a size limit before reading, a nesting-depth limit, integers
  of at most ``MAX_INTEGER_DIGITS`` digits, and every parse failure (including
  Python's own recursion and integer-length limits) as the caller's named error.
- ``read_npz``: every array's dtype and shape are read from its ``.npy`` header
  and checked (plain real numbers, a size bound, the bytes really present)
  before the array is allocated; a zip that is not one, strings, objects and
  structured arrays are named errors. ``allow_pickle`` is always false.
- ``path_inside``: resolves a name against a folder and refuses, by name, any
  path that lands outside it (absolute paths, ``..``, links).
- ``finite_number`` / ``whole_number``: one number in a stated range.

The ranges themselves are documented in DEVELOPERS.md (scene reference) and
kept as constants here so scene, cache and estimate use the same ones.
"""

import json
import math
import os
import zipfile
import zlib
from pathlib import Path
from typing import Any

import numpy as np

#: Largest scene file, manifest or contract read (bytes); bigger files are refused before reading.
MAX_JSON_BYTES = 64 * 1024 * 1024
#: Deepest nesting of objects and lists accepted in any JSON file (scenes need 4).
MAX_JSON_DEPTH = 32
#: Longest integer literal accepted in JSON (frame numbers and counts need far fewer).
MAX_INTEGER_DIGITS = 24
#: Largest array element count read from an npz file (about 0.8 GB of float64).
MAX_ARRAY_ELEMENTS = 100_000_000
#: Longest string accepted as an object name.
MAX_NAME_LENGTH = 100


#: Accepted ranges (inclusive) of scene and manifest numbers, in SI units; documented in DEVELOPERS.md.
#: They are wide enough for any splash shot and narrow enough that no product of two of them overflows
#: a float64 and no count derived from them (frames, layers, particles) is computed from infinity.
LIMITS = {
    "fps": (0.1, 10_000.0),  # frames per second
    "frame": (-1_000_000, 1_000_000),  # any frame number
    "frames": (1, 100_000),  # frames in a shot (frame_end - frame_start + 1)
    "particle_spacing": (1e-4, 10.0),  # m
    "coordinate": (-100_000.0, 100_000.0),  # m: bounds, centres, mesh vertices, translations
    "gravity": (-1_000.0, 1_000.0),  # m/s^2 per axis
    "velocity": (-1_000.0, 1_000.0),  # m/s per axis
    "speed": (1e-6, 1_000.0),  # m/s, stream speed (> 0)
    "radius": (1e-6, 100_000.0),  # m, stream disc radius (> 0)
    "direction": (-1e6, 1e6),  # per axis, before normalising
    "rest_density": (1.0, 100_000.0),  # kg/m^3
    "viscosity": (0.0, 1.0),  # XSPH coefficient
    "jitter": (0.0, 0.49),  # fraction of the spacing
    "friction": (0.0, 1.0),
    "matrix": (-100_000.0, 100_000.0),  # each entry of a 4x4 transform
    "cfl_factor": (1e-6, 1.0),
    "time_step": (1e-9, 1.0),  # s, solver min/max_time_step
    "tolerance": (1e-9, 1.0),  # solver density/divergence tolerances
    "max_iterations": (1, 100_000),
    "max_particles": (1, 100_000_000),
    "seed": (0, 2**63 - 1),
}


class _TooLong(ValueError):
    pass


def _parse_int(text):
    if len(text.lstrip("-")) > MAX_INTEGER_DIGITS:
        raise _TooLong(f"an integer of {len(text.lstrip('-'))} digits (at most {MAX_INTEGER_DIGITS} are read)")
    return int(text)


def _reject_constant(name):
    raise _TooLong(f"{name} is not a JSON number")


def json_depth(value) -> int:
    """Nesting depth of a parsed JSON value (0 for a scalar), without recursion."""
    deepest = 0
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, dict):
            children = item.values()
        elif isinstance(item, list):
            children = item
        else:
            continue
        deepest = max(deepest, depth)
        if deepest > MAX_JSON_DEPTH:
            return deepest
        stack.extend((child, depth + 1) for child in children)
    return deepest


def parse_json(text, source, error, fix, what="file") -> Any:
    """Parse JSON text with the limits above; every failure is ``error`` naming ``source``, ``what`` and ``fix``."""
    try:
        value = json.loads(text, parse_int=_parse_int, parse_constant=_reject_constant)
    except json.JSONDecodeError as exc:
        raise error(f"{source}: {what} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}); {fix}") from None
    except RecursionError:
        raise error(f"{source}: {what} is nested too deeply (more than {MAX_JSON_DEPTH} levels); {fix}") from None
    except ValueError as exc:  # _TooLong, and Python's own integer-length limit
        raise error(f"{source}: {what} holds {exc}; {fix}") from None
    if json_depth(value) > MAX_JSON_DEPTH:
        raise error(f"{source}: {what} is nested too deeply (more than {MAX_JSON_DEPTH} levels); {fix}")
    return value


def read_json(path, error, what, fix, max_bytes=MAX_JSON_BYTES) -> Any:
    """Read and parse a JSON file (see ``parse_json``); missing or unreadable files are ``error`` too."""
    path = os.fspath(path)
    try:
        size = os.stat(path).st_size
        if size > max_bytes:
            raise error(f"{path}: {what} is {size:,} bytes, more than the {max_bytes:,} this engine reads; {fix}")
        with open(path, "rb") as handle:
            data = handle.read(max_bytes + 1)
        text = data.decode("utf-8")
    except FileNotFoundError:
        raise error(f"{path}: {what} not found; check the path") from None
    except (OSError, ValueError) as exc:  # ValueError: a NUL in the path, or UnicodeDecodeError
        raise error(f"{path}: cannot read the {what} ({exc}); {fix}") from None
    return parse_json(text, path, error, fix, what)


def safe_name(value) -> bool:
    """True when ``value`` is a usable object name: 1..MAX_NAME_LENGTH printable characters, no path separator."""
    return (
        isinstance(value, str)
        and 0 < len(value) <= MAX_NAME_LENGTH
        and value.strip() != ""
        and value.isprintable()
        and "/" not in value
        and "\\" not in value
    )


def finite_number(value, minimum=None, maximum=None) -> float | None:
    """``value`` as a float when it is a real, finite number within [minimum, maximum]; otherwise None."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    try:
        number = float(value)
    except OverflowError:
        return None
    if not math.isfinite(number):
        return None
    if (minimum is not None and number < minimum) or (maximum is not None and number > maximum):
        return None
    return number


def whole_number(value, minimum=None, maximum=None) -> int | None:
    """``value`` as an int when it is an integer (not a bool) within [minimum, maximum]; otherwise None."""
    if isinstance(value, bool) or not isinstance(value, int):
        return None
    if (minimum is not None and value < minimum) or (maximum is not None and value > maximum):
        return None
    return int(value)


def path_inside(folder, name, error, what) -> Path:
    """``folder / name`` resolved, refusing (``error``) any name that leads outside ``folder``.

    ``name`` must be a plain relative path string; absolute paths, ``..`` and
    links pointing elsewhere are refused by name, so nothing the engine writes,
    renames or deletes lies outside its output folder.
    """
    root = Path(folder).resolve()
    if not isinstance(name, str) or not name or "\x00" in name:
        raise error(f"{folder}: {what} {name!r} is not a file name; bake the cache again")
    target = (root / name).resolve()
    if target.parent != root and root not in target.parents:
        raise error(f"{folder}: {what} {name!r} lies outside the folder; refusing to touch it (bake the cache again)")
    return target


def read_npz(path, keys, error, label, fix="re-export it", max_elements=MAX_ARRAY_ELEMENTS, text_keys=()) -> dict:
    """Read arrays ``keys`` from an npz file, checking each before it is allocated.

    Args:
        path: the npz file. keys: array names that must all be present (None: every array).
        error: the exception class to raise. label: the file as messages name it (e.g. its path and role).
        max_elements: the largest element count accepted per array.
        text_keys: arrays that may hold one short unicode string instead of numbers.

    Returns:
        dict name -> array (booleans, integers or floats; never objects, strings or records).

    Raises:
        ``error`` naming the file, the array and the fix.
    """
    path = os.fspath(path)
    arrays = {}
    try:
        with zipfile.ZipFile(path) as archive:
            members = {name[:-4]: name for name in archive.namelist() if name.endswith(".npy")}
            if keys is None:
                keys = sorted(members)
            missing = [key for key in keys if key not in members]
            if missing:
                raise error(f'{label} has no array "{missing[0]}" (has {sorted(members)}); '
                            f'store the array under the name "{missing[0]}"')  # fmt: skip
            for key in keys:
                info = archive.getinfo(members[key])
                with archive.open(info) as handle:
                    version = np.lib.format.read_magic(handle)
                    if version == (1, 0):
                        shape, fortran, dtype = np.lib.format.read_array_header_1_0(handle)
                    elif version == (2, 0):
                        shape, fortran, dtype = np.lib.format.read_array_header_2_0(handle)
                    else:
                        raise ValueError(f"npy format version {version} is not supported")
                    is_text = key in text_keys and dtype.kind == "U" and dtype.itemsize <= 4096 and shape == ()
                    if not is_text and (dtype.names is not None or dtype.kind not in "biuf" or dtype.hasobject):
                        raise error(f"{label}: array {key!r} holds {dtype} values, not numbers; "
                                    "store plain floats or integers")  # fmt: skip
                    count = math.prod(shape)
                    if count > max_elements:
                        raise error(f"{label}: array {key!r} has shape {shape} ({count:,} values, "
                                    f"at most {max_elements:,} are read); {fix}")  # fmt: skip
                    if count * dtype.itemsize > info.file_size:
                        raise error(f"{label}: array {key!r} is truncated (shape {shape} needs "
                                    f"{count * dtype.itemsize:,} bytes, the file holds {info.file_size:,}); {fix}")
                with archive.open(info) as handle:
                    arrays[key] = np.lib.format.read_array(handle, allow_pickle=False)
    except FileNotFoundError:
        raise error(f"{label} not found ({path}); check the path") from None
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, OSError, EOFError, KeyError,
            NotImplementedError, RuntimeError, OverflowError, MemoryError, zlib.error) as exc:  # fmt: skip
        raise error(f"{label} is unreadable, not an npz archive of arrays ({type(exc).__name__}: {exc}); {fix}") from None
    return arrays
