"""engine.mesh_io: OBJ / PLY / npz readers and writers, mesh builders.

Format sources: Wavefront Technologies, "Object Files (.obj)", Appendix B1 of
the Advanced Visualizer manual (v/f records, 1-based and negative relative
indices, v/vt/vn triplets) [from memory; common practice]; Turk 1994, "The
PLY Polygon File Format" (header, ascii / binary_little_endian /
binary_big_endian bodies, list properties) [from memory; common practice].
Inputs below are written by hand (bytes packed with numpy following those
layouts), not by our writers, so readers are checked against the formats.
"""

import struct

import numpy as np
import pytest
from scipy.spatial import ConvexHull

from engine.errors import MeshError
from engine.geometry import check_mesh, signed_volume
from engine.mesh_io import (box_mesh, cylinder_mesh, ico_sphere_mesh, plane_mesh, read_mesh, torus_mesh,
                            uv_sphere_mesh, write_mesh, write_npz, write_obj, write_ply)

CUBE_OBJ = """# unit cube written with quads, texture/normal indices and groups
mtllib cube.mtl
o cube
v 0 0 0
v 1 0 0
v 1 1 0
v 0 1 0
v 0 0 1
v 1 0 1
v 1 1 1
v 0 1 1
vt 0 0
vn 0 0 1
g sides
usemtl grey
s off
f 1/1/1 4/1/1 3/1/1 2/1/1
f 5//1 6//1 7//1 8//1
f 1 2 6 5
f -7 -6 -2 -3
f 3 4 8 7
f 4 1 5 8
"""


def test_obj_quads_negative_indices_and_ignored_records(tmp_path):
    """OBJ quads fan-triangulate; negative indices count back from the last vertex (Wavefront spec).

    Oracle: a unit cube has volume 1 m^3 and every edge shared by two faces,
    so 6 quads -> 12 triangles, 0 open edges, signed volume exactly 1 for
    outward winding (divergence theorem; exact arithmetic on small integers).
    """
    path = tmp_path / "cube.obj"
    path.write_text(CUBE_OBJ)
    vertices, triangles = read_mesh(path)
    assert vertices.shape == (8, 3) and triangles.shape == (12, 3)
    report = check_mesh(vertices, triangles)
    assert report.open_edges == 0 and report.non_manifold_edges == 0
    assert report.volume == pytest.approx(1.0, abs=1e-12)
    # "f -7 -6 -2 -3" after 8 vertices is "f 2 3 7 6" (1-based), i.e. 0-based [1, 2, 6] then [1, 6, 5].
    assert triangles[6].tolist() == [1, 2, 6] and triangles[7].tolist() == [1, 6, 5]


def test_ascii_ply_with_polygon_and_extra_properties(tmp_path):
    """ASCII PLY (Turk 1994) with normals, a colour element and a quad face.

    Oracle: a square pyramid with base 2 x 2 and apex height 3 has volume
    b^2 h / 3 = 4 m^3 (Euclid XII.7) [common practice].
    """
    text = """ply
format ascii 1.0
comment pyramid
element vertex 5
property float x
property float y
property float z
property float nx
property float ny
property float nz
element face 5
property list uchar int vertex_indices
element material 1
property uchar red
end_header
-1 -1 0 0 0 1
1 -1 0 0 0 1
1 1 0 0 0 1
-1 1 0 0 0 1
0 0 3 0 0 1
4 0 3 2 1
3 0 1 4
3 1 2 4
3 2 3 4
3 3 0 4
255
"""
    path = tmp_path / "pyramid.ply"
    path.write_text(text)
    vertices, triangles = read_mesh(path)
    assert len(triangles) == 6
    assert signed_volume(vertices, triangles) == pytest.approx(4.0, rel=1e-12)


def _binary_ply(order, vertices, faces, count_type="B", index_type="i"):
    fmt = "binary_little_endian" if order == "<" else "binary_big_endian"
    header = (f"ply\nformat {fmt} 1.0\nelement vertex {len(vertices)}\nproperty float x\nproperty float y\n"
              f"property float z\nproperty uchar flag\nelement face {len(faces)}\n"
              f"property list {'uchar' if count_type == 'B' else 'ushort'} {'int' if index_type == 'i' else 'uint'} vertex_indices\n"
              "end_header\n").encode("ascii")
    body = b"".join(struct.pack(order + "fffB", *v, 7) for v in vertices)
    for face in faces:
        body += struct.pack(order + count_type + index_type * len(face), len(face), *face)
    return header + body


@pytest.mark.parametrize("order", ["<", ">"])
def test_binary_ply_both_byte_orders_and_mixed_polygons(tmp_path, order):
    """Binary PLY in both byte orders, uniform triangle lists and mixed triangle/quad lists (Turk 1994).

    Oracle: the unit cube again (volume 1, closed), packed with ``struct``
    independently of the reader. Tolerance: float32 coordinates of 0/1 are exact.
    """
    cube_v, _ = box_mesh([0, 0, 0], [1, 1, 1])
    quads = [(0, 1, 3, 2), (4, 6, 7, 5), (0, 4, 5, 1), (2, 3, 7, 6), (0, 2, 6, 4), (1, 5, 7, 3)]
    mixed = [quads[0][:3], (quads[0][0], quads[0][2], quads[0][3])] + quads[1:]
    triangles_only = [(a, b, c) for a, b, c, d in quads] + [(a, c, d) for a, b, c, d in quads]
    for faces, count_type in ((mixed, "B"), (triangles_only, "H")):
        path = tmp_path / f"cube_{len(faces)}.ply"
        path.write_bytes(_binary_ply(order, cube_v, faces, count_type=count_type))
        vertices, triangles = read_mesh(path)
        np.testing.assert_array_equal(vertices, cube_v)
        report = check_mesh(vertices, triangles)
        assert len(triangles) == 12 and report.is_closed
        assert report.volume == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("suffix", [".obj", ".ply", ".npz"])
def test_round_trip_is_exact(tmp_path, suffix):
    """Writing then reading returns the same arrays (OBJ with 17 significant digits round-trips doubles exactly, IEEE 754)."""
    vertices, triangles = ico_sphere_mesh((0.1, -2.0, 3.3), 0.7, 2)
    vertices = vertices + np.random.default_rng(3).normal(scale=1e-3, size=vertices.shape)
    path = tmp_path / f"mesh{suffix}"
    write_mesh(path, vertices, triangles)
    back_v, back_t = read_mesh(path)
    np.testing.assert_array_equal(back_v, vertices)
    np.testing.assert_array_equal(back_t, triangles)
    assert back_v.dtype == np.float64 and back_t.dtype == np.int64


def test_reader_errors_name_file_and_line(tmp_path):
    """Malformed input raises MeshError naming the file and the line or field (no bare traceback)."""
    bad = tmp_path / "bad.obj"
    bad.write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 9\n")
    with pytest.raises(MeshError, match=r"bad\.obj: line 4: face index \"9\""):
        read_mesh(bad)
    bad.write_text("v 0 0 zero\n")
    with pytest.raises(MeshError, match=r"line 1: bad vertex coordinate"):
        read_mesh(bad)
    bad.write_text("v 0 0 0\nf 1 0 1\n")
    with pytest.raises(MeshError, match=r"line 2: face index 0 is not allowed"):
        read_mesh(bad)
    with pytest.raises(MeshError, match=r"missing\.obj: mesh file not found"):
        read_mesh(tmp_path / "missing.obj")
    with pytest.raises(MeshError, match=r'unknown mesh format "\.stl"'):
        read_mesh(tmp_path / "x.stl")
    npz = tmp_path / "points.npz"
    np.savez(npz, vertices=np.zeros((3, 3)))
    with pytest.raises(MeshError, match='npz mesh has no array "triangles"'):
        read_mesh(npz)
    pickled = tmp_path / "pickled.npz"
    np.savez(pickled, vertices=np.array([object()], dtype=object), triangles=np.zeros((0, 3), int))
    with pytest.raises(MeshError, match=r"pickled\.npz: npz mesh: array .vertices. holds object values, not numbers"):
        read_mesh(pickled)
    truncated = tmp_path / "short.ply"
    cube_v, cube_t = box_mesh([0, 0, 0], [1, 1, 1])
    truncated.write_bytes(_binary_ply("<", cube_v, [tuple(t) for t in cube_t])[:-20])
    with pytest.raises(MeshError, match=r"short\.ply: element face"):
        read_mesh(truncated)


def test_builders_are_closed_outward_and_match_solid_formulas():
    """Builders give closed, outward meshes whose volumes match exact polyhedron formulas.

    Sources [common practice, textbook geometry]: box V = abc; an n-sided
    regular prism inscribed in radius r has V = (n/2) r^2 sin(2 pi / n) h;
    convex polyhedra (spheres) are checked against scipy's Quickhull volume
    (Barber, Dobkin & Huhdanpaa 1996, "The Quickhull Algorithm for Convex
    Hulls", ACM TOMS 22(4)) [confirmed: scipy.spatial.ConvexHull.volume].
    Polygonal torus with m major and n minor segments: each wedge between two
    cross-sections maps (rho, z, s) linearly with Jacobian rho sin(2 pi / m), so
    V = m sin(2 pi / m) * (n / 2) r^2 sin(2 pi / n) * R exactly [D, derived
    here], which tends to Pappus's 2 pi^2 R r^2 [common practice]. Tolerances
    1e-12: float rounding only.
    """
    v, t = box_mesh([1, 2, 3], [2, 4, 6])
    assert check_mesh(v, t).is_closed and signed_volume(v, t) == pytest.approx(6.0, rel=1e-12)
    n, r, h = 40, 0.3, 1.2
    v, t = cylinder_mesh((0, 0, 5), r, h, n)
    assert check_mesh(v, t).is_closed
    assert signed_volume(v, t) == pytest.approx(n / 2 * r * r * np.sin(2 * np.pi / n) * h, rel=1e-12)
    for v, t in (ico_sphere_mesh((1, 1, 1), 2.0, 3), uv_sphere_mesh((0, 0, 0), 1.5, 24, 12)):
        report = check_mesh(v, t)
        assert report.is_closed and report.degenerate_triangles == 0
        assert report.volume == pytest.approx(ConvexHull(v).volume, rel=1e-12)
    m, n, big, small = 48, 24, 1.0, 0.25
    v, t = torus_mesh((0, 0, 0), big, small, m, n)
    report = check_mesh(v, t)
    exact = m * np.sin(2 * np.pi / m) * (n / 2) * small**2 * np.sin(2 * np.pi / n) * big
    assert report.is_closed and report.volume == pytest.approx(exact, rel=1e-12)
    assert exact == pytest.approx(2 * np.pi**2 * big * small**2, rel=0.015)
    v, t = plane_mesh((0, 0, 0), (2.0, 1.0), (4, 2))
    report = check_mesh(v, t)
    assert report.open_edges == 2 * (4 + 2) and report.area == pytest.approx(2.0, rel=1e-12)


def test_writers_refuse_bad_arrays(tmp_path):
    """Writers validate their arrays and name the problem."""
    with pytest.raises(MeshError, match=r"triangle 0 uses vertex index"):
        write_obj(tmp_path / "x.obj", np.zeros((3, 3)), np.array([[0, 1, 3]]))
    with pytest.raises(MeshError, match=r"vertices have shape \(3, 2\)"):
        write_ply(tmp_path / "x.ply", np.zeros((3, 2)), np.array([[0, 1, 2]]))
    with pytest.raises(MeshError, match=r"unknown mesh format"):
        write_mesh(tmp_path / "x.stl", np.zeros((3, 3)), np.array([[0, 1, 2]]))
    write_npz(tmp_path / "ok.npz", np.zeros((3, 3)), np.array([[0, 1, 2]]))
    assert not list(tmp_path.glob("*.tmp"))
