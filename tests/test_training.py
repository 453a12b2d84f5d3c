"""Training pipeline: dataset targets, ONNX export vs PyTorch, checkpoint/resume, contract.

Sources:
- Free fall x(t) = x0 + v0 t + g t^2 / 2 (Newton; exact). The finite-difference target
  (x_{t+1} - 2 x_t + x_{t-1}) / dt^2 of Sanchez-Gonzalez et al. 2020, "Learning to Simulate
  Complex Physics with Graph Networks", ICML [confirmed method] recovers g exactly for a
  quadratic, so the non-gravity target must be 0 (float32 PLY storage -> tolerance below).
- ONNX vs PyTorch agreement to 1e-4 relative: the project's export criterion (reference
  library: onnxruntime against torch on the same weights; common practice).
These tests need PyTorch (training is optional); they skip cleanly without it.
"""

import json

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from engine.cache import CacheWriter  # noqa: E402
from engine.learned import features  # noqa: E402
from engine.learned.contract import load_contract  # noqa: E402
from engine.learned.runtime import CoreRunner, subgraph  # noqa: E402
from engine.scene import save_scene  # noqa: E402
from engine.world import build_world  # noqa: E402
from training import dataset, scenes  # noqa: E402
from training.model import GraphCore, as_tensors, export_onnx  # noqa: E402
from training.train import train  # noqa: E402

SPACING = 0.025


def write_free_fall_shot(folder, frames=8):
    """A ball of liquid in free fall in a tall tank, written as a cache with the analytic motion."""
    from engine import mesh_io

    scene = scenes._base("free_fall", 5, np.array([16.0, 16.0, 60.0]) * SPACING, (frames - 1) / 40, SPACING)
    ball = mesh_io.ico_sphere_mesh(np.array([8.0, 8.0, 45.0]) * SPACING, 3.0 * SPACING, 2)
    scene["emitters"].append({"name": "ball", "type": "fill", "mesh": scenes._mesh(ball), "velocity": [0.3, 0.0, 0.0]})
    loaded = save_scene(folder / "scene.json", scene)
    world = build_world(loaded)
    x0 = world.initial_positions
    header = {"scene_name": "free_fall", "scene_hash": "x", "solver": {"name": "sph", "settings": {}},
              "fps": loaded.fps, "frame_start": 1, "frame_end": frames, "particle_spacing": SPACING,
              "rest_density": 1000.0}
    writer = CacheWriter(folder / "cache", header)
    g = np.array([0.0, 0.0, -9.81])
    v0 = np.array([0.3, 0.0, 0.0])
    for f in range(1, frames + 1):
        t = (f - 1) / loaded.fps
        n = len(x0)
        writer.write_frame(f, {"positions": x0 + v0 * t + 0.5 * g * t * t, "velocities": np.tile(v0 + g * t, (n, 1)),
                               "ids": np.arange(n), "density": np.full(n, 1000.0), "pressure": np.zeros(n)}, t, 1, 0.0)
    writer.mark_complete()
    return loaded


@pytest.fixture(scope="module")
def free_fall_data(tmp_path_factory):
    root = tmp_path_factory.mktemp("data")
    for name in ("shot_0000", "shot_0001"):
        write_free_fall_shot(root / name)
    fps, step = scenes.frame_rate_for_step(SPACING)
    manifest = {"format": "splashdraft-training-data", "version": 1, "kind": "test", "family_seed": 0,
                "particle_spacing": SPACING, "fps": fps, "step_froude": step,
                "shots": [{"name": n, "scene": f"{n}/scene.json", "cache": f"{n}/cache"} for n in ("shot_0000", "shot_0001")]}
    (root / "data_manifest.json").write_text(json.dumps(manifest))
    return root


def unit_stats():
    sizes = {"node": features.NODE_FEATURES, "edge": features.EDGE_FEATURES, "boundary": features.BOUNDARY_FEATURES,
             "target": 3}
    stats = {f"{k}_mean": np.zeros(n) for k, n in sizes.items()}
    stats.update({f"{k}_std": np.ones(n) for k, n in sizes.items()})
    return stats


CONFIG = {"radius_spacings": 2.0, "density_support_spacings": 2.0, "max_neighbours": 48, "max_boundary_neighbours": 32}


def test_free_fall_targets_are_zero_non_gravity_acceleration(free_fall_data):
    """Exact free fall -> the finite-difference non-gravity target is 0 (see module docstring).
    Tolerance 0.02 g: float32 positions (~1e-7 m at 1 m) over dt^2 = (1/40 s)^2 give ~2e-4 m/s^2 per
    coordinate; 0.02 g is a loose but failing-if-wrong bound (a missing gravity term would give 1)."""
    _, shots = dataset.load_shots(free_fall_data)
    shot = shots[0]
    graph, target, mask = dataset.make_sample(shot, 3, CONFIG)
    assert mask.all()
    assert np.abs(target[mask]).max() < 0.02
    # The velocity features are the finite-difference velocities in sqrt(g d).
    t = shot.times[3]
    expected_vz = -9.81 * (t - 0.5 / shot.scene.fps) / shot.units.velocity
    assert graph.node_features[:, 2].mean() == pytest.approx(expected_vz, rel=1e-3)


def test_longer_steps_read_frames_further_apart_and_still_see_free_fall(free_fall_data):
    """A learned step of 2 frames: velocities are finite differences over 2 frames (the
    central-difference value at mid-interval, exact for a quadratic), the non-gravity target
    is still 0, and the step column is 2 frame intervals in sqrt(d/g)."""
    _, shots = dataset.load_shots(free_fall_data)
    shot = shots[0]
    graph, target, mask = dataset.make_sample(shot, 4, CONFIG, stride=2)
    assert mask.all() and np.abs(target).max() < 0.02
    t = shot.times[4]
    expected_vz = -9.81 * (t - 1.0 / shot.scene.fps) / shot.units.velocity
    assert graph.node_features[:, 2].mean() == pytest.approx(expected_vz, rel=1e-3)
    np.testing.assert_allclose(graph.node_features[:, 7], 2.0 / shot.scene.fps / shot.units.time, rtol=1e-6)
    assert shot.sample_indices(2) == [4, 5]  # frames 0..7: k - 4 >= 0 and k + 2 <= 7


def test_compact_boundary_rows_give_the_same_output_as_every_row(free_fall_data):
    """The core computes wall messages only for rows with boundary neighbours and gathers them
    back; giving it every row instead (the layout before compaction, rows without neighbours
    all padding) must give the same output (float32 rounding only)."""
    torch.manual_seed(2)
    model = GraphCore(latent=16, rounds=2)
    _, shots = dataset.load_shots(free_fall_data)
    rng = np.random.default_rng(3)
    inputs = features.normalise(dataset.make_sample(shots[0], 3, CONFIG)[0], unit_stats())
    n, nb = len(inputs["node_features"]), 30
    kb = 5
    inputs["boundary_rows"] = np.sort(rng.choice(n, nb, replace=False)).astype(np.int64)
    inputs["boundary_slot"] = np.full(n, nb, np.int64)
    inputs["boundary_slot"][inputs["boundary_rows"]] = np.arange(nb)
    inputs["boundary_features"] = rng.standard_normal((nb, kb, features.BOUNDARY_FEATURES)).astype(np.float32)
    inputs["boundary_mask"] = (rng.uniform(size=(nb, kb)) < 0.7).astype(np.float32)
    every = dict(inputs)
    every["boundary_rows"] = np.arange(n, dtype=np.int64)
    every["boundary_slot"] = np.arange(n, dtype=np.int64)
    every["boundary_features"] = np.zeros((n, kb, features.BOUNDARY_FEATURES), np.float32)
    every["boundary_features"][inputs["boundary_rows"]] = inputs["boundary_features"]
    every["boundary_mask"] = np.zeros((n, kb), np.float32)
    every["boundary_mask"][inputs["boundary_rows"]] = inputs["boundary_mask"]
    with torch.no_grad():
        compact = model(*as_tensors(inputs)).numpy()
        full = model(*as_tensors(every)).numpy()
    np.testing.assert_allclose(compact, full, atol=1e-5 * np.abs(full).max())


def test_onnx_export_matches_pytorch_on_a_random_model(tmp_path, free_fall_data):
    """Export criterion: onnxruntime output equals PyTorch to 1e-4 relative, with a different
    particle and neighbour count than at export (dynamic axes)."""
    torch.manual_seed(1)
    model = GraphCore(latent=16, rounds=2)
    _, shots = dataset.load_shots(free_fall_data)
    graph, _, _ = dataset.make_sample(shots[0], 3, CONFIG)
    inputs = features.normalise(graph, unit_stats())
    small = subgraph(inputs, np.arange(40))
    export_onnx(model, tmp_path / "m.onnx", small)
    rng = np.random.default_rng(0)
    inputs["node_features"] = rng.standard_normal(inputs["node_features"].shape).astype(np.float32)
    with torch.no_grad():
        reference = model(*as_tensors(inputs)).numpy()
    output = CoreRunner(tmp_path / "m.onnx", 2, tile_particles=0).run(inputs)
    assert np.abs(output - reference).max() / np.abs(reference).max() < 1e-4
    # Tiling with halos must reproduce the untiled result (exact up to float rounding).
    tiled = CoreRunner(tmp_path / "m.onnx", 2, tile_particles=37, untiled_max=0).run(inputs)
    assert np.abs(tiled - reference).max() / np.abs(reference).max() < 1e-4


def test_train_checkpoints_resumes_and_exports_a_checked_contract(tmp_path, free_fall_data):
    """A few iterations on free-fall data: checkpoint, resume continues the count, export passes
    the 1e-4 check and writes a contract that load_contract accepts (sha256 included)."""
    run = tmp_path / "run"
    overrides = {"iterations": 3, "latent": 8, "rounds": 2, "checkpoint_every": 2, "validate_every": 2,
                 "statistics_samples": 4, "validation_shots": 1}
    first = train(free_fall_data, run, overrides=overrides, name="tiny", log=lambda m: None)
    assert first["iterations"] == 3 and first["export_check"]["passed"]
    assert (run / "loss.png").read_bytes()[:4] == b"\x89PNG"
    payload = torch.load(run / "checkpoint.pt", weights_only=True)
    assert int(payload["iteration"]) == 3
    overrides["iterations"] = 5
    second = train(free_fall_data, run, resume=True, overrides=overrides, name="tiny",
                   export_to=tmp_path / "models" / "tiny", log=lambda m: None)
    assert second["iterations"] == 5
    contract, onnx_path = load_contract(tmp_path / "models" / "tiny.onnx")
    assert contract["rounds"] == 2 and onnx_path.name == "tiny.onnx"
    assert contract["step_froude"] == pytest.approx(scenes.frame_rate_for_step(SPACING)[1])
    assert contract["step_froude_min"] == contract["step_froude"]
    # The trained speed range: the fastest particle of the data, the free fall's last frame,
    # |v0 + g t| = sqrt(0.3^2 + (9.81 t)^2) at t = 7 frames (textbook kinematics), in sqrt(g d).
    fps = json.loads((free_fall_data / "shot_0000" / "scene.json").read_text())["fps"]
    fastest = np.hypot(0.3, 9.81 * 7 / fps) / np.sqrt(9.81 * SPACING)
    assert contract["training"]["speed_range_froude"] == pytest.approx([0.0, fastest], abs=2e-3)


def test_strides_set_the_trained_step_range_in_the_contract(tmp_path, free_fall_data):
    """--strides 1 2: the contract records the range [1, 2] frame intervals in sqrt(d/g)."""
    overrides = {"iterations": 2, "latent": 8, "rounds": 1, "checkpoint_every": 2, "validate_every": 2,
                 "statistics_samples": 4, "validation_shots": 1, "strides": [2, 1]}
    summary = train(free_fall_data, tmp_path / "run", overrides=overrides, name="tiny", log=lambda m: None)
    contract, _ = load_contract(summary["onnx"])
    frame = scenes.frame_rate_for_step(SPACING)[1]
    assert contract["step_froude"] == pytest.approx(2 * frame)
    assert contract["step_froude_min"] == pytest.approx(frame)
    assert contract["training"]["config"]["strides"] == [1, 2]


def test_generate_refuses_to_mix_frame_rates_in_one_folder(tmp_path):
    """A data folder holds one frame interval: asking for another names both fps and the fix,
    before any baking (the shots' fps follow from frame_rate_for_step)."""
    from engine.errors import SplashdraftError
    from training.generate import generate

    fps_half, _ = scenes.frame_rate_for_step(step_froude=0.5)
    fps_quarter, _ = scenes.frame_rate_for_step(step_froude=0.25)
    (tmp_path / "data_manifest.json").write_text(json.dumps({"fps": fps_half, "shots": [{"name": "shot_0000"}]}))
    with pytest.raises(SplashdraftError, match=rf"{fps_half} fps.*--frame-step 0.25 asks for {fps_quarter} fps"):
        generate(tmp_path, count=1, frame_step=0.25, log=lambda m: None)
