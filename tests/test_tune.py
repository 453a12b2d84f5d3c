"""Fine-tuning on reference bakes (``python -m engine tune``) and ``bake --model``.

Oracles: the ONNX model itself run in onnxruntime (the PyTorch weights read back from it must
reproduce it, and the tuned export must match PyTorch, checked by training.train.export), the
contract check (``engine.learned.contract.load_contract``) that every model the preview loads
must pass, and the cache manifest of a bake that used the tuned model. The figures written to
the card are measured by the run itself on its own held-back frames; the test checks that they
are present and finite, not their values (a few iterations on a tiny bake decide nothing).
"""

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

from engine.bake import bake
from engine.cli import main
from engine.learned.contract import find_model, load_contract
from engine.errors import ModelError

from tests.test_bake import write_tiny_scene

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def reference_bake(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tune")
    scene = write_tiny_scene(folder / "scene", frame_end=10, name="tune_shot")
    bake(scene, "sph", folder / "reference", use_signals=False)
    return scene, folder / "reference"


def test_weights_read_back_from_the_shipped_onnx_reproduce_it():
    torch = pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    from engine.learned.runtime import random_inputs
    from engine.learned.contract import default_model_path
    from training.tune import check_against_onnx, weights_from_onnx

    contract, onnx_path = load_contract(default_model_path())
    model = weights_from_onnx(onnx_path, contract["architecture"]["latent"], contract["rounds"])
    assert isinstance(model, torch.nn.Module)
    assert check_against_onnx(model, onnx_path, contract["rounds"], random_inputs(300, 20, 8, seed=3)) < 1e-5


def test_tune_writes_a_model_that_passes_its_contract_and_bakes(reference_bake, tmp_path, capsys):
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    scene, reference = reference_bake
    out = tmp_path / "shot-tuned"
    args = ["tune", "--bakes", str(reference), "--out", str(out), "--iterations", "6", "--checkpoint-every", "3",
            "--json"]
    assert main(args) == 0
    record = json.loads(capsys.readouterr().out)
    contract, onnx_path = load_contract(out / "shot-tuned.json")
    assert onnx_path == out / "shot-tuned.onnx" and contract["name"] == "shot-tuned"
    assert contract["training"]["base_model"] == "preview-gn4" and contract["training"]["iterations"] == 6
    assert find_model(out) == onnx_path
    assert record["export_check"]["passed"] and record["iterations"] == 6
    assert record["is_better"] == (record["after"]["mean_chamfer_spacings"] < record["before"]["mean_chamfer_spacings"])
    for side in ("before", "after"):
        assert math.isfinite(record[side]["mean_chamfer_spacings"]) and record[side]["mean_chamfer_spacings"] >= 0
        assert math.isfinite(record[side]["energy_ratio"])
    held = record["data"][0]["held_back_frames"]
    assert held == [9, 10]  # round(0.25 * 10) = 2 (half to even) frames at the end, at least 2
    card = (out / "shot-tuned.md").read_text()
    assert "Held-back frames" in card and str(reference) in card and "--iterations 6" in card

    # Re-running with more iterations continues the checkpoint instead of starting over.
    assert main(args[:5] + ["--iterations", "9", "--checkpoint-every", "3"]) == 0
    err = capsys.readouterr().err
    assert "resumed at iteration 6" in err
    assert json.loads((out / "tune.json").read_text())["iterations"] == 9
    contract, _ = load_contract(out / "shot-tuned.json")
    assert contract["training"]["iterations"] == 9

    # The preview bakes with the tuned model; the cache records which model it was.
    assert main(["bake", str(scene), "--solver", "learned", "--model", str(out), "--out", str(tmp_path / "lb"),
                 "--progress", "none"]) == 0  # fmt: skip
    manifest = json.loads((tmp_path / "lb" / "manifest.json").read_text())
    assert manifest["solver"]["settings"]["model"] == "shot-tuned"
    assert manifest["solver"]["settings"]["onnx_sha256"] == contract["onnx_sha256"]


def test_bake_model_refuses_a_folder_without_a_passing_model(reference_bake, tmp_path, capsys):
    scene, _ = reference_bake
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "x.json").write_text("{}")
    status = main(["bake", str(scene), "--solver", "learned", "--model", str(tmp_path / "m"), "--out",
                   str(tmp_path / "o")])  # fmt: skip
    assert status == ModelError.exit_code
    assert "no model in the folder passes its contract check" in capsys.readouterr().err
    status = main(["bake", str(scene), "--solver", "sph", "--model", str(tmp_path / "m"), "--out", str(tmp_path / "o")])
    assert status == 64 and "add --solver learned" in capsys.readouterr().err


def test_tune_without_pytorch_names_the_install_command(reference_bake, tmp_path):
    """A real interpreter where importing torch fails (sys.modules entry None): exit 8, one line, no traceback."""
    _, reference = reference_bake
    code = ("import sys; sys.modules['torch'] = None; from engine.cli import main; "
            f"sys.exit(main(['tune', '--bakes', {str(reference)!r}, '--out', {str(tmp_path / 'm')!r}]))")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode == 8
    assert "pip install -r requirements-train.txt" in done.stderr and "Traceback" not in done.stderr


def test_tune_refuses_bakes_with_frames_longer_than_the_learned_step(tmp_path, capsys):
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    scene = write_tiny_scene(tmp_path / "scene", frame_end=8)
    data = json.loads(scene.read_text())
    data["fps"] = 6  # one frame = 0.167 s, about 3 sqrt(d/g) at 2.5 cm
    scene.write_text(json.dumps(data))
    bake(scene, "sph", tmp_path / "slow", use_signals=False)
    assert main(["tune", "--bakes", str(tmp_path / "slow"), "--out", str(tmp_path / "m")]) == 64
    assert "bake the reference at" in capsys.readouterr().err
