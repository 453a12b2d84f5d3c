"""Triangle meshes on disk and simple meshes built in code.

A mesh is two plain arrays: ``vertices`` (V, 3) float64 in metres and
``triangles`` (T, 3) int64 vertex indices, counter-clockwise seen from outside
(so face normals point out of closed meshes).

Readers: OBJ (``v`` and ``f`` lines; polygons are fan-triangulated, negative
indices count back from the last vertex read; texture coordinates, normals,
groups and materials are ignored), PLY (ascii, binary little or big endian;
vertex ``x y z`` and face ``vertex_indices``/``vertex_index`` lists) and npz
(arrays ``vertices`` and ``triangles``, loaded with ``allow_pickle=False``).
Every read error is a ``MeshError`` naming the file and the line or field.

Writers: OBJ, binary little-endian PLY and npz, each written under a temporary
name and renamed into place.

Builders (closed, outward-oriented, consistent winding unless said otherwise):
``box_mesh``, ``uv_sphere_mesh``, ``ico_sphere_mesh``, ``torus_mesh``,
``cylinder_mesh``, and the open ``plane_mesh``.
"""

import os

import numpy as np

from .errors import MeshError

MESH_SUFFIXES = (".obj", ".ply", ".npz")


# --------------------------------------------------------------------------- reading


def read_mesh(path) -> tuple[np.ndarray, np.ndarray]:
    """Read a triangle mesh from an .obj, .ply or .npz file.

    Args:
        path: file path; the suffix (case-insensitive) picks the format.

    Returns:
        (vertices (V, 3) float64, triangles (T, 3) int64).

    Raises:
        MeshError: missing or unreadable file, unknown suffix, malformed
            content, or indices out of range; the message names the file and
            the line or field.
    """
    path = os.fspath(path)
    suffix = os.path.splitext(path)[1].lower()
    if suffix not in MESH_SUFFIXES:
        raise MeshError(f'{path}: unknown mesh format "{suffix}"; save the mesh as .obj, .ply or .npz')
    if not os.path.isfile(path):
        raise MeshError(f"{path}: mesh file not found; export the mesh there or fix the path")
    try:
        if suffix == ".obj":
            vertices, triangles = _read_obj(path)
        elif suffix == ".ply":
            vertices, triangles = _read_ply(path)
        else:
            vertices, triangles = _read_npz(path)
    except OSError as exc:
        raise MeshError(f"{path}: cannot read the mesh file ({exc.strerror or exc}); check its permissions") from exc
    except (ValueError, TypeError, IndexError, KeyError, OverflowError, MemoryError) as exc:
        # Whatever slipped past the format checks above is still a malformed file, named as such.
        raise MeshError(f"{path}: malformed {suffix[1:].upper()} mesh ({type(exc).__name__}: {exc}); "
                        "re-export the mesh") from None  # fmt: skip
    return _checked_arrays(path, vertices, triangles)


def _checked_arrays(source, vertices, triangles):
    vertices = np.asarray(vertices, dtype=np.float64)
    triangles = np.asarray(triangles)
    if vertices.ndim != 2 or vertices.shape[1] != 3:
        raise MeshError(f"{source}: vertices have shape {vertices.shape}, expected (V, 3)")
    if triangles.size == 0:
        triangles = triangles.reshape(0, 3)
    if triangles.ndim != 2 or triangles.shape[1] != 3:
        raise MeshError(f"{source}: triangles have shape {triangles.shape}, expected (T, 3)")
    if not np.issubdtype(triangles.dtype, np.integer):
        if not np.all(np.isfinite(triangles)) or np.any(triangles != np.round(triangles)):
            raise MeshError(f"{source}: triangles hold non-integer indices; store vertex indices as integers")
    triangles = triangles.astype(np.int64)
    if len(triangles) and (triangles.min() < 0 or triangles.max() >= len(vertices)):
        bad = int(np.argmax((triangles < 0).any(axis=1) | (triangles >= len(vertices)).any(axis=1)))
        raise MeshError(
            f"{source}: triangle {bad} uses vertex index {triangles[bad].tolist()} but there are "
            f"{len(vertices)} vertices; re-export the mesh"
        )
    return vertices, triangles


def _read_obj(path):
    vertices = []
    faces = []
    with open(path, "r", encoding="utf-8", errors="replace") as handle:
        for number, line in enumerate(handle, start=1):
            parts = line.split()
            if not parts:
                continue
            key = parts[0]
            if key == "v":
                if len(parts) < 4:
                    raise MeshError(f"{path}: line {number}: vertex needs 3 coordinates, got {len(parts) - 1}")
                try:
                    vertices.append((float(parts[1]), float(parts[2]), float(parts[3])))
                except ValueError as exc:
                    raise MeshError(f"{path}: line {number}: bad vertex coordinate ({exc})") from exc
            elif key == "f":
                if len(parts) < 4:
                    raise MeshError(f"{path}: line {number}: face needs at least 3 vertices, got {len(parts) - 1}")
                polygon = []
                for token in parts[1:]:
                    try:
                        index = int(token.split("/")[0])
                    except ValueError as exc:
                        raise MeshError(f'{path}: line {number}: bad face index "{token}"') from exc
                    if index > 0:
                        index -= 1
                    elif index < 0:
                        index += len(vertices)
                    else:
                        raise MeshError(f"{path}: line {number}: face index 0 is not allowed (OBJ counts from 1)")
                    if not 0 <= index < len(vertices):
                        raise MeshError(
                            f'{path}: line {number}: face index "{token}" refers to a vertex that does not exist '
                            f"({len(vertices)} read so far)"
                        )
                    polygon.append(index)
                for k in range(1, len(polygon) - 1):
                    faces.append((polygon[0], polygon[k], polygon[k + 1]))
    if not vertices:
        raise MeshError(f"{path}: no vertices (v lines) found; export the mesh as OBJ with geometry")
    return np.array(vertices, np.float64), np.array(faces, np.int64).reshape(-1, 3)


_PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "i2", "int16": "i2", "ushort": "u2", "uint16": "u2",
    "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}


def _read_ply(path):
    with open(path, "rb") as handle:
        data = handle.read()
    if not data.startswith(b"ply"):
        raise MeshError(f'{path}: not a PLY file (it does not start with "ply")')
    end = data.find(b"end_header")
    if end < 0:
        raise MeshError(f'{path}: PLY header has no "end_header" line')
    body_start = data.find(b"\n", end) + 1
    header = data[:end].decode("ascii", errors="replace").splitlines()
    fmt = None
    elements = []  # [name, count, [(prop_name, dtype) or (prop_name, count_dtype, item_dtype)]]
    for number, line in enumerate(header, start=1):
        parts = line.split()
        if not parts or parts[0] in ("ply", "comment", "obj_info"):
            continue
        if parts[0] == "format":
            if len(parts) < 2 or parts[1] not in ("ascii", "binary_little_endian", "binary_big_endian"):
                raise MeshError(f"{path}: header line {number}: unknown PLY format {' '.join(parts[1:])!r}")
            fmt = parts[1]
        elif parts[0] == "element":
            try:
                elements.append([parts[1], int(parts[2]), []])
            except (IndexError, ValueError) as exc:
                raise MeshError(f"{path}: header line {number}: bad element line {line!r}") from exc
            if not 0 <= elements[-1][1] <= len(data):
                raise MeshError(f"{path}: header line {number}: element count {elements[-1][1]} does not fit a "
                                f"{len(data):,}-byte file; re-export the mesh")  # fmt: skip
        elif parts[0] == "property":
            if not elements:
                raise MeshError(f"{path}: header line {number}: property before any element")
            try:
                if parts[1] == "list":
                    elements[-1][2].append((parts[4], _PLY_TYPES[parts[2]], _PLY_TYPES[parts[3]]))
                else:
                    elements[-1][2].append((parts[2], _PLY_TYPES[parts[1]]))
            except (IndexError, KeyError) as exc:
                raise MeshError(f"{path}: header line {number}: bad property line {line!r}") from exc
    if fmt is None:
        raise MeshError(f'{path}: PLY header has no "format" line')
    if fmt == "ascii":
        tables = _ply_ascii_body(path, data[body_start:], elements)
    else:
        order = "<" if fmt == "binary_little_endian" else ">"
        tables = _ply_binary_body(path, data, body_start, elements, order)
    if "vertex" not in tables:
        raise MeshError(f'{path}: PLY file has no "vertex" element')
    vertex = tables["vertex"]
    for axis in "xyz":
        if axis not in vertex:
            raise MeshError(f'{path}: PLY vertex element has no property "{axis}"')
    vertices = np.stack([np.asarray(vertex[a], np.float64) for a in "xyz"], axis=1)
    faces = []
    face = tables.get("face", {})
    lists = face.get("vertex_indices", face.get("vertex_index"))
    if face and lists is None:
        raise MeshError(f'{path}: PLY face element has no "vertex_indices" list')
    for number, polygon in enumerate(lists if lists is not None else []):
        polygon = np.asarray(polygon, np.int64)
        if len(polygon) < 3:
            raise MeshError(f"{path}: face {number} has {len(polygon)} vertices; faces need at least 3")
        for k in range(1, len(polygon) - 1):
            faces.append((polygon[0], polygon[k], polygon[k + 1]))
    return vertices, np.array(faces, np.int64).reshape(-1, 3)


def _ply_ascii_body(path, body, elements):
    lines = body.decode("ascii", errors="replace").splitlines()
    cursor = 0
    tables = {}
    for name, count, props in elements:
        columns = {p[0]: [] for p in props}
        for row in range(count):
            while cursor < len(lines) and not lines[cursor].strip():
                cursor += 1
            if cursor >= len(lines):
                raise MeshError(f"{path}: element {name}: file ends at row {row} of {count}")
            tokens = lines[cursor].split()
            cursor += 1
            position = 0
            try:
                for prop in props:
                    if len(prop) == 3:
                        n = int(tokens[position])
                        if n < 0:
                            raise ValueError(f"list count {n}")
                        columns[prop[0]].append([float(t) for t in tokens[position + 1 : position + 1 + n]])
                        if len(columns[prop[0]][-1]) != n:
                            raise IndexError
                        position += 1 + n
                    else:
                        columns[prop[0]].append(float(tokens[position]))
                        position += 1
            except (IndexError, ValueError) as exc:
                raise MeshError(f"{path}: element {name} row {row}: malformed values {lines[cursor - 1]!r}") from exc
        tables[name] = columns
    return tables


def _ply_binary_body(path, data, offset, elements, order):
    tables = {}
    for name, count, props in elements:
        if all(len(p) == 2 for p in props):
            dtype = np.dtype([(p[0], order + p[1]) for p in props])
            size = dtype.itemsize * count
            if offset + size > len(data):
                raise MeshError(f"{path}: element {name}: file is truncated ({count} rows expected)")
            rows = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
            offset += size
            tables[name] = {p[0]: rows[p[0]] for p in props}
            continue
        fast = _ply_uniform_lists(data, offset, count, props, order)
        if fast is not None:
            columns, offset = fast
            tables[name] = columns
            continue
        columns = {p[0]: [] for p in props}
        for row in range(count):
            for prop in props:
                try:
                    if len(prop) == 3:
                        count_type = np.dtype(order + prop[1])
                        n = int(np.frombuffer(data, count_type, 1, offset)[0])
                        offset += count_type.itemsize
                        item_type = np.dtype(order + prop[2])
                        if n < 0 or offset + item_type.itemsize * n > len(data):
                            raise MeshError(f"{path}: element {name} row {row}: list count {n} does not fit the file; "
                                            "re-export the mesh")  # fmt: skip
                        columns[prop[0]].append(np.frombuffer(data, item_type, n, offset))
                        offset += item_type.itemsize * n
                    else:
                        scalar = np.dtype(order + prop[1])
                        columns[prop[0]].append(np.frombuffer(data, scalar, 1, offset)[0])
                        offset += scalar.itemsize
                except ValueError as exc:
                    raise MeshError(f"{path}: element {name} row {row}: file is truncated") from exc
        tables[name] = columns
    return tables


def _ply_uniform_lists(data, offset, count, props, order):
    """Fast path: every list of the element has the same length as its first row."""
    if count == 0:
        return {p[0]: [] for p in props}, offset
    fields = []
    position = offset
    for prop in props:
        if len(prop) == 3:
            count_type = np.dtype(order + prop[1])
            if position + count_type.itemsize > len(data):
                return None
            n = int(np.frombuffer(data, count_type, 1, position)[0])
            item_type = np.dtype(order + prop[2])
            if n < 0 or position + item_type.itemsize * n > len(data):
                return None  # the row-by-row reader names the bad row
            fields.append((prop[0] + "__n", count_type))
            fields.append((prop[0], item_type, (n,)))
            position += count_type.itemsize + item_type.itemsize * n
        else:
            scalar = np.dtype(order + prop[1])
            fields.append((prop[0], scalar))
            position += scalar.itemsize
    dtype = np.dtype(fields)
    if offset + dtype.itemsize * count > len(data):
        return None
    rows = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
    columns = {}
    for prop in props:
        if len(prop) == 3:
            if np.any(rows[prop[0] + "__n"] != rows[prop[0]].shape[1]):
                return None
            columns[prop[0]] = rows[prop[0]]
        else:
            columns[prop[0]] = rows[prop[0]]
    return columns, offset + dtype.itemsize * count


def _read_npz(path):
    from .inputs import read_npz

    arrays = read_npz(path, ("vertices", "triangles"), MeshError, f"{path}: npz mesh",
                      "store arrays 'vertices' (V, 3) float and 'triangles' (T, 3) int")  # fmt: skip
    return arrays["vertices"], arrays["triangles"]


# --------------------------------------------------------------------------- writing


def _replace_into(path, write):
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    temporary = os.path.join(folder, f".{os.path.basename(path)}.{os.getpid()}.tmp")
    try:
        write(temporary)
        os.replace(temporary, path)
    finally:
        if os.path.exists(temporary):
            os.remove(temporary)


def write_obj(path, vertices, triangles) -> None:
    """Write a mesh as OBJ (``v`` and ``f`` lines, 1-based indices, 17 significant digits)."""
    vertices, triangles = _checked_arrays(os.fspath(path), vertices, triangles)

    def write(temporary) -> None:
        with open(temporary, "w", encoding="ascii") as handle:
            handle.write("# splashdraft mesh\n")
            np.savetxt(handle, vertices, fmt="v %.17g %.17g %.17g")
            np.savetxt(handle, triangles + 1, fmt="f %d %d %d")

    _replace_into(path, write)


def write_ply(path, vertices, triangles) -> None:
    """Write a mesh as binary little-endian PLY (double x y z, uchar/int face lists)."""
    vertices, triangles = _checked_arrays(os.fspath(path), vertices, triangles)
    header = (
        "ply\nformat binary_little_endian 1.0\ncomment splashdraft mesh\n"
        f"element vertex {len(vertices)}\nproperty double x\nproperty double y\nproperty double z\n"
        f"element face {len(triangles)}\nproperty list uchar int vertex_indices\nend_header\n"
    ).encode("ascii")
    faces = np.zeros(len(triangles), dtype=np.dtype([("n", "u1"), ("i", "<i4", (3,))]))
    faces["n"] = 3
    faces["i"] = triangles

    def write(temporary) -> None:
        with open(temporary, "wb") as handle:
            handle.write(header)
            handle.write(vertices.astype("<f8").tobytes())
            handle.write(faces.tobytes())

    _replace_into(path, write)


def write_npz(path, vertices, triangles) -> None:
    """Write a mesh as npz with arrays ``vertices`` (float64) and ``triangles`` (int64)."""
    vertices, triangles = _checked_arrays(os.fspath(path), vertices, triangles)

    def write(temporary) -> None:
        with open(temporary, "wb") as handle:
            np.savez(handle, vertices=vertices, triangles=triangles)

    _replace_into(path, write)


def write_mesh(path, vertices, triangles) -> None:
    """Write a mesh; the suffix (.obj, .ply, .npz) picks the format."""
    suffix = os.path.splitext(os.fspath(path))[1].lower()
    writers = {".obj": write_obj, ".ply": write_ply, ".npz": write_npz}
    if suffix not in writers:
        raise MeshError(f'{path}: unknown mesh format "{suffix}"; use .obj, .ply or .npz')
    writers[suffix](path, vertices, triangles)


# --------------------------------------------------------------------------- builders


def box_mesh(lower, upper) -> tuple[np.ndarray, np.ndarray]:
    """Axis-aligned box from corner ``lower`` to ``upper`` (metres): 8 vertices, 12 triangles."""
    lower = np.asarray(lower, np.float64)
    upper = np.asarray(upper, np.float64)
    corners = np.array([[i, j, k] for i in (0, 1) for j in (0, 1) for k in (0, 1)], np.float64)
    vertices = lower + corners * (upper - lower)
    # Vertex index = 4i + 2j + k. Each quad is counter-clockwise seen from outside.
    quads = [
        (0, 1, 3, 2),  # x = lower
        (4, 6, 7, 5),  # x = upper
        (0, 4, 5, 1),  # y = lower
        (2, 3, 7, 6),  # y = upper
        (0, 2, 6, 4),  # z = lower
        (1, 5, 7, 3),  # z = upper
    ]
    triangles = [(a, b, c) for a, b, c, d in quads] + [(a, c, d) for a, b, c, d in quads]
    return vertices, np.array(triangles, np.int64)


def uv_sphere_mesh(center=(0.0, 0.0, 0.0), radius=1.0, segments=32, rings=16) -> tuple[np.ndarray, np.ndarray]:
    """Latitude-longitude sphere: ``segments`` around z, ``rings`` from pole to pole."""
    if segments < 3 or rings < 2:
        raise MeshError(f"uv_sphere_mesh: needs segments >= 3 and rings >= 2, got {segments}, {rings}")
    theta = np.pi * np.arange(1, rings) / rings
    phi = 2.0 * np.pi * np.arange(segments) / segments
    st, ct = np.sin(theta)[:, None], np.cos(theta)[:, None]
    ring = np.stack([st * np.cos(phi), st * np.sin(phi), np.broadcast_to(ct, (rings - 1, segments))], axis=-1)
    vertices = np.concatenate([[[0.0, 0.0, 1.0]], ring.reshape(-1, 3), [[0.0, 0.0, -1.0]]])
    top, bottom = 0, len(vertices) - 1
    triangles = []
    for s in range(segments):
        s1 = (s + 1) % segments
        triangles.append((top, 1 + s, 1 + s1))
        for r in range(rings - 2):
            a, b = 1 + r * segments + s, 1 + r * segments + s1
            c, d = a + segments, b + segments
            triangles.append((a, c, d))
            triangles.append((a, d, b))
        base = 1 + (rings - 2) * segments
        triangles.append((bottom, base + s1, base + s))
    return np.asarray(center, np.float64) + radius * vertices, np.array(triangles, np.int64)


def ico_sphere_mesh(center=(0.0, 0.0, 0.0), radius=1.0, subdivisions=2) -> tuple[np.ndarray, np.ndarray]:
    """Geodesic sphere: an icosahedron split ``subdivisions`` times (20 * 4**s triangles)."""
    t = (1.0 + 5.0**0.5) / 2.0
    vertices = [(-1, t, 0), (1, t, 0), (-1, -t, 0), (1, -t, 0), (0, -1, t), (0, 1, t),
                (0, -1, -t), (0, 1, -t), (t, 0, -1), (t, 0, 1), (-t, 0, -1), (-t, 0, 1)]
    triangles = [(0, 11, 5), (0, 5, 1), (0, 1, 7), (0, 7, 10), (0, 10, 11), (1, 5, 9), (5, 11, 4),
                 (11, 10, 2), (10, 7, 6), (7, 1, 8), (3, 9, 4), (3, 4, 2), (3, 2, 6), (3, 6, 8),
                 (3, 8, 9), (4, 9, 5), (2, 4, 11), (6, 2, 10), (8, 6, 7), (9, 8, 1)]
    vertices = [np.array(v, np.float64) / np.linalg.norm(v) for v in vertices]
    for _ in range(int(subdivisions)):
        midpoints = {}

        def midpoint(i, j) -> int:
            key = (min(i, j), max(i, j))
            if key not in midpoints:
                m = vertices[i] + vertices[j]
                vertices.append(m / np.linalg.norm(m))
                midpoints[key] = len(vertices) - 1
            return midpoints[key]

        refined = []
        for a, b, c in triangles:
            ab, bc, ca = midpoint(a, b), midpoint(b, c), midpoint(c, a)
            refined += [(a, ab, ca), (b, bc, ab), (c, ca, bc), (ab, bc, ca)]
        triangles = refined
    return np.asarray(center, np.float64) + radius * np.array(vertices), np.array(triangles, np.int64)


def torus_mesh(center=(0.0, 0.0, 0.0), major_radius=1.0, minor_radius=0.25, major_segments=48, minor_segments=24) -> tuple[np.ndarray, np.ndarray]:
    """Torus around the z axis: tube of radius ``minor_radius`` at distance ``major_radius``."""
    if major_segments < 3 or minor_segments < 3:
        raise MeshError("torus_mesh: needs at least 3 major and 3 minor segments")
    u = 2.0 * np.pi * np.arange(major_segments) / major_segments
    v = 2.0 * np.pi * np.arange(minor_segments) / minor_segments
    uu, vv = np.meshgrid(u, v, indexing="ij")
    ring = major_radius + minor_radius * np.cos(vv)
    vertices = np.stack([ring * np.cos(uu), ring * np.sin(uu), minor_radius * np.sin(vv)], axis=-1).reshape(-1, 3)
    i, j = np.meshgrid(np.arange(major_segments), np.arange(minor_segments), indexing="ij")
    i1, j1 = (i + 1) % major_segments, (j + 1) % minor_segments
    a = i * minor_segments + j
    b = i1 * minor_segments + j
    c = i1 * minor_segments + j1
    d = i * minor_segments + j1
    triangles = np.concatenate([np.stack([a, b, c], -1).reshape(-1, 3), np.stack([a, c, d], -1).reshape(-1, 3)])
    return np.asarray(center, np.float64) + vertices, triangles.astype(np.int64)


def cylinder_mesh(center=(0.0, 0.0, 0.0), radius=1.0, height=1.0, segments=32) -> tuple[np.ndarray, np.ndarray]:
    """Closed cylinder along z, centred at ``center``, with fan-triangulated caps."""
    if segments < 3:
        raise MeshError("cylinder_mesh: needs at least 3 segments")
    phi = 2.0 * np.pi * np.arange(segments) / segments
    circle = np.stack([radius * np.cos(phi), radius * np.sin(phi)], axis=1)
    half = 0.5 * height
    bottom = np.column_stack([circle, np.full(segments, -half)])
    top = np.column_stack([circle, np.full(segments, half)])
    vertices = np.concatenate([bottom, top, [[0.0, 0.0, -half], [0.0, 0.0, half]]])
    s = np.arange(segments)
    s1 = (s + 1) % segments
    cb, ct = 2 * segments, 2 * segments + 1
    triangles = np.concatenate([
        np.stack([s, s1, s1 + segments], 1),
        np.stack([s, s1 + segments, s + segments], 1),
        np.stack([np.full(segments, cb), s1, s], 1),
        np.stack([np.full(segments, ct), s + segments, s1 + segments], 1),
    ])
    return np.asarray(center, np.float64) + vertices, triangles.astype(np.int64)


def plane_mesh(center=(0.0, 0.0, 0.0), size=(1.0, 1.0), divisions=(1, 1)) -> tuple[np.ndarray, np.ndarray]:
    """Open rectangular sheet in the xy plane facing +z (for thin or deforming colliders)."""
    nx, ny = int(divisions[0]), int(divisions[1])
    if nx < 1 or ny < 1:
        raise MeshError("plane_mesh: divisions must be at least (1, 1)")
    x = np.linspace(-0.5 * size[0], 0.5 * size[0], nx + 1)
    y = np.linspace(-0.5 * size[1], 0.5 * size[1], ny + 1)
    xx, yy = np.meshgrid(x, y, indexing="ij")
    vertices = np.column_stack([xx.ravel(), yy.ravel(), np.zeros(xx.size)])
    i, j = np.meshgrid(np.arange(nx), np.arange(ny), indexing="ij")
    a = i * (ny + 1) + j
    b = a + (ny + 1)
    triangles = np.concatenate([np.stack([a, b, b + 1], -1).reshape(-1, 3), np.stack([a, b + 1, a + 1], -1).reshape(-1, 3)])
    return np.asarray(center, np.float64) + vertices, triangles.astype(np.int64)


def transform_points(matrix, points) -> np.ndarray:
    """Apply a 4x4 world matrix (column-vector convention) to (N, 3) points."""
    matrix = np.asarray(matrix, np.float64)
    points = np.asarray(points, np.float64)
    return points @ matrix[:3, :3].T + matrix[:3, 3]
