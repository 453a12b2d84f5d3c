"""Viscosity in the learned preview: the reference solver's XSPH smoothing, applied beside the network.

The network is trained on reference bakes at one viscosity (the contract's
``training.viscosity_range``); it does not take the setting as an input. So
that raising ``fluid.viscosity`` still does in the preview what it does in the
final bake, the stepper applies the part of the setting above the trained
range with the reference's own operator, XSPH (Monaghan 1989, "On the problem
of penetration in particle methods", J. Comput. Phys. 82:1-15):

    v_i += eps sum_j (m / rho0) (v_j - v_i) W_ij

(m / rho0 = 1 d^3 in spacing units; the reference uses m / rho_ij, equal at
rest density). The reference applies it once per substep; a learned step of
dt spans about n = dt / dt_ref of them, dt_ref the reference's CFL step
(cfl_factor d / max|v|, clipped to its max_time_step). Applying the operator n
times is replaced by ``applications`` passes with the per-pass coefficient
1 - (1 - eps)^(n / applications), which gives the same damping of the
smoothest velocity mode (the n-fold product of (1 - eps lambda) for lambda = 1).
Each pair term is added to both ends, so momentum is conserved exactly.

A setting below the trained range cannot be taken out of the network's motion
(the solver's range warning says so).
"""

import math

import numpy as np

from ..kernels import kernel
from ..particle_model import cfl_step

#: Smoothing passes per learned step (each one a sweep of the step's neighbour table).
APPLICATIONS = 2


def reference_substeps(velocities, step, spacing, cfl_factor, max_time_step) -> int:
    """About how many reference substeps a learned step of ``step`` seconds spans (>= 1)."""
    speed = float(np.sqrt(np.max(np.einsum("ij,ij->i", velocities, velocities)))) if len(velocities) else 0.0
    reference_step = cfl_step(speed, spacing, cfl_factor, max_time_step)
    return max(1, math.ceil(step / reference_step - 1e-9))


def smoothing_plan(epsilon, substeps, applications=APPLICATIONS) -> tuple[float, int]:
    """(coefficient, passes): ``passes`` = min(applications, substeps) XSPH passes whose per-pass
    coefficient stands for ``substeps`` passes of ``epsilon`` (module docstring); (0, 0) for none."""
    if epsilon <= 0.0:
        return 0.0, 0
    passes = min(applications, substeps)
    return 1.0 - (1.0 - min(epsilon, 1.0)) ** (substeps / passes), passes


def smooth_velocities(positions, velocities, neighbour_index, neighbour_mask, epsilon, passes, support=2.0,
                      wall=None) -> np.ndarray:
    """``velocities`` (N, 3) after ``passes`` XSPH passes of coefficient ``epsilon`` (module docstring).

    Args:
        positions: (N, 3) positions in spacings d.
        velocities: (N, 3) any velocity unit (returned in the same unit).
        neighbour_index, neighbour_mask: (N, K) the step's fluid neighbour table (padding masked).
        epsilon: per-pass coefficient in [0, 1].
        passes: number of passes (0 returns a copy).
        support: kernel support H in d.
        wall: optional (rows, boundary_positions, volumes, velocities, index, mask): fluid rows
            (Nb,), boundary particle positions (B, 3) in d, volumes V_b / d^3, velocities (B, 3),
            and the (Nb, Kb) boundary table of those rows; adds eps sum_b V_b (v_b - v_i) W_ib
            (the reference's no-slip walls and colliders).
    """
    v = np.array(velocities, np.float64).reshape(-1, 3)
    n = len(v)
    if n == 0 or passes <= 0 or epsilon <= 0.0:
        return v
    index = np.asarray(neighbour_index)
    real = (np.asarray(neighbour_mask) > 0) & (index > np.arange(n)[:, None])
    rows = np.broadcast_to(np.arange(n)[:, None], real.shape)[real]
    cols = index[real]
    x = np.asarray(positions, np.float64)
    distance = np.linalg.norm(x[rows] - x[cols], axis=1)
    weight = epsilon * kernel(distance, support)  # W in 1/d^3 times the volume 1 d^3
    if wall is not None:
        wall_rows, b_positions, b_volumes, b_velocities, b_index, b_mask = wall
        breal = np.asarray(b_mask) > 0
        owners = np.broadcast_to(np.asarray(wall_rows, np.int64)[:, None], breal.shape)[breal]
        others = np.asarray(b_index)[breal]
        b_distance = np.linalg.norm(x[owners] - np.asarray(b_positions, np.float64)[others], axis=1)
        b_weight = epsilon * np.asarray(b_volumes, np.float64)[others] * kernel(b_distance, support)
        b_velocity = np.asarray(b_velocities, np.float64)[others]
    for _ in range(passes):
        pull = (v[cols] - v[rows]) * weight[:, None]
        change = np.stack([np.bincount(rows, pull[:, c], n) - np.bincount(cols, pull[:, c], n) for c in range(3)],
                          axis=1)
        if wall is not None and len(owners):
            drag = (b_velocity - v[owners]) * b_weight[:, None]
            change += np.stack([np.bincount(owners, drag[:, c], n) for c in range(3)], axis=1)
        v = v + change
    return v
