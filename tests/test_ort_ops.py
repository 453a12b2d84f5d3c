"""The onnxruntime Jacobi iteration (engine/ort_ops.py) against the float64 scipy solve.

The equations are those of Bender & Koschier 2015, "Divergence-Free Smoothed Particle
Hydrodynamics", SCA (Jacobi iteration with the DFSPH factor; formulas from memory, [M]
in physics-references.md §2), as ``engine.sph._jacobi_solve`` implements them; the
oracle for the neighbour tables is a brute-force distance check. Correctness only: the
speed comparison lives in bench/bench_ort_jacobi.py.

Tolerance: the onnxruntime path accumulates the velocity and kappa *corrections* in
float32 (unit roundoff 6e-8) over at most 40 iterations of sums of about 30 terms; the
float64 starting values are added on the host. 1e-5 of the largest correction leaves
a margin of 30x over the 3e-7 measured on this block (2026-12-04) and is still 1000x
below the solver's density tolerance of 5e-4.
"""

import sys

import numpy as np
import pytest

from engine.boundary import empty_boundary
from engine.errors import SolverError
from engine.ort_ops import JacobiTables, OrtJacobi, build_model
from engine.sph import (DRIFT, DRIFT_WARM_START, KAPPA, WARM_START_FACTOR, PairOperators, SphSolver,
                        _find_pairs, _jacobi_solve, make_params)

pytest.importorskip("onnx", reason="building the graph needs onnx, a development dependency (requirements-train.txt)")
from bench.bench_reference import block_world  # noqa: E402

RELATIVE = 1e-5


@pytest.fixture(scope="module")
def substep():
    """A settling 12 x 12 x 12 block of water in a walled box (bench/bench_reference.py), after
    three substeps, at the point of a substep where the velocity solve starts."""
    world = block_world(1728)
    solver = SphSolver()
    state = solver.start(world)
    dt = world.solver_settings.max_time_step
    for step in range(1, 4):
        state, _ = solver.advance(state, world, step * dt)
    params = solver._params
    boundary = world.boundary_at(state.time)
    ops = PairOperators(state.count, *_find_pairs(state.positions, boundary, params, None), boundary, params)
    velocities = ops.xsph(state.velocities, params.viscosity, params.particle_mass) + dt * np.asarray(params.gravity)
    return dict(ops=ops, tables=JacobiTables.from_operators(ops), velocities=velocities, dt=dt, params=params,
                positions=state.positions, kappa=WARM_START_FACTOR * state.particle_arrays[KAPPA],
                drift=DRIFT_WARM_START * state.particle_arrays[DRIFT])


@pytest.fixture(scope="module")
def runner():
    return OrtJacobi(iterations_per_call=8)


def _assert_same_solve(reference, candidate, start_velocities, start_kappa):
    velocities, kappa, iterations, error, worst, converged = reference
    assert candidate[2] == iterations
    assert candidate[5] == converged
    scale_v = np.max(np.abs(velocities - start_velocities))
    scale_k = np.max(np.abs(kappa - start_kappa))
    assert scale_v > 0 and scale_k > 0, "the solve changed nothing; the comparison would be empty"
    np.testing.assert_allclose(candidate[0], velocities, rtol=0, atol=RELATIVE * scale_v)
    np.testing.assert_allclose(candidate[1], kappa, rtol=0, atol=RELATIVE * scale_k)
    assert candidate[3] == pytest.approx(error, rel=RELATIVE)
    assert candidate[4] == pytest.approx(worst, rel=RELATIVE)


def test_tables_hold_both_directions_of_every_pair_within_the_support(substep):
    """Row i of the padded table lists exactly the fluid particles j != i with |x_i - x_j| < H
    (brute force over all pairs), and G_ji = -G_ij (grad W is antisymmetric)."""
    tables, positions = substep["tables"], substep["positions"]
    h = substep["params"].support_radius
    distance = np.linalg.norm(positions[:, None, :] - positions[None, :, :], axis=2)
    inside = (distance < h) & ~np.eye(len(positions), dtype=bool)
    gradients = np.moveaxis(tables.gradients, 0, 2)  # (N, K, 3)
    real = np.any(gradients != 0.0, axis=2)
    for row in range(len(positions)):
        np.testing.assert_array_equal(np.sort(tables.neighbours[row][real[row]]), np.flatnonzero(inside[row]))
    assert np.all(tables.neighbours[~real] == np.nonzero(~real)[0])  # empty slots point at the row itself
    rows = np.repeat(np.arange(len(positions)), tables.width)[real.ravel()]
    columns = tables.neighbours[real]
    forward = {(a, b): g for a, b, g in zip(rows, columns, gradients[real])}
    for (a, b), g in list(forward.items())[:2000]:
        np.testing.assert_array_equal(forward[(b, a)], -g)


def test_velocity_solve_matches_scipy_with_its_stopping_rule(substep, runner):
    """The velocity solve (floor max(rho, rho0), warm start, tolerance 5e-4, at least 2
    iterations): same iteration count, velocities and kappa within float32 precision."""
    ops, dt, params = substep["ops"], substep["dt"], substep["params"]
    floor = np.maximum(ops.density, params.rest_density)
    arguments = (substep["velocities"], substep["kappa"], floor, dt, params.density_tolerance, 2,
                 params.max_iterations)
    reference = _jacobi_solve(ops, *arguments)
    assert reference[2] > runner.iterations_per_call, "the solve must span more than one call"
    _assert_same_solve(reference, runner.solve(ops, substep["tables"], *arguments), substep["velocities"],
                       substep["kappa"])


def test_drift_solve_matches_scipy_for_a_fixed_iteration_count(substep, runner):
    """The drift solve (floor rho0) run for exactly 20 iterations (tolerance 0): the in-graph
    stop at max_iterations falls inside a call (20 = 2 x 8 + 4)."""
    ops, dt, params = substep["ops"], substep["dt"], substep["params"]
    velocities, _, _, _, _, _ = _jacobi_solve(ops, substep["velocities"], substep["kappa"],
                                              np.maximum(ops.density, params.rest_density), dt,
                                              params.density_tolerance, 2, params.max_iterations)
    arguments = (velocities, substep["drift"], params.rest_density, dt, 0.0, 1, 20)
    reference = _jacobi_solve(ops, *arguments)
    assert reference[2] == 20
    _assert_same_solve(reference, runner.solve(ops, substep["tables"], *arguments), velocities, substep["drift"])


def test_particles_without_neighbours_get_no_correction(runner):
    """Two particles farther apart than H: no pairs, a one-slot table, and a solve that
    changes nothing (alone, each particle is below rest density, so nothing is compressed)."""
    params = make_params(0.1, neighbour_skin=0.0)
    positions = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]])
    velocities = np.array([[0.0, 0.0, -1.0], [0.5, 0.0, 0.0]])
    boundary = empty_boundary()
    ops = PairOperators(2, *_find_pairs(positions, boundary, params, None), boundary, params)
    tables = JacobiTables.from_operators(ops)
    assert tables.width == 1
    arguments = (velocities, np.zeros(2), np.maximum(ops.density, params.rest_density), 0.004, 5e-4, 2, 10)
    reference = _jacobi_solve(ops, *arguments)
    candidate = runner.solve(ops, tables, *arguments)
    np.testing.assert_array_equal(candidate[0], reference[0])
    np.testing.assert_array_equal(candidate[1], reference[1])
    assert candidate[2] == reference[2] == 2


def test_build_model_rejects_a_call_without_iterations():
    with pytest.raises(SolverError, match="iterations must be >= 1, got 0"):
        build_model(0)


def test_build_model_without_the_onnx_package_names_the_fix(monkeypatch):
    """onnx is a development dependency; without it the error says how to install it."""
    for name in ("onnx", "onnx.checker", "onnx.numpy_helper"):
        monkeypatch.setitem(sys.modules, name, None)
    with pytest.raises(SolverError, match="needs the onnx package.*pip install -r requirements-train.txt"):
        build_model(8)
