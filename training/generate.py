"""``python -m training.generate``: bake procedural shots with the reference solver for training.

Writes, under ``--out``:

    data_manifest.json          what was generated: kind, seeds, spacing, fps, learned step,
                                solver settings, and per shot its particles, frames, seconds
    shot_0000/scene.json        the shot's scene (meshes beside it in shot_0000/meshes/)
    shot_0000/cache/            its bake in the standard cache layout (engine.bake)

Training shots are baked at one frame per ``--frame-step`` sqrt(d/g)
(training/scenes.py picks the fps); the training takes learned steps of one
or more frames (``python -m training.train --strides``).

Resumable: a shot whose cache is complete is skipped; a shot with a
checkpoint continues from it (``engine.bake`` with ``resume``); ``--resume``
is accepted for clarity but skipping finished shots is always on. Several
processes can share the work with ``--shard I/N`` (shot k goes to shard k mod N).
The data manifest is rewritten (atomically) after every shot.

``--workers N`` bakes the shots on a local Dask cluster of N worker processes, and
``--scheduler tcp://HOST:PORT`` on an existing one, through the same path as
``python -m engine wedge`` (``engine.farm.run_jobs``): one task per shot
(``generate_shot``), ``--out`` on storage every worker sees (checked first; an
error names the workers that cannot), and only this process writes the data
manifest. Without either flag the shots are baked here, one after another.

``--heldout`` writes the held-out shots instead (ring obstacle, staircase,
moving paddle; never in training) with ``--duration`` seconds each.
"""

import argparse
import json
import os
import sys
import time
from pathlib import Path

from engine.bake import bake
from engine.cache import SCENE_FILE, open_cache, write_atomic
from engine.errors import SplashdraftError
from engine.farm import add_where_options
from engine.scene import save_scene

from . import scenes

DATA_FORMAT = "splashdraft-training-data"


def shot_plan(heldout, count, frame_step=scenes.TARGET_STEP_FROUDE) -> list[tuple[str, list]]:
    """[(name, spec)] of the shots to generate; ``make_scene(spec, frame_step)`` builds each scene dict.

    A spec is plain data (``["heldout", kind]`` or ``["train", index]``) so that it can travel to a worker.
    """
    if heldout:
        return [(f"heldout_{kind}", ["heldout", kind]) for kind in scenes.HELDOUT_KINDS]
    return [(f"shot_{i:04d}", ["train", i]) for i in range(count)]


def make_scene(spec, frame_step=scenes.TARGET_STEP_FROUDE, duration=None) -> dict:
    """The scene dict of a shot spec from ``shot_plan`` (``duration`` in s overrides its length)."""
    kind, value = spec
    if kind == "heldout":
        scene_dict = scenes.heldout_scene(value)
    else:
        scene_dict = scenes.training_scene(int(value), frame_step=frame_step)
    if duration is not None:
        scene_dict["frame_end"] = scene_dict["frame_start"] + int(round(duration * scene_dict["fps"]))
    return scene_dict


def _cache_state(cache_dir):
    """'complete', 'partial' (has a checkpoint) or 'missing'."""
    try:
        reader = open_cache(cache_dir)
    except SplashdraftError:
        return "missing"
    if reader.manifest.get("complete"):
        return "complete"
    return "partial" if (Path(cache_dir) / "checkpoint.npz").exists() else "missing"


def _summary(name, folder, scene_dict):
    reader = open_cache(folder / "cache")
    frames = reader.frames
    counts = [reader.manifest["frames"][str(f)]["particles"] for f in frames]
    seconds = sum(reader.manifest["frames"][str(f)].get("seconds", 0.0) for f in frames)
    return {
        "name": name,
        "scene": f"{name}/{SCENE_FILE}",
        "cache": f"{name}/cache",
        "seed": int(scene_dict["seed"]),
        "frames": [frames[0], frames[-1]] if frames else [],
        "particles_first": counts[0] if counts else 0,
        "particles_max": max(counts) if counts else 0,
        "complete": bool(reader.manifest.get("complete")),
        "bake_seconds": round(seconds, 2),
        "solver": reader.manifest.get("solver", {}),
    }


def _write_manifest(out, kind, shots, seed, frame_step=scenes.TARGET_STEP_FROUDE):
    fps, step = scenes.frame_rate_for_step(step_froude=frame_step)
    manifest = {
        "format": DATA_FORMAT,
        "version": 1,
        "kind": kind,
        "generator": "training/scenes.py (procedural; see its docstring)",
        "family_seed": seed,
        "particle_spacing": scenes.TRAINING_SPACING,
        "fps": fps,
        "frame_froude": step,
        "step_froude": step,  # the frame interval again, under its older name
        "reference_solver": "sph (DFSPH, engine/sph.py)",
        "shots": shots,
    }
    write_atomic(out / "data_manifest.json", (json.dumps(manifest, indent=1) + "\n").encode())


def generate_shot(job) -> dict:
    """Bake (or resume, or skip) one shot; returns {"summary": ..., "message": ...}.

    Args:
        job: dict with out (folder), name, spec (``shot_plan``), frame_step, duration (s or None).

    Runs here or as a Dask task on a worker (it reads and writes only ``out/<name>``).
    """
    folder = Path(job["out"]) / job["name"]
    scene_dict = make_scene(job["spec"], job["frame_step"], job["duration"])
    status = _cache_state(folder / "cache")
    if status == "complete":
        return {"summary": _summary(job["name"], folder, scene_dict), "message": f"{job['name']}: complete, skipped"}
    started = time.monotonic()
    if status == "partial" and (folder / SCENE_FILE).exists():
        result = bake(folder / SCENE_FILE, "sph", folder / "cache", resume=True, use_signals=False)
        how = "resumed, "
    else:
        save_scene(folder / SCENE_FILE, scene_dict)
        result = bake(folder / SCENE_FILE, "sph", folder / "cache", overwrite=True, use_signals=False)
        how = ""
    message = (f"{job['name']}: {how}{result.frames_written} frames, {result.particles} particles, "
               f"{time.monotonic() - started:.1f} s")  # fmt: skip
    return {"summary": _summary(job["name"], folder, scene_dict), "message": message}


def generate(out, count=24, heldout=False, shard=(0, 1), duration=None, log=print,
             frame_step=scenes.TARGET_STEP_FROUDE, scheduler=None, workers=None) -> list[dict]:
    """Generate (or finish) the shots; returns the list of shot summaries.

    ``frame_step`` (sqrt(d/g)) sets the training shots' fps; held-out shots keep the default.
    ``scheduler`` (a Dask scheduler address) or ``workers`` (N > 0: a local Dask cluster of N worker
    processes) bakes the shots as Dask tasks (``engine.farm.run_jobs``); neither: here, in turn.
    """
    out = Path(out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    if heldout:
        frame_step = scenes.TARGET_STEP_FROUDE
    summaries = {}
    existing = out / "data_manifest.json"
    if existing.exists():
        try:
            previous = json.loads(existing.read_text())
            summaries = {s["name"]: s for s in previous["shots"]}
        except (ValueError, KeyError):
            previous, summaries = {}, {}
        wanted = scenes.frame_rate_for_step(step_froude=frame_step)[0]
        if summaries and previous.get("fps") not in (None, wanted):
            raise SplashdraftError(
                f"{existing}: this folder holds shots at {previous['fps']} fps, --frame-step {frame_step} asks for "
                f"{wanted} fps; use another --out folder or the same --frame-step"
            )
    index, total = shard
    jobs = [{"out": str(out), "name": name, "spec": spec, "frame_step": frame_step, "duration": duration}
            for number, (name, spec) in enumerate(shot_plan(heldout, count, frame_step))
            if number % total == index]  # fmt: skip
    kind, seed = ("heldout", scenes.HELDOUT_SEED) if heldout else ("train", scenes.TRAIN_SEED)

    def record(job, result) -> None:
        summaries[job["name"]] = result["summary"]
        log(result["message"])
        # Re-read so concurrent shards do not drop each other's entries.
        if existing.exists():
            try:
                for shot in json.loads(existing.read_text())["shots"]:
                    summaries.setdefault(shot["name"], shot)
            except (ValueError, KeyError):
                pass
        _write_manifest(out, kind, [summaries[k] for k in sorted(summaries)], seed, frame_step)

    if scheduler is not None or workers:
        from engine.farm import run_jobs
        from training.generate import generate_shot as task  # by module name (not __main__) for the workers

        run_jobs(task, jobs, out, scheduler=scheduler, workers=workers, on_done=record, log=log)
    else:
        for job in jobs:
            record(job, generate_shot(job))
    _write_manifest(out, kind, [summaries[k] for k in sorted(summaries)], seed, frame_step)
    return [summaries[k] for k in sorted(summaries)]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m training.generate",
        description="Bake procedural training shots (or the held-out shots) with the reference solver.",
    )
    parser.add_argument("--out", default=None, help="Output folder (default data/train, or data/heldout with --heldout).")
    parser.add_argument("--count", type=int, default=24, help="Number of training shots (default 24).")
    parser.add_argument("--heldout", action="store_true", help="Generate the held-out shots (ring, stairs, paddle).")
    parser.add_argument("--resume", action="store_true", help="Continue: finished shots are skipped, partial bakes resumed "
                        "(always on; accepted for clarity).")
    parser.add_argument("--shard", default="0/1", help="I/N: bake only shots k with k mod N == I (default 0/1).")
    parser.add_argument("--frame-step", type=float, default=scenes.TARGET_STEP_FROUDE,
                        help="Frame interval of the training shots in sqrt(d/g) (default %(default)s; the training "
                        "takes learned steps of one or more frames).")
    parser.add_argument("--duration", type=float, default=None,
                        help="Override the shot length in seconds (default 2 s training, 10 s held-out).")
    add_where_options(
        parser,
        "Bake the shots on a local Dask cluster of N worker processes (default: bake here, one shot after another).",
        "Bake the shots on the Dask scheduler at ADDRESS (e.g. tcp://farm:8786); --out must be "
        "on storage every worker sees at the same path, and the repository on their PYTHONPATH.")
    args = parser.parse_args(argv)
    if args.workers is not None and args.workers < 0:
        print(f"error: --workers {args.workers}: give a positive count, or leave it out to bake here", file=sys.stderr)
        return 64
    try:
        index, total = (int(x) for x in args.shard.split("/"))
        if not 0 <= index < total:
            raise ValueError
    except ValueError:
        print(f"error: --shard {args.shard!r} must be I/N with 0 <= I < N, e.g. 0/2", file=sys.stderr)
        return 64
    out = args.out or ("data/heldout" if args.heldout else "data/train")
    started = time.monotonic()
    try:
        shots = generate(out, args.count, args.heldout, (index, total), args.duration,
                         log=lambda m: print(m, file=sys.stderr, flush=True), frame_step=args.frame_step,
                         scheduler=args.scheduler, workers=args.workers)  # fmt: skip
    except SplashdraftError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    print(f"{len(shots)} shots in {out} ({time.monotonic() - started:.0f} s)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    sys.exit(main())
