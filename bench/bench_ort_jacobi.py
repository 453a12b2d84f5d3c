"""Benchmark: the Jacobi iteration on scipy's float64 sparse products against onnxruntime float32.

Issue 10, item 6. For each size, a cube of water (spacing 2 cm) in a walled box
(bench/bench_reference.py's ``block_world``) is settled and advanced ``--warmup``
substeps with the reference solver, so the pressure is building as in a bake. At that
state one substep's inputs to the solves are made as ``engine.sph.dfsph_substep``
makes them (pairs, ``PairOperators``, XSPH, gravity, warm starts). Then, alternating
the two paths inside each of ``--repeats`` rounds (their order flips every round):

- fixed iterations: ``engine.sph._jacobi_solve`` and ``engine.ort_ops.OrtJacobi.solve``
  on the velocity solve with tolerance 0 and exactly ``--iterations`` iterations; the
  time divided by the count is the cost of one iteration (both include the same float64
  warm start and starting rate, one scipy iteration's worth, spread over the count);
- the table build: ``JacobiTables.from_operators`` (padded tables from the pairs; paid
  every substep, since the pairs change every substep);
- one substep's solves as the solver runs them: the velocity solve (tolerance
  ``density_tolerance``, at least 2 iterations) then the drift solve (floor rho0, at
  most ``DRIFT_ITERATIONS``), each path with its own stopping; the onnxruntime figure
  includes the table build. The ratio of the two is what a substep would gain or lose.

Times are medians over the rounds; the table also gives the ratios of the fastest rounds
and of the process CPU time (all threads, the work done; other people's jobs on the shared
machine disturb it less than the wall time). The scipy path runs on
engine.sph's thread pool (SOLVER_THREADS), onnxruntime with intra-op threads = the
machine's cores. ``--profile`` adds onnxruntime's per-operator time for one fixed solve.

Measured 2026-12-04 on the shared 2-core machine (load average 6-9 throughout, so single
figures move by 2x; four runs of the default command, ratios scipy time / onnxruntime
time, > 1 would be a win): per iteration 0.57-1.05 at 20k and 0.61-0.77 at 50k (median
wall; 0.81-0.98 and 0.85-0.95 in CPU time); per substep with the table build 0.58-0.93 at
20k and 0.56-0.78 at 50k (CPU time 0.77-0.83 and 0.76-0.85). The table build alone costs
29-46 ms at 20k and 123-184 ms at 50k, 3-9 scipy iterations. Not kept: the 1.3x bar was
never approached. Why: one iteration reads and writes about twice the bytes of scipy's
despite float32 (20k cube, K = 32, P = 265k: about 120 N K = 76 MB against 144 P = 38 MB,
counted from the operators, not measured),
because every onnxruntime operator writes its whole result before the next reads it (the
gathered values, then the products, (3, N, K) floats each) where a CSR kernel gathers,
multiplies and sums in one pass, and 14-20 % of the padded slots are empty. Letting
onnxruntime's idle threads spin (``--ort-spinning``) was worse (0.28-0.57 per iteration).

Graph layouts tried on the 5k cube (24 iterations, same run as scipy; the kept one last):
(N, K, 3) tables with Gather, 3.9 us per particle-iteration against scipy's 0.30 (the
broadcast Mul over spans of 3 floats took 211 ms of 386); (3, N, K) with Gather, 2.5
against 0.32 (Gather, one element per index, took 342 ms of 383); (3, N, K) with
GatherElements on a flat int32 index, 0.57 against 0.44. Einsum for the multiply-and-sum
was about 30x slower than Mul + ReduceSum in isolation and was not tried in the graph.

    nice .venv/bin/python -m bench.bench_ort_jacobi                  # 5k 20k 50k
    nice .venv/bin/python -m bench.bench_ort_jacobi --sizes 20000 --repeats 9 --profile

Prints a table and writes JSON (default bench/results/ort_jacobi.json).
"""

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import onnxruntime as ort

ROOT = Path(__file__).resolve().parents[1]

from bench.bench_reference import block_world, machine_info, write_json  # noqa: E402
from engine import sph  # noqa: E402
from engine.ort_ops import ITERATIONS_PER_CALL, JacobiTables, OrtJacobi, build_model  # noqa: E402
from engine.solvers import make_solver  # noqa: E402


def substep_inputs(count, warmup):
    """(ops, velocities, kappa, drift, dt, params) at the start of a substep's solves."""
    world = block_world(count)
    solver = make_solver("sph")
    state = solver.start(world)
    dt = world.solver_settings.max_time_step
    for step in range(1, warmup + 1):
        state, _ = solver.advance(state, world, step * dt)
    params = solver._params
    boundary = world.boundary_at(state.time)
    ops = sph.PairOperators(state.count, *sph._find_pairs(state.positions, boundary, params, None), boundary, params)
    velocities = ops.xsph(state.velocities, params.viscosity, params.particle_mass) + dt * np.asarray(params.gravity)
    kappa = sph.WARM_START_FACTOR * state.particle_arrays[sph.KAPPA]
    floor = np.maximum(ops.density, params.rest_density)
    if np.any(kappa):  # the warm-start gate of dfsph_substep
        kappa = np.where(ops.density + dt * ops.density_rate(velocities) > floor, kappa, 0.0)
    drift = sph.DRIFT_WARM_START * state.particle_arrays[sph.DRIFT]
    return ops, velocities, kappa, drift, dt, params


def substep_solves(solve, ops, velocities, kappa, drift, dt, params):
    """The velocity then the drift solve of ``dfsph_substep`` with ``solve``; (iterations, iterations)."""
    floor = np.maximum(ops.density, params.rest_density)
    velocities, _, first, _, _, _ = solve(ops, velocities, kappa, floor, dt, params.density_tolerance, 2,
                                          params.max_iterations)
    _, _, second, _, _, _ = solve(ops, velocities, drift, params.rest_density, dt, params.density_tolerance, 1,
                                  min(params.max_iterations, sph.DRIFT_ITERATIONS))
    return first, second


def clock(function, cpu=None):
    """(wall seconds, result); when ``cpu`` (a list) is given, the process CPU seconds are appended
    to it (all threads: the work done, which other people's jobs on the machine disturb less than
    the wall time)."""
    started, started_cpu = time.perf_counter(), time.process_time()
    result = function()
    if cpu is not None:
        cpu.append(time.process_time() - started_cpu)
    return time.perf_counter() - started, result


def profile_ops(ops, tables, arguments, iterations_per_call, spinning):
    """onnxruntime's summed node time per operator type (ms) for one fixed solve."""
    with tempfile.TemporaryDirectory() as folder:
        runner = OrtJacobi(iterations_per_call)
        options = ort.SessionOptions()
        options.intra_op_num_threads = os.cpu_count() or 1
        options.add_session_config_entry("session.intra_op.allow_spinning", "1" if spinning else "0")
        options.enable_profiling = True
        options.profile_file_prefix = os.path.join(folder, "jacobi")
        runner.session = ort.InferenceSession(build_model(iterations_per_call).SerializeToString(), options,
                                              providers=["CPUExecutionProvider"])
        runner.solve(ops, tables, *arguments)
        events = json.loads(Path(runner.session.end_profiling()).read_text())
    by_type = {}
    for event in events:
        if event.get("cat") == "Node" and event["name"].endswith("_kernel_time"):
            kind = event["args"]["op_name"]
            by_type[kind] = by_type.get(kind, 0.0) + event["dur"] / 1000.0
    return dict(sorted(by_type.items(), key=lambda item: -item[1]))


def run_size(count, warmup, repeats, iterations, iterations_per_call, profile, spinning):
    ops, velocities, kappa, drift, dt, params = substep_inputs(count, warmup)
    made, runner = clock(lambda: OrtJacobi(iterations_per_call, allow_spinning=spinning))
    floor = np.maximum(ops.density, params.rest_density)
    fixed = (velocities, kappa, floor, dt, 0.0, iterations, iterations)
    tables = JacobiTables.from_operators(ops)
    times = {name: [] for name in ("scipy_fixed", "ort_fixed", "tables", "scipy_substep", "ort_substep")}
    cpu = {name: [] for name in times}
    counts = {}
    for round_ in range(repeats):
        order = ("scipy", "ort") if round_ % 2 == 0 else ("ort", "scipy")
        for path in order:
            if path == "scipy":
                seconds, _ = clock(lambda: sph._jacobi_solve(ops, *fixed), cpu["scipy_fixed"])
                times["scipy_fixed"].append(seconds)
                seconds, counts["scipy"] = clock(lambda: substep_solves(sph._jacobi_solve, ops, velocities, kappa,
                                                                        drift, dt, params), cpu["scipy_substep"])
                times["scipy_substep"].append(seconds)
            else:
                seconds, _ = clock(lambda: runner.solve(ops, tables, *fixed), cpu["ort_fixed"])
                times["ort_fixed"].append(seconds)

                def ort_substep():
                    fresh = JacobiTables.from_operators(ops)
                    return substep_solves(lambda *a: runner.solve(a[0], fresh, *a[1:]), ops, velocities, kappa,
                                          drift, dt, params)
                seconds, counts["ort"] = clock(ort_substep, cpu["ort_substep"])
                times["ort_substep"].append(seconds)
                seconds, _ = clock(lambda: JacobiTables.from_operators(ops), cpu["tables"])
                times["tables"].append(seconds)
    median = {name: statistics.median(values) for name, values in times.items()}
    pairs = len(ops._i)
    row = {
        "particles": ops.count,
        "pairs_upper": pairs,
        "table_width": tables.width,
        "table_fill": 2 * pairs / (ops.count * tables.width),
        "session_seconds": made,
        "scipy_us_per_particle_iteration": 1e6 * median["scipy_fixed"] / (iterations * ops.count),
        "ort_us_per_particle_iteration": 1e6 * median["ort_fixed"] / (iterations * ops.count),
        "iteration_ratio_scipy_over_ort": median["scipy_fixed"] / median["ort_fixed"],
        "table_ms": 1e3 * median["tables"],
        "table_in_iterations": median["tables"] / (median["scipy_fixed"] / iterations),
        "substep_iterations_scipy": list(counts["scipy"]),
        "substep_iterations_ort": list(counts["ort"]),
        "scipy_substep_ms": 1e3 * median["scipy_substep"],
        "ort_substep_ms_with_tables": 1e3 * median["ort_substep"],
        "substep_ratio_scipy_over_ort": median["scipy_substep"] / median["ort_substep"],
        "cpu_iteration_ratio_scipy_over_ort": statistics.median(cpu["scipy_fixed"]) / statistics.median(
            cpu["ort_fixed"]),
        "cpu_substep_ratio_scipy_over_ort": statistics.median(cpu["scipy_substep"]) / statistics.median(
            cpu["ort_substep"]),
        "min_iteration_ratio_scipy_over_ort": min(times["scipy_fixed"]) / min(times["ort_fixed"]),
        "min_substep_ratio_scipy_over_ort": min(times["scipy_substep"]) / min(times["ort_substep"]),
        "seconds_median": median,
        "cpu_seconds_all": cpu,
        "seconds_min": {name: min(values) for name, values in times.items()},
        "seconds_all": times,
    }
    if profile:
        tables_now = JacobiTables.from_operators(ops)
        row["ort_profile_ms_by_op"] = profile_ops(ops, tables_now, fixed, iterations_per_call, spinning)
    return row


def main(argv=None):
    parser = argparse.ArgumentParser(description="Time one Jacobi iteration of the DFSPH solves on scipy's float64 "
                                                 "sparse products and in onnxruntime (float32, padded tables), "
                                                 "with the table build, in the same run.")
    parser.add_argument("--sizes", type=int, nargs="+", default=[5000, 20000, 50000],
                        help="Approximate particle counts (cubes). Default: 5000 20000 50000.")
    parser.add_argument("--warmup", type=int, default=3, help="Solver substeps before measuring. Default: 3.")
    parser.add_argument("--repeats", type=int, default=5, help="Alternating rounds per size. Default: 5.")
    parser.add_argument("--iterations", type=int, default=3 * ITERATIONS_PER_CALL,
                        help=f"Iterations of the fixed-count solves. Default: {3 * ITERATIONS_PER_CALL}.")
    parser.add_argument("--iterations-per-call", type=int, default=ITERATIONS_PER_CALL,
                        help=f"Iterations unrolled into one onnxruntime call. Default: {ITERATIONS_PER_CALL}.")
    parser.add_argument("--profile", action="store_true", help="Add onnxruntime's time per operator type.")
    parser.add_argument("--ort-spinning", action="store_true",
                        help="Let onnxruntime's idle threads spin (its own default; off unless given).")
    parser.add_argument("--output", default=str(ROOT / "bench" / "results" / "ort_jacobi.json"),
                        help="JSON output path. Default: bench/results/ort_jacobi.json.")
    args = parser.parse_args(argv)
    if args.repeats < 1 or args.iterations < 1 or args.iterations_per_call < 1:
        parser.error("--repeats, --iterations and --iterations-per-call must be at least 1")
    header = (f"{'particles':>9} {'K':>3} {'fill':>5} {'scipy us/p-it':>13} {'ort us/p-it':>11} {'it ratio':>8} "
              f"{'tables ms':>9} {'= its':>5} {'its v+d':>8} {'scipy ms':>9} {'ort+tab ms':>10} {'substep ratio':>13} "
              f"{'min it/sub':>10} {'cpu it/sub':>10}")
    print(header)
    results = []
    for size in sorted(args.sizes):
        row = run_size(size, args.warmup, args.repeats, args.iterations, args.iterations_per_call, args.profile,
                       args.ort_spinning)
        results.append(row)
        its = "+".join(str(c) for c in row["substep_iterations_scipy"])
        print(f"{row['particles']:>9} {row['table_width']:>3} {row['table_fill']:>5.2f} "
              f"{row['scipy_us_per_particle_iteration']:>13.3f} {row['ort_us_per_particle_iteration']:>11.3f} "
              f"{row['iteration_ratio_scipy_over_ort']:>8.2f} {row['table_ms']:>9.1f} "
              f"{row['table_in_iterations']:>5.1f} {its:>8} {row['scipy_substep_ms']:>9.1f} "
              f"{row['ort_substep_ms_with_tables']:>10.1f} {row['substep_ratio_scipy_over_ort']:>13.2f} "
              f"{row['min_iteration_ratio_scipy_over_ort']:>5.2f}/{row['min_substep_ratio_scipy_over_ort']:<4.2f} "
              f"{row['cpu_iteration_ratio_scipy_over_ort']:>5.2f}/{row['cpu_substep_ratio_scipy_over_ort']:<4.2f}",
              flush=True)
        if row["substep_iterations_scipy"] != row["substep_iterations_ort"]:
            print(f"  note: iteration counts differ (onnxruntime {row['substep_iterations_ort']})", flush=True)
        if args.profile:
            top = ", ".join(f"{k} {v:.1f}" for k, v in row["ort_profile_ms_by_op"].items())
            print(f"  onnxruntime ms by op ({args.iterations} iterations): {top}", flush=True)
    print("ratios > 1: scipy slower (onnxruntime wins); 'substep ratio' includes the table build; "
          "'= its' is the table build in scipy iterations; ratios are of medians, 'min' of the fastest rounds, "
          "'cpu' of median process CPU time (all threads)")
    out = {
        "benchmark": "ort_jacobi",
        "machine": machine_info(onnxruntime=ort.__version__, scipy_threads=sph.SOLVER_THREADS),
        "settings": {"warmup": args.warmup, "repeats": args.repeats, "iterations": args.iterations,
                     "iterations_per_call": args.iterations_per_call, "spacing_m": 0.02, "shape": "cube",
                     "ort_spinning": args.ort_spinning, "load_average_at_end": os.getloadavg()},
        "results": results,
    }
    write_json(out, args.output)
    return 0


if __name__ == "__main__":
    sys.exit(main())
