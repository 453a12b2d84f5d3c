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
    def rows(self) -> np.ndarray:
        """(P,) int64: the i of each pair."""
        counts = np.diff(self.offsets)
        return np.repeat(np.arange(len(counts), dtype=np.int64), counts)

    @property
    def counts(self) -> np.ndarray:
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


def find_neighbours(points, radius) -> NeighbourList:
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


def find_neighbours_between(points, others, radius, others_tree=None) -> NeighbourList:
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


def _sorted_pairs(pairs, n_cols):
    """Pairs (i, j) as two int64 arrays sorted by i, then j (a canonical order)."""
    if len(pairs) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    key = np.sort(pairs[:, 0].astype(np.int64) * n_cols + pairs[:, 1])
    return key // n_cols, key % n_cols


class SkinPairs:
    """Reusable candidate pair lists (a Verlet list with a skin) for one point set.

    Candidate pairs are searched with ``radius + skin`` and reused while no
    point has moved more than half the skin since the search (and, between
    sets, while the point and the other-set displacements together stay under
    the skin). Every call then filters the candidates to distances strictly
    below ``radius``. The candidates are kept sorted by (i, j), so the returned
    pairs are the same arrays, in the same order, whatever the rebuild history:
    results computed from them do not depend on when the list was rebuilt.

    This is a mutable handle (an optimisation cache); the pairs it returns are
    a pure function of the positions passed in.

    Args:
        radius: search radius in metres, > 0.
        skin: extra search distance in metres, >= 0 (0 searches every call).
    """

    def __init__(self, radius, skin):
        if radius <= 0:
            raise ValueError(f"radius must be > 0, got {radius}")
        if skin < 0:
            raise ValueError(f"skin must be >= 0, got {skin}")
        self.radius = float(radius)
        self.skin = float(skin)
        self.rebuilds = 0
        self._key = None
        self._reference = None
        self._candidates = None
        self._other_reference = None
        self._other_tree = None
        self._other_candidates = None

    def _needs_rebuild(self, points, key, others):
        if self._reference is None or len(points) != len(self._reference):
            return True
        if key is not None and (self._key is None or not np.array_equal(key, self._key)):
            return True
        moved = _max_displacement(points, self._reference)
        if 2.0 * moved > self.skin:
            return True
        if others is not None:
            if self._other_reference is None or len(others) != len(self._other_reference):
                return True
            if moved + _max_displacement(others, self._other_reference) > self.skin:
                return True
        return False

    def update(self, points, others=None, key=None) -> tuple[tuple, tuple | None]:
        """Pairs for the current positions.

        Args:
            points: (N, 3) float64 positions in metres.
            others: optional (B, 3) float64 positions of a second set.
            key: optional (N,) array identifying the points (e.g. particle ids);
                a change forces a new search.

        Returns:
            ``(i, j, offsets, distances)`` for pairs within the set (i < j,
            sorted by i then j; offsets = x_i - x_j, (P, 3)), and, when
            ``others`` is given, ``(i, k, offsets, distances)`` for pairs between
            the sets (sorted by i then k; offsets = x_i - others_k); else None.
        """
        points = np.asarray(points, np.float64)
        if others is not None:
            others = np.asarray(others, np.float64)
        if self._needs_rebuild(points, key, others):
            self._rebuild(points, others, key)
        inner = _filter(points, points, *self._candidates, self.radius)
        between = None
        if others is not None:
            between = _filter(points, others, *self._other_candidates, self.radius)
        return inner, between

    def _rebuild(self, points, others, key):
        self.rebuilds += 1
        search = self.radius + self.skin
        n = len(points)
        tree = cKDTree(points, balanced_tree=False, compact_nodes=False) if n else None
        if n > 1:
            pairs = tree.query_pairs(search, output_type="ndarray")
            self._candidates = _sorted_pairs(pairs, n)
        else:
            self._candidates = (np.zeros(0, np.int64), np.zeros(0, np.int64))
        self._reference = points.copy()
        self._key = None if key is None else np.array(key, copy=True)
        if others is not None:
            same = self._other_tree is not None and self._other_reference is not None and (
                len(others) == len(self._other_reference) and np.array_equal(others, self._other_reference))
            if not same:
                self._other_tree = cKDTree(others, balanced_tree=False, compact_nodes=False) if len(others) else None
            if n and self._other_tree is not None:
                records = tree.sparse_distance_matrix(self._other_tree, search, output_type="ndarray")
                pairs = np.stack([records["i"], records["j"]], axis=1)
                self._other_candidates = _sorted_pairs(pairs, len(others))
            else:
                self._other_candidates = (np.zeros(0, np.int64), np.zeros(0, np.int64))
            self._other_reference = others.copy()


def _max_displacement(points, reference):
    if len(points) == 0:
        return 0.0
    delta = points - reference
    return float(np.sqrt(np.max(np.einsum("ij,ij->i", delta, delta))))


def _filter(points, others, rows, cols, radius):
    """Candidates (rows, cols) reduced to |points_row - others_col| < radius, order kept.

    Offsets are computed per axis on contiguous copies (fast 1-D gathers) and
    returned as a (P, 3) view of a (3, P) array, so ``offsets[:, c]`` is contiguous.
    """
    count = len(rows)
    offsets = np.empty((3, count))
    for axis in range(3):
        np.subtract(np.ascontiguousarray(points[:, axis])[rows], np.ascontiguousarray(others[:, axis])[cols],
                    out=offsets[axis])
    dist2 = offsets[0] * offsets[0]
    dist2 += offsets[1] * offsets[1]
    dist2 += offsets[2] * offsets[2]
    keep = np.flatnonzero(dist2 < radius * radius * (1.0 - 1e-12) ** 2)
    return rows[keep], cols[keep], offsets[:, keep].T, np.sqrt(dist2[keep])
