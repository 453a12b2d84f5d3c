"""``python -m training.train``: fit the learned core on baked shots, checkpoint, export to ONNX.

    python -m training.train --data data/train --out training_runs/NAME [--resume] [--export models/NAME]

The run folder holds ``config.json`` (every setting), ``stats.json`` (the
normalisation statistics), ``checkpoint.pt`` (model + optimiser + RNG states +
loss history; written every ``--checkpoint-every`` iterations and at the end,
atomically), ``losses.json`` and ``loss.png`` (training and validation loss
curves), and after training ``<name>.onnx`` + ``<name>.json`` (the model
contract) + ``export_check.json`` (onnxruntime against PyTorch on a real
sample; must agree to 1e-4 relative).

Reproducible: numpy and torch are seeded from ``--seed``; sample order and
noise come from one numpy Generator whose state is checkpointed, so a resumed
run continues the same sequence (bit-exactness across resumes also depends on
torch's thread scheduling). Checkpoints are our own state dicts, loaded with
``torch.load(..., weights_only=True)``.

Loss: mean squared error of the normalised non-gravity acceleration over
particles with a target (Sanchez-Gonzalez et al. 2020), with velocity-walk
noise injection (training/dataset.py). Adam (Kingma & Ba 2015) with an
exponential learning-rate decay to ``--lr-final``.
"""

import argparse
import dataclasses
import io
import json
import os
import shutil
import sys
import time
from pathlib import Path
from typing import Optional

import numpy as np

from engine.cache import write_atomic
from engine.errors import SplashdraftError
from engine.learned import contract as contract_module
from engine.learned import features
from engine.pngplot import line_plot_png

from . import dataset

DEFAULTS = {
    "latent": 32,
    "rounds": 2,
    "radius_spacings": 2.0,
    "density_support_spacings": 2.0,
    "max_neighbours": 48,
    "max_boundary_neighbours": 32,
    "lr": 1e-3,
    "lr_final": 1e-4,
    "iterations": 6000,
    "batch": 2,
    "noise": 0.02,
    "seed": 0,
    "validation_shots": 2,
    "checkpoint_every": 200,
    "validate_every": 200,
    "statistics_samples": 120,
    "strides": [1],
}


def _save_torch(path, payload):
    import torch

    buffer = io.BytesIO()
    torch.save(payload, buffer)
    write_atomic(path, buffer.getvalue())


def _split(shots, validation_shots):
    validation_shots = min(validation_shots, max(len(shots) - 1, 0))
    if validation_shots == 0:
        return shots, []
    return shots[:-validation_shots], shots[-validation_shots:]


def _normalised_sample(shot, k, stride, config, stats, rng, noise):
    graph, target, mask = dataset.make_sample(shot, k, config, rng, noise, stride)
    inputs = features.normalise(graph, stats)
    target = ((target - stats["target_mean"]) / stats["target_std"]).astype(np.float32)
    return inputs, target, mask


def sample_pool(shots, strides) -> list:
    """[(shot, frame position, stride)] of every usable sample."""
    return [(s, k, stride) for s in shots for stride in strides for k in s.sample_indices(stride)]


def compute_statistics(shots, config, rng) -> dict:
    pool = sample_pool(shots, config["strides"])
    picks = rng.choice(len(pool), size=min(config["statistics_samples"], len(pool)), replace=False)
    samples = [dataset.make_sample(pool[i][0], pool[i][1], config, stride=pool[i][2]) for i in picks]
    return dataset.feature_statistics(samples)


def plot_losses(history, path) -> None:
    series = [("train", [h[0] for h in history["train"]], [h[1] for h in history["train"]])]
    if history["validation"]:
        series.append(("validation", [h[0] for h in history["validation"]], [h[1] for h in history["validation"]]))
    # Smooth the noisy per-iteration training loss for legibility (running mean over 50).
    xs, ys = np.array(series[0][1], float), np.array(series[0][2], float)
    if len(ys) > 50:
        kernel = np.ones(50) / 50
        ys = np.convolve(ys, kernel, mode="valid")
        xs = xs[49:]
    series[0] = ("train (mean of 50)", xs, ys)
    line_plot_png(series, path, log_y=True, x_label="iteration", y_label="mse")


def export(model, run, name, sample_inputs, config, stats, training_info) -> tuple:
    """Export ONNX + contract into ``run``; check onnxruntime vs PyTorch; return (onnx path, check dict)."""
    import torch

    from engine.learned.runtime import CoreRunner

    from .model import as_tensors, export_onnx

    onnx_path = Path(run) / f"{name}.onnx"
    export_onnx(model, onnx_path, sample_inputs)
    with torch.no_grad():
        reference = model(*as_tensors(sample_inputs)).numpy()
    runner = CoreRunner(onnx_path, config["rounds"], tile_particles=0)
    output = runner.run(sample_inputs)
    relative = float(np.abs(output - reference).max() / max(np.abs(reference).max(), 1e-12))
    check = {"particles": int(len(reference)), "max_relative_error": relative, "passed": relative <= 1e-4}
    write_atomic(Path(run) / "export_check.json", (json.dumps(check, indent=1) + "\n").encode())
    if not check["passed"]:
        raise SplashdraftError(
            f"export check: onnxruntime differs from PyTorch by {relative:.3g} relative (> 1e-4) on "
            f"{onnx_path}; do not ship this model"
        )
    contract = contract_module.make_contract(
        name, onnx_path, stats, config["radius_spacings"], config["step_froude"], config["rounds"],
        training=training_info, density_support_spacings=config["density_support_spacings"],
        max_neighbours=config["max_neighbours"], max_boundary_neighbours=config["max_boundary_neighbours"],
        step_froude_min=config["step_froude_min"],
        architecture={"latent": config["latent"], "rounds": config["rounds"], "kind": "GraphCore (training/model.py)"},
    )  # fmt: skip
    contract_module.write_contract(onnx_path.with_suffix(".json"), contract)
    return onnx_path, check


def train_on_pool(model, optimiser, pool, config, stats, rng, batch, noise) -> tuple:
    """Pick ``batch`` (shot, k, stride) entries of ``pool`` at random (with replacement), normalise them with
    ``noise`` and take one ``train_step``. Returns (the loss or None, the samples)."""
    picks = rng.integers(0, len(pool), batch)
    samples = [_normalised_sample(*pool[i], config, stats, rng, noise) for i in picks]
    return train_step(model, optimiser, samples), samples


def train_step(model, optimiser, samples) -> Optional[float]:
    """One optimiser step on a batch of (normalised inputs, target, mask) samples: the mean squared
    error over the masked particles, gradients clipped to norm 1. Returns the loss, or None when no
    particle in the batch has a target."""
    import torch

    from .model import as_tensors

    inputs, target, mask = dataset.batch_inputs(samples)
    if not mask.any():
        return None
    prediction = model(*as_tensors(inputs))
    selected = torch.from_numpy(np.flatnonzero(mask))
    loss = ((prediction[selected] - torch.from_numpy(target)[selected]) ** 2).mean()
    optimiser.zero_grad()
    loss.backward()
    torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
    optimiser.step()
    return float(loss.detach())


@dataclasses.dataclass
class _Session:
    """A training run's changing state: model, optimiser, loss history, iteration count, numpy RNG, time.

    ``history`` holds ``train`` and ``validation`` lists of (iteration, loss); ``seconds_before`` is the
    training time of earlier sessions of a resumed run; ``started`` is this session's ``time.monotonic()``.
    """

    model: object
    optimiser: object
    rng: np.random.Generator
    history: dict
    iteration: int = 0
    seconds_before: float = 0.0
    started: float = 0.0

    def seconds(self) -> float:
        """Training seconds of the run so far, earlier sessions included."""
        return self.seconds_before + time.monotonic() - self.started


def train(data, out, resume=False, overrides=None, minutes=None, export_to=None, name=None, log=print) -> dict:
    """Train (or continue) a run; returns the run summary dict. See the module docstring."""
    import torch

    from .model import GraphCore

    torch.set_num_threads(2)
    run = Path(out)
    run.mkdir(parents=True, exist_ok=True)
    name = name or run.name
    manifest, shots = dataset.load_shots(data)
    if not shots:
        raise SplashdraftError(f"{data}: no baked shots with 4+ frames; run python -m training.generate --out {data}")
    config = _run_config(data, run / "config.json", resume, overrides, manifest, shots)

    rng = np.random.default_rng(config["seed"])
    torch.manual_seed(config["seed"])
    train_shots, validation_shots = _split(shots, config["validation_shots"])
    stats = _run_statistics(run / "stats.json", resume, train_shots, config, rng)
    model = GraphCore(config["latent"], config["rounds"])
    session = _Session(model, torch.optim.Adam(model.parameters(), lr=config["lr"]), rng,
                         {"train": [], "validation": []})
    checkpoint_path = run / "checkpoint.pt"
    if resume and checkpoint_path.exists():
        _restore_checkpoint_into(session, checkpoint_path)
        log(f"resumed at iteration {session.iteration}")
    validation = _validation_samples(validation_shots, config, stats)
    samples = _fit(session, sample_pool(train_shots, config["strides"]), validation, config, stats, minutes,
                   lambda: _save_checkpoint(run, checkpoint_path, session), log)
    seconds = session.seconds()

    sample = validation[0][0] if validation else samples[0][0]
    training_info = _training_info(data, manifest, shots, train_shots, validation_shots, session, seconds, config)
    onnx_path, check = export(model, run, name, sample, config, stats, training_info)
    summary = {"run": str(run), "iterations": session.iteration, "seconds": seconds, "onnx": str(onnx_path),
               "export_check": check, "final_validation_loss": training_info["final_validation_loss"]}
    if export_to:
        summary["exported_to"] = _copy_model(onnx_path, Path(export_to))
    write_atomic(run / "summary.json", (json.dumps(summary, indent=1) + "\n").encode())
    return summary


def _run_config(data, config_path, resume, overrides, manifest, shots) -> dict:
    """The run's settings: DEFAULTS, then ``overrides``, the data's step range; a resumed run keeps its
    own and must match. Written to ``config_path``.

    Raises:
        SplashdraftError: bad ``--strides``, or ``--resume`` with settings that differ from the run's.
    """
    config = dict(DEFAULTS)
    config.update({k: v for k, v in (overrides or {}).items() if v is not None})
    resumed_config = json.loads(config_path.read_text()) if resume and config_path.exists() else None
    if resumed_config is not None and (overrides or {}).get("strides") is None:
        config["strides"] = resumed_config.get("strides", [1])  # --resume without --strides keeps the run's
    strides = sorted({int(x) for x in config["strides"]})
    if not strides or strides[0] < 1:
        raise SplashdraftError(f"--strides {config['strides']}: give whole numbers of frames >= 1, e.g. --strides 1 2 3 4")
    config["strides"] = strides
    frame = float(manifest.get("frame_froude", manifest["step_froude"]))
    config["frame_froude"] = frame
    config["step_froude"] = frame * strides[-1]
    config["step_froude_min"] = frame * strides[0]
    config["data"] = str(data)
    config["shots"] = [s.name for s in shots]
    if resumed_config is not None:
        previous = resumed_config
        for key in ("latent", "rounds", "radius_spacings", "density_support_spacings", "max_neighbours", "seed",
                    "step_froude", "step_froude_min", "strides", "shots"):
            if previous.get(key) != config.get(key):
                raise SplashdraftError(
                    f"{config_path}: --resume with a different {key} ({previous.get(key)!r} -> {config.get(key)!r}); "
                    "use the same data and settings, or start a new --out run"
                )
        previous["iterations"] = config["iterations"]
        config = previous
    write_atomic(config_path, (json.dumps(config, indent=1) + "\n").encode())
    return config


def _run_statistics(stats_path, resume, train_shots, config, rng) -> dict:
    """The normalisation statistics: read back on resume, else computed from the training shots and written."""
    if resume and stats_path.exists():
        return {k: np.asarray(v) for k, v in json.loads(stats_path.read_text()).items()}
    stats = compute_statistics(train_shots, config, rng)
    write_atomic(stats_path, (json.dumps({k: v.tolist() for k, v in stats.items()}, indent=1) + "\n").encode())
    return stats


def _restore_checkpoint_into(session, checkpoint_path) -> None:
    """Load model, optimiser, iteration, history, both RNG states and time from the checkpoint into ``session``."""
    import torch

    payload = torch.load(checkpoint_path, weights_only=True)
    session.model.load_state_dict(payload["model"])
    session.optimiser.load_state_dict(payload["optimiser"])
    session.iteration = int(payload["iteration"])
    session.history = json.loads(payload["history"])
    session.rng.bit_generator.state = json.loads(payload["numpy_rng"])
    torch.set_rng_state(payload["torch_rng"])
    session.seconds_before = float(payload["seconds"])


def _save_checkpoint(run, checkpoint_path, session) -> None:
    """Write the checkpoint, ``losses.json`` and ``loss.png`` (atomically)."""
    import torch

    history = session.history
    _save_torch(checkpoint_path, {
        "model": session.model.state_dict(), "optimiser": session.optimiser.state_dict(),
        "iteration": session.iteration, "history": json.dumps(history),
        "numpy_rng": json.dumps(session.rng.bit_generator.state), "torch_rng": torch.get_rng_state(),
        "seconds": session.seconds(),
    })  # fmt: skip
    write_atomic(run / "losses.json", (json.dumps(history) + "\n").encode())
    if history["train"]:
        plot_losses(history, run / "loss.png")


def _validation_samples(validation_shots, config, stats) -> list:
    """Up to 24 normalised, noise-free samples of the validation shots, picked with seed + 1."""
    validation = []
    if validation_shots:
        vrng = np.random.default_rng(config["seed"] + 1)
        pool = sample_pool(validation_shots, config["strides"])
        for i in vrng.choice(len(pool), size=min(24, len(pool)), replace=False):
            validation.append(_normalised_sample(*pool[i], config, stats, None, 0.0))
    return validation


def masked_mse(model, samples) -> float:
    """Mean squared error of ``model`` over the (normalised inputs, target, mask) ``samples``: every
    component of every particle with a target, without gradients (the model's mode is left as it is)."""
    import torch

    from .model import as_tensors

    total, count = 0.0, 0
    with torch.no_grad():
        for inputs, target, mask in samples:
            out = model(*as_tensors(inputs)).numpy()
            total += float(((out - target)[mask] ** 2).sum())
            count += int(mask.sum()) * 3
    return total / max(count, 1)


def _validation_loss(model, validation) -> float:
    """``masked_mse`` over the validation samples, in evaluation mode; the model is left in training mode."""
    model.eval()
    loss = masked_mse(model, validation)
    model.train()
    return loss


def _fit(session, pool, validation, config, stats, minutes, save_checkpoint, log) -> list:
    """Train ``session`` up to ``config["iterations"]`` (or ``minutes``), with the learning-rate decay,
    validation and checkpoints; ends with a validation loss and a checkpoint. Returns the last batch's samples."""
    session.started = time.monotonic()
    model, optimiser, history = session.model, session.optimiser, session.history
    total_iterations = config["iterations"]
    decay = (config["lr_final"] / config["lr"]) ** (1.0 / max(total_iterations, 1))
    model.train()
    samples = []
    while session.iteration < total_iterations:
        if minutes is not None and time.monotonic() - session.started > 60 * minutes:
            log(f"time budget of {minutes} min reached at iteration {session.iteration}")
            break
        for group in optimiser.param_groups:
            group["lr"] = config["lr"] * decay**session.iteration
        loss, samples = train_on_pool(model, optimiser, pool, config, stats, session.rng, config["batch"],
                                      config["noise"])  # fmt: skip
        session.iteration += 1
        iteration = session.iteration
        if loss is None:
            continue
        history["train"].append((iteration, loss))
        if validation and iteration % config["validate_every"] == 0:
            history["validation"].append((iteration, _validation_loss(model, validation)))
        if iteration % config["checkpoint_every"] == 0:
            save_checkpoint()
            recent = np.mean([h[1] for h in history["train"][-config["checkpoint_every"]:]])
            vloss = history["validation"][-1][1] if history["validation"] else float("nan")
            log(f"iteration {iteration}: train {recent:.4g}, validation {vloss:.4g}, {session.seconds():.0f} s")
    if validation:
        history["validation"].append((session.iteration, _validation_loss(model, validation)))
    save_checkpoint()
    return samples


def fastest_froude(shots) -> float:
    """The fastest particle of any frame of ``shots``, in sqrt(g d) (the contract's trained speed range;
    the learned solver names a shot whose liquid starts faster)."""
    fastest = 0.0
    for shot in shots:
        for velocities in shot.velocities:
            if len(velocities):
                fastest = max(fastest, float(np.linalg.norm(velocities, axis=1).max()) / shot.units.velocity)
    return round(fastest, 3)


def _training_info(data, manifest, shots, train_shots, validation_shots, session, seconds, config) -> dict:
    """The ``training`` record of the model contract: data, shots, iterations, time, final losses, command."""
    history = session.history
    return {
        "data": str(data),
        "data_manifest": {"kind": manifest.get("kind"), "family_seed": manifest.get("family_seed"),
                          "shots": len(shots), "particle_spacing": manifest.get("particle_spacing"),
                          "fps": manifest.get("fps")},
        "viscosity_range": [min(s.scene.fluid.viscosity for s in shots), max(s.scene.fluid.viscosity for s in shots)],
        "speed_range_froude": [0.0, fastest_froude(shots)],
        "train_shots": [s.name for s in train_shots],
        "validation_shots": [s.name for s in validation_shots],
        "iterations": session.iteration,
        "training_seconds": round(seconds, 1),
        "final_train_loss_mean_last_200": float(np.mean([h[1] for h in history["train"][-200:]])) if history["train"] else None,
        "final_validation_loss": history["validation"][-1][1] if history["validation"] else None,
        "config": {k: config[k] for k in DEFAULTS},
        "command": "python -m training.train " + " ".join(sys.argv[1:]) if sys.argv else "",
    }


def _copy_model(onnx_path, target) -> str:
    """Copy the exported model and its contract to the path stem ``target``; returns the new .onnx path."""
    target.parent.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(onnx_path, target.with_suffix(".onnx"))
    contract = json.loads(onnx_path.with_suffix(".json").read_text())
    contract["onnx_file"] = target.with_suffix(".onnx").name
    contract["name"] = target.stem
    contract_module.write_contract(target.with_suffix(".json"), contract)
    return str(target.with_suffix(".onnx"))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m training.train",
                                     description="Train the learned core on baked shots and export it to ONNX.")
    parser.add_argument("--data", default="data/train", help="Data folder from training.generate (default data/train).")
    parser.add_argument("--out", required=True, help="Run folder, e.g. training_runs/NAME.")
    parser.add_argument("--resume", action="store_true", help="Continue the run in --out from its checkpoint.")
    parser.add_argument("--iterations", type=int, help=f"Total iterations (default {DEFAULTS['iterations']}).")
    parser.add_argument("--minutes", type=float, help="Stop (and export) after this many minutes of training.")
    parser.add_argument("--latent", type=int, help=f"Latent width (default {DEFAULTS['latent']}).")
    parser.add_argument("--rounds", type=int, help=f"Message-passing rounds (default {DEFAULTS['rounds']}).")
    parser.add_argument("--radius", dest="radius_spacings", type=float,
                        help=f"Connectivity radius in spacings (default {DEFAULTS['radius_spacings']}).")
    parser.add_argument("--density-support", dest="density_support_spacings", type=float,
                        help=f"Support of the density feature in spacings (default {DEFAULTS['density_support_spacings']}).")
    parser.add_argument("--max-neighbours", dest="max_neighbours", type=int,
                        help=f"Fluid neighbours kept per particle (default {DEFAULTS['max_neighbours']}).")
    parser.add_argument("--strides", type=int, nargs="+",
                        help="Learned steps to train, in frames of the data (default 1; e.g. 1 2 3 4). The step is "
                        "a node feature; the model's trained range is recorded in its contract.")
    parser.add_argument("--noise", type=float, help=f"Velocity noise sigma in sqrt(g d) (default {DEFAULTS['noise']}).")
    parser.add_argument("--lr", type=float, help=f"Initial learning rate (default {DEFAULTS['lr']}).")
    parser.add_argument("--batch", type=int, help=f"Frames per iteration (default {DEFAULTS['batch']}).")
    parser.add_argument("--seed", type=int, help=f"Seed (default {DEFAULTS['seed']}).")
    parser.add_argument("--checkpoint-every", type=int, help=f"Iterations between checkpoints (default {DEFAULTS['checkpoint_every']}).")
    parser.add_argument("--export", dest="export_to", help="Also copy the model + contract to this path stem, e.g. models/preview-gn8.")
    args = parser.parse_args(argv)
    overrides = {k: getattr(args, k) for k in ("iterations", "latent", "rounds", "noise", "lr", "batch", "seed",
                                               "radius_spacings", "density_support_spacings", "max_neighbours",
                                               "strides")}
    overrides["checkpoint_every"] = args.checkpoint_every
    overrides["validate_every"] = args.checkpoint_every
    try:
        summary = train(args.data, args.out, args.resume, overrides, args.minutes, args.export_to,
                        log=lambda m: print(m, file=sys.stderr, flush=True))
    except SplashdraftError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    print(json.dumps(summary, indent=1))
    return 0


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    sys.exit(main())
