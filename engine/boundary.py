"""Boundary particles: Akinci et al. 2012 volumes and box-wall sampling.

Source: Akinci, Ihmsen, Akinci, Solenthaler & Teschner 2012, "Versatile
Rigid-Fluid Coupling for Incompressible SPH", ACM TOG 31(4). Each boundary
particle b gets the volume V_b = 1 / sum_k W(x_b - x_k) over the boundary
particles k (itself included), so unevenly sampled surfaces contribute evenly
(formula from memory, flagged [M] in the physics references; checked by the
hydrostatic tank test).
"""

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from .kernels import kernel

FACE_NAMES = ("x_min", "x_max", "y_min", "y_max", "z_min", "z_max")


@dataclass(frozen=True)
class BoundaryParticles:
    """Boundary particles at one moment (what ``World.boundary_at(t)`` provides).

    Attributes:
        positions: (B, 3) float64, metres.
        velocities: (B, 3) float64, m/s (non-zero on moving colliders).
        normals: (B, 3) float64 unit normals pointing into the fluid side.
        volumes: (B,) float64 Akinci volumes V_b in m^3 (``boundary_volumes``).
    """

    positions: np.ndarray
    velocities: np.ndarray
    normals: np.ndarray
    volumes: np.ndarray

    @property
    def count(self) -> int:
        return len(self.positions)


def make_boundary(points, normals, support_radius, velocities=None) -> BoundaryParticles:
    """BoundaryParticles for static (or given-velocity) samples, volumes computed here.

    Args:
        points: (B, 3) float positions in metres.
        normals: (B, 3) float unit normals.
        support_radius: kernel support H in metres.
        velocities: optional (B, 3) float m/s; zeros by default.
    """
    points = np.asarray(points, np.float64).reshape(-1, 3)
    normals = np.asarray(normals, np.float64).reshape(-1, 3)
    if velocities is None:
        velocities = np.zeros_like(points)
    return BoundaryParticles(points, np.asarray(velocities, np.float64).reshape(-1, 3), normals,
                             boundary_volumes(points, support_radius))


def empty_boundary() -> BoundaryParticles:
    """A BoundaryParticles with no particles."""
    zeros = np.zeros((0, 3))
    return BoundaryParticles(zeros, zeros, zeros, np.zeros(0))


def boundary_volumes(points, support_radius) -> np.ndarray:
    """Akinci 2012 volumes V_b = 1 / sum_k W_bk, in m^3.

    Args:
        points: (B, 3) float boundary particle positions in metres.
        support_radius: kernel support H in metres.

    Returns:
        (B,) float64 volumes.
    """
    points = np.asarray(points, np.float64).reshape(-1, 3)
    if len(points) == 0:
        return np.zeros(0)
    tree = cKDTree(points)
    pairs = tree.query_pairs(support_radius * (1 - 1e-12), output_type="ndarray")
    w = kernel(np.linalg.norm(points[pairs[:, 0]] - points[pairs[:, 1]], axis=1), support_radius)
    n = len(points)
    total = (np.full(n, float(kernel(0.0, support_radius)))
             + np.bincount(pairs[:, 0], weights=w, minlength=n)
             + np.bincount(pairs[:, 1], weights=w, minlength=n))
    return 1.0 / total


def sample_box_walls(lower, upper, spacing, faces=None, layers=1) -> tuple[np.ndarray, np.ndarray]:
    """Boundary particles on the inside faces of an axis-aligned box.

    Each face is sampled with a square-ish lattice that spans the face exactly
    (edge to edge), with the step along each axis the largest value <= spacing
    that divides the face length, so samples land on the edges and corners
    shared with neighbouring faces (those are kept once). Extra layers sit
    outside the face, one spacing apart, and extend ``layer`` rows past the
    edges so corners stay closed.

    Args:
        lower, upper: (3,) box corners in metres (lower < upper on every axis).
        spacing: sample spacing in metres (usually the fluid particle spacing).
        faces: face name -> "wall" | "open"; only walls are sampled. Default all walls.
        layers: number of sample layers, the first on the face, the rest outside it.

    Returns:
        points (B, 3) and inward unit normals (B, 3), float64.
    """
    lower = np.asarray(lower, np.float64)
    upper = np.asarray(upper, np.float64)
    if lower.shape != (3,) or upper.shape != (3,) or not np.all(upper > lower):
        raise ValueError(f"box corners must be 3-vectors with upper > lower, got {lower} and {upper}")
    if not spacing > 0:
        raise ValueError(f"spacing must be > 0, got {spacing}")
    faces = faces or {name: "wall" for name in FACE_NAMES}
    points, normals = [], []
    for axis in range(3):
        others = [a for a in range(3) if a != axis]
        for side, sign in ((0, 1.0), (1, -1.0)):
            name = FACE_NAMES[2 * axis + side]
            if faces.get(name, "wall") != "wall":
                continue
            plane = lower[axis] if side == 0 else upper[axis]
            for layer in range(layers):
                ranges = []
                for a in others:
                    count = max(1, int(np.ceil((upper[a] - lower[a]) / spacing - 1e-9)))
                    step = (upper[a] - lower[a]) / count
                    ranges.append(lower[a] + step * np.arange(-layer, count + layer + 1))
                grid_u, grid_v = np.meshgrid(*ranges, indexing="ij")
                p = np.empty((grid_u.size, 3))
                p[:, others[0]] = grid_u.ravel()
                p[:, others[1]] = grid_v.ravel()
                p[:, axis] = plane - sign * layer * spacing
                n = np.zeros_like(p)
                n[:, axis] = sign
                points.append(p)
                normals.append(n)
    if not points:
        return np.zeros((0, 3)), np.zeros((0, 3))
    points = np.concatenate(points)
    normals = np.concatenate(normals)
    _, first = np.unique(np.round(points / (spacing * 1e-3)).astype(np.int64), axis=0, return_index=True)
    first = np.sort(first)
    return points[first], normals[first]
