"""Pushforward samples: one-step targets from states the model itself made (needs PyTorch).

The preview is judged on a free rollout (its own errors fed back), but a one-step loss from the
reference's own state never shows the network those errors. The pushforward trick (Brandstetter,
Worrall & Welling 2022, "Message passing neural PDE solvers", ICLR) rolls the current model forward
m steps *without gradient* from a true frame and trains the next step from the state it reached:

1. ``true_state``: the reference at frame position j as a preview ``State`` (positions, v_j and
   v_{j-1} from the frames as ``dataset.Shot.history`` finds them, emitter counters as at t_j);
2. ``push``: m frames of the preview's own step (``LearnedSolver.advance``: features, the core,
   semi-implicit Euler, density relaxation, viscosity smoothing, hard constraints, emission), with
   the core run by the PyTorch model being trained (``TorchCore``) instead of onnxruntime;
3. ``pushforward_sample``: from the model-made state (x^, v^, v^_prev) at frame position k, the
   graph the preview would build, and the target acceleration that makes the preview's integrator
   (``features.integrate``: v' = v^ + dt a, x' = x^ + dt v') land on the reference's frame k + 1:

       a = (x_{k+1} - x^ - dt v^) / dt^2

   defined for the particles that exist in the start frame, the model-made state and frame k + 1
   (ids); particles born during the push have no target. With m = 0 this is the teacher-forced
   sample of ``dataset.make_sample`` without noise (there v^ = v_t and the target returns
   v_{t+1} = (x_{t+1} - x_t) / dt, the same landing).

Only the last step carries gradient; the push is the model's current behaviour, refreshed every
time a sample is drawn.
"""

import numpy as np

from engine.learned import features
from engine.learned.solver import PREVIOUS_VELOCITY, LearnedSolver
from engine.state import State


class TorchCore:
    """A ``runtime.CoreRunner`` stand-in that runs a PyTorch GraphCore without gradient (untiled)."""

    def __init__(self, model):
        self.model = model

    def run(self, inputs, positions=None, cell=None) -> np.ndarray:
        import torch

        from .model import as_tensors

        if len(inputs["node_features"]) == 0:
            return np.zeros((0, 3), np.float32)
        with torch.no_grad():
            return self.model(*as_tensors(inputs)).numpy()


def preview_stepper(model, onnx_path) -> LearnedSolver:
    """A ``LearnedSolver`` of the contract at ``onnx_path`` whose core is the PyTorch ``model``."""
    solver = LearnedSolver(model=onnx_path)
    solver.runner = TorchCore(model)
    return solver


def true_state(shot, j, stepper=None) -> State:
    """The reference frame at position j of ``shot`` as a preview State (velocity history from the frames).

    The shot's first frame at t = 0 is the scene's initial state, and with a ``stepper`` it is taken
    from the world as the preview's own bake takes it (``LearnedSolver.start``): the cache holds
    float32 positions, and a fill lattice has neighbour pairs exactly at the graph radius, so the
    rounded copy (3e-9 m off) built other neighbour tables and moved 0.14 spacings away from the
    preview's first step on a test shot.
    """
    if j == 0 and stepper is not None and shot.times[0] == 0.0 and shot.frames[0] == shot.scene.frame_start:
        return stepper.start(shot.world)
    positions, velocities, previous, _ = shot.history(j)
    time = shot.times[j]
    ids = shot.ids[j]
    scalars = {stream.key: float(stream.layers_before(time)) for stream in shot.world.streams} if j else {}
    return State(time=time, positions=positions.copy(), velocities=velocities.copy(), ids=ids.copy(),
                 next_id=int(ids.max()) + 1 if len(ids) else 0,
                 particle_arrays={PREVIOUS_VELOCITY: previous.copy()}, scalars=scalars)  # fmt: skip


def push(stepper, shot, j, k) -> State:
    """The preview's state at frame position k, rolled from the reference's frame j (k >= j)."""
    state = true_state(shot, j, stepper)
    for position in range(j + 1, k + 1):
        state, _ = stepper.advance(state, shot.world, shot.times[position])
    return state


def pushforward_sample(stepper, shot, j, k, config) -> tuple:
    """(Graph, target (N, 3) float32, mask (N,) bool, pushed State) for the step k -> k + 1 pushed from j.

    The target is in the core's unnormalised output units (``features.target_from_accelerations``);
    see the module docstring for the landing formula.
    """
    state = push(stepper, shot, j, k)
    units = shot.units
    dt = shot.times[k + 1] - shot.times[k]
    previous = state.particle_arrays[PREVIOUS_VELOCITY]
    graph = features.build_graph(
        state.positions, state.velocities, previous, shot.boundary(k), units, config["radius_spacings"],
        config["density_support_spacings"], config["max_neighbours"], config["max_boundary_neighbours"],
        step_froude=dt / units.time,
    )  # fmt: skip
    where = shot.lookup(k + 1, state.ids)
    mask = (where >= 0) & np.isin(state.ids, shot.ids[j])
    landing = shot.gather(k + 1, where, state.positions + dt * state.velocities)
    accelerations = (landing - state.positions - dt * state.velocities) / dt**2
    target = features.target_from_accelerations(accelerations, units).astype(np.float32)
    return graph, target, mask, state


def normalised_pushforward_sample(stepper, shot, j, k, config, stats) -> tuple:
    """``pushforward_sample`` normalised with ``stats`` as the training step takes it: (inputs, target, mask)."""
    graph, target, mask, _ = pushforward_sample(stepper, shot, j, k, config)
    inputs = features.normalise(graph, stats)
    target = ((target - stats["target_mean"]) / stats["target_std"]).astype(np.float32)
    return inputs, target, mask



def pushforward_pool(shots, keep) -> list:
    """[(shot, k)] of the steps k -> k + 1 with k + 1 before ``keep[shot.name]`` (the held-back tail)."""
    return [(shot, k) for shot in shots for k in range(0, keep[shot.name] - 1) if len(shot.ids[k])]


def train_on_pushforward(model, optimiser, pool, stepper, config, stats, rng, batch, unroll) -> tuple:
    """Pick ``batch`` (shot, k) entries of ``pool`` at random (with replacement), push each from the
    reference frame k - m (m uniform in 1..min(unroll, k); the first step, k = 0, from the initial
    state itself) and take one ``train.train_step`` on the pushed samples. Returns (the loss or
    None, the samples)."""
    from .train import train_step

    picks = rng.integers(0, len(pool), batch)
    samples = []
    for i in picks:
        shot, k = pool[i]
        m = int(rng.integers(min(1, k), min(unroll, k) + 1))
        samples.append(normalised_pushforward_sample(stepper, shot, k - m, k, config, stats))
    return train_step(model, optimiser, samples), samples
