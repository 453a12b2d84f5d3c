"""Spray, foam and trapped-air measures of every liquid particle, from plain arrays.

One call per cached frame (``engine.bake`` writes them into every frame of both solvers):
``whitewater(positions, velocities, particle_spacing, boundary_positions)`` returns

- ``zone`` (N,) int8: 0 interior, 1 surface, 2 spray.
  *Spray*: fewer than ``SPRAY_NEIGHBOURS`` = 6 fluid neighbours within H (the neighbour count
  below which Ihmsen et al. 2012 class a secondary particle as spray; applied here to the liquid
  particles themselves). *Interior*: at least ``INTERIOR_NEIGHBOURS`` = 22 fluid and boundary
  neighbours within H (a full cubic-lattice neighbourhood within H = 2 d holds 26, a flat free
  surface about 17; the same count as ``engine.measures.FULL_SUPPORT_NEIGHBOURS``, so a particle
  resting on a wall is interior). *Surface*: the rest.
- ``trapped_air`` (N,) float in [0, 1]: the trapped-air potential, clamped (below).
- ``wave_crest`` (N,) float in [0, 1]: the wave-crest potential, clamped.
- ``foam`` (N,) float in [0, 1]: the kinetic-energy potential times the sum of the two above,
  capped at 1, i.e. the generation rate n_d = I_k (k_ta I_ta + k_wc I_wc) dt of Ihmsen et al.
  with k_ta = k_wc = 1 per unit time, clamped. A shader reads it as "how much white water".

Formulas: Ihmsen, Akinci, Akinci & Teschner 2012, "Unified spray, foam and bubbles for
particle-based fluids", The Visual Computer 28 (forms from memory, see
docs/physics-references.md). With x_ij = x_i - x_j, v_ij = v_i - v_j, hats for unit vectors and
the radially symmetric weight w(r) = 1 - r / H (r <= H, else 0):

    trapped air   I_ta = sum_j |v_ij| (1 - v^_ij . x^_ij) w(|x_ij|)
    wave crest    I_wc = kappa_i * [v^_i . n^_i >= 0.6],
                  kappa_i = sum_j (1 - n^_i . n^_j) w(|x_ij|)   over j with x^_ji . n^_i < 0
    kinetic       I_k  = |v_i|^2 / 2
    clamp         Phi(I, lo, hi) = (min(I, hi) - min(I, lo)) / (hi - lo)

n_i is the outward surface normal, -sum_j d^3 grad W(x_ij) (cubic spline, ``engine.kernels``),
normalised. Curvature is summed over surface and spray neighbours only (our restriction): an
interior particle's normal is zero by symmetry and would count as fully bent.

Units (our choice, so one set of thresholds serves every particle spacing): velocities are
measured in u = sqrt(g0 d) (g0 standard gravity, d the spacing) and the kinetic energy per unit
mass in g0 d, i.e. as the fall height in spacings that would give that speed.

Clamp ranges: the paper tunes them per scene (its examples, from memory: trapped air 5..20,
wave crest 2..8, kinetic energy 5..50, in its own units). In our units those left the demo
shot's splash (4 cm spacing, reference solver, 2026-12-04) with foam of at most 0.16 on any
particle. Ours are chosen from that splash's measured spread, so a shader sees the energetic
few per cent: trapped air 2..10 (about its median to its 99th percentile), wave crest 0.5..3
(its 99th percentile is about 1), kinetic energy 1..10 fall-height spacings (median about 1,
99th percentile 8-15). They are look settings, not physics.
"""

import numpy as np
from scipy.spatial import cKDTree

from .kernels import kernel_terms
from .measures import FULL_SUPPORT_NEIGHBOURS
from .particle_model import SUPPORT_SPACINGS, support_radius  # noqa: F401 (SUPPORT_SPACINGS: H in spacings)

SPRAY_NEIGHBOURS = 6
INTERIOR_NEIGHBOURS = FULL_SUPPORT_NEIGHBOURS
#: Clamp ranges (lo, hi) of the potentials in the Froude units above (ours; see the module docstring).
TRAPPED_AIR_RANGE = (2.0, 10.0)
WAVE_CREST_RANGE = (0.5, 3.0)
KINETIC_RANGE = (1.0, 10.0)
#: Smallest cosine between a particle's velocity and its normal for it to count as a moving crest.
CREST_ALIGNMENT = 0.6
STANDARD_GRAVITY = 9.80665

ZONE_INTERIOR, ZONE_SURFACE, ZONE_SPRAY = 0, 1, 2
#: Per-particle arrays of ``whitewater`` (and of every cache frame), in PLY order.
ATTRIBUTES = ("zone", "trapped_air", "wave_crest", "foam")


def clamp_potential(values, low, high) -> np.ndarray:
    """Phi(I, lo, hi) = (min(I, hi) - min(I, lo)) / (hi - lo): 0 below lo, 1 above hi, linear between."""
    values = np.asarray(values, np.float64)
    return (np.minimum(values, high) - np.minimum(values, low)) / (high - low)


def _neighbours_within(x, support, boundary_positions) -> tuple[np.ndarray, np.ndarray]:
    """(pairs, counts): fluid pairs closer than ``support`` ((P, 2), i < j) and each particle's fluid +
    boundary neighbours within it, the layout ``whitewater``'s ``neighbours`` argument takes."""
    pairs = cKDTree(x).query_pairs(support * (1 - 1e-12), output_type="ndarray")
    count = np.bincount(pairs[:, 0], minlength=len(x)) + np.bincount(pairs[:, 1], minlength=len(x))
    if boundary_positions is not None and len(boundary_positions):
        boundary = cKDTree(np.asarray(boundary_positions, np.float64).reshape(-1, 3))
        count += boundary.query_ball_point(x, support * (1 - 1e-12), return_length=True)
    return pairs, count


def whitewater(positions, velocities, particle_spacing, boundary_positions=None, neighbours=None) -> dict:
    """Zone and white-water potentials of each particle (see the module docstring).

    Args:
        positions: (N, 3) float, m. velocities: (N, 3) float, m/s.
        particle_spacing: d in m (> 0).
        boundary_positions: optional (B, 3) wall and collider particles, m; they count towards the
            interior test only.
        neighbours: optional (pairs, counts) already found at these positions, as
            ``engine.measures.sph_density(..., with_pairs=True)`` returns them: the fluid pairs
            within H ((P, 2) int, i < j) and each particle's fluid + boundary neighbours within H
            ((N,) int, of ``boundary_positions``). Saves this function's own search; the result
            is the same.

    Returns:
        dict of (N,) arrays: ``zone`` int8, ``trapped_air``, ``wave_crest``, ``foam`` float32,
        and the raw, unclamped ``raw_trapped_air``, ``raw_wave_crest``, ``raw_kinetic`` float64.
    """
    x = np.asarray(positions, np.float64).reshape(-1, 3)
    v = np.asarray(velocities, np.float64).reshape(-1, 3)
    n = len(x)
    d = float(particle_spacing)
    support = support_radius(d)
    if n == 0:
        empty = np.zeros(0, np.float32)
        return {"zone": np.zeros(0, np.int8), "trapped_air": empty, "wave_crest": empty, "foam": empty,
                "raw_trapped_air": np.zeros(0), "raw_wave_crest": np.zeros(0), "raw_kinetic": np.zeros(0)}
    unit = np.sqrt(STANDARD_GRAVITY * d)
    v = v / unit
    pairs, count = neighbours if neighbours is not None else _neighbours_within(x, support, boundary_positions)
    pairs = np.asarray(pairs).reshape(-1, 2)
    i, j = pairs[:, 0], pairs[:, 1]
    fluid_count = np.bincount(i, minlength=n) + np.bincount(j, minlength=n)
    count = np.asarray(count)
    zone = np.full(n, ZONE_SURFACE, np.int8)
    zone[count >= INTERIOR_NEIGHBOURS] = ZONE_INTERIOR
    zone[fluid_count < SPRAY_NEIGHBOURS] = ZONE_SPRAY

    offset = x[i] - x[j]  # x_ij
    distance = np.sqrt(np.einsum("ij,ij->i", offset, offset))
    weight = 1.0 - distance / support  # > 0: every pair is closer than H
    with np.errstate(invalid="ignore", divide="ignore"):
        direction = offset / distance[:, None]  # x^_ij (a coincident pair gets NaN, zeroed below)
    direction[distance == 0] = 0.0
    relative = v[i] - v[j]  # v_ij; the pair term is symmetric under i <-> j
    # |v_ij| (1 - v^_ij . x^_ij) = |v_ij| - v_ij . x^_ij
    term = (np.sqrt(np.einsum("ij,ij->i", relative, relative)) - np.einsum("ij,ij->i", relative, direction)) * weight
    trapped = np.bincount(i, term, n) + np.bincount(j, term, n)

    # Only surface and spray particles can be crests: their normals need the pairs that touch them,
    # their curvature the pairs between two of them.
    at_surface = zone != ZONE_INTERIOR
    touch = np.flatnonzero(at_surface[i] | at_surface[j])
    ti, tj = i[touch], j[touch]
    # Outward normals: n_i = -sum_j d^3 grad_i W(x_ij); grad_i W = f x_ij (kernel_terms).
    _, f = kernel_terms(distance[touch], support)
    gradient = (d**3 * f)[:, None] * offset[touch]
    normal = np.zeros((n, 3))
    for axis in range(3):
        normal[:, axis] = -np.bincount(ti, gradient[:, axis], n) + np.bincount(tj, gradient[:, axis], n)
    length = np.linalg.norm(normal, axis=1)
    unit_normal = np.where(length[:, None] > 1e-12, normal / np.maximum(length, 1e-300)[:, None], 0.0)
    both = np.flatnonzero(at_surface[i] & at_surface[j])
    bi, bj, bdirection = i[both], j[both], direction[both]
    bend = (1.0 - np.einsum("ij,ij->i", unit_normal[bi], unit_normal[bj])) * weight[both]
    # x^_ji . n^_i < 0: j lies behind i (convex side) seen from i; x_ji = -x_ij.
    behind_i = np.einsum("ij,ij->i", bdirection, unit_normal[bi]) > 0
    behind_j = np.einsum("ij,ij->i", bdirection, unit_normal[bj]) < 0
    curvature = np.bincount(bi, bend * behind_i, n) + np.bincount(bj, bend * behind_j, n)
    speed_i = np.linalg.norm(v, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        facing = np.einsum("ij,ij->i", v, unit_normal) / np.maximum(speed_i, 1e-300)
    crest = np.where(at_surface & (facing >= CREST_ALIGNMENT), curvature, 0.0)
    kinetic = 0.5 * speed_i**2

    trapped_air = clamp_potential(trapped, *TRAPPED_AIR_RANGE)
    wave_crest = clamp_potential(crest, *WAVE_CREST_RANGE)
    foam = clamp_potential(kinetic, *KINETIC_RANGE) * np.minimum(trapped_air + wave_crest, 1.0)
    return {"zone": zone, "trapped_air": trapped_air.astype(np.float32),
            "wave_crest": wave_crest.astype(np.float32), "foam": foam.astype(np.float32),
            "raw_trapped_air": trapped, "raw_wave_crest": crest, "raw_kinetic": kinetic}
