"""Neighbour search (engine.neighbours) against a brute-force O(N^2) oracle.

Source: the definition itself (pairs with |x_i - x_j| < radius); the oracle is
numpy broadcasting over all pairs (common practice, scipy.spatial's own tests do
the same). Exact set equality: no tolerance is needed.
"""

import numpy as np
import pytest

from engine.neighbours import SkinPairs, find_neighbours, find_neighbours_between


def brute_pairs(a, b, radius, same):
    d = np.linalg.norm(a[:, None, :] - b[None, :, :], axis=2)
    keep = d < radius * (1 - 1e-12)
    if same:
        np.fill_diagonal(keep, False)
    return {(int(i), int(j)) for i, j in zip(*np.nonzero(keep))}


def listed_pairs(nl):
    return {(int(i), int(j)) for i, j in zip(nl.rows, nl.indices)}


def test_find_neighbours_matches_brute_force():
    rng = np.random.default_rng(0)
    points = rng.uniform(0, 1, size=(300, 3))
    nl = find_neighbours(points, 0.15)
    assert listed_pairs(nl) == brute_pairs(points, points, 0.15, True)
    for i in range(len(points)):
        row = nl.indices[nl.offsets[i]:nl.offsets[i + 1]]
        assert np.all(np.diff(row) > 0)


def test_empty_and_duplicate_points():
    empty = find_neighbours(np.zeros((0, 3)), 0.1)
    assert empty.offsets.tolist() == [0] and len(empty.indices) == 0
    points = np.array([[0.0, 0, 0], [0.0, 0, 0], [1.0, 0, 0]])
    nl = find_neighbours(points, 0.5)
    assert listed_pairs(nl) == {(0, 1), (1, 0)}


def test_between_sets_matches_brute_force():
    rng = np.random.default_rng(1)
    a = rng.uniform(0, 1, size=(200, 3))
    b = rng.uniform(0, 1, size=(150, 3))
    nl = find_neighbours_between(a, b, 0.2)
    assert listed_pairs(nl) == brute_pairs(a, b, 0.2, False)
    assert len(find_neighbours_between(a, np.zeros((0, 3)), 0.2).indices) == 0


def test_bad_points_are_rejected():
    with pytest.raises(ValueError, match="row 1 is not finite"):
        find_neighbours(np.array([[0.0, 0, 0], [np.nan, 0, 0]]), 0.1)
    with pytest.raises(ValueError, match="shape"):
        find_neighbours(np.zeros((4, 2)), 0.1)


def test_skin_pairs_match_brute_force_while_points_move():
    """The Verlet list returns exactly the brute-force pairs (fluid and between sets) as
    points drift, in sorted order, and rebuilds only when the skin is used up."""
    rng = np.random.default_rng(2)
    points = rng.uniform(0, 1, size=(250, 3))
    others = rng.uniform(0, 1, size=(80, 3))
    radius, skin = 0.15, 0.05
    cache = SkinPairs(radius, skin)
    for step in range(12):
        (i, j, off, r), (bi, bk, boff, br) = cache.update(points, others)
        assert {(int(a), int(b)) for a, b in zip(i, j)} == {p for p in brute_pairs(points, points, radius, True)
                                                             if p[0] < p[1]}
        assert {(int(a), int(b)) for a, b in zip(bi, bk)} == brute_pairs(points, others, radius, False)
        assert np.all(np.diff(i * len(points) + j) > 0)
        np.testing.assert_allclose(off, points[i] - points[j])
        np.testing.assert_allclose(r, np.linalg.norm(points[i] - points[j], axis=1))
        points = points + rng.normal(0, 0.004, size=points.shape)
    assert 1 <= cache.rebuilds < 12
