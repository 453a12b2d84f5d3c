"""Where a learned step goes, old code against new, and the learned preview against the reference (a benchmark).

    nice .venv/bin/python -m bench.profile_learned [--old /path/to/old/checkout] [--sizes 2000 5000 20000 50000]
        [--steps 3] [--repeats 2] [--memory-size 100000] [--ratio-sizes 2000 5000 20000 50000] [--ratio-frames 4]

1. Phases of ``LearnedSolver.advance`` at each size (a jittered block resting in a tank after one
   warm-up step, one learned step of 1.003 sqrt(d/g) each), under cProfile with the process's CPU
   clock (CPU seconds, all threads: the network's two onnxruntime threads count twice; on a
   shared machine CPU seconds are steadier than wall seconds), attributed by function:
   - neighbours: the fluid pairs and padded table and the boundary rows (k-d tree queries);
   - features: the rest of ``features.build_graph`` (density, edge and node features),
     ``normalise``, the output transform and ``integrate``;
   - network: onnxruntime's ``run`` calls;
   - tiling: ``CoreRunner.run`` outside onnxruntime (halo search, subgraph copies); the halo's
     recomputation itself is inside "network" -- compare the untiled and tiled sizes;
   - relaxation: ``relax_density`` (and ``symmetric_table``); CPU of all its row-block threads
     (``threads``), so its wall time is lower than this on a free second core;
   - boundary: ``World.boundary_at``, ``enforce_bounds`` and ``emit``;
   - other: the rest of ``advance`` (Python per-call overhead, state updates, health checks).
   The fastest of ``--repeats`` runs of ``--steps`` steps is kept; particle-steps per second
   from its wall time. With ``--old``, the same runs with the old checkout's engine, interleaved
   with the new ones (each size and code in its own process), so the ratio is fair on a shared
   machine.
2. Peak resident memory (``ru_maxrss``) of a process running ``--steps`` steps at
   ``--memory-size`` particles, old and new.
3. Learned against reference per frame, both measured in this run: a block of about N particles
   dropped beside a box in a tank (``bench_learned.tank_scene``, d = 2.5 cm, 24 fps), baked for
   ``--ratio-frames`` frames with each solver (``engine.bake``, the new code); seconds per frame
   from the manifests, frame 1 (the start state) excluded.

Prints tables and writes ``bench/results/profile_learned.json``.
"""

import argparse
import cProfile
import json
import os
import pstats
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: Phase -> functions (by name) whose cumulative time it takes. Nested ones are subtracted below.
NEIGHBOUR_FUNCTIONS = ("neighbour_pairs", "fluid_neighbour_table", "boundary_neighbour_rows", "boundary_neighbour_table")
PHASES = ("neighbours", "features", "network", "tiling", "relaxation", "boundary", "other")


def _cumulative(stats, names, filename_part=""):
    """Summed cumulative seconds of the functions called ``names`` (outermost calls only)."""
    total = 0.0
    for (filename, _, name), (_, _, _, cumulative, callers) in stats.stats.items():
        if name in names and filename_part in filename:
            # Count a call only when its caller is not one of the same functions (no double count).
            if not any(caller[2] in names for caller in callers):
                total += cumulative
    return total


def phase_seconds(profile, total):
    """Seconds per phase (see the module docstring) from a cProfile run of ``advance``."""
    stats = pstats.Stats(profile)
    neighbours = _cumulative(stats, NEIGHBOUR_FUNCTIONS, "learned")
    build = _cumulative(stats, ("build_graph",), "learned")
    features = (build - neighbours) + _cumulative(stats, ("normalise", "acceleration_from_output", "integrate"), "learned")
    network = _cumulative(stats, ("run",), "onnxruntime")
    core = _cumulative(stats, ("run",), "runtime.py")
    relaxation = _cumulative(stats, ("relax_density", "symmetric_table"), "learned")
    boundary = _cumulative(stats, ("boundary_at", "enforce_bounds", "emit"), "world.py")
    out = {"neighbours": neighbours, "features": features, "network": network, "tiling": max(core - network, 0.0),
           "relaxation": relaxation, "boundary": boundary}
    out["other"] = max(total - sum(out.values()), 0.0)
    return out


def one_size(particles, steps, repeats):
    """In this process (the engine on sys.path): phases, throughput and peak memory at one size."""
    import numpy as np

    engine_root = Path(sys.path[0]).resolve()
    import engine  # the engine of sys.path[0], imported before bench_learned puts this checkout on the path
    from engine.learned import LearnedSolver
    from engine.scene import scene_from_dict
    from engine.world import build_world

    sys.path.insert(1, str(ROOT / "bench"))
    from bench_learned import tank_scene

    assert Path(engine.__file__).resolve().parents[1] == engine_root, engine.__file__

    scene = scene_from_dict(tank_scene(particles, obstacle=False, frame_end=2 + steps))
    world = build_world(scene)
    solver = LearnedSolver()
    state = solver.start(world)
    step = solver.contract["step_froude"] * np.sqrt(scene.particle_spacing / 9.81)
    state, _ = solver.advance(state, world, step)  # warm-up at full size
    best = None
    for _ in range(max(repeats, 1)):
        profile = cProfile.Profile(time.process_time)
        started, cpu = time.perf_counter(), time.process_time()
        profile.enable()
        solver.advance(state, world, state.time + steps * step)
        profile.disable()
        total, cpu = time.perf_counter() - started, time.process_time() - cpu
        if best is None or total < best[0]:
            best = (total, cpu, profile)
    total, cpu, profile = best
    phases = phase_seconds(profile, cpu)
    return {"particles": int(state.count), "steps": steps, "seconds_per_step": total / steps,
            "cpu_seconds_per_step": cpu / steps, "particle_steps_per_second": state.count * steps / total,
            "phases_per_step": {k: v / steps for k, v in phases.items()},
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}


def run_one(engine_root, particles, steps, repeats):
    """``one_size`` in a fresh process whose engine is ``engine_root``'s; the dict, or {"error": ...}."""
    command = [sys.executable, __file__, "--one", str(particles), "--engine", str(engine_root),
               "--steps", str(steps), "--repeats", str(repeats)]
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        return {"particles": particles, "error": (done.stderr.strip().splitlines() or ["failed"])[-1]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def per_frame_ratio(particles, frames):
    """Seconds per frame of both solvers on one shot (new code), frame 1 excluded; learned first."""
    sys.path.insert(1, str(ROOT / "bench"))
    from bench_learned import tank_scene

    from engine.bake import bake
    from engine.cache import open_cache
    from engine.scene import save_scene

    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        save_scene(folder / "scene.json", tank_scene(particles, frame_end=1 + frames))
        out = {}
        for name in ("learned", "sph"):
            bake(folder / "scene.json", name, folder / name, use_signals=False)
            reader = open_cache(folder / name)
            entries = [reader.manifest["frames"][str(f)] for f in reader.frames[1:]]
            out[name] = {"seconds_per_frame": sum(e["seconds"] for e in entries) / len(entries),
                         "steps_per_frame": sum(e["substeps"] for e in entries) / len(entries),
                         "particles": reader.manifest["frames"][str(reader.frames[0])]["particles"]}
        out["ratio"] = out["sph"]["seconds_per_frame"] / out["learned"]["seconds_per_frame"]
        return out


def print_phases(rows):
    print(f"{'code':>4} {'particles':>9} {'s/step':>7} {'p-steps/s':>10} {'CPU s/step':>10} "
          + " ".join(f"{p:>10}" for p in PHASES) + f" {'peak MiB':>9}")
    for r in rows:
        if "error" in r:
            print(f"{r['code']:>4} {r['particles']:>9} error: {r['error']}")
            continue
        phases = r["phases_per_step"]
        print(f"{r['code']:>4} {r['particles']:>9} {r['seconds_per_step']:>7.3f} {r['particle_steps_per_second']:>10.0f} "
              f"{r['cpu_seconds_per_step']:>10.3f} "
              + " ".join(f"{phases[p]:>10.3f}" for p in PHASES) + f" {r['peak_rss_mib']:>9.0f}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--old", help="Another checkout of the repository to compare with (e.g. a worktree of main).")
    parser.add_argument("--sizes", type=int, nargs="*", default=[2000, 5000, 20000, 50000],
                        help="Particle counts of the phase profile (default 2000 5000 20000 50000).")
    parser.add_argument("--steps", type=int, default=3, help="Learned steps per timed run (default 3).")
    parser.add_argument("--repeats", type=int, default=2, help="Timed runs per size; the fastest is kept (default 2).")
    parser.add_argument("--memory-size", type=int, default=100000,
                        help="Particle count of the peak-memory run; 0 skips it (default 100000).")
    parser.add_argument("--ratio-sizes", type=int, nargs="*", default=[2000, 5000, 20000, 50000],
                        help="Particle counts of the learned/reference per-frame comparison (default 2000 5000 20000 50000).")
    parser.add_argument("--ratio-frames", type=int, default=4, help="Frames baked per solver for the ratio (default 4).")
    parser.add_argument("--out", default=str(ROOT / "bench" / "results" / "profile_learned.json"),
                        help="JSON output (default bench/results/profile_learned.json).")
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)  # internal: one size in this process
    parser.add_argument("--engine", help=argparse.SUPPRESS)  # internal: the checkout whose engine --one uses
    args = parser.parse_args(argv)
    if args.one:
        sys.path.insert(0, args.engine)
        os.chdir(args.engine)
        print(json.dumps(one_size(args.one, args.steps, args.repeats)))
        return 0
    sys.path.insert(0, str(ROOT))
    codes = [("new", ROOT)] + ([("old", Path(args.old).resolve())] if args.old else [])
    rows = []
    for size in args.sizes:
        for code, root in codes:
            rows.append({"code": code, **run_one(root, size, args.steps, args.repeats)})
            print(f"phases {rows[-1]}", file=sys.stderr, flush=True)
    memory = []
    if args.memory_size:
        for code, root in codes:
            memory.append({"code": code, **run_one(root, args.memory_size, args.steps, 1)})
            print(f"memory {memory[-1]}", file=sys.stderr, flush=True)
    ratios = []
    for size in args.ratio_sizes:
        ratios.append({"target_particles": size, **per_frame_ratio(size, args.ratio_frames)})
        print(f"ratio {ratios[-1]}", file=sys.stderr, flush=True)

    print("Per learned step: wall seconds, particle-steps/s (wall), CPU seconds and CPU seconds per phase:")
    print_phases(rows)
    for size in args.sizes:
        pair = {r["code"]: r for r in rows if r["particles"] and "error" not in r and abs(r["particles"] - size) < 0.2 * size}
        if "old" in pair and "new" in pair:
            print(f"  {size}: new/old throughput {pair['new']['particle_steps_per_second'] / pair['old']['particle_steps_per_second']:.2f}x "
                  f"(wall), {pair['old']['cpu_seconds_per_step'] / pair['new']['cpu_seconds_per_step']:.2f}x (CPU)")
    if memory:
        print(f"Peak resident memory at {args.memory_size} particles:")
        print_phases(memory)
    if ratios:
        print("Learned against reference, seconds per frame (same shot, same run):")
        print(f"{'particles':>9} {'learned s/frame':>15} {'steps/frame':>11} {'reference s/frame':>17} {'substeps/frame':>14} {'ratio':>6}")
        for r in ratios:
            print(f"{r['learned']['particles']:>9} {r['learned']['seconds_per_frame']:>15.3f} {r['learned']['steps_per_frame']:>11.1f} "
                  f"{r['sph']['seconds_per_frame']:>17.3f} {r['sph']['steps_per_frame']:>14.1f} {r['ratio']:>6.1f}")
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"args": vars(args), "phases": rows, "memory": memory, "per_frame_ratio": ratios},
                              indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
