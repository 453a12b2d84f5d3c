"""engine.geometry: mesh checks, winding-number inside test, volume and surface sampling, push-out.

Sources (flags as in docs/physics-references.md):
- Jacobson, Kavan & Sorkine-Hornung 2013, "Robust Inside-Outside Segmentation
  using Generalized Winding Numbers", ACM TOG 32(4): w = 1 inside, 0 outside a
  closed mesh, fractional (the solid angle of what is present over 4 pi) for
  open ones [R, abstract and definition].
- Van Oosterom & Strackee 1983, "The Solid Angle of a Plane Triangle", IEEE
  Trans. Biomed. Eng. 30(2):125-126 [from memory].
- Barber, Dobkin & Huhdanpaa 1996, "The Quickhull Algorithm for Convex Hulls",
  ACM TOMS 22(4), through scipy.spatial.ConvexHull (reference library) [R].
- Lattice counting: averaged over uniformly random translations, the number of
  points of a lattice with cell volume s^3 inside a body equals V / s^3
  exactly (Fubini over one cell; e.g. Gruber & Lekkerkerker, "Geometry of
  Numbers", 1987, sect. 2) [from memory; D: one-line proof by Fubini].
"""

import numpy as np
import pytest
from scipy.spatial import ConvexHull, cKDTree

from engine.geometry import (check_mesh, count_inside, evaluate_surface, inside_closed_mesh, inside_mesh,
                             lattice_points, push_out, sample_surface, sample_volume, signed_volume,
                             winding_numbers)
from engine.mesh_io import box_mesh, ico_sphere_mesh, plane_mesh, torus_mesh, transform_points


def _random_rotation(rng):
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q *= np.sign(np.diag(r))
    return q if np.linalg.det(q) > 0 else -q


# --------------------------------------------------------------------------- checks and volume


def test_open_non_manifold_degenerate_and_nan_counts():
    """Edge counts by construction: a box has 18 edges (12 sides + 6 face diagonals), each used twice.

    Removing one face (2 triangles) leaves its 4 sides used once (open) and its
    diagonal unused: 4 open edges [D, counting]. A fin triangle on an existing
    edge makes that edge used 3 times: 1 non-manifold edge, 2 new open edges.
    """
    v, t = box_mesh([0, 0, 0], [1, 1, 1])
    assert check_mesh(v, t).open_edges == 0 and check_mesh(v, t).is_closed
    opened = np.delete(t, [0, 6], axis=0)
    report = check_mesh(v, opened)
    assert report.open_edges == 4 and report.non_manifold_edges == 0 and not report.is_closed
    fin_v = np.vstack([v, [[2.0, 0.0, 0.0]]])
    fin = np.vstack([t, [[0, 1, 8]]])
    report = check_mesh(fin_v, fin)
    assert report.non_manifold_edges == 1 and report.open_edges == 2
    degenerate = np.vstack([t, [[0, 0, 1], [0, 4, 0]]])
    assert check_mesh(v, degenerate).degenerate_triangles == 2
    bad = v.copy()
    bad[3] = np.nan
    assert check_mesh(bad, t).non_finite_vertices == 1


def test_signed_volume_matches_quickhull_and_sign_flips():
    """Divergence-theorem volume equals scipy's Quickhull volume for random convex hulls [R, reference library].

    Hull facets are oriented outward with the hull's plane equations first.
    Translating by 1e3 m must not change the result (centroid-relative sum).
    Tolerance 1e-10 relative: float rounding of a few hundred terms.
    """
    rng = np.random.default_rng(7)
    for _ in range(3):
        points = rng.normal(size=(60, 3)) * [1.0, 2.0, 0.5]
        hull = ConvexHull(points)
        triangles = hull.simplices.copy()
        corners = points[triangles]
        normal = np.cross(corners[:, 1] - corners[:, 0], corners[:, 2] - corners[:, 0])
        inward = np.einsum("ij,ij->i", normal, hull.equations[:, :3]) < 0
        triangles[inward] = triangles[inward][:, ::-1]
        assert signed_volume(points, triangles) == pytest.approx(hull.volume, rel=1e-10)
        assert signed_volume(points + 1e3, triangles) == pytest.approx(hull.volume, rel=1e-10)
        assert signed_volume(points, triangles[:, ::-1]) == pytest.approx(-hull.volume, rel=1e-10)


# --------------------------------------------------------------------------- inside test


def test_winding_number_open_box_is_five_sixths_at_centre():
    """At a cube's centre each face subtends 4 pi / 6 sr, so with one face missing w = 5/6 [D, symmetry].

    This is the fractional behaviour Jacobson et al. 2013 describe for open
    meshes. Inverting the winding negates w; the inside test ignores the sign.
    Tolerance 1e-12: float rounding.
    """
    v, t = box_mesh([-1, -1, -1], [1, 1, 1])
    centre = np.zeros((1, 3))
    assert winding_numbers(centre, v, t)[0] == pytest.approx(1.0, abs=1e-12)
    assert winding_numbers(centre, v, np.delete(t, [0, 6], axis=0))[0] == pytest.approx(5 / 6, abs=1e-12)
    assert winding_numbers(centre, v, t[:, ::-1])[0] == pytest.approx(-1.0, abs=1e-12)
    assert inside_mesh(centre, v, t[:, ::-1])[0]
    assert winding_numbers(np.array([[5.0, 0.3, -0.2]]), v, t)[0] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("shape", ["sphere", "torus"])
def test_inside_tests_match_analytic_solids(shape):
    """Both inside tests agree with the analytic solid away from the polygonal approximation band.

    Analytic insides [common practice]: |p - c| < r (sphere) and
    (sqrt(x^2 + y^2) - R)^2 + z^2 < r^2 (torus). Points within 0.03 of the
    surface are excluded: the inscribed meshes sit at most r (1 - cos(pi/n))
    inside it (< 0.012 here) [D]. The inside test and the fast ray-crossing
    test must agree exactly on the remaining points.
    """
    rng = np.random.default_rng(11)
    if shape == "sphere":
        centre = np.array([0.3, -0.2, 0.1])
        v, t = ico_sphere_mesh(centre, 1.0, 3)
        points = centre + rng.uniform(-1.3, 1.3, size=(3000, 3))
        distance = np.linalg.norm(points - centre, axis=1) - 1.0
    else:
        v, t = torus_mesh((0, 0, 0), 1.0, 0.35, 64, 32)
        points = rng.uniform([-1.5, -1.5, -0.5], [1.5, 1.5, 0.5], size=(3000, 3))
        distance = np.hypot(np.hypot(points[:, 0], points[:, 1]) - 1.0, points[:, 2]) - 0.35
    keep = np.abs(distance) > 0.03
    expected = distance[keep] < 0
    assert np.array_equal(inside_mesh(points[keep], v, t), expected)
    assert np.array_equal(inside_closed_mesh(points[keep], v, t), expected)
    assert count_inside(points[keep], v, t) == int(expected.sum())


def test_ray_crossing_survives_lattice_aligned_edges():
    """Lattice columns that pass exactly through box edges and vertices are still classified right.

    Oracle: the box [0.2, 0.8]^3 against lattice points (k + 1/2) 0.1: column
    x = 0.25 is inside, and brute-force coordinate comparison gives the count.
    The generalised winding number (independent formula) must agree.
    """
    v, t = box_mesh([0.2, 0.2, 0.2], [0.8, 0.8, 0.8])
    grid = lattice_points([0, 0, 0], [1, 1, 1], 0.05)
    brute = np.all((grid > 0.2) & (grid < 0.8), axis=1)
    on_surface = np.any(np.isclose(grid, 0.2) | np.isclose(grid, 0.8), axis=1)
    assert not on_surface.any()  # (k + 1/2) 0.05 never equals 0.2 or 0.8, but columns graze the edges
    assert np.array_equal(inside_closed_mesh(grid, v, t), brute)
    assert np.array_equal(inside_mesh(grid, v, t), brute)


# --------------------------------------------------------------------------- volume sampling


def test_box_fill_count_is_exact_lattice_count():
    """An axis box holds prod_a #{k : lo_a < (k + 1/2) s < hi_a} lattice points [D, counting]."""
    lower, upper, s = np.array([0.013, -0.305, 0.2]), np.array([0.41, 0.07, 0.95]), 0.02
    v, t = box_mesh(lower, upper)
    expected = 1
    for a in range(3):
        k = np.arange(-100, 100)
        expected *= int(np.sum((lower[a] < (k + 0.5) * s) & ((k + 0.5) * s < upper[a])))
    points = sample_volume(v, t, s)
    assert len(points) == expected
    assert np.all((points > lower) & (points < upper))


@pytest.mark.parametrize("shape", ["sphere", "torus", "tilted_box"])
def test_sampled_volume_is_unbiased_and_converges(shape):
    """count * s^3 estimates the mesh volume without bias, and the error shrinks with the spacing.

    Source: the translation-average lattice theorem in the module docstring
    [from memory; D]. 24 random placements per spacing: the mean of
    count * s^3 must lie within 4.5 standard errors of the exact polyhedron
    volume (signed volume; checked against Quickhull and exact formulas in
    test_mesh_io); the RMS error must drop when the spacing halves (the cut-
    cell error scales like s^(3/2) or faster for smooth bodies, so by a factor
    of about 2.8; we require 0.7 to leave room for placement noise).
    Single placements must also stay inside the worst-case envelope
    sqrt(3) * s * area (cells within half a cell diagonal of the surface) [D].
    """
    rng = np.random.default_rng(5)
    if shape == "sphere":
        v, t = ico_sphere_mesh((0, 0, 0), 0.5, 3)
    elif shape == "torus":
        v, t = torus_mesh((0, 0, 0), 0.5, 0.2, 48, 24)
    else:
        v, t = box_mesh([-0.3, -0.2, -0.25], [0.3, 0.2, 0.25])
    report = check_mesh(v, t)
    rms = []
    for spacing in (0.1, 0.05):
        errors = []
        for _ in range(24):
            moved = transform_points(np.vstack([np.c_[_random_rotation(rng), rng.uniform(-1, 1, 3)], [0, 0, 0, 1]]), v)
            count = len(sample_volume(moved, t, spacing))
            error = count * spacing**3 - report.volume
            assert abs(error) <= np.sqrt(3) * spacing * report.area
            errors.append(error)
        errors = np.array(errors)
        assert abs(errors.mean()) <= 4.5 * errors.std(ddof=1) / np.sqrt(len(errors)) + 1e-15
        rms.append(np.sqrt(np.mean(errors**2)))
    assert rms[1] < 0.7 * rms[0]


def test_jitter_is_seeded_bounded_and_keeps_the_count():
    """Jitter moves each particle by at most jitter * s per axis, reproducibly for one seed."""
    v, t = ico_sphere_mesh((0.1, 0.2, 0.3), 0.4, 2)
    plain = sample_volume(v, t, 0.05)
    a = sample_volume(v, t, 0.05, jitter=0.2, rng=np.random.default_rng(3))
    b = sample_volume(v, t, 0.05, jitter=0.2, rng=np.random.default_rng(3))
    c = sample_volume(v, t, 0.05, jitter=0.2, rng=np.random.default_rng(4))
    assert len(a) == len(plain) and np.array_equal(a, b) and not np.array_equal(a, c)
    assert np.abs(a - plain).max() <= 0.2 * 0.05 + 1e-15 and np.abs(a - plain).max() > 0.1 * 0.05


# --------------------------------------------------------------------------- surface sampling


def test_surface_samples_on_a_sphere_have_even_density_and_radial_normals():
    """Surface samples: count = area / s^2, density even at the kernel scale, normals outward.

    Expected count: each triangle's lattice holds area / s^2 points on average
    over its offset (2D form of the lattice theorem) [from memory; D]; with
    about 5000 triangles and equidistributed offsets the total is within 2 %.
    Caps of angular radius 0.3 rad (expected 112 samples) must hold within
    25 % of area / s^2 (Poisson noise alone would be 9 %, lattices are more
    even); no point of the sphere is farther than 1.5 s from a sample (the
    worst gap where triangle lattices meet; a single lattice has s / sqrt(2)).
    Normals: within the largest facet angle (~ 2.5 deg, cos > 0.998) of radial.
    """
    centre = np.array([0.013, -0.021, 0.007])
    v, t = ico_sphere_mesh(centre, 1.0, 4)
    s = 0.05
    samples = sample_surface(v, t, s)
    area = check_mesh(v, t).area
    assert len(samples.points) == pytest.approx(area / s**2, rel=0.02)
    radial = samples.points - centre
    assert np.abs(np.linalg.norm(radial, axis=1) - 1.0).max() < 0.01
    radial /= np.linalg.norm(radial, axis=1, keepdims=True)
    assert np.einsum("ij,ij->i", samples.normals, radial).min() > 0.998
    rng = np.random.default_rng(2)
    directions = rng.normal(size=(40, 3))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    expected = 2 * np.pi * (1 - np.cos(0.3)) / s**2
    counts = np.array([(radial @ d > np.cos(0.3)).sum() for d in directions])
    assert np.all(np.abs(counts - expected) < 0.25 * expected)
    probes = rng.normal(size=(4000, 3))
    probes = centre + probes / np.linalg.norm(probes, axis=1, keepdims=True)
    gap, _ = cKDTree(samples.points).query(probes)
    assert gap.max() < 1.5 * s
    assert np.all(samples.barycentric >= 0) and np.allclose(samples.barycentric.sum(axis=1), 1.0)


def test_surface_samples_follow_an_affine_motion_exactly():
    """Re-evaluating barycentric samples on moved vertices equals moving the samples (affine maps keep barycentric combinations) [D].

    Also: long thin triangles (a 128-sided cylinder side) are covered evenly
    along their length (10 height bins within 15 % of each other).
    """
    v, t = torus_mesh((0, 0, 0), 0.6, 0.2, 32, 16)
    samples = sample_surface(v, t, 0.04)
    rng = np.random.default_rng(9)
    matrix = np.eye(4)
    matrix[:3, :3] = _random_rotation(rng) * 1.7
    matrix[:3, 3] = [0.3, -2.0, 5.0]
    points, normals = evaluate_surface(transform_points(matrix, v), t, samples.triangle_index, samples.barycentric)
    np.testing.assert_allclose(points, transform_points(matrix, samples.points), atol=1e-12)
    np.testing.assert_allclose(normals, samples.normals @ (matrix[:3, :3] / 1.7).T, atol=1e-12)
    from engine.mesh_io import cylinder_mesh

    v, t = cylinder_mesh((0, 0, 0.5), 0.2, 1.0, 128)
    samples = sample_surface(v, t, 0.02)
    side = np.abs(samples.normals[:, 2]) < 0.5
    histogram = np.histogram(samples.points[side, 2], bins=10, range=(0, 1))[0]
    assert histogram.min() > 0.85 * histogram.max()


# --------------------------------------------------------------------------- push-out


def test_push_out_clears_a_closed_collider_and_spares_points_beside_edges():
    """Points inside a box end up at least ``margin`` outside it; outside points beside a convex edge stay put.

    Oracle: analytic box (coordinates compared directly). The edge case is the
    one the nearest-sample plane alone gets wrong: with a hand-placed sample
    set, the point (0.5, 1.015, 0.995) is outside the box (y > 1) but its
    nearest sample is on the top face, whose plane puts it 0.005 below; the
    winding-number check must leave it alone, while without the mesh it moves.
    """
    lower, upper, s, margin = np.array([0.0, 0.0, 0.0]), np.array([1.0, 1.0, 1.0]), 0.05, 0.0125
    v, t = box_mesh(lower, upper)
    samples = sample_surface(v, t, s)
    rng = np.random.default_rng(4)
    inside = rng.uniform(0.01, 0.99, size=(500, 3)) * [1, 1, 0.08] + [0, 0, 0.92]  # near the top face
    result = push_out(inside, samples.points, samples.normals, margin, vertices=v, triangles=t)
    outside_by = np.max(np.maximum(lower - result.points, result.points - upper), axis=1)
    assert np.all(outside_by >= margin - 1e-9)
    assert count_inside(result.points, v, t) == 0 and result.pushed.all()

    hand_points = np.array([[0.5, 0.99, 1.0], [0.5, 1.0, 0.9]])
    hand_normals = np.array([[0.0, 0.0, 1.0], [0.0, 1.0, 0.0]])
    beside_edge = np.array([[0.5, 1.015, 0.995]])
    kept = push_out(beside_edge, hand_points, hand_normals, margin, vertices=v, triangles=t)
    np.testing.assert_array_equal(kept.points, beside_edge)
    assert not kept.pushed[0]
    naive = push_out(beside_edge, hand_points, hand_normals, margin)
    assert naive.pushed[0]
    # A point just in front of a face (closer than the margin) is moved out to the margin.
    cushion = push_out(np.array([[0.5, 1.004, 0.5]]), samples.points, samples.normals, margin, vertices=v, triangles=t)
    assert cushion.points[0, 1] == pytest.approx(1.0 + margin, abs=1e-12)


def test_push_out_of_a_sheet_keeps_the_side():
    """A two-sided sheet pushes points within the margin to the side they are on."""
    v, t = plane_mesh((0, 0, 0), (1, 1), (2, 2))
    samples = sample_surface(v, t, 0.05)
    points = np.array([[0.1, 0.1, 0.004], [0.1, -0.1, -0.002], [0.2, 0.2, 0.3]])
    result = push_out(points, samples.points, samples.normals, 0.01, two_sided=True, reach=0.05)
    np.testing.assert_allclose(result.points[:, 2], [0.01, -0.01, 0.3], atol=1e-12)
    assert result.pushed.tolist() == [True, True, False]
