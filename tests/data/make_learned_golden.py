"""Regenerate ``learned_golden.npz``: a few learned-preview frames from a fixed jittered start.

    .venv/bin/python tests/data/make_learned_golden.py --checkout /path/to/checkout [--out tests/data/learned_golden.npz]

The file pins the learned preview's output so that speed work can be checked against the code
it replaced (tests/test_learned.py, ``test_learned_steps_match_the_stored_output_of_the_code_before_the_speed_work``).
``rollout`` runs with whichever engine is importable: this script runs it inside ``--checkout``
(its own engine), and the test runs it with the engine under test. The first file came from
commit 80d606c (main before the speed work of issue 11, item 4) with preview-gn4; it was made again
for preview-gn7 when that model was shipped (2026-12-04), with the code the gn4 file had just passed on.

The start is a block of water whose lattice positions are jittered by up to 0.15 spacings
(seeded), so that no neighbour pair sits at the model's radius: on an exact lattice many pairs
are exactly 2 spacings apart, and float rounding alone decides whether they are neighbours
(bench/compare_learned_code.py).
"""

import argparse
import dataclasses
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

FRAMES = 6
JITTER_SPACINGS = 0.15
SEED = 20261204


def scene_dict(d=0.025, frame_end=1 + FRAMES, name="learned_golden"):
    """A block of water beside a box collider in a walled tank (also the rollout test's scene)."""
    from engine import mesh_io

    mesh = lambda vt: {"vertices": vt[0], "triangles": vt[1]}  # noqa: E731
    return {
        "format": "splashdraft-scene", "version": 1, "name": name, "fps": 24,
        "frame_start": 1, "frame_end": frame_end, "particle_spacing": d,
        "bounds": {"min": [-0.5 * d] * 3, "max": [15.5 * d, 9.5 * d, 19.5 * d]},
        "emitters": [{"name": "block", "type": "fill",
                      "mesh": mesh(mesh_io.box_mesh(np.array([0.0, 0.0, 3.0]) * d, np.array([7.0, 9.0, 12.0]) * d))}],
        "colliders": [{"name": "box", "mesh": mesh(mesh_io.box_mesh(np.array([10.0, 2.0, -0.5]) * d,
                                                                     np.array([14.0, 8.0, 4.0]) * d))}],
    }  # fmt: skip


def rollout():
    """Positions (FRAMES, N, 3) m and ids (N,) after each of FRAMES frames of the learned preview."""
    from engine.learned import LearnedSolver
    from engine.scene import scene_from_dict
    from engine.world import build_world

    world = build_world(scene_from_dict(scene_dict()))
    solver = LearnedSolver()
    state = solver.start(world)
    rng = np.random.default_rng(SEED)
    jitter = JITTER_SPACINGS * world.particle_spacing * rng.uniform(-1, 1, state.positions.shape)
    state = dataclasses.replace(state, positions=state.positions + jitter)
    positions = []
    for _ in range(FRAMES):
        state, _ = solver.advance(state, world, state.time + 1.0 / world.fps)
        positions.append(state.positions[np.argsort(state.ids)])
    return np.array(positions), np.sort(state.ids)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--checkout", required=True, help="The checkout whose engine makes the file.")
    parser.add_argument("--out", default=str(Path(__file__).with_name("learned_golden.npz")))
    parser.add_argument("--inside", action="store_true", help=argparse.SUPPRESS)  # internal
    args = parser.parse_args(argv)
    if not args.inside:
        checkout = Path(args.checkout).resolve()
        subprocess.run([sys.executable, __file__, "--inside", "--checkout", str(checkout), "--out",
                        str(Path(args.out).resolve())], cwd=checkout, check=True,
                       env={**os.environ, "PYTHONPATH": str(checkout)})
        return 0
    positions, ids = rollout()
    commit = subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True, text=True).stdout.strip()
    np.savez_compressed(args.out, positions=positions, ids=ids, commit=np.array(commit))
    print(json.dumps({"out": args.out, "commit": commit, "particles": len(ids), "frames": len(positions)}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
