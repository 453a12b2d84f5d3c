"""Wedge wall time on Dask against the same wedge baked serially (a benchmark, not a test).

    python -m bench.bench_wedge [--spacing 0.04] [--frames 24] [--workers 2] [--values 0.01,0.02,0.03,0.04]
                                [--repeat 2]

The demo shot (``engine.demo``, small preset by default) with ``fluid.viscosity`` varied over
four values, baked three ways in one run, back to back:

1. serial: ``--workers 0``, one variant after another in this process;
2. local: a LocalCluster of ``--workers`` worker processes started by the wedge itself (its
   start-up is in the time);
3. scheduler: a separate LocalCluster of as many workers started here first and addressed
   by its scheduler address (``--scheduler``), as a farm would be; its start-up is not in the time.

The three are run ``--repeat`` times, interleaved (serial, local, scheduler, serial, ...), and the
median wall time of each is compared, so that a burst of someone else's work on a shared machine
touches all three alike. Reports wall seconds of each, the ratio of 2 and 3 to 1 (target: at most
0.6 on 2 cores), and whether every frame file of 2 and 3 is byte-identical to 1.

The machine is shared, so each run also records how busy the machine was: the CPU seconds this
benchmark used (itself and its reaped worker processes, ``getrusage``) and the CPU seconds the
whole machine was busy (``/proc/stat``); the difference is other people's work, and
``free_cores`` = cores - others' CPU seconds / wall seconds is what was left for the wedge. A
wedge on 2 workers cannot beat serial by more than min(2, free_cores) / 1.

Prints a table and JSON, and writes bench/results/bench_wedge.json.
"""

import argparse
import json
import logging
import os
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

from bench.report import write_result


def frames_of(wedge):
    manifest = json.loads((Path(wedge) / "wedge.json").read_text())
    return {v["name"]: {p.name: p.read_bytes() for p in sorted(Path(v["cache"]).glob("points_*.ply"))}
            for v in manifest["variants"]}  # fmt: skip


def machine_busy_seconds():
    """CPU seconds the whole machine has spent busy since boot (all cores; /proc/stat)."""
    fields = [int(x) for x in Path("/proc/stat").read_text().splitlines()[0].split()[1:]]
    idle = fields[3] + fields[4]  # idle + iowait
    return (sum(fields[:8]) - idle) / os.sysconf("SC_CLK_TCK")


def own_cpu_seconds():
    """CPU seconds of this process and of its children that have ended (worker processes, once reaped)."""
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


class Meter:
    """Wall time, own CPU and the machine's busy CPU over a block."""

    def __enter__(self):
        self.wall, self.own, self.busy = time.monotonic(), own_cpu_seconds(), machine_busy_seconds()
        return self

    def stop_clock(self):
        self.seconds = time.monotonic() - self.wall

    def __exit__(self, *exc):
        if not hasattr(self, "seconds"):
            self.stop_clock()
        wall = time.monotonic() - self.wall
        self.own_cpu = own_cpu_seconds() - self.own
        self.others_cpu = max(0.0, machine_busy_seconds() - self.busy - self.own_cpu)
        self.free_cores = max(0.0, (os.cpu_count() or 1) - self.others_cpu / wall)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--spacing", type=float, default=0.04, help="Particle spacing (m). Default 0.04.")
    parser.add_argument("--frames", type=int, default=24, help="Frames per variant. Default 24.")
    parser.add_argument("--workers", type=int, default=2, help="Dask workers. Default 2.")
    parser.add_argument("--values", default="0.01,0.02,0.03,0.04", help="fluid.viscosity values.")
    parser.add_argument("--solver", choices=("sph", "learned"), default="sph")
    parser.add_argument("--repeat", type=int, default=2, help="Interleaved repeats of the three runs. Default 2.")
    args = parser.parse_args(argv)

    import distributed

    from engine.demo import write_demo_scene
    from engine.farm import WedgeProgress, run_wedge
    from engine.wedge import parse_vary

    vary = [parse_vary(f"fluid.viscosity={args.values}")]
    runs = {"serial": [], "local": [], "scheduler": []}
    quiet = WedgeProgress("none")
    identical = {"local": True, "scheduler": True}
    with tempfile.TemporaryDirectory(prefix="bench_wedge_") as tmp:
        scene = write_demo_scene(Path(tmp) / "scene", spacing=args.spacing, preset="small", frame_end=args.frames)
        for repeat in range(args.repeat):
            out = {name: Path(tmp) / f"{name}{repeat}" for name in runs}
            with Meter() as meter:
                run_wedge(scene, vary, args.solver, out["serial"], workers=0, progress=quiet)
            runs["serial"].append(meter)
            with Meter() as meter:
                run_wedge(scene, vary, args.solver, out["local"], workers=args.workers, progress=quiet)
            runs["local"].append(meter)
            with distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                          dashboard_address=None, silence_logs=logging.ERROR) as cluster:  # fmt: skip
                with Meter() as meter:
                    run_wedge(scene, vary, args.solver, out["scheduler"], scheduler=cluster.scheduler_address,
                              progress=quiet)  # fmt: skip
                    meter.stop_clock()
                    cluster.close()  # the workers' CPU is counted once they are reaped
            runs["scheduler"].append(meter)
            reference = frames_of(out["serial"])
            for name in identical:
                identical[name] = identical[name] and frames_of(out[name]) == reference
            print(f"repeat {repeat + 1}: " + ", ".join(f"{name} {runs[name][-1].seconds:.2f} s "
                  f"({runs[name][-1].free_cores:.2f} cores free)" for name in runs), file=sys.stderr)  # fmt: skip
        particles = json.loads((out["serial"] / "wedge.json").read_text())["variants"][0]["particles"]
    wall = {name: statistics.median(m.seconds for m in meters) for name, meters in runs.items()}
    result = {
        "variants": len(vary[0][1]), "frames": args.frames, "spacing": args.spacing, "particles": particles,
        "solver": args.solver, "workers": args.workers, "repeat": args.repeat, "cores": os.cpu_count(),
        "seconds": {k: round(v, 2) for k, v in wall.items()},
        "ratio_to_serial": {k: round(wall[k] / wall["serial"], 3) for k in ("local", "scheduler")},
        "identical_to_serial": identical, "target_ratio": 0.6,
        "runs": {name: [{"seconds": round(m.seconds, 2), "own_cpu_seconds": round(m.own_cpu, 2),
                         "others_cpu_seconds": round(m.others_cpu, 2), "free_cores": round(m.free_cores, 2)}
                        for m in meters] for name, meters in runs.items()},
    }  # fmt: skip
    print(f"wedge of {result['variants']} variants x {args.frames} frames, {particles:,} particles, "
          f"{args.solver} solver, {args.workers} workers, median of {args.repeat}")
    print(f"{'run':<12}{'wall s':>10}{'x serial':>10}{'own cpu s':>11}{'free cores':>12}  frames identical to serial")
    for name in runs:
        ratio = "1.000" if name == "serial" else f"{result['ratio_to_serial'][name]:.3f}"
        same = "-" if name == "serial" else ("yes" if identical[name] else "NO")
        cpu = statistics.median(m.own_cpu for m in runs[name])
        free = statistics.median(m.free_cores for m in runs[name])
        print(f"{name:<12}{wall[name]:>10.2f}{ratio:>10}{cpu:>11.2f}{free:>12.2f}  {same}")
    print(json.dumps(result))
    write_result("bench_wedge.json", result)
    return 0


if __name__ == "__main__":
    sys.exit(main())
