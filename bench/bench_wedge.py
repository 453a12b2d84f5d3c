"""Wedge wall time on Dask against the same wedge baked serially (a benchmark, not a test).

    python -m bench.bench_wedge [--spacing 0.05] [--frames 12] [--workers 2] [--values 0.01,0.02,0.03,0.04]

The demo shot (``engine.demo``, small preset by default) with ``fluid.viscosity`` varied over
four values, baked three ways in one run, back to back:

1. serial: ``--workers 0``, one variant after another in this process;
2. local: a LocalCluster of ``--workers`` worker processes started by the wedge itself (its
   start-up is in the time);
3. scheduler: a separate LocalCluster of as many workers started here first and addressed
   by its scheduler address (``--scheduler``), as a farm would be; its start-up is not in the time.

Reports wall seconds of each, the ratio of 2 and 3 to 1 (target: at most 0.6 on 2 cores), and
whether every frame file of 2 and 3 is byte-identical to 1. Prints a table and JSON, and writes
bench/results/bench_wedge.json.
"""

import argparse
import json
import logging
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def frames_of(wedge):
    manifest = json.loads((Path(wedge) / "wedge.json").read_text())
    return {v["name"]: {p.name: p.read_bytes() for p in sorted(Path(v["cache"]).glob("points_*.ply"))}
            for v in manifest["variants"]}  # fmt: skip


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--spacing", type=float, default=0.05, help="Particle spacing (m). Default 0.05.")
    parser.add_argument("--frames", type=int, default=12, help="Frames per variant. Default 12.")
    parser.add_argument("--workers", type=int, default=2, help="Dask workers. Default 2.")
    parser.add_argument("--values", default="0.01,0.02,0.03,0.04", help="fluid.viscosity values.")
    parser.add_argument("--solver", choices=("sph", "learned"), default="sph")
    args = parser.parse_args(argv)

    import distributed

    from engine.demo import write_demo_scene
    from engine.farm import WedgeProgress, run_wedge
    from engine.wedge import parse_vary

    vary = [parse_vary(f"fluid.viscosity={args.values}")]
    rows = {}
    with tempfile.TemporaryDirectory(prefix="bench_wedge_") as tmp:
        scene = write_demo_scene(Path(tmp) / "scene", spacing=args.spacing, preset="small", frame_end=args.frames)
        quiet = WedgeProgress("none")
        started = time.monotonic()
        run_wedge(scene, vary, args.solver, Path(tmp) / "serial", workers=0, progress=quiet)
        rows["serial"] = time.monotonic() - started
        started = time.monotonic()
        run_wedge(scene, vary, args.solver, Path(tmp) / "local", workers=args.workers, progress=quiet)
        rows["local"] = time.monotonic() - started
        with distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                      dashboard_address=None, silence_logs=logging.ERROR) as cluster:  # fmt: skip
            started = time.monotonic()
            run_wedge(scene, vary, args.solver, Path(tmp) / "scheduler", scheduler=cluster.scheduler_address,
                      progress=quiet)  # fmt: skip
            rows["scheduler"] = time.monotonic() - started
        reference = frames_of(Path(tmp) / "serial")
        identical = {name: frames_of(Path(tmp) / name) == reference for name in ("local", "scheduler")}
        particles = json.loads((Path(tmp) / "serial" / "wedge.json").read_text())["variants"][0]["particles"]
    result = {
        "variants": len(vary[0][1]), "frames": args.frames, "spacing": args.spacing, "particles": particles,
        "solver": args.solver, "workers": args.workers,
        "seconds": {k: round(v, 2) for k, v in rows.items()},
        "ratio_to_serial": {k: round(rows[k] / rows["serial"], 3) for k in ("local", "scheduler")},
        "identical_to_serial": identical, "target_ratio": 0.6,
    }  # fmt: skip
    print(f"wedge of {result['variants']} variants x {args.frames} frames, {particles:,} particles, "
          f"{args.solver} solver, {args.workers} workers")
    print(f"{'run':<12}{'wall s':>10}{'x serial':>10}  frames identical to serial")
    for name in ("serial", "local", "scheduler"):
        ratio = "1.000" if name == "serial" else f"{result['ratio_to_serial'][name]:.3f}"
        same = "-" if name == "serial" else ("yes" if identical[name] else "NO")
        print(f"{name:<12}{rows[name]:>10.2f}{ratio:>10}  {same}")
    print(json.dumps(result))
    out = ROOT / "bench" / "results"
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench_wedge.json").write_text(json.dumps(result, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
