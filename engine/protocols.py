"""The interfaces between the layers, declared: what a solver reads from a world, and what a bake
reads from a solver (DEVELOPERS.md, "Solver protocol").

``engine.world.World`` (a shot) and ``engine.validate.BoxWorld`` (a validation case) are worlds;
``engine.sph.SphSolver`` and ``engine.learned.LearnedSolver`` are solvers (``engine.solvers``
makes them by name). Both protocols are runtime-checkable, so a test can hold each
implementation to its interface.
"""

from typing import Protocol, runtime_checkable

import numpy as np

from .boundary import BoundaryParticles
from .state import State


@runtime_checkable
class SolverWorld(Protocol):
    """The world a solver advances: the physical quantities it owns and the boundary over time.

    Attributes:
        particle_spacing: d in metres. support_radius: H in metres. particle_mass: kg.
        rest_density: rho0 in kg/m^3. viscosity: XSPH coefficient. gravity: (3,) m/s^2.
        solver_settings: ``engine.scene.SolverSettings`` (time-step and solve settings).
    """

    particle_spacing: float
    support_radius: float
    particle_mass: float
    rest_density: float
    viscosity: float
    gravity: np.ndarray
    solver_settings: object

    def initial_state(self) -> State:
        """The state at t = 0."""

    def boundary_at(self, time: float) -> BoundaryParticles:
        """Boundary particles (walls and colliders) at ``time`` seconds."""

    def enforce_bounds(self, state: State, previous: State = None) -> State:
        """The hard constraints at ``state.time`` (walls, open faces, colliders)."""

    def emit(self, state: State, t0: float, t1: float) -> State:
        """Particles emitted in [t0, t1), placed where they are at t1."""


@runtime_checkable
class Solver(Protocol):
    """A solver a bake drives: ``start`` once, then ``advance`` frame by frame."""

    name: str

    def settings(self) -> dict:
        """Solver settings for the cache manifest."""

    def start(self, world: SolverWorld) -> State:
        """The initial state of ``world``."""

    def advance(self, state: State, world: SolverWorld, t_end: float) -> tuple:
        """(State at exactly ``t_end``, step statistics)."""

    def frame_attributes(self, state: State, world: SolverWorld) -> dict:
        """Per-particle ``density`` and ``pressure`` arrays for the cache frame."""
