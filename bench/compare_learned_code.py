"""Does a speed change keep the learned preview's output? Old code against new on one shot (not a test).

    nice .venv/bin/python -m bench.compare_learned_code --old /path/to/old/checkout [--frames 48]
                                                        [--preset full] [--out bench/results/same_output]

Rolls out the built-in demo shot with the learned preview (``LearnedSolver.advance`` frame by
frame, as a bake does) three times, each in its own process with its own code:

- ``old``: the code of ``--old`` (another checkout of the repository, e.g. ``git worktree add
  /tmp/old main``);
- ``old, nudged``: the same old code with every starting position moved by a random 1e-7
  spacings. This is the noise floor: the preview's network has no smooth cut-off at its radius,
  and the demo starts on a lattice with many pairs exactly 2 spacings apart, so a rounding
  difference anywhere (a different summation order, float32 instead of float64) moves pairs
  across the radius and the shot drifts apart from there on;
- ``new``: this checkout.

For each frame it reports the largest and mean position difference of new and of nudged against
old (particles matched by id, in spacings) and the Chamfer distance (engine.compare), and the
seconds each run spent in ``advance``. A speed change keeps the output when new stays as close to
old as nudged does, and the first frames (before pairs cross the radius) agree to float rounding.

Prints a table and writes ``OUT/same_output.json``.
"""

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

#: Run inside the checkout under test (its own engine): demo shot, learned preview, frame by frame.
ROLLOUT = r"""
import dataclasses, sys, tempfile, time
from pathlib import Path
import numpy as np
from engine.demo import write_demo_scene
from engine.scene import load_scene
from engine.world import build_world
from engine.learned import LearnedSolver
frames, preset, nudge, out = int(sys.argv[1]), sys.argv[2], float(sys.argv[3]), sys.argv[4]
world = build_world(load_scene(write_demo_scene(Path(tempfile.mkdtemp()), preset=preset)))
solver = LearnedSolver()
state = solver.start(world)
if nudge:
    rng = np.random.default_rng(0)
    state = dataclasses.replace(state, positions=state.positions
                                + nudge * world.particle_spacing * rng.uniform(-1, 1, state.positions.shape))
positions, ids, seconds = [], [], []
for frame in range(1, frames):
    started = time.perf_counter()
    state, _ = solver.advance(state, world, state.time + 1.0 / world.fps)
    seconds.append(time.perf_counter() - started)
    order = np.argsort(state.ids)
    positions.append(state.positions[order]); ids.append(state.ids[order])
if len({len(i) for i in ids}) > 1:
    sys.exit("the particle count changed during the shot; compare a shot that keeps its particles")
np.savez(out, positions=np.array(positions), ids=np.array(ids), seconds=np.array(seconds), spacing=world.particle_spacing)
"""


def rollout(checkout, frames, preset, nudge, out):
    """Run ROLLOUT in ``checkout``; returns the npz path."""
    subprocess.run([sys.executable, "-c", ROLLOUT, str(frames), preset, repr(nudge), str(out)], cwd=checkout,
                   check=True)
    return out


def differences(reference, other, spacing):
    """Per frame: max and mean |x_other - x_ref| (spacings) and the Chamfer distance (spacings)."""
    from engine.compare import chamfer_distance

    rows = []
    for xa, xb in zip(reference, other):
        gap = np.linalg.norm(xb - xa, axis=1) / spacing
        rows.append({"max": float(gap.max()), "mean": float(gap.mean()),
                     "chamfer": float(chamfer_distance(xa, xb)[0]) / spacing})
    return rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--old", required=True, help="Another checkout of the repository (the old code).")
    parser.add_argument("--frames", type=int, default=48, help="Frames of the demo shot (default 48).")
    parser.add_argument("--preset", choices=("full", "small"), default="full", help="Demo preset (default full).")
    parser.add_argument("--nudge", type=float, default=1e-7,
                        help="Starting-position noise of the noise-floor run, in spacings (default 1e-7).")
    parser.add_argument("--out", default=str(ROOT / "bench" / "results" / "same_output"),
                        help="Folder for the rollouts and the JSON (default bench/results/same_output).")
    args = parser.parse_args(argv)
    out = Path(args.out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    old = Path(args.old).resolve()
    runs = {name: np.load(rollout(checkout, args.frames, args.preset, nudge, out / f"{name}.npz"), allow_pickle=False)
            for name, checkout, nudge in (("old", old, 0.0), ("nudged", old, args.nudge), ("new", ROOT, 0.0))}
    spacing = float(runs["old"]["spacing"])
    same_ids = all(np.array_equal(runs["old"]["ids"], runs[k]["ids"]) for k in ("nudged", "new"))
    new = differences(runs["old"]["positions"], runs["new"]["positions"], spacing)
    nudged = differences(runs["old"]["positions"], runs["nudged"]["positions"], spacing)
    seconds = {k: runs[k]["seconds"].tolist() for k in runs}
    print(f"{'frame':>5} {'new max dx':>11} {'new mean':>9} {'new chamfer':>11} | {'nudged max':>10} "
          f"{'nudged mean':>11} {'nudged chamfer':>14} | {'old s':>6} {'new s':>6}   [d = spacings]")
    for k, (a, b) in enumerate(zip(new, nudged)):
        print(f"{k + 2:>5} {a['max']:>11.2e} {a['mean']:>9.2e} {a['chamfer']:>11.2e} | {b['max']:>10.2e} "
              f"{b['mean']:>11.2e} {b['chamfer']:>14.2e} | {seconds['old'][k]:>6.2f} {seconds['new'][k]:>6.2f}")
    old_s, new_s = sum(seconds["old"]), sum(seconds["new"])
    print(f"same particles in every frame: {same_ids}; mean Chamfer over the shot: new {np.mean([r['chamfer'] for r in new]):.3g} d, "
          f"nudged {np.mean([r['chamfer'] for r in nudged]):.3g} d; advance seconds old {old_s:.1f}, new {new_s:.1f} "
          f"({old_s / new_s:.2f}x, one run each)")
    summary = {"old": str(old), "frames": args.frames, "preset": args.preset, "nudge_spacings": args.nudge,
               "spacing": spacing, "same_ids": same_ids, "new_vs_old": new, "nudged_vs_old": nudged,
               "advance_seconds": seconds}
    (out / "same_output.json").write_text(json.dumps(summary, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
