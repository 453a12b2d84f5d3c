"""What would moving the edge features into the core save? A measurement, not used by the engine.

    nice .venv/bin/python -m bench.fused_core_estimate [--sizes 20000 50000] [--repeats 4]

Needs the ``onnx`` package (installed with requirements-train.txt). It rewrites the shipped core
(the shipped model, weights unchanged) into a temporary graph whose fluid edge term is
built from node-level products, and times both on the same real graph (a resting block in a tank
after two learned steps, as bench/profile_learned.py):

- the normalised edge features are affine in (x_j - x_i), |x_j - x_i| and (v_j - v_i), so their
  first-layer product C e_ij = P_j - P_i + w_d r_ij - c_0 with P = x W_x + v W_v per node
  (W_x, W_v, w_d: C's columns over the feature std and the radius; c_0 = C mean / std). P_j joins
  the sender term before the gather and P_i the receiver term, so the (N, K, 7) edge features and
  their MatMul go; what stays per edge is the distance column;
- a second column, 1 for padding, carries a -1e30 weight, so Relu zeroes padded slots and the mask
  Mul goes too.

Prints, per size, the two outputs' largest difference relative to the output scale and the fastest
wall and CPU seconds of each graph, and writes ``bench/results/fused_core_estimate.json``.
"""

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

#: The exported graph's name of each round's 7-wide edge MatMul weight (legacy exporter, preview-gn4).
EDGE_WEIGHTS = {0: "onnx::MatMul_176", 1: "onnx::MatMul_182"}


def fused_model(onnx_path, stats, radius):
    """The core with the fluid edge term built from node products (see the module docstring)."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    model = onnx.load(str(onnx_path))
    graph = model.graph
    weights = {i.name: numpy_helper.to_array(i) for i in graph.initializer}
    mean, std = np.asarray(stats["edge_mean"], np.float32), np.asarray(stats["edge_std"], np.float32)
    blocks, dropped = {}, set()
    for r, name in EDGE_WEIGHTS.items():
        b = f"/blocks.{r}/"
        edge = weights[name]  # (7, 32): the edge term is e @ edge
        node_weight = np.concatenate([edge[0:3] / std[0:3, None] / radius, edge[4:7] / std[4:7, None]])
        pair_weight = np.stack([edge[3] / std[3] / radius, np.full(edge.shape[1], -1e30, np.float32)])
        constant = (mean / std) @ edge
        for key, array in ((f"W6_{r}", node_weight), (f"Wd2_{r}", pair_weight), (f"c0_{r}", constant)):
            graph.initializer.append(numpy_helper.from_array(array.astype(np.float32), key))
        blocks[b + "Gather_output_0"] = [
            helper.make_node("MatMul", ["node_kinematics", f"W6_{r}"], [f"P_{r}"]),
            helper.make_node("Add", [b + "sender/MatMul_output_0", f"P_{r}"], [f"Q_{r}"]),
            helper.make_node("Gather", [f"Q_{r}", "neighbour_index"], [f"Gq_{r}"]),
            helper.make_node("Sub", [b + "receiver/Gemm_output_0", f"P_{r}"], [f"RP_{r}"]),
            helper.make_node("Sub", [f"RP_{r}", f"c0_{r}"], [f"RPc_{r}"]),
            helper.make_node("Unsqueeze", [f"RPc_{r}", b + "Constant_output_0"], [f"U_{r}"]),
            helper.make_node("Add", [f"U_{r}", f"Gq_{r}"], [f"A1_{r}"]),
            helper.make_node("MatMul", ["edge_geometry", f"Wd2_{r}"], [f"D_{r}"]),
            helper.make_node("Add", [f"A1_{r}", f"D_{r}"], [f"A2_{r}"]),
            helper.make_node("Relu", [f"A2_{r}"], [f"Rl_{r}"]),
        ]
        dropped |= {b + s + "_output_0" for s in ("Unsqueeze", "Gather", "Add", "edge/MatMul", "Add_1", "Relu", "Mul")}
        for node in graph.node:
            if node.op_type == "ReduceSum" and node.input[0] == b + "Mul_output_0":
                node.input[0] = f"Rl_{r}"
    nodes = []
    for node in graph.node:
        nodes.extend(blocks.get(node.output[0], []))
        if node.output[0] not in dropped:
            nodes.append(node)
    del graph.node[:]
    graph.node.extend(nodes)
    inputs = [i for i in graph.input if i.name != "edge_features"]
    inputs[3:3] = [helper.make_tensor_value_info("node_kinematics", TensorProto.FLOAT, ["N", 6]),
                   helper.make_tensor_value_info("edge_geometry", TensorProto.FLOAT, ["N", "K", 2])]
    del graph.input[:]
    graph.input.extend(inputs)
    onnx.checker.check_model(model)
    return model


def measure(size, repeats, original, fused):
    """Both cores on one real graph of about ``size`` particles: difference and fastest times."""
    from bench.bench_learned import tank_scene

    from engine.learned import LearnedSolver, features
    from engine.scene import scene_from_dict
    from engine.world import build_world

    scene = scene_from_dict(tank_scene(size, obstacle=False, frame_end=4))
    world = build_world(scene)
    solver = LearnedSolver()
    state = solver.start(world)
    state, _ = solver.advance(state, world, 2 * solver.contract["step_froude"] * np.sqrt(scene.particle_spacing / 9.81))
    units = features.Units(world.particle_spacing, world.gravity)
    boundary = world.boundary_at(state.time)
    previous = state.particle_arrays["learned_previous_velocity"]
    graph = features.build_graph(state.positions, state.velocities, previous, boundary, units, 2.0, 2.0, 48, 32,
                                 step_froude=0.8)
    distance = np.where(graph.neighbour_mask > 0, np.linalg.norm(graph.edge_features[..., 0:3], axis=2) * 2.0, 0.0)
    inputs = features.normalise(graph, solver.stats)
    x = units.to_model_vectors(state.positions) / units.spacing
    v = units.to_model_vectors(state.velocities) / units.velocity
    fused_inputs = {k: inputs[k] for k in inputs if k != "edge_features"}
    fused_inputs["node_kinematics"] = np.concatenate([x - x.mean(axis=0), v], axis=1).astype(np.float32)
    fused_inputs["edge_geometry"] = np.stack([distance, 1.0 - graph.neighbour_mask], axis=2).astype(np.float32)
    a, b = original.run(None, inputs)[0], fused.run(None, fused_inputs)[0]
    times = {"original": [], "fused": []}
    for _ in range(repeats):
        for name, session, feed in (("original", original, inputs), ("fused", fused, fused_inputs)):
            started, cpu = time.perf_counter(), time.process_time()
            session.run(None, feed)
            times[name].append((time.perf_counter() - started, time.process_time() - cpu))
    row = {"particles": int(state.count), "width": int(graph.neighbour_index.shape[1]),
           "max_difference_over_scale": float(np.abs(a - b).max() / np.abs(a).max())}
    for name, values in times.items():
        row[name] = {"wall_seconds": min(w for w, _ in values), "cpu_seconds": min(c for _, c in values)}
    return row


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", type=int, nargs="*", default=[20000, 50000])
    parser.add_argument("--repeats", type=int, default=4)
    args = parser.parse_args(argv)
    import onnx

    from engine.learned import LearnedSolver
    from engine.learned.runtime import make_session

    solver = LearnedSolver()
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "fused.onnx"
        onnx.save(fused_model(solver.onnx_path, solver.stats, solver.contract["radius_spacings"]), str(path))
        original, fused = make_session(solver.onnx_path), _plain_session(path)
        rows = [measure(size, args.repeats, original, fused) for size in args.sizes]
    print(f"{'particles':>9} {'width':>5} {'max diff':>9} {'original wall':>13} {'fused wall':>10} {'original CPU':>12} {'fused CPU':>9}")
    for r in rows:
        print(f"{r['particles']:>9} {r['width']:>5} {r['max_difference_over_scale']:>9.1e} {r['original']['wall_seconds']:>13.3f} "
              f"{r['fused']['wall_seconds']:>10.3f} {r['original']['cpu_seconds']:>12.3f} {r['fused']['cpu_seconds']:>9.3f}")
    out = ROOT / "bench" / "results" / "fused_core_estimate.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"args": vars(args), "rows": rows}, indent=1) + "\n")
    return 0


def _plain_session(path):
    """An onnxruntime session with the engine's options for a graph that has other inputs than the contract's."""
    import onnxruntime as ort

    options = ort.SessionOptions()
    options.intra_op_num_threads = 2
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    options.enable_mem_pattern = False
    options.log_severity_level = 3
    return ort.InferenceSession(str(path), sess_options=options, providers=["CPUExecutionProvider"])


if __name__ == "__main__":
    sys.exit(main())
