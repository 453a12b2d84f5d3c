"""The learned core on onnxruntime (CPU): session set-up, warm-up and tiling.

Session options follow the measurements in shared/docs/learned-surrogate.md:
2 intra-op threads, graph optimisation level ALL, the CPU memory arena on
(memory-pattern planning off: half the peak at the same speed),
sequential execution, and one or two warm-up calls before use (the first
calls are slow).

Tiling bounds memory on large scenes: receivers are split into spatially
compact tiles (sorted by a Morton code of their cell), and each tile is run
with its ``rounds``-hop neighbourhood (a halo). With R message-passing rounds
a receiver's output depends only on nodes at most R hops away, and a halo
node k hops out needs correct latents only up to round R - k, which its own
(k + 1)-hop neighbours -- all inside the set, or node-local at hop R --
provide. So the tiled result equals the untiled one up to float rounding
(tests/test_learned.py checks this).
"""

import os
from typing import TYPE_CHECKING

import numpy as np

from ..errors import ModelError
from .contract import INPUT_SPECS, OUTPUT_SPECS, RETRAIN_HINT

if TYPE_CHECKING:
    import onnxruntime

#: Padded neighbour slots (particles x table width) the core runs on in one call: graphs up to
#: this size run whole (fastest: no halo work). At 2M (50k particles, 36 wide) a learned step
#: peaked at 1.3 GB (bench/profile_learned.py, 2026-12-04).
MAX_CALL_SLOTS = 2_000_000
#: Larger graphs are split into the fewest equal tiles whose receivers hold at most this many
#: slots; each tile's call also holds its halo, about as many nodes again. At 100k particles
#: (36 wide, 5 tiles) a step peaked at 1.56 GB; with 1M (4 tiles) 1.8 GB; with the
#: 12,500-receiver tiles used before, the halos cost 1.4x the CPU time at 50k and 100k.
TILE_RECEIVER_SLOTS = 750_000
#: The stepper's default: tile by ``MAX_CALL_SLOTS`` and ``TILE_RECEIVER_SLOTS`` (a number fixes
#: the receivers per tile).
DEFAULT_TILE_PARTICLES = None
#: With a fixed tile size, graphs up to this many particles still run whole.
UNTILED_MAX_PARTICLES = 25000


def make_session(onnx_path, threads=2) -> "onnxruntime.InferenceSession":
    """An onnxruntime InferenceSession for the CPU; ModelError if the file is not a loadable model.

    onnxruntime 1.32 writes a device id and a telemetry database under ``~/.cache/Microsoft`` when
    it starts, unless ``ORT_DISABLE_TELEMETRY`` is set before it is first imported; it is set here
    (a caller's own value wins), so a bake writes nothing outside its output folder. A process that
    imported onnxruntime earlier without it keeps onnxruntime's default.
    """
    os.environ.setdefault("ORT_DISABLE_TELEMETRY", "1")
    import onnxruntime as ort

    options = ort.SessionOptions()
    options.intra_op_num_threads = int(threads)
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    # Memory-pattern planning keeps one pre-planned block per input shape; off, the arena serves
    # each tensor as it comes: same speed here, about half the peak (bench/profile_learned.py).
    options.enable_mem_pattern = False
    options.log_severity_level = 3
    try:
        session = ort.InferenceSession(os.fspath(onnx_path), sess_options=options, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises its own untyped errors for bad files
        raise ModelError(f"model file {onnx_path}: onnxruntime cannot load it ({exc}); {RETRAIN_HINT}") from exc
    names = [i.name for i in session.get_inputs()]
    expected = [name for name, _, _ in INPUT_SPECS]
    if names != expected:
        raise ModelError(f"model file {onnx_path}: inputs {names}, expected {expected}; {RETRAIN_HINT}")
    outputs = [o.name for o in session.get_outputs()]
    if outputs != [name for name, _, _ in OUTPUT_SPECS]:
        raise ModelError(f"model file {onnx_path}: outputs {outputs}, expected {[n for n, _, _ in OUTPUT_SPECS]}; {RETRAIN_HINT}")
    return session


def morton_order(points, cell) -> np.ndarray:
    """Permutation sorting points by the Morton (Z-order) code of their cell of size ``cell``."""
    points = np.asarray(points, np.float64)
    if len(points) == 0:
        return np.zeros(0, np.int64)
    cells = np.floor((points - points.min(axis=0)) / cell).astype(np.int64)
    cells = np.clip(cells, 0, (1 << 21) - 1).astype(np.uint64)
    code = np.zeros(len(points), np.uint64)
    for bit in range(21):
        for axis in range(3):
            code |= ((cells[:, axis] >> np.uint64(bit)) & np.uint64(1)) << np.uint64(3 * bit + axis)
    return np.argsort(code, kind="stable")


def halo_nodes(receivers, neighbour_index, rounds) -> np.ndarray:
    """Node list for one tile: the receivers first, then their <= ``rounds``-hop neighbours (sorted)."""
    inside = np.zeros(len(neighbour_index), bool)
    inside[receivers] = True
    frontier = receivers
    for _ in range(rounds):
        # Mark-and-scan (O(N) per round) instead of sorting the reached indices.
        reached = np.zeros(len(neighbour_index), bool)
        reached[neighbour_index[frontier].ravel()] = True
        reached &= ~inside
        frontier = np.flatnonzero(reached)
        inside |= reached
    halo = np.flatnonzero(inside)
    is_receiver = np.zeros(len(neighbour_index), bool)
    is_receiver[receivers] = True
    return np.concatenate([receivers, halo[~is_receiver[halo]]])


def subgraph(inputs, nodes) -> dict:
    """The core inputs restricted to ``nodes`` (indices into the full graph), neighbours re-indexed.

    Neighbours outside ``nodes`` are masked out (they can only belong to the
    outermost halo ring, whose output is discarded).
    """
    position = np.full(len(inputs["neighbour_index"]), -1, np.int64)
    position[nodes] = np.arange(len(nodes))
    index = position[inputs["neighbour_index"][nodes]]
    outside = index < 0
    mask = inputs["neighbour_mask"][nodes]
    edge = inputs["edge_features"][nodes]
    mask[outside] = 0.0  # both are copies (fancy indexing); only the few outside entries change
    edge[outside] = 0.0
    rows = np.arange(len(nodes))[:, None]
    # Boundary rows of the tile's nodes, in the compact layout (features.compact_boundary_rows).
    boundary_rows = inputs["boundary_rows"]
    kept = np.flatnonzero(position[boundary_rows] >= 0)
    slot = np.full(len(nodes), max(len(kept), 1), np.int64)
    if len(kept):
        tile_rows = position[boundary_rows[kept]]
        slot[tile_rows] = np.arange(len(kept))
        bfeat, bmask = inputs["boundary_features"][kept], inputs["boundary_mask"][kept]
    else:  # one all-padding row (its message is exactly zero; no slot points at it)
        tile_rows = np.zeros(1, np.int64)
        bfeat = np.zeros((1,) + inputs["boundary_features"].shape[1:], np.float32)
        bmask = np.zeros((1,) + inputs["boundary_mask"].shape[1:], np.float32)
    return {
        "node_features": inputs["node_features"][nodes],
        "neighbour_index": np.where(outside, rows, index).astype(np.int64, copy=False),
        "neighbour_mask": mask.astype(np.float32, copy=False),
        "edge_features": edge,
        "boundary_rows": tile_rows.astype(np.int64, copy=False),
        "boundary_slot": slot,
        "boundary_features": bfeat,
        "boundary_mask": bmask,
    }


def random_inputs(particles, neighbours, boundary_neighbours, seed=0, boundary_fraction=0.25) -> dict:
    """Core inputs of the contract's shapes on a random graph (for ``CoreRunner.warm_up``).

    The first ``boundary_fraction`` of the particles have boundary neighbours.
    """
    rng = np.random.default_rng(seed)
    n, k, kb = particles, neighbours, boundary_neighbours
    specs = {name: shape for name, _, shape in INPUT_SPECS}
    nb = max(1, int(round(boundary_fraction * n)))
    slot = np.full(n, nb, np.int64)
    slot[:nb] = np.arange(nb)
    return {
        "node_features": rng.standard_normal((n, specs["node_features"][1])).astype(np.float32),
        "neighbour_index": rng.integers(0, n, (n, k)).astype(np.int64),
        "neighbour_mask": np.ones((n, k), np.float32),
        "edge_features": rng.standard_normal((n, k, specs["edge_features"][2])).astype(np.float32),
        "boundary_rows": np.arange(nb, dtype=np.int64),
        "boundary_slot": slot,
        "boundary_features": rng.standard_normal((nb, kb, specs["boundary_features"][2])).astype(np.float32),
        "boundary_mask": np.ones((nb, kb), np.float32),
    }


class CoreRunner:
    """Runs the ONNX core on normalised inputs, tiling large graphs.

    Args:
        onnx_path: the model file (already checked against its contract).
        rounds: message-passing rounds of the model (from the contract).
        threads: onnxruntime intra-op threads.
        tile_particles: receivers per tile; 0 disables tiling; None (the default) sizes the
            tiles by ``max_call_slots``.
        untiled_max: with a fixed ``tile_particles``, graphs up to this many particles run whole.
        max_call_slots: with ``tile_particles`` None, the most padded neighbour slots
            (particles x table width) of one untiled call.
        tile_receiver_slots: with ``tile_particles`` None, the most slots of one tile's receivers.
    """

    def __init__(self, onnx_path, rounds, threads=2, tile_particles=DEFAULT_TILE_PARTICLES,
                 untiled_max=UNTILED_MAX_PARTICLES, max_call_slots=MAX_CALL_SLOTS,
                 tile_receiver_slots=TILE_RECEIVER_SLOTS):
        self.onnx_path = onnx_path
        self.rounds = int(rounds)
        self.tile_particles = None if tile_particles is None else int(tile_particles)
        self.untiled_max = max(int(untiled_max), self.tile_particles or 0)
        self.max_call_slots = int(max_call_slots)
        self.tile_receiver_slots = int(tile_receiver_slots)
        self.session = make_session(onnx_path, threads)

    def warm_up(self, particles=2000, neighbours=30, boundary_neighbours=8, seed=0) -> None:
        """Run the session twice on a random graph of the given size (first calls are slow)."""
        for _ in range(2):
            self._run(random_inputs(particles, neighbours, boundary_neighbours, seed))

    def _run(self, inputs):
        return self.session.run(None, inputs)[0]

    def tile_size(self, particles, width) -> int:
        """Receivers per call for a graph of ``particles`` rows ``width`` wide (``particles``: untiled)."""
        if self.tile_particles is not None:
            is_whole = self.tile_particles <= 0 or particles <= self.untiled_max
            return particles if is_whole else self.tile_particles
        slots = particles * max(width, 1)
        if slots <= self.max_call_slots:
            return particles
        tiles = -(-slots // self.tile_receiver_slots)
        return -(-particles // tiles)

    def run(self, inputs, positions=None, cell=None) -> np.ndarray:
        """Normalised core output (N, 3) float32 for normalised ``inputs``.

        ``positions`` (N, 3) and ``cell`` (same unit) order the tiles
        spatially; without them tiles follow the input order.
        """
        n = len(inputs["node_features"])
        if n == 0:
            return np.zeros((0, 3), np.float32)
        size = self.tile_size(n, inputs["neighbour_index"].shape[1])
        if size >= n:
            return self._run(inputs)
        order = morton_order(positions, cell) if positions is not None else np.arange(n)
        out = np.empty((n, 3), np.float32)
        for start in range(0, n, size):
            receivers = order[start:start + size]
            nodes = halo_nodes(receivers, inputs["neighbour_index"], self.rounds)
            out[receivers] = self._run(subgraph(inputs, nodes))[: len(receivers)]
        return out
