"""DFSPH reference solver: the physically based bake (Solver protocol, ``name = "sph"``).

Method: Bender & Koschier 2015, "Divergence-Free Smoothed Particle Hydrodynamics",
Proc. ACM SIGGRAPH/Eurographics SCA (doi:10.1145/2786784.2786796): a velocity solve
that keeps the flow from compressing and a density solve that removes the density
error, both Jacobi iterations with the DFSPH factor
alpha_i = rho_i / (|sum_j m grad W_ij + sum_b Psi_b grad W_ib|^2 + sum_j |m grad W_ij|^2)
as the diagonal. One substep, with one neighbour search:

1. neighbours of x(t); density rho_i = sum_j m W_ij + sum_b Psi_b W_ib and alpha_i;
2. XSPH smoothing (Monaghan 1989, J. Comput. Phys. 82:1-15)
   v_i += eps sum_j (m / rho_ij)(v_j - v_i) W_ij, rho_ij = (rho_i + rho_j) / 2, and toward the
   boundary particles' velocities with Psi_b / rho_i in place of m / rho_ij (no-slip walls);
   gravity v += dt g;
3. velocity solve: pressure kappa >= 0 such that no particle ends the step denser than
   max(rho_i, rho0) to first order, rho_i + dt (D rho / Dt)_i(v) <= max(rho_i, rho0)
   (an over-dense particle may not compress further: the divergence-free condition;
   an under-dense one, at a free surface or in spray, may fill up to rest density);
   warm-started from ``WARM_START_FACTOR`` of the previous substep's kappa
   (``warm_start_kappa``), but only on particles that are still being compressed (a
   carried-over push on a particle whose impact is over is energy nothing takes back);
4. drift solve: a position shift s (pseudo-velocity, m/s) with
   rho_i + dt (D rho / Dt)_i(v + s) <= rho0, so a particle that is denser than rho0 is
   moved back, and x(t + dt) = x(t) + dt (v + s) while v is kept. This is the split
   of velocity and position correction used for contacts in rigid-body engines (common
   practice, from memory): folding the density error into v, as the SCA listing does,
   turns every position error (a corner of a fill, a particle driven into a wall in one
   step) into a velocity that nothing takes back, and the liquid gains energy
   (DEVELOPERS.md, "Solver notes", has the measurements behind these choices).

Both solves are the SCA paper's Jacobi iterations with compression-only increments
(``_jacobi_solve``): kappa_i += alpha_i max(r_i, 0) / dt^2. The drift solve starts from
``DRIFT_WARM_START`` of its previous coefficient, adds ``DRIFT_MOMENTUM`` of each increment to
the next (heavy-ball), runs at most ``DRIFT_ITERATIONS`` iterations, and its shift is capped at
``DRIFT_SHIFT_CAP`` spacings per substep (the rest waits for the next substep). A projected
variant that also lowers kappa was measured and not kept (DEVELOPERS.md, "Solver notes").
Stopping rule: mean compression / rho0 <= ``density_tolerance`` after at
least 2 (velocity) and 1 (drift) iterations. A substep whose velocity solve does not
converge within ``max_iterations`` is taken again at half the step (up to
``MAX_STEP_HALVINGS`` times); ``StepStats`` counts retries and substeps accepted
unconverged. (``divergence_tolerance`` is no longer used by this solver.)

Boundary: Akinci, Ihmsen, Akinci, Solenthaler & Teschner 2012, "Versatile Rigid-Fluid
Coupling for Incompressible SPH", ACM TOG 31(4): boundary particles with Psi_b = rho0 V_b
add to density and to the density rate with the relative velocity (v_i - v_b), so
moving colliders push the fluid. Pressure variant: p_i / rho_i^2 only (not mirrored):
the velocity change from b is -dt (kappa_i / rho_i) Psi_b grad W_ib, the transpose of
the boundary part of the rate operator, so the system stays symmetric (the mirrored
variant, twice the term, made Jacobi diverge next to walls). Pressure extrapolation to
the boundary (Band et al. 2018, "Pressure boundaries for implicit incompressible SPH")
is not used: with the drift solve, thin walls and moving colliders pass the crossing
and energy checks of tests/test_splash_physics.py without it. Colliders are kinematic.

Pressure output (Pa): p_i = rho_i kappa_i of the velocity solve (>= 0, 0 at free
surfaces); the drift solve's coefficient is a position correction, not a pressure. The
hydrostatic tank (engine/validate.py) checks the pressure against rho0 g d.

Kernel and mass: cubic spline (engine/kernels.py), H = 2 * particle_spacing,
m = rest_density * particle_spacing^3. Time step (CFL, SCA paper): dt = cfl_factor *
particle_spacing / max|v|, clipped to [min_time_step, max_time_step]; substeps land
exactly on the requested end time. Everything is float64 with a fixed summation order,
so the same input gives the same bits. Measured speed work that was not kept is listed
in DEVELOPERS.md and the ``PairOperators`` docstring.
"""

import dataclasses
import math
import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import scipy.sparse as sparse

from .boundary import empty_boundary
from .errors import SceneError, SolverError
from .kernels import kernel, kernel_terms
from .particle_model import cfl_speed_limit, cfl_step, particle_mass, support_radius
from .scene import DEFAULT_GRAVITY, Fluid, SolverSettings
from .neighbours import SkinPairs

if TYPE_CHECKING:
    from .state import State

KAPPA = "sph_kappa"
DRIFT = "sph_drift"
PRESSURE = "sph_pressure"

#: Threads for the solver's sparse products (scipy's sparse kernels release the GIL). Each
#: product is computed whole by one thread and the results are summed in a fixed order, so
#: the bits do not depend on the thread count. SPLASHDRAFT_THREADS overrides the default.
def _thread_count(default=min(4, os.cpu_count() or 1)):
    text = os.environ.get("SPLASHDRAFT_THREADS", "")
    return max(1, int(text)) if text.strip().isdigit() else default


SOLVER_THREADS = _thread_count()
_pool = None


def _products(pairs):
    """[matrix @ vector for (matrix, vector) in pairs], on the solver's thread pool when it has one."""
    global _pool
    if SOLVER_THREADS <= 1 or len(pairs) < 2 or pairs[0][0].nnz < 20000:
        return [matrix @ vector for matrix, vector in pairs]
    if _pool is None:
        _pool = ThreadPoolExecutor(max_workers=SOLVER_THREADS, thread_name_prefix="splashdraft-sph")
    futures = [_pool.submit(matrix.__matmul__, vector) for matrix, vector in pairs]
    return [future.result() for future in futures]


@dataclass(frozen=True)
class SphParams:
    """Resolved solver parameters (SI units). Build with ``make_params`` or ``params_from_world``.

    Attributes:
        particle_spacing: lattice spacing d in metres; H = 2 d, m = rho0 d^3.
        rest_density: rho0 in kg/m^3.
        viscosity: XSPH coefficient eps (dimensionless, per substep).
        gravity: (3,) m/s^2 as a tuple.
        cfl_factor: dt <= cfl_factor * d / max|v|.
        max_time_step, min_time_step: bounds on dt in seconds.
        density_tolerance: mean compression target of the constant-density solve (fraction).
        divergence_tolerance: kept for the scene format; this solver no longer uses it.
        max_iterations: cap on each solver's iterations.
        neighbour_skin: Verlet-list skin in metres (0: search every substep).
    """

    particle_spacing: float
    rest_density: float
    viscosity: float
    gravity: tuple
    cfl_factor: float
    max_time_step: float
    min_time_step: float
    density_tolerance: float
    divergence_tolerance: float
    max_iterations: int
    neighbour_skin: float

    @property
    def support_radius(self) -> float:
        return support_radius(self.particle_spacing)

    @property
    def particle_mass(self) -> float:
        return particle_mass(self.rest_density, self.particle_spacing)

    @property
    def max_speed(self) -> float:
        """Speed above which the CFL step would drop below ``min_time_step`` (m/s)."""
        return cfl_speed_limit(self.particle_spacing, self.cfl_factor, self.min_time_step)


#: Warm start of the velocity solve: the fraction of the previous substep's kappa it starts from
#: (SCA 2015 warm start, damped: with compression-only increments an undamped warm start can only
#: grow, and a pressure no longer needed after an impact would never be released).
WARM_START_FACTOR = 0.5

#: Largest drift shift per substep, in spacings. Uncapped, the drift solve pushed particles of a
#: 3-layer dam-break slab through its one-layer walls (476 of 3,200 outside); at 0.02 and 0.05 none.
DRIFT_SHIFT_CAP = 0.05


#: Most iterations of the drift solve per substep; what it leaves is taken up in the next substeps
#: (it moves positions only, so stopping it early costs no energy). Measured 2026-12-04 on the 20k
#: settling cube (bench/bench_reference.py): uncapped it took 60 iterations per substep (86k
#: particle-substeps/s against 146k before the drift solve); at 40 with the warm start below,
#: 110k; at 10 or 20 the hydrostatic tank stayed 0.3-1.4 % compressed (tolerance 0.1 %).
DRIFT_ITERATIONS = 40

#: Fraction of the previous substep's drift coefficient the drift solve starts from: a compression
#: that persists (the bottom of a resting column) needs about the same shift each substep.
DRIFT_WARM_START = 0.5

#: Momentum of the drift solve's Jacobi increments (heavy-ball acceleration, Polyak 1964, "Some
#: methods of speeding up the convergence of iteration methods", USSR Comput. Math. Math. Phys.
#: 4(5)): each increment adds this fraction of the previous one. Jacobi needs about depth^2
#: iterations to carry a correction through a deep column; with momentum about depth. Measured
#: 2026-12-04: on the 20k settling cube (bench/bench_reference.py) 38.8 -> 11.2 drift iterations per
#: substep; hydrostatic tank mean density error 0.086 % -> 0.053 %, pressure slope 1.015 -> 1.005;
#: splash suite energy never above the input and over-energy no higher except the throw (5.8 -> 6.2 %).
#: The same momentum on the velocity solve (0.5) was measured and not kept: the overshoot is a velocity,
#: and the drop into a pool reached 1.012x its input energy.
DRIFT_MOMENTUM = 0.8


#: Neighbour searches ``settle_positions`` may use to bring a fill to rest density at t = 0.
SETTLE_PASSES = 3

#: Halvings of a substep whose solves did not converge within ``max_iterations`` before the
#: substep is accepted unconverged (and counted in ``StepStats.unconverged_substeps``).
MAX_STEP_HALVINGS = 3

#: ``State.scalars`` key of the last substep's length (s), for ``warm_start_kappa``.
LAST_STEP = "sph_last_step"


def warm_start_kappa(kappa, last_dt, dt) -> np.ndarray:
    """The constant-density kappa to warm-start a substep of length ``dt`` with.

    kappa acts as the velocity change dt * kappa / rho, so kappa carried over
    from a short substep (an impact) into a longer one would give a larger kick
    than the one it came from; a lone fast particle hitting a wall was flung at
    85 m/s that way in a training shot. When the step grows, kappa is scaled by
    last_dt / dt so the carried-over impulse never grows; when it shrinks or stays,
    kappa is kept (a steady pressure such as the hydrostatic one does not depend
    on the step). ``last_dt`` = 0 (a fresh start) keeps kappa, which is then zero.
    """
    if last_dt <= 0.0 or dt <= last_dt:
        return kappa
    return kappa * (last_dt / dt)


#: Default Verlet skin as a fraction of the support radius.
DEFAULT_SKIN_FRACTION = 0.25


def make_params(particle_spacing, *, rest_density=Fluid.rest_density, viscosity=Fluid.viscosity,
                gravity=DEFAULT_GRAVITY, cfl_factor=SolverSettings.cfl_factor,
                max_time_step=SolverSettings.max_time_step, min_time_step=SolverSettings.min_time_step,
                density_tolerance=SolverSettings.density_tolerance,
                divergence_tolerance=SolverSettings.divergence_tolerance,
                max_iterations=SolverSettings.max_iterations, neighbour_skin=None) -> SphParams:
    """Validated SphParams; the defaults are the scene format's (``engine.scene``), ``neighbour_skin`` 0.25 H.

    Raises:
        SceneError: naming the field, the bad value and the allowed range.
    """
    def positive(name, value) -> float:
        value = float(value)
        if not math.isfinite(value) or value <= 0:
            raise SceneError(f"{name}: must be a finite number > 0, got {value!r}; set a positive value")
        return value

    spacing = positive("particle_spacing", particle_spacing)
    values = dict(
        particle_spacing=spacing,
        rest_density=positive("fluid.rest_density", rest_density),
        cfl_factor=positive("solver.cfl_factor", cfl_factor),
        max_time_step=positive("solver.max_time_step", max_time_step),
        min_time_step=positive("solver.min_time_step", min_time_step),
        density_tolerance=positive("solver.density_tolerance", density_tolerance),
        divergence_tolerance=positive("solver.divergence_tolerance", divergence_tolerance),
    )
    viscosity = float(viscosity)
    if not (0.0 <= viscosity <= 1.0):
        raise SceneError(f"fluid.viscosity: XSPH coefficient must lie in [0, 1], got {viscosity!r}; "
                         "use 0.01-0.05 for water")
    if values["cfl_factor"] > 1.0:
        raise SceneError(f"solver.cfl_factor: must be <= 1, got {cfl_factor!r}; use 0.4")
    if values["min_time_step"] > values["max_time_step"]:
        raise SceneError(f"solver.min_time_step ({min_time_step}) exceeds solver.max_time_step "
                         f"({max_time_step}); make the minimum the smaller one")
    gravity = tuple(float(g) for g in np.asarray(gravity, np.float64).reshape(-1))
    if len(gravity) != 3 or not all(math.isfinite(g) for g in gravity):
        raise SceneError(f"gravity: must be 3 finite numbers in m/s^2, got {gravity!r}")
    iterations = int(max_iterations)
    if iterations < 2 or iterations != max_iterations:
        raise SceneError(f"solver.max_iterations: must be an integer >= 2, got {max_iterations!r}")
    skin = DEFAULT_SKIN_FRACTION * support_radius(spacing) if neighbour_skin is None else float(neighbour_skin)
    if not math.isfinite(skin) or skin < 0:
        raise SceneError(f"neighbour_skin: must be >= 0 metres, got {neighbour_skin!r}")
    return SphParams(viscosity=viscosity, gravity=gravity, max_iterations=iterations,
                     neighbour_skin=skin, **values)


def params_from_world(world, neighbour_skin=None) -> SphParams:
    """SphParams from a world (``engine.world.World`` or a validation case): spacing, fluid, gravity, solver."""
    solver = world.solver_settings
    return make_params(
        world.particle_spacing, rest_density=world.rest_density, viscosity=world.viscosity,
        gravity=world.gravity, cfl_factor=solver.cfl_factor, max_time_step=solver.max_time_step,
        min_time_step=solver.min_time_step, density_tolerance=solver.density_tolerance,
        divergence_tolerance=solver.divergence_tolerance, max_iterations=solver.max_iterations,
        neighbour_skin=neighbour_skin)


def cfl_time_step(velocities, params) -> tuple[float, int]:
    """dt = cfl_factor * d / max|v| clipped to [min_time_step, max_time_step] (SCA 2015 CFL rule).

    Args:
        velocities: (N, 3) float64 m/s.

    Returns:
        ``(dt, fastest)``: the step in seconds and the index of the fastest
        particle (-1 when N = 0). dt is below ``min_time_step`` only when the
        fastest particle is faster than ``params.max_speed`` (the caller raises).
    """
    if len(velocities) == 0:
        return params.max_time_step, -1
    speed2 = np.einsum("ij,ij->i", velocities, velocities)
    fastest = int(np.argmax(speed2))
    speed = math.sqrt(float(speed2[fastest]))
    return cfl_step(speed, params.particle_spacing, params.cfl_factor, params.max_time_step), fastest


def substep_length(dt, remaining) -> float:
    """The step actually taken so that substeps land exactly on the end time.

    Takes the rest if it fits in one step; splits it in two equal steps if it
    fits in two, so the final step is never a sliver.
    """
    # The tolerance keeps round-off in t_end - t (frame times are k / fps) from
    # splitting a step that fits into two halves.
    if remaining <= dt * (1.0 + 1e-9):
        return remaining
    if remaining < 2.0 * dt:
        return 0.5 * remaining
    return dt


class PairOperators:
    """SPH sums over the pairs of one substep, as sparse matrix products.

    Built once per substep from the pair lists and reused by every solver
    iteration. With U_c the (N, N) CSR matrix holding m * dW/dx_c(x_i - x_j) at
    (i, j) for each pair i < j, the full antisymmetric gradient operator is
    G_c = U_c - U_c^T, so each product is two sparse matvecs per axis.

    Why this layout and not others (measured): DEVELOPERS.md, "Solver notes".

    Attributes:
        count: N fluid particles.
        density: (N,) rho_i in kg/m^3 (fluid + boundary).
        alpha: (N,) DFSPH factor in m^5/kg.
        boundary_neighbours: (N,) int, boundary particles within H.
    """

    def __init__(self, count, fluid_pairs, boundary_pairs, boundary, params):
        n = count
        h = params.support_radius
        m = params.particle_mass
        i, j, offsets, distances = fluid_pairs
        w, f = kernel_terms(distances, h)
        f *= m
        # m grad_i W_ij per axis (kg/m^4), contiguous columns for the sparse matrices.
        grad_columns = [np.multiply(offsets[:, c], f) for c in range(3)]
        indptr = np.zeros(n + 1, np.int64)
        np.cumsum(np.bincount(i, minlength=n), out=indptr[1:])
        cols = j.astype(np.int32) if n < 2**31 else j
        self.count = n
        self._i, self._j = i, j
        self._upper = [sparse.csr_matrix((grad_columns[c], cols, indptr), shape=(n, n)) for c in range(3)]
        self._lower = [u.T for u in self._upper]
        self._pair_w = w
        self.neighbour_count = np.bincount(i, minlength=n) + np.bincount(j, minlength=n)
        # Row sums: s_i = sum_j m grad W_ij (antisymmetric pairs), sum_j |m grad W_ij|^2.
        fluid_sum = np.stack([np.bincount(i, grad_columns[c], n) - np.bincount(j, grad_columns[c], n)
                              for c in range(3)], axis=1)
        grad2 = grad_columns[0] * grad_columns[0] + grad_columns[1] * grad_columns[1] + grad_columns[2] * grad_columns[2]
        square_sum = np.bincount(i, grad2, n) + np.bincount(j, grad2, n)
        density = m * (float(kernel(0.0, h)) + np.bincount(i, w, n) + np.bincount(j, w, n))

        boundary_sum = np.zeros((n, 3))
        self.boundary_rate = np.zeros(n)  # sum_b Psi_b v_b . grad W_ib, kg/(m^3 s)
        self.boundary_neighbours = np.zeros(n, np.int64)
        self._wall = None  # (bi, Psi_b W_ib, v_b) for the boundary part of XSPH
        bi, bk, b_offsets, b_distances = boundary_pairs
        if len(bi):
            bw, bf = kernel_terms(b_distances, h)
            psi = params.rest_density * boundary.volumes[bk]
            b_grad = b_offsets * (bf * psi)[:, None]
            boundary_sum = np.stack([np.bincount(bi, b_grad[:, c], n) for c in range(3)], axis=1)
            density = density + np.bincount(bi, psi * bw, n)
            velocities = boundary.velocities[bk]
            self._wall = (bi, psi * bw, velocities)
            if np.any(velocities):
                self.boundary_rate = np.bincount(bi, np.einsum("ij,ij->i", velocities, b_grad), n)
            self.boundary_neighbours = np.bincount(bi, minlength=n)
        self.neighbour_count = self.neighbour_count + self.boundary_neighbours
        total = fluid_sum + boundary_sum
        denominator = np.einsum("ij,ij->i", total, total) + square_sum
        floor = 1e-9 * (m / h**4) ** 2
        self.alpha = np.where(denominator > floor, density / np.maximum(denominator, floor), 0.0)
        self.rest_density = params.rest_density
        self.density = density
        self._rate_sum = total  # multiplies v_i in D rho / Dt
        self._accel_sum = total  # boundary term k_i Psi_b grad W_ib: p_i / rho_i^2 only

    def density_rate(self, velocities) -> np.ndarray:
        """(D rho / Dt)_i = sum_j m (v_i - v_j).grad W_ij + sum_b Psi_b (v_i - v_b).grad W_ib, kg/(m^3 s)."""
        rate = np.einsum("ij,ij->i", velocities, self._rate_sum) - self.boundary_rate
        columns = [np.ascontiguousarray(velocities[:, c]) for c in range(3)]
        products = _products([(m, columns[c]) for c in range(3) for m in (self._upper[c], self._lower[c])])
        for c in range(3):
            rate -= products[2 * c]
            rate += products[2 * c + 1]
        return rate

    def pressure_term(self, k) -> np.ndarray:
        """(N, 3) sum_j m (k_i + k_j) grad W_ij + k_i sum_b Psi_b grad W_ib, with k = kappa / rho."""
        out = self._accel_sum * k[:, None]
        products = _products([(m, k) for c in range(3) for m in (self._upper[c], self._lower[c])])
        for c in range(3):
            out[:, c] += products[2 * c]
            out[:, c] -= products[2 * c + 1]
        return out

    def xsph(self, velocities, epsilon, mass) -> np.ndarray:
        """XSPH-smoothed velocities v_i + eps sum_j (m / rho_ij)(v_j - v_i) W_ij (Monaghan 1989),
        plus the same smoothing toward the boundary particles' velocities,
        eps sum_b (Psi_b / rho_i)(v_b - v_i) W_ib: walls and colliders are no-slip, as real ones
        are, instead of frictionless (it slowed the dam-break front from an RMS of 0.245 to 0.106
        against Martin & Moyce 1952 and cut the splash suite's over-energy fractions by a third)."""
        if epsilon == 0.0:
            return velocities
        smoothed = velocities
        if self._wall is not None:
            bi, weight, wall_velocity = self._wall
            pull = (wall_velocity - velocities[bi]) * (epsilon * weight / self.density[bi])[:, None]
            smoothed = velocities + np.stack([np.bincount(bi, pull[:, c], self.count) for c in range(3)], axis=1)
        if len(self._i) == 0:
            return smoothed
        i, j = self._i, self._j
        weights = (epsilon * 2.0 * mass) * self._pair_w / (self.density[i] + self.density[j])
        indptr = self._upper[0].indptr
        smooth = sparse.csr_matrix((weights, self._upper[0].indices, indptr), shape=(self.count, self.count))
        row_sum = np.bincount(i, weights, self.count) + np.bincount(j, weights, self.count)
        return smoothed + (smooth @ velocities + smooth.T @ velocities) - velocities * row_sum[:, None]


@dataclass(frozen=True)
class SubstepResult:
    """Output of ``dfsph_substep``.

    Attributes:
        positions, velocities: (N, 3) float64 at t + dt.
        kappa: (N,) accumulated constant-density kappa (m^2/s^2) for the warm start.
        drift: (N,) the drift solve's coefficient (m^2/s^2), warm start of the next substep.
        density: (N,) rho_i at the start of the substep (kg/m^3).
        pressure: (N,) rho_i kappa_i in Pa (module docstring).
        pressure_iterations, drift_iterations: iterations of the velocity and drift solves.
        density_error: mean predicted compression / rho0 at the new positions (after both solves).
        max_density_error: max predicted compression / rho0 at the new positions.
        converged: the velocity solve reached its tolerance within ``max_iterations``.
        drift_converged: the drift solve did (when it did not, the rest of the drift is
            left to the next substep; it changes positions only).
        seconds: dict with "neighbours", "density", "solvers" wall times.
    """

    positions: np.ndarray
    velocities: np.ndarray
    kappa: np.ndarray
    drift: np.ndarray
    density: np.ndarray
    pressure: np.ndarray
    pressure_iterations: int
    drift_iterations: int
    density_error: float
    max_density_error: float
    converged: bool
    drift_converged: bool
    seconds: dict


def _find_pairs(positions, boundary, params, pairs):
    if pairs is None:
        pairs = SkinPairs(params.support_radius, 0.0)
    inner, between = pairs.update(positions, boundary.positions if boundary.positions.shape[0] else None)
    if between is None:
        none = np.zeros(0, np.int64)
        between = (none, none, np.zeros((0, 3)), np.zeros(0))
    return inner, between


def _jacobi_solve(ops, velocities, kappa, floor, dt, tolerance, min_iterations, max_iterations, momentum=0.0):
    """Find kappa >= 0 that brings rho_i + dt (D rho / Dt)_i(v) down to ``floor_i`` (SCA 2015 Jacobi).

    Each iteration adds kappa_i += alpha_i max(r_i, 0) / dt^2 with r_i = rho*_i - floor_i
    (compression only, so free surfaces do not pull) and applies the change as
    v <- v - dt sum_j m (dk_i / rho_i + dk_j / rho_j) grad W_ij, dk = d kappa / rho. The
    starting ``kappa`` (a warm start) is applied first. The solve stops when the mean
    compression max(r, 0) / rho0 is <= ``tolerance`` after ``min_iterations``, or at
    ``max_iterations`` (then ``converged`` is False). With ``momentum`` b > 0 each increment
    also carries b times the previous one (heavy-ball; the increments stay >= 0).

    Returns:
        (velocities, kappa, iterations, error, worst, converged); ``error`` and ``worst`` are
        the mean and largest compression / rho0 of the returned velocities.
    """
    alpha, density = ops.alpha, ops.density
    rho0 = ops.rest_density
    if np.any(kappa):
        velocities = velocities - dt * ops.pressure_term(kappa / density)
    inv_dt2 = 1.0 / (dt * dt)
    iterations = 0
    change = None
    while True:
        compression = np.maximum(density + dt * ops.density_rate(velocities) - floor, 0.0)
        error = float(np.mean(compression)) / rho0
        converged = error <= tolerance
        if (iterations >= min_iterations and converged) or iterations >= max_iterations:
            break
        change = alpha * compression * inv_dt2 + (momentum * change if change is not None else 0.0)
        velocities = velocities - dt * ops.pressure_term(change / density)
        kappa = kappa + change
        iterations += 1
    return velocities, kappa, iterations, error, float(np.max(compression)) / rho0, converged


def dfsph_substep(positions, velocities, kappa, drift, boundary, params, dt, pairs=None) -> SubstepResult:
    """One substep of length dt (see the module docstring for the equations).

    Args:
        positions, velocities: (N, 3) float64 at time t (m, m/s).
        kappa: (N,) float64 warm start of the velocity solve (m^2/s^2), already scaled
            for this step (``warm_start_kappa``).
        drift: (N,) float64 the previous substep's drift coefficient (m^2/s^2); the drift
            solve starts from ``DRIFT_WARM_START`` of it.
        boundary: object with ``positions`` (B, 3), ``velocities`` (B, 3) and
            ``volumes`` (B,) (e.g. ``engine.boundary.BoundaryParticles``), or None.
        params: SphParams.
        dt: step in seconds, > 0.
        pairs: optional ``engine.neighbours.SkinPairs`` reused across substeps
            (an optimisation only: results do not depend on it).

    Returns:
        SubstepResult. Inputs are not modified.
    """
    positions = np.asarray(positions, np.float64)
    velocities = np.asarray(velocities, np.float64)
    n = len(positions)
    boundary = boundary if boundary is not None else empty_boundary()
    if n == 0:
        empty = np.zeros(0)
        return SubstepResult(positions, velocities, empty, empty, empty, empty, 0, 0, 0.0, 0.0, True, True,
                             {"neighbours": 0.0, "density": 0.0, "solvers": 0.0})
    clock = time.perf_counter()
    fluid_pairs, boundary_pairs = _find_pairs(positions, boundary, params, pairs)
    t_pairs = time.perf_counter()
    ops = PairOperators(n, fluid_pairs, boundary_pairs, boundary, params)
    t_density = time.perf_counter()

    rho0 = params.rest_density
    velocities = ops.xsph(velocities, params.viscosity, params.particle_mass)
    velocities = velocities + dt * np.asarray(params.gravity)
    # 1. Velocity solve: no particle is compressed further than it is now, nor past rest density.
    floor = np.maximum(ops.density, rho0)
    warm = WARM_START_FACTOR * np.asarray(kappa, np.float64)
    if np.any(warm):
        # Warm-start only particles that are still being compressed: a push carried over to a
        # particle whose impact is over would hand it energy nothing takes back.
        warm = np.where(ops.density + dt * ops.density_rate(velocities) > floor, warm, 0.0)
    velocities, kappa, velocity_iterations, _, _, velocity_ok = _jacobi_solve(
        ops, velocities, warm, floor, dt, params.density_tolerance, 2, params.max_iterations)
    # 2. Drift solve: a position shift (pseudo-velocity) that brings compressed particles back to
    #    rest density; it moves particles but is not kept in their velocity.
    corrected, drift, drift_iterations, error, worst, drift_ok = _jacobi_solve(
        ops, velocities, DRIFT_WARM_START * np.asarray(drift, np.float64), rho0, dt, params.density_tolerance, 1,
        min(params.max_iterations, DRIFT_ITERATIONS), momentum=DRIFT_MOMENTUM)
    shift = dt * (corrected - velocities)
    cap = DRIFT_SHIFT_CAP * params.particle_spacing
    length = np.sqrt(np.einsum("ij,ij->i", shift, shift))
    shift *= np.minimum(1.0, cap / np.maximum(length, 1e-300))[:, None]
    positions = positions + dt * velocities + shift
    t_solve = time.perf_counter()
    return SubstepResult(
        positions=positions, velocities=velocities, kappa=kappa, drift=drift, density=ops.density,
        pressure=kappa * ops.density, pressure_iterations=velocity_iterations,
        drift_iterations=drift_iterations, density_error=error, max_density_error=worst,
        converged=velocity_ok, drift_converged=drift_ok,
        seconds={"neighbours": t_pairs - clock, "density": t_density - t_pairs, "solvers": t_solve - t_density})


def settle_positions(positions, boundary, params, passes=SETTLE_PASSES) -> np.ndarray:
    """Positions moved by the drift solve alone (no velocity) until no particle is denser than rho0.

    Each pass searches neighbours again and runs the drift solve with zero velocity over
    one ``max_time_step``; it stops early once the largest compression is within
    ``density_tolerance``.
    """
    positions = np.asarray(positions, np.float64)
    boundary = boundary if boundary is not None else empty_boundary()
    dt = params.max_time_step
    for _ in range(passes):
        if len(positions) == 0:
            break
        fluid_pairs, boundary_pairs = _find_pairs(positions, boundary, params, None)
        ops = PairOperators(len(positions), fluid_pairs, boundary_pairs, boundary, params)
        if float(np.max(ops.density)) <= params.rest_density * (1.0 + params.density_tolerance):
            break
        shift, _, _, _, _, _ = _jacobi_solve(ops, np.zeros_like(positions), np.zeros(len(positions)),
                                             params.rest_density, dt, params.density_tolerance, 1,
                                             params.max_iterations)
        positions = positions + dt * shift
    return positions


def sph_density(positions, boundary, params, pairs=None) -> np.ndarray:
    """rho_i = sum_j m W_ij + sum_b Psi_b W_ib (self included), (N,) float64 kg/m^3."""
    positions = np.asarray(positions, np.float64)
    if len(positions) == 0:
        return np.zeros(0)
    boundary = boundary if boundary is not None else empty_boundary()
    fluid_pairs, boundary_pairs = _find_pairs(positions, boundary, params, pairs)
    return PairOperators(len(positions), fluid_pairs, boundary_pairs, boundary, params).density


@dataclass(frozen=True)
class StepStats:
    """What one ``advance`` call did (for progress, the manifest and the benchmark).

    Attributes:
        substeps: substeps taken.
        iterations: pressure + divergence iterations summed over the substeps.
        pressure_iterations, drift_iterations: the two parts of ``iterations`` (velocity and
            drift solves).
        max_density_error: largest per-substep mean predicted compression / rho0.
        max_particle_density_error: largest per-particle predicted compression / rho0.
        min_time_step, max_time_step: smallest and largest substep in seconds.
        neighbour_seconds, density_seconds, solver_seconds: wall time in each stage.
        neighbour_rebuilds: Verlet-list rebuilds.
        retried_substeps: substeps taken again at half the step because a solve did not
            converge within ``max_iterations``.
        unconverged_substeps: substeps accepted unconverged (after ``MAX_STEP_HALVINGS``
            halvings, or at ``min_time_step``).
    """

    substeps: int = 0
    iterations: int = 0
    pressure_iterations: int = 0
    drift_iterations: int = 0
    max_density_error: float = 0.0
    max_particle_density_error: float = 0.0
    min_time_step: float = 0.0
    max_time_step: float = 0.0
    neighbour_seconds: float = 0.0
    density_seconds: float = 0.0
    solver_seconds: float = 0.0
    neighbour_rebuilds: int = 0
    retried_substeps: int = 0
    unconverged_substeps: int = 0


def _with_solver_arrays(state):
    arrays = dict(state.particle_arrays)
    changed = False
    for name in (KAPPA, DRIFT, PRESSURE):
        if name not in arrays or arrays[name].shape != (state.count,):
            arrays[name] = np.zeros(state.count)
            changed = True
    return dataclasses.replace(state, particle_arrays=arrays) if changed else state


def check_health(positions, velocities, ids, params, time_now) -> None:
    """Raise SolverError on NaN/inf or a particle faster than ``params.max_speed``."""
    finite = np.isfinite(positions).all(axis=1) & np.isfinite(velocities).all(axis=1)
    if not finite.all():
        bad = int(np.flatnonzero(~finite)[0])
        raise SolverError(
            f"SPH solver: particle id {int(ids[bad])} has a non-finite position or velocity at t = {time_now:.6g} s; "
            "the simulation blew up: lower solver.max_time_step or solver.cfl_factor, or check collider motion")
    if len(velocities):
        speed2 = np.einsum("ij,ij->i", velocities, velocities)
        fastest = int(np.argmax(speed2))
        speed = math.sqrt(float(speed2[fastest]))
        if speed > params.max_speed:
            raise SolverError(
                f"SPH solver: particle id {int(ids[fastest])} moves at {speed:.4g} m/s at t = {time_now:.6g} s, above "
                f"the {params.max_speed:.4g} m/s that solver.min_time_step = {params.min_time_step:g} s allows "
                f"(runaway velocity); lower solver.max_time_step or solver.cfl_factor, or check emitter speeds "
                "and collider motion")


class SphSolver:
    """The DFSPH reference solver behind ``--solver sph`` (Solver protocol, DEVELOPERS.md).

    Args:
        neighbour_skin: Verlet-list skin in metres (None: 0.25 H). Affects speed only.
    """

    name = "sph"

    def __init__(self, neighbour_skin=None):
        self._skin = neighbour_skin
        self._params = None
        self._world = None
        self._pairs = None

    def _params_for(self, world):
        if self._params is None or self._world is not world:
            self._params = params_from_world(world, self._skin)
            self._world = world
            self._pairs = SkinPairs(self._params.support_radius, self._params.neighbour_skin)
        return self._params

    def settings(self) -> dict:
        """Solver settings for the cache manifest (resolved once ``start`` or ``advance`` ran)."""
        out = {"method": "DFSPH (Bender & Koschier 2015), density error corrected by position (drift solve)",
               "kernel": "cubic spline, H = 2 * spacing",
               "boundary": "Akinci 2012 particles, pressure p_i/rho_i^2 only; constraints return particles to "
                           "the side they came from",
               "viscosity_model": "XSPH, walls and colliders no-slip",
               "neighbour_skin": self._skin}
        if self._params is not None:
            p = self._params
            out.update(support_radius=p.support_radius, particle_mass=p.particle_mass, viscosity=p.viscosity,
                       cfl_factor=p.cfl_factor, max_time_step=p.max_time_step, min_time_step=p.min_time_step,
                       density_tolerance=p.density_tolerance, divergence_tolerance=p.divergence_tolerance,
                       max_iterations=p.max_iterations, neighbour_skin=p.neighbour_skin)
        return out

    def start(self, world) -> "State":
        """Initial state (t = 0) of ``world``, settled to rest density, with zeroed warm-start arrays.

        Fill lattices next to walls start over-dense (a lattice point one spacing from a
        one-layer wall reads about 1.06 rho0, more in corners); ``settle_positions`` moves
        them to rest density before the first frame, so that correction is not counted as
        energy the solver made (it raised a dam break's potential energy by 0.45 %).
        """
        params = self._params_for(world)
        state = _with_solver_arrays(world.initial_state())
        positions = settle_positions(state.positions, world.boundary_at(0.0), params)
        return dataclasses.replace(state, positions=positions)

    def advance(self, state, world, t_end) -> tuple["State", StepStats]:
        """Integrate from ``state.time`` to exactly ``t_end`` seconds.

        Per substep: boundary at t, DFSPH substep, ``world.enforce_bounds``,
        ``world.emit`` over [t, t + dt).

        Returns:
            (State, StepStats).

        Raises:
            SolverError: t_end before state.time, NaN/inf, or runaway velocity.
        """
        params = self._params_for(world)
        state = _with_solver_arrays(state)
        t = float(state.time)
        t_end = float(t_end)
        if t_end < t:
            raise SolverError(f"SPH solver: asked to advance back in time from t = {t} s to {t_end} s; "
                              "frames must be baked in increasing order")
        totals = dict(substeps=0, pressure_iterations=0, drift_iterations=0, max_density_error=0.0,
                      max_particle_density_error=0.0, neighbour_seconds=0.0, density_seconds=0.0,
                      solver_seconds=0.0, retried_substeps=0, unconverged_substeps=0)
        steps = []
        rebuilds_before = self._pairs.rebuilds
        check_health(state.positions, state.velocities, state.ids, params, t)
        while t < t_end:
            dt_cfl, fastest = cfl_time_step(state.velocities, params)
            if dt_cfl < params.min_time_step:
                check_health(state.positions, state.velocities, state.ids, params, t)
            dt = substep_length(dt_cfl, t_end - t)
            boundary = world.boundary_at(t)
            for halvings in range(MAX_STEP_HALVINGS + 1):
                kappa = warm_start_kappa(state.particle_arrays[KAPPA], state.scalars.get(LAST_STEP, 0.0), dt)
                result = dfsph_substep(state.positions, state.velocities, kappa,
                                       state.particle_arrays[DRIFT], boundary, params, dt, self._pairs)
                totals["pressure_iterations"] += result.pressure_iterations
                totals["drift_iterations"] += result.drift_iterations
                if result.converged or halvings == MAX_STEP_HALVINGS or 0.5 * dt < params.min_time_step:
                    break
                totals["retried_substeps"] += 1
                dt *= 0.5
            totals["unconverged_substeps"] += 0 if result.converged else 1
            t_next = t + dt if dt < t_end - t else t_end
            check_health(result.positions, result.velocities, state.ids, params, t_next)
            before = state.positions
            arrays = dict(state.particle_arrays)
            arrays[KAPPA] = result.kappa
            arrays[DRIFT] = result.drift
            arrays[PRESSURE] = result.pressure
            state = dataclasses.replace(state, time=t_next, positions=result.positions,
                                        velocities=result.velocities, particle_arrays=arrays,
                                        scalars={**state.scalars, LAST_STEP: dt})
            state = world.enforce_bounds(state, previous=before)
            state = world.emit(state, t, t_next)
            state = _with_solver_arrays(state)
            totals["substeps"] += 1
            totals["max_density_error"] = max(totals["max_density_error"], result.density_error)
            totals["max_particle_density_error"] = max(totals["max_particle_density_error"],
                                                       result.max_density_error)
            totals["neighbour_seconds"] += result.seconds["neighbours"]
            totals["density_seconds"] += result.seconds["density"]
            totals["solver_seconds"] += result.seconds["solvers"]
            steps.append(dt)
            t = t_next
        stats = StepStats(iterations=totals["pressure_iterations"] + totals["drift_iterations"],
                          min_time_step=min(steps) if steps else 0.0, max_time_step=max(steps) if steps else 0.0,
                          neighbour_rebuilds=self._pairs.rebuilds - rebuilds_before, **totals)
        return state, stats

    def frame_attributes(self, state, world) -> dict:
        """Per-particle ``density`` (kg/m^3, SPH sum at the state's positions) and
        ``pressure`` (Pa, from the last substep; 0 for particles emitted since) for the cache."""
        params = self._params_for(world)
        density = sph_density(state.positions, world.boundary_at(state.time), params, self._pairs)
        pressure = state.particle_arrays.get(PRESSURE)
        if pressure is None or pressure.shape != (state.count,):
            pressure = np.zeros(state.count)
        return {"density": density, "pressure": np.array(pressure, np.float64)}
