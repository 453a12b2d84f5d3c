"""The engine's one exception hierarchy.

Every message names the object or field, the bad value and the fix, e.g.
``emitter "pitcher_water": mesh is not closed (14 open edges); close it or use
it as a collider``. The command line turns these into a one-line message and a
non-zero exit status (see ``EXIT_CODES``); it never prints a traceback for them.
"""


class SplashdraftError(Exception):
    """Base class of every error the engine raises on purpose."""

    exit_code = 1


class SceneError(SplashdraftError):
    """The scene file or one of its fields is invalid."""

    exit_code = 2


class MeshError(SceneError):
    """A mesh cannot serve its role (open, zero volume, NaN vertices, unreadable)."""


class BudgetError(SplashdraftError):
    """The scene would exceed the particle, memory or disk budget."""

    exit_code = 3


class CacheError(SplashdraftError):
    """A cache folder, manifest, frame or checkpoint is missing, corrupt or unwritable."""

    exit_code = 4


class ModelError(SplashdraftError):
    """A learned model file or its contract is missing, corrupt or mismatched."""

    exit_code = 5


class SolverError(SplashdraftError):
    """The simulation became invalid (NaN, runaway velocity, failed convergence)."""

    exit_code = 6


class UsageError(SplashdraftError):
    """A command-line request that cannot be met (e.g. a frame range outside the shot)."""

    exit_code = 64


class TuneResumeError(UsageError):
    """A resumed fine-tune would continue a checkpoint under other loss settings than it was trained with."""


class DependencyError(SplashdraftError):
    """An optional dependency a command needs is not installed (the message names the install command)."""

    exit_code = 8


class ValidationFailed(SplashdraftError):
    """A validation case ran but fell outside its published tolerance."""

    exit_code = 7


#: Exit status of ``python -m engine`` (documented in ``--help`` and the README).
EXIT_CODES = {
    0: "success",
    1: "other engine error",
    2: "invalid scene or mesh",
    3: "budget exceeded",
    4: "cache missing, corrupt or unwritable",
    5: "learned model missing, corrupt or mismatched",
    6: "simulation became invalid",
    7: "validation outside tolerance",
    8: "an optional dependency is missing (the message says what to install)",
    64: "command-line usage error",
    130: "interrupted; finished frames were kept (resume with --resume)",
    141: "the reader of the output closed the pipe (e.g. '| head'); nothing else went wrong",
}
