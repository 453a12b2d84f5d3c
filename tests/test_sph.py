"""DFSPH solver checks against oracles outside the vectorised code.

Sources: the SPH sums are those of Bender & Koschier 2015, "Divergence-Free Smoothed
Particle Hydrodynamics", SCA (formulas from memory, [M] in physics-references.md §2) with
Akinci et al. 2012 boundary terms ([M], §3); the oracle below evaluates them with plain
per-particle Python loops and engine.kernels, independent of the sparse operators.
Momentum conservation follows from the antisymmetry of grad W (Monaghan 1992, "Smoothed
Particle Hydrodynamics", Annu. Rev. Astron. Astrophys. 30:543-574, [R citation]).
"""

import numpy as np
import pytest

from engine.boundary import make_boundary, sample_box_walls
from engine.kernels import kernel, kernel_gradient
from engine.sph import PairOperators, _find_pairs, dfsph_substep, make_params


def _cloud(n=60, spacing=0.1, seed=3):
    rng = np.random.default_rng(seed)
    side = int(round(n ** (1 / 3))) + 1
    grid = np.stack(np.meshgrid(*[np.arange(side)] * 3, indexing="ij"), -1).reshape(-1, 3)[:n]
    positions = (grid + 0.5 + rng.uniform(-0.2, 0.2, (n, 3))) * spacing
    velocities = rng.normal(0.0, 0.3, (n, 3))
    return positions, velocities


def test_density_and_pressure_operator_match_a_per_particle_loop():
    """rho_i = sum_j m W_ij + sum_b Psi_b W_ib and the pressure sum, loop vs sparse operators.

    Tolerance 1e-10 relative: both sum the same float64 terms in a different order.
    """
    spacing = 0.1
    params = make_params(spacing, neighbour_skin=0.0)
    h, m, rho0 = params.support_radius, params.particle_mass, params.rest_density
    positions, velocities = _cloud(spacing=spacing)
    wall_points, wall_normals = sample_box_walls((-0.05, -0.05, -0.05), (0.6, 0.6, 0.6), spacing)
    boundary = make_boundary(wall_points, wall_normals, h)
    ops = PairOperators(len(positions), *_find_pairs(positions, boundary, params, None), boundary, params)

    k = np.random.default_rng(7).uniform(0.0, 5.0, len(positions))
    for i in range(len(positions)):
        rho = 0.0
        rate = 0.0
        term = np.zeros(3)
        for j in range(len(positions)):
            r = np.linalg.norm(positions[i] - positions[j])
            if r < h:
                rho += m * float(kernel(r, h))
                g = m * kernel_gradient((positions[i] - positions[j])[None], h)[0]
                rate += np.dot(velocities[i] - velocities[j], g)
                term += (k[i] + k[j]) * g
        for b in range(len(wall_points)):
            r = np.linalg.norm(positions[i] - wall_points[b])
            if r < h:
                psi = rho0 * boundary.volumes[b]
                rho += psi * float(kernel(r, h))
                g = psi * kernel_gradient((positions[i] - wall_points[b])[None], h)[0]
                rate += np.dot(velocities[i], g)
                term += k[i] * g
        assert ops.density[i] == pytest.approx(rho, rel=1e-10)
        assert ops.density_rate(velocities)[i] == pytest.approx(rate, rel=1e-9, abs=1e-9)
        np.testing.assert_allclose(ops.pressure_term(k)[i], term, rtol=1e-9, atol=1e-9)


def test_linear_momentum_is_conserved_without_walls_or_gravity():
    """Pairwise antisymmetric pressure and symmetric XSPH conserve total momentum (Monaghan 1992).

    A compressed random blob with random velocities, 20 substeps, no boundary and no
    gravity: total momentum stays at its initial value to round-off (1e-9 of its scale).
    """
    spacing = 0.05
    params = make_params(spacing, gravity=(0.0, 0.0, 0.0), viscosity=0.05, neighbour_skin=0.0)
    positions, velocities = _cloud(n=200, spacing=0.8 * spacing, seed=11)
    kappa = np.zeros(len(positions))
    kappa_v = np.zeros(len(positions))
    start = velocities.sum(axis=0)
    scale = np.abs(velocities).sum()
    for _ in range(20):
        result = dfsph_substep(positions, velocities, kappa, kappa_v, None, params, 0.002)
        positions, velocities, kappa, kappa_v = result.positions, result.velocities, result.kappa, result.kappa_v
    assert np.max(kappa) > 0.0, "the blob starts compressed, so the pressure solve must act"
    np.testing.assert_allclose(velocities.sum(axis=0), start, atol=1e-9 * scale)


def test_substeps_are_deterministic_and_reduce_compression():
    """Same input, same bits; and the constant-density solve removes the predicted compression.

    Tolerance: the solve stops at mean compression <= density_tolerance (SCA 2015 stopping rule).
    """
    spacing = 0.05
    params = make_params(spacing, neighbour_skin=0.0)
    positions, velocities = _cloud(n=150, spacing=0.85 * spacing, seed=5)
    zeros = np.zeros(len(positions))
    first = dfsph_substep(positions, velocities, zeros, zeros, None, params, 0.002)
    second = dfsph_substep(positions, velocities, zeros, zeros, None, params, 0.002)
    for name in ("positions", "velocities", "kappa", "kappa_v", "pressure"):
        assert np.array_equal(getattr(first, name), getattr(second, name)), name
    assert first.density_error <= params.density_tolerance or first.pressure_iterations == params.max_iterations
    assert first.pressure_iterations >= 2
