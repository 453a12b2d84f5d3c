"""Fixed-radius neighbour search with scipy's cKDTree.

Conventions: a neighbour list is CSR-shaped. ``offsets`` has N + 1 entries and
``indices[offsets[i]:offsets[i + 1]]`` are the neighbours j of point i with
|x_i - x_j| < radius, sorted ascending, excluding i itself. Duplicate points
are neighbours of each other (distance 0 < radius).
"""

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree


@dataclass(frozen=True)
class NeighbourList:
    """Directed pairs (i, j) in CSR layout; see the module docstring."""

    offsets: np.ndarray  # (N + 1,) int64
    indices: np.ndarray  # (P,) int64, the j of each pair

    @property
    def rows(self):
        """(P,) int64: the i of each pair."""
        counts = np.diff(self.offsets)
        return np.repeat(np.arange(len(counts), dtype=np.int64), counts)

    @property
    def counts(self):
        return np.diff(self.offsets)


def _check_points(points, name):
    points = np.asarray(points, dtype=np.float64)
    if points.ndim != 2 or points.shape[1] != 3:
        raise ValueError(f"{name} must have shape (N, 3), got {points.shape}")
    if not np.all(np.isfinite(points)):
        bad = int(np.flatnonzero(~np.all(np.isfinite(points), axis=1))[0])
        raise ValueError(f"{name} row {bad} is not finite: {points[bad]}; remove NaN/inf positions")
    return points


def _to_csr(rows, cols, n):
    order = np.lexsort((cols, rows))
    rows, cols = rows[order], cols[order]
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n), out=offsets[1:])
    return NeighbourList(offsets=offsets, indices=cols.astype(np.int64))


def find_neighbours(points, radius):
    """All directed pairs within ``radius`` among ``points`` (self excluded).

    Args:
        points: (N, 3) float positions in metres; N may be 0.
        radius: search radius in metres, > 0.

    Returns:
        NeighbourList over the N points.
    """
    points = _check_points(points, "points")
    if radius <= 0:
        raise ValueError(f"radius must be > 0, got {radius}")
    n = len(points)
    if n == 0:
        return NeighbourList(np.zeros(1, np.int64), np.zeros(0, np.int64))
    # query_pairs uses r <= radius; shrink by one ulp-ish so the kernel support is open.
    pairs = cKDTree(points).query_pairs(radius * (1 - 1e-12), output_type="ndarray")
    rows = np.concatenate([pairs[:, 0], pairs[:, 1]]).astype(np.int64)
    cols = np.concatenate([pairs[:, 1], pairs[:, 0]]).astype(np.int64)
    return _to_csr(rows, cols, n)


def find_neighbours_between(points, others, radius, others_tree=None):
    """Pairs (i, k) with |points_i - others_k| < radius; i indexes ``points``.

    Used for fluid-to-boundary pairs. ``others_tree`` may be a prebuilt cKDTree
    of ``others`` (e.g. static colliders).
    """
    points = _check_points(points, "points")
    others = _check_points(others, "others")
    n = len(points)
    if n == 0 or len(others) == 0:
        return NeighbourList(np.zeros(n + 1, np.int64), np.zeros(0, np.int64))
    tree = others_tree if others_tree is not None else cKDTree(others)
    lists = cKDTree(points).query_ball_tree(tree, radius * (1 - 1e-12))
    counts = np.fromiter((len(x) for x in lists), dtype=np.int64, count=n)
    rows = np.repeat(np.arange(n, dtype=np.int64), counts)
    cols = np.fromiter((k for x in lists for k in x), dtype=np.int64, count=int(counts.sum()))
    return _to_csr(rows, cols, n)
