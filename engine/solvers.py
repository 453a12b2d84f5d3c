"""The solver registry: the solvers' names, one way to make a solver, one way to find a model.

Every command and benchmark names a solver the same way (``make_solver("sph")``,
``make_solver("learned", model=...)``) and every place that needs a learned model
(the learned solver, ``estimate``, the Blender add-on) finds it with ``find_model``
or lists the installed ones with ``installed_models``, by their contracts.
Solver modules are imported only when a solver is made, so ``import engine.solvers``
does not load onnxruntime.
"""

from pathlib import Path

from .errors import UsageError
from .protocols import Solver
from .learned.contract import check_folder, default_model_path, find_model, load_contract, shipped_models_dir

SOLVER_NAMES = ("sph", "learned")

__all__ = ["SOLVER_NAMES", "make_solver", "check_model_option", "model_contract", "find_model", "installed_models"]


def make_solver(name, **options) -> Solver:
    """A fresh solver called ``name``, its module imported here.

    Args:
        name: ``"sph"`` (``engine.sph.SphSolver``, the DFSPH reference) or ``"learned"``
            (``engine.learned.LearnedSolver``, the learned preview).
        **options: keyword arguments of that solver's class. ``model`` (learned only) may be a
            model folder, an .onnx file or its .json contract (``find_model``); None or absent is
            the shipped model. ``threads``: onnxruntime intra-op threads of the learned preview
            (None or absent: its default); the reference solver's pool is sized by
            SPLASHDRAFT_THREADS when ``engine.sph`` is imported, so it takes no ``threads``.

    Returns:
        The solver (``start(world)``, ``advance(state, world, interval)``, ``settings()``).

    Raises:
        UsageError: an unknown name, or a model for the reference solver.
        ModelError: the model is missing or fails its contract check.
    """
    check_model_option(name, options.get("model"))
    model, threads = options.pop("model", None), options.pop("threads", None)
    if name == "sph":
        from .sph import SphSolver

        return SphSolver(**options)
    if name == "learned":
        from .learned import LearnedSolver

        if threads is not None:
            options["threads"] = max(1, int(threads))
        return LearnedSolver(model=None if model is None else find_model(model), **options)
    raise UsageError(f"solver {name!r} is not one of {', '.join(SOLVER_NAMES)}; choose --solver sph or learned")


def check_model_option(name, model) -> None:
    """Raise UsageError when a model is given for a solver that takes none (only "learned" does)."""
    if model is not None and name != "learned":
        raise UsageError(f"--model {model}: a model is for the learned preview; add --solver learned")


def model_contract(model=None) -> tuple[dict, Path]:
    """The checked contract of a model (``find_model``'s forms; None: the shipped model).

    Returns:
        (contract dict, onnx path) as ``engine.learned.contract.load_contract`` gives them.

    Raises:
        ModelError naming the file and the fix.
    """
    return load_contract(default_model_path() if model is None else find_model(model))


def installed_models(folder=None) -> list[tuple[str, Path]]:
    """The models in ``folder`` (default: the shipped models) that pass their contract check.

    Returns:
        list of (model name from its contract, onnx path), sorted by file name; empty when the
        folder is missing or no model in it passes.
    """
    folder = shipped_models_dir() if folder is None else folder
    if not folder.is_dir():
        return []
    return [(str(contract["name"]), onnx_path) for contract, onnx_path in check_folder(folder)[0]]
