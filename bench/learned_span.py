"""A learned step spanning several frames, the frames between interpolated, against the reference.

    python -m bench.learned_span [--eval-dir bench/results/eval] [--heldout data/heldout]
                                 [--spans 1 2] [--seconds 1] [--model models/preview-gn7.onnx]
                                 [--shots paddle dam_column ...]

Measures whether the preview may take one learned step per ``span`` frames (issue 11's
"larger learned step than one frame"): the solver is advanced straight to every ``span``-th
frame time, and each frame between two steps is interpolated per particle by the cubic
Hermite curve through both ends' positions and velocities (velocities linear in time;
particles present at both ends). Every frame of the first ``--seconds`` is compared with the
reference bake: mean and max Chamfer distance in spacings, kinetic energy summed over the
frames over the reference's, and the wall time of the learned steps (interpolation excluded,
it is a few array operations). Particles a stream emits during a step are only in the frames
from the step's end on; frames left with no particle are counted, not scored.

The reference bakes are the ones ``bench.eval_learned`` leaves (``--eval-dir``: its
``--out``, holding ``<shot>/scene`` and ``<shot>/sph`` for the splash shots and the demo)
and the held-out data (``--heldout``: ``training.generate --heldout``). Not a timed test; prints
a table and writes ``learned_span.json`` into ``--eval-dir``.
"""

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

from engine.cache import open_cache
from engine.measures import chamfer_distance, kinetic_energy
from engine.particle_model import particle_mass
from engine.scene import load_scene
from engine.solvers import make_solver
from engine.world import build_world

ROOT = Path(__file__).resolve().parent.parent


def hermite(p0, v0, p1, v1, h, s) -> np.ndarray:
    """Cubic Hermite position at fraction ``s`` of a step of ``h`` s between (p0, v0) and (p1, v1)."""
    h00, h10 = 2 * s**3 - 3 * s**2 + 1, s**3 - 2 * s**2 + s
    h01, h11 = -2 * s**3 + 3 * s**2, s**3 - s**2
    return h00 * p0 + h10 * h * v0 + h01 * p1 + h11 * h * v1


def spanned_frames(scene, world, solver, span, last) -> tuple[dict, float]:
    """{frame: (positions, velocities)} from ``scene.frame_start`` to ``last``, one learned step per
    ``span`` frames, and the seconds the steps took."""
    state = solver.start(world)
    frames = {scene.frame_start: (state.positions.copy(), state.velocities.copy())}
    seconds, frame = 0.0, scene.frame_start
    while frame < last:
        k = min(span, last - frame)
        t0, t1 = state.time, (frame + k - scene.frame_start) / scene.fps
        p0, v0, ids0 = state.positions.copy(), state.velocities.copy(), state.ids.copy()
        started = time.perf_counter()
        state, _ = solver.advance(state, world, t1)
        seconds += time.perf_counter() - started
        _, a, b = np.intersect1d(ids0, state.ids, return_indices=True)
        for j in range(1, k):
            s = j / k
            frames[frame + j] = (hermite(p0[a], v0[a], state.positions[b], state.velocities[b], t1 - t0, s),
                                 (1 - s) * v0[a] + s * state.velocities[b])
        frame += k
        frames[frame] = state.positions.copy(), state.velocities.copy()
    return frames, seconds


def measure(name, scene_path, reference_dir, span, seconds, model=None) -> dict:
    """One row: the shot's frames at ``span`` frames a step against its reference bake."""
    scene = load_scene(scene_path)
    world = build_world(scene)
    solver = make_solver("learned", **({"model": model} if model else {}))
    reference = open_cache(reference_dir)
    d = scene.particle_spacing
    mass = particle_mass(world.rest_density, d)
    last = min(scene.frame_start + int(round(seconds * scene.fps)), reference.frames[-1])
    frames, wall = spanned_frames(scene, world, solver, span, last)
    chamfer, empty, energy_learned, energy_reference = [], 0, 0.0, 0.0
    for frame in range(scene.frame_start + 1, last + 1):
        ref = reference.read_frame(frame)
        positions, velocities = frames[frame]
        if not len(positions) or not len(ref["positions"]):
            empty += 1
            continue
        chamfer.append(chamfer_distance(positions, ref["positions"])[0] / d)
        energy_learned += kinetic_energy(velocities, mass)
        energy_reference += kinetic_energy(ref["velocities"], mass)
    step = span / scene.fps / np.sqrt(d / float(np.linalg.norm(world.gravity)))
    return {"shot": name, "span": span, "step_froude": float(step), "frames": len(chamfer), "empty_frames": empty,
            "mean_chamfer_spacings": float(np.mean(chamfer)), "max_chamfer_spacings": float(np.max(chamfer)),
            "kinetic_energy_ratio_summed": energy_learned / energy_reference, "learned_step_seconds": wall}


def shots(eval_dir, heldout) -> dict:
    """{name: (scene path, reference cache)} of every shot with a reference under the two folders."""
    found = {}
    manifest = heldout / "data_manifest.json"
    if manifest.exists():
        for shot in json.loads(manifest.read_text())["shots"]:
            found[shot["name"]] = (heldout / shot["scene"], heldout / shot["cache"])
    if eval_dir.is_dir():
        for folder in sorted(eval_dir.iterdir()):
            scenes = sorted((folder / "scene").glob("*.json"))
            if scenes and (folder / "sph").is_dir():
                found[folder.name] = (scenes[0], folder / "sph")
    return found


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--eval-dir", default=str(ROOT / "bench" / "results" / "eval"),
                        help="bench.eval_learned's --out, with the splash shots' and demo's reference bakes.")
    parser.add_argument("--heldout", default=str(ROOT / "data" / "heldout"), help="Held-out data folder.")
    parser.add_argument("--spans", type=int, nargs="+", default=[1, 2], help="Frames per learned step (1 2).")
    parser.add_argument("--seconds", type=float, default=1.0, help="Compared window in seconds (1).")
    parser.add_argument("--model", default=None, help="Model .onnx (default: the shipped one).")
    parser.add_argument("--shots", nargs="*", default=None, help="Only shots whose names contain these words.")
    args = parser.parse_args(argv)
    eval_dir = Path(args.eval_dir)
    found = shots(eval_dir, Path(args.heldout))
    names = [n for n in found if args.shots is None or any(word in n for word in args.shots)]
    if any(span < 1 for span in args.spans):
        print(f"error: --spans {' '.join(map(str, args.spans))}: each span must be 1 or more frames", file=sys.stderr)
        return 64
    if not names:
        print(f"error: no shot with a reference bake under --eval-dir {eval_dir} or --heldout {args.heldout}; "
              "run bench.eval_learned first and give its --out as --eval-dir", file=sys.stderr)
        return 64
    rows = []
    print(f"{'shot':<16} {'span':>4} {'step':>5} {'chamfer':>8} {'max':>6} {'KE':>6} {'wall s':>7}")
    for name in names:
        for span in args.spans:
            row = measure(name, *found[name], span, args.seconds, args.model)
            rows.append(row)
            print(f"{name:<16} {span:>4} {row['step_froude']:>5.2f} {row['mean_chamfer_spacings']:>8.3f} "
                  f"{row['max_chamfer_spacings']:>6.2f} {row['kinetic_energy_ratio_summed']:>6.2f} "
                  f"{row['learned_step_seconds']:>7.2f}", flush=True)
    (eval_dir / "learned_span.json").write_text(json.dumps({"rows": rows, "args": vars(args)}, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
