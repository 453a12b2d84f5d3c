"""Evaluate the shipped learned preview on the held-out shots and the demo shot (not a timed test).

    python -m bench.eval_learned [--heldout data/heldout] [--model models/preview-gn7.onnx]
                                 [--seconds 10] [--fidelity-seconds 2] [--demo-preset small|full|none]
                                 [--splash-shots dam_column throw_wall ... | --splash-shots]
                                 [--relax-iterations N] [--shots ring stairs ...]
                                 [--workers N | --scheduler ADDRESS]

For each held-out shot (``python -m training.generate --heldout --duration 2``
bakes their reference), the demo shot and the splash-suite shots of ``--splash-shots``
(``bench/splash_shots.py``: a plain dam break, a throw against a wall, a thin-walled glass,
a dam break over a ring, a pour down steps; none of them is in the training set; their
references are baked here into ``--out`` and kept when complete):

- fidelity over the first ``--fidelity-seconds``: ``engine.compare`` of the learned bake
  against the DFSPH reference (Chamfer in spacings, density of interior particles
  within 3 % of rho0, penetrating particles);
  the same density measure is reported for the reference bake itself (its own score);
- motion over the fidelity window: on the shots that surge along +x (the dam breaks and the
  stairs), the surge front of the preview against the reference's at every compared frame
  (the leading full row, ``engine.validate.dam_front``), in spacings; on every shot with
  static colliders, particles whose path between two frames crosses a collider surface (the
  splash suite's segment test), for both bakes; and the acceleration gain: the least-squares
  slope of the model's one-step acceleration against the reference's, from reference frames
  (1.0 is unbiased; below 1 the preview under-predicts and runs slow), and the reverse slope
  (near 1 when the model predicts the mean of what it cannot resolve, above 1 when it is scaled down);
- viscosity response (``--viscosity-shots``): each shot baked for ``--viscosity-seconds`` by both
  solvers at its own viscosity and at the reference's highest setting (``VISCOSITY_MAX``); the
  change of the kinetic energy at the last frame, preview against reference (the issue's target:
  the same sign, and at least half the reference's change);
- stability to ``--seconds``: the learned bake must finish with finite values;
  reported are the particle count, the max speed in sqrt(g d) over the last second
  and the kinetic energy at the end relative to its maximum in the first second
  (an explosion shows as a ratio far above 1).

``--workers N`` evaluates the shots on a local Dask cluster of N worker processes and
``--scheduler tcp://HOST:PORT`` on an existing one (one task per shot, ``engine.farm.run_jobs``,
the path ``python -m engine wedge`` uses); ``--out``, the held-out folder and the model must be
on storage every worker sees (checked first). The learned bakes' wall times, and so the speed-ups,
are then measured on the workers.

Prints a table and writes bench/results/eval_learned.json.
"""

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

from engine.bake import bake  # noqa: E402
from engine.cache import open_cache  # noqa: E402
from engine.compare import compare_caches  # noqa: E402
from engine.errors import SplashdraftError  # noqa: E402
from engine.farm import add_where_options  # noqa: E402
from engine.measures import kinetic_energy  # noqa: E402
from engine.scene import load_scene  # noqa: E402
from engine.validate import dam_front  # noqa: E402
from engine.world import build_world  # noqa: E402
from bench.splash_shots import SHOTS  # noqa: E402

#: Splash-suite shots evaluated by default: a plain dam break, a throw, a thin-walled glass, a dam
#: break over a ring and a pour down steps.
DEFAULT_SPLASH_SHOTS = ("dam_column", "throw_wall", "thin_glass", "ring_dam", "pour_steps")

#: Shots whose liquid surges along +x, and the floor height the front is measured on (None: the
#: leading row at any height, for the stairs, whose floor steps down).
SURGE_FLOORS = {"dam_column": 0.0, "ring_dam": 0.0, "heldout_stairs": None}

#: The highest ``fluid.viscosity`` the scene format accepts (engine.scene ``_fluid``), which both solvers honour.
VISCOSITY_MAX = 1.0

#: Splash-suite shots whose viscosity response is measured by default: the same as ``DEFAULT_SPLASH_SHOTS``.
DEFAULT_VISCOSITY_SHOTS = DEFAULT_SPLASH_SHOTS


def stability(cache_dir, seconds_total):
    reader = open_cache(cache_dir)
    d = reader.manifest["particle_spacing"]
    rho0 = reader.manifest["rest_density"]
    g = 9.81
    times, energies, speeds, counts = [], [], [], []
    for frame in reader.frames:
        data = reader.read_frame(frame)
        times.append(reader.manifest["frames"][str(frame)]["time"])
        energies.append(kinetic_energy(data["velocities"], rho0 * d**3))
        speeds.append(float(np.linalg.norm(data["velocities"], axis=1).max()) if len(data["ids"]) else 0.0)
        counts.append(len(data["ids"]))
    times, energies, speeds = np.array(times), np.array(energies), np.array(speeds)
    early = energies[times <= 1.0].max() if (times <= 1.0).any() else energies.max()
    late = times >= times.max() - 1.0
    return {
        "simulated_seconds": float(times.max()),
        "finished": bool(reader.manifest.get("complete")),
        "particles_first": counts[0],
        "particles_last": counts[-1],
        "max_speed_last_second_froude": float(speeds[late].max() / np.sqrt(g * d)),
        "kinetic_energy_end_over_first_second_max": float(energies[-1] / early) if early > 0 else None,
        "max_kinetic_energy_ratio_after_first_second": float(energies[times > 1.0].max() / early) if early > 0 and (times > 1.0).any() else None,
    }


def surge_front(positions, spacing, floor, row):
    """Front x (m) of a surge along +x: the ``row``-th largest x among particles near ``floor``
    (any height when ``floor`` is None) plus half a spacing."""
    return dam_front(positions, spacing, np.inf if floor is None else floor, row)


def acceleration_gain(scene_path, reference_dir, model, upto_seconds, every=2):
    """Least-squares slope of the model's one-step non-gravity acceleration against the reference's.

    From reference frames up to ``upto_seconds`` (every ``every``-th), one learned step of one frame
    (no relaxation, no constraints): sum(p . t) / sum(t . t) over particles with a target, for all of
    them and for the tenth with the largest target. 1.0 is unbiased; a preview whose gain is below 1
    under-predicts the pressure push and runs slow.
    """
    from engine.learned import features
    from engine.learned.contract import default_model_path, load_contract
    from engine.learned.runtime import CoreRunner
    from training.dataset import Shot, make_sample

    contract, onnx_path = load_contract(model or default_model_path())
    stats = contract["normalisation"]
    runner = CoreRunner(onnx_path, contract["rounds"], tile_particles=0)
    shot = Shot(Path(reference_dir).parent, scene_path, reference_dir)
    dot = square = dot_top = square_top = predicted_square = 0.0
    for k in shot.sample_indices(1)[::every]:
        if shot.times[k] > upto_seconds:
            break
        graph, target, mask = make_sample(shot, k, contract)
        if not mask.any():
            continue
        predicted = runner.run(features.normalise(graph, stats)) * stats["target_std"] + stats["target_mean"]
        t, p = target[mask].astype(np.float64), predicted[mask].astype(np.float64)
        size = np.linalg.norm(t, axis=1)
        top = size >= np.percentile(size, 90)
        dot, square = dot + float((p * t).sum()), square + float((t * t).sum())
        predicted_square += float((p * p).sum())
        dot_top, square_top = dot_top + float((p[top] * t[top]).sum()), square_top + float((t[top] * t[top]).sum())
    return {"acceleration_gain": _ratio(dot, square), "acceleration_gain_top_tenth": _ratio(dot_top, square_top),
            "acceleration_reverse_slope": _ratio(dot, predicted_square)}


def motion(name, scene_path, reference_dir, learned_dir, frames):
    """Surge front of the preview against the reference (spacings) and collider crossings of both bakes."""
    from bench.splash_suite import thin_crossings

    scene = load_scene(scene_path)
    d = scene.particle_spacing
    world = build_world(scene)
    caches = {"reference": open_cache(reference_dir), "learned": open_cache(learned_dir)}
    row = {}
    if name in SURGE_FLOORS:
        width = scene.bounds.upper[1] - scene.bounds.lower[1]
        row_count = max(1, int(round(width / d)) - 1)  # a full row across the tank
        fronts = {key: np.array([surge_front(c.read_frame(f)["positions"], d, SURGE_FLOORS[name], row_count)
                                 for f in frames]) for key, c in caches.items()}
        lead = (fronts["learned"] - fronts["reference"]) / d
        worst = int(np.nanargmax(np.abs(lead)))
        row.update({"front_error_max_spacings": float(abs(lead[worst])),
                    "front_error_worst_frame": int(frames[worst]),
                    "front_lead_at_end_spacings": float(lead[-1]),
                    "front_reference_travel_spacings": float((fronts["reference"][-1] - fronts["reference"][0]) / d),
                    "front_learned_travel_spacings": float((fronts["learned"][-1] - fronts["learned"][0]) / d)})
    # Static colliders only: a moving collider's surface at the later frame is not where the particle
    # met it, so the straight-path test would count particles it merely pushed.
    static = [corners for collider, (_, corners) in zip(world.colliders, world.collider_triangles_at(0.0))
              if collider.motion == "static"]
    if static:
        for key, cache in caches.items():
            crossed, before = 0, cache.read_frame(frames[0])
            for f in frames[1:]:
                after = cache.read_frame(f)
                crossed += thin_crossings(static, before["positions"], after["positions"], before["ids"], after["ids"])
                before = after
            row[f"crossings_{key}"] = crossed
    return row


def evaluate_shot(name, scene_path, reference_dir, out, model, seconds, fidelity_seconds, log, relax_iterations=None):
    from engine.solvers import make_solver

    scene = load_scene(scene_path)
    last = scene.frame_start + int(round(seconds * scene.fps))
    learned_dir = out / name / "learned"
    # Long scenes for stability: the scene's frame_end may be shorter than --seconds.
    if last > scene.frame_end:
        import dataclasses

        scene = dataclasses.replace(scene, frame_end=last)
    options = {} if relax_iterations is None else {"relax_iterations": relax_iterations}
    solver = make_solver("learned", model=model, **options) if model or options else None
    started = time.monotonic()
    try:
        result = bake(scene, "learned", learned_dir, overwrite=True, use_signals=False, solver=solver)
        error = None
    except SplashdraftError as exc:
        result, error = None, str(exc)
    learned_seconds = time.monotonic() - started
    row = {"shot": name, "learned_wall_seconds": round(learned_seconds, 1), "error": error,
           "relax_iterations": (solver.relax_iterations if solver is not None else None)}
    if result is not None:
        row.update(stability(learned_dir, seconds))
    try:
        ref = open_cache(reference_dir)
        frames = [f for f in ref.frames if ref.manifest["frames"][str(f)]["time"] <= fidelity_seconds + 1e-9]
        learned_frames = set(open_cache(learned_dir).frames)
        frames = [f for f in frames if f in learned_frames]
        # The learned bake's own scene copy (its frame_end may have been extended for --seconds).
        fidelity = compare_caches(reference_dir, learned_dir, frames=frames)
        row.update({
            "frames_compared": fidelity["frames_compared"],
            "mean_chamfer_spacings": fidelity["mean_chamfer_spacings"],
            "max_chamfer_spacings": fidelity["max_chamfer_spacings"],
            "density_within_3pct_fraction": fidelity["density_within_3pct_fraction"],
            "density_within_3pct_fraction_deep": fidelity.get("density_within_3pct_fraction_deep"),
            "density_within_3pct_fraction_all": _mean_known(r["density_within_3pct_fraction_all"] for r in fidelity["frames"]),
            "penetrating_particles": fidelity["penetrating_particles"],
            "reference_seconds_per_simulated_second": _seconds_per_sim(ref, fidelity_seconds),
            "learned_seconds_per_simulated_second": _seconds_per_sim(open_cache(learned_dir), fidelity_seconds),
            # Kinetic energy of the preview over the reference's, summed over the compared frames
            # (the issue's target 0.75-1.33) and at each frame.
            "kinetic_energy_ratio_summed": _ratio(sum(r["kinetic_energy_b_j"] for r in fidelity["frames"]),
                                                  sum(r["kinetic_energy_a_j"] for r in fidelity["frames"])),
        })
        row.update(motion(name, scene_path, reference_dir, learned_dir, [r["frame"] for r in fidelity["frames"]]))
        row.update(acceleration_gain(scene_path, reference_dir, model, fidelity_seconds))
        speedup = _ratio(row["reference_seconds_per_simulated_second"], row["learned_seconds_per_simulated_second"])
        row["speedup_over_reference"] = speedup
        # The same density measure on the reference bake itself: what an incompressible solver scores.
        itself = compare_caches(reference_dir, reference_dir, frames=frames, scene=scene_path)
        row["reference_density_within_3pct_fraction"] = itself["density_within_3pct_fraction"]
        row["reference_density_within_3pct_fraction_deep"] = itself.get("density_within_3pct_fraction_deep")
    except SplashdraftError as exc:
        row["compare_error"] = str(exc)
    if log is not None:
        log(json.dumps(row))
    return row


def _bake_reference(scene_path, reference_dir, fidelity_seconds, log):
    """Bake the DFSPH reference of ``scene_path`` over the fidelity window, unless a complete one is there."""
    scene = load_scene(scene_path)
    last = min(scene.frame_end, scene.frame_start + int(round(fidelity_seconds * scene.fps)))
    reader = None
    try:
        reader = open_cache(reference_dir)
    except SplashdraftError:
        pass
    try:
        if reader is None or not reader.manifest.get("complete"):
            bake(scene_path, "sph", reference_dir, frames=(scene.frame_start, last), overwrite=True, use_signals=False)
    except SplashdraftError as exc:
        if log is not None:
            log(f"{scene_path}: reference bake failed: {exc}")


def evaluate_demo(preset, out, model, seconds, fidelity_seconds, log, relax_iterations=None):
    """The demo shot: bake its reference for the fidelity window (kept when complete), then evaluate."""
    from engine.demo import write_demo_scene

    demo_dir = Path(out) / f"demo_{preset}"
    scene_path = write_demo_scene(demo_dir / "scene", preset=preset)
    _bake_reference(scene_path, demo_dir / "sph", fidelity_seconds, log)
    return evaluate_shot(f"demo_{preset}", scene_path, demo_dir / "sph", Path(out), model, seconds, fidelity_seconds,
                         log, relax_iterations)


def evaluate_splash(name, out, model, seconds, fidelity_seconds, log, relax_iterations=None):
    """A splash-suite shot (``bench/splash_shots.py``): its reference baked here and kept, then evaluated."""
    from bench.splash_shots import shot
    from engine.scene import save_scene

    shot_dir = Path(out) / name
    scene_path = shot_dir / "scene" / f"{name}.json"
    if not scene_path.exists():
        save_scene(scene_path, shot(name))
    _bake_reference(scene_path, shot_dir / "sph", fidelity_seconds, log)
    return evaluate_shot(name, scene_path, shot_dir / "sph", Path(out), model, seconds, fidelity_seconds, log,
                         relax_iterations)


def _energy_at_end(cache_dir):
    """(time s, kinetic energy J) of the last frame of the bake in ``cache_dir``."""
    reader = open_cache(cache_dir)
    last = reader.frames[-1]
    data = reader.read_frame(last)
    mass = reader.manifest["rest_density"] * reader.manifest["particle_spacing"] ** 3
    return reader.manifest["frames"][str(last)]["time"], kinetic_energy(data["velocities"], mass)


def viscosity_response(name, out, model, seconds=1.0, high=VISCOSITY_MAX, log=None) -> dict:
    """Kinetic energy at ``seconds`` of splash shot ``name`` at its own viscosity and at ``high``,
    baked by the reference and by the preview (bakes kept under ``out/viscosity_<name>``).

    Returns a row: both energies per solver, the changes high - low (J) and the preview's change
    over the reference's (``learned_over_reference_change``; the issue's target is >= 0.5).
    """
    from bench.splash_shots import shot
    from engine.scene import save_scene
    from engine.solvers import make_solver

    base = shot(name, seconds=seconds)
    low = float(base["fluid"]["viscosity"])
    row = {"shot": name, "viscosity_low": low, "viscosity_high": float(high)}
    for solver_name in ("sph", "learned"):
        for label, viscosity in (("low", low), ("high", float(high))):
            scene = Path(out) / f"viscosity_{name}" / "scene" / f"{name}_{label}.json"
            save_scene(scene, dict(base, fluid=dict(base["fluid"], viscosity=viscosity)))
            folder = Path(out) / f"viscosity_{name}" / f"{solver_name}_{label}"
            solver = make_solver("learned", model=model) if solver_name == "learned" and model else None
            bake(scene, solver_name, folder, overwrite=True, use_signals=False, solver=solver)
            row["seconds"], row[f"{solver_name}_energy_{label}_j"] = _energy_at_end(folder)
        row[f"{solver_name}_change_j"] = row[f"{solver_name}_energy_high_j"] - row[f"{solver_name}_energy_low_j"]
        row[f"{solver_name}_relative_change"] = _ratio(row[f"{solver_name}_change_j"], row[f"{solver_name}_energy_low_j"])
    row["learned_over_reference_change"] = _ratio(row["learned_change_j"], row["sph_change_j"])
    if log is not None:
        log(json.dumps(row))
    return row


def format_viscosity_table(rows):
    """The viscosity-response table: kinetic energy at the end, low and high viscosity, per solver."""
    lines = [f"{'shot':<12} {'t s':>5} {'visc':>11} {'ref KE lo->hi J':>17} {'preview KE lo->hi J':>21} "
             f"{'ref rel':>7} {'prev rel':>8} {'change ratio':>12}"]
    for r in rows:
        ratio = r["learned_over_reference_change"]
        lines.append(f"{r['shot']:<12} {r['seconds']:>5.2f} {r['viscosity_low']:>5g}->{r['viscosity_high']:<4g} "
                     f"{r['sph_energy_low_j']:>8.4f}->{r['sph_energy_high_j']:<8.4f} "
                     f"{r['learned_energy_low_j']:>10.4f}->{r['learned_energy_high_j']:<10.4f} "
                     f"{_cell(r['sph_relative_change'], '>7.2f')} {_cell(r['learned_relative_change'], '>8.2f')} "
                     f"{'-' if ratio is None else format(ratio, '.2f'):>12}")
    return "\n".join(lines)


def evaluate_job(job):
    """One evaluation as a plain dict in, a row out: here, or as a Dask task on a worker."""
    options = (job["model"], job["seconds"], job["fidelity_seconds"], None, job["relax_iterations"])
    if job["kind"] == "demo":
        return evaluate_demo(job["preset"], Path(job["out"]), *options)
    if job["kind"] == "splash":
        return evaluate_splash(job["name"], Path(job["out"]), *options)
    return evaluate_shot(job["name"], Path(job["scene"]), Path(job["reference"]), Path(job["out"]), *options)


def _mean_known(values):
    """Mean of the values that are not None (None when there are none)."""
    known = [v for v in values if v is not None]
    return float(np.mean(known)) if known else None


def _ratio(a, b):
    return float(a) / float(b) if a is not None and b else None


def _seconds_per_sim(reader, upto):
    frames = [f for f in reader.frames if reader.manifest["frames"][str(f)]["time"] <= upto + 1e-9]
    wall = sum(reader.manifest["frames"][str(f)].get("seconds", 0.0) for f in frames)
    sim = max(reader.manifest["frames"][str(f)]["time"] for f in frames)
    return wall / sim if sim > 0 else None


def _text_spec(spec):
    """The alignment and width of a format spec, for text in a numeric column: ">7.3f" -> ">7"."""
    return spec[0] + spec[1:].split(".")[0].rstrip("df")


def _cell(value, spec):
    if isinstance(value, (int, float)) and not isinstance(value, bool) and spec[-1] in "df":
        return format(value, spec)
    return format("-" if value is None else str(value), _text_spec(spec))


def format_table(rows):
    """The evaluation table: fidelity, motion, stability and speed per shot."""
    columns = (("shot", "shot", "<18"), ("CD mean", "mean_chamfer_spacings", ">7.3f"),
               ("CD max", "max_chamfer_spacings", ">6.2f"), ("KE/ref", "kinetic_energy_ratio_summed", ">6.2f"),
               ("front err", "front_error_max_spacings", ">9.1f"), ("lead end", "front_lead_at_end_spacings", ">8.1f"),
               ("a gain", "acceleration_gain", ">6.2f"), ("a rev", "acceleration_reverse_slope", ">5.2f"), ("cross L", "crossings_learned", ">7d"), ("cross R", "crossings_reference", ">7d"),
               ("inside", "penetrating_particles", ">6d"), ("rho 3%", "density_within_3pct_fraction", ">6.2f"),
               ("ref rho", "reference_density_within_3pct_fraction", ">7.2f"),
               ("KE end/1s", "kinetic_energy_end_over_first_second_max", ">9.2f"),
               ("n end", "particles_last", ">6d"), ("speedup", "speedup_over_reference", ">7.1f"))
    lines = [" ".join(format(title, _text_spec(spec)) for title, _, spec in columns)]
    lines += [" ".join(_cell(row.get(key), spec) for _, key, spec in columns) for row in rows]
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--heldout", default=str(ROOT / "data" / "heldout"),
                        help="Held-out data folder from training.generate --heldout ('none': skip).")
    parser.add_argument("--model", default=None, help="Model .onnx (default: the shipped one).")
    parser.add_argument("--seconds", type=float, default=10.0, help="Stability horizon in simulated seconds (10).")
    parser.add_argument("--fidelity-seconds", type=float, default=2.0, help="Fidelity window in seconds (2).")
    parser.add_argument("--demo-preset", default="small", choices=("small", "full", "none"),
                        help="Demo shot preset to evaluate as well (default small; full is 25k particles).")
    parser.add_argument("--splash-shots", nargs="*", default=list(DEFAULT_SPLASH_SHOTS), choices=SHOTS,
                        help="Splash-suite shots to evaluate as well (default: " + " ".join(DEFAULT_SPLASH_SHOTS)
                        + "; give the option with no names for none).")
    parser.add_argument("--viscosity-shots", nargs="*", default=list(DEFAULT_VISCOSITY_SHOTS), choices=SHOTS,
                        help="Splash-suite shots whose kinetic energy is compared at their own viscosity and at "
                        f"{VISCOSITY_MAX:g} (default: " + " ".join(DEFAULT_VISCOSITY_SHOTS) + "; no names: none).")
    parser.add_argument("--viscosity-seconds", type=float, default=1.0,
                        help="Simulated seconds of the viscosity-response bakes (1).")
    parser.add_argument("--relax-iterations", type=int, default=None,
                        help="Density relaxation iterations per learned step (default: the solver's default).")
    parser.add_argument("--shots", nargs="*", default=None,
                        help="Only these held-out shots (names contain the word, e.g. stairs); default all.")
    parser.add_argument("--out", default=str(ROOT / "bench" / "results" / "eval"),
                        help="Folder for the learned bakes and eval_learned.json (default bench/results/eval; "
                        "with the default, bench/results/eval_learned.json is written too).")
    add_where_options(
        parser,
        "Evaluate the shots on a local Dask cluster of N worker processes (default: here, one after another).",
        "Evaluate the shots on the Dask scheduler at ADDRESS (tcp://HOST:PORT); --out, "
        "--heldout and --model must be on storage every worker sees at the same path.")
    args = parser.parse_args(argv)
    out = Path(args.out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    log = lambda m: print(m, file=sys.stderr, flush=True)  # noqa: E731
    heldout = Path(args.heldout).resolve()
    manifest = {"shots": []} if args.heldout == "none" else json.loads((heldout / "data_manifest.json").read_text())
    common = {"out": str(out), "model": None if args.model is None else str(Path(args.model).resolve()),
              "seconds": args.seconds, "fidelity_seconds": args.fidelity_seconds,
              "relax_iterations": args.relax_iterations}  # fmt: skip
    jobs = [dict(common, kind="heldout", name=shot["name"], scene=str(heldout / shot["scene"]),
                 reference=str(heldout / shot["cache"]))
            for shot in manifest["shots"]
            if args.shots is None or any(word in shot["name"] for word in args.shots)]  # fmt: skip
    jobs += [dict(common, kind="splash", name=name) for name in args.splash_shots]
    if args.demo_preset != "none":
        jobs.append(dict(common, kind="demo", name=f"demo_{args.demo_preset}", preset=args.demo_preset))
    if args.scheduler is not None or args.workers:
        from bench.eval_learned import evaluate_job as task  # by module name, so that workers can import it
        from engine.farm import run_jobs

        paths = [heldout] + ([common["model"]] if common["model"] else [])
        try:
            rows = run_jobs(task, jobs, out, scheduler=args.scheduler, workers=args.workers, paths=paths,
                            on_done=lambda job, row: log(json.dumps(row)), log=log)  # fmt: skip
        except SplashdraftError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return exc.exit_code
    else:
        rows = []
        for job in jobs:
            rows.append(evaluate_job(job))
            log(json.dumps(rows[-1]))
    print(format_table(rows))
    viscosity_rows = [viscosity_response(name, out, common["model"], args.viscosity_seconds, log=log)
                      for name in args.viscosity_shots]
    if viscosity_rows:
        print(format_viscosity_table(viscosity_rows))
    result = {"rows": rows, "viscosity_rows": viscosity_rows, "args": vars(args)}
    (out / "eval_learned.json").write_text(json.dumps(result, indent=1) + "\n")
    results = ROOT / "bench" / "results"
    if out == (results / "eval").resolve():  # the default --out: also the benchmark's usual results file
        (results / "eval_learned.json").write_text(json.dumps(result, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
