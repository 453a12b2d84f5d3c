"""The compression-only Jacobi iteration of the DFSPH solves, run inside onnxruntime (float32).

An experiment behind issue 10, item 6: does a float32 iteration on padded neighbour
tables, several iterations per onnxruntime call, beat the float64 scipy sparse products
of ``engine.sph.PairOperators``? ``bench/bench_ort_jacobi.py`` measures it: it does not
(0.6-0.9x per substep at 20k and 50k, the bench's docstring has the figures and the
reason), so the solver does not use this module; it stays for the record and the test.

What runs where. ``JacobiTables.from_operators`` turns one substep's ``PairOperators``
into padded tables (host, numpy + scipy, paid every substep because the pairs change):

- ``neighbours`` (N, K) int32: row i lists every j with a pair (i, j) in both
  directions, ascending; empty slots hold i itself (with a zero gradient, so they add 0).
  The graph reads it flat with GatherElements (onnxruntime's Gather, one element per
  index, measured 5-12x slower than GatherElements on the same 20k x 32 index);
- ``gradients`` (3, N, K) float32: G_ij = m grad_i W_ij for the neighbour in that slot
  (G_ji = -G_ij, the antisymmetric operator ``PairOperators`` stores as U - U^T),
  component first so that every broadcast and sum in the graph runs over long
  contiguous spans (in an (N, K, 3) layout the broadcast Mul, over spans of 3 floats,
  took 6x the time; bench/bench_ort_jacobi.py's docstring lists the layouts tried);
- ``own`` (3, N) float32: S_i = sum_j G_ij + sum_b Psi_b grad W_ib.

Velocity-like arrays in the graph are (3, N) for the same reason.

``OrtJacobi.solve`` has the arguments and returns of ``engine.sph._jacobi_solve``. The
warm start and the density rate of the starting velocities stay on the float64 scipy
operators (one pressure term and one rate, as in ``_jacobi_solve``); onnxruntime then
iterates on the float32 *corrections* only: with dv the velocity change so far,

    q = max(base + dt (S_i . dv_i - sum_j G_ij . dv_j), 0),   base = rho_i + dt (D rho/Dt)_i(v) - floor_i
    dv_i -= S_i u_i + sum_j G_ij u_j,   u = (alpha / (dt rho)) q      (the pressure term)
    dkappa += (alpha / dt^2) q

which is ``_jacobi_solve``'s update (Bender & Koschier 2015, SCA, Jacobi with the DFSPH
factor alpha as the diagonal; compression-only increments as in engine/sph.py) rewritten
with the constants folded per particle. Keeping the float64 starting velocities and
kappa on the host and adding the float32 corrections at the end keeps the rounding at
float32 precision of the corrections, not of the velocities.

Stopping rule inside the graph: each unrolled iteration first evaluates
``_jacobi_solve``'s rule on the current compression (mean q / rho0 <= tolerance after
``min_iterations``, or ``max_iterations`` reached); once it says stop, every later
iteration of the call applies nothing (a 0/1 factor). The call returns the per-iteration
flags, so the host knows the exact count and calls again only if all of them were 1.
The mean compression is therefore checked every iteration, with no host round trip;
the price is up to ``iterations_per_call - 1`` wasted iterations in the last call.

Legend: N fluid particles, K the most neighbours of any particle (table width), P pairs
i < j, q compression (kg/m^3), alpha the DFSPH factor (m^5/kg), m particle mass (kg).
"""

import os
from typing import TYPE_CHECKING

import numpy as np
import onnxruntime as ort
import scipy.sparse as sparse

from .errors import SolverError

if TYPE_CHECKING:
    import onnx

#: Iterations unrolled into one onnxruntime call (the default of ``OrtJacobi``).
ITERATIONS_PER_CALL = 8

_OPSET = 17


def _padded_tables(count, i, j, grad):
    """(neighbours (N, K) int32, gradients (3, N, K) float32) from pairs i < j and G_ij (3 columns (P,)).

    Both directions of every pair go in: row i holds (j, G_ij), row j holds (i, -G_ij).
    scipy's CSR sum of the pair-number matrix and its transpose does the counting sort
    (rows ascending, neighbours ascending within a row) in C; a pair number p + 1 stored
    with a sign tells which direction an entry is.
    """
    n = count
    if len(i) == 0:
        return np.arange(n, dtype=np.int32)[:, None], np.zeros((3, n, 1), np.float32)
    number = np.arange(1, len(i) + 1, dtype=np.float64)
    upper = sparse.csr_matrix((number, j, np.concatenate([[0], np.cumsum(np.bincount(i, minlength=n))])),
                              shape=(n, n))
    both = (upper - upper.T).tocsr()
    both.sort_indices()
    counts = np.diff(both.indptr)
    width = max(1, int(counts.max()))
    rows = np.repeat(np.arange(n, dtype=np.int64), counts)
    flat = rows * width + (np.arange(len(rows), dtype=np.int64) - both.indptr[rows])
    neighbours = np.repeat(np.arange(n, dtype=np.int32), width)
    neighbours[flat] = both.indices
    signed = both.data
    pair = np.abs(signed).astype(np.int64) - 1
    sign = np.sign(signed)
    gradients = np.zeros((3, n * width), np.float32)
    for c in range(3):
        gradients[c, flat] = grad[c][pair] * sign
    return neighbours.reshape(n, width), gradients.reshape(3, n, width)


class JacobiTables:
    """One substep's padded tables and per-particle terms (module docstring), float32.

    Attributes:
        count: N.
        neighbours: (N, K) int32.
        gradients: (3, N, K) float32, kg/m^4.
        own: (3, N) float32, S_i in kg/m^4.
        alpha, density, boundary_rate: (N,) float64 (kept in float64 for the host terms).
        rest_density: rho0 in kg/m^3.
    """

    def __init__(self, count, i, j, gradients, own, alpha, density, boundary_rate, rest_density):
        """``gradients``: three (P,) columns of G_ij for the pairs i < j; ``own``: (N, 3) S_i."""
        self.count = int(count)
        self.neighbours, self.gradients = _padded_tables(self.count, np.asarray(i, np.int64),
                                                         np.asarray(j, np.int64), gradients)
        # GatherElements wants an index of the data's rank: one row per velocity component.
        self.neighbours_by_axis = np.tile(self.neighbours.reshape(1, -1), (3, 1))
        self.own = np.ascontiguousarray(np.asarray(own).T, np.float32)
        self.alpha = np.asarray(alpha, np.float64)
        self.density = np.asarray(density, np.float64)
        self.boundary_rate = np.asarray(boundary_rate, np.float64)
        self.rest_density = float(rest_density)

    @classmethod
    def from_operators(cls, ops) -> "JacobiTables":
        """Tables from an ``engine.sph.PairOperators`` (reads its pair lists and gradient columns).

        The upper-triangle CSR matrices hold m grad W_ij in pair order (pairs sorted by i,
        then j), so their ``data`` arrays are the gradient columns.
        """
        return cls(ops.count, ops._i, ops._j, [ops._upper[c].data for c in range(3)], ops._rate_sum, ops.alpha, ops.density,
                   ops.boundary_rate, ops.rest_density)

    @property
    def width(self) -> int:
        """K, the table width (most neighbours of any particle)."""
        return self.neighbours.shape[1]


def _require_onnx():
    """The ``onnx`` package, which builds the graph: a development dependency (requirements-train.txt),
    not one of the engine's run-time ones, so it is imported only here."""
    try:
        import onnx
        import onnx.checker
        import onnx.numpy_helper
    except ImportError as error:
        raise SolverError("ort_ops: building the Jacobi graph needs the onnx package, a development "
                          f"dependency ({error}); install it with pip install -r requirements-train.txt") from error
    return onnx


class _Graph:
    """A tiny node list builder: unique names, one helper per op."""

    def __init__(self, onnx):
        self.onnx = onnx
        self.nodes = []
        self.initializers = []
        self._count = 0

    def name(self, stem) -> str:
        self._count += 1
        return f"{stem}_{self._count}"

    def op(self, op_type, inputs, stem=None, **attributes) -> str:
        out = self.name(stem or op_type.lower())
        self.nodes.append(self.onnx.helper.make_node(op_type, list(inputs), [out], name=out, **attributes))
        return out

    def constant(self, stem, values, dtype=np.int64) -> str:
        name = self.name(stem)
        self.initializers.append(self.onnx.numpy_helper.from_array(np.asarray(values, dtype), name))
        return name


def _pair_sum_scalar(g, u, shapes, axis2):
    """(3, N) S_i u_i + sum_j G_ij u_j for a per-particle scalar u (N,)."""
    gathered = g.op("GatherElements", [u, "neighbours"], axis=0)  # (N K,)
    products = g.op("Reshape", [g.op("Mul", ["gradients", gathered]), shapes])  # (3, N, K)
    return g.op("Add", [g.op("Mul", ["own", u]), g.op("ReduceSum", [products, axis2], keepdims=0)])


def _rate(g, dv, shapes, axis0, axis2):
    """(N,) S_i . dv_i - sum_j G_ij . dv_j (the density rate of the correction, kg/(m^3 s))."""
    gathered = g.op("GatherElements", [dv, "neighbours_by_axis"], axis=1)  # (3, N K)
    products = g.op("Reshape", [g.op("Mul", ["gradients", gathered]), shapes])  # (3, N, K)
    others = g.op("ReduceSum", [products, axis2], keepdims=0)
    return g.op("ReduceSum", [g.op("Sub", [g.op("Mul", ["own", dv]), others]), axis0], keepdims=0)


def build_model(iterations) -> "onnx.ModelProto":
    """ONNX model of ``iterations`` unrolled Jacobi iterations on the corrections (module docstring).

    Inputs (N and K symbolic): dv (3, N), dkappa (N,), compression (N,) float32 (state);
    neighbours (N K,) and neighbours_by_axis (3, N K) int32 (the table, flat, and once per
    component), gradients (3, N K) (the table, flat), shape (3,) int64 = (3, N, K),
    own (3, N), base (N,),
    speed_scale (N,) = alpha / (dt rho), kappa_scale (N,) = alpha / dt^2, dt (1,),
    tolerance (1,) = mean compression in kg/m^3, iterations_done (1,), min_iterations (1,),
    max_iterations (1,) float32.
    Outputs: dv_out, dkappa_out, compression_out, applied (iterations,) 0/1 per iteration.

    Raises:
        SolverError: ``iterations`` < 1, or the onnx package is not installed.
    """
    if iterations < 1:
        raise SolverError(f"ort_ops.build_model: iterations must be >= 1, got {iterations!r}")
    onnx = _require_onnx()
    helper, TensorProto = onnx.helper, onnx.TensorProto
    f32 = TensorProto.FLOAT
    inputs = [helper.make_tensor_value_info("dv", f32, [3, "n"]),
              helper.make_tensor_value_info("dkappa", f32, ["n"]),
              helper.make_tensor_value_info("compression", f32, ["n"]),
              helper.make_tensor_value_info("neighbours", TensorProto.INT32, ["nk"]),
              helper.make_tensor_value_info("neighbours_by_axis", TensorProto.INT32, [3, "nk"]),
              helper.make_tensor_value_info("gradients", f32, [3, "nk"]),
              helper.make_tensor_value_info("shape", TensorProto.INT64, [3]),
              helper.make_tensor_value_info("own", f32, [3, "n"]),
              helper.make_tensor_value_info("base", f32, ["n"]),
              helper.make_tensor_value_info("speed_scale", f32, ["n"]),
              helper.make_tensor_value_info("kappa_scale", f32, ["n"])]
    inputs += [helper.make_tensor_value_info(name, f32, [1]) for name in
               ("dt", "tolerance", "iterations_done", "min_iterations", "max_iterations")]
    g = _Graph(onnx)
    axis0 = g.constant("axis0", [0])
    axis2 = g.constant("axis2", [2])
    dv, dkappa, q = "dv", "dkappa", "compression"
    going = None
    flags = []
    for t in range(iterations):
        index = g.op("Add", ["iterations_done", g.constant("t", [float(t)], np.float32)])
        mean = g.op("ReduceMean", [q], keepdims=1, axes=[0])
        keep_on = g.op("Or", [g.op("Less", [index, "min_iterations"]), g.op("Greater", [mean, "tolerance"])])
        step = g.op("And", [keep_on, g.op("Less", [index, "max_iterations"])])
        going = step if going is None else g.op("And", [going, step])
        flag = g.op("Cast", [going], to=f32)
        flags.append(flag)
        push = g.op("Mul", [q, flag])
        dkappa = g.op("Add", [dkappa, g.op("Mul", [push, "kappa_scale"])])
        u = g.op("Mul", [push, "speed_scale"])
        dv = g.op("Sub", [dv, _pair_sum_scalar(g, u, "shape", axis2)])
        rate = _rate(g, dv, "shape", axis0, axis2)
        q = g.op("Relu", [g.op("Add", ["base", g.op("Mul", [rate, "dt"])])])
    outputs = {"dv_out": dv, "dkappa_out": dkappa, "compression_out": q,
               "applied": g.op("Concat", flags, axis=0)}
    for name, source in outputs.items():
        g.nodes.append(helper.make_node("Identity", [source], [name], name=f"out_{name}"))
    shapes = {"dv_out": [3, "n"], "dkappa_out": ["n"], "compression_out": ["n"], "applied": [iterations]}
    graph = helper.make_graph(g.nodes, "splashdraft_jacobi", inputs,
                              [helper.make_tensor_value_info(k, f32, v) for k, v in shapes.items()],
                              initializer=g.initializers)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", _OPSET)],
                              producer_name="splashdraft.ort_ops")
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


class OrtJacobi:
    """An onnxruntime session running ``iterations_per_call`` Jacobi iterations per call.

    A handle (the session is expensive to make, build it once); ``solve`` takes one
    substep's ``PairOperators`` and ``JacobiTables``.

    Args:
        iterations_per_call: iterations unrolled into one call (>= 1).
        threads: intra-op threads (default: the machine's cores).
        allow_spinning: let idle onnxruntime threads spin between operators (onnxruntime's
            default). Off by default: on the shared 2-core machine the spinning threads
            competed with the caller and with other processes (20k block, one run
            2026-12-04: 0.95 us per particle-iteration spinning, 0.68 not).
    """

    def __init__(self, iterations_per_call=ITERATIONS_PER_CALL, threads=None, allow_spinning=False):
        self.iterations_per_call = int(iterations_per_call)
        options = ort.SessionOptions()
        options.add_session_config_entry("session.intra_op.allow_spinning", "1" if allow_spinning else "0")
        options.intra_op_num_threads = int(threads or os.cpu_count() or 1)
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        model = build_model(self.iterations_per_call)
        self.session = ort.InferenceSession(model.SerializeToString(), options, providers=["CPUExecutionProvider"])

    def solve(self, ops, tables, velocities, kappa, floor, dt, tolerance, min_iterations, max_iterations) -> tuple:
        """``engine.sph._jacobi_solve`` with the iterations in onnxruntime (float32 corrections).

        Args:
            ops: the substep's ``PairOperators`` (float64 warm start and starting rate).
            tables: ``JacobiTables`` of the same substep.
            velocities: (N, 3) float64 m/s; kappa: (N,) float64 warm start (m^2/s^2);
            floor: (N,) or scalar kg/m^3; dt: s; tolerance: mean compression / rho0;
            min_iterations, max_iterations: as in ``_jacobi_solve``.

        Returns:
            (velocities, kappa, iterations, error, worst, converged), as ``_jacobi_solve``.
        """
        density, rho0, n = tables.density, tables.rest_density, tables.count
        velocities = np.asarray(velocities, np.float64)
        kappa = np.asarray(kappa, np.float64)
        if np.any(kappa):
            velocities = velocities - dt * ops.pressure_term(kappa / density)
        base = density + dt * ops.density_rate(velocities) - floor
        feeds = {
            "dv": np.zeros((3, n), np.float32), "dkappa": np.zeros(n, np.float32),
            "compression": np.maximum(base, 0.0).astype(np.float32),
            "neighbours": tables.neighbours.reshape(-1), "neighbours_by_axis": tables.neighbours_by_axis,
            "gradients": tables.gradients.reshape(3, -1), "shape": np.array(tables.gradients.shape, np.int64),
            "own": tables.own,
            "base": base.astype(np.float32),
            "speed_scale": (tables.alpha / (dt * density)).astype(np.float32),
            "kappa_scale": (tables.alpha / (dt * dt)).astype(np.float32),
            "dt": np.array([dt], np.float32),
            "tolerance": np.array([tolerance * rho0], np.float32),
            "min_iterations": np.array([min_iterations], np.float32),
            "max_iterations": np.array([max_iterations], np.float32),
        }
        done = 0
        while True:
            feeds["iterations_done"] = np.array([done], np.float32)
            dv, dkappa, compression, applied = self.session.run(None, feeds)
            steps = int(applied.sum())
            done += steps
            feeds.update(dv=dv, dkappa=dkappa, compression=compression)
            error = float(np.mean(compression, dtype=np.float64)) / rho0
            if steps < self.iterations_per_call or done >= max_iterations or (
                    done >= min_iterations and error <= tolerance):
                break
        return (velocities + dv.T, kappa + dkappa, done, error, float(np.max(compression)) / rho0,
                error <= tolerance)
