"""CPU of one bake under a Dask worker's malloc setting, with and without engine.farm.keep_freed_memory.

    python -m bench.bench_worker_malloc [--spacing 0.04] [--frames 8] [--repeat 2]

Dask's nanny starts worker processes with MALLOC_TRIM_THRESHOLD_=65536. This bakes the demo shot
(small preset at ``--spacing``) in a fresh process three ways, interleaved ``--repeat`` times:

1. plain: the environment of an ordinary command line;
2. dask: MALLOC_TRIM_THRESHOLD_=65536, as in a Dask worker before this fix;
3. dask + keep: the same, with ``engine.farm.keep_freed_memory()`` called first, as every wedge
   and ``run_jobs`` task now does.

Reports user and system CPU seconds and minor page faults of the bake alone (getrusage around
it; page faults do not depend on how busy the machine is, CPU seconds do a little). Prints a
table and JSON, and writes bench/results/bench_worker_malloc.json.
"""

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

from bench.report import write_result

ROOT = Path(__file__).resolve().parents[1]

CHILD = """
import json, resource, sys
from engine.farm import keep_freed_memory
from engine.wedge import bake_variant
kept = keep_freed_memory() if sys.argv[3] == "keep" else None
before = resource.getrusage(resource.RUSAGE_SELF)
report = bake_variant({"name": "x", "scene_file": sys.argv[1], "cache": sys.argv[2], "solver": "sph",
                       "frames": None, "model": None})
after = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps({"user": after.ru_utime - before.ru_utime, "system": after.ru_stime - before.ru_stime,
                  "minor_faults": after.ru_minflt - before.ru_minflt, "state": report["state"], "kept": kept}))
"""

CASES = {"plain": (None, ""), "dask": ("65536", ""), "dask + keep": ("65536", "keep")}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--spacing", type=float, default=0.04, help="Particle spacing (m). Default 0.04.")
    parser.add_argument("--frames", type=int, default=8, help="Frames. Default 8.")
    parser.add_argument("--repeat", type=int, default=2, help="Interleaved repeats. Default 2.")
    args = parser.parse_args(argv)

    from engine.demo import write_demo_scene

    runs = {name: [] for name in CASES}
    with tempfile.TemporaryDirectory(prefix="bench_malloc_") as tmp:
        scene = write_demo_scene(Path(tmp) / "scene", spacing=args.spacing, preset="small", frame_end=args.frames)
        for repeat in range(args.repeat):
            for name, (trim, keep) in CASES.items():
                env = dict(os.environ, SPLASHDRAFT_THREADS="1", OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
                env.pop("MALLOC_TRIM_THRESHOLD_", None)
                if trim:
                    env["MALLOC_TRIM_THRESHOLD_"] = trim
                cache = Path(tmp) / f"{repeat}-{name.replace(' ', '')}"
                done = subprocess.run([sys.executable, "-c", CHILD, str(scene), str(cache), keep or "-"],
                                      cwd=ROOT, env=env, capture_output=True, text=True, check=True)  # fmt: skip
                runs[name].append(json.loads(done.stdout.strip().splitlines()[-1]))
    result = {"spacing": args.spacing, "frames": args.frames, "repeat": args.repeat, "cases": {}}
    print(f"one bake of the demo shot, {args.frames} frames at {args.spacing} m, median of {args.repeat}")
    print(f"{'case':<14}{'user s':>9}{'system s':>10}{'minor faults':>14}")
    for name, rows in runs.items():
        summary = {key: statistics.median(r[key] for r in rows) for key in ("user", "system", "minor_faults")}
        result["cases"][name] = {k: round(v, 3) for k, v in summary.items()}
        print(f"{name:<14}{summary['user']:>9.2f}{summary['system']:>10.2f}{summary['minor_faults']:>14,.0f}")
    print(json.dumps(result))
    write_result("bench_worker_malloc.json", result)
    return 0


if __name__ == "__main__":
    sys.exit(main())
