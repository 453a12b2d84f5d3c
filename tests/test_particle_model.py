"""The particle model's derived quantities (engine.particle_model) and their users.

Sources: the CFL condition of the reference solver, dt = cfl_factor * d / max|v| (Bender &
Koschier 2015, "Divergence-Free Smoothed Particle Hydrodynamics", SCA, section on the time
step; formula from memory), with the step capped at max_time_step (the scene format's rule,
DEVELOPERS.md); m = rho0 d^3 and H = 2 d (common practice for a cubic lattice and the cubic
spline with support 2h, Monaghan 1992, "Smoothed Particle Hydrodynamics", ARA&A 30:543).
"""

import numpy as np
import pytest

from engine import sph
from engine.learned.viscosity import reference_substeps
from engine.particle_model import cfl_speed_limit, cfl_step, particle_mass, support_radius


def test_derived_quantities_by_hand():
    assert support_radius(0.025) == 0.05
    assert particle_mass(1000.0, 0.02) == pytest.approx(0.008, rel=1e-12)
    assert cfl_step(2.0, 0.02, 0.4, 0.01) == pytest.approx(0.004, rel=1e-12)  # 0.4 * 0.02 / 2
    assert cfl_step(0.5, 0.02, 0.4, 0.004) == 0.004  # 0.016 s, capped
    assert cfl_step(0.0, 0.02, 0.4, 0.004) == 0.004  # nothing moves
    assert cfl_speed_limit(0.02, 0.4, 1e-5) == pytest.approx(800.0, rel=1e-12)


def test_the_solvers_take_the_one_time_step_rule():
    """The reference step and the learned preview's count of reference substeps follow cfl_step,
    with the fastest particle found by a brute-force loop."""
    rng = np.random.default_rng(3)
    params = sph.make_params(0.02)
    for scale in (0.0, 0.3, 3.0, 30.0):
        velocities = rng.normal(0.0, scale, (50, 3))
        fastest = max(float(np.sqrt(v @ v)) for v in velocities)
        expected = cfl_step(fastest, 0.02, params.cfl_factor, params.max_time_step)
        assert sph.cfl_time_step(velocities, params)[0] == expected
        step = 0.02
        assert reference_substeps(velocities, step, 0.02, params.cfl_factor, params.max_time_step) == max(
            1, int(np.ceil(step / expected - 1e-9)))
