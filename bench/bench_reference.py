"""Benchmark of the DFSPH reference solver: particle-substeps per second.

For each size, a block of water (spacing 2 cm) sits in a box with one-layer walls and
an open top (engine.validate.BoxWorld, the same
``SphSolver.advance`` a bake uses). After ``--warmup`` substeps (the block starts
to settle; the clock is not running) ``--substeps`` substeps are timed. The
breakdown comes from StepStats (neighbours, density, solvers; "other" is the
rest of advance: health checks, state updates), and I/O is writing one binary
PLY frame of the cache layout with numpy. Peak memory is the process's maximum
resident set size (resource.getrusage), so it is cumulative over the sizes run
so far (sizes run smallest first).

Two block shapes (``--shape``):

- ``cube`` (the default): n x n x n particles, so depth grows with size (22 layers
  at 10k, 46 at 100k). The timed window is the pressure build-up after release
  from a zero-pressure lattice, and a deeper block has more pressure to build, so
  it needs more solver iterations per substep: the largest / smallest cost ratio
  mixes that with how the cost per particle scales.
- ``slab``: a constant depth (``--layers``, default 20) and a square footprint
  that grows with size, so the water column, and with it the pressure to build,
  is the same at every size; its cost ratio shows how the per-particle cost scales.

The ``us/p-it`` column (solver time per particle and per iteration) separates the
iteration count from the cost of one iteration in either shape.

    nice .venv/bin/python -m bench.bench_reference                 # cubes, 10k 20k 50k 100k
    nice .venv/bin/python -m bench.bench_reference --shape slab --sizes 10000 100000
    nice .venv/bin/python -m bench.bench_reference --sizes 10000 20000 --substeps 10

Prints a table and writes JSON (default bench/results/reference.json).
"""

import argparse
import json
import math
import os
import platform
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

from engine.boundary import make_boundary, sample_box_walls  # noqa: E402
from engine.solvers import make_solver  # noqa: E402
from engine.validate import WALL_GAP, BoxWorld, lattice  # noqa: E402

PLY_PROPERTIES = ("x", "y", "z", "vx", "vy", "vz", "id", "density", "pressure")


def block_counts(count, shape="cube", layers=20):
    """Lattice counts (nx, ny, nz) of a block of about ``count`` particles.

    ``cube``: n x n x n. ``slab``: ``layers`` deep on a square footprint of about
    count / layers particles.
    """
    if shape == "cube":
        n = max(2, int(round(count ** (1.0 / 3.0))))
        return n, n, n
    if shape == "slab":
        side = max(2, int(round(math.sqrt(count / layers))))
        return side, side, layers
    raise ValueError(f"shape must be 'cube' or 'slab', got {shape!r}")


def block_world(count, spacing=0.02, shape="cube", layers=20):
    """BoxWorld with a block of about ``count`` particles resting on the floor of a walled box."""
    nx, ny, nz = block_counts(count, shape, layers)
    gap = WALL_GAP * spacing
    positions = lattice((nx, ny, nz), spacing, (gap, gap, gap))
    width = 2.0 * gap + (nx - 1) * spacing
    depth = 2.0 * gap + (ny - 1) * spacing
    height = 2.0 * gap + (nz - 1) * spacing
    faces = {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    points, normals = sample_box_walls((0.0, 0.0, 0.0), (width, depth, height + 4 * spacing), spacing, faces)
    boundary = make_boundary(points, normals, 2.0 * spacing)
    return BoxWorld(positions, np.zeros_like(positions), boundary, spacing)


def write_ply(path, state, attributes):
    """One frame in the cache's PLY layout (binary little endian, float32 + int32 id)."""
    dtype = np.dtype([(name, "<i4" if name == "id" else "<f4") for name in PLY_PROPERTIES])
    rows = np.empty(state.count, dtype)
    for axis, name in enumerate("xyz"):
        rows[name] = state.positions[:, axis]
        rows["v" + name] = state.velocities[:, axis]
    rows["id"] = state.ids
    rows["density"] = attributes["density"]
    rows["pressure"] = attributes["pressure"]
    header = ["ply", "format binary_little_endian 1.0", f"element vertex {state.count}"]
    header += [f"property {'int' if name == 'id' else 'float'} {name}" for name in PLY_PROPERTIES]
    header.append("end_header")
    with open(path, "wb") as handle:
        handle.write(("\n".join(header) + "\n").encode("ascii"))
        handle.write(rows.tobytes())


def machine_info(**extra):
    """The machine block of a benchmark's JSON (platform, CPUs, Python, numpy) plus ``extra``."""
    return {"platform": platform.platform(), "processor": platform.processor(), "cpu_count": os.cpu_count(),
            "python": platform.python_version(), "numpy": np.__version__, **extra}


def write_json(out, output):
    """Write a benchmark's results ``out`` as JSON to ``output`` (folders made) and say where."""
    path = Path(output)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(out, indent=2) + "\n")
    print(f"wrote {path}")


def run_size(count, substeps, warmup, shape="cube", layers=20):
    world = block_world(count, shape=shape, layers=layers)
    solver = make_solver("sph")
    state = solver.start(world)
    dt = world.solver_settings.max_time_step
    t = 0.0
    for _ in range(warmup):
        t += dt
        state, _ = solver.advance(state, world, t)
    totals = {"neighbours": 0.0, "density": 0.0, "solvers": 0.0}
    pressure = drift = rebuilds = done = 0
    worst = 0.0
    started = time.perf_counter()
    for _ in range(substeps):
        t += dt
        state, stats = solver.advance(state, world, t)
        done += stats.substeps
        totals["neighbours"] += stats.neighbour_seconds
        totals["density"] += stats.density_seconds
        totals["solvers"] += stats.solver_seconds
        pressure += stats.pressure_iterations
        drift += stats.drift_iterations
        rebuilds += stats.neighbour_rebuilds
        worst = max(worst, stats.max_density_error)
    wall = time.perf_counter() - started
    io_started = time.perf_counter()
    attributes = solver.frame_attributes(state, world)
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "points_0001.ply")
        write_ply(path, state, attributes)
        ply_bytes = os.path.getsize(path)
    io_seconds = time.perf_counter() - io_started
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    per_substep = wall / done
    return {
        "particles": int(state.count),
        "layers": int(block_counts(count, shape, layers)[2]),
        "boundary_particles": int(world.boundary_at(0.0).positions.shape[0]),
        "substeps": done,
        "seconds": wall,
        "particle_substeps_per_second": state.count * done / wall,
        "microseconds_per_particle_substep": 1e6 * wall / (state.count * done),
        "seconds_per_substep": per_substep,
        "breakdown_seconds_per_substep": {
            "neighbours": totals["neighbours"] / done,
            "density": totals["density"] / done,
            "solvers": totals["solvers"] / done,
            "other": (wall - sum(totals.values())) / done,
            "frame_io": io_seconds,
        },
        "pressure_iterations_per_substep": pressure / done,
        # Cost per particle and per solver iteration (pressure + drift): separates how the
        # cost of one iteration scales with size from how the iteration count grows with depth.
        "microseconds_per_particle_iteration": 1e6 * totals["solvers"] / (state.count * max(1, pressure + drift)),
        "drift_iterations_per_substep": drift / done,
        "neighbour_rebuilds": rebuilds,
        "max_mean_density_error": worst,
        "ply_bytes": ply_bytes,
        "peak_rss_mib": peak_mib,
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description="Benchmark the DFSPH reference solver (particle-substeps per "
                                                 "second, time breakdown, peak memory).")
    parser.add_argument("--sizes", type=int, nargs="+", default=[10000, 20000, 50000, 100000],
                        help="Approximate particle counts. Default: 10000 20000 50000 100000.")
    parser.add_argument("--shape", choices=("cube", "slab"), default="cube",
                        help="Block shape: 'cube' (depth grows with size) or 'slab' (constant depth, "
                             "footprint grows with size). Default: cube.")
    parser.add_argument("--layers", type=int, default=20,
                        help="Depth of a slab in particle layers (ignored for cubes). Default: 20.")
    parser.add_argument("--substeps", type=int, default=20, help="Timed substeps per size. Default: 20.")
    parser.add_argument("--warmup", type=int, default=5, help="Untimed substeps before timing. Default: 5.")
    parser.add_argument("--output", default=str(ROOT / "bench" / "results" / "reference.json"),
                        help="JSON output path. Default: bench/results/reference.json.")
    args = parser.parse_args(argv)
    if args.layers < 2:
        parser.error(f"--layers must be at least 2, got {args.layers}")
    results = []
    header = (f"{'particles':>10} {'layers':>6} {'p-substeps/s':>13} {'us/p-step':>10} {'neigh ms':>9} {'dens ms':>8} "
              f"{'solve ms':>9} {'other ms':>9} {'PLY ms':>7} {'p-it':>5} {'d-it':>5} {'us/p-it':>8} {'rebuild':>7} "
              f"{'RSS MiB':>8}")
    print(header)
    for size in sorted(args.sizes):
        row = run_size(size, args.substeps, args.warmup, args.shape, args.layers)
        results.append(row)
        b = row["breakdown_seconds_per_substep"]
        print(f"{row['particles']:>10} {row['layers']:>6} {row['particle_substeps_per_second']:>13,.0f} "
              f"{row['microseconds_per_particle_substep']:>10.2f} {1e3 * b['neighbours']:>9.1f} "
              f"{1e3 * b['density']:>8.1f} {1e3 * b['solvers']:>9.1f} {1e3 * b['other']:>9.1f} "
              f"{1e3 * b['frame_io']:>7.1f} {row['pressure_iterations_per_substep']:>5.1f} "
              f"{row['drift_iterations_per_substep']:>5.1f} "
              f"{row['microseconds_per_particle_iteration']:>8.3f} {row['neighbour_rebuilds']:>7} "
              f"{row['peak_rss_mib']:>8.0f}", flush=True)
    ratio = None
    by_size = {r["particles"]: r for r in results}
    if len(results) >= 2:
        ratio = results[-1]["microseconds_per_particle_substep"] / results[0]["microseconds_per_particle_substep"]
        print(f"cost per particle-substep, largest / smallest ({args.shape}): {ratio:.2f}")
    out = {
        "benchmark": "reference_solver",
        "machine": machine_info(),
        "settings": {"substeps": args.substeps, "warmup": args.warmup, "spacing_m": 0.02,
                     "time_step_s": 0.004, "shape": args.shape,
                     "slab_layers": args.layers if args.shape == "slab" else None},
        "results": results,
        "cost_ratio_largest_to_smallest": ratio,
        "sizes": sorted(by_size),
    }
    write_json(out, args.output)
    return 0


if __name__ == "__main__":
    sys.exit(main())
