"""Benchmark of the estimate (engine.estimate.quick_estimate): its speed, and its bake time against real bakes.

Usage:  .venv/bin/python -m bench.bench_estimate [--time [--large]]

Speed (without --time): the estimate answers in <= 0.2 s at any spacing (nothing is built; fine spacings
over the budget are refused from the closed form). Shot: the demo (water block against the walls,
so the outside-bounds count samples it). Writes bench/results/estimate.json.

Time (``--time``, about two minutes on 2 cores): for each solver, this computer is measured with
the calibration shot (engine.calibration.calibrate, kept in a temporary calibration file), then
shots of 1.5k-3k particles that are not the calibration shot (the demo at 4 cm, and the suite's
ring_dam and drop_pool, 0.25 s each) are estimated and baked; the table gives the estimated time
before and after calibration and the measured wall time of the bake (engine.bake.bake, in this
process); ``--large`` adds the full demo shot (about 24k particles, 8 frames; a few more minutes).
Target: measured / estimated between 0.5 and 2 for both solvers. Writes
bench/results/estimate_time.json.
"""

import json
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

from engine.demo import write_demo_scene  # noqa: E402
from engine.errors import BudgetError  # noqa: E402
from engine.estimate import quick_estimate  # noqa: E402
from engine.scene import load_scene  # noqa: E402

TARGET_SECONDS = 0.2
SPACINGS = (0.05, 0.02, 0.01, 0.005, 0.002, 0.001, 0.0005)


def time_shots(large=False):
    """(name, Scene) of the time check's shots (none of them the calibration shot); ``large`` adds
    the full demo shot (2 cm, about 24k particles) for its first 8 frames."""
    from bench import splash_shots
    from engine.scene import scene_from_dict

    demo = load_scene(write_demo_scene(tempfile.mkdtemp(prefix="splashdraft_bench_"), preset="small", spacing=0.04))
    shots = [("demo 4 cm", demo)] + [(name, scene_from_dict(splash_shots.shot(name, seconds=0.25)))
                                     for name in ("ring_dam", "drop_pool")]
    if large:
        full = write_demo_scene(tempfile.mkdtemp(prefix="splashdraft_bench_"), preset="full", frame_end=8)
        shots.append(("demo 2 cm", load_scene(full)))
    return shots


def time_check(large=False):
    """Estimated against measured bake time, before and after calibrating this computer."""
    import os

    from engine import calibration
    from engine.bake import bake

    os.environ["SPLASHDRAFT_CALIBRATION"] = str(Path(tempfile.mkdtemp(prefix="splashdraft_cal_")) / "calibration.json")
    rows = []
    print(f"{'solver':8s} {'shot':10s} {'particles':>9s} {'rough s':>8s} {'estimated s':>11s} {'measured s':>10s} "
          f"{'measured/estimated':>18s}")
    for solver in ("sph", "learned"):
        started = time.perf_counter()
        measured = calibration.calibrate(solver)
        calibration_seconds = time.perf_counter() - started
        print(f"{solver:8s} calibration: {measured['rate']:,.0f} particle-steps/s, {measured['overhead_seconds']:.3f} s "
              f"per frame, start-up {measured['startup_seconds']:.2f} s (took {calibration_seconds:.1f} s)")
        for name, scene in time_shots(large):
            saved = os.environ["SPLASHDRAFT_CALIBRATION"]
            os.environ["SPLASHDRAFT_CALIBRATION"] = saved + ".absent"
            rough, _ = quick_estimate(scene, solver=solver)
            os.environ["SPLASHDRAFT_CALIBRATION"] = saved
            estimate, _ = quick_estimate(scene, solver=solver)
            assert estimate.is_measured
            out = tempfile.mkdtemp(prefix="splashdraft_bench_bake_")
            started = time.perf_counter()
            result = bake(scene, solver, Path(out) / "bake", use_signals=False)
            seconds = time.perf_counter() - started
            ratio = seconds / estimate.seconds
            rows.append({"solver": solver, "shot": name, "particles": result.particles,
                         "estimated_particles": estimate.particles, "frames": estimate.frames,
                         "rough_seconds": rough.seconds, "estimated_seconds": estimate.seconds,
                         "measured_seconds": seconds, "measured_over_estimated": ratio,
                         "rough_measured_over_estimated": seconds / rough.seconds,
                         "calibration": measured, "calibration_seconds": calibration_seconds})
            print(f"{solver:8s} {name:10s} {result.particles:9,d} {rough.seconds:8.2f} {estimate.seconds:11.2f} "
                  f"{seconds:10.2f} {ratio:18.2f}", flush=True)
    worst = max(max(row["measured_over_estimated"], 1 / row["measured_over_estimated"]) for row in rows)
    print(f"worst factor {worst:.2f} (target <= 2: {'met' if worst <= 2 else 'missed'}); before calibration "
          f"{max(max(r['rough_measured_over_estimated'], 1 / r['rough_measured_over_estimated']) for r in rows):.2f}")
    target = ROOT / "bench" / "results" / "estimate_time.json"
    target.write_text(json.dumps({"rows": rows, "worst_factor": worst, "target_factor": 2.0}, indent=1) + "\n")
    print(f"wrote {target.relative_to(ROOT)}")
    return worst <= 2


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    if "--time" in argv:
        return 0 if time_check(large="--large" in argv) else 1
    rows = []
    print(f"{'spacing m':>10s} {'best s':>8s}  result")
    for spacing in SPACINGS:
        scene = load_scene(write_demo_scene(tempfile.mkdtemp(prefix="splashdraft_bench_"), preset="small",
                                            spacing=spacing))
        times = []
        for _ in range(3):
            start = time.perf_counter()
            try:
                estimate, _ = quick_estimate(scene, max_particles=100_000_000)
                result = f"{estimate.particles:,} particles"
            except BudgetError:
                result = "refused over the budget of 100,000,000"
            times.append(time.perf_counter() - start)
        rows.append({"spacing": spacing, "best_seconds": min(times), "result": result})
        print(f"{spacing:10.4f} {min(times):8.3f}  {result}")
    worst = max(row["best_seconds"] for row in rows)
    print(f"slowest {worst:.3f} s (target <= {TARGET_SECONDS} s: {'met' if worst <= TARGET_SECONDS else 'missed'})")
    target = ROOT / "bench" / "results" / "estimate.json"
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(json.dumps({"rows": rows, "target_seconds": TARGET_SECONDS}, indent=1) + "\n")
    print(f"wrote {target.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
