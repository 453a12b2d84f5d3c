"""The command line: ``python -m engine {bake,info,estimate,validate,demo,compare}``.

Human-readable messages and progress go to stderr; ``--json`` output goes to
stdout. Engine errors become one ``error: ...`` line and the error's exit
status (``engine.errors.EXIT_CODES``, listed in ``--help``); usage errors exit
with 64. Every command ends with a one-line summary on stderr.
"""

import argparse
import json
import os
import sys
import time
from pathlib import Path
from typing import NoReturn

from .errors import EXIT_CODES, SplashdraftError, UsageError, ValidationFailed
from .progress import PROGRESS_KINDS, format_duration, make_progress
from .solvers import SOLVER_NAMES

USAGE_EXIT = 64
CANCELLED_EXIT = 130
PIPE_CLOSED_EXIT = 141


def _exit_code_epilog():
    lines = ["exit status:"]
    lines += [f"  {code:>3}  {meaning}" for code, meaning in sorted(EXIT_CODES.items())]
    return "\n".join(lines)


class _Parser(argparse.ArgumentParser):
    """argparse with usage errors as exit 64 (instead of 2, which we use for bad scenes)."""

    def error(self, message) -> NoReturn:
        self.print_usage(sys.stderr)
        print(f"{self.prog}: error: {message}", file=sys.stderr)
        raise SystemExit(USAGE_EXIT)


def _add_progress(parser):
    parser.add_argument(
        "--progress", choices=PROGRESS_KINDS, default="bar",
        help="How to report progress on stderr: a progress bar, one JSON object per line "
        "(for the Blender add-on) or nothing. Default: bar.",
    )  # fmt: skip


def _add_solver(parser, meaning):
    parser.add_argument("--solver", choices=SOLVER_NAMES, default="sph", help=f"{meaning} Default: sph.")


def _add_model(parser):
    parser.add_argument(
        "--model", metavar="MODEL",
        help="With --solver learned: the model to use, a folder holding one model (e.g. from 'tune') or an "
        ".onnx file with its .json contract beside it; it must pass its contract check. Default: the shipped model.",
    )  # fmt: skip


def _particle_budget(text):
    """argparse type of --max-particles: a whole number within the scene's budget range."""
    from .inputs import LIMITS

    low, high = LIMITS["max_particles"]
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if not low <= value <= high:
        raise argparse.ArgumentTypeError(f"{value} is outside {low:,} .. {high:,}")
    return value


def _add_budget(parser):
    parser.add_argument(
        "--max-particles", type=_particle_budget, metavar="N",
        help="Refuse scenes with more than N particles. Default: the scene's budget.max_particles.",
    )


def _add_command(commands, name, summary, description):
    """A subcommand's parser, with the exit codes under its --help."""
    return commands.add_parser(name, help=summary, description=description, epilog=_exit_code_epilog(),
                               formatter_class=argparse.RawDescriptionHelpFormatter)


def build_parser() -> argparse.ArgumentParser:
    from .farm import add_where_options

    parser = _Parser(
        prog="python -m engine",
        description="Splashdraft engine: bake liquid splash shots to per-frame PLY point caches, "
        "inspect caches, estimate bakes and run the validation cases.",
        epilog=_exit_code_epilog(),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    commands.required = True

    bake = _add_command(
        commands, "bake", "Bake a scene into a cache folder.",
        "Bake a scene file into a cache folder, one PLY file per frame. Ctrl-C or SIGTERM stops "
        "after the frame being computed; --resume continues from the last finished frame.",
    )  # fmt: skip
    bake.add_argument("scene", help="The scene file (splashdraft-scene JSON).")
    _add_solver(bake, "The reference DFSPH solver or the learned preview.")
    bake.add_argument("--out", required=True, help="The cache folder to write; it is created if missing.")
    bake.add_argument("--frames", metavar="A:B",
                      help="Bake frames A to B only (inclusive). A must be the scene's first frame, or the "
                      "cache must already hold frame A - 1. Default: the whole shot.")  # fmt: skip
    bake.add_argument("--resume", action="store_true",
                      help="Continue an interrupted bake from its checkpoint. Default: start from the first frame.")
    bake.add_argument("--overwrite", action="store_true",
                      help="Allow replacing a cache of another scene or solver in --out. Default: refuse.")
    _add_model(bake)
    _add_progress(bake)
    _add_budget(bake)

    info = _add_command(
        commands, "info", "Describe a cache folder.",
        "Describe a cache folder: frames, particles per frame, disk use, solver and its settings.",
    )  # fmt: skip
    info.add_argument("cache", help="The cache folder.")
    info.add_argument("--json", action="store_true", help="Print the description as JSON on stdout.")
    info.add_argument("--verify", action="store_true",
                      help="Also read every frame and check its checksum. Default: read the manifest only.")

    estimate = _add_command(
        commands, "estimate", "Estimate particles, memory, disk and time of a bake.",
        "Estimate a bake before running it: particle count, memory, disk per frame and for the "
        "shot, and a rough time. Exits with status 3 when the scene exceeds its particle budget.",
    )  # fmt: skip
    estimate.add_argument("scene", help="The scene file.")
    _add_solver(estimate, "The solver the estimate is for.")
    estimate.add_argument("--json", action="store_true", help="Print the estimate as JSON on stdout.")
    estimate.add_argument("--calibrate", action="store_true",
                          help="First measure how fast this computer bakes with the solver (two short bakes "
                          "of a small built-in shot, under ten seconds on 2 cores) and keep the figures for later estimates "
                          "(see engine/calibration.py). Without it the last measurement is used, or a rough "
                          "figure if this computer was never measured.")
    _add_model(estimate)
    _add_budget(estimate)

    validate = _add_command(
        commands, "validate", "Run a validation case against published values.",
        "Run a validation case and print simulated against published values and the error. "
        "Exits with status 7 when a value falls outside its tolerance. CASE 'all' runs every case.",
    )  # fmt: skip
    validate.add_argument("case", help="The case name (see the list printed for an unknown name), or 'all'.")
    validate.add_argument("--json", action="store_true", help="Print the results as JSON on stdout.")
    _add_progress(validate)

    demo = _add_command(
        commands, "demo", "Write the built-in demo shot and bake it.",
        "Write the built-in demo shot (a block of water let go in an open-topped trough with a "
        "rough boulder) into OUT/scene and bake it into OUT/<solver>.",
    )  # fmt: skip
    _add_solver(demo, "The solver to bake with.")
    demo.add_argument("--out", default="out/demo", help="The output folder. Default: out/demo.")
    demo.add_argument("--frames", metavar="A:B", help="Bake frames A to B only. Default: the whole shot.")
    demo.add_argument("--preset", choices=("full", "small"), default="full",
                      help="full: spacing 0.02 m, about 24k particles, 60 frames; small: spacing 0.05 m, "
                      "about 1.2k particles, 12 frames. Default: full.")  # fmt: skip
    demo.add_argument("--spacing", type=float, metavar="S",
                      help="Particle spacing in metres, overriding the preset's.")
    _add_model(demo)
    _add_progress(demo)
    _add_budget(demo)

    wedge = _add_command(
        commands, "wedge", "Bake one scene once per combination of setting values.",
        "Bake a scene once per combination of --vary values, each variant into its own cache "
        "folder under --out, on a local Dask cluster (default), an existing Dask scheduler, or serially "
        "here (--workers 0). Re-running the same command resumes: complete variants are skipped, partial "
        "ones continue from their last frame. Ends with a table of the variants and a contact sheet "
        "(OUT/contact_sheet.png) of one frame per variant.",
    )  # fmt: skip
    wedge.add_argument("scene", help="The base scene file.")
    wedge.add_argument("--vary", action="append", required=True, metavar="KEY=V1,V2,...",
                       help="A scene field by its dotted path and the values to try, e.g. fluid.viscosity=0.01,0.05 "
                       "or emitters.spout.speed=1,2 (emitters and colliders by name). Repeat for more fields; "
                       "the wedge is every combination.")  # fmt: skip
    _add_solver(wedge, "The solver every variant is baked with.")
    _add_model(wedge)
    wedge.add_argument("--frames", metavar="A:B", help="Bake frames A to B of each variant. Default: the whole shot.")
    wedge.add_argument("--out", required=True, help="The wedge folder (one cache folder per variant inside).")
    add_where_options(
        wedge,
        "Worker processes of the local Dask cluster; 0 bakes the variants one after another "
        "in this process. Default: one per CPU core (at most one per variant).",
        "Send the variants to the Dask scheduler at ADDRESS (e.g. tcp://farm:8786); --out, "
        "the scene and its meshes must be on storage every worker sees at the same path.")
    wedge.add_argument("--sheet-frame", type=int, metavar="F",
                       help="The frame shown for each variant in the contact sheet. Default: the last frame.")
    wedge.add_argument("--json", action="store_true", help="Print the summary table as JSON on stdout.")
    _add_progress(wedge)

    tune = _add_command(
        commands, "tune", "Fine-tune the learned preview on reference bakes (needs PyTorch).",
        "Continue training the learned preview's model on reference (--solver sph) bakes you "
        "already have, holding back the last frames of each, and write a new model folder: the model, its "
        "contract, and a card with the mean Chamfer distance and energy ratio on the held-back frames "
        "before and after. Re-running the same command resumes from its checkpoint. Use the result with "
        "'bake --solver learned --model MODEL_DIR'. Needs PyTorch (pip install -r requirements-train.txt).",
    )  # fmt: skip
    tune.add_argument("--bakes", nargs="+", required=True, metavar="DIR",
                      help="Reference bake folders (cache folders baked with --solver sph, at a frame rate where "
                      "one frame is at most the model's learned step).")  # fmt: skip
    tune.add_argument("--base", metavar="MODEL", help="The model to start from. Default: the shipped model.")
    tune.add_argument("--out", required=True, metavar="MODEL_DIR",
                      help="The new model's folder; its name names the model.")
    tune.add_argument("--minutes", type=float, metavar="M", help="Stop training after M minutes. Default: no limit.")
    tune.add_argument("--iterations", type=int, metavar="N", help="Training iterations in all. Default: 300.")
    tune.add_argument("--hold-back", type=float, metavar="SHARE",
                      help="Share of each bake's last frames held back for the before/after figures. Default: 0.25.")
    tune.add_argument("--checkpoint-every", type=int, metavar="N", help="Iterations between checkpoints. Default: 50.")
    tune.add_argument("--lr", type=float, metavar="RATE",
                      help="Adam learning rate. Default: 3e-4 (3e-5 with --unroll 0).")
    tune.add_argument("--unroll", type=int, metavar="M",
                      help="Train each step from a state the model itself reached, rolled up to M frames from a "
                      "reference frame (pushforward); 0 trains one step from the reference's own state. Default: 8.")
    tune.add_argument("--reach", type=int, metavar="K",
                      help="Score K frames of the preview's own steps on positions, with the gradient through "
                      "all of them (training/reach.py); best in short runs (a few hundred iterations), worse than 0 over 30 "
                      "minutes (README). 0 trains each step on its own (pushforward). Default: 0.")
    tune.add_argument("--score", choices=("distance", "chamfer"),
                      help="With --reach: score the rolled frames by each particle's squared distance from itself "
                      "in the reference (distance) or by the Chamfer distance of the two point sets (chamfer). "
                      "Default: chamfer.")
    tune.add_argument("--json", action="store_true", help="Print the tune record as JSON on stdout.")

    # The compare command is handled by engine.compare.main_compare (see main); listed here for --help.
    commands.add_parser(
        "compare", help="Compare one bake against another (see 'compare --help').", add_help=False,
    )
    return parser


def _say(text):
    print(text, file=sys.stderr)


def _print_json(data):
    print(json.dumps(data, indent=1))


# --------------------------------------------------------------------------- commands


def _run_bake(scene, solver, out, frames, resume, progress, max_particles, overwrite, model=None):
    from .bake import bake
    from .solvers import make_solver

    solver_object = make_solver(solver, model=model) if model is not None else None
    result = bake(
        scene, solver, out, frames=frames, resume=resume, progress=make_progress(progress),
        max_particles=max_particles, overwrite=overwrite, solver=solver_object,
    )  # fmt: skip
    for note in result.notes:
        _say(f"note: {note}")
    done = "cancelled" if result.is_cancelled else "baked"
    last = "none" if result.last_written is None else result.last_written
    _say(
        f"{done}: {result.frames_written} frames written (last frame {last}), {result.particles:,} particles, "
        f"{format_duration(result.seconds)} wall time, solver {result.solver}, cache {result.cache_dir}"
    )
    return CANCELLED_EXIT if result.is_cancelled else 0


def command_bake(args) -> int:
    return _run_bake(args.scene, args.solver, args.out, args.frames, args.resume, args.progress,
                     args.max_particles, args.overwrite, args.model)  # fmt: skip


def describe_cache(folder, verify=False) -> dict:
    """Summary dict of a cache folder (for ``info``)."""
    from .cache import open_cache

    cache = open_cache(folder)
    manifest = cache.manifest
    entries = [manifest["frames"][str(f)] for f in cache.frames]
    counts = [int(e.get("particles", 0)) for e in entries]
    if verify:
        for frame in cache.frames:
            cache.read_frame(frame)
    # "complete" is what the manifest claims, and only while every frame it lists is still on disk.
    span = range(manifest["frame_start"], manifest["frame_end"] + 1)
    is_complete = (manifest.get("complete") is True and all(str(f) in manifest["frames"] for f in span)
                   and all(cache.frame_path(f).is_file() for f in cache.frames))  # fmt: skip
    return {
        "cache": str(folder),
        "scene_name": manifest.get("scene_name"),
        "solver": manifest.get("solver", {}).get("name"),
        "settings": manifest.get("solver", {}).get("settings", {}),
        "fps": manifest.get("fps"),
        "frame_start": manifest.get("frame_start"),
        "frame_end": manifest.get("frame_end"),
        "frames": len(cache.frames),
        "first_frame": cache.frames[0] if cache.frames else None,
        "last_frame": cache.frames[-1] if cache.frames else None,
        "complete": is_complete,
        "particles": {
            "min": min(counts) if counts else 0,
            "max": max(counts) if counts else 0,
            "mean": sum(counts) / len(counts) if counts else 0.0,
            "last": counts[-1] if counts else 0,
        },
        "particle_spacing": manifest.get("particle_spacing"),
        "bake_seconds": round(sum(float(e.get("seconds", 0.0)) for e in entries), 3),
        "substeps": sum(int(e.get("substeps", 0)) for e in entries),
        "disk_bytes": cache.disk_bytes(),
        "verified": bool(verify),
        "updated": manifest.get("updated"),
        "energy": _energy_summary(entries),
        "warnings": [w for w in manifest.get("warnings", []) if isinstance(w, str)],
    }


def _energy_summary(entries):
    """The energy audit of the last frame and the largest energy-to-input ratio over frames, or None."""
    audits = [e["energy"] for e in entries if isinstance(e.get("energy"), dict)]
    if not audits:
        return None
    first = audits[0]
    start = first["kinetic_j"] + first["potential_j"]
    ratios = [(a["kinetic_j"] + a["potential_j"] + a["removed_j"]) / (start + a["emitted_j"])
              for a in audits if start + a["emitted_j"] > 0]
    return {**audits[-1], "max_energy_ratio": max(ratios) if ratios else None}


def command_info(args) -> int:
    from .estimate import format_bytes

    info = describe_cache(args.cache, verify=args.verify)
    if args.json:
        _print_json(info)
    particles = info["particles"]
    state = "complete" if info["complete"] else "incomplete"
    _say(f"cache {info['cache']}: scene {info['scene_name']!r}, solver {info['solver']}, {state}")
    _say(f"  frames: {info['frames']} ({info['first_frame']}..{info['last_frame']} of "
         f"{info['frame_start']}..{info['frame_end']}) at {info['fps']} fps")  # fmt: skip
    _say(f"  particles per frame: min {particles['min']:,}, mean {particles['mean']:,.0f}, "
         f"max {particles['max']:,}, last {particles['last']:,}")  # fmt: skip
    _say(f"  disk: {format_bytes(info['disk_bytes'])}; bake time {format_duration(info['bake_seconds'])}, "
         f"{info['substeps']} substeps")  # fmt: skip
    _say("  settings: " + json.dumps(info["settings"], sort_keys=True))
    for warning in info["warnings"]:
        _say(f"  warning: {warning}")
    energy = info["energy"]
    if energy is not None:
        ratio = energy["max_energy_ratio"]
        _say(f"  energy at the last frame: kinetic {energy['kinetic_j']:.4g} J, potential {energy['potential_j']:.4g} J, "
             f"brought in by emitters {energy['emitted_j']:.4g} J, removed {energy['removed_j']:.4g} J; "
             f"highest (liquid + removed) / (start + emitted) {'-' if ratio is None else f'{ratio:.4f}'}; "
             f"over-energy {100 * energy['over_energy_fraction']:.2f} % of particles")
    if args.verify:
        _say("  every frame's checksum matches the manifest")
    _say(f"{info['frames']} frames, {particles['last']:,} particles in the last, cache {info['cache']}")
    return 0


def command_estimate(args) -> int:
    from .bake import check_scene_for_solver, load_scene_any
    from .estimate import estimate_scene, format_bytes

    scene = load_scene_any(args.scene)
    check_scene_for_solver(scene, args.solver)
    if args.calibrate:
        from .calibration import calibrate, calibration_path

        _say(f"measuring this computer with the {args.solver} solver (a short bake of a small shot)...")
        measured = calibrate(args.solver)
        _say(f"  {measured['rate']:,.0f} particle-steps/s, {measured['overhead_seconds']:.3f} s per frame, "
             f"{measured['startup_seconds']:.1f} s start-up; kept in {calibration_path()}")
    result = estimate_scene(scene, solver=args.solver, max_particles=args.max_particles, model=args.model)
    if args.json:
        _print_json(result.as_dict())
    _say(f"scene {result.scene_name!r} with the {result.solver} solver (estimates):")
    _say(f"  particles: about {result.particles:,} fluid (budget {result.max_particles:,}), "
         f"{result.boundary_particles:,} boundary")  # fmt: skip
    _say(f"  memory: about {format_bytes(result.memory_bytes)} (solver arrays and neighbour lists)")
    _say(f"  disk: {format_bytes(result.frame_bytes)} per frame, about {format_bytes(result.disk_bytes)} "
         f"for {result.frames} frames")  # fmt: skip
    how = ("within about a factor of two" if result.is_measured
           else "a rough figure, expect a factor of two or more either way; --calibrate measures this computer")
    _say(f"  time: about {format_duration(result.seconds)} ({result.substeps_per_frame} substeps per frame, "
         f"{result.throughput:,.0f} particle-substeps/s, {result.overhead_seconds:.3f} s per frame and "
         f"{result.startup_seconds:.1f} s start-up "
         f"from {result.throughput_source}; {how})")  # fmt: skip
    _say(f"estimate: {result.frames} frames, {result.particles:,} particles, "
         f"about {format_duration(result.seconds)}")  # fmt: skip
    return 0


def _format_metric(name, value, tolerance):
    shown = f"{value:.6g}" if isinstance(value, float) else json.dumps(value)
    if tolerance is None:
        return f"  {name}: {shown}"
    return f"  {name}: {shown} (tolerance {json.dumps(tolerance)})"


def _comparison_tables(metrics):
    """Simulated-against-published tables of the known validation metrics: (title, header, rows)."""
    tables = []
    simulated, published = metrics.get("front_at_table_T"), metrics.get("published_Z")
    if isinstance(simulated, dict) and isinstance(published, dict):
        rows = [(key, simulated[key], published[key]) for key in published if key in simulated]
        tables.append(("dam-break front Z = x/a against T", ("T", "simulated Z", "published Z"), rows))
    profile = metrics.get("profile_z_p_rho0gd")
    if isinstance(profile, list) and profile:
        rows = [(f"{z:.4f}", p, reference) for z, p, reference in profile]
        tables.append(("pressure against height", ("z (m)", "simulated p (Pa)", "rho0 g d (Pa)"), rows))
    return tables


def command_validate(args) -> int:
    from . import validate

    names = list(validate.CASES) if args.case == "all" else [args.case]
    unknown = [n for n in names if n not in validate.CASES]
    if unknown:
        raise UsageError(
            f"validation case {unknown[0]!r} does not exist; choose one of {', '.join(validate.CASES)} or 'all'"
        )
    started = time.monotonic()
    results = []
    for name in names:
        _say(f"running validation case {name} ...")
        result = validate.run_case(name, progress=make_progress(args.progress))
        results.append(result)
        _say(format_validation(result))
    if args.json:
        _print_json(results[0] if len(results) == 1 else results)
    failed = [r["case"] for r in results if not r.get("passed")]
    _say(f"validate: {len(results) - len(failed)} of {len(results)} cases within tolerance "
         f"in {format_duration(time.monotonic() - started)}")  # fmt: skip
    if failed:
        raise ValidationFailed(
            f"validation case {', '.join(failed)} fell outside the published tolerance (see above); "
            "check the solver settings or report the regression"
        )
    return 0


def format_validation(result) -> str:
    """Human text for one ``run_case`` result: the checked metrics with their tolerances, then
    simulated against published values with the error of each row."""
    verdict = "within tolerance" if result.get("passed") else "OUTSIDE tolerance"
    lines = [f"case {result.get('case')}: {verdict}"]
    metrics = result.get("metrics", {}) or {}
    tolerances = result.get("tolerances", {}) or {}
    tables = _comparison_tables(metrics)
    in_tables = {"front_at_table_T", "published_Z", "profile_z_p_rho0gd"} if tables else set()
    for name, value in metrics.items():
        if name not in in_tables:
            lines.append(_format_metric(name, value, tolerances.get(name)))
    for title, header, rows in tables:
        lines.append(f"  {title}:")
        lines.append("    " + "".join(f"{h:>18}" for h in header) + f"{'error':>12}")
        for label, value, reference in rows:
            error = float(value) - float(reference)
            lines.append(f"    {label:>18}{float(value):>18.4g}{float(reference):>18.4g}{error:>+12.3g}")
    if result.get("source"):
        lines.append(f"  source: {result['source']}")
    if result.get("notes"):
        lines.append(f"  notes: {result['notes']}")
    return "\n".join(lines)


def command_demo(args) -> int:
    from .demo import write_demo_scene

    if args.spacing is not None and not args.spacing > 0:
        raise UsageError(f"--spacing {args.spacing}: the particle spacing must be a positive length in metres")
    out = Path(args.out)
    scene_path = write_demo_scene(out / "scene", spacing=args.spacing, preset=args.preset)
    _say(f"demo scene written to {scene_path}")
    return _run_bake(scene_path, args.solver, out / args.solver, args.frames, False, args.progress,
                     args.max_particles, True, args.model)  # fmt: skip


def command_wedge(args) -> int:
    from .farm import WedgeProgress, run_wedge
    from .wedge import format_table, parse_vary, summary_rows

    vary = [parse_vary(text) for text in args.vary]
    manifest, sheet, cancelled = run_wedge(
        args.scene, vary, args.solver, args.out, frames=args.frames, model=args.model, workers=args.workers,
        scheduler=args.scheduler, progress=WedgeProgress(args.progress), sheet_frame=args.sheet_frame,
    )  # fmt: skip
    rows = summary_rows(manifest)
    if args.json:
        _print_json({"wedge": str(Path(args.out).resolve()), "contact_sheet": None if sheet is None else str(sheet),
                     "variants": rows})  # fmt: skip
    else:
        print(format_table(rows, [key for key, _ in vary]))
    for row in rows:
        if row["error"]:
            _say(f"variant {row['variant']}: {row['error']}")
    complete = sum(r["state"] == "complete" for r in rows)
    _say(f"wedge: {complete} of {len(rows)} variants complete; manifest {Path(args.out) / 'wedge.json'}"
         + (f"; contact sheet {sheet}" if sheet else ""))  # fmt: skip
    if cancelled:
        _say("wedge cancelled; finished frames are kept (re-run the same command to resume)")
        return CANCELLED_EXIT
    return 0 if complete == len(rows) else 1


def command_tune(args) -> int:
    from .errors import DependencyError

    if args.minutes is not None and not args.minutes > 0:
        raise UsageError(f"--minutes {args.minutes}: give a positive number of minutes")
    try:
        from training.tune import tune
    except ImportError as exc:
        raise DependencyError(f"fine-tuning needs the training/ folder of the Splashdraft repository ({exc}); "
                              "run python -m engine tune from the repository root") from None  # fmt: skip
    words = ["python -m engine tune", "--bakes", *args.bakes, "--out", args.out]
    for flag, value in (("--base", args.base), ("--minutes", args.minutes), ("--iterations", args.iterations),
                        ("--hold-back", args.hold_back), ("--checkpoint-every", args.checkpoint_every),
                        ("--lr", args.lr), ("--unroll", args.unroll), ("--reach", args.reach),
                        ("--score", args.score)):
        if value is not None:
            words += [flag, str(value)]
    command = " ".join(words)
    record = tune(args.bakes, args.out, base=args.base, minutes=args.minutes, iterations=args.iterations,
                  hold_back=args.hold_back, checkpoint_every=args.checkpoint_every, command=command, log=_say,
                  lr=args.lr, unroll=args.unroll, reach=args.reach, score=args.score)
    if args.json:
        _print_json(record)
    before, after = record["before"], record["after"]

    def show(value) -> str:
        return "-" if value is None else f"{value:.3f}"

    _say(f"held-back frames: mean Chamfer {show(before['mean_chamfer_spacings'])} -> "
         f"{show(after['mean_chamfer_spacings'])} spacings, energy ratio {show(before['energy_ratio'])} -> "
         f"{show(after['energy_ratio'])}")  # fmt: skip
    _say(f"tune: {record['iterations']} iterations, {format_duration(record['wall_seconds'])} wall time; "
         f"model {record['model']} (card beside it); use it with bake --solver learned --model {args.out}")
    return 0


COMMANDS = {
    "bake": command_bake,
    "info": command_info,
    "estimate": command_estimate,
    "validate": command_validate,
    "demo": command_demo,
    "wedge": command_wedge,
    "tune": command_tune,
}


def main(argv=None) -> int:
    """Run the command line; returns the exit status (see ``EXIT_CODES``).

    Every error is printed once, as one ``error: ...`` line on stderr, and never as a traceback;
    a reader that closes stdout early (``info --json | head``) ends the command quietly.
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    try:
        return _dispatch(argv)
    except BrokenPipeError:
        return _closed_pipe()
    except SplashdraftError as exc:
        _say(f"error: {exc}")
        return exc.exit_code
    except MemoryError:
        _say("error: out of memory; use a coarser particle_spacing or a smaller scene (see 'estimate')")
        return 3
    except KeyboardInterrupt:
        _say("error: interrupted")
        return CANCELLED_EXIT
    except (RecursionError, ArithmeticError, ValueError, TypeError, LookupError, OSError) as exc:
        # Not an error the engine raises on purpose: a defect. Named as one, without a traceback.
        _say(f"error: internal error ({type(exc).__name__}: {exc}); please report it with the command and its inputs")
        return 1


def _dispatch(argv):
    if argv and argv[0] == "compare":
        # Owned by engine.compare (fidelity metrics of one bake against another).
        from .compare import main_compare

        return main_compare(argv[1:])
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return 0 if exc.code in (0, None) else USAGE_EXIT
    return COMMANDS[args.command](args)


def _closed_pipe():
    """The reader of stdout went away (``info --json | head``): end quietly, as a pipe writer does."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # so the interpreter's final flush cannot fail again
    except (OSError, ValueError):
        pass
    return PIPE_CLOSED_EXIT
