"""The reference solver against published experiments and hydrostatics (engine/validate.py).

These are the same runs as ``python -m engine validate CASE``, which applies the issue's
full tolerances and exits non-zero when one is missed. Since 2026-12-04 (drift solve, no-slip
walls) every case meets them.
"""

import pytest

from engine.validate import run_case

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def hydrostatic():
    return run_case("hydrostatic")


@pytest.fixture(scope="module")
def dam_break():
    return run_case("dam-break")


@pytest.fixture(scope="module")
def sloshing():
    return run_case("sloshing")


@pytest.fixture(scope="module")
def impact():
    return run_case("impact")


def test_hydrostatic_tank_density_and_walls(hydrostatic):
    """Settled column, depth 24 spacings: density and wall containment.

    Targets (physics-references.md §6c, recommendation): mean |rho - rho0| / rho0 <= 0.1 %,
    max < 1 %; incompressible graphics solvers reach 0.01-0.1 % (Bender & Koschier 2015,
    SCA, [R for 0.01 %]). No particle may cross a wall plane.
    """
    m = hydrostatic["metrics"]
    assert m["mean_density_error"] <= 0.001
    assert m["max_density_error"] < 0.01
    assert m["outside_walls"] == 0
    assert m["max_speed_ratio"] < 0.1, "the column must be near rest when measured"


def test_hydrostatic_volume_drift(hydrostatic):
    """Volume drift < 0.1 % once settled (physics-references.md §6c, recommendation):
    the SPH volume sum m / rho_i at the end against half-way through the run. Measured
    0.026 % on 2026-12-02. The change from the initial cubic lattice (-0.73 %, the lattice
    rearranging as it settles) is reported as volume_change_from_lattice, not tested."""
    assert hydrostatic["metrics"]["volume_drift"] < 0.001


def test_hydrostatic_pressure_slope(hydrostatic):
    """Fitted -dp/dz against rho0 |g| (p = rho0 g d, textbook hydrostatics).

    Target within 2 % below the top H (physics-references.md §6c, recommendation); the fit
    also leaves out the bottom H, where the one-layer wall truncates the kernel. Measured
    1.007 on 2026-12-03 (0.7 % high; an earlier solver version gave 0.989); the run is deterministic.
    """
    ratio = hydrostatic["metrics"]["slope_ratio"]
    assert 0.98 <= ratio <= 1.02


def test_dam_break_front_against_martin_and_moyce(dam_break):
    """Surge front Z = x/a against T = n t sqrt(g/a), n^2 = 2 (Martin & Moyce 1952, "An
    Experimental Study of the Collapse of Liquid Columns on a Rigid Horizontal Plane",
    Phil. Trans. R. Soc. A 244:312-324; table via a secondary transcription [S]).

    Ritter's shallow-water bound Z <= 1 + 2T (Ritter 1892, [M]; modern treatment
    Castro-Orgaz & Chanson 2017 [R]) must hold at every sample, and no particle may leave
    the tank. RMS over T in [0.4, 3.3], raw, no fitted shift: target 0.15 (physics-references
    §6a, recommendation). Measured 2026-12-04: 0.102-0.107 at 20 particles across a, 0.119 at 30.
    Before the drift solve and no-slip walls the front led the data by 0.31 (0.50 at 40
    across): the density error was corrected through velocities and the liquid gained energy.
    Caveat: the case is a slab a few particles thick between two side walls, so the no-slip
    walls brake more of it than in the wide tank of the experiment.
    """
    m = dam_break["metrics"]
    assert m["ritter_max_excess"] <= 1e-9
    assert m["outside_walls"] == 0
    assert m["front_rms_error"] <= 0.15
    assert len(m["front_at_table_T"]) == 15


def test_dam_break_residual_height_against_martin_and_moyce(dam_break):
    """Residual column height at the back wall, eta = y / (n^2 a), against tau = t sqrt(g/a) (no
    factor n): the second data set of Martin & Moyce 1952 (same paper as above; secondary
    transcription [S] of their table, physics-references section 6a). The run reaches tau = 2.44,
    so the 11 table points up to tau = 2.45 are compared. RMS tolerance 0.05 in eta (our choice:
    about one spacing of the 40-spacing column). Measured 2026-12-04: 0.032, the column a little
    higher than the data late on (0.449 against 0.39 at tau = 2.45)."""
    m = dam_break["metrics"]
    assert len(m["height_at_table_tau"]) == 11
    assert m["height_rms_error"] <= 0.05
    heights = list(m["height_at_table_tau"].values())
    assert all(a > b for a, b in zip(heights, heights[1:]))  # the column only falls


def test_first_sloshing_mode_period(sloshing):
    """First-mode period of a rectangular tank against linear theory, omega^2 = g k tanh(k h),
    k = pi / L (Airy theory; Lamb 1932, "Hydrodynamics", ch. IX [from memory]; Ibrahim 2005,
    "Liquid Sloshing Dynamics", ch. 1 [from memory]); L = 0.4 m, h = 0.2 m, amplitude 5 % of h.
    Target 3 % (the issue's). Measured 2026-12-04: 0.4-0.6 % (2.2 % with frictionless walls)."""
    m = sloshing["metrics"]
    assert m["period_error"] <= 0.03
    assert m["centre_amplitude_m"] > 0.001, "the mode must have been excited"


def test_ball_striking_a_wall_spreads_as_impact_theory_says(impact):
    """A ball of water (R = 14 spacings, 2 m/s, no gravity) striking a rigid wall: the wetted radius
    follows Wagner's r = sqrt(3 R V t) for a sphere on a plane (Wagner 1932; Riboux & Gordillo 2014,
    "Experiments of drops impacting a smooth solid surface: a model of the critical impact speed for drop
    splashing", Phys. Rev. Lett. 113; Philippi, Lagree & Antkowiak 2016, "Drop impact on a solid surface:
    short-time self-similarity", J. Fluid Mech. 795; all from memory), within 0.9-1.2 of its constant
    (our tolerance; the geometric intersection of sphere and plane, with no impact pressure, is 0.82),
    while the kinetic energy never rises (static wall, no gravity). Measured 2026-12-04: 1.075, energy
    at most 0.997 of the start. The same run shows that the impact alone throws 4.3 % of the ball faster
    than sqrt(1.5) V, the particles the splash suite's over-energy measure counts."""
    m = impact["metrics"]
    assert 0.9 <= m["wetted_constant_over_wagner"] <= 1.2
    assert m["kinetic_energy_ratio_max"] <= 1.005
    radii = m["wetted_radius_over_r"]
    assert all(b >= a - 1e-9 for a, b in zip(radii, radii[1:])), "the wetted patch only grows"
