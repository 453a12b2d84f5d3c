"""Simulation state shared by every solver, and its checkpoint form.

A ``State`` is a frozen snapshot: change it with ``dataclasses.replace``.
Per-particle arrays all have length N on axis 0 and stay aligned: when particles
are added or removed, every entry of ``particle_arrays`` is filtered with them
(use ``select`` and ``append``). Solver-specific warm-start data (DFSPH's
pressure coefficients, the learned model's velocity history) lives in
``particle_arrays``; emitter progress and similar scalars live in ``scalars``.

Checkpoints are plain ``.npz`` archives (no pickle): fields are stored under
their names, particle arrays under ``p__<name>`` and scalars under ``s__<name>``.
"""

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from .errors import CacheError


@dataclass(frozen=True)
class State:
    """One moment of a simulation.

    Attributes:
        time: simulated time in seconds since the start of the shot.
        positions: (N, 3) float64, metres, world space (z up).
        velocities: (N, 3) float64, m/s.
        ids: (N,) int64, unique and stable particle ids.
        next_id: the id the next emitted particle gets.
        removed: particles removed so far through open bounds faces.
        particle_arrays: name -> (N, ...) array, solver-specific.
        scalars: name -> float, solver- or emitter-specific.
    """

    time: float
    positions: np.ndarray
    velocities: np.ndarray
    ids: np.ndarray
    next_id: int = 0
    removed: int = 0
    particle_arrays: dict = field(default_factory=dict)
    scalars: dict = field(default_factory=dict)

    @property
    def count(self) -> int:
        return len(self.ids)


def empty_state(time=0.0) -> State:
    return State(time=float(time), positions=np.zeros((0, 3)), velocities=np.zeros((0, 3)),
                 ids=np.zeros(0, np.int64))


def select(state, keep) -> State:
    """State with only the particles where ``keep`` (bool mask or index array) holds."""
    return dataclasses.replace(
        state,
        positions=state.positions[keep],
        velocities=state.velocities[keep],
        ids=state.ids[keep],
        particle_arrays={k: v[keep] for k, v in state.particle_arrays.items()},
    )


def append(state, positions, velocities, fill=None) -> State:
    """State with new particles appended; they get fresh ids.

    ``fill`` maps a particle-array name to the value new particles get there
    (default 0).
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    velocities = np.asarray(velocities, np.float64).reshape(-1, 3)
    n_new = len(positions)
    if n_new == 0:
        return state
    fill = fill or {}
    arrays = {}
    for name, values in state.particle_arrays.items():
        extra = np.full((n_new,) + values.shape[1:], fill.get(name, 0), dtype=values.dtype)
        arrays[name] = np.concatenate([values, extra])
    new_ids = np.arange(state.next_id, state.next_id + n_new, dtype=np.int64)
    return dataclasses.replace(
        state,
        positions=np.concatenate([state.positions, positions]),
        velocities=np.concatenate([state.velocities, velocities]),
        ids=np.concatenate([state.ids, new_ids]),
        next_id=state.next_id + n_new,
        particle_arrays=arrays,
    )


def state_to_arrays(state) -> dict:
    """Flat dict of arrays for ``numpy.savez`` (see the module docstring)."""
    out = {
        "time": np.float64(state.time),
        "positions": state.positions,
        "velocities": state.velocities,
        "ids": state.ids,
        "next_id": np.int64(state.next_id),
        "removed": np.int64(state.removed),
    }
    for name, values in state.particle_arrays.items():
        out[f"p__{name}"] = values
    for name, value in state.scalars.items():
        out[f"s__{name}"] = np.float64(value)
    return out


def state_from_arrays(arrays, source="checkpoint") -> State:
    """Inverse of ``state_to_arrays``; ``arrays`` is a mapping such as an NpzFile."""
    try:
        state = State(
            time=float(arrays["time"]),
            positions=np.array(arrays["positions"], np.float64),
            velocities=np.array(arrays["velocities"], np.float64),
            ids=np.array(arrays["ids"], np.int64),
            next_id=int(arrays["next_id"]),
            removed=int(arrays["removed"]),
            particle_arrays={k[3:]: np.array(arrays[k]) for k in arrays.keys() if k.startswith("p__")},
            scalars={k[3:]: float(arrays[k]) for k in arrays.keys() if k.startswith("s__")},
        )
    except (KeyError, ValueError, TypeError) as exc:
        raise CacheError(f"{source}: not a valid state checkpoint ({exc}); delete it and bake again without --resume") from exc
    n = len(state.ids)
    if state.positions.shape != (n, 3) or state.velocities.shape != (n, 3) or any(
        len(v) != n for v in state.particle_arrays.values()
    ):
        raise CacheError(f"{source}: per-particle arrays disagree in length; delete it and bake again without --resume")
    return state
