"""The reference solver against published experiments and hydrostatics (engine/validate.py).

These are the same runs as ``python -m engine validate CASE``, which applies the issue's
full tolerances and exits non-zero when one is missed. The hydrostatic tank meets all of
them; the dam-break RMS target is NOT met yet, and its test says so instead of hiding it:
it guards the level measured on 2026-12-02 against regressions.
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
    the tank. The issue's RMS target over T in [0.4, 3.3] is 0.15; measured 0.30 on
    2026-12-02 (the simulated front runs ahead of the experiment by about 0.29 on
    average: free-slip walls and instant gate removal), so ``validate dam-break`` reports
    a failure. This test guards the measured level (RMS <= 0.35).

    The shape, though, matches: delayed by dT = 0.25 (13.5 ms, about what lifting a gate
    takes; physics-references §6a: "Results at T < 1 depend on how fast the gate is
    removed"), the simulated curve is within RMS 0.034 of the table (2026-12-02). That
    delay is a fitted diagnostic, not the target; guarded here at RMS <= 0.08, dT <= 0.35.
    The lead is not a resolution artefact (2026-12-03, ``engine.validate.dam_break(across=N)``):
    RMS 0.31 at 20 and at 30 particles across a, 0.50 at 40; the front gets faster as the
    resolution grows, toward the inviscid, free-slip, instant-release flow, which outruns the
    experiment. Anchoring T's origin at the first published reading does not help either: the
    instant-release front already passes (0.41, 1.11) within 0.01; it is the early acceleration
    (T 0.41 to 0.84: 0.28 simulated against 0.11 measured) that the gate's opening slows.
    """
    m = dam_break["metrics"]
    assert m["ritter_max_excess"] <= 1e-9
    assert m["outside_walls"] == 0
    assert m["front_rms_error"] <= 0.35
    assert len(m["front_at_table_T"]) == 15
    assert m["diagnostic_rms_at_best_delay"] <= 0.08 and m["diagnostic_best_delay_T"] <= 0.35
