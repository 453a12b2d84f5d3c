"""Features, normalisation and integration of the learned preview, in numpy.

The ONNX graph is only the learned core; everything it sees is built here,
and the same functions feed training (``training/``) and the run-time
stepper, so the two cannot drift apart.

Units (Froude similarity, physics-references.md section 7; Hughes 1993,
"Physical Models and Laboratory Techniques in Coastal Engineering", ch. 3):
lengths in particle spacings d, times in tau = sqrt(d / g), velocities in
sqrt(g d), accelerations in g, with g = |gravity|. A model trained at one
spacing then serves any scene scale as long as the learned step in tau stays
fixed.

Gravity frame: all vectors are rotated into a frame where gravity points
along -z (``gravity_rotation``), so the model never needs the gravity
direction as an input; its output is rotated back.

Graph (all translation and permutation invariant by construction: only
differences of positions enter, and every per-neighbour quantity is summed):
- fluid neighbours of particle i: other fluid particles with |x_j - x_i| < R,
  as a dense padded table ``neighbour_index`` (N, K) int64 with
  ``neighbour_mask`` (N, K) float32 (1 = real neighbour; padding points at i);
- boundary neighbours: boundary particles (walls, colliders; World.boundary_at)
  with |x_b - x_i| < R, as per-pair features only, held for the Nb particles
  that have any (``boundary_rows``; most particles have none): (Nb, Kb, F_b)
  with a mask, and ``boundary_slot`` (N,) giving each particle's row in those
  arrays, or Nb for none. The core computes wall messages for those rows only
  and gathers them back with the slot (a gather, no scatter).

Node features (F_node = 8): v_t, v_{t-1} (sqrt(g d)), SPH density ratio - 1
(cubic spline, H = 2 d = R, m = rho0 d^3, fluid + Akinci boundary term;
Monaghan 1992, ARA&A 30:543; Akinci et al. 2012, ACM TOG 31(4)), and the
learned step dt in sqrt(d/g) (the same for every particle): one model serves
a range of steps, so the stepper can take one step per frame at ordinary
frame rates instead of several.
Fluid edge features (F_edge = 7): (x_j - x_i)/R, |x_j - x_i|/R, (v_j - v_i)/sqrt(g d).
Boundary edge features (F_bnd = 11): (x_b - x_i)/R, |x_b - x_i|/R, boundary
normal n_b, (v_b - v_i)/sqrt(g d), V_b / d^3.

Output of the core: the non-gravity acceleration a - g over the next step
(of the given dt), in units of g, normalised by the contract's statistics.

Integration (semi-implicit Euler, as in Sanchez-Gonzalez et al. 2020,
"Learning to Simulate Complex Physics with Graph Networks", ICML):
v_{t+1} = v_t + dt a,  x_{t+1} = x_t + dt v_{t+1}.
"""

import numpy as np
from scipy.sparse import csr_matrix
from scipy.spatial import cKDTree

from ..kernels import kernel

FEATURE_VERSION = "splashdraft-graph-features-2"
NODE_FEATURES = 8
EDGE_FEATURES = 7
BOUNDARY_FEATURES = 11
HISTORY_LENGTH = 2  # velocities v_t and v_{t-1}

#: Column layout, used by the contract file and by tests.
NODE_FEATURE_NAMES = ("vx_t", "vy_t", "vz_t", "vx_prev", "vy_prev", "vz_prev", "density_ratio_minus_1", "step")
EDGE_FEATURE_NAMES = ("dx", "dy", "dz", "distance", "dvx", "dvy", "dvz")
BOUNDARY_FEATURE_NAMES = ("dx", "dy", "dz", "distance", "nx", "ny", "nz", "dvx", "dvy", "dvz", "volume")


def gravity_rotation(gravity) -> tuple[np.ndarray, float]:
    """Rotation matrix (3, 3) taking world vectors into the frame where gravity is along -z.

    Args:
        gravity: (3,) m/s^2, non-zero.

    Returns:
        (rotation, g) with rotation @ (gravity / g) == (0, 0, -1) and g = |gravity| in m/s^2.
        Uses Rodrigues' formula; the identity when gravity already points down.
    """
    gravity = np.asarray(gravity, np.float64).reshape(3)
    g = float(np.linalg.norm(gravity))
    if not g > 0:
        raise ValueError(f"gravity {gravity.tolist()} has zero length; the learned preview needs gravity")
    a = gravity / g
    b = np.array([0.0, 0.0, -1.0])
    v = np.cross(a, b)
    c = float(np.dot(a, b))
    if c > 1 - 1e-12:
        return np.eye(3), g
    if c < -1 + 1e-12:  # gravity points up: turn half a circle about x
        return np.diag([1.0, -1.0, -1.0]), g
    vx = np.array([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])
    return np.eye(3) + vx + vx @ vx / (1 + c), g


class Units:
    """Scene scale of the Froude units: spacing d (m), gravity g (m/s^2) and the gravity rotation."""

    def __init__(self, particle_spacing, gravity):
        self.spacing = float(particle_spacing)
        self.rotation, self.g = gravity_rotation(gravity)
        self.time = float(np.sqrt(self.spacing / self.g))  # tau, s
        self.velocity = float(np.sqrt(self.g * self.spacing))  # sqrt(g d), m/s

    def to_model_vectors(self, vectors) -> np.ndarray:
        """World vectors (..., 3) -> gravity frame (no scaling)."""
        return np.asarray(vectors) @ self.rotation.T

    def to_world_vectors(self, vectors) -> np.ndarray:
        return np.asarray(vectors) @ self.rotation


def neighbour_pairs(positions, radius, tree=None, max_neighbours=None) -> tuple[np.ndarray, np.ndarray]:
    """Every pair of points closer than ``radius``, each once: (first, second) int64 arrays with first < second.

    Args:
        positions: (N, 3) float positions (any length unit).
        radius: search radius, same unit (pairs at exactly ``radius`` are excluded).
        tree: optional ``cKDTree`` of ``positions``.
        max_neighbours: optional cap of the table the pairs are for (``fluid_neighbour_table``).
            In a crowded scene (a cell of side ``radius`` holding more than
            ``CROWDED_CELL_FACTOR * (cap + 1)`` points, far beyond any liquid's density) the pair
            count grows as the square of the crowding, so the pairs then come from a
            (cap + 1)-nearest query instead: each point's nearest ``cap`` neighbours, which is all
            the capped table keeps (rows over the cap may then be under-counted as truncated).

    One ``cKDTree.query_pairs`` call: about three times cheaper than a k-nearest query of every
    point (bench/profile_learned.py), and the pair list is what the neighbour table is packed from.
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    n = len(positions)
    if n < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    tree = cKDTree(positions) if tree is None else tree
    bound = radius * (1 - 1e-12)
    if max_neighbours is not None and _most_in_one_cell(positions, radius) > CROWDED_CELL_FACTOR * (max_neighbours + 1):
        k = min(int(max_neighbours) + 1, n)
        _, index = tree.query(positions, k=k, distance_upper_bound=bound)
        index = np.asarray(index).reshape(n, -1)
        rows = np.broadcast_to(np.arange(n)[:, None], index.shape)
        real = (index < n) & (index != rows)
        low, high = np.minimum(rows[real], index[real]), np.maximum(rows[real], index[real])
        unique = np.unique(low * n + high)
        return unique // n, unique % n
    pairs = tree.query_pairs(bound, output_type="ndarray").astype(np.int64, copy=False)
    return pairs[:, 0], pairs[:, 1]


#: See ``neighbour_pairs``: a cell of side R holds about 8 particles of a liquid at rest (2 d wide).
CROWDED_CELL_FACTOR = 2


def _most_in_one_cell(positions, size):
    """The largest number of points in one cubic cell of side ``size`` (hashed cells: never fewer)."""
    cells = np.floor(positions / size).astype(np.int64)
    key = cells[:, 0] * 73856093 ^ cells[:, 1] * 19349663 ^ cells[:, 2] * 83492791
    return int(np.unique(key, return_counts=True)[1].max())


def fluid_neighbour_table(positions, radius, max_neighbours=48, pairs=None) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Dense padded table of fluid neighbours within ``radius`` (self excluded).

    Args:
        positions: (N, 3) float positions (any length unit).
        radius: search radius, same unit.
        max_neighbours: cap K; rows with more keep the nearest ``max_neighbours``.
        pairs: optional (first, second) from ``neighbour_pairs`` at this radius (found here if not given).

    Returns:
        index (N, K) int64 (padding = the row's own index), mask (N, K) float32,
        distances (N, K) float64 (padding = inf) and the number of rows that
        had more than ``max_neighbours`` neighbours (their farthest were dropped).
        Real entries come first in each row; K is the fullest row's count. With no
        row over the cap the table is symmetric: j is in row i exactly when i is in row j.
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    first, second = neighbour_pairs(positions, radius, max_neighbours=max_neighbours) if pairs is None else pairs
    offsets = positions[second] - positions[first]
    distance = np.sqrt(np.einsum("pc,pc->p", offsets, offsets))
    return pair_table(first, second, len(positions), distance, max_neighbours)


def pair_table(first, second, count, distance=None, max_neighbours=None) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Pack a pair list into a dense padded table with each pair in both of its rows.

    Args:
        first, second: (P,) int pairs, each once; count: N, the number of rows.
        distance: optional (P,) pair distances (returned as a table, and used to keep
            the nearest in rows over the cap).
        max_neighbours: optional cap on the row length (needs ``distance``).

    Returns:
        index (N, K) int64 (padding = the row's own index), mask (N, K) float32,
        distances (N, K) float64 (padding = inf; all inf without ``distance``) and
        the number of rows over the cap.
    """
    n = int(count)
    if n == 0:
        return np.zeros((0, 1), np.int64), np.zeros((0, 1), np.float32), np.zeros((0, 1)), 0
    rows = np.concatenate([first, second]).astype(np.int64, copy=False)
    cols = np.concatenate([second, first]).astype(np.int64, copy=False)
    degree = np.bincount(rows, minlength=n)
    cap = int(degree.max(initial=0)) if max_neighbours is None else int(max_neighbours)
    truncated = int(np.count_nonzero(degree > cap))
    if distance is not None:
        distance = np.concatenate([distance, distance])
    # Group the directed pairs by row (slots counted from each row's start): a counting sort
    # through scipy's COO -> CSR conversion (about 1.5x faster than argsort at 1.3M pairs), which
    # also orders each row by column. Rows over the cap are ordered by distance instead, so that
    # the nearest are kept.
    if truncated:
        order = np.lexsort((distance, rows))
    else:
        # (Entries are numbered from 1: an explicit zero could be dropped by a future scipy.)
        order = csr_matrix((np.arange(1, len(rows) + 1), (rows, cols)), shape=(n, n)).data - 1
    rows, cols = rows[order], cols[order]
    slot = np.arange(len(rows)) - (np.cumsum(degree) - degree)[rows]
    kept = slot < cap if truncated else slice(None)
    width = max(min(int(degree.max(initial=0)), cap), 1)
    flat = rows[kept] * width + slot[kept]
    index = np.repeat(np.arange(n, dtype=np.int64)[:, None], width, axis=1)
    index.ravel()[flat] = cols[kept]
    mask = np.zeros((n, width), np.float32)
    mask.ravel()[flat] = 1.0
    distances = np.full((n, width), np.inf)
    if distance is not None:
        distances.ravel()[flat] = distance[order][kept]
    return index, mask, distances, truncated


def symmetric_table(neighbour_index, neighbour_mask) -> tuple[np.ndarray, np.ndarray]:
    """A table with each pair of ``neighbour_index`` in both of its rows: (index, mask).

    For a table whose capped rows dropped some neighbours (``fluid_neighbour_table``), the pairs
    (i, j) with j > i in row i are kept, as the density relaxation used them before it took
    symmetric tables; a symmetric table comes back unchanged (up to the order within rows).
    """
    index = np.asarray(neighbour_index)
    rows = np.arange(len(index))[:, None]
    real = (np.asarray(neighbour_mask) > 0) & (index > rows)
    first = np.broadcast_to(rows, real.shape)[real]
    index, mask, _, _ = pair_table(first, index[real], len(index))
    return index, mask


def boundary_neighbour_rows(positions, boundary_positions, radius, max_neighbours=32, tree=None, boundary_tree=None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Boundary neighbours within ``radius`` for the particles that have any, nearest first.

    Args:
        positions: (N, 3) fluid positions; boundary_positions: (B, 3), same unit.
        radius: search radius; max_neighbours: cap Kb (the nearest are kept).
        tree, boundary_tree: optional ``cKDTree`` of each.

    Returns:
        rows (Nb,) int64 particles with a boundary neighbour (ascending), index (Nb, Kb) int64
        (rows of ``boundary_positions``; padding 0), mask (Nb, Kb) float32 and distances (Nb, Kb)
        float64 (padding inf). Kb is the fullest row's count (at least 1); Nb may be 0.
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    boundary_positions = np.asarray(boundary_positions, np.float64).reshape(-1, 3)
    if len(positions) == 0 or len(boundary_positions) == 0:
        return np.zeros(0, np.int64), np.zeros((0, 1), np.int64), np.zeros((0, 1), np.float32), np.zeros((0, 1))
    tree = cKDTree(positions) if tree is None else tree
    boundary_tree = cKDTree(boundary_positions) if boundary_tree is None else boundary_tree
    found = tree.sparse_distance_matrix(boundary_tree, radius * (1 - 1e-12), output_type="ndarray")
    order = np.lexsort((found["v"], found["i"]))
    owner, column, distance = found["i"][order].astype(np.int64), found["j"][order].astype(np.int64), found["v"][order]
    rows, first, counts = np.unique(owner, return_index=True, return_counts=True)
    position = np.repeat(np.arange(len(rows)), counts)
    slot = np.arange(len(owner)) - first[position]
    kept = slot < max_neighbours
    width = max(min(int(counts.max(initial=0)), max_neighbours), 1)
    flat = position[kept] * width + slot[kept]
    index = np.zeros((len(rows), width), np.int64)
    index.ravel()[flat] = column[kept]
    mask = np.zeros((len(rows), width), np.float32)
    mask.ravel()[flat] = 1.0
    distances = np.full((len(rows), width), np.inf)
    distances.ravel()[flat] = distance[kept]
    return rows.astype(np.int64), index, mask, distances


def boundary_neighbour_table(positions, boundary_positions, radius, max_neighbours=32, tree=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Nearest boundary particles within ``radius``: index (N, Kb) int64, mask (N, Kb) float32, distances.

    The every-row form of ``boundary_neighbour_rows``: padding entries have index 0 and mask 0
    (and distance inf). With no boundary particles the table has width 1 and is all padding.
    """
    n = len(np.asarray(positions).reshape(-1, 3))
    rows, index, mask, distances = boundary_neighbour_rows(positions, boundary_positions, radius, max_neighbours,
                                                           boundary_tree=tree)
    full_index = np.zeros((n, index.shape[1]), np.int64)
    full_mask = np.zeros((n, index.shape[1]), np.float32)
    full_distances = np.full((n, index.shape[1]), np.inf)
    full_index[rows], full_mask[rows], full_distances[rows] = index, mask, distances
    return full_index, full_mask, full_distances


def density_ratio(fluid_distances, fluid_mask, boundary_distances, boundary_mask, boundary_volumes_per_d3, support,
                  boundary_rows=None) -> np.ndarray:
    """SPH density / rho0 from neighbour tables, in spacing units.

    rho_i / rho0 = sum_j W(r_ij) + W(0) + sum_b (V_b / d^3) W(r_ib), with
    distances in d, W the cubic spline of ``support`` H (in d) so m / rho0 = 1 d^3
    (Monaghan 1992; Akinci et al. 2012 boundary term).

    Args:
        fluid_distances, fluid_mask: (N, K) from ``fluid_neighbour_table`` (in d).
        boundary_distances, boundary_mask: (N, Kb) (in d), or (Nb, Kb) for ``boundary_rows``.
        boundary_volumes_per_d3: V_b / d^3 of each boundary neighbour, shaped like the mask.
        support: H in d.
        boundary_rows: optional (Nb,) particles the boundary tables belong to (default all).

    Returns:
        (N,) float64.
    """
    w0 = float(kernel(0.0, support))
    fluid = _masked_kernel_sum(fluid_distances, fluid_mask, support)
    wall = _masked_kernel_sum(boundary_distances, boundary_mask, support, boundary_volumes_per_d3)
    if boundary_rows is not None:
        wall = np.bincount(np.asarray(boundary_rows, np.int64), wall, minlength=len(fluid))
    return w0 + fluid + wall


def _masked_kernel_sum(distances, mask, support, weights=None):
    """Row sums of mask * weights * W(distances), evaluating W on the real entries only."""
    real = np.asarray(mask) > 0
    values = kernel(np.asarray(distances)[real], support)
    if weights is not None:
        values = values * np.asarray(weights)[real]
    rows = np.broadcast_to(np.arange(len(real))[:, None], real.shape)[real]
    return np.bincount(rows, values, minlength=len(real))


class Graph:
    """The inputs of the learned core for one step, plus what integration needs.

    Attributes (N particles, K fluid and Kb boundary neighbour slots, Nb >= 1
    rows with boundary neighbours), float32 unless noted:
        node_features (N, 8), neighbour_index (N, K) int64, neighbour_mask (N, K),
        edge_features (N, K, 7), boundary_rows (Nb,) int64, boundary_slot (N,) int64,
        boundary_features (Nb, Kb, 11), boundary_mask (Nb, Kb),
        boundary_index (Nb, Kb) int64 (rows of the boundary arrays; padding 0),
        density_ratio (N,) float64, truncated_rows int (rows over the cap; with none the
        fluid table is symmetric).
    With no particle near a boundary, the boundary arrays hold one all-padding
    row for particle 0 (its wall message is then exactly zero) and every slot is 1.
    """

    __slots__ = ("node_features", "neighbour_index", "neighbour_mask", "edge_features", "boundary_rows",
                 "boundary_slot", "boundary_features", "boundary_mask", "boundary_index", "density_ratio",
                 "truncated_rows")

    def __init__(self, **values):
        for name in self.__slots__:
            setattr(self, name, values[name])

    def inputs(self) -> dict:
        """The raw (unnormalised) core inputs as a dict keyed by ONNX input name."""
        return {
            "node_features": self.node_features,
            "neighbour_index": self.neighbour_index,
            "neighbour_mask": self.neighbour_mask,
            "edge_features": self.edge_features,
            "boundary_rows": self.boundary_rows,
            "boundary_slot": self.boundary_slot,
            "boundary_features": self.boundary_features,
            "boundary_mask": self.boundary_mask,
        }


def compact_boundary_rows(rows, count) -> tuple[np.ndarray, np.ndarray]:
    """(rows, slot) of the compact boundary layout for ``count`` particles.

    rows: (Nb,) int64 particles with a boundary neighbour (``boundary_neighbour_rows``); when
    none has one (and count > 0), [0], whose row is all padding, so the arrays never have zero rows;
    slot: (count,) int64 each particle's position in ``rows``, or Nb when it has none.
    """
    if count == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    rows = np.asarray(rows, np.int64)
    slot = np.full(count, max(len(rows), 1), np.int64)
    if len(rows) == 0:
        return np.zeros(1, np.int64), slot
    slot[rows] = np.arange(len(rows))
    return rows, slot


def build_graph(positions, velocities, previous_velocities, boundary, units, radius_spacings,
                density_support_spacings=2.0, max_neighbours=48, max_boundary_neighbours=32, boundary_tree=None,
                *, step_froude) -> Graph:
    """Build the core's inputs from world-space arrays (see the module docstring).

    Args:
        positions: (N, 3) m. velocities, previous_velocities: (N, 3) m/s (v_t, v_{t-1}).
        boundary: object with ``positions`` (B, 3) m, ``velocities`` (B, 3) m/s,
            ``normals`` (B, 3) and ``volumes`` (B,) m^3 (World.boundary_at), or None.
        units: ``Units`` of the scene.
        radius_spacings: connectivity radius R in d.
        density_support_spacings: H of the density feature in d.
        step_froude: the learned step dt in sqrt(d/g) (node feature).

    Returns:
        Graph (unnormalised features).
    """
    d, vel = units.spacing, units.velocity
    x = units.to_model_vectors(np.asarray(positions, np.float64).reshape(-1, 3)) / d
    v = units.to_model_vectors(np.asarray(velocities, np.float64).reshape(-1, 3)) / vel
    v_prev = units.to_model_vectors(np.asarray(previous_velocities, np.float64).reshape(-1, 3)) / vel
    n = len(x)
    radius = float(radius_spacings)
    search = max(radius, float(density_support_spacings))
    tree = cKDTree(x) if n else None
    pairs = neighbour_pairs(x, search, tree, max_neighbours)
    index, mask, distances, truncated = fluid_neighbour_table(x, search, max_neighbours, pairs)
    if boundary is not None and len(boundary.positions):
        bx = units.to_model_vectors(np.asarray(boundary.positions, np.float64)) / d
        bv = units.to_model_vectors(np.asarray(boundary.velocities, np.float64)) / vel
        bn = units.to_model_vectors(np.asarray(boundary.normals, np.float64))
        bvol = np.asarray(boundary.volumes, np.float64) / d**3
    else:
        bx = bv = bn = np.zeros((0, 3))
        bvol = np.zeros(0)
    # Boundary tables only for the particles that have a boundary neighbour.
    brows, bindex, bmask, bdist = boundary_neighbour_rows(x, bx, search, max_boundary_neighbours, tree, boundary_tree)
    if len(brows) == 0 and n:  # one all-padding row (compact_boundary_rows)
        bindex, bmask, bdist = np.zeros((1, 1), np.int64), np.zeros((1, 1), np.float32), np.full((1, 1), np.inf)
    brows, bslot = compact_boundary_rows(brows, n)
    bvol_pairs = bvol[bindex] if len(bvol) else np.zeros(bindex.shape)
    rho = density_ratio(distances, mask, bdist, bmask, bvol_pairs, float(density_support_spacings), brows)
    is_wider_search = search > radius
    if is_wider_search:  # the density used a wider search; the graph keeps only r < R
        mask = mask * (distances < radius)
        bmask = bmask * (bdist < radius)

    # The (N, K, .) arrays are built in float32 (memory and time); positions are first taken
    # relative to their centre so float32 keeps offsets to ~1e-6 d even in large scenes.
    centre = x.mean(axis=0) if n else np.zeros(3)
    x32 = (x - centre).astype(np.float32)
    v32 = v.astype(np.float32)
    inverse_radius = np.float32(1.0 / radius)
    # Each particle's row of gathered quantities (x, 0, v); an edge is the neighbour's row minus
    # its own. Padding entries point at the particle itself, so their offsets are already zero;
    # only the distance column (inf there) and a wider density search need the mask.
    own = np.zeros((n, EDGE_FEATURES), np.float32)
    own[:, 0:3], own[:, 4:7] = x32, v32
    edge = _gathered_minus_own(own, index, own)
    _scale_columns(edge, [inverse_radius] * 3 + [1.0] * 4)
    edge[..., 3] = np.where(mask > 0, distances * (1.0 / radius), 0.0)
    if is_wider_search:
        _mask_entries(edge, mask)

    # Boundary rows (valid entries come first in each row): the boundary particle's row
    # (x_b, 0, n_b, v_b, V_b / d^3) minus the fluid particle's (x_i, 0, 0, v_i, 0).
    if n and bmask.any():
        table = np.zeros((len(bx), BOUNDARY_FEATURES), np.float32)
        table[:, 0:3], table[:, 4:7], table[:, 7:10], table[:, 10] = bx - centre, bn, bv, bvol
        receiver = np.zeros((len(brows), BOUNDARY_FEATURES), np.float32)
        receiver[:, 0:3], receiver[:, 7:10] = x32[brows], v32[brows]
        bfeat = _gathered_minus_own(table, bindex, receiver)
        _scale_columns(bfeat, [inverse_radius] * 3 + [1.0] * 8)
        bfeat[..., 3] = np.where(bmask > 0, bdist * (1.0 / radius), 0.0)
        _mask_entries(bfeat, bmask)
    else:
        bfeat = np.zeros(bindex.shape + (BOUNDARY_FEATURES,), np.float32)

    node = np.empty((n, NODE_FEATURES), np.float32)
    node[:, 0:3] = v
    node[:, 3:6] = v_prev
    node[:, 6] = rho - 1.0
    node[:, 7] = step_froude
    return Graph(node_features=node, neighbour_index=index, neighbour_mask=mask.astype(np.float32),
                 edge_features=edge, boundary_rows=brows, boundary_slot=bslot, boundary_features=bfeat,
                 boundary_mask=bmask.astype(np.float32), boundary_index=bindex, density_ratio=rho,
                 truncated_rows=truncated)


# The (rows, K, C) feature arrays are updated through (rows, K * C) views with per-column vectors
# tiled K times: every numpy pass then runs over long contiguous rows. Broadcasting over the
# C-wide last axis instead does the same arithmetic (bit for bit) about twice as slowly
# (bench/profile_learned.py, DEVELOPERS.md "Learned stepper notes"). Per-row operands are made
# for ``ROW_CHUNK`` rows at a time, so the temporaries stay small (and in cache).
ROW_CHUNK = 2048


def _gathered_minus_own(table, index, own) -> np.ndarray:
    """(R, K, C) float32 ``table[index] - own[:, None]``; table (M, C), index (R, K), own (R, C)."""
    out = np.take(table, index, axis=0)
    flat = _flat(out)
    for start in range(0, len(flat), ROW_CHUNK):
        rows = slice(start, start + ROW_CHUNK)
        flat[rows] -= np.tile(own[rows], (1, index.shape[1]))
    return out


def _scale_columns(values, factors) -> None:
    """values (R, K, C) float32 *= factors (C,), in place."""
    _flat(values)[...] *= np.tile(np.asarray(factors, np.float32), values.shape[1])


def _mask_entries(values, mask) -> None:
    """values (R, K, C) *= mask (R, K) for every column, in place."""
    flat, mask = _flat(values), np.asarray(mask, values.dtype)
    for start in range(0, len(flat), ROW_CHUNK):
        rows = slice(start, start + ROW_CHUNK)
        flat[rows] *= np.repeat(mask[rows], values.shape[2], axis=1)


def _flat(values) -> np.ndarray:
    """A (R, K * C) view of a C-contiguous (R, K, C) array (a (R, C) array as it is)."""
    return values.reshape(values.shape[0], int(np.prod(values.shape[1:])))


def normalise(graph, stats, in_place=False) -> dict:
    """Core inputs normalised with the contract's statistics: (value - mean) / std per feature column.

    Padding entries stay exactly zero (the mask multiplies them out), so the
    sum over neighbours does not depend on K.

    Args:
        graph: Graph from ``build_graph``.
        stats: dict with ``node_mean``/``node_std`` (7,), ``edge_mean``/``edge_std`` (7,),
            ``boundary_mean``/``boundary_std`` (11,). The step column's std may be
            1 (a model trained at one step): it is then only centred.
        in_place: normalise the graph's float32 feature arrays in place (no copies; the
            stepper uses this, the graph's features are not needed afterwards).

    Returns:
        dict of float32 / int64 arrays keyed by ONNX input name.
    """
    def scaled(values, mean, std, mask=None) -> np.ndarray:
        out = values if in_place and values.dtype == np.float32 else values.astype(np.float32)
        width = out.shape[1] if out.ndim == 3 else 1
        flat = _flat(out)  # see _gathered_minus_own
        flat -= np.tile(np.asarray(mean, np.float32), width)
        flat /= np.tile(np.asarray(std, np.float32), width)
        if mask is not None:
            _mask_entries(out, mask)
        return out

    return {
        "node_features": scaled(graph.node_features, stats["node_mean"], stats["node_std"]),
        "neighbour_index": graph.neighbour_index,
        "neighbour_mask": graph.neighbour_mask,
        "edge_features": scaled(graph.edge_features, stats["edge_mean"], stats["edge_std"], graph.neighbour_mask),
        "boundary_rows": graph.boundary_rows,
        "boundary_slot": graph.boundary_slot,
        "boundary_features": scaled(graph.boundary_features, stats["boundary_mean"], stats["boundary_std"],
                                    graph.boundary_mask),
        "boundary_mask": graph.boundary_mask,
    }


def acceleration_from_output(output, stats, units) -> np.ndarray:
    """World-space acceleration (N, 3) m/s^2 from the core's normalised output (N, 3).

    a = gravity + g * R^T (output * target_std + target_mean), i.e. the core
    predicts the non-gravity part in units of g in the gravity frame.
    """
    non_gravity = np.asarray(output, np.float64) * np.asarray(stats["target_std"]) + np.asarray(stats["target_mean"])
    gravity_frame = non_gravity + np.array([0.0, 0.0, -1.0])
    return units.g * units.to_world_vectors(gravity_frame)


def target_from_accelerations(accelerations, units) -> np.ndarray:
    """Inverse of ``acceleration_from_output`` before normalisation: (a - gravity) / g in the gravity frame."""
    return units.to_model_vectors(np.asarray(accelerations, np.float64)) / units.g - np.array([0.0, 0.0, -1.0])


def integrate(positions, velocities, accelerations, time_step) -> tuple[np.ndarray, np.ndarray]:
    """Semi-implicit Euler: v' = v + dt a, x' = x + dt v'. Shapes (N, 3); SI units. Returns (x', v')."""
    new_velocities = np.asarray(velocities, np.float64) + time_step * np.asarray(accelerations, np.float64)
    return np.asarray(positions, np.float64) + time_step * new_velocities, new_velocities


def finite_difference_accelerations(previous_positions, positions, next_positions, time_step) -> np.ndarray:
    """Accelerations consistent with ``integrate``: (x_{t+1} - 2 x_t + x_{t-1}) / dt^2, (N, 3)."""
    return (np.asarray(next_positions) - 2.0 * np.asarray(positions) + np.asarray(previous_positions)) / time_step**2
