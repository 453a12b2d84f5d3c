"""engine.compare against brute-force oracles and analytic cases.

Sources:
- Chamfer distance: Barrow, Tenenbaum, Bolles & Wolf 1977, "Parametric correspondence and
  chamfer matching", IJCAI; point-cloud form of Fan, Su & Guibas 2017, "A Point Set
  Generation Network for 3D Object Reconstruction from a Single Image", CVPR [from memory].
  Our convention (symmetric mean, unsquared) is stated in engine/compare.py; the oracle
  below is the definition itself evaluated with scipy.spatial.distance.cdist (reference
  library, brute force).
- SPH density: Monaghan 1992, "Smoothed Particle Hydrodynamics", ARA&A 30:543 [confirmed
  citation]; the lattice value sum_j V W_ij = 0.99997 at H = 2 dx is from
  physics-references.md section 1 [derived numerically there].
"""

import json

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from engine.cache import CacheWriter
from engine.compare import compare_caches, main_compare
from engine.errors import SplashdraftError
from engine.measures import (
    FULL_SUPPORT_NEIGHBOURS,
    chamfer_distance,
    deep_interior,
    interior_mask,
    kinetic_energy,
    potential_energy,
    sph_density,
)


def brute_chamfer(a, b):
    distances = cdist(a, b)
    return 0.5 * (distances.min(axis=1).mean() + distances.min(axis=0).mean())


def lattice(n, spacing):
    grid = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), axis=-1).reshape(-1, 3)
    return grid * spacing


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_chamfer_matches_brute_force_on_random_clouds(seed):
    """Oracle: the definition with scipy's cdist. Tolerance 1e-12: same arithmetic, float64."""
    rng = np.random.default_rng(seed)
    a = rng.uniform(0, 1, (rng.integers(5, 60), 3))
    b = rng.uniform(0, 1, (rng.integers(5, 60), 3)) + 0.1
    cd, a_to_b, b_to_a = chamfer_distance(a, b)
    assert cd == pytest.approx(brute_chamfer(a, b), abs=1e-12)
    assert a_to_b == pytest.approx(cdist(a, b).min(axis=1).mean(), abs=1e-12)
    assert b_to_a == pytest.approx(cdist(a, b).min(axis=0).mean(), abs=1e-12)


def test_chamfer_of_shifted_lattice_equals_the_shift():
    """Analytic: a lattice of spacing d shifted by s < d/2 along one axis has every nearest
    neighbour at exactly s, so CD = s in our unsquared mean convention. Tolerance 1e-12."""
    d, shift = 0.02, 0.006
    a = lattice(6, d)
    b = a + np.array([shift, 0.0, 0.0])
    cd, _, _ = chamfer_distance(a, b)
    assert cd == pytest.approx(shift, abs=1e-12)
    assert chamfer_distance(a, a)[0] == 0.0


def test_chamfer_empty_and_duplicate_inputs():
    """Edge cases by definition: two empty sets -> 0; one empty -> inf; duplicates -> 0."""
    empty = np.zeros((0, 3))
    assert chamfer_distance(empty, empty)[0] == 0.0
    assert chamfer_distance(empty, np.ones((2, 3)))[0] == np.inf
    points = np.array([[0.0, 0, 0], [0.0, 0, 0], [1.0, 0, 0]])
    assert chamfer_distance(points, points[[0, 2]])[0] == 0.0


def test_sph_density_on_a_lattice_interior_is_rest_density():
    """Monaghan 1992 estimator on a cubic lattice, H = 2 dx: 0.99997 rho0 in the interior
    (physics-references.md section 1). Tolerance 1e-4: the value is known to 5 digits."""
    d = 0.05
    points = lattice(9, d)
    density, counts = sph_density(points, d, 1000.0)
    centre = np.argmin(np.linalg.norm(points - points.mean(axis=0), axis=1))
    assert density[centre] / 1000.0 == pytest.approx(0.99997, abs=1e-4)
    assert counts[centre] == 26  # 3^3 - 1 lattice neighbours strictly inside H = 2 dx


def test_deep_interior_of_a_lattice_cube_is_two_layers_in():
    """Lattice counting [D]: on a cubic lattice, H = 2 dx holds 26 neighbours strictly inside
    (physics-references.md section 1); a face particle misses 9 of them (17 < 22), so the interior
    of a 12^3 cube is its inner 10^3 and the deep interior (every neighbour interior) its inner
    8^3 = 512. The deep interior of a perfect lattice reads 0.99997 rho0 (same section), so all of
    it is within 3 %."""
    d = 0.05
    points = lattice(12, d)
    density, counts, pairs = sph_density(points, d, 1000.0, with_pairs=True)
    interior = counts >= FULL_SUPPORT_NEIGHBOURS
    deep = deep_interior(interior, pairs)
    index = np.rint((points - points.min(axis=0)) / d).astype(int)
    assert np.array_equal(interior, np.all((index >= 1) & (index <= 10), axis=1))
    assert np.array_equal(deep, np.all((index >= 2) & (index <= 9), axis=1))
    assert deep.sum() == 512
    assert np.all(np.abs(density[deep] / 1000.0 - 1.0) <= 0.03)


def test_sph_density_matches_a_per_particle_loop():
    """Oracle: a slow per-particle loop of the same sum (common practice for SPH sums)."""
    from engine.kernels import kernel

    rng = np.random.default_rng(3)
    d = 0.1
    points = rng.uniform(0, 0.5, (60, 3))
    bpos = rng.uniform(0, 0.5, (20, 3))
    bvol = rng.uniform(0.5, 1.0, 20) * d**3
    density, _ = sph_density(points, d, 1000.0, bpos, bvol)
    h = 2 * d
    for i in range(len(points)):
        r = np.linalg.norm(points - points[i], axis=1)
        rb = np.linalg.norm(bpos - points[i], axis=1)
        expected = 1000.0 * d**3 * kernel(r[r < h], h).sum() + 1000.0 * (bvol[rb < h] * kernel(rb[rb < h], h)).sum()
        assert density[i] == pytest.approx(expected, rel=1e-10)


def test_kinetic_energy_is_half_m_v_squared():
    """Definition: 1/2 m |v|^2 with m = rho0 d^3 (exact arithmetic check)."""
    v = np.array([[1.0, 0, 0], [0, 2.0, 0]])
    assert kinetic_energy(v, 1000.0 * 0.1**3) == pytest.approx(0.5 * 1.0 * 5.0)


def test_potential_energy_is_m_g_h():
    """Definition: m |g| sum h, h = offset - down . x (here down = -z, datum at z = 0: h = z)."""
    x = np.array([[0.0, 0, 0.5], [3.0, 1.0, 2.0]])
    datum = (np.array([0.0, 0.0, -1.0]), 0.0)
    assert potential_energy(x, 2.0, [0.0, 0.0, -9.81], datum) == pytest.approx(2.0 * 9.81 * 2.5)
    assert potential_energy(np.zeros((0, 3)), 2.0, [0.0, 0.0, -9.81], datum) == 0.0


def test_interior_is_a_full_support_count():
    """The interior is the particles with at least FULL_SUPPORT_NEIGHBOURS neighbours (26 on a cubic lattice)."""
    assert interior_mask([FULL_SUPPORT_NEIGHBOURS - 1, FULL_SUPPORT_NEIGHBOURS, 26]).tolist() == [False, True, True]


def _write_cache(folder, frames, spacing=0.02):
    header = {"scene_name": "t", "scene_hash": "h", "solver": {"name": "sph", "settings": {}}, "fps": 24,
              "frame_start": 1, "frame_end": len(frames), "particle_spacing": spacing, "rest_density": 1000.0}
    writer = CacheWriter(folder, header)
    for f, points in enumerate(frames, start=1):
        n = len(points)
        writer.write_frame(f, {"positions": points, "velocities": np.zeros((n, 3)), "ids": np.arange(n),
                               "density": np.full(n, 1000.0), "pressure": np.zeros(n)}, (f - 1) / 24, 1, 0.0)
    writer.mark_complete()


def test_compare_caches_and_cli_report_the_known_shift(tmp_path, capsys):
    """Two caches of one lattice, B shifted by 0.3 d: mean Chamfer must be 0.3 spacings per
    frame (analytic, as above; float32 PLY storage -> tolerance 1e-5 spacings). The CLI prints a
    table on stderr and JSON with the documented top-level keys on stdout."""
    d = 0.02
    a = lattice(5, d) + 0.1
    _write_cache(tmp_path / "a", [a, a])
    _write_cache(tmp_path / "b", [a + [0.3 * d, 0, 0], a + [0, 0.3 * d, 0]])
    result = compare_caches(tmp_path / "a", tmp_path / "b")
    assert result["mean_chamfer_spacings"] == pytest.approx(0.3, abs=1e-5)
    assert result["frames_compared"] == 2
    assert result["penetrating_particles"] is None  # no scene given: stated, not guessed
    status = main_compare([str(tmp_path / "a"), str(tmp_path / "b"), "--json", "--plot", str(tmp_path / "cd.png")])
    out = capsys.readouterr()
    assert status == 0
    data = json.loads(out.out)
    for key in ("mean_chamfer_spacings", "max_chamfer_spacings", "density_within_3pct_fraction",
                "penetrating_particles", "frames"):
        assert key in data
    assert "mean Chamfer 0.300 d" in out.err
    assert (tmp_path / "cd.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_compare_rejects_caches_without_common_frames(tmp_path):
    """Bad input gets a named engine error (project rule)."""
    _write_cache(tmp_path / "a", [lattice(2, 0.02)])
    with pytest.raises(SplashdraftError, match="is not a bake folder|cache folder does not exist"):
        compare_caches(tmp_path / "a", tmp_path / "missing")
    assert main_compare([str(tmp_path / "a"), str(tmp_path / "missing")]) == 4
