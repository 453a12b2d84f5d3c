"""How close can a preview get? The reference solver against itself on a tune's held-back frames.

    python -m bench.tune_floor --bakes DIR [DIR ...] [--hold-back 0.25] [--out DIR]

The tune card's figure is the mean Chamfer distance of the preview's rollout from a reference bake on
the held-back tail frames. A liquid shot is chaotic: two reference bakes that differ by an
imperceptible change drift apart too. For each reference bake this re-bakes its stored scene with
the reference solver twice, each time with one such change:

- ``jitter``: every fill emitter's lattice jittered by 0.001 of the spacing (the scene's own
  ``jitter`` setting, seeded);
- ``tolerance``: the solver's density and divergence tolerances halved;

and measures mean Chamfer [d] (``engine.compare``) from the original on the frames the tune holds
back (``training.tune.split_frames``, same rule). A tuned preview that comes closer than that is
matching the reference's own numerical noise. Prints a table and JSON, and writes
bench/results/tune_floor.json.
"""

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

#: The imperceptible changes: name -> function editing the scene's JSON dict in place.
CHANGES = {
    "jitter": lambda scene: [e.update(jitter=0.001) for e in scene["emitters"] if e.get("type") == "fill"],
    "tolerance": lambda scene: scene["solver"].update(density_tolerance=scene["solver"]["density_tolerance"] / 2,
                                                      divergence_tolerance=scene["solver"]["divergence_tolerance"] / 2),
}  # fmt: skip


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bakes", nargs="+", required=True, help="Reference (sph) bake folders, as for tune.")
    parser.add_argument("--hold-back", type=float, default=0.25, help="Share of frames held back, as tune's. Default: 0.25.")
    parser.add_argument("--out", default=None, help="Working folder (default: a temporary one).")
    args = parser.parse_args(argv)

    from engine.bake import bake
    from engine.cache import open_cache
    from engine.compare import compare_caches
    from training.tune import first_held_back

    work = Path(args.out or tempfile.mkdtemp(prefix="tune_floor_"))
    rows = []
    for folder in map(Path, args.bakes):
        reader = open_cache(folder)
        frames = reader.frames
        held = list(frames[first_held_back(len(frames), args.hold_back):])
        row = {"bake": str(folder.resolve()), "held_back_frames": held}
        for name, change in CHANGES.items():
            scene_dir = work / folder.name / f"{name}-scene"
            shutil.rmtree(scene_dir, ignore_errors=True)
            shutil.copytree(folder / "scene", scene_dir)
            scene_file = scene_dir / "scene.json"
            scene = json.loads(scene_file.read_text())
            change(scene)
            scene["name"] = f"{scene['name']}-{name}"
            scene_file.write_text(json.dumps(scene, indent=1) + "\n")
            target = work / folder.name / name
            bake(scene_file, "sph", target, frames=(frames[0], frames[-1]), use_signals=False, overwrite=True)
            result = compare_caches(folder, target, frames=held)
            row[name] = result["mean_chamfer_spacings"]
        rows.append(row)
    print(f"{'bake':<28}{'held back':>12}" + "".join(f"{name:>12}" for name in CHANGES))
    for row in rows:
        held = row["held_back_frames"]
        print(f"{Path(row['bake']).name:<28}{f'{held[0]}..{held[-1]}':>12}"
              + "".join(f"{row[name]:>12.3f}" for name in CHANGES))
    means = {name: float(np.mean([row[name] for row in rows])) for name in CHANGES}
    print(f"{'mean':<28}{'':>12}" + "".join(f"{means[name]:>12.3f}" for name in CHANGES))
    result = {"rows": rows, "mean_chamfer_spacings": means, "changes": {"jitter": "fill jitter 0.001 spacing",
              "tolerance": "density and divergence tolerances halved"}}  # fmt: skip
    print(json.dumps(result))
    from bench.bench_reference import write_json

    write_json(result, ROOT / "bench" / "results" / "tune_floor.json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
