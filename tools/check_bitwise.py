"""Bake a fixed set of shots with both solvers and print the sha256 of every frame file.

Run it from a checkout's root (``python -m tools.check_bitwise --out DIR``) on two commits and diff
the JSON files it writes: identical hashes mean a change left every bake bit for bit as it was.
It uses only the command line (``python -m engine demo`` and ``python -m engine bake``) and
``engine.scene.save_scene``, so the same script runs unchanged against an older checkout: copy it
somewhere and run it with that checkout as the working folder and on PYTHONPATH
(``cd OLD && PYTHONPATH=. python /tmp/check_bitwise.py --out DIR``).

Shots: the demo's ``small`` preset, and three of the splash-suite shots (``bench/splash_shots.py``:
drop_pool, throw_wall, ring_dam) cut to 0.25 s at 5 cm spacing. Each shot is baked with the
reference solver and with the learned preview.

    python -m tools.check_bitwise --out /tmp/bits_branch            # writes hashes.json there
    python -m tools.check_bitwise --compare /tmp/bits_main/hashes.json /tmp/bits_branch/hashes.json
"""

import argparse
import hashlib
import json
import subprocess
import sys
from pathlib import Path

SOLVERS = ("sph", "learned")
SHOTS = ("drop_pool", "throw_wall", "ring_dam")
SHOT_SPACING = 0.05
SHOT_SECONDS = 0.25


def _run(argv: list) -> None:
    done = subprocess.run([sys.executable, "-m", "engine", *argv, "--progress", "none"], capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"python -m engine {' '.join(argv)} failed ({done.returncode}):\n{done.stderr}")


def frame_hashes(folder: Path) -> dict:
    """{file name: sha256 hex} of every ``points_*.ply`` in ``folder``."""
    return {path.name: hashlib.sha256(path.read_bytes()).hexdigest() for path in sorted(folder.glob("points_*.ply"))}


def write_shots(folder: Path) -> dict:
    """Write the three test shots' scene files into ``folder``; returns {shot: scene path}."""
    from bench.splash_shots import shot
    from engine.scene import save_scene

    paths = {}
    for name in SHOTS:
        path = folder / name / f"{name}.json"
        save_scene(path, shot(name, spacing=SHOT_SPACING, seconds=SHOT_SECONDS))
        paths[name] = path
    return paths


def bake_all(out: Path) -> dict:
    """Bake every shot with every solver under ``out``; returns {"shot/solver": {file: sha256}}."""
    hashes = {}
    scenes = write_shots(out / "scenes")
    for solver in SOLVERS:
        folder = out / f"demo_small_{solver}"
        _run(["demo", "--preset", "small", "--solver", solver, "--out", str(folder)])
        cache = next(p.parent for p in folder.rglob("manifest.json"))
        hashes[f"demo_small/{solver}"] = frame_hashes(cache)
        for name, scene in scenes.items():
            cache = out / f"{name}_{solver}"
            _run(["bake", str(scene), "--solver", solver, "--out", str(cache)])
            hashes[f"{name}/{solver}"] = frame_hashes(cache)
    return hashes


def compare(first: dict, second: dict) -> int:
    """Print one line per bake and a summary; returns 0 when every frame hash matches, else 1."""
    same = differ = 0
    for key in sorted(set(first) | set(second)):
        a, b = first.get(key, {}), second.get(key, {})
        matching = sum(1 for name in a if b.get(name) == a[name])
        print(f"{key:24s} frames {len(a):3d} / {len(b):3d}, identical {matching}")
        same += matching
        differ += max(len(a), len(b)) - matching
    print(f"{same} frames identical, {differ} differ or are missing")
    return 0 if differ == 0 and same > 0 else 1


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Bake fixed shots with both solvers and hash every frame.")
    parser.add_argument("--out", type=Path, help="Folder for the scenes, bakes and hashes.json.")
    parser.add_argument("--compare", nargs=2, type=Path, metavar="JSON", help="Compare two hashes.json files.")
    args = parser.parse_args(argv)
    if args.compare:
        first, second = (json.loads(p.read_text()) for p in args.compare)
        return compare(first, second)
    if args.out is None:
        parser.error("give --out or --compare")
    args.out.mkdir(parents=True, exist_ok=True)
    hashes = bake_all(args.out)
    (args.out / "hashes.json").write_text(json.dumps(hashes, indent=1, sort_keys=True) + "\n")
    for key, frames in hashes.items():
        for name, digest in frames.items():
            print(f"{key} {name} {digest}")
    print(f"{sum(len(f) for f in hashes.values())} frames in {len(hashes)} bakes; hashes in {args.out / 'hashes.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
