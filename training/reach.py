"""Reach loss: the preview's own steps rolled with gradient, scored on positions (needs PyTorch).

The pushforward loss (training/pushforward.py) trains each step on its own: the target acceleration
lands the integrator on the reference's next frame, but the preview's step goes on after the
integrator (density relaxation, viscosity smoothing, hard constraints), and an error in one step
changes what the network sees in the next, which that loss never shows it. Here the model rolls
``reach`` frames forward from a state it reached itself, each step the preview's own
(``LearnedSolver.advance``), and the loss scores the frames along the way against the reference's,
in spacings: by the Chamfer distance of the two point sets (``score="chamfer"``, the measure the
tune card reports) or by each particle's squared distance from itself (``"distance"``). Its
gradient runs back through all the steps.

How the gradient crosses a step (values stay exactly the preview's):

- the graph (neighbour tables, features) is built in numpy by the preview from the state's values;
  ``GradientCore`` adds to those features their first-order change with the tensors' deviation
  from those values (``tangent_inputs``): offsets, distances and velocity differences of the
  fluid and boundary pairs, v_t, v_{t-1} and the SPH density ratio (its kernel derivative). The
  deviation is zero in value, so the network sees exactly the preview's inputs, and the gradient
  is that of the features with the neighbour tables held fixed (they are piecewise constant);
- the integrator (semi-implicit Euler) is written out in PyTorch on the network's output;
- what follows it (relaxation, smoothing, constraints) is passed straight through: the state
  after the step takes the preview's values, with the gradient of the integrated state
  (x = x_int + (x_preview - x_int) with the bracket held constant). The relaxation only moves
  compressed particles a little, so the identity is the first-order guess that costs nothing.

With ``reach`` = 1 this is the pushforward landing measured after the whole step (relaxation
and constraints included) instead of after the integrator.
"""

import numpy as np

from engine.kernels import kernel_derivative
from engine.learned.solver import PREVIOUS_VELOCITY

from .pushforward import TorchCore, push

#: Smallest pair distance (in R) a unit direction is taken from; padding entries have distance 0.
_SMALLEST_DISTANCE = 1e-6


class GradientCore(TorchCore):
    """A ``runtime.CoreRunner`` stand-in that runs the PyTorch model *with* gradient.

    Before each preview step set ``deviation`` to (dx, dv, dv_prev): (N, 3) float64 tensors in
    m and m/s, zero in value, whose gradient is that of the state the step starts from. ``run``
    keeps the network's output tensor in ``output`` and returns its value as numpy.
    """

    def __init__(self, model, contract, units=None):
        super().__init__(model)
        self.stats = {key: np.asarray(value, np.float64) for key, value in contract["normalisation"].items()}
        self.radius = float(contract["radius_spacings"])
        self.support = float(contract["density_support_spacings"])
        self.units = units
        self.deviation = None
        self.output = None

    def run(self, inputs, positions=None, cell=None) -> np.ndarray:
        from .model import INPUT_ORDER, as_tensors

        tensors = dict(zip(INPUT_ORDER, as_tensors(inputs)))
        if self.deviation is not None:
            tensors.update(tangent_inputs(inputs, self.deviation, self.units, self.stats, self.radius, self.support))
        self.output = self.model(*(tensors[name] for name in INPUT_ORDER))
        return self.output.detach().numpy()


def tangent_inputs(inputs, deviation, units, stats, radius, support) -> dict:
    """The normalised float inputs plus their first-order change with ``deviation`` (see the module docstring).

    Args:
        inputs: normalised core inputs (``features.normalise``) of the state's values.
        deviation: (dx, dv, dv_prev) (N, 3) float64 tensors, m and m/s, world frame.
        units: ``features.Units``. stats: the contract's normalisation (numpy). radius, support: R and
            H in spacings (the density gradient uses the fluid table, which is exact for H <= R).

    Returns:
        {"node_features", "edge_features", "boundary_features"}: float32 tensors, values equal to
        ``inputs``'.
    """
    import torch

    def raw(name, prefix) -> np.ndarray:
        return inputs[name].astype(np.float64) * stats[f"{prefix}_std"] + stats[f"{prefix}_mean"]

    rotation = torch.from_numpy(units.rotation.T.copy())
    dx, dv, dv_prev = deviation
    dx = (dx @ rotation) / units.spacing  # model frame, spacings
    dv = (dv @ rotation) / units.velocity
    dv_prev = (dv_prev @ rotation) / units.velocity

    index = torch.from_numpy(inputs["neighbour_index"])
    mask = inputs["neighbour_mask"].astype(np.float64)
    edge = raw("edge_features", "edge")
    distance = edge[..., 3]
    direction = torch.from_numpy(edge[..., 0:3] / np.maximum(distance, _SMALLEST_DISTANCE)[..., None] * mask[..., None])
    relative = dx[index] - dx[:, None, :]  # (N, K, 3) spacings
    stretch = (direction * relative).sum(-1)  # change of |x_j - x_i|, spacings
    edge_change = torch.cat([relative / radius, (stretch / radius)[..., None], dv[index] - dv[:, None, :]], dim=-1)
    edge_change = edge_change * torch.from_numpy(mask)[..., None] / torch.from_numpy(stats["edge_std"])
    slope = torch.from_numpy(kernel_derivative(distance * radius, support) * mask)
    density_change = (slope * stretch).sum(1)

    rows = torch.from_numpy(inputs["boundary_rows"])
    bmask = inputs["boundary_mask"].astype(np.float64)
    boundary = raw("boundary_features", "boundary")
    bdistance = boundary[..., 3]
    bdirection = torch.from_numpy(boundary[..., 0:3] / np.maximum(bdistance, _SMALLEST_DISTANCE)[..., None]
                                  * bmask[..., None])  # fmt: skip
    brelative = -dx[rows][:, None, :].expand(-1, bmask.shape[1], -1)  # walls do not follow the fluid's deviation
    bstretch = (bdirection * brelative).sum(-1)
    zeros3 = torch.zeros_like(brelative)
    bvelocity = -dv[rows][:, None, :].expand(-1, bmask.shape[1], -1)
    boundary_change = torch.cat([brelative / radius, (bstretch / radius)[..., None], zeros3, bvelocity,
                                 torch.zeros_like(bstretch)[..., None]], dim=-1)  # fmt: skip
    boundary_change = boundary_change * torch.from_numpy(bmask)[..., None] / torch.from_numpy(stats["boundary_std"])
    bslope = torch.from_numpy(kernel_derivative(bdistance * radius, support) * boundary[..., 10] * bmask)
    density_change = density_change.index_add(0, rows, (bslope * bstretch).sum(1))

    node_change = torch.cat([dv, dv_prev, density_change[:, None], torch.zeros_like(density_change)[:, None]], dim=1)
    node_change = node_change / torch.from_numpy(stats["node_std"])
    return {
        "node_features": torch.from_numpy(inputs["node_features"]) + node_change.float(),
        "edge_features": torch.from_numpy(inputs["edge_features"]) + edge_change.float(),
        "boundary_features": torch.from_numpy(inputs["boundary_features"]) + boundary_change.float(),
    }


def acceleration_tensor(output, stats, units) -> "torch.Tensor":
    """``features.acceleration_from_output`` in PyTorch: world-space accelerations (N, 3) m/s^2, float64."""
    import torch

    non_gravity = output.double() * torch.from_numpy(stats["target_std"]) + torch.from_numpy(stats["target_mean"])
    gravity_frame = non_gravity + torch.tensor([0.0, 0.0, -1.0], dtype=torch.float64)
    return units.g * (gravity_frame @ torch.from_numpy(units.rotation))


def reach_loss(stepper, core, shot, j, start, steps, score="chamfer") -> "torch.Tensor | None":
    """Mean over ``steps`` frames of the score (``score``: Chamfer distance [d] or mean squared distance
    [d^2] of each particle from itself) against the reference, rolled with gradient.

    The roll starts at frame position ``start`` from the state the model reaches in ``start - j``
    preview steps (no gradient) from the reference frame j, then takes ``steps`` preview steps with
    ``core`` (a ``GradientCore`` set as ``stepper.runner``). Scored: the particles of frame j that
    exist in each target frame. A step that removes or adds particles ends the roll there.
    Returns the loss tensor, or None when no particle has a target.
    """
    saved = stepper.runner
    stepper.runner = TorchCore(core.model)
    try:
        state = push(stepper, shot, j, start)
        stepper.runner = core
        return _roll(stepper, core, shot, j, start, steps, state, score)
    finally:
        stepper.runner = saved
        core.deviation = None


def _roll(stepper, core, shot, j, start, steps, state, score) -> "torch.Tensor | None":
    """``reach_loss`` after the push: ``steps`` preview steps with gradient from ``state``."""
    import torch

    core.units = shot.units
    d = shot.units.spacing
    x = torch.from_numpy(state.positions.astype(np.float64))
    v = torch.from_numpy(state.velocities.astype(np.float64))
    v_prev = torch.from_numpy(state.particle_arrays[PREVIOUS_VELOCITY].astype(np.float64))
    scored = np.isin(state.ids, shot.ids[j])
    losses = []
    for k in range(start, start + steps):
        core.deviation = (x - x.detach(), v - v.detach(), v_prev - v_prev.detach())
        following, _ = stepper.advance(state, shot.world, shot.times[k + 1])
        if not np.array_equal(following.ids, state.ids):
            break
        dt = following.time - state.time
        v_integrated = v + dt * acceleration_tensor(core.output, core.stats, shot.units)
        x_integrated = x + dt * v_integrated
        v_prev = v
        x = x_integrated + (torch.from_numpy(following.positions) - x_integrated.detach())
        v = v_integrated + (torch.from_numpy(following.velocities) - v_integrated.detach())
        state = following
        if score == "chamfer":
            chamfer = chamfer_tensor(x / d, shot.positions[k + 1] / d)
            if chamfer is not None:
                losses.append(chamfer)
            continue
        where = shot.lookup(k + 1, state.ids)
        chosen = np.flatnonzero((where >= 0) & scored)
        if len(chosen):
            truth = torch.from_numpy(shot.positions[k + 1][where[chosen]])
            losses.append((((x[chosen] - truth) / d) ** 2).sum(1).mean())
    return torch.stack(losses).mean() if losses else None


def chamfer_tensor(points, reference) -> "torch.Tensor | None":
    """``measures.chamfer_distance`` of the (N, 3) tensor ``points`` from the (M, 3) numpy ``reference``, as a
    tensor: 0.5 (mean_i |p_i - r_nn(i)| + mean_j |r_j - p_nn(j)|), the nearest partners found on the values
    (piecewise constant), so the gradient pulls each point toward its partner."""
    import torch
    from scipy.spatial import cKDTree

    if len(points) == 0 or len(reference) == 0:
        return None
    values = points.detach().numpy()
    to_reference = cKDTree(reference).query(values, k=1)[1]
    to_points = cKDTree(values).query(reference, k=1)[1]
    target = torch.from_numpy(reference)
    ahead = ((points - target[to_reference]) ** 2).sum(1).add(1e-12).sqrt().mean()
    behind = ((points[to_points] - target) ** 2).sum(1).add(1e-12).sqrt().mean()
    return 0.5 * (ahead + behind)


def train_on_reach(model, optimiser, pool, stepper, core, rng, batch, unroll, reach, last,
                   score="chamfer") -> "float | None":
    """One optimiser step on ``batch`` rolls: each picks a (shot, k) of ``pool``, pushes from the
    reference frame k - m (m uniform in 1..min(unroll, k); the first frame, k = 0, from the
    initial state) and rolls min(reach, last[shot] - k) frames with gradient (``reach_loss``),
    never past the frame position ``last[shot]`` (the last training target). Gradients clipped to
    norm 1, as ``train.train_step``. Returns the mean loss, or None."""
    import torch

    losses = []
    for i in rng.integers(0, len(pool), batch):
        shot, k = pool[i]
        m = int(rng.integers(min(1, k), min(unroll, k) + 1)) if unroll else 0
        loss = reach_loss(stepper, core, shot, k - m, k, min(reach, last[shot.name] - k), score)
        if loss is not None:
            losses.append(loss)
    if not losses:
        return None
    loss = torch.stack(losses).mean()
    optimiser.zero_grad()
    loss.backward()
    torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
    optimiser.step()
    return float(loss.detach())
