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
    drift = np.zeros(len(positions))
    start = velocities.sum(axis=0)
    scale = np.abs(velocities).sum()
    acted = 0.0
    for _ in range(20):
        result = dfsph_substep(positions, velocities, kappa, drift, None, params, 0.002)
        positions, velocities, kappa, drift = result.positions, result.velocities, result.kappa, result.drift
        acted = max(acted, float(np.max(kappa)))
    assert acted > 0.0, "the blob is compressed and stirred, so the velocity solve must act"
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
    for name in ("positions", "velocities", "kappa", "drift", "pressure"):
        assert np.array_equal(getattr(first, name), getattr(second, name)), name
    assert first.density_error <= params.density_tolerance or first.pressure_iterations == params.max_iterations
    assert first.pressure_iterations >= 2


# --- Further checks: XSPH, DFSPH factor, moving boundary, the Solver protocol. ---------

import dataclasses  # noqa: E402

from engine import sph  # noqa: E402
from engine.errors import SceneError, SolverError  # noqa: E402
from engine.state import state_from_arrays, state_to_arrays  # noqa: E402
from engine.validate import WALL_GAP, BoxWorld, lattice  # noqa: E402


def _cloud_on_moving_floor(seed=0, n=70, spacing=0.02):
    rng = np.random.default_rng(seed)
    positions = rng.uniform(0, 4 * spacing, size=(n, 3))
    velocities = rng.normal(0, 0.3, size=(n, 3))
    floor = lattice((6, 6, 1), spacing, (-spacing, -spacing, -0.5 * spacing))
    normals = np.tile([0.0, 0.0, 1.0], (len(floor), 1))
    boundary = make_boundary(floor, normals, 2 * spacing, velocities=rng.normal(0, 0.2, floor.shape))
    return positions, velocities, boundary, make_params(spacing)


def _operators(positions, boundary, params):
    return PairOperators(len(positions), *_find_pairs(positions, boundary, params, None), boundary, params)


def test_density_rate_uses_boundary_velocity():
    """D rho/Dt includes sum_b Psi_b (v_i - v_b).grad W_ib (Akinci 2012 [M]): moving colliders
    push fluid. Loop oracle with random boundary velocities, 1e-12 of the largest entry."""
    x, v, boundary, params = _cloud_on_moving_floor()
    ops = _operators(x, boundary, params)
    h, rho0, m = params.support_radius, params.rest_density, params.particle_mass
    expected = np.zeros(len(x))
    for i in range(len(x)):
        for j in range(len(x)):
            r = np.linalg.norm(x[i] - x[j])
            if i != j and r < h:
                expected[i] += m * (v[i] - v[j]) @ kernel_gradient((x[i] - x[j])[None], h)[0]
        for b in range(boundary.count):
            d = x[i] - boundary.positions[b]
            if np.linalg.norm(d) < h:
                g = rho0 * boundary.volumes[b] * kernel_gradient(d[None], h)[0]
                expected[i] += (v[i] - boundary.velocities[b]) @ g
    assert np.abs(ops.density_rate(v) - expected).max() <= 1e-12 * np.abs(expected).max()


def test_xsph_matches_per_particle_loop():
    """XSPH v_i + eps sum_j m / ((rho_i + rho_j)/2) (v_j - v_i) W_ij (Monaghan 1989, J. Comput.
    Phys. 82:1-15 [R citation; form M]), plus eps sum_b (Psi_b / rho_i)(v_b - v_i) W_ib toward the
    (moving) boundary particles, all from the same input velocities; loop oracle, 1e-12 of the
    velocity scale."""
    x, v, boundary, params = _cloud_on_moving_floor(seed=1)
    ops = _operators(x, boundary, params)
    rho, eps, m, h = ops.density, 0.05, params.particle_mass, params.support_radius
    expected = v.copy()
    for i in range(len(x)):
        for j in range(len(x)):
            r = np.linalg.norm(x[i] - x[j])
            if i != j and r < h:
                expected[i] += eps * m / (0.5 * (rho[i] + rho[j])) * (v[j] - v[i]) * kernel(r, h)
        for b in range(len(boundary.positions)):
            r = np.linalg.norm(x[i] - boundary.positions[b])
            if r < h:
                psi = params.rest_density * boundary.volumes[b]
                expected[i] += eps * psi / rho[i] * (boundary.velocities[b] - v[i]) * kernel(r, h)
    assert np.any(boundary.velocities), "the floor must move for the wall term to be tested"
    np.testing.assert_allclose(ops.xsph(v, eps, m), expected, rtol=0, atol=1e-12 * np.abs(v).max())


def test_dfsph_factor_matches_definition():
    """alpha_i = rho_i / (|sum_j m grad W_ij + sum_b Psi_b grad W_ib|^2 + sum_j |m grad W_ij|^2)
    (Bender & Koschier 2015 [M]); 1e-12 relative."""
    x, _, boundary, params = _cloud_on_moving_floor(seed=2)
    ops = _operators(x, boundary, params)
    m, h = params.particle_mass, params.support_radius
    for i in range(0, len(x), 7):
        d = x[i] - x
        r = np.linalg.norm(d, axis=1)
        g = m * kernel_gradient(d[(r > 0) & (r < h)], h)
        db = x[i] - boundary.positions
        near = np.linalg.norm(db, axis=1) < h
        gb = (params.rest_density * boundary.volumes[near])[:, None] * kernel_gradient(db[near], h)
        total = g.sum(0) + gb.sum(0)
        assert ops.alpha[i] == pytest.approx(ops.density[i] / (total @ total + (g * g).sum()), rel=1e-12)


def _small_tank(columns=5, layers=8, spacing=0.02):
    gap = WALL_GAP * spacing
    positions = lattice((columns, columns, layers), spacing, (gap, gap, gap))
    width = 2 * gap + (columns - 1) * spacing
    faces = {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    points, normals = sample_box_walls((0, 0, 0), (width, width, gap + (layers + 4) * spacing), spacing, faces)
    boundary = make_boundary(points, normals, 2 * spacing)
    velocities = np.random.default_rng(7).normal(0, 0.05, positions.shape)
    return BoxWorld(positions, velocities, boundary, spacing)


def test_wall_gap_gives_rest_density():
    """A lattice WALL_GAP = 1.1 spacings from a one-layer Akinci wall has rho within 1 % of rho0
    in its first layer (the boundary volumes V_b = 1/sum W stand in for the missing fluid;
    Akinci et al. 2012 [M]). 1 %: the start should not need a pressure kick."""
    world = _small_tank()
    params = sph.params_from_world(world)
    x = world.initial_state().positions
    rho = sph.sph_density(x, world.boundary_at(0.0), params)
    first = x[:, 2] < 1.5 * params.particle_spacing
    middle = np.all(np.abs(x[:, :2] - x[:, :2].mean(0)) < 0.5 * params.particle_spacing, axis=1)
    assert np.abs(rho[first & middle] / params.rest_density - 1).max() < 0.01


def test_advance_lands_on_end_time_and_repeats_bit_for_bit():
    """Substeps land exactly on t_end; two runs give identical arrays (fixed summation order)."""
    world = _small_tank()
    runs = []
    for _ in range(2):
        solver = sph.SphSolver()
        state, stats = solver.advance(solver.start(world), world, 0.01)
        assert state.time == 0.01 and stats.substeps >= 3
        state, _ = solver.advance(state, world, 1 / 48)
        assert state.time == 1 / 48
        runs.append(state)
    np.testing.assert_array_equal(runs[0].positions, runs[1].positions)
    for name in (sph.KAPPA, sph.DRIFT, sph.PRESSURE):
        np.testing.assert_array_equal(runs[0].particle_arrays[name], runs[1].particle_arrays[name])


def test_resume_from_checkpoint_is_bit_identical(tmp_path):
    """Saving the State at a frame (npz, no pickle) and resuming with a fresh solver gives the
    same bits as an uninterrupted run: the warm-start kappa lives in the State."""
    world = _small_tank()
    solver = sph.SphSolver()
    straight, _ = solver.advance(solver.start(world), world, 0.02)
    straight, _ = solver.advance(straight, world, 0.04)
    first = sph.SphSolver()
    half, _ = first.advance(first.start(world), world, 0.02)
    path = tmp_path / "checkpoint.npz"
    np.savez(path, **state_to_arrays(half))
    with np.load(path, allow_pickle=False) as data:
        loaded = state_from_arrays(data)
    resumed, _ = sph.SphSolver().advance(loaded, world, 0.04)
    np.testing.assert_array_equal(resumed.positions, straight.positions)
    np.testing.assert_array_equal(resumed.velocities, straight.velocities)
    np.testing.assert_array_equal(resumed.particle_arrays[sph.KAPPA], straight.particle_arrays[sph.KAPPA])


def test_frame_attributes_shapes_and_values():
    world = _small_tank()
    solver = sph.SphSolver()
    state, _ = solver.advance(solver.start(world), world, 0.02)
    attributes = solver.frame_attributes(state, world)
    assert attributes["density"].shape == (state.count,) and attributes["pressure"].shape == (state.count,)
    assert np.all(attributes["pressure"] >= 0) and attributes["pressure"].max() > 0
    assert 900 < np.median(attributes["density"]) < 1100


def test_non_finite_velocity_raises_solver_error():
    world = _small_tank()
    solver = sph.SphSolver()
    state = solver.start(world)
    velocities = state.velocities.copy()
    velocities[3] = np.nan
    with pytest.raises(SolverError, match=r"particle id 3 has a non-finite"):
        solver.advance(dataclasses.replace(state, velocities=velocities), world, 0.01)


def test_runaway_velocity_raises_solver_error():
    world = _small_tank()
    solver = sph.SphSolver()
    state = solver.start(world)
    velocities = state.velocities.copy()
    velocities[5] = [2000.0, 0, 0]
    with pytest.raises(SolverError, match=r"particle id 5 moves at 2000 m/s.*runaway velocity"):
        solver.advance(dataclasses.replace(state, velocities=velocities), world, 0.01)


def test_backwards_advance_is_refused():
    world = _small_tank()
    solver = sph.SphSolver()
    state = dataclasses.replace(solver.start(world), time=0.5)
    with pytest.raises(SolverError, match="back in time"):
        solver.advance(state, world, 0.25)


@pytest.mark.parametrize("kwargs, message", [
    ({"particle_spacing": 0.0}, r"particle_spacing: must be a finite number > 0"),
    ({"viscosity": 2.0}, r"fluid.viscosity: XSPH coefficient must lie in \[0, 1\]"),
    ({"cfl_factor": 3.0}, r"solver.cfl_factor: must be <= 1"),
    ({"min_time_step": 0.1, "max_time_step": 0.01}, r"solver.min_time_step .* exceeds"),
    ({"max_iterations": 1}, r"solver.max_iterations: must be an integer >= 2"),
])
def test_bad_parameters_raise_scene_error(kwargs, message):
    arguments = {"particle_spacing": 0.02, **kwargs}
    with pytest.raises(SceneError, match=message):
        make_params(arguments.pop("particle_spacing"), **arguments)


def test_substep_length_never_leaves_a_sliver():
    assert sph.substep_length(0.004, 0.003) == 0.003
    assert sph.substep_length(0.004, 0.006) == 0.003
    assert sph.substep_length(0.004, 0.02) == 0.004


@pytest.mark.parametrize("speed", [2.0, 8.0, 25.0])
def test_droplet_hitting_a_wall_never_comes_back_faster(speed):
    """A lone particle thrown at a one-layer wall, no gravity: the wall may only take kinetic
    energy away (a kinematic wall does no work on the fluid; energy conservation, any
    mechanics textbook). A training shot once flung such a particle back at 85 m/s when a
    short impact substep's pressure warm-started a long one (engine.sph.warm_start_kappa)."""
    spacing = 0.025
    faces = {name: "wall" for name in ("x_min", "x_max", "y_min", "y_max", "z_min", "z_max")}
    wall_points, wall_normals = sample_box_walls((0.0, 0.0, 0.0), (0.5, 0.5, 0.5), spacing, faces)
    boundary = make_boundary(wall_points, wall_normals, 2.0 * spacing)
    start = np.array([[0.25, 0.1, 0.25]])
    world = BoxWorld(start, np.array([[0.0, -speed, 0.0]]), boundary, spacing, gravity=(0.0, 0.0, 0.0))
    solver = sph.SphSolver()
    state = solver.start(world)
    fastest = 0.0
    t = 0.0
    while t < 0.06:
        t += 0.002
        state, _ = solver.advance(state, world, t)
        fastest = max(fastest, float(np.linalg.norm(state.velocities[0])))
    assert fastest <= speed * (1.0 + 1e-9)
    assert state.positions[0, 1] > 0.0, "the droplet must stay inside the wall"


def test_threaded_products_give_the_same_bits_as_serial(monkeypatch):
    """The sparse products run on a thread pool (SOLVER_THREADS); each product is whole in one
    thread and summed in a fixed order, so a run is bit-identical to the serial one (oracle:
    the same run with one thread)."""
    world = _small_tank(columns=14, layers=14)
    runs = []
    for threads in (1, 2):
        monkeypatch.setattr(sph, "SOLVER_THREADS", threads)
        solver = sph.SphSolver()
        state, _ = solver.advance(solver.start(world), world, 0.02)
        runs.append(state)
    assert runs[0].count > 2000
    np.testing.assert_array_equal(runs[0].positions, runs[1].positions)
    np.testing.assert_array_equal(runs[0].particle_arrays[sph.KAPPA], runs[1].particle_arrays[sph.KAPPA])


def test_reported_compression_matches_a_fresh_evaluation_of_the_predicted_density(monkeypatch):
    """The mean compression a substep reports (the drift solve's stopping criterion) must be that
    of the positions it returns: recomputing rho*_i = rho_i + dt (D rho / Dt)_i(u) with the
    effective velocity u = (x(t + dt) - x(t)) / dt (velocity plus drift shift; Bender & Koschier
    2015 [M] for the predicted density, the rate operator itself checked against a loop above)
    gives the same value, with a moving floor (boundary velocity term). 1e-6 relative: round-off."""
    x, v, boundary, params = _cloud_on_moving_floor(seed=4, n=90)
    x = 0.9 * x  # squeeze the cloud so the solves have compression to remove
    monkeypatch.setattr(sph, "DRIFT_SHIFT_CAP", np.inf)  # the report is the solve's, before the cap
    dt = 0.002
    zeros = np.zeros(len(x))
    result = dfsph_substep(x, v, zeros, zeros, boundary, params, dt)
    ops = _operators(x, boundary, params)
    predicted = ops.density + dt * ops.density_rate((result.positions - x) / dt)
    compression = np.maximum(predicted - params.rest_density, 0.0) / params.rest_density
    assert result.pressure_iterations >= 2 and np.max(result.drift) > 0.0
    assert float(np.mean(compression)) == pytest.approx(result.density_error, rel=1e-6, abs=1e-12)
    assert result.density_error <= params.density_tolerance
