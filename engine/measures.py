"""Measures of a particle cloud, shared by the solvers, ``compare``, training and the benchmarks.

- **Chamfer distance**, our convention: the symmetric *mean* nearest-neighbour
  distance, *unsquared*,

      CD(A, B) = 1/2 * ( mean_{a in A} min_{b in B} |a - b|  +  mean_{b in B} min_{a in A} |a - b| ).

  The measure goes back to Barrow, Tenenbaum, Bolles & Wolf 1977, "Parametric
  correspondence and chamfer matching", IJCAI; the point-cloud form is the one
  popularised by Fan, Su & Guibas 2017, "A Point Set Generation Network for 3D
  Object Reconstruction from a Single Image", CVPR, who sum *squared* distances.
  Conventions differ between papers (squared or not, sum or mean, halved or
  not), so compare numbers only within one convention. Two copies of the same
  cloud give 0; two lattices of one spacing shifted by s < d/2 give s.
- **SPH density** (Monaghan 1992, "Smoothed Particle Hydrodynamics", ARA&A
  30:543): rho_i = sum_j m W(|x_i - x_j|, H) over fluid particles (self
  included) plus rho0 * sum_b V_b W(|x_i - x_b|, H) over boundary particles
  (Akinci et al. 2012 volumes), with the cubic spline, H = 2 d and m = rho0 d^3.
- **Interior**: particles with at least ``FULL_SUPPORT_NEIGHBOURS`` fluid +
  boundary neighbours within H; free-surface particles have a truncated kernel
  support and read low by construction. In a disordered fluid the first layer
  under the surface still passes that count while its support is cut by the
  surface, so the **deep interior** keeps only interior particles whose fluid
  neighbours within H are all interior too (about one support below any surface).
- **Kinetic energy** 1/2 m sum |v|^2 and **potential energy** m g sum h (J),
  h the height above a datum (``engine.energy.height_datum``).
"""

import numpy as np
from scipy.spatial import cKDTree

from .kernels import kernel
from .particle_model import SUPPORT_SPACINGS, particle_mass, support_radius

#: Neighbours within H = 2 d (fluid + boundary, self excluded) for a particle to count as interior.
#: A full cubic-lattice neighbourhood has 26 (physics-references.md section 1); a flat free surface ~17.
FULL_SUPPORT_NEIGHBOURS = 22

#: Support radius of the density estimator, in particle spacings (the solvers' H).
DENSITY_SUPPORT_SPACINGS = SUPPORT_SPACINGS

#: Relative density band counted as "within tolerance".
DENSITY_BAND = 0.03


def chamfer_distance(points_a, points_b) -> tuple[float, float, float]:
    """Symmetric mean nearest-neighbour distance (unsquared), see the module docstring.

    Args:
        points_a: (Na, 3) float positions in metres.
        points_b: (Nb, 3) float positions in metres.

    Returns:
        (cd, mean_a_to_b, mean_b_to_a) in metres. Both empty -> zeros; exactly
        one empty -> inf.
    """
    a = np.asarray(points_a, np.float64).reshape(-1, 3)
    b = np.asarray(points_b, np.float64).reshape(-1, 3)
    if len(a) == 0 and len(b) == 0:
        return 0.0, 0.0, 0.0
    if len(a) == 0 or len(b) == 0:
        return float("inf"), float("inf"), float("inf")
    a_to_b = cKDTree(b).query(a, k=1, workers=2)[0].mean()
    b_to_a = cKDTree(a).query(b, k=1, workers=2)[0].mean()
    return 0.5 * (a_to_b + b_to_a), float(a_to_b), float(b_to_a)


def sph_density(positions, particle_spacing, rest_density, boundary_positions=None, boundary_volumes=None,
                with_pairs=False) -> tuple:
    """SPH density estimate and neighbour counts (see the module docstring).

    Args:
        positions: (N, 3) float fluid positions, m.
        particle_spacing: d in m; H = 2 d, m = rho0 d^3.
        rest_density: rho0 in kg/m^3.
        boundary_positions: optional (B, 3) boundary particle positions, m.
        boundary_volumes: optional (B,) Akinci volumes V_b, m^3.
        with_pairs: also return the fluid pairs within H.

    Returns:
        density (N,) float64 kg/m^3 and neighbour counts (N,) int64 (fluid +
        boundary within H, self excluded); with ``with_pairs``, also the fluid
        pairs within H ((P, 2) int, i < j).
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    n = len(positions)
    if n == 0:
        empty = (np.zeros(0), np.zeros(0, np.int64))
        return empty + (np.zeros((0, 2), np.int64),) if with_pairs else empty
    support = support_radius(particle_spacing)
    mass = particle_mass(rest_density, particle_spacing)
    tree = cKDTree(positions)
    pairs = tree.query_pairs(support * (1 - 1e-12), output_type="ndarray")
    w = kernel(np.linalg.norm(positions[pairs[:, 0]] - positions[pairs[:, 1]], axis=1), support)
    total = np.full(n, kernel(0.0, support))
    total += np.bincount(pairs[:, 0], w, n) + np.bincount(pairs[:, 1], w, n)
    counts = np.bincount(pairs[:, 0], minlength=n) + np.bincount(pairs[:, 1], minlength=n)
    density = mass * total
    if boundary_positions is not None and len(boundary_positions):
        bpos = np.asarray(boundary_positions, np.float64).reshape(-1, 3)
        bvol = np.asarray(boundary_volumes, np.float64).reshape(-1)
        sparse = tree.sparse_distance_matrix(cKDTree(bpos), support * (1 - 1e-12), output_type="ndarray")
        rows, cols, dist = sparse["i"], sparse["j"], sparse["v"]
        density += rest_density * np.bincount(rows, bvol[cols] * kernel(dist, support), n)
        counts = counts + np.bincount(rows, minlength=n)
    if with_pairs:
        return density, counts.astype(np.int64), pairs
    return density, counts.astype(np.int64)


def deep_interior(interior, pairs) -> np.ndarray:
    """(N,) bool: interior particles whose fluid neighbours (``pairs``, i < j) are all interior."""
    interior = np.asarray(interior, bool)
    n = len(interior)
    outer = (~interior).astype(np.int64)
    touches_outer = np.bincount(pairs[:, 0], outer[pairs[:, 1]], n) + np.bincount(pairs[:, 1], outer[pairs[:, 0]], n)
    return interior & (touches_outer == 0)


def interior_mask(counts) -> np.ndarray:
    """(N,) bool: particles with at least ``FULL_SUPPORT_NEIGHBOURS`` neighbours (``sph_density``'s counts)."""
    return np.asarray(counts) >= FULL_SUPPORT_NEIGHBOURS


def kinetic_energy(velocities, mass) -> float:
    """1/2 m sum |v|^2 in joules of particles of equal ``mass`` (kg). velocities: (N, 3) m/s."""
    v = np.asarray(velocities, np.float64).reshape(-1, 3)
    return 0.5 * mass * float(np.einsum("ij,ij->", v, v))


def potential_energy(positions, mass, gravity, datum) -> float:
    """m |g| sum h in joules, h = offset - down . x from ``datum`` = (down, offset) (``energy.height_datum``).

    positions: (N, 3) m; mass: kg per particle; gravity: (3,) m/s^2.
    """
    down, offset = datum
    g = float(np.linalg.norm(gravity))
    return mass * g * float(np.sum(offset - positions @ down)) if len(positions) else 0.0
