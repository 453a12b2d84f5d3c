"""Validation cases for the reference solver: hydrostatic tank, dam break, sloshing and a ball striking a wall.

Each case builds its fluid lattice and box walls directly as arrays (no scene
file) and runs them through ``SphSolver.advance``, the same code a bake uses,
with a minimal world (``BoxWorld``). ``run_case(name)`` returns a plain dict:
``case``, ``passed``, ``metrics``, ``tolerances``, ``source`` (and ``notes``).
The command line (``python -m engine validate CASE [--json]``) prints it.

Wall placement: box-wall samples (engine.boundary.sample_box_walls) sit on the
wall planes, and the first fluid layer sits ``WALL_GAP`` = 1.1 spacings from
them. At that gap a lattice next to a one-layer Akinci wall has rho = rho0
(checked in tests/test_sph.py); at 1.0 spacing the first layer starts 6 %
compressed.
"""

import dataclasses
import math
import time

import numpy as np

from .boundary import BoundaryParticles, make_boundary, sample_box_walls
from .errors import SplashdraftError
from .particle_model import particle_mass, support_radius
from .scene import DEFAULT_GRAVITY, Fluid, SolverSettings
from .solvers import make_solver
from .sph import params_from_world, sph_density
from .state import State

#: Distance, in particle spacings, from a wall-sample plane to the first fluid layer.
WALL_GAP = 1.1

CASES = ("hydrostatic", "dam-break", "sloshing", "impact")


class BoxWorld:
    """A world for a fixed box: what a solver reads from ``engine.world.World`` (``SolverWorld``), no scene.

    No emitters; ``enforce_bounds`` changes nothing, so a particle that leaves
    the box is counted by the case instead of being put back.

    Args:
        positions, velocities: (N, 3) float64 m and m/s at t = 0.
        boundary: the box walls' ``engine.boundary.BoundaryParticles``.
        particle_spacing: d in metres; H and m follow from it (``engine.particle_model``).
        rest_density: rho0 in kg/m^3. viscosity: XSPH coefficient. gravity: (3,) m/s^2.
        solver_settings: ``engine.scene.SolverSettings`` (default: the scene format's defaults).
    """

    def __init__(self, positions, velocities, boundary, particle_spacing, *, rest_density=Fluid.rest_density,
                 viscosity=Fluid.viscosity, gravity=DEFAULT_GRAVITY, solver_settings=SolverSettings()):
        self.particle_spacing = float(particle_spacing)
        self.support_radius = support_radius(self.particle_spacing)
        self.particle_mass = particle_mass(rest_density, self.particle_spacing)
        self.rest_density = float(rest_density)
        self.viscosity = float(viscosity)
        self.gravity = np.asarray(gravity, np.float64)
        self.solver_settings = solver_settings
        self._positions = np.asarray(positions, np.float64)
        self._velocities = np.asarray(velocities, np.float64)
        self._boundary = boundary

    def initial_state(self) -> State:
        n = len(self._positions)
        return State(time=0.0, positions=self._positions.copy(), velocities=self._velocities.copy(),
                     ids=np.arange(n, dtype=np.int64), next_id=n)

    def emit(self, state, t0, t1) -> State:
        return state

    def boundary_at(self, t) -> BoundaryParticles:
        return self._boundary

    def enforce_bounds(self, state, previous=None) -> State:
        return state


def lattice(counts, spacing, origin) -> np.ndarray:
    """(prod(counts), 3) cubic lattice points origin + spacing * (i, j, k), ordered x-major."""
    axes = [np.arange(c) for c in counts]
    idx = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    return np.asarray(origin, np.float64) + spacing * idx


def _progress_start(progress, chunks, particles):
    if progress is not None and hasattr(progress, "start"):
        progress.start(frames=(1, chunks), solver="sph", particles=particles)


def _progress_frame(progress, done, chunks, particles, substeps, seconds, started):
    if progress is not None and hasattr(progress, "frame"):
        eta = (time.monotonic() - started) / done * (chunks - done)
        progress.frame(frame=done, done=done, total=chunks, particles=particles, substeps=substeps,
                       seconds=seconds, eta=eta)


def hydrostatic(progress=None, columns=12, layers=24, spacing=0.02, settle_time=1.5, average_time=0.2,
                density_tolerance=0.0005) -> dict:
    """Hydrostatic tank: a column at rest, its pressure against p = rho0 g d.

    Set-up: ``columns`` x ``columns`` x ``layers`` lattice (default 12 x 12 x 24,
    depth 24 spacings) in a box with walls on five faces and an open top, released
    from rest with zero pressure, run for ``settle_time`` s; pressure and density
    are averaged per particle over every substep of the last ``average_time`` s.
    XSPH 0.05 (upper end of the usual range) to damp the release sloshing; the
    static state does not depend on it.

    Metrics (recommendation in physics-references section 6c; p = rho0 g d is
    textbook hydrostatics):
        slope_ratio: fitted -dp/dz / (rho0 |g|), interior particles (at least H from
            the side walls), excluding the top H (kernel truncated at the free
            surface) and the bottom H (kernel truncated at the one-layer wall);
        slope_ratio_top_only: the same fit excluding only the top H (reported);
        mean/max_density_error: |rho - rho0| / rho0 below the top H (bulk);
        max_compression: max (rho - rho0) / rho0 over all particles;
        outside_walls: particles beyond a wall plane;
        volume_drift: relative change of the SPH volume sum_i m / rho_i over the
            second half of the run, once the column has settled (frame-end densities
            at t = settle_time / 2 and at the end);
        volume_change_from_lattice: the same from the initial lattice to the end
            (reported: it includes the rearrangement of the cubic lattice, which is
            not an equilibrium of the discrete equations, as the column settles);
        column_height_change: relative change of the mean z of the top layer's
            worth of particles (reported; it also moves when particles settle
            closer to the side walls);
        max_speed_ratio: max |v| / sqrt(g * depth) at the end (is it at rest?).
    """
    started = time.monotonic()
    world, upper = _hydrostatic_tank(columns, layers, spacing, density_tolerance)
    solver = make_solver("sph")
    state = solver.start(world)
    top_count = columns * columns
    height0 = _top_height(state.positions, top_count)
    volume0 = float(np.sum(world.particle_mass / sph_density(state.positions, world.boundary_at(0.0),
                                                             params_from_world(world))))
    settled = _settle_and_average(solver, world, state, settle_time, average_time, progress, started)
    metrics = _hydrostatic_metrics(world, settled, upper, layers, top_count, height0, volume0, started)
    tolerances = {
        "slope_ratio": [0.98, 1.02],
        "mean_density_error": 0.001,
        "max_density_error": 0.01,
        "outside_walls": 0,
        "volume_drift": 0.001,
    }
    passed = (tolerances["slope_ratio"][0] <= metrics["slope_ratio"] <= tolerances["slope_ratio"][1]
              and metrics["mean_density_error"] <= tolerances["mean_density_error"]
              and metrics["max_density_error"] < tolerances["max_density_error"]
              and metrics["outside_walls"] == 0
              and metrics["volume_drift"] < tolerances["volume_drift"])
    return {
        "case": "hydrostatic",
        "passed": bool(passed),
        "metrics": metrics,
        "tolerances": tolerances,
        "source": ("p = rho0 g d (hydrostatics); tolerances: Splashdraft physics-references section 6c "
                   "(recommendation); 0.01-0.1 % average density error as in Bender & Koschier 2015 (SCA) "
                   "and Ihmsen et al. 2014 (IEEE TVCG)"),
        "notes": ("slope fitted on interior particles excluding the top H and the bottom H (kernel truncated "
                  "at the free surface and at the one-layer wall); slope_ratio_top_only excludes only the top H. "
                  "Pressure and density averaged over the last "
                  f"{average_time:g} s."),
    }


def _hydrostatic_tank(columns, layers, spacing, density_tolerance) -> tuple:
    """(BoxWorld, upper corner): the lattice column at rest in a five-walled, open-topped box."""
    gap = WALL_GAP * spacing
    positions = lattice((columns, columns, layers), spacing, (gap, gap, gap))
    width = 2.0 * gap + (columns - 1) * spacing
    upper = (width, width, gap + (layers + 8) * spacing)
    faces = {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    wall_points, wall_normals = sample_box_walls((0.0, 0.0, 0.0), upper, spacing, faces)
    boundary = make_boundary(wall_points, wall_normals, support_radius(spacing))
    world = BoxWorld(positions, np.zeros_like(positions), boundary, spacing, viscosity=0.05,
                     solver_settings=SolverSettings(max_time_step=0.002, density_tolerance=density_tolerance))
    return world, upper


def _top_height(points, top_count) -> float:
    """Mean z of the ``top_count`` highest particles (one layer's worth)."""
    return float(np.mean(np.sort(points[:, 2])[-top_count:]))


@dataclasses.dataclass(frozen=True)
class _Settled:
    """The hydrostatic column at the end of its run, with its per-particle averages over the last substeps."""

    state: State
    pressure: np.ndarray  # (N,) Pa, averaged over every substep of the averaging window
    density: np.ndarray  # (N,) kg/m^3, averaged likewise
    substeps: int
    max_error: float  # the solver's largest mean compression in the averaging window
    volume_half: float  # SPH volume at the half-way frame, m^3
    volume_end: float  # SPH volume at the end, m^3


def _settle_and_average(solver, world, state, settle_time, average_time, progress, started) -> _Settled:
    """Run the column for ``settle_time`` s in 0.02 s chunks; average pressure and density over every
    substep of the last ``average_time`` s."""
    mass = world.particle_mass
    frame = 0.02
    chunks = int(round(settle_time / frame))
    average_chunks = int(round(average_time / frame))
    step = world.solver_settings.max_time_step
    _progress_start(progress, chunks, state.count)
    half_chunk = chunks // 2
    volume_half = None
    pressure_sum = np.zeros(state.count)
    density_sum = np.zeros(state.count)
    samples = 0
    substeps = 0
    max_error = 0.0
    for k in range(1, chunks + 1):
        t0 = time.monotonic()
        if k <= chunks - average_chunks:
            state, stats = solver.advance(state, world, k * frame)
            substeps += stats.substeps
        else:
            # Average every substep: the pressure of consecutive substeps alternates
            # (damped warm start), so frame-end samples alone would be biased.
            start, end = (k - 1) * frame, k * frame
            count = int(round((end - start) / step))
            for m in range(1, count + 1):
                state, stats = solver.advance(state, world, end if m == count else start + m * step)
                substeps += stats.substeps
                attributes = solver.frame_attributes(state, world)
                pressure_sum += attributes["pressure"]
                density_sum += attributes["density"]
                samples += 1
                max_error = max(max_error, stats.max_density_error)
        if k == half_chunk:
            volume_half = float(np.sum(mass / solver.frame_attributes(state, world)["density"]))
        _progress_frame(progress, k, chunks, state.count, stats.substeps, time.monotonic() - t0, started)
    volume_end = float(np.sum(mass / solver.frame_attributes(state, world)["density"]))
    return _Settled(state, pressure_sum / samples, density_sum / samples, substeps, max_error, volume_half, volume_end)


def _hydrostatic_metrics(world, settled, upper, layers, top_count, height0, volume0, started) -> dict:
    """The hydrostatic case's metrics (see ``hydrostatic``) from the settled column; ``seconds`` since ``started``."""
    rho0, g = world.rest_density, abs(world.gravity[2])
    support, spacing, width = world.support_radius, world.particle_spacing, upper[0]
    state, pressure, density = settled.state, settled.pressure, settled.density
    x = state.positions
    surface = float(np.max(x[:, 2]))
    below_top = (surface - x[:, 2]) > support
    interior = np.all((x[:, :2] > support) & (x[:, :2] < width - support), axis=1)
    above_floor = x[:, 2] > support
    fit = below_top & interior & above_floor
    fit_top_only = below_top & interior
    slope = -np.polyfit(x[fit, 2], pressure[fit], 1)[0]
    slope_top_only = -np.polyfit(x[fit_top_only, 2], pressure[fit_top_only], 1)[0]
    bulk_error = np.abs(density[below_top] - rho0) / rho0
    outside = int(np.sum(np.any((x < 0.0) | (x > np.asarray(upper)), axis=1)))
    speed = float(np.sqrt(np.max(np.einsum("ij,ij->i", state.velocities, state.velocities))))
    depth = layers * spacing
    bins = np.floor((x[:, 2] - x[:, 2].min()) / (2 * spacing) + 0.5).astype(int)
    profile = []
    for b in np.unique(bins):
        sel = (bins == b) & interior
        if sel.any():
            profile.append([round(float(np.mean(x[sel, 2])), 4), round(float(np.mean(pressure[sel])), 1),
                            round(float(rho0 * g * (surface - np.mean(x[sel, 2]))), 1)])
    volume_half, volume_end = settled.volume_half, settled.volume_end
    return {
        "slope_ratio": float(slope / (rho0 * g)),
        "slope_ratio_top_only": float(slope_top_only / (rho0 * g)),
        "mean_density_error": float(np.mean(bulk_error)),
        "max_density_error": float(np.max(bulk_error)),
        "max_compression": float(np.max(density - rho0) / rho0),
        "solver_mean_compression": settled.max_error,
        "outside_walls": outside,
        "volume_drift": abs(volume_end - volume_half) / volume_half,
        "volume_change_from_lattice": (volume_end - volume0) / volume0,
        "column_height_change": (_top_height(x, top_count) - height0) / height0,
        "max_speed_ratio": speed / math.sqrt(g * depth),
        "particles": int(state.count),
        "substeps": int(settled.substeps),
        "seconds": time.monotonic() - started,
        "profile_z_p_rho0gd": profile,
    }


#: Martin & Moyce 1952, n^2 = 2, a = 2.25 in: front Z = x/a at T = n t sqrt(g/a)
#: (physics-references section 6a; secondary transcription [S] of their Tables 2
#: and 6, corroborated by a digitisation of Koshizuka & Oka 1996 Fig. 3).
MARTIN_MOYCE_T = np.array([0.41, 0.84, 1.19, 1.43, 1.63, 1.83, 1.98, 2.20, 2.32, 2.51, 2.65, 2.83, 2.98, 3.11, 3.33])
MARTIN_MOYCE_Z = np.array([1.11, 1.22, 1.44, 1.67, 1.89, 2.11, 2.33, 2.56, 2.78, 3.00, 3.22, 3.44, 3.67, 3.89, 4.11])
#: The same paper's residual column height eta = y / (n^2 a) at the back wall against tau = t sqrt(g/a)
#: (no factor n; physics-references section 6a, secondary transcription [S] of their Table 6).
MARTIN_MOYCE_TAU = np.array([0.56, 0.77, 0.93, 1.08, 1.28, 1.46, 1.66, 1.84, 2.00, 2.21, 2.45, 2.70, 3.06, 3.44,
                             4.20, 5.25, 7.40])
MARTIN_MOYCE_ETA = np.array([0.94, 0.89, 0.83, 0.78, 0.72, 0.67, 0.61, 0.56, 0.50, 0.44, 0.39, 0.33, 0.28, 0.22,
                             0.17, 0.11, 0.06])


def _row_edge(positions, spacing, near_axis, plane, along_axis, slab_layers, empty):
    """Among particles within 1.5 spacings of ``plane`` on ``near_axis``, the ``slab_layers``-th
    largest coordinate on ``along_axis`` plus half a spacing (a particle's extent); ``empty`` if none.

    Taking the row-th largest instead of the maximum needs a full row across the
    slab to have arrived, so one stray droplet does not move the edge.
    """
    values = np.sort(positions[positions[:, near_axis] < plane + 1.5 * spacing, along_axis])
    if len(values) == 0:
        return empty
    return float(values[max(0, len(values) - slab_layers)] + 0.5 * spacing)


def dam_front(positions, spacing, floor, slab_layers) -> float:
    """Surge front x (m): the edge of the leading full row on the floor (``_row_edge``)."""
    return _row_edge(positions, spacing, 2, floor, 0, slab_layers, float("nan"))


def column_height(positions, spacing, back, slab_layers) -> float:
    """Residual column height (m): the top of the full row at the back wall at x = ``back`` (``_row_edge``)."""
    return _row_edge(positions, spacing, 0, back, 2, slab_layers, 0.0)


def dam_break(progress=None, across=20, slab_layers=4, t_max_scaled=3.45) -> dict:
    """Martin & Moyce 1952 dam break, n^2 = 2, a = 0.05715 m, in a thin 3D slab.

    Set-up: fluid block of width a (x) and height 2a (z), ``across`` particles over
    a (spacing a / across), ``slab_layers`` layers in y between free-slip side
    walls; back wall, floor and far wall (at 8a) as one-layer boundary particles.
    The nominal fluid region is [0, a] x [0, 2a]; particle centres sit half a
    spacing inside it and the wall planes ``WALL_GAP`` - 1/2 spacings outside it,
    so x and z are measured from the nominal back wall and floor. The gate is
    removed instantly at t = 0.

    Convention (physics-references 6a): Z = x_front / a against T = n t sqrt(g/a)
    with n = sqrt(2). The front is ``dam_front`` (x of the leading full row on the
    floor). Metrics: RMS of Z - Z_MM over the table's T in [0.4, 3.3] (Z interpolated
    linearly between 0.005 s samples), the worst excess over Ritter's bound
    Z <= 1 + 2T (Ritter 1892; shallow-water upper bound), and Z at each table T; and
    the residual column height eta = y / (2a) at the back wall (``column_height``)
    against the same paper's second data set at its tau = t sqrt(g/a) within the run
    (RMS tolerance 0.05 in eta: our choice, about a spacing at 20 across).
    Reported, not tested: the RMS after delaying the simulated curve by the dT in
    [0, 0.6] that fits best (how much of the gap is a start-up offset).
    """
    started = time.monotonic()
    a = 0.05715
    n_factor = math.sqrt(2.0)
    spacing = a / across
    half = 0.5 * spacing
    offset = WALL_GAP * spacing - half  # wall plane distance outside the nominal fluid region
    positions = lattice((across, slab_layers, 2 * across), spacing, (half, half, half))
    lower = (-offset, -offset, -offset)
    upper = (8.0 * a, slab_layers * spacing + offset, 3.0 * a)
    faces = {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    wall_points, wall_normals = sample_box_walls(lower, upper, spacing, faces)
    boundary = make_boundary(wall_points, wall_normals, support_radius(spacing))
    world = BoxWorld(positions, np.zeros_like(positions), boundary, spacing)
    solver = make_solver("sph")
    state = solver.start(world)
    g = abs(world.gravity[2])
    time_scale = n_factor * math.sqrt(g / a)
    t_end = t_max_scaled / time_scale
    sample = 0.005
    chunks = int(math.ceil(t_end / sample))
    bounds = (np.asarray(lower), np.asarray(upper))

    def measure(current) -> tuple[float, int, float]:
        x = current.positions
        return (dam_front(x, spacing, 0.0, slab_layers) / a,
                int(np.sum(np.any((x < bounds[0]) | (x > bounds[1]), axis=1))),
                column_height(x, spacing, 0.0, slab_layers) / (2.0 * a))

    state, times, samples, substeps = _run_sampled(solver, world, state, sample, chunks, measure, progress, started)
    fronts = [front for front, _, _ in samples]
    outside = max(count for _, count, _ in samples)
    heights = np.asarray([height for _, _, height in samples])
    height_t = np.asarray(times) * math.sqrt(g / a)
    height_window = MARTIN_MOYCE_TAU <= height_t[-1] + 1e-9
    simulated_eta = np.interp(MARTIN_MOYCE_TAU[height_window], height_t, heights)
    height_rms = float(np.sqrt(np.mean((simulated_eta - MARTIN_MOYCE_ETA[height_window]) ** 2)))
    scaled_t = np.asarray(times) * time_scale
    fronts = np.asarray(fronts)
    window = (MARTIN_MOYCE_T >= 0.4) & (MARTIN_MOYCE_T <= 3.3)
    simulated = np.interp(MARTIN_MOYCE_T, scaled_t, fronts)
    rms = float(np.sqrt(np.mean((simulated[window] - MARTIN_MOYCE_Z[window]) ** 2)))
    ritter_excess = float(np.max(fronts - (1.0 + 2.0 * scaled_t)))
    # Diagnostic only (not a pass criterion): the RMS if the simulated curve is delayed by
    # dT, for the dT in [0, 0.6] that fits best. A small best-fit RMS at dT > 0 means the
    # shape matches and the gap is at the start (the experiment's gate, physics-references 6a).
    shifts = np.round(np.arange(0.0, 0.601, 0.01), 2)
    shifted = [float(np.sqrt(np.mean((np.interp(MARTIN_MOYCE_T[window] - d, scaled_t, fronts, left=fronts[0])
                                      - MARTIN_MOYCE_Z[window]) ** 2))) for d in shifts]
    best = int(np.argmin(shifted))
    metrics = {
        "front_rms_error": rms,
        "ritter_max_excess": ritter_excess,
        "front_at_table_T": {f"{t:.2f}": round(float(z), 3) for t, z in zip(MARTIN_MOYCE_T, simulated)},
        "published_Z": {f"{t:.2f}": float(z) for t, z in zip(MARTIN_MOYCE_T, MARTIN_MOYCE_Z)},
        "mean_signed_error": float(np.mean(simulated[window] - MARTIN_MOYCE_Z[window])),
        "height_rms_error": height_rms,
        "height_at_table_tau": {f"{t:.2f}": round(float(h), 3)
                                for t, h in zip(MARTIN_MOYCE_TAU[height_window], simulated_eta)},
        "published_eta": {f"{t:.2f}": float(h) for t, h in zip(MARTIN_MOYCE_TAU[height_window],
                                                                MARTIN_MOYCE_ETA[height_window])},
        "diagnostic_best_delay_T": float(shifts[best]),
        "diagnostic_rms_at_best_delay": shifted[best],
        "outside_walls": outside,
        "particles": int(state.count),
        "particles_across_a": across,
        "substeps": int(substeps),
        "seconds": time.monotonic() - started,
    }
    tolerances = {"front_rms_error": 0.15, "ritter_max_excess": 0.0, "height_rms_error": 0.05}
    passed = (rms <= tolerances["front_rms_error"] and ritter_excess <= 0.0
              and height_rms <= tolerances["height_rms_error"])
    return {
        "case": "dam-break",
        "passed": bool(passed),
        "metrics": metrics,
        "tolerances": tolerances,
        "source": ("Martin & Moyce 1952, 'An Experimental Study of the Collapse of Liquid Columns on a Rigid "
                   "Horizontal Plane', Phil. Trans. R. Soc. A 244:312-324 (n^2 = 2, a = 2.25 in; values via "
                   "a secondary transcription [S] of their front and residual-height tables); Ritter 1892 bound "
                   "Z <= 1 + 2T"),
        "notes": ("T = n t sqrt(g/a), n = sqrt(2); front = x of the leading full row within 1.5 spacings of "
                  "the floor + half a spacing; free-slip walls, instant gate removal"),
    }




def sloshing(progress=None, length=0.4, depth=0.2, width_layers=4, spacing=0.01, amplitude=0.01,
             periods=3.0) -> dict:
    """First sloshing mode of a rectangular tank: its period against linear theory.

    Linear surface-wave dispersion (Airy theory; Lamb 1932, "Hydrodynamics", ch. IX [M];
    the tank form also in Ibrahim 2005, "Liquid Sloshing Dynamics", ch. 1 [M]):
    omega^2 = g k tanh(k h), k = pi / L, for tank length L and depth h, small amplitude.

    Set-up: a ``length`` x ``width_layers`` spacings x ``depth`` lattice in a walled box
    with an open top, started flat with the mode's linear potential-flow velocity field
    u = -a w sin(kx) cosh(k(z + h)) / sinh(kh), w = a w cos(kx) sinh(k(z + h)) / sinh(kh)
    (surface elevation a cos(kx) sin(wt), a = ``amplitude``, 5 % of the depth), so the
    mode is excited alone. The period is read from the x-coordinate of the centre of
    mass (it moves with the tilt of the surface): a least-squares fit of a damped sine
    c + A exp(-lambda t) sin(2 pi t / T + phi) to it over ``periods`` theoretical periods
    (scipy.optimize.curve_fit, started from the theoretical T). L and h are the
    lattice extents (particles x spacing). Tolerance 3 % (the issue's target).
    """
    started = time.monotonic()
    nx, nz = int(round(length / spacing)), int(round(depth / spacing))
    gap = WALL_GAP * spacing
    half = 0.5 * spacing
    positions = lattice((nx, width_layers, nz), spacing, (gap, gap, gap))
    lower = np.zeros(3)
    upper = (2 * gap + (nx - 1) * spacing, 2 * gap + (width_layers - 1) * spacing, gap + (nz + 10) * spacing)
    faces = {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    wall_points, wall_normals = sample_box_walls(lower, upper, spacing, faces)
    boundary = make_boundary(wall_points, wall_normals, support_radius(spacing))
    g = abs(DEFAULT_GRAVITY[2])
    tank_length, tank_depth = nx * spacing, nz * spacing
    k = math.pi / tank_length
    omega = math.sqrt(g * k * math.tanh(k * tank_depth))
    x = positions[:, 0] - (gap - half)
    z = positions[:, 2] - (gap - half) - tank_depth
    velocities = np.zeros_like(positions)
    scale = amplitude * omega / math.sinh(k * tank_depth)
    velocities[:, 0] = -scale * np.sin(k * x) * np.cosh(k * (z + tank_depth))
    velocities[:, 2] = scale * np.cos(k * x) * np.sinh(k * (z + tank_depth))
    world = BoxWorld(positions, velocities, boundary, spacing)
    solver = make_solver("sph")
    state = solver.start(world)
    period = 2.0 * math.pi / omega
    sample = period / 40.0
    chunks = int(math.ceil(periods * period / sample))
    state, times, centre, substeps = _run_sampled(solver, world, state, sample, chunks,
                                                  lambda current: float(np.mean(current.positions[:, 0])),
                                                  progress, started)
    times, centre = np.asarray(times), np.asarray(centre)
    measured, decay = _fit_damped_period(times, centre, period)
    metrics = {
        "period_theory_s": period,
        "period_measured_s": measured,
        "period_error": abs(measured - period) / period,
        "decay_per_s": decay,
        "centre_amplitude_m": float(np.ptp(centre) / 2.0),
        "particles": int(state.count),
        "substeps": int(substeps),
        "seconds": time.monotonic() - started,
    }
    tolerances = {"period_error": 0.03}
    return {
        "case": "sloshing",
        "passed": bool(metrics["period_error"] <= tolerances["period_error"]),
        "metrics": metrics,
        "tolerances": tolerances,
        "source": ("omega^2 = g k tanh(k h), k = pi / L (linear surface-wave dispersion, Airy theory; Lamb 1932, "
                   "Hydrodynamics, ch. IX [from memory]; Ibrahim 2005, Liquid Sloshing Dynamics, ch. 1 [from memory])"),
        "notes": f"L = {tank_length:g} m, h = {tank_depth:g} m, amplitude {amplitude:g} m, {width_layers} layers wide",
    }


def impact(progress=None, radius_spacings=14.0, spacing=0.01, speed=2.0, fit_window=(0.08, 0.20), until=0.40) -> dict:
    """A ball of water striking a rigid wall head-on, against the early-time impact law.

    Set-up: a lattice ball of radius R (``radius_spacings`` spacings; R from its volume,
    N d^3 = 4/3 pi R^3) moving at ``speed`` V toward a wide one-layer wall, with no
    gravity; its lowest point starts one spacing from the wall's fluid surface (the wall
    plane + ``WALL_GAP`` - 1/2 spacings), so the impact begins at t_c = d / V. In s = (t - t_c) V / R,
    the wetted radius r (the third-largest distance from the axis among particles within a
    spacing of the wall, plus half a spacing) is sampled every 0.02.

    Theory: Wagner's impact theory for a sphere on a plane gives r = sqrt(3 R V t): the
    pressure under the impact throws liquid sideways faster than the sphere's geometric
    intersection with the plane (r = sqrt(2 R V t)) grows, as a thin fast sheet along the wall
    (Wagner 1932; used for drop impact by Riboux & Gordillo 2014, "Experiments of drops impacting
    a smooth solid surface: a model of the critical impact speed for drop splashing", Phys. Rev.
    Lett. 113, and Philippi, Lagree & Antkowiak 2016, "Drop impact on a solid surface: short-time
    self-similarity", J. Fluid Mech. 795; all from memory). The fitted C in r = C sqrt(R V t) over
    ``fit_window`` (Wagner's law holds for r well below R) must be within 0.9-1.2 of sqrt(3) (our
    tolerance: the geometric law, a solver with no impact pressure, is 0.82 of it).

    Also reported: the kinetic energy against its start (no gravity, static wall: it may only fall;
    tolerance 1.005, the splash suite's), the largest speed over V, and the fraction of the ball
    faster than sqrt(1.5) V -- the particles the over-energy measure (engine/energy.py) flags in a
    splash, here made by the impact pressure alone.
    """
    started = time.monotonic()
    d, v = float(spacing), float(speed)
    reach = int(math.ceil(radius_spacings)) + 1
    axis = np.arange(-reach, reach + 1) * d
    positions = np.stack(np.meshgrid(axis, axis, axis, indexing="ij"), -1).reshape(-1, 3)
    positions = positions[np.linalg.norm(positions, axis=1) <= (radius_spacings - 0.5) * d + 1e-12]
    radius = (len(positions) * d**3 * 3.0 / (4.0 * math.pi)) ** (1.0 / 3.0)
    surface = (WALL_GAP - 0.5) * d
    positions[:, 2] += surface + d + radius
    side = 3.0 * radius
    faces = {"x_min": "open", "x_max": "open", "y_min": "open", "y_max": "open", "z_min": "wall", "z_max": "open"}
    points, normals = sample_box_walls((-side, -side, 0.0), (side, side, 4.0 * radius), d, faces)
    velocities = np.zeros_like(positions)
    velocities[:, 2] = -v
    world = BoxWorld(positions, velocities, make_boundary(points, normals, support_radius(d)), d,
                     gravity=(0.0, 0.0, 0.0), solver_settings=SolverSettings(max_time_step=0.02 * radius / v))
    solver = make_solver("sph")
    state = solver.start(world)
    mass = world.particle_mass
    start_energy = 0.5 * mass * float(np.sum(velocities**2))
    contact = d / v
    samples = np.arange(0.02, until + 1e-9, 0.02)
    _progress_start(progress, len(samples), state.count)
    wetted, energy_ratio, fastest, fast_fraction, substeps = [], 0.0, 0.0, 0.0, 0
    for step, s in enumerate(samples, 1):
        t0 = time.monotonic()
        state, stats = solver.advance(state, world, contact + s * radius / v)
        substeps += stats.substeps
        near = np.hypot(state.positions[:, 0], state.positions[:, 1])[state.positions[:, 2] < surface + d]
        wetted.append(float(np.sort(near)[-3] + 0.5 * d) if len(near) >= 3 else 0.0)
        speed_now = np.linalg.norm(state.velocities, axis=1)
        energy_ratio = max(energy_ratio, 0.5 * mass * float(np.sum(speed_now**2)) / start_energy)
        fastest = max(fastest, float(speed_now.max()) / v)
        fast_fraction = max(fast_fraction, float(np.mean(speed_now > math.sqrt(1.5) * v)))
        _progress_frame(progress, step, len(samples), state.count, stats.substeps, time.monotonic() - t0, started)
    wetted = np.asarray(wetted)
    inside = (samples >= fit_window[0] - 1e-9) & (samples <= fit_window[1] + 1e-9)
    law = np.sqrt(samples[inside]) * radius  # sqrt(R V t) with t = s R / V
    constant = float(np.sum(wetted[inside] * law) / np.sum(law * law))
    metrics = {
        "wetted_constant": constant,
        "wetted_constant_over_wagner": constant / math.sqrt(3.0),
        "geometric_over_wagner": math.sqrt(2.0 / 3.0),
        "wetted_radius_over_r": [round(float(x), 4) for x in wetted / radius],
        "s": [round(float(x), 4) for x in samples],
        "kinetic_energy_ratio_max": energy_ratio,
        "max_speed_over_impact_speed": fastest,
        "fraction_faster_than_sqrt_1_5_v": fast_fraction,
        "particles": int(state.count),
        "radius_m": radius,
        "substeps": int(substeps),
        "seconds": time.monotonic() - started,
    }
    tolerances = {"wetted_constant_over_wagner": (0.9, 1.2), "kinetic_energy_ratio_max": 1.005}
    passed = (tolerances["wetted_constant_over_wagner"][0] <= metrics["wetted_constant_over_wagner"]
              <= tolerances["wetted_constant_over_wagner"][1]
              and energy_ratio <= tolerances["kinetic_energy_ratio_max"])
    return {
        "case": "impact",
        "passed": bool(passed),
        "metrics": metrics,
        "tolerances": tolerances,
        "source": ("r = sqrt(3 R V t), Wagner's impact theory for a sphere on a plane (Wagner 1932; Riboux & Gordillo "
                   "2014, Phys. Rev. Lett. 113; Philippi, Lagree & Antkowiak 2016, J. Fluid Mech. 795) [from memory]; "
                   "tolerances: ours"),
        "notes": (f"R = {radius_spacings:g} spacings ({radius:.3g} m), V = {v:g} m/s, no gravity; fit over "
                  f"s = {fit_window[0]:g}-{fit_window[1]:g}"),
    }


_RUNNERS = {"hydrostatic": hydrostatic, "dam-break": dam_break, "sloshing": sloshing, "impact": impact}


def _run_sampled(solver, world, state, sample, chunks, measure, progress, started):
    """Advance ``state`` in ``chunks`` intervals of ``sample`` seconds, measuring at t = 0 and after each.

    Returns:
        (state, times, [measure(state) at each time], substeps).
    """
    _progress_start(progress, chunks, state.count)
    times, values, substeps = [state.time], [measure(state)], 0
    for step in range(1, chunks + 1):
        t0 = time.monotonic()
        state, stats = solver.advance(state, world, step * sample)
        substeps += stats.substeps
        times.append(state.time)
        values.append(measure(state))
        _progress_frame(progress, step, chunks, state.count, stats.substeps, time.monotonic() - t0, started)
    return state, times, values, substeps


def _fit_damped_period(times, signal, guess):
    """(period, decay rate) of c + A exp(-lambda t) sin(2 pi t / T + phi) fitted to ``signal``."""
    from scipy.optimize import curve_fit

    def model(t, c, amplitude, decay, period, phase) -> np.ndarray:
        return c + amplitude * np.exp(-decay * t) * np.sin(2.0 * np.pi * t / period + phase)

    start = [float(np.mean(signal)), float(np.ptp(signal) / 2.0), 0.0, guess, 0.0]
    try:
        fitted, _ = curve_fit(model, times, signal, p0=start, maxfev=20000)
    except RuntimeError:
        return float("nan"), float("nan")
    return float(abs(fitted[3])), float(fitted[2])


def run_case(name, progress=None) -> dict:
    """Run validation case ``name`` (one of ``CASES``) and return its result dict.

    Raises:
        SplashdraftError: unknown case name.
    """
    if name not in _RUNNERS:
        raise SplashdraftError(f"validation case {name!r} does not exist; choose one of {', '.join(CASES)}")
    return _RUNNERS[name](progress=progress)
