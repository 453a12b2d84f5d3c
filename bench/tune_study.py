"""Why fine-tuning can make the preview worse: a small study of ``python -m engine tune`` (needs PyTorch).

    python -m bench.tune_study --bakes DIR [DIR ...] [--runs 3e-4:136 3e-5:136 3e-5:40] [--out DIR]

For each run LR:ITERATIONS it tunes the shipped model on the bakes (``training.tune.tune``, the
usual held-back tail) and reports, for the base model and each tuned one:

- rollout: mean Chamfer [d] and energy ratio on the held-back frames, as the tune card reports them
  (the preview bakes each shot from its first frame);
- one-step: the teacher-forced loss (no noise) on the training samples and on the held-back
  samples, in the training's own normalised units: a model that learned the shot lowers both;
  one that only memorised its few training samples lowers the first and raises the second;
- control (first run only): the base weights moved by a random update of the same size per
  tensor as that run's, twice, and by minus that run's update; how much the rollout Chamfer moves
  for a change of weights that learned nothing is the noise floor of the comparison.

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
                        help="LR:ITERATIONS of each tune run. Default: 3e-4:136 3e-5:136 3e-5:40.")
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

    def measure(label, onnx_path):
        rows = _evaluate(shots, held, onnx_path, work / "evaluation", label.replace(" ", "_").replace(":", "_"))
        losses = one_step_losses(onnx_path, samples, rounds, latent)
        return {"model": label, "chamfer": float(np.mean([r["mean_chamfer_spacings"] for r in rows])),
                "energy_ratio": float(np.mean([r["energy_ratio"] for r in rows if r["energy_ratio"] is not None])),
                "one_step_train": losses["train"], "one_step_held_back": losses["held back"]}  # fmt: skip

    results = [measure("base", base_onnx)]
    for number, run in enumerate(args.runs):
        lr, iterations = run.split(":")
        out = work / f"run{number}"
        record = tune(args.bakes, out, lr=float(lr), iterations=int(iterations), checkpoint_every=10**6,
                      log=lambda m: print(m, file=sys.stderr, flush=True))  # fmt: skip
        results.append(dict(measure(f"lr {lr}, {iterations} it", record["model"]), lr=float(lr),
                            iterations=int(iterations)))  # fmt: skip
        if number == 0:
            probe = samples["train"][0][0]
            for label, path in control_models(base_onnx, record["model"], rounds, latent, probe, config, stats,
                                              work / "control").items():  # fmt: skip
                results.append(measure(f"control: {label} ({run})", path))
    base_chamfer = results[0]["chamfer"]
    print(f"{'model':<40}{'Chamfer [d]':>12}{'vs base':>9}{'energy':>8}{'1-step train':>14}{'1-step held':>13}")
    for row in results:
        row["chamfer_change"] = row["chamfer"] / base_chamfer - 1.0
        print(f"{row['model']:<40}{row['chamfer']:>12.3f}{row['chamfer_change']:>+9.1%}{row['energy_ratio']:>8.3f}"
              f"{row['one_step_train']:>14.4f}{row['one_step_held_back']:>13.4f}")
    result = {"bakes": [str(Path(b).resolve()) for b in args.bakes], "samples": {k: len(v) for k, v in samples.items()},
              "held_back_frames": held, "rows": results}  # fmt: skip
    print(json.dumps(result))
    (ROOT / "bench" / "results").mkdir(parents=True, exist_ok=True)
    (ROOT / "bench" / "results" / "tune_study.json").write_text(json.dumps(result, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
