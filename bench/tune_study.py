"""Why fine-tuning can make the preview worse: a small study of ``python -m engine tune`` (needs PyTorch).

    python -m bench.tune_study --bakes DIR [DIR ...] [--runs 3e-4:136 3e-5:136 3e-5:40] [--out DIR]
    python -m bench.tune_study --bakes DIR [DIR ...] --tuned MODEL [--unseen DIR [DIR ...]]

For each run LR:ITERATIONS[:UNROLL] it tunes the shipped model on the bakes (``training.tune.tune``,
the usual held-back tail; UNROLL is ``--unroll``, default 0), or takes an already tuned ``--tuned``
model, and reports, for the base model and each tuned one:

- rollout: mean Chamfer [d] and energy ratio on the held-back frames, as the tune card reports them
  (the preview bakes each shot from its first frame);
- one-step: the teacher-forced loss (no noise) on the training samples and on the held-back
  samples, in the training's own normalised units: a model that learned the shot lowers both;
  one that only memorised its few training samples lowers the first and raises the second;
- control (first run only): the base weights moved by a random update of the same size per
  tensor as that run's, twice, and by minus that run's update; how much the rollout Chamfer moves
  for a change of weights that learned nothing is the noise floor of the comparison;
- unseen (with ``--unseen``): the same rollout figures on bakes of the family the tune never saw
  (e.g. other viscosities of the same shot).

Prints a table and JSON, and writes bench/results/tune_study.json.
"""

import argparse
import json
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def one_step_losses(onnx_path, samples, rounds, latent):
    """{set name: mean squared error per component} of the model at ``onnx_path`` on normalised samples."""
    from training.train import masked_mse
    from training.tune import weights_from_onnx

    model = weights_from_onnx(onnx_path, latent, rounds)
    model.eval()
    return {label: masked_mse(model, group) for label, group in samples.items()}


def control_models(base_onnx, tuned_onnx, rounds, latent, probe, config, stats, out, seed=1):
    """ONNX files of the base moved by minus the tuned update and by two random updates of its size."""
    import torch

    from training.model import GraphCore
    from training.train import export
    from training.tune import weights_from_onnx

    base = weights_from_onnx(base_onnx, latent, rounds).state_dict()
    tuned = weights_from_onnx(tuned_onnx, latent, rounds).state_dict()
    rng = np.random.default_rng(seed)
    paths = {}
    for label in ("minus update", "random 1", "random 2"):
        state = {}
        for key in base:
            delta = tuned[key] - base[key]
            if label == "minus update":
                state[key] = base[key] - delta
            else:
                noise = torch.from_numpy(rng.normal(size=tuple(delta.shape)).astype(np.float32))
                state[key] = base[key] + noise * (float(delta.norm()) / max(float(noise.norm()), 1e-12))
        model = GraphCore(latent, rounds)
        model.load_state_dict(state)
        model.eval()
        folder = Path(out) / label.replace(" ", "_")
        folder.mkdir(parents=True, exist_ok=True)
        paths[label], _ = export(model, folder, label.replace(" ", "_"), probe, config, stats, {"kind": "control"})
    return paths


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bakes", nargs="+", required=True, help="Reference (sph) bake folders, as for tune.")
    parser.add_argument("--runs", nargs="+", default=["3e-4:136", "3e-5:136", "3e-5:40"],
                        help="LR:ITERATIONS[:UNROLL] of each tune run (UNROLL default 0, the one-step loss). Default: 3e-4:136 3e-5:136 3e-5:40.")
    parser.add_argument("--tuned", default=None, help="Measure this tuned model (file or folder) instead of tuning.")
    parser.add_argument("--unseen", nargs="+", default=[], help="Reference bakes of the family not used to tune.")
    parser.add_argument("--out", default=None, help="Working folder (default: a temporary one).")
    args = parser.parse_args(argv)

    from engine.learned import contract as contract_module
    from engine.learned.contract import default_model_path
    from training.train import _normalised_sample
    from training.tune import TUNE_DEFAULTS, _evaluate, load_bakes, split_frames, tune

    work = Path(args.out or tempfile.mkdtemp(prefix="tune_study_"))
    contract, base_onnx = contract_module.load_contract(default_model_path())
    rounds, latent = int(contract["rounds"]), int(contract.get("architecture", {}).get("latent", 32))
    config = {"latent": latent, "rounds": rounds, "radius_spacings": contract["radius_spacings"],
              "density_support_spacings": contract["density_support_spacings"],
              "max_neighbours": contract["max_neighbours"], "max_boundary_neighbours": contract["max_boundary_neighbours"],
              "step_froude": contract["step_froude"], "step_froude_min": contract["step_froude_min"]}  # fmt: skip
    stats = contract["normalisation"]
    shots = load_bakes(args.bakes, contract)
    held, samples = {}, {"train": [], "held back": []}
    for shot in shots:
        training, held[shot.name] = split_frames(shot, TUNE_DEFAULTS["hold_back"])
        for k in shot.sample_indices(1):
            group = "train" if k in training else "held back"
            samples[group].append(_normalised_sample(shot, k, 1, config, stats, None, 0.0))

    unseen = load_bakes(args.unseen, contract) if args.unseen else []
    unseen_held = {shot.name: split_frames(shot, TUNE_DEFAULTS["hold_back"])[1] for shot in unseen}

    def rollout(group, group_held, onnx_path, label):
        rows = _evaluate(group, group_held, onnx_path, work / "evaluation", label.replace(" ", "_").replace(":", "_"))
        return (float(np.mean([r["mean_chamfer_spacings"] for r in rows])),
                float(np.mean([r["energy_ratio"] for r in rows if r["energy_ratio"] is not None])))  # fmt: skip

    def measure(label, onnx_path):
        chamfer, energy = rollout(shots, held, onnx_path, label)
        losses = one_step_losses(onnx_path, samples, rounds, latent)
        row = {"model": label, "chamfer": chamfer, "energy_ratio": energy,
               "one_step_train": losses["train"], "one_step_held_back": losses["held back"]}  # fmt: skip
        if unseen:
            row["chamfer_unseen"], row["energy_ratio_unseen"] = rollout(unseen, unseen_held, onnx_path, label + " u")
        return row

    results = [measure("base", base_onnx)]
    if args.tuned:
        _, tuned_onnx = contract_module.load_contract(contract_module.find_model(args.tuned))
        candidates = [(f"given {Path(tuned_onnx).stem}", tuned_onnx, {})]
    else:
        candidates = []
        for number, run in enumerate(args.runs):
            lr, iterations, *rest = run.split(":")
            unroll = int(rest[0]) if rest else 0
            record = tune(args.bakes, work / f"run{number}", lr=float(lr), iterations=int(iterations),
                          checkpoint_every=10**6, unroll=unroll, log=lambda m: print(m, file=sys.stderr, flush=True))
            candidates.append((f"lr {lr}, {iterations} it, unroll {unroll}", record["model"],
                               {"lr": float(lr), "iterations": int(iterations), "unroll": unroll}))  # fmt: skip
    for number, (label, onnx_path, extra) in enumerate(candidates):
        results.append(dict(measure(label, onnx_path), **extra))
        if number == 0:
            probe = samples["train"][0][0]
            for control, path in control_models(base_onnx, onnx_path, rounds, latent, probe, config, stats,
                                                work / "control").items():  # fmt: skip
                results.append(measure(f"control: {control} ({label})", path))
    base_chamfer = results[0]["chamfer"]
    print(f"{'model':<48}{'Chamfer [d]':>12}{'vs base':>9}{'energy':>8}{'1-step train':>14}{'1-step held':>13}"
          + (f"{'unseen Ch.':>12}{'vs base':>9}{'energy':>8}" if unseen else ""))
    for row in results:
        row["chamfer_change"] = row["chamfer"] / base_chamfer - 1.0
        line = (f"{row['model']:<48}{row['chamfer']:>12.3f}{row['chamfer_change']:>+9.1%}{row['energy_ratio']:>8.3f}"
                f"{row['one_step_train']:>14.4f}{row['one_step_held_back']:>13.4f}")
        if unseen:
            row["chamfer_unseen_change"] = row["chamfer_unseen"] / results[0]["chamfer_unseen"] - 1.0
            line += f"{row['chamfer_unseen']:>12.3f}{row['chamfer_unseen_change']:>+9.1%}{row['energy_ratio_unseen']:>8.3f}"
        print(line)
    result = {"bakes": [str(Path(b).resolve()) for b in args.bakes], "samples": {k: len(v) for k, v in samples.items()},
              "unseen": [str(Path(b).resolve()) for b in args.unseen], "held_back_frames": held,
              "rows": results}  # fmt: skip
    print(json.dumps(result))
    from bench.bench_reference import write_json

    write_json(result, ROOT / "bench" / "results" / "tune_study.json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
