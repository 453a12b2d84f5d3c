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


def gravity_rotation(gravity):
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

    def to_model_vectors(self, vectors):
        """World vectors (..., 3) -> gravity frame (no scaling)."""
        return np.asarray(vectors) @ self.rotation.T

    def to_world_vectors(self, vectors):
        return np.asarray(vectors) @ self.rotation


def fluid_neighbour_table(positions, radius, max_neighbours=48, first_guess=40, workers=2):
    """Dense padded table of fluid neighbours within ``radius`` (self excluded).

    Args:
        positions: (N, 3) float positions (any length unit).
        radius: search radius, same unit.
        max_neighbours: cap K; rows with more keep the nearest ``max_neighbours``.
        first_guess: k of the first k-NN query; rows that fill it are queried again up to the cap.

    Returns:
        index (N, K) int64 (padding = the row's own index), mask (N, K) float32,
        distances (N, K) float64 (padding = inf) and the number of rows that
        hit the cap (their farthest neighbours were dropped).
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    n = len(positions)
    if n == 0:
        return np.zeros((0, 1), np.int64), np.zeros((0, 1), np.float32), np.zeros((0, 1)), 0
    tree = cKDTree(positions)
    k = min(first_guess, max_neighbours) + 1
    distances, index = tree.query(positions, k=min(k, n), distance_upper_bound=radius * (1 - 1e-12), workers=workers)
    distances = np.asarray(distances).reshape(n, -1)
    index = np.asarray(index).reshape(n, -1)
    truncated = 0
    if index.shape[1] == k and k < max_neighbours + 1 and n > k:
        full = np.flatnonzero(index[:, -1] < n)
        if len(full):
            kk = min(max_neighbours + 1, n)
            d2, i2 = tree.query(positions[full], k=kk, distance_upper_bound=radius * (1 - 1e-12), workers=workers)
            pad = kk - index.shape[1]
            distances = np.concatenate([distances, np.full((n, pad), np.inf)], axis=1)
            index = np.concatenate([index, np.full((n, pad), n, np.int64)], axis=1)
            distances[full], index[full] = d2, i2
    rows = np.arange(n)[:, None]
    valid = (index < n) & (index != rows)
    if index.shape[1] == max_neighbours + 1:
        truncated = int(np.count_nonzero(valid.sum(axis=1) >= max_neighbours))
    # Drop self. The k-NN rows are sorted by distance with padding last, so self is column 0
    # unless a duplicate point shares distance 0 with it: then sort valid entries to the front.
    if index.shape[1] > 1 and np.array_equal(index[:, 0], rows[:, 0]):
        index, distances, valid = index[:, 1:], distances[:, 1:], valid[:, 1:]
    else:
        order = np.argsort(~valid, axis=1, kind="stable")
        index = np.take_along_axis(index, order, axis=1)
        distances = np.take_along_axis(distances, order, axis=1)
        valid = np.take_along_axis(valid, order, axis=1)
    width = max(int(valid.sum(axis=1).max()), 1)
    index, distances, valid = index[:, :width], distances[:, :width], valid[:, :width]
    index = np.where(valid, index, rows)
    distances = np.where(valid, distances, np.inf)
    return index.astype(np.int64, copy=False), valid.astype(np.float32), distances, truncated


def boundary_neighbour_table(positions, boundary_positions, radius, max_neighbours=32, workers=2, tree=None):
    """Nearest boundary particles within ``radius``: index (N, Kb) int64, mask (N, Kb) float32, distances.

    Padding entries have index 0 and mask 0 (and distance inf). With no
    boundary particles the table has width 1 and is all padding.
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    n, b = len(positions), len(boundary_positions)
    if n == 0 or b == 0:
        return np.zeros((n, 1), np.int64), np.zeros((n, 1), np.float32), np.full((n, 1), np.inf)
    tree = tree if tree is not None else cKDTree(boundary_positions)
    k = min(max_neighbours, b)
    distances, index = tree.query(positions, k=k, distance_upper_bound=radius * (1 - 1e-12), workers=workers)
    distances = np.asarray(distances).reshape(n, -1)
    index = np.asarray(index).reshape(n, -1)
    valid = index < b
    width = max(int(valid.sum(axis=1).max()), 1)
    index, distances, valid = index[:, :width], distances[:, :width], valid[:, :width]
    return np.where(valid, index, 0).astype(np.int64), valid.astype(np.float32), np.where(valid, distances, np.inf)


def density_ratio(fluid_distances, fluid_mask, boundary_distances, boundary_mask, boundary_volumes_per_d3, support,
                  boundary_rows=None):
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
        density_ratio (N,) float64, truncated_rows int.
    With no particle near a boundary, the boundary arrays hold one all-padding
    row for particle 0 (its wall message is then exactly zero) and every slot is 1.
    """

    __slots__ = ("node_features", "neighbour_index", "neighbour_mask", "edge_features", "boundary_rows",
                 "boundary_slot", "boundary_features", "boundary_mask", "boundary_index", "density_ratio",
                 "truncated_rows")

    def __init__(self, **values):
        for name in self.__slots__:
            setattr(self, name, values[name])

    def inputs(self):
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


def compact_boundary_rows(mask):
    """(rows, slot) for a boundary mask (N, Kb) whose real entries come first in each row.

    rows: (Nb,) int64 particles with a boundary neighbour; when none has one (and N > 0),
    [0], whose row is all padding, so the arrays never have zero rows;
    slot: (N,) int64 each particle's position in ``rows``, or Nb when it has none.
    """
    n = len(mask)
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    rows = np.flatnonzero(np.asarray(mask)[:, 0] > 0)
    slot = np.full(n, max(len(rows), 1), np.int64)
    if len(rows) == 0:
        return np.zeros(1, np.int64), slot
    slot[rows] = np.arange(len(rows))
    return rows.astype(np.int64), slot


def build_graph(positions, velocities, previous_velocities, boundary, units, radius_spacings,
                density_support_spacings=2.0, max_neighbours=48, max_boundary_neighbours=32, boundary_tree=None,
                *, step_froude):
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
    index, mask, distances, truncated = fluid_neighbour_table(x, search, max_neighbours)
    if boundary is not None and len(boundary.positions):
        bx = units.to_model_vectors(np.asarray(boundary.positions, np.float64)) / d
        bv = units.to_model_vectors(np.asarray(boundary.velocities, np.float64)) / vel
        bn = units.to_model_vectors(np.asarray(boundary.normals, np.float64))
        bvol = np.asarray(boundary.volumes, np.float64) / d**3
    else:
        bx = bv = bn = np.zeros((0, 3))
        bvol = np.zeros(0)
    bindex, bmask, bdist = boundary_neighbour_table(x, bx, search, max_boundary_neighbours, tree=boundary_tree)
    # Keep the boundary tables only for the particles that have a boundary neighbour.
    brows, bslot = compact_boundary_rows(bmask)
    bindex, bmask, bdist = bindex[brows], bmask[brows], bdist[brows]
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
    # Padding entries point at the particle itself, so their offsets are already zero; only
    # the distance column (inf there) and a wider density search need the mask.
    edge = np.empty(index.shape + (EDGE_FEATURES,), np.float32)
    np.subtract(np.take(x32, index, axis=0), x32[:, None, :], out=edge[..., 0:3])
    edge[..., 0:3] *= inverse_radius
    edge[..., 3] = np.where(mask > 0, distances * (1.0 / radius), 0.0)
    np.subtract(np.take(v32, index, axis=0), v32[:, None, :], out=edge[..., 4:7])
    if is_wider_search:
        edge *= mask[..., None]

    # Boundary rows (valid entries come first in each row).
    bfeat = np.zeros(bindex.shape + (BOUNDARY_FEATURES,), np.float32)
    if n and bmask.any():
        bx32 = (bx - centre).astype(np.float32)
        np.subtract(np.take(bx32, bindex, axis=0), x32[brows, None, :], out=bfeat[..., 0:3])
        bfeat[..., 0:3] *= inverse_radius
        bfeat[..., 3] = np.where(bmask > 0, bdist * (1.0 / radius), 0.0)
        bfeat[..., 4:7] = np.take(bn.astype(np.float32), bindex, axis=0)
        np.subtract(np.take(bv.astype(np.float32), bindex, axis=0), v32[brows, None, :], out=bfeat[..., 7:10])
        bfeat[..., 10] = bvol_pairs
        bfeat *= bmask[..., None]

    node = np.empty((n, NODE_FEATURES), np.float32)
    node[:, 0:3] = v
    node[:, 3:6] = v_prev
    node[:, 6] = rho - 1.0
    node[:, 7] = step_froude
    return Graph(node_features=node, neighbour_index=index, neighbour_mask=mask.astype(np.float32),
                 edge_features=edge, boundary_rows=brows, boundary_slot=bslot, boundary_features=bfeat,
                 boundary_mask=bmask.astype(np.float32), boundary_index=bindex, density_ratio=rho,
                 truncated_rows=truncated)


def normalise(graph, stats, in_place=False):
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
    def scaled(values, mean, std, mask=None):
        if in_place and values.dtype == np.float32:
            out = values
            out -= np.asarray(mean, np.float32)
        else:
            out = values - np.asarray(mean, np.float32)
        out /= np.asarray(std, np.float32)
        if mask is not None:
            out *= mask[..., None]
        return out.astype(np.float32, copy=False)

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


def acceleration_from_output(output, stats, units):
    """World-space acceleration (N, 3) m/s^2 from the core's normalised output (N, 3).

    a = gravity + g * R^T (output * target_std + target_mean), i.e. the core
    predicts the non-gravity part in units of g in the gravity frame.
    """
    non_gravity = np.asarray(output, np.float64) * np.asarray(stats["target_std"]) + np.asarray(stats["target_mean"])
    gravity_frame = non_gravity + np.array([0.0, 0.0, -1.0])
    return units.g * units.to_world_vectors(gravity_frame)


def target_from_accelerations(accelerations, units):
    """Inverse of ``acceleration_from_output`` before normalisation: (a - gravity) / g in the gravity frame."""
    return units.to_model_vectors(np.asarray(accelerations, np.float64)) / units.g - np.array([0.0, 0.0, -1.0])


def integrate(positions, velocities, accelerations, time_step):
    """Semi-implicit Euler: v' = v + dt a, x' = x + dt v'. Shapes (N, 3); SI units. Returns (x', v')."""
    new_velocities = np.asarray(velocities, np.float64) + time_step * np.asarray(accelerations, np.float64)
    return np.asarray(positions, np.float64) + time_step * new_velocities, new_velocities


def finite_difference_accelerations(previous_positions, positions, next_positions, time_step):
    """Accelerations consistent with ``integrate``: (x_{t+1} - 2 x_t + x_{t-1}) / dt^2, (N, 3)."""
    return (np.asarray(next_positions) - 2.0 * np.asarray(positions) + np.asarray(previous_positions)) / time_step**2
