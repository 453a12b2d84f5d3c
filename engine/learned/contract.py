"""The model contract: the JSON file beside each ONNX model, checked when the model loads.

``models/<name>.json`` (``splashdraft-model-contract``, version 1) states what
the ONNX file expects and how to drive it:

- ``onnx_file`` (name beside the contract) and its ``onnx_sha256``;
- ``feature_version`` (must equal ``engine.learned.features.FEATURE_VERSION``);
- ``inputs`` / ``outputs``: ONNX names, dtypes and shapes (symbolic N, K, Nb, Kb);
- ``units``: lengths in particle spacings d, time in sqrt(d/g), velocities in
  sqrt(g d), the output in g;
- ``radius_spacings``, ``density_support_spacings``, ``max_neighbours``,
  ``max_boundary_neighbours``, ``step_froude`` and ``step_froude_min`` (the
  longest and shortest learned step trained, in sqrt(d/g); the step is a node
  feature, and the stepper takes steps of at most ``step_froude``),
  ``history_length``, ``rounds`` (message-passing rounds, for tiling);
- ``normalisation``: mean and std of every feature column and of the target;
- ``training``: free-form provenance (data, command, seeds, times).

Any missing, corrupt or mismatched piece raises ModelError naming the file and
the fix.
"""

import hashlib
import importlib.resources
import json
from pathlib import Path

import numpy as np

from ..errors import ModelError
from ..inputs import finite_number, read_json, safe_name, whole_number
from . import features

#: The shipped model (beside its contract models/<name>.json and card models/<name>.md).
DEFAULT_MODEL_NAME = "preview-gn7"

#: The folder above engine/; in a checkout or the Blender extension it holds blender_manifest.toml and models/.
_SOURCE_ROOT = Path(__file__).resolve().parents[2]

CONTRACT_FORMAT = "splashdraft-model-contract"
CONTRACT_VERSION = 1

INPUT_SPECS = (
    ("node_features", "float32", ["N", features.NODE_FEATURES]),
    ("neighbour_index", "int64", ["N", "K"]),
    ("neighbour_mask", "float32", ["N", "K"]),
    ("edge_features", "float32", ["N", "K", features.EDGE_FEATURES]),
    ("boundary_rows", "int64", ["Nb"]),
    ("boundary_slot", "int64", ["N"]),
    ("boundary_features", "float32", ["Nb", "Kb", features.BOUNDARY_FEATURES]),
    ("boundary_mask", "float32", ["Nb", "Kb"]),
)
OUTPUT_SPECS = (("non_gravity_acceleration", "float32", ["N", 3]),)

_STAT_SIZES = {
    "node_mean": features.NODE_FEATURES, "node_std": features.NODE_FEATURES,
    "edge_mean": features.EDGE_FEATURES, "edge_std": features.EDGE_FEATURES,
    "boundary_mean": features.BOUNDARY_FEATURES, "boundary_std": features.BOUNDARY_FEATURES,
    "target_mean": 3, "target_std": 3,
}  # fmt: skip

_REQUIRED = ("format", "version", "name", "onnx_file", "onnx_sha256", "feature_version", "inputs", "outputs",
             "units", "radius_spacings", "density_support_spacings", "max_neighbours", "max_boundary_neighbours",
             "step_froude", "step_froude_min", "history_length", "rounds", "normalisation")

UNITS = {
    "length": "particle spacing d",
    "time": "sqrt(d / g)",
    "velocity": "sqrt(g d)",
    "output": "non-gravity acceleration (a - gravity) / g, gravity frame (gravity along -z), normalised",
}

RETRAIN_HINT = "retrain and export it with `python -m training.train` (see models/README or the model card)"


def sha256_file(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def make_contract(name, onnx_path, normalisation, radius_spacings, step_froude, rounds, training=None,
                  density_support_spacings=2.0, max_neighbours=48, max_boundary_neighbours=32, architecture=None,
                  step_froude_min=None) -> dict:
    """A contract dict for an exported ONNX file (the sha256 is computed here)."""
    stats = {key: [float(x) for x in np.asarray(normalisation[key]).reshape(-1)] for key in _STAT_SIZES}
    return {
        "format": CONTRACT_FORMAT,
        "version": CONTRACT_VERSION,
        "name": name,
        "onnx_file": Path(onnx_path).name,
        "onnx_sha256": sha256_file(onnx_path),
        "feature_version": features.FEATURE_VERSION,
        "inputs": [{"name": n, "dtype": t, "shape": s} for n, t, s in INPUT_SPECS],
        "outputs": [{"name": n, "dtype": t, "shape": s} for n, t, s in OUTPUT_SPECS],
        "units": dict(UNITS),
        "radius_spacings": float(radius_spacings),
        "density_support_spacings": float(density_support_spacings),
        "max_neighbours": int(max_neighbours),
        "max_boundary_neighbours": int(max_boundary_neighbours),
        "step_froude": float(step_froude),
        "step_froude_min": float(step_froude if step_froude_min is None else step_froude_min),
        "history_length": features.HISTORY_LENGTH,
        "rounds": int(rounds),
        "architecture": architecture or {},
        "normalisation": stats,
        "training": training or {},
    }


def write_contract(path, contract) -> None:
    Path(path).write_text(json.dumps(contract, indent=1) + "\n", encoding="utf-8")


def contract_path_for(model_path) -> Path:
    """The contract JSON beside a model: ``x.onnx`` -> ``x.json``; a ``.json`` path is returned as is."""
    path = Path(model_path)
    return path if path.suffix == ".json" else path.with_suffix(".json")


def load_contract(model_path) -> tuple[dict, Path]:
    """Read and check the contract of ``model_path`` (the .onnx or its .json).

    Returns:
        (contract dict, onnx path). Statistics are converted to float64 arrays.

    Raises:
        ModelError naming the file and the fix: missing or unreadable files,
        invalid JSON, wrong format or version, feature-version mismatch,
        missing keys, bad statistics, or an ONNX file whose sha256 differs.
    """
    path = contract_path_for(model_path)
    if not path.is_file():
        raise ModelError(
            f"model contract {path}: file not found; the learned preview needs the .json contract beside the "
            f".onnx model; restore both from models/ or {RETRAIN_HINT}"
        )
    contract = read_json(path, ModelError, "model contract", f"restore it from models/ or {RETRAIN_HINT}")
    if not isinstance(contract, dict) or contract.get("format") != CONTRACT_FORMAT:
        raise ModelError(f"model contract {path}: format is not {CONTRACT_FORMAT!r}; point --model at a splashdraft model")
    if contract.get("version") != CONTRACT_VERSION:
        raise ModelError(
            f"model contract {path}: version {contract.get('version')!r}, this engine reads version "
            f"{CONTRACT_VERSION}; {RETRAIN_HINT}"
        )
    missing = [key for key in _REQUIRED if key not in contract]
    if missing:
        raise ModelError(f"model contract {path}: missing keys {', '.join(missing)}; {RETRAIN_HINT}")
    if contract["feature_version"] != features.FEATURE_VERSION:
        raise ModelError(
            f"model contract {path}: feature_version {contract['feature_version']!r} does not match this engine's "
            f"{features.FEATURE_VERSION!r}; {RETRAIN_HINT}"
        )
    if contract["history_length"] != features.HISTORY_LENGTH:
        raise ModelError(
            f"model contract {path}: history_length {contract['history_length']} but this engine builds "
            f"{features.HISTORY_LENGTH}; {RETRAIN_HINT}"
        )
    for key, kind in (("inputs", list), ("normalisation", dict), ("onnx_sha256", str)):
        if not isinstance(contract[key], kind):
            raise ModelError(f"model contract {path}: {key} is not a JSON {kind.__name__}; {RETRAIN_HINT}")
    if not safe_name(contract["onnx_file"]) or not all(isinstance(i, dict) for i in contract["inputs"]):
        raise ModelError(f"model contract {path}: onnx_file must be a file name beside it and inputs a list of "
                         f"objects; {RETRAIN_HINT}")  # fmt: skip
    for key, low, high in (("rounds", 1, 100), ("max_neighbours", 1, 100_000), ("max_boundary_neighbours", 1, 100_000)):
        if whole_number(contract[key], low, high) is None:
            raise ModelError(f"model contract {path}: {key} = {contract[key]!r} is not a whole number from {low} "
                             f"to {high}; {RETRAIN_HINT}")  # fmt: skip
    expected_inputs = [[n, t, s] for n, t, s in INPUT_SPECS]
    given_inputs = [[i.get("name"), i.get("dtype"), i.get("shape")] for i in contract["inputs"]]
    if given_inputs != expected_inputs:
        raise ModelError(
            f"model contract {path}: inputs {[i[0] for i in given_inputs]} with shapes differ from the "
            f"engine's {[i[0] for i in expected_inputs]}; {RETRAIN_HINT}"
        )
    for key in ("radius_spacings", "density_support_spacings", "step_froude", "step_froude_min"):
        value = contract[key]
        if finite_number(value) is None or not 0 < value < 100:
            raise ModelError(f"model contract {path}: {key} = {value!r} is not a positive number; {RETRAIN_HINT}")
    if contract["step_froude_min"] > contract["step_froude"]:
        raise ModelError(f"model contract {path}: step_froude_min {contract['step_froude_min']} is larger than "
                         f"step_froude {contract['step_froude']}; {RETRAIN_HINT}")
    stats = {}
    for key, size in _STAT_SIZES.items():
        raw = contract["normalisation"].get(key, [])
        numbers = isinstance(raw, list) and all(finite_number(v) is not None for v in raw)
        values = np.asarray(raw if numbers else [], np.float64)
        if values.shape != (size,) or not np.all(np.isfinite(values)):
            raise ModelError(
                f"model contract {path}: normalisation.{key} must be {size} finite numbers, got "
                f"{values.shape}; {RETRAIN_HINT}"
            )
        if key.endswith("_std") and np.any(values <= 0):
            raise ModelError(f"model contract {path}: normalisation.{key} has a non-positive entry; {RETRAIN_HINT}")
        stats[key] = values
    contract = dict(contract)
    contract["normalisation"] = stats
    onnx_path = path.with_name(contract["onnx_file"])
    if not onnx_path.is_file():
        raise ModelError(
            f"model file {onnx_path}: not found (named by contract {path}); restore it from models/ or {RETRAIN_HINT}"
        )
    actual = sha256_file(onnx_path)
    if actual != contract["onnx_sha256"]:
        raise ModelError(
            f"model file {onnx_path}: sha256 {actual[:12]}... does not match its contract's "
            f"{str(contract['onnx_sha256'])[:12]}... (corrupt, or replaced without its contract); "
            f"restore the pair from models/ or {RETRAIN_HINT}"
        )
    return contract, onnx_path


def check_folder(folder) -> tuple[list[tuple[dict, Path]], list[str]]:
    """Check every contract (``*.json``) in ``folder``.

    Returns:
        (models, reasons): ``(contract, onnx path)`` of each model that passes ``load_contract``,
        sorted by file name, and the ModelError message of each that does not.
    """
    models, reasons = [], []
    for candidate in sorted(Path(folder).glob("*.json")):
        try:
            models.append(load_contract(candidate))
        except ModelError as exc:
            reasons.append(str(exc))
    return models, reasons


def find_model(path) -> Path:
    """The .onnx model a ``--model`` argument names: a model folder, an .onnx file or its .json contract.

    A folder must hold exactly one contract (``*.json`` with format ``splashdraft-model-contract``)
    that passes ``load_contract``; the model of a file is checked the same way.

    Returns:
        Path of the .onnx file.

    Raises:
        ModelError: nothing there, no contract that passes its check (with the first reason), or
            more than one (naming them: pass the file instead).
    """
    path = Path(path)
    if path.is_dir():
        models, reasons = check_folder(path)
        passing = [onnx_path for _, onnx_path in models]
        if len(passing) == 1:
            return passing[0]
        if len(passing) > 1:
            names = ", ".join(p.name for p in passing)
            raise ModelError(f"--model {path}: the folder holds {len(passing)} models ({names}); "
                             "pass the one to use as --model FOLDER/NAME.onnx")
        why = f" ({reasons[0]})" if reasons else ""
        raise ModelError(f"--model {path}: no model in the folder passes its contract check{why}; "
                         f"point --model at a folder written by `python -m engine tune` or {RETRAIN_HINT}")
    if not path.exists() and not contract_path_for(path).exists():
        raise ModelError(f"--model {path}: no such file or folder; check the path")
    return load_contract(path)[1]


def shipped_models_dir() -> Path:
    """The folder of the shipped models.

    In a checkout or the Blender extension it is ``models/`` beside ``engine/`` (so a working copy
    always pairs with its own models); in an installed engine it is the package data
    ``splashdraft_models`` (pyproject.toml).

    Returns:
        Path of the folder (it may be missing when the models were not shipped).
    """
    beside = _SOURCE_ROOT / "models"
    if (_SOURCE_ROOT / "blender_manifest.toml").is_file():
        return beside
    try:
        return Path(str(importlib.resources.files("splashdraft_models")))
    except ModuleNotFoundError:
        return beside


def default_model_path() -> Path:
    """Path of the shipped model's .onnx file (``shipped_models_dir() / "preview-gn7.onnx"``)."""
    return shipped_models_dir() / f"{DEFAULT_MODEL_NAME}.onnx"
