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
from engine.learned.contract import DEFAULT_MODEL_NAME, find_model, load_contract
from engine.errors import ModelError

from tests.test_bake import write_tiny_scene

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def reference_bake(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tune")
    scene = write_tiny_scene(folder / "scene", frame_end=10, name="tune_shot")
    bake(scene, "sph", folder / "reference", use_signals=False)
    return scene, folder / "reference"


def scene_viscosity(scene_path):
    from engine.scene import load_scene

    return float(load_scene(scene_path).fluid.viscosity)


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
    assert contract["training"]["base_model"] == DEFAULT_MODEL_NAME and contract["training"]["iterations"] == 6
    # The trained viscosity range covers the base's (0.02, the scene default it was trained at) and the bake's.
    assert contract["training"]["viscosity_range"] == [min(0.02, scene_viscosity(scene)), max(0.02, scene_viscosity(scene))]
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


def test_pushforward_target_lands_the_preview_step_on_the_reference_frame(reference_bake):
    """The pushforward sample (training/pushforward.py) is built from a state the model made itself and
    must carry the acceleration that takes the preview's integrator from that state exactly onto the
    reference's next frame.

    Oracle: semi-implicit (symplectic) Euler written out here, v' = v + dt a, x' = x + dt v'
    (Hairer, Lubich & Wanner 2006, "Geometric Numerical Integration", 2nd ed., Springer, ch. VI.3;
    the form learned particle simulators integrate with, Sanchez-Gonzalez et al. 2020, "Learning to
    Simulate Complex Physics with Graph Networks", ICML), applied to the pushed state and the
    denormalised target. Tolerance: the target is float32 (relative rounding 6e-8) and enters
    scaled by dt^2 g ~ 0.02 m, so the landing error is below 1e-8 m; 1e-7 spacings is allowed.
    With no push (m = 0) the sample must equal the teacher-forced one of dataset.make_sample.
    """
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    import numpy as np

    from engine.learned import features
    from engine.learned.contract import default_model_path
    from training import dataset
    from training.pushforward import preview_stepper, pushforward_sample
    from training.tune import load_bakes, weights_from_onnx

    _, reference = reference_bake
    contract, onnx_path = load_contract(default_model_path())
    (shot,) = load_bakes([reference], contract)
    model = weights_from_onnx(onnx_path, contract["architecture"]["latent"], contract["rounds"])
    stepper = preview_stepper(model, onnx_path)
    config = {key: contract[key] for key in ("radius_spacings", "density_support_spacings", "max_neighbours",
                                            "max_boundary_neighbours")}  # fmt: skip
    d = shot.scene.particle_spacing
    j, k = 2, 5
    _, target, mask, state = pushforward_sample(stepper, shot, j, k, config)
    assert mask.sum() > 0.9 * len(mask)
    truth_now = shot.positions[k][shot.lookup(k, state.ids)]
    assert np.linalg.norm(state.positions - truth_now, axis=1)[mask].mean() > 1e-3 * d  # really pushed off

    stats = {key: np.asarray(value) for key, value in contract["normalisation"].items()}
    unit_output = (target - stats["target_mean"]) / stats["target_std"]
    a = features.acceleration_from_output(unit_output, stats, shot.units)
    dt = shot.times[k + 1] - shot.times[k]
    v_next = state.velocities + dt * a
    x_next = state.positions + dt * v_next
    truth_next = shot.positions[k + 1][shot.lookup(k + 1, state.ids)]
    assert np.abs(x_next - truth_next)[mask].max() < 1e-7 * d

    graph, target0, mask0, _ = pushforward_sample(stepper, shot, k, k, config)
    graph_tf, target_tf, mask_tf = dataset.make_sample(shot, k, config)
    assert np.array_equal(mask0, mask_tf) and np.array_equal(graph.node_features, graph_tf.node_features)
    assert np.abs(target0 - target_tf)[mask0].max() <= 1e-6 * np.abs(target_tf).max()


def test_push_from_the_first_frame_retraces_the_preview_bake(reference_bake, tmp_path):
    """Pushing from the first reference frame with the base model's weights in PyTorch must retrace the
    preview's own bake with the same model in onnxruntime: the pushforward trains on the states the
    preview really reaches. Oracle: the learned bake of the same scene (engine.bake). Tolerance:
    PyTorch and onnxruntime agree to ~1e-6 relative per call (docs/learned-surrogate.md), the first
    frame is read back as float32 from the cache (~1e-9 m), and three steps of integration and
    density relaxation leave that far below 1e-4 spacings.
    """
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    import numpy as np

    from engine.cache import open_cache
    from engine.learned.contract import default_model_path
    from training.pushforward import preview_stepper, push
    from training.tune import load_bakes, weights_from_onnx

    scene, reference = reference_bake
    contract, onnx_path = load_contract(default_model_path())
    (shot,) = load_bakes([reference], contract)
    model = weights_from_onnx(onnx_path, contract["architecture"]["latent"], contract["rounds"])
    state = push(preview_stepper(model, onnx_path), shot, 0, 3)
    bake(scene, "learned", tmp_path / "preview", frames=(1, 4), use_signals=False)
    frame = open_cache(tmp_path / "preview").read_frame(4)
    order = np.argsort(frame["ids"])
    assert np.array_equal(frame["ids"][order], state.ids)
    moved = np.linalg.norm(state.positions - shot.positions[0], axis=1).max()
    assert moved > 0.5 * shot.scene.particle_spacing  # three frames of a falling block: a real trajectory
    error = np.abs(frame["positions"][order] - state.positions).max() / shot.scene.particle_spacing
    assert error < 1e-4


def test_tune_refuses_a_negative_unroll(reference_bake, tmp_path, capsys):
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    _, reference = reference_bake
    assert main(["tune", "--bakes", str(reference), "--out", str(tmp_path / "m"), "--unroll", "-1"]) == 64
    assert "--unroll -1: give a whole number of frames >= 0" in capsys.readouterr().err


def test_tune_refuses_to_resume_a_run_under_another_unroll(reference_bake, tmp_path, capsys):
    """A checkpoint trained with one pushforward depth is not a start for another loss: resuming it with
    another --unroll is refused with the setting to add, and the finished run is left as it was."""
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    from engine.errors import TuneResumeError

    _, reference = reference_bake
    out = tmp_path / "m"
    args = ["tune", "--bakes", str(reference), "--out", str(out), "--iterations", "2", "--checkpoint-every", "1"]
    assert main(args + ["--unroll", "2"]) == 0
    capsys.readouterr()
    checkpoint = (out / "run" / "checkpoint.pt").read_bytes()
    config = (out / "run" / "config.json").read_text()
    assert main(args[:5] + ["--iterations", "4", "--unroll", "3"]) == TuneResumeError.exit_code == 64
    err = capsys.readouterr().err
    assert "trained with --unroll 2, not 3" in err and "add --unroll 2 to resume it" in err
    assert "Traceback" not in err
    assert (out / "run" / "checkpoint.pt").read_bytes() == checkpoint
    assert (out / "run" / "config.json").read_text() == config
    # The same loss resumes.
    assert main(args[:5] + ["--iterations", "3", "--unroll", "2"]) == 0
    assert "resumed at iteration 2" in capsys.readouterr().err


def test_reach_tangent_matches_finite_differences_of_the_features(reference_bake):
    """The reach loss (training/reach.py) carries the gradient across a preview step through the first-order
    change of the core's inputs with the state. Oracle: the preview's own numpy features
    (``features.build_graph``) at a state moved by a small random step, against the same features at the
    state itself, pair by pair (matched by particle and neighbour, since table order may change), the
    central-difference check of a derivative (common practice; e.g. Nocedal & Wright 2006, "Numerical
    Optimization", 2nd ed., section 8.1, from memory). Tolerance: the step is 1e-4 spacings (and
    1e-4 sqrt(g d)); second-order terms are ~1e-8 of the features and float32 rounding ~1e-7 of values of
    order 1, so the tangent must agree to 1 % of the largest change (it did to ~0.1 % when written).
    """
    torch = pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    import numpy as np

    from engine.learned import features
    from engine.learned.contract import default_model_path
    from training.pushforward import preview_stepper, push
    from training.reach import tangent_inputs
    from training.tune import load_bakes, weights_from_onnx

    _, reference = reference_bake
    c, onnx_path = load_contract(default_model_path())
    (shot,) = load_bakes([reference], c)
    model = weights_from_onnx(onnx_path, c["architecture"]["latent"], c["rounds"])
    state = push(preview_stepper(model, onnx_path), shot, 2, 4)
    stats = {key: np.asarray(value, np.float64) for key, value in c["normalisation"].items()}

    def graph_at(x, v, v_prev):
        return features.build_graph(x, v, v_prev, shot.boundary(4), shot.units, c["radius_spacings"],
                                    c["density_support_spacings"], c["max_neighbours"], c["max_boundary_neighbours"],
                                    step_froude=shot.dt / shot.units.time)  # fmt: skip

    def pairs(graph, edge_values, boundary_values):
        """{(row, neighbour): normalised features} of the fluid and boundary pairs."""
        out = {}
        for kind, index, mask, values, rows in (
            ("fluid", graph.neighbour_index, graph.neighbour_mask, edge_values, np.arange(len(graph.neighbour_index))),
            ("wall", graph.boundary_index, graph.boundary_mask, boundary_values, graph.boundary_rows),
        ):  # fmt: skip
            for r, j in zip(*np.nonzero(mask)):
                out[(kind, int(rows[r]), int(index[r, j]))] = values[r, j]
        return out

    x, v = state.positions, state.velocities
    v_prev = state.particle_arrays["learned_previous_velocity"]
    rng = np.random.default_rng(7)
    step = 1e-4
    moves = [rng.normal(size=x.shape) * step * scale for scale in (shot.units.spacing, shot.units.velocity,
                                                                   shot.units.velocity)]  # fmt: skip
    here = graph_at(x, v, v_prev)
    inputs = features.normalise(here, c["normalisation"])
    tangent = tangent_inputs(inputs, tuple(torch.from_numpy(m) for m in moves), shot.units, stats,
                             c["radius_spacings"], c["density_support_spacings"])  # fmt: skip
    ahead = features.normalise(graph_at(x + moves[0], v + moves[1], v_prev + moves[2]), c["normalisation"])
    behind = features.normalise(graph_at(x - moves[0], v - moves[1], v_prev - moves[2]), c["normalisation"])
    graph_ahead = graph_at(x + moves[0], v + moves[1], v_prev + moves[2])
    graph_behind = graph_at(x - moves[0], v - moves[1], v_prev - moves[2])

    node_change = (ahead["node_features"].astype(np.float64) - behind["node_features"]) / 2
    predicted = tangent["node_features"].double().numpy() - inputs["node_features"]
    assert np.abs(node_change).max() > 1e-5  # the move really changes the features
    assert np.abs(predicted - node_change).max() < 0.01 * np.abs(node_change).max()

    base = pairs(here, inputs["edge_features"], inputs["boundary_features"])
    moved = pairs(here, tangent["edge_features"].double().numpy(), tangent["boundary_features"].double().numpy())
    forward = pairs(graph_ahead, ahead["edge_features"], ahead["boundary_features"])
    backward = pairs(graph_behind, behind["edge_features"], behind["boundary_features"])
    common = [key for key in base if key in forward and key in backward]
    assert len(common) > 0.99 * len(base) and any(key[0] == "wall" for key in common)
    for kind in ("fluid", "wall"):
        chosen = [key for key in common if key[0] == kind]
        finite = np.array([(forward[key].astype(np.float64) - backward[key]) / 2 for key in chosen])
        first_order = np.array([moved[key] - base[key] for key in chosen])
        assert np.abs(finite).max() > 1e-5
        assert np.abs(first_order - finite).max() < 0.01 * np.abs(finite).max(), kind


def test_reach_roll_keeps_the_preview_values_and_scores_them(reference_bake, tmp_path):
    """The reach loss rolls the preview's own steps with gradient, and the gradient must not change the
    values: from the first frame, its score over three frames must equal the one measured on the preview's
    own bake of the shot. Oracles: ``engine.bake`` with the learned solver (onnxruntime, not PyTorch) and
    ``engine.measures.chamfer_distance`` for the Chamfer score; the identity-matched mean squared distance
    written out here for the distance score. Tolerance: PyTorch against onnxruntime ~1e-6 relative per
    step and float32 cache positions (~1e-9 m), far below the 1e-4 relative allowed.
    """
    pytest.importorskip("torch", reason="PyTorch is optional (requirements-train.txt); tune needs it")
    import numpy as np

    from engine.cache import open_cache
    from engine.learned.contract import default_model_path
    from engine.measures import chamfer_distance
    from training.pushforward import preview_stepper
    from training.reach import GradientCore, reach_loss
    from training.tune import load_bakes, weights_from_onnx

    scene, reference = reference_bake
    contract, onnx_path = load_contract(default_model_path())
    (shot,) = load_bakes([reference], contract)
    model = weights_from_onnx(onnx_path, contract["architecture"]["latent"], contract["rounds"])
    stepper, core = preview_stepper(model, onnx_path), GradientCore(model, contract)
    bake(scene, "learned", tmp_path / "preview", frames=(1, 4), use_signals=False)
    preview = open_cache(tmp_path / "preview")
    d = shot.scene.particle_spacing
    chamfer, squared = [], []
    for k in (1, 2, 3):
        frame = preview.read_frame(shot.frames[k])
        chamfer.append(chamfer_distance(frame["positions"], shot.positions[k])[0] / d)
        order = np.argsort(frame["ids"])
        where = shot.lookup(k, frame["ids"][order])
        assert (where >= 0).all()
        squared.append((((frame["positions"][order] - shot.positions[k][where]) / d) ** 2).sum(1).mean())
    for score, expected in (("chamfer", np.mean(chamfer)), ("distance", np.mean(squared))):
        loss = reach_loss(stepper, core, shot, 0, 0, 3, score)
        assert loss.requires_grad and expected > 1e-3
        assert abs(float(loss.detach()) - expected) < 1e-4 * expected, score
