"""``LearnedSolver``: the learned preview behind ``--solver learned`` (Solver protocol, DEVELOPERS.md).

Each learned step (dt within the model's trained range, see below):

1. boundary particles of walls and colliders at t (``World.boundary_at``);
2. features from positions, v_t, v_{t-1} and dt (``features.build_graph``),
   normalised with the contract's statistics;
3. the ONNX core on onnxruntime (``runtime.CoreRunner``, tiled on
   large graphs, see ``runtime.MAX_CALL_SLOTS``) predicts the non-gravity acceleration;
4. semi-implicit Euler (``features.integrate``);
5. density relaxation (``relax.relax_density``): ``relax_iterations`` Jacobi
   iterations of a position-based density constraint on the step's own
   neighbour tables (found at the start of the step, distances recomputed);
   velocities take the same correction over dt, so x_{t+1} = x_t + dt v_{t+1}
   still holds as in training; then, for a viscosity above the model's trained
   range, the difference as XSPH velocity smoothing (``viscosity``);
6. the hard constraints (``World.enforce_bounds``: open faces remove particles,
   walls clamp, colliders push out), then stream emission over [t, t + dt)
   (``World.emit``), exactly as the reference solver does.

The learned step dt is a node feature, and the model is trained on a range
of steps [``step_froude_min``, ``step_froude``] sqrt(d/g) (its contract). A
frame interval T is split into n = ceil(T / step_max) equal steps, dt = T / n:
the fewest steps that stay inside the trained range from above. For T >=
step_max, dt >= step_max / 2, inside the range when it spans a factor 2 or
more; shorter frames (T < step_min: a coarse spacing at a high frame rate)
take one step of T, below the range, and ``LearnedStepStats.steps_below_range``
counts them. v_{t-1} is kept per particle in
``State.particle_arrays["learned_previous_velocity"]`` so a resumed bake is
identical to an uninterrupted one; newly emitted particles start with
v_{t-1} = v_t.

Frame attributes: ``density`` is the SPH estimate (cubic spline, H = 2 d,
fluid + Akinci boundary term; Monaghan 1992). ``pressure`` is an
equation-of-state *estimate*, not a solved pressure: p = c^2 max(rho - rho0, 0)
with c = 10 sqrt(g L) and L the bounds height (the weakly compressible
speed-of-sound rule c >= 10 U_max, Monaghan 1994, J. Comput. Phys. 110:399,
with U_max ~ sqrt(g L); from memory). The manifest settings say so.
"""

import dataclasses
import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from scipy.spatial import cKDTree

from ..errors import ModelError, SolverError
from . import features
from .contract import DEFAULT_MODEL_NAME, default_model_path, load_contract
from .relax import relax_density
from .viscosity import reference_substeps, smooth_velocities, smoothing_plan
from .runtime import DEFAULT_TILE_PARTICLES, CoreRunner

if TYPE_CHECKING:
    from ..state import State

PREVIOUS_VELOCITY = "learned_previous_velocity"

#: Density relaxation iterations after each learned step (bench/eval_learned.py, model card).
DEFAULT_RELAX_ITERATIONS = 5


def step_plan(interval, step_max) -> tuple[int, float]:
    """(n, dt) for a frame interval (s): n = ceil(interval / step_max) equal steps, dt = interval / n; (0, 0) if none."""
    if not interval > 0:
        return 0, 0.0
    count = max(1, math.ceil(interval / step_max - 1e-9))
    return count, interval / count


@dataclass(frozen=True)
class LearnedStepStats:
    """What one ``advance`` did; ``substeps`` is the number of learned steps.

    Wall seconds: ``neighbour_seconds`` the graph (neighbour search, features, normalisation),
    ``network_seconds`` the core (onnxruntime and tiling), ``relax_seconds`` the density
    relaxation, ``constraint_seconds`` the hard constraints and emission.
    """

    substeps: int
    time_step: float
    neighbour_seconds: float
    network_seconds: float
    relax_seconds: float
    constraint_seconds: float
    truncated_neighbour_rows: int
    steps_below_range: int = 0


def launch_speed(world) -> float:
    """The fastest liquid a shot starts or emits, m/s: fill velocities and stream speeds."""
    speeds = [float(stream.speed) for stream in world.streams]
    if len(world.initial_velocities):
        speeds.append(float(np.linalg.norm(world.initial_velocities, axis=1).max()))
    return max(speeds, default=0.0)


class LearnedSolver:
    """The learned preview (Solver protocol).

    Args:
        scene: accepted for the bake loop's uniform construction; unused.
        model: path of the .onnx model (its .json contract beside it); default
            ``models/preview-gn7.onnx``.
        threads: onnxruntime intra-op threads (2 measured best here), and the row blocks the density
            relaxation works on in parallel (``relax.relax_density``).
        tile_particles: run the core in tiles of this many receivers (None, the default:
            tiles sized by ``runtime.MAX_CALL_SLOTS`` and ``TILE_RECEIVER_SLOTS``; 0: never tile).
        relax_iterations: density relaxation iterations after each learned step (0: none).

    Raises:
        ModelError: model or contract missing, corrupt or mismatched (names the file and the fix).
    """

    name = "learned"

    def __init__(self, scene=None, model=None, threads=2, tile_particles=DEFAULT_TILE_PARTICLES,
                 relax_iterations=DEFAULT_RELAX_ITERATIONS):
        if int(relax_iterations) != relax_iterations or relax_iterations < 0:
            raise ValueError(f"relax_iterations {relax_iterations!r}: use a whole number >= 0 (0 turns relaxation off)")
        self.relax_iterations = int(relax_iterations)
        self.threads = int(threads)
        self.model_path = Path(model) if model is not None else default_model_path()
        if not self.model_path.exists() and self.model_path.suffix != ".json":
            contract_beside = self.model_path.with_suffix(".json")
            if not contract_beside.exists():
                raise ModelError(
                    f"model file {self.model_path}: not found; the learned preview needs the shipped model "
                    f"(models/{DEFAULT_MODEL_NAME}.onnx and .json) -- restore it from the repository, pass another "
                    "model, or make one with `python -m training.train` or `python -m engine tune` "
                    f"(models/{DEFAULT_MODEL_NAME}.md)"
                )
        self.contract, self.onnx_path = load_contract(self.model_path)
        self.stats = self.contract["normalisation"]
        self.runner = CoreRunner(self.onnx_path, self.contract["rounds"], threads, tile_particles)
        self.runner.warm_up()
        self._boundary_tree = None  # (positions, tree)

    # -- protocol

    def settings(self) -> dict:
        c = self.contract
        return {
            "method": "message-passing graph network preview (own design), onnxruntime CPU",
            "model": c["name"],
            "onnx_sha256": c["onnx_sha256"],
            "feature_version": c["feature_version"],
            "step_froude": c["step_froude"],
            "step_froude_min": c["step_froude_min"],
            "radius_spacings": c["radius_spacings"],
            "rounds": c["rounds"],
            "relax_iterations": self.relax_iterations,
            "relaxation": "Jacobi iterations of a position-based density constraint (compression only), "
                          "cubic spline H = 2 d, fluid + boundary, after each learned step",
            "constraints": "World.enforce_bounds after every step",
            "density": "SPH estimate, cubic spline H = 2 d, fluid + boundary",
            "pressure": "equation-of-state estimate c^2 max(rho - rho0, 0), c = 10 sqrt(g * bounds height); not solved",
        }

    def range_warnings(self, world) -> list[str]:
        """Named warnings for inputs outside what the model was trained on (empty when none).

        The network does not take the viscosity as an input: it moves like the reference bakes it
        was trained on, whose viscosities the contract records (``training.viscosity_range``;
        models without the record were trained at the scene default 0.02). A viscosity above
        that range is added beside the network as the reference's own XSPH smoothing
        (``viscosity``); one below it cannot be taken out. Frame intervals shorter than the
        trained step range are taken as one short step (``step_plan``). Liquid that starts faster
        (``launch_speed``) than any particle of the training bakes (``training.speed_range_froude``,
        in sqrt(g d); models without the record are not checked) is named too.
        """
        warnings = []
        trained = self.trained_viscosity_range()
        viscosity = float(world.viscosity)
        name = self.contract["name"]
        if viscosity > trained[1] + 1e-12:
            warnings.append(
                f"viscosity-outside-training: fluid.viscosity {viscosity:g} is above the {trained[0]:g}-{trained[1]:g} "
                f"the preview model {name} was trained on; the preview adds the difference as velocity smoothing "
                "beside the network, an approximation (bake with --solver sph for the final look)")
        elif viscosity < trained[0] - 1e-12:
            warnings.append(
                f"viscosity-outside-training: fluid.viscosity {viscosity:g} is below the {trained[0]:g}-{trained[1]:g} "
                f"the preview model {name} was trained on; the preview moves as at {trained[0]:g} "
                "(bake with --solver sph to see the setting's effect)")
        units = features.Units(world.particle_spacing, world.gravity)
        speed_range = self.contract.get("training", {}).get("speed_range_froude")
        launch = launch_speed(world)
        if speed_range and launch > (1 + 1e-9) * float(speed_range[1]) * units.velocity:
            warnings.append(
                f"speed-outside-training: liquid starts at {launch:.3g} m/s ({launch / units.velocity:.3g} sqrt(g d)), "
                f"faster than any the preview model {name} was trained on ({float(speed_range[1]):.3g} sqrt(g d)); "
                "a fast throw or jet may swell or slow in the preview (bake with --solver sph for the final look)")
        interval = 1.0 / world.fps
        step_min = self.contract["step_froude_min"] * units.time
        if interval < (1 - 1e-9) * step_min:
            warnings.append(
                f"step-below-training: a frame lasts {interval / units.time:.3g} sqrt(d/g), shorter than the "
                f"{self.contract['step_froude_min']:g} the model was trained from; raise the particle spacing or "
                "lower the frame rate, or bake with --solver sph")
        return warnings

    def start(self, world) -> "State":
        state = world.initial_state()
        arrays = dict(state.particle_arrays)
        arrays[PREVIOUS_VELOCITY] = state.velocities.copy()
        return dataclasses.replace(state, particle_arrays=arrays)

    def step_acceleration(self, state, world, units, time_step, timings=None) -> tuple[np.ndarray, features.Graph]:
        """World-space accelerations (N, 3) m/s^2 the model predicts for ``state`` and a step of
        ``time_step`` s; also returns the Graph. Adds the seconds spent on the graph
        ("neighbours": search and features) and on the core ("network") to ``timings``."""
        started = time.perf_counter()
        boundary = world.boundary_at(state.time)
        previous = state.particle_arrays.get(PREVIOUS_VELOCITY)
        if previous is None or previous.shape != state.velocities.shape:
            previous = state.velocities
        tree = None
        if len(boundary.positions):
            # The tree is over model-frame positions in spacings; build it from those.
            bx = units.to_model_vectors(boundary.positions) / units.spacing
            cached = self._boundary_tree
            if cached is not None and cached[0].shape == bx.shape and np.array_equal(cached[0], bx):
                tree = cached[1]
            else:
                tree = cKDTree(bx)
                self._boundary_tree = (bx, tree)
        c = self.contract
        graph = features.build_graph(
            state.positions, state.velocities, previous, boundary, units, c["radius_spacings"],
            c["density_support_spacings"], c["max_neighbours"], c["max_boundary_neighbours"], boundary_tree=tree,
            step_froude=time_step / units.time,
        )  # fmt: skip
        inputs = features.normalise(graph, self.stats, in_place=True)
        built = time.perf_counter()
        output = self.runner.run(inputs, state.positions / units.spacing, 4.0)
        if timings is not None:
            timings["neighbours"] += built - started
            timings["network"] += time.perf_counter() - built
        return features.acceleration_from_output(output, self.stats, units), graph

    def advance(self, state, world, t_end) -> tuple["State", LearnedStepStats]:
        """Learned steps from ``state.time`` to exactly ``t_end`` (see the module docstring).

        Raises:
            SolverError: t_end before state.time, or non-finite values after a step (names the step).
        """
        t, t_end = float(state.time), float(t_end)
        if t_end < t:
            raise SolverError(f"learned solver: asked to advance back in time from t = {t} s to {t_end} s; "
                              "frames must be baked in increasing order")
        units = features.Units(world.particle_spacing, world.gravity)
        count, dt = self.step_plan(t_end - t, units)
        step_min = self.contract["step_froude_min"] * units.time
        timings = {"neighbours": 0.0, "network": 0.0, "relax": 0.0, "constraints": 0.0}
        truncated = 0
        if PREVIOUS_VELOCITY not in state.particle_arrays:
            arrays = dict(state.particle_arrays)
            arrays[PREVIOUS_VELOCITY] = state.velocities.copy()
            state = dataclasses.replace(state, particle_arrays=arrays)
        for k in range(count):
            t_next = t_end if k == count - 1 else t + dt
            before = state.positions
            if state.count:
                accelerations, graph = self.step_acceleration(state, world, units, t_next - t, timings)
                truncated += graph.truncated_rows
                positions, velocities = features.integrate(state.positions, state.velocities, accelerations, t_next - t)
                boundary = world.boundary_at(state.time)
                if self.relax_iterations:
                    started = time.perf_counter()
                    relaxed = self.relax(positions, graph, boundary, units)
                    velocities = velocities + (relaxed - positions) / (t_next - t)
                    positions = relaxed
                    timings["relax"] += time.perf_counter() - started
                extra = max(0.0, float(world.viscosity) - self.trained_viscosity_range()[1])
                if extra > 0.0:
                    velocities = self.smooth(positions, velocities, graph, world, boundary, t_next - t, extra)
                del graph
                if not (np.isfinite(positions).all() and np.isfinite(velocities).all()):
                    bad = int(np.flatnonzero(~np.isfinite(positions).all(axis=1) | ~np.isfinite(velocities).all(axis=1))[0])
                    raise SolverError(
                        f"learned solver: step {k + 1} of {count} from t = {t:.6g} s produced non-finite values "
                        f"(particle id {int(state.ids[bad])}); the model left its trained range -- bake this shot "
                        "with --solver sph, or retrain with shots like it"
                    )
                arrays = dict(state.particle_arrays)
                arrays[PREVIOUS_VELOCITY] = state.velocities
                state = dataclasses.replace(state, time=t_next, positions=positions, velocities=velocities,
                                            particle_arrays=arrays)
            else:
                state = dataclasses.replace(state, time=t_next)
            started = time.perf_counter()
            state = world.enforce_bounds(state, previous=before)
            first_new = state.next_id
            state = world.emit(state, t, t_next)
            if state.next_id > first_new:
                arrays = dict(state.particle_arrays)
                fresh = state.ids >= first_new
                previous = arrays[PREVIOUS_VELOCITY].copy()
                previous[fresh] = state.velocities[fresh]
                arrays[PREVIOUS_VELOCITY] = previous
                state = dataclasses.replace(state, particle_arrays=arrays)
            timings["constraints"] += time.perf_counter() - started
            t = t_next
        stats = LearnedStepStats(substeps=count, time_step=dt, neighbour_seconds=timings["neighbours"],
                                 network_seconds=timings["network"], relax_seconds=timings["relax"],
                                 constraint_seconds=timings["constraints"],
                                 truncated_neighbour_rows=truncated,
                                 steps_below_range=count if dt < (1 - 1e-9) * step_min else 0)
        return state, stats

    def step_plan(self, interval, units) -> tuple[int, float]:
        """(n, dt): n = ceil(interval / step_max) equal learned steps of dt s (see the module docstring)."""
        return step_plan(interval, self.contract["step_froude"] * units.time)

    def trained_viscosity_range(self) -> tuple[float, float]:
        """(low, high) ``fluid.viscosity`` of the model's training bakes (contract record; models
        without it were trained at the scene default 0.02)."""
        low, high = self.contract.get("training", {}).get("viscosity_range") or (0.02, 0.02)
        return float(low), float(high)

    def smooth(self, positions, velocities, graph, world, boundary, step, epsilon) -> np.ndarray:
        """``velocities`` after the XSPH smoothing of ``epsilon`` over a learned step (``viscosity``),
        fluid pairs and the step's boundary particles (no-slip, as in the reference)."""
        solver = world.solver_settings
        substeps = reference_substeps(velocities, step, world.particle_spacing, solver.cfl_factor,
                                      solver.max_time_step)
        coefficient, passes = smoothing_plan(epsilon, substeps)
        d = world.particle_spacing
        wall = None
        if len(boundary.positions):
            wall = (graph.boundary_rows, boundary.positions / d, boundary.volumes / d**3, boundary.velocities,
                    graph.boundary_index, graph.boundary_mask)
        return smooth_velocities(positions / d, velocities, graph.neighbour_index,
                                 graph.neighbour_mask, coefficient, passes,
                                 support=self.contract["density_support_spacings"], wall=wall)

    def relax(self, positions, graph, boundary, units) -> np.ndarray:
        """``positions`` (N, 3) m after ``relax_iterations`` density iterations on ``graph``'s tables.

        The tables were found at the start of the step; pairs that came within
        the support during the step are missed (they sit at the edge of the
        kernel, where W is small), which is the price of not searching again.
        The tables hold pairs within the graph radius; with a density support
        wider than that radius (no shipped model) the relaxation would see
        only the nearer pairs.
        """
        d = units.spacing
        index, mask = graph.neighbour_index, graph.neighbour_mask
        if graph.truncated_rows:  # rows over the cap make the table one-sided; the relaxation needs both sides
            index, mask = features.symmetric_table(index, mask)
        relaxed = relax_density(positions / d, index, mask, boundary.positions / d,
                                boundary.volumes / d**3, graph.boundary_index, graph.boundary_mask,
                                iterations=self.relax_iterations, support=self.contract["density_support_spacings"],
                                boundary_rows=graph.boundary_rows, threads=self.threads)
        return relaxed * d

    def frame_attributes(self, state, world) -> dict:
        """``density`` (kg/m^3, SPH estimate) and ``pressure`` (Pa, equation-of-state estimate) per particle,
        and ``whitewater_neighbours``: the density's search (pairs and counts within H), which the bake
        passes on to the white-water measures (``engine.bake.frame_whitewater``) so a frame searches once."""
        from ..measures import sph_density

        boundary = world.boundary_at(state.time)
        density, counts, pairs = sph_density(state.positions, world.particle_spacing, world.rest_density,
                                             boundary.positions, boundary.volumes, with_pairs=True)
        height = float(world.upper[2] - world.lower[2])
        g = float(np.linalg.norm(world.gravity))
        sound = 10.0 * np.sqrt(max(g * height, 1e-12))
        pressure = sound**2 * np.maximum(density - world.rest_density, 0.0)
        return {"density": density, "pressure": pressure, "whitewater_neighbours": (pairs, counts)}
