"""Speed and memory of the learned preview against the reference solver (a benchmark, not a test).

    python -m bench.bench_learned [--sizes 20000 50000 100000] [--steps 4] [--shot-seconds 0.5]
                                  [--relax-iterations N] [--repeats R]

1. Same shot, equal spacing: wall seconds per simulated second of the learned preview and of
   the DFSPH reference on one shot (a block of water dropped beside a box in a tank, about
   ``--shot-particles`` particles), and their ratio (one run, so the ratio is comparable).
2. Throughput of the learned step at 20k, 50k and 100k particles (a jittered block resting in
   a tank): particle-steps per second over ``--steps`` steps after warm-up, and the peak
   resident memory of that run (each size in its own process, ru_maxrss).

Prints a table, writes bench/results/bench_learned.json and
bench/results/learned_throughput.json ({"particle_substeps_per_second": x} at the 20k size,
read by engine.estimate).
"""

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def tank_scene(particles, spacing=0.025, fps=24, frame_end=13, obstacle=True):
    """Scene dict: a block of about ``particles`` particles in a tank 2x its footprint."""
    from engine import mesh_io

    side = (particles / 1.5) ** (1.0 / 3.0)  # block side in spacings, height 1.5x
    lx, ly, lz = side, side, 1.5 * side
    mesh = lambda vt: {"vertices": vt[0], "triangles": vt[1]}  # noqa: E731
    d = spacing
    scene = {
        "format": "splashdraft-scene", "version": 1, "name": f"bench_{particles}", "fps": fps,
        "frame_start": 1, "frame_end": frame_end, "particle_spacing": d,
        "bounds": {"min": [-0.5 * d] * 3, "max": [(2.2 * lx + 0.5) * d, (ly + 0.5) * d, (lz + 6) * d]},
        "emitters": [{"name": "block", "type": "fill",
                      "mesh": mesh(mesh_io.box_mesh(np.zeros(3), np.array([lx, ly, lz]) * d))}],
        "colliders": [],
    }  # fmt: skip
    if obstacle:
        lo = np.array([1.5 * lx, 0.3 * ly, -0.5]) * d
        hi = np.array([1.8 * lx, 0.7 * ly + 1, 0.25 * lz]) * d
        scene["colliders"].append({"name": "box", "mesh": mesh(mesh_io.box_mesh(lo, hi))})
    return scene


def learned_solver(model=None, relax_iterations=None):
    from engine.solvers import make_solver

    options = {} if relax_iterations is None else {"relax_iterations": relax_iterations}
    return make_solver("learned", model=model, **options)


def throughput(particles, steps, model=None, relax_iterations=None, repeats=0):
    """Run in this process: particle-steps/s of LearnedSolver.advance and the peak RSS (MiB).

    With ``repeats`` > 0, also the minimum wall time of one step advanced ``repeats`` times from the
    same state (the least disturbed figure on a shared machine).
    """
    from engine.scene import scene_from_dict
    from engine.world import build_world

    scene = scene_from_dict(tank_scene(particles, obstacle=False, frame_end=2 + steps))
    world = build_world(scene)
    solver = learned_solver(model, relax_iterations)
    state = solver.start(world)
    units_step = solver.contract["step_froude"] * np.sqrt(scene.particle_spacing / 9.81)
    state, _ = solver.advance(state, world, units_step)  # warm-up at full size
    n = state.count
    started = time.perf_counter()
    state, stats = solver.advance(state, world, state.time + steps * units_step)
    seconds = time.perf_counter() - started
    single = []
    for _ in range(repeats):
        started = time.perf_counter()
        solver.advance(state, world, state.time + units_step)
        single.append(time.perf_counter() - started)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return {"particles": n, "steps": stats.substeps, "seconds": seconds,
            "relax_iterations": solver.relax_iterations,
            "min_seconds_per_step": min(single) if single else None,
            "particle_steps_per_second": n * stats.substeps / seconds, "peak_rss_mib": peak,
            "seconds_per_step": seconds / stats.substeps}


def same_shot(particles, seconds, model=None, relax_iterations=None):
    """Wall seconds per simulated second of both solvers on one shot (learned first)."""
    import tempfile

    from engine.bake import bake
    from engine.cache import open_cache
    from engine.scene import save_scene

    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        data = tank_scene(particles, frame_end=1 + int(round(seconds * 24)))
        save_scene(folder / "scene.json", data)
        out = {}
        for solver in ("learned", "sph"):
            started = time.perf_counter()
            learned = learned_solver(model, relax_iterations) if solver == "learned" else None
            bake(folder / "scene.json", solver, folder / solver, use_signals=False, solver=learned)
            wall = time.perf_counter() - started
            reader = open_cache(folder / solver)
            frames = reader.frames
            compute = sum(reader.manifest["frames"][str(f)]["seconds"] for f in frames)
            sim = reader.manifest["frames"][str(frames[-1])]["time"]
            substeps = sum(reader.manifest["frames"][str(f)]["substeps"] for f in frames)
            out[solver] = {"wall_seconds": wall, "frame_seconds": compute, "simulated_seconds": sim,
                           "seconds_per_simulated_second": compute / sim, "substeps": substeps,
                           "particles": reader.manifest["frames"][str(frames[0])]["particles"]}
        out["speedup"] = out["sph"]["seconds_per_simulated_second"] / out["learned"]["seconds_per_simulated_second"]
        return out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", type=int, nargs="*", default=[20000, 50000, 100000])
    parser.add_argument("--steps", type=int, default=4)
    parser.add_argument("--shot-particles", type=int, default=4000)
    parser.add_argument("--shot-seconds", type=float, default=0.5)
    parser.add_argument("--model", default=None)
    parser.add_argument("--relax-iterations", type=int, default=None,
                        help="Density relaxation iterations per learned step (default: the solver's default).")
    parser.add_argument("--repeats", type=int, default=0,
                        help="Also time one step this many times from the same state and report the minimum (default 0).")
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)  # internal: one throughput size
    args = parser.parse_args(argv)
    if args.one:
        print(json.dumps(throughput(args.one, args.steps, args.model, args.relax_iterations, args.repeats)))
        return 0
    rows = []
    for size in args.sizes:
        command = [sys.executable, "-m", "bench.bench_learned", "--one", str(size), "--steps", str(args.steps), "--repeats", str(args.repeats)]
        if args.model:
            command += ["--model", args.model]
        if args.relax_iterations is not None:
            command += ["--relax-iterations", str(args.relax_iterations)]
        done = subprocess.run(command, capture_output=True, text=True, cwd=ROOT)
        if done.returncode != 0:
            rows.append({"particles": size, "error": done.stderr.strip().splitlines()[-1:]})
            continue
        rows.append(json.loads(done.stdout.strip().splitlines()[-1]))
        print(f"throughput {rows[-1]}", file=sys.stderr, flush=True)
    shot = same_shot(args.shot_particles, args.shot_seconds, args.model, args.relax_iterations) if args.shot_seconds > 0 else None
    print(f"{'particles':>10} {'s/step':>8} {'min s/step':>10} {'particle-steps/s':>17} {'peak RSS MiB':>13}")
    for r in rows:
        if "error" in r:
            print(f"{r['particles']:>10} error: {r['error']}")
        else:
            least = r.get("min_seconds_per_step")
            print(f"{r['particles']:>10} {r['seconds_per_step']:>8.3f} {(least if least else float('nan')):>10.3f} "
                  f"{r['particle_steps_per_second']:>17.0f} {r['peak_rss_mib']:>13.0f}")
    if shot:
        print(f"same shot ({shot['learned']['particles']} particles, {shot['learned']['simulated_seconds']:.2f} s simulated): "
              f"learned {shot['learned']['seconds_per_simulated_second']:.1f} s/s ({shot['learned']['substeps']} steps), "
              f"reference {shot['sph']['seconds_per_simulated_second']:.1f} s/s ({shot['sph']['substeps']} substeps), "
              f"speed-up {shot['speedup']:.1f}x")
    results = ROOT / "bench" / "results"
    results.mkdir(parents=True, exist_ok=True)
    (results / "bench_learned.json").write_text(json.dumps({"throughput": rows, "same_shot": shot, "args": vars(args)}, indent=1) + "\n")
    ok = [r for r in rows if "error" not in r]
    if ok:
        (results / "learned_throughput.json").write_text(
            json.dumps({"particle_substeps_per_second": ok[0]["particle_steps_per_second"], "particles": ok[0]["particles"]}) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
