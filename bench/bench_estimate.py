"""Benchmark of the closed-form estimate (engine.estimate.quick_estimate) across particle spacings.

Usage:  .venv/bin/python -m bench.bench_estimate

Target: the estimate answers in <= 0.2 s at any spacing (nothing is built; fine spacings over the
budget are refused from the closed form). Shot: the demo (water block against the walls, so the
outside-bounds count samples it). Prints a table and writes bench/results/estimate.json.
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


def main():
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
