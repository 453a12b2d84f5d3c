"""The solver registry and the one way to find a model (engine.solvers), through the API and ``main``.

Oracles: the documented exit codes (engine.errors.EXIT_CODES); the learned step rule of
DEVELOPERS.md (steps per frame = ceil(frame interval / (step_froude * sqrt(d / g))), Froude
scaling of time by sqrt(d / g), common practice) computed here by hand; the model contract's
sha256 check (a model whose file differs from its contract is not installed).
"""

import json
import math
import shutil

import numpy as np
import pytest

from engine.cli import main
from engine.errors import EXIT_CODES, ModelError, UsageError
from engine.learned import LearnedSolver
from engine.learned.contract import DEFAULT_MODEL_NAME, default_model_path
from engine.solvers import SOLVER_NAMES, installed_models, make_solver
from engine.protocols import Solver, SolverWorld
from engine.scene import load_scene
from engine.sph import SphSolver
from engine.validate import BoxWorld
from engine.world import build_world
from tests.test_bake import write_tiny_scene
from tests.test_learned import copy_model


def test_make_solver_by_name_and_the_errors_name_the_fix():
    assert SOLVER_NAMES == ("sph", "learned")
    assert isinstance(make_solver("sph"), SphSolver)
    learned = make_solver("learned", relax_iterations=2)
    assert isinstance(learned, LearnedSolver) and learned.relax_iterations == 2
    assert learned.onnx_path.resolve() == default_model_path().resolve()
    with pytest.raises(UsageError, match=r"solver 'dfsph' is not one of sph, learned; choose --solver sph or learned"):
        make_solver("dfsph")
    with pytest.raises(UsageError, match=r"a model is for the learned preview; add --solver learned"):
        make_solver("sph", model="models")


def test_make_solver_finds_a_model_folder(tmp_path):
    onnx_path = copy_model(tmp_path)
    assert make_solver("learned", model=tmp_path).onnx_path == onnx_path
    with pytest.raises(ModelError, match=r"no such file or folder; check the path"):
        make_solver("learned", model=tmp_path / "missing")


def test_installed_models_are_those_that_pass_their_contract(tmp_path):
    shipped = installed_models()
    assert [name for name, _ in shipped] == [DEFAULT_MODEL_NAME]
    good = copy_model(tmp_path)
    bad = tmp_path / "bad.onnx"
    shutil.copyfile(good, bad)
    bad.write_bytes(bad.read_bytes()[:-1] + b"\0")  # one byte changed: sha256 no longer matches
    contract = json.loads(good.with_suffix(".json").read_text())
    (tmp_path / "bad.json").write_text(json.dumps(dict(contract, onnx_file="bad.onnx")))
    assert [path for _, path in installed_models(tmp_path)] == [good]
    assert installed_models(tmp_path / "missing") == []


def _estimate_json(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in err
    return code, (json.loads(out) if code == 0 else None), err


def test_estimate_takes_the_model_of_model(tmp_path, capsys):
    """``estimate --model`` reads that model's longest learned step (fps 24, d = 0.025 m, g = 9.81)."""
    scene = write_tiny_scene(tmp_path / "shot")
    folder = tmp_path / "short_step"
    folder.mkdir()
    onnx_path = copy_model(folder)
    contract = json.loads(onnx_path.with_suffix(".json").read_text())
    contract.update(step_froude=0.25, step_froude_min=0.25)
    onnx_path.with_suffix(".json").write_text(json.dumps(contract))
    expected = math.ceil((1 / 24) / (0.25 * math.sqrt(0.025 / 9.81)))
    code, estimate, _ = _estimate_json(["estimate", scene, "--solver", "learned", "--json", "--model", folder], capsys)
    assert code == 0 and estimate["substeps_per_frame"] == expected == 4
    code, shipped, _ = _estimate_json(["estimate", scene, "--solver", "learned", "--json"], capsys)
    assert code == 0 and shipped["substeps_per_frame"] != expected
    code, _, err = _estimate_json(["estimate", scene, "--solver", "learned", "--model", tmp_path / "none"], capsys)
    assert code == 5 == next(c for c, m in EXIT_CODES.items() if m.startswith("learned model"))
    assert "no such file or folder" in err
    code, _, err = _estimate_json(["estimate", scene, "--model", folder], capsys)
    assert code == 64 and "add --solver learned" in err


def test_demo_takes_a_model(tmp_path, capsys):
    """``demo --model`` bakes with the named model (here a copy of the shipped one: the same frames)."""
    (tmp_path / "model").mkdir()
    copy_model(tmp_path / "model")
    common = ["demo", "--preset", "small", "--frames", "1:2", "--solver", "learned", "--progress", "none"]
    assert main([str(a) for a in common + ["--out", tmp_path / "a", "--model", tmp_path / "model"]]) == 0
    assert main([str(a) for a in common + ["--out", tmp_path / "b"]]) == 0
    capsys.readouterr()
    a = json.loads((tmp_path / "a" / "learned" / "manifest.json").read_text())["frames"]
    b = json.loads((tmp_path / "b" / "learned" / "manifest.json").read_text())["frames"]
    assert [a[f]["sha256"] for f in ("1", "2")] == [b[f]["sha256"] for f in ("1", "2")]


def test_worlds_and_solvers_meet_their_declared_interfaces(tmp_path):
    """A shot's World and a validation case's BoxWorld are both SolverWorlds and carry the derived
    quantities of the particle model: H = 2 d (cubic spline support, Monaghan 1992, "Smoothed Particle
    Hydrodynamics", ARA&A 30:543, support 2h with h = d) and m = rho0 d^3 (one lattice cell of liquid,
    common practice); both solvers are Solvers."""
    scene = load_scene(write_tiny_scene(tmp_path))
    world = build_world(scene)
    box = BoxWorld(np.zeros((1, 3)), np.zeros((1, 3)), world.boundary_at(0.0), 0.025, rest_density=997.0)
    for candidate, spacing, rho0 in ((world, scene.particle_spacing, scene.fluid.rest_density), (box, 0.025, 997.0)):
        assert isinstance(candidate, SolverWorld)
        assert candidate.support_radius == 2 * spacing
        assert candidate.particle_mass == pytest.approx(rho0 * spacing**3, rel=1e-15)
    assert world.solver_settings == scene.solver and world.viscosity == scene.fluid.viscosity
    assert all(isinstance(make_solver(name), Solver) for name in SOLVER_NAMES)
