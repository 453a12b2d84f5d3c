"""Fine-tuning the preview on an artist's own reference bakes (``python -m engine tune``).

    python -m engine tune --bakes DIR [DIR ...] [--base MODEL] --out MODEL_DIR [--minutes M] [--iterations N]
                          [--lr RATE] [--unroll M] [--reach K] [--score distance|chamfer]

Continues training a shipped model (default: the shipped model, ``models/preview-gn7``) on DFSPH
bakes the artist already has (ordinary cache folders with their ``scene/``
copy), and writes a new model folder:

    MODEL_DIR/<name>.onnx, <name>.json   the model and its contract (passes ``load_contract``)
    MODEL_DIR/<name>.md                  the card: data, command, time, before/after on held-back frames
    MODEL_DIR/tune.json                  the same figures as data
    MODEL_DIR/run/                       config.json, checkpoint.pt (resumable), losses.json, export_check.json
    MODEL_DIR/evaluation/                learned bakes of each reference shot with the base and the tuned model

Starting weights: the shipped models are ONNX files, so the PyTorch weights
are read back from the ONNX initialisers (``weights_from_onnx``); the
mapping is checked by running the recovered network in PyTorch against the
ONNX file in onnxruntime on a real sample (must agree to 1e-4 relative).

Held back: the last ``--hold-back`` share of each bake's frames (default
0.25, at least two frames) is never a training target. Before/after
figures are measured on those frames only: the preview, with the base model
and with the tuned model, bakes each reference shot from its first frame,
and ``engine.compare`` measures mean Chamfer distance (in spacings) and the
energy ratio (liquid kinetic + potential energy of the preview over the
reference's, from each cache's energy audit, averaged over the held-back frames).

The learned step: the preview takes n = ceil(T / step_froude) steps per
frame interval T. Reference bakes give frame-to-frame targets, so a bake
is usable when one learned step spans one of its frames (T <= step_froude
in sqrt(d/g)); otherwise the error says what frame rate to bake at.

Loss (``--unroll``, default 8): with M > 0 the pushforward loss of training/pushforward.py: each sampled
step k -> k + 1 starts from the state the model being trained reaches in m = 1..min(M, k) preview
steps (no gradient) from the reference frame k - m, and its target lands the preview's integrator
on the reference's frame k + 1; the card's figure is such a free rollout, which a one-step loss
from the reference's own state never shows the network. With M = 0 the one-step loss of
``training.train`` (velocity-walk noise). Both use ``train.train_step``. With ``--reach K`` > 0 the reach
loss of training/reach.py instead: from the same pushed start, K frames of the preview's own step
rolled with gradient and scored on positions (``--score``); M = 0 then starts from the reference frame.
Settings that change what the checkpoint was trained for (``LOSS_SETTINGS``) must match on resume.

Normalisation statistics stay the base model's (the weights were trained
against them). Resumable: ``checkpoint.pt`` (our own state dicts, loaded
with ``weights_only=True``) is written every ``--checkpoint-every``
iterations; re-running the same command continues it.
"""

import json
import shutil
import sys
import time
from pathlib import Path

import numpy as np

from engine.cache import open_cache, write_atomic
from engine.errors import ModelError, SplashdraftError, TuneResumeError, UsageError
from engine.learned import contract as contract_module
from engine.learned.contract import default_model_path

from . import dataset

#: Loss and lr, measured on two 12-frame bakes of one shot (viscosity 0.01 and 0.03), README "Fine-tuning":
#: the pushforward loss (unroll 8) at lr 3e-4 lowered the held-back rollout Chamfer (0.629 -> 0.533 spacings
#: in 210 iterations, 0.527 in 30 minutes), where the one-step loss made it worse at every rate tried
#: (3e-4: 0.634 -> 0.964, over-fitting the few one-step samples; 3e-5: 0.634 -> 0.691). The one-step loss
#: (--unroll 0) keeps its own default rate, ONE_STEP_LR. With the base preview-gn7 (README): in 4-minute runs
#: the reach loss (--reach 8, Chamfer score) did best, 0.581 -> 0.509 held back and 0.582 -> 0.507 on unseen
#: bakes (pushforward alone 0.534 / 0.531), but over 29 minutes its own training loss rose again after
#: ~600 iterations and it ended at 0.562 / 0.560, energy 1.26; so it is not the default.
TUNE_DEFAULTS = {"iterations": 300, "lr": 3e-4, "batch": 2, "noise": 0.02, "seed": 0, "hold_back": 0.25,
                 "checkpoint_every": 50, "unroll": 8, "reach": 0, "score": "chamfer"}  # fmt: skip
ONE_STEP_LR = 3e-5
#: PyTorch threads of a tune. One: on the 2 shared cores with other jobs running (load average 4-5), a roll
#: of 8 preview steps with gradient on a 1,210-particle bake took 15-18 s with 2 threads and 0.5 s with 1
#: (README "Fine-tuning"): the graphs of a few thousand particles are too small to share between threads.
TORCH_THREADS = 1


def weights_from_onnx(onnx_path, latent, rounds) -> "torch.nn.Module":
    """A GraphCore (training/model.py) holding the weights of an exported ONNX core.

    Named initialisers map one to one; the bias-free and post-sum linear layers were exported as
    transposed ``onnx::MatMul_*`` constants, in the order the forward pass uses them (per round:
    sender, edge, message, boundary_edge, boundary_message). ``check_against_onnx`` verifies it.
    """
    import onnx
    import torch
    from onnx import numpy_helper

    from .model import GraphCore

    model = GraphCore(latent, rounds)
    graph = onnx.load(str(onnx_path)).graph
    named = {init.name: numpy_helper.to_array(init) for init in graph.initializer}
    state = model.state_dict()
    loose = [named[name] for name in sorted((n for n in named if n.startswith("onnx::MatMul_")),
                                            key=lambda n: int(n.rsplit("_", 1)[1]))]  # fmt: skip
    order = [f"blocks.{r}.{part}.weight" for r in range(rounds)
             for part in ("sender", "edge", "message", "boundary_edge", "boundary_message")]  # fmt: skip
    if len(loose) != len(order):
        raise ModelError(f"model file {onnx_path}: {len(loose)} unnamed weight matrices where {len(order)} were "
                         "expected; it was not exported by training/model.py, so it cannot be fine-tuned")  # fmt: skip
    for key, value in zip(order, loose):
        named[key] = value.T
    for key, tensor in state.items():
        value = named.get(key)
        if value is None or tuple(value.shape) != tuple(tensor.shape):
            raise ModelError(f"model file {onnx_path}: no weight {key} of shape {tuple(tensor.shape)}; "
                             "fine-tune a model exported by training/model.py")  # fmt: skip
        state[key] = torch.from_numpy(np.array(value, np.float32))
    model.load_state_dict(state)
    return model


def check_against_onnx(model, onnx_path, rounds, sample_inputs) -> float:
    """Max relative difference of PyTorch ``model`` against onnxruntime on ``sample_inputs``."""
    import torch

    from engine.learned.runtime import CoreRunner

    from .model import as_tensors

    model.eval()
    with torch.no_grad():
        reference = model(*as_tensors(sample_inputs)).numpy()
    output = CoreRunner(onnx_path, rounds, tile_particles=0).run(sample_inputs)
    model.train()
    return float(np.abs(output - reference).max() / max(np.abs(reference).max(), 1e-12))


def load_bakes(bakes, contract) -> list:
    """[Shot] of the reference bakes; UsageError naming a bake that cannot serve."""
    shots = []
    for folder in bakes:
        folder = Path(folder)
        reader = open_cache(folder)  # CacheError naming the folder when it is not a cache
        scene_file = folder / "scene" / "scene.json"
        if not scene_file.is_file():
            raise UsageError(f"--bakes {folder}: no scene copy (scene/scene.json) in the cache; bake it again "
                             "with this version of the engine")  # fmt: skip
        if reader.manifest["solver"]["name"] != "sph":
            raise UsageError(f"--bakes {folder}: baked with the {reader.manifest['solver']['name']} solver; "
                             "fine-tune on reference (--solver sph) bakes only")  # fmt: skip
        shot = dataset.Shot(folder, scene_file, folder)
        shot.folder = str(folder.resolve())
        if len(shot.frames) < 6:
            raise UsageError(f"--bakes {folder}: {len(shot.frames)} frames; give bakes of at least 6 frames")
        step = shot.dt / shot.units.time
        if step > contract["step_froude"] * (1 + 1e-6):
            fps_needed = shot.scene.fps * step / contract["step_froude"]
            raise UsageError(
                f"--bakes {folder}: one frame is {step:.3f} sqrt(d/g), longer than the model's learned step "
                f"({contract['step_froude']:.3f}); bake the reference at {fps_needed:.0f} fps or more"
            )
        shots.append(shot)
    names = [s.name for s in shots]
    if len(set(names)) != len(names):
        raise UsageError("--bakes: two bakes share a folder name; give each reference bake its own folder name")
    return shots


def held_back_start(shot, hold_back) -> int:
    """Position of the first held-back frame of ``shot`` (``first_held_back``)."""
    return first_held_back(len(shot.frames), hold_back)


def first_held_back(frame_count, hold_back) -> int:
    """Position of the first held-back frame of ``frame_count``: the last ``hold_back`` share, at least two."""
    return frame_count - max(2, int(round(hold_back * frame_count)))


def split_frames(shot, hold_back) -> tuple[list, list]:
    """(training 'now' positions, held-back frame numbers): targets stay before the held-back tail."""
    keep = held_back_start(shot, hold_back)
    training = [k for k in shot.sample_indices(1) if k + 1 < keep]
    return training, list(shot.frames[keep:])


def _evaluate(shots, held, onnx_path, out_dir, label):
    """Learned bakes of each shot with ``onnx_path``; mean Chamfer [d] and energy ratio on held-back frames."""
    from engine.bake import bake
    from engine.compare import compare_caches
    from engine.solvers import make_solver

    rows = []
    for shot in shots:
        target = Path(out_dir) / shot.name / label
        reference = Path(shot.folder)
        scene_file = reference / "scene" / "scene.json"
        last = max(shot.frames)
        bake(scene_file, "learned", target, frames=(shot.scene.frame_start, last), use_signals=False,
             solver=make_solver("learned", model=onnx_path), overwrite=True)  # fmt: skip
        result = compare_caches(reference, target, frames=held[shot.name], scene=scene_file)
        ratios = []
        for row in result["frames"]:
            a, b = row["energy_a"], row["energy_b"]
            if a and b and a["kinetic_j"] + a["potential_j"] > 0:
                ratios.append((b["kinetic_j"] + b["potential_j"]) / (a["kinetic_j"] + a["potential_j"]))
        rows.append({"bake": str(reference), "frames": held[shot.name],
                     "mean_chamfer_spacings": result["mean_chamfer_spacings"],
                     "energy_ratio": float(np.mean(ratios)) if ratios else None})  # fmt: skip
    return rows


def tune(bakes, out, base=None, minutes=None, iterations=None, hold_back=None, checkpoint_every=None, seed=None,
         command=None, log=print, lr=None, unroll=None, reach=None, score=None) -> dict:
    """Fine-tune ``base`` on ``bakes`` into the model folder ``out``; returns the tune record dict."""
    try:
        import torch
    except ImportError:
        from engine.errors import DependencyError

        raise DependencyError("fine-tuning needs PyTorch, which is not installed; run "
                              "pip install -r requirements-train.txt (CPU build, about 200 MB)") from None  # fmt: skip
    from .pushforward import preview_stepper, pushforward_pool, train_on_pushforward
    from .reach import GradientCore, train_on_reach
    from .train import _normalised_sample, _save_torch, export, train_on_pool

    torch.set_num_threads(TORCH_THREADS)
    started_wall = time.monotonic()
    out = Path(out)
    name = out.name
    if not name or not all(ch.isalnum() or ch in "-_." for ch in name):
        raise UsageError(f"--out {out}: the folder name names the model; use letters, digits, '-', '_' or '.'")
    base_onnx = contract_module.find_model(base) if base is not None else default_model_path()
    base_contract, base_onnx = contract_module.load_contract(base_onnx)
    settings = dict(TUNE_DEFAULTS)
    if unroll == 0 and lr is None:
        settings["lr"] = ONE_STEP_LR
    for key, value in (("iterations", iterations), ("hold_back", hold_back), ("seed", seed),
                       ("checkpoint_every", checkpoint_every), ("lr", lr), ("unroll", unroll),
                       ("reach", reach), ("score", score)):  # fmt: skip
        if value is not None:
            settings[key] = value
    if not 0.05 <= settings["hold_back"] <= 0.8:
        raise UsageError(f"--hold-back {settings['hold_back']}: give a share of frames from 0.05 to 0.8")
    if not 0 < settings["lr"] <= 0.1:
        raise UsageError(f"--lr {settings['lr']}: give a learning rate above 0 and at most 0.1")
    if int(settings["unroll"]) != settings["unroll"] or settings["unroll"] < 0:
        raise UsageError(f"--unroll {settings['unroll']}: give a whole number of frames >= 0 (0: one-step loss)")
    if int(settings["reach"]) != settings["reach"] or settings["reach"] < 0:
        raise UsageError(f"--reach {settings['reach']}: give a whole number of frames >= 0 (0: no gradient "
                         "through the preview's steps)")
    if settings["score"] not in SCORE_TEXT:
        raise UsageError(f"--score {settings['score']}: give one of {', '.join(SCORE_TEXT)}")
    if int(settings["iterations"]) < 1:
        raise UsageError(f"--iterations {settings['iterations']}: give at least 1")
    shots = load_bakes(bakes, base_contract)
    pool, held = [], {}
    for shot in shots:
        training, held[shot.name] = split_frames(shot, settings["hold_back"])
        pool += [(shot, k, 1) for k in training]
    if settings["unroll"] or settings["reach"]:
        pool = pushforward_pool(shots, {s.name: held_back_start(s, settings["hold_back"]) for s in shots})
    if not pool:
        raise UsageError("--bakes: no training frames left after holding back the tail; give longer bakes")
    c = base_contract
    config = {"latent": int(c.get("architecture", {}).get("latent", 32)), "rounds": int(c["rounds"]),
              "radius_spacings": c["radius_spacings"], "density_support_spacings": c["density_support_spacings"],
              "max_neighbours": c["max_neighbours"], "max_boundary_neighbours": c["max_boundary_neighbours"],
              "step_froude": c["step_froude"], "step_froude_min": c["step_froude_min"]}  # fmt: skip
    stats = c["normalisation"]
    record_key = {"base_sha256": c["onnx_sha256"], "bakes": [s.folder for s in shots], "settings": settings,
                  "config": config}  # fmt: skip
    run = out / "run"
    run.mkdir(parents=True, exist_ok=True)
    checkpoint_path = run / "checkpoint.pt"
    config_path = run / "config.json"
    if config_path.exists():
        previous = json.loads(config_path.read_text())
        same = {k: previous.get(k) for k in ("base_sha256", "bakes", "config")} == {
            k: record_key[k] for k in ("base_sha256", "bakes", "config")}
        if not same:
            raise UsageError(f"--out {out}: holds a tune run of another base model or other bakes; "
                             "choose another --out, or re-run the command that started it to resume")  # fmt: skip
        check_resumable_settings(out, previous.get("settings", {}), settings)
    write_atomic(config_path, (json.dumps(record_key, indent=1) + "\n").encode())

    model = weights_from_onnx(base_onnx, config["latent"], config["rounds"])
    rng = np.random.default_rng(settings["seed"])
    torch.manual_seed(settings["seed"])
    probe_shot, probe_k = pool[len(pool) // 2][:2]
    probe = _normalised_sample(probe_shot, probe_k, 1, config, stats, None, 0.0)[0]
    mismatch = check_against_onnx(model, base_onnx, config["rounds"], probe)
    if mismatch > 1e-4:
        raise ModelError(f"model file {base_onnx}: weights read back from the ONNX file differ from it by "
                         f"{mismatch:.3g} relative; it cannot be fine-tuned, retrain it with python -m training.train")
    optimiser = torch.optim.Adam(model.parameters(), lr=settings["lr"])
    stepper = preview_stepper(model, base_onnx) if settings["unroll"] or settings["reach"] else None
    gradient_core = GradientCore(model, base_contract) if settings["reach"] else None
    last = {s.name: held_back_start(s, settings["hold_back"]) - 1 for s in shots}
    iteration, seconds_before, history = 0, 0.0, []
    if checkpoint_path.exists():
        payload = torch.load(checkpoint_path, weights_only=True)
        model.load_state_dict(payload["model"])
        optimiser.load_state_dict(payload["optimiser"])
        for group in optimiser.param_groups:
            group["lr"] = settings["lr"]  # this command's rate, not the checkpoint's
        iteration, seconds_before = int(payload["iteration"]), float(payload["seconds"])
        history = json.loads(payload["history"])
        rng.bit_generator.state = json.loads(payload["numpy_rng"])
        torch.set_rng_state(payload["torch_rng"])
        log(f"tune: resumed at iteration {iteration}")
    started = time.monotonic()

    def save() -> None:
        _save_torch(checkpoint_path, {
            "model": model.state_dict(), "optimiser": optimiser.state_dict(), "iteration": iteration,
            "seconds": seconds_before + time.monotonic() - started, "history": json.dumps(history),
            "numpy_rng": json.dumps(rng.bit_generator.state), "torch_rng": torch.get_rng_state(),
        })  # fmt: skip
        write_atomic(run / "losses.json", (json.dumps(history) + "\n").encode())

    total = int(settings["iterations"])
    model.train()
    while iteration < total:
        if minutes is not None and time.monotonic() - started > 60 * minutes:
            log(f"tune: time budget of {minutes} min reached at iteration {iteration}")
            break
        if gradient_core is not None:
            loss = train_on_reach(model, optimiser, pool, stepper, gradient_core, rng, settings["batch"],
                                  int(settings["unroll"]), int(settings["reach"]), last, settings["score"])  # fmt: skip
        elif stepper is not None:
            loss, _ = train_on_pushforward(model, optimiser, pool, stepper, config, stats, rng, settings["batch"],
                                           int(settings["unroll"]))  # fmt: skip
        else:
            loss, _ = train_on_pool(model, optimiser, pool, config, stats, rng, settings["batch"], settings["noise"])
        iteration += 1
        if loss is None:
            continue
        history.append((iteration, loss))
        if iteration % settings["checkpoint_every"] == 0:
            save()
            recent = np.mean([h[1] for h in history[-settings["checkpoint_every"]:]])
            log(f"tune: iteration {iteration}/{total}: loss {recent:.4g}, "
                f"{seconds_before + time.monotonic() - started:.0f} s")  # fmt: skip
    save()
    train_seconds = seconds_before + time.monotonic() - started

    data_record = [{"bake": s.folder, "scene_name": s.scene.name, "frames": len(s.frames),
                    "training_frames": len([p for p in pool if p[0] is s]), "held_back_frames": held[s.name],
                    "scene_hash": open_cache(s.folder).manifest["scene_hash"]} for s in shots]  # fmt: skip
    training_info = {"kind": "fine-tune (python -m engine tune)", "base_model": c["name"],
                     "base_sha256": c["onnx_sha256"], "data": data_record, "iterations": iteration,
                     "training_seconds": round(train_seconds, 1), "settings": settings,
                     "command": command or "", "normalisation": "the base model's statistics",
                     **trained_ranges(c.get("training", {}), shots)}  # fmt: skip
    train_config = dict(config)
    onnx_path, check = export(model, run, name, probe, train_config, stats, training_info)
    final_onnx = out / f"{name}.onnx"
    shutil.copyfile(onnx_path, final_onnx)
    contract = json.loads(onnx_path.with_suffix(".json").read_text())
    contract_module.write_contract(final_onnx.with_suffix(".json"), contract)
    contract_module.load_contract(final_onnx)  # the written pair passes its own check

    log("tune: measuring the base and the tuned model on the held-back frames")
    before = _evaluate(shots, held, base_onnx, out / "evaluation", "base")
    after = _evaluate(shots, held, final_onnx, out / "evaluation", "tuned")

    def mean(rows, key) -> "float | None":
        values = [r[key] for r in rows if r[key] is not None]
        return float(np.mean(values)) if values else None

    record = {
        "is_better": None,
        "model": str(final_onnx), "base_model": str(base_onnx), "iterations": iteration,
        "training_seconds": round(train_seconds, 1), "wall_seconds": round(time.monotonic() - started_wall, 1),
        "export_check": check, "command": command or "", "data": data_record, "settings": settings,
        "before": {"mean_chamfer_spacings": mean(before, "mean_chamfer_spacings"),
                   "energy_ratio": mean(before, "energy_ratio"), "per_bake": before},
        "after": {"mean_chamfer_spacings": mean(after, "mean_chamfer_spacings"),
                  "energy_ratio": mean(after, "energy_ratio"), "per_bake": after},
        "loss_first_last": [history[0][1], history[-1][1]] if history else None,
    }  # fmt: skip
    before_cd, after_cd = record["before"]["mean_chamfer_spacings"], record["after"]["mean_chamfer_spacings"]
    record["is_better"] = bool(after_cd < before_cd) if None not in (before_cd, after_cd) else None
    if record["is_better"] is False:
        log(f"tune: warning: the tuned model is further from the reference on the held-back frames than the base "
            f"(mean Chamfer {before_cd:.3f} -> {after_cd:.3f} spacings); keep baking with the base model, or tune "
            "again with more reference bakes, fewer iterations or a lower --lr")
    write_atomic(out / "tune.json", (json.dumps(record, indent=1) + "\n").encode())
    write_atomic(out / f"{name}.md", write_card(name, record).encode())
    return record


#: Settings that change what a checkpoint's weights were trained for: a resume must keep them.
LOSS_SETTINGS = {"unroll": "--unroll", "reach": "--reach", "score": "--score", "hold_back": "--hold-back"}


def check_resumable_settings(out, previous, settings) -> None:
    """UsageError when resuming the run in ``out`` would change a setting of ``LOSS_SETTINGS``.

    ``previous`` is the settings record of the run's ``config.json``; a key it lacks (a run from an
    older version) is not checked. The iteration count, time budget and learning rate may change.
    """
    for key, flag in LOSS_SETTINGS.items():
        if key in previous and previous[key] != settings[key]:
            raise TuneResumeError(
                f"--out {out}: holds a tune run trained with {flag} {previous[key]}, not {settings[key]}; "
                f"its checkpoint means another loss, so it cannot be continued with this one: add {flag} "
                f"{previous[key]} to resume it, or choose another --out to start a new tune")  # fmt: skip


def trained_ranges(base_training, shots) -> dict:
    """The input ranges a tuned model was trained on: the base model's, widened by the bakes'.

    ``viscosity_range`` covers the base's record (0.02 when it has none, the scene default it was
    trained at) and every bake's ``fluid.viscosity``; ``speed_range_froude`` (the fastest particle in
    sqrt(g d)) is given only when the base records one, since the base's own data are not at hand.
    """
    from .train import fastest_froude

    low, high = base_training.get("viscosity_range") or (0.02, 0.02)
    viscosities = [float(s.scene.fluid.viscosity) for s in shots]
    ranges = {"viscosity_range": [min([float(low)] + viscosities), max([float(high)] + viscosities)]}
    if base_training.get("speed_range_froude"):
        ranges["speed_range_froude"] = [0.0, max(float(base_training["speed_range_froude"][1]), fastest_froude(shots))]
    return ranges


SCORE_TEXT = {"distance": "each particle's squared distance from itself in the reference's frames",
              "chamfer": "the Chamfer distance from the reference's frames"}


def loss_text(settings) -> str:
    """One sentence naming the training loss of a tune run, for the card."""
    if settings.get("reach"):
        return (f"reach (training/reach.py): up to {settings['reach']} frames of the preview's own steps, rolled "
                f"with gradient from the state the model itself reached in 0..{settings['unroll']} preview steps "
                f"from a reference frame, scored on {SCORE_TEXT[settings.get('score', 'distance')]}; "
                f"lr {settings['lr']:g}.")  # fmt: skip
    if settings.get("unroll"):
        return (f"pushforward (training/pushforward.py): each step trained from the state the model itself "
                f"reached in 1..{settings['unroll']} preview steps from a reference frame, target landing on the "
                f"reference's next frame; lr {settings['lr']:g}.")  # fmt: skip
    return (f"one step ahead from the reference's own state, velocity-walk noise {settings['noise']:g} "
            f"sqrt(g d); lr {settings['lr']:g}.")  # fmt: skip


def write_card(name, record) -> str:
    """The model card (Markdown) of a fine-tuned model: data, command, time, before/after."""
    def show(value, digits=3) -> str:
        return "-" if value is None else f"{value:.{digits}f}"

    lines = [
        f"# {name}: the learned preview fine-tuned on reference bakes",
        "",
        f"- **Base model:** `{record['base_model']}`; fine-tuned by `python -m engine tune` "
        f"({record['iterations']} iterations, {record['training_seconds']:.0f} s of training, "
        f"{record['wall_seconds']:.0f} s in all, on the CPU).",
        f"- **Command:** `{record['command']}`",
        f"- **Export check:** onnxruntime against PyTorch, max relative error "
        f"{record['export_check']['max_relative_error']:.2g} (limit 1e-4).",
        f"- **Loss:** {loss_text(record['settings'])}",
        "- **Data:** the reference (DFSPH) bakes below; the last frames of each were held back and never "
        "used as a training target.",
        "",
        "| bake | scene | frames | training samples | held-back frames |",
        "|---|---|---|---|---|",
    ]
    for d in record["data"]:
        held = d["held_back_frames"]
        lines.append(f"| `{d['bake']}` | {d['scene_name']} | {d['frames']} | {d['training_frames']} | "
                     f"{held[0]}..{held[-1]} |")  # fmt: skip
    lines += [
        "",
        "## Held-back frames, before and after",
        "The preview baked each reference shot from its first frame with the base and with the tuned model; "
        "`engine.compare` measured the held-back frames. Energy ratio: liquid kinetic + potential energy of "
        "the preview over the reference's (cache energy audits), mean over the frames.",
        "",
        "| bake | mean Chamfer [d], base | tuned | energy ratio, base | tuned |",
        "|---|---|---|---|---|",
    ]
    for b, a in zip(record["before"]["per_bake"], record["after"]["per_bake"]):
        lines.append(f"| `{Path(b['bake']).name}` | {show(b['mean_chamfer_spacings'])} | "
                     f"{show(a['mean_chamfer_spacings'])} | {show(b['energy_ratio'])} | {show(a['energy_ratio'])} |")
    lines.append(f"| **mean** | {show(record['before']['mean_chamfer_spacings'])} | "
                 f"{show(record['after']['mean_chamfer_spacings'])} | {show(record['before']['energy_ratio'])} | "
                 f"{show(record['after']['energy_ratio'])} |")  # fmt: skip
    if record.get("is_better") is False:
        lines += ["", "**Worse than the base model on the held-back frames: keep baking with the base model.**"]
    lines += ["", "Measured when the model was written; the figures are this run's own, on these bakes only.", ""]
    return "\n".join(lines)


def main(argv=None) -> int:
    from engine.cli import main as engine_main

    return engine_main(["tune", *(sys.argv[1:] if argv is None else argv)])
