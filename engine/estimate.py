"""Before a bake: particle count, memory, disk and a rough time, and the budget check.

Every figure here is an estimate, stated as such:

- particles: ``World.estimate_particles()["total"]`` (fill emitters plus
  everything the stream emitters add over the shot), boundary particles from ``boundary_at(0)``.
- memory: bytes per particle of the solver's arrays plus its neighbour lists,
  counted from the arrays the solvers keep (see ``MEMORY_MODEL``); a peak
  figure for one substep, not a measurement.
- disk: exact for a frame of N particles (PLY header + 36 bytes per particle,
  see ``engine.cache.FRAME_DTYPE``), times the frames baked, using the
  estimated particle count for every frame (an upper bound when particles
  leave through open faces).
- time: a start-up time plus, for every frame after the first, a per-frame overhead and
  substeps per frame from the CFL rule with a free-fall speed over the bounds height (the
  learned preview: its own steps per frame, from the shipped model's longest step,
  ``LearnedSolver.step_plan``) times particles, divided by a throughput in particle-steps per
  second. Throughput, overhead and start-up are this computer's, measured by a calibration bake or taken from the last
  finished bake (``engine.calibration``); where none was measured, the latest figure in
  ``bench/results/<solver>_throughput.json`` (key ``particle_substeps_per_second``) or a
  rough built-in constant, and the estimate says so.

CFL rule: dt <= cfl_factor * particle_spacing / |v|max (Bender & Koschier 2015,
"Divergence-Free Smoothed Particle Hydrodynamics", SCA; parameter from memory
[M] in docs/physics-references.md).
"""

import dataclasses
import json
import math
from pathlib import Path

import numpy as np

from .cache import FRAME_DTYPE, ply_header
from .errors import BudgetError
from .particle_model import cfl_step

#: Rough throughput, particle-steps per second on one process, used only where this computer was
#: never measured (engine.calibration): bakes of 1.5k-3k particles on 2 shared cores, 2026-12-04.
DEFAULT_THROUGHPUT = {"sph": 6.0e4, "learned": 1.0e4}

#: Bytes per fluid particle, per neighbour pair, and per boundary particle, by solver.
#: sph: State (positions, velocities 2x24, ids 8) + DFSPH per-particle float64 arrays
#: (density, alpha, kappa, drift, pressure, predicted velocity 24, accelerations 24)
#: = 144 B; per pair: two int64 indices, distance, kernel value, gradient (3) and the
#: difference vector (3) in float64 = 80 B; boundary: positions, velocities, normals,
#: volumes (80 B) + KD-tree (~32 B). learned: State + float32 features (~64 B) and
#: per pair the edge features and messages of the network (~16 float32 in and out).
MEMORY_MODEL = {
    "sph": {"per_particle": 144, "per_pair": 80, "per_boundary": 112, "neighbours": 45},
    "learned": {"per_particle": 120, "per_pair": 160, "per_boundary": 112, "neighbours": 45},
}


@dataclasses.dataclass(frozen=True)
class Estimate:
    """Result of ``estimate_scene``; sizes in bytes, times in seconds (all estimates)."""

    scene_name: str
    solver: str
    particles: int
    boundary_particles: int
    max_particles: int
    frames: int
    memory_bytes: int
    frame_bytes: int
    disk_bytes: int
    substeps_per_frame: int
    seconds_per_frame: float
    seconds: float
    throughput: float
    throughput_source: str
    startup_seconds: float = 0.0
    overhead_seconds: float = 0.0
    is_measured: bool = False

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


def frame_file_bytes(particles) -> int:
    """Exact size in bytes of one PLY frame with ``particles`` particles."""
    return len(ply_header(particles)) + FRAME_DTYPE.itemsize * int(particles)


def memory_bytes(particles, boundary_particles, solver="sph") -> int:
    """Estimated peak memory (bytes) of one substep (see ``MEMORY_MODEL``)."""
    model = MEMORY_MODEL.get(solver, MEMORY_MODEL["sph"])
    per_fluid = model["per_particle"] + model["neighbours"] * model["per_pair"]
    return int(particles * per_fluid + boundary_particles * model["per_boundary"])


def throughput(solver="sph", root=None) -> tuple[float, str]:
    """(particle-substeps per second, where the figure came from) from a benchmark's file or the constant."""
    root = Path(root) if root is not None else Path(__file__).resolve().parents[1]
    path = root / "bench" / "results" / f"{solver}_throughput.json"
    try:
        value = float(json.loads(path.read_text())["particle_substeps_per_second"])
        if value > 0 and math.isfinite(value):
            return value, str(path)
    except (OSError, ValueError, KeyError, TypeError):
        pass
    return DEFAULT_THROUGHPUT.get(solver, DEFAULT_THROUGHPUT["sph"]), "built-in rough constant"


def time_model(solver="sph", root=None) -> tuple[float, float, float, str, bool]:
    """(particle-steps per second, per-frame overhead s, start-up s, where they came from, measured here?).

    This computer's calibration (``engine.calibration.load``) first, then a benchmark's file, then
    the rough constant (overhead and start-up 0).
    """
    from . import calibration

    measured = calibration.load(solver)
    if measured is not None:
        when = measured["measured"][:10]
        return (measured["rate"], measured["overhead_seconds"], measured["startup_seconds"],
                f"measured on this computer ({measured['source']}{', ' + when if when else ''})", True)
    rate, source = throughput(solver, root)
    return rate, 0.0, 0.0, source, False


def substeps_per_frame(scene) -> int:
    """Substeps per frame from the CFL rule with the free-fall speed over the bounds height."""
    height = float(scene.bounds.upper[2] - scene.bounds.lower[2])
    gravity = math.sqrt(sum(g * g for g in scene.gravity))
    speed = max(math.sqrt(2.0 * gravity * max(height, 0.0)), 1e-9)
    for emitter in scene.emitters:
        speed = max(speed, float(getattr(emitter, "speed", 0.0) or 0.0))
    solver = scene.solver
    time_step = max(cfl_step(speed, scene.particle_spacing, solver.cfl_factor, solver.max_time_step),
                    solver.min_time_step)
    return max(1, math.ceil((1.0 / scene.fps) / time_step - 1e-9))


def count_particles(world) -> tuple[int, int]:
    """(fluid particles over the shot, boundary particles at t = 0) of a built world."""
    fluid = int(world.estimate_particles()["total"])
    boundary = int(len(world.boundary_at(0.0).positions))
    return fluid, boundary


def budget_limit(scene, max_particles=None) -> int:
    return int(max_particles) if max_particles is not None else int(scene.budget.max_particles)


def check_budget(scene, world, max_particles=None, particles=None) -> int:
    """Raise BudgetError when the scene's particle count exceeds its budget.

    Args:
        scene: the loaded Scene. world: its World (for the count).
        max_particles: override of ``scene.budget.max_particles`` (``--max-particles``).
        particles: a count already made (skips counting).

    Returns:
        the particle count.
    """
    if particles is None:
        particles, _ = count_particles(world)
    limit = budget_limit(scene, max_particles)
    if particles > limit:
        spacing = scene.particle_spacing
        coarser = spacing * (particles / limit) ** (1.0 / 3.0)
        raise BudgetError(
            f"scene {scene.name!r}: about {particles:,} particles exceed the budget of {limit:,}; "
            f"raise particle_spacing from {spacing:g} m to at least {coarser:.3g} m, "
            "or raise budget.max_particles in the scene (or --max-particles)"
        )
    return particles


#: Work bounds checked before anything is allocated (see ``check_work``): lattice candidates of the
#: fill meshes' boxes and boundary samples, each at most this many per budget particle, and an
#: absolute ceiling that keeps the largest allocation under about 2 GB.
WORK_PER_BUDGET_PARTICLE = 8
WORK_CEILING = 50_000_000


def work_bound(scene) -> dict:
    """Closed-form counts of the work a scene asks for, from the scene alone (nothing is built).

    Returns a dict:
        ``fluid``: fill volume / spacing^3 (each fill clipped to the bounds' volume) plus every stream's
        layer lattice size times its layer count; the built world's exact count is within a few surface
        cells of it. ``layers``: the most layers one stream emits. ``fill_candidates``: lattice points in
        the fill meshes' bounding boxes (what volume sampling allocates). ``boundary``: wall area and
        collider area / spacing^2 (what boundary sampling allocates, about).
    """
    from .geometry import check_mesh

    spacing = scene.particle_spacing
    extent = scene.bounds.upper - scene.bounds.lower
    bounds_volume = float(np.prod(extent))
    fluid = 0.0
    fill_candidates = 0.0
    for emitter in scene.fill_emitters:
        report = check_mesh(emitter.vertices, emitter.triangles)
        fluid += min(abs(report.volume), bounds_volume) / spacing**3
        box = emitter.vertices.max(axis=0) - emitter.vertices.min(axis=0)
        fill_candidates += float(np.prod(box / spacing + 2.0))
    layers = 0.0
    for stream in scene.stream_emitters:
        duration = (stream.frame_end + 1 - stream.frame_start) / scene.fps
        count = math.ceil(duration * stream.speed / spacing) + 1
        if stream.shape == "disc":
            points = (2 * math.floor(stream.radius / spacing) + 1) ** 2 * math.pi / 4
        else:
            points = check_mesh(stream.vertices, stream.triangles).area / spacing**2 + 1
        fluid += points * count
        layers = max(layers, count)
    boundary = 2.0 * (extent[0] * extent[1] + extent[1] * extent[2] + extent[0] * extent[2]) / spacing**2
    for collider in scene.colliders:
        boundary += check_mesh(collider.vertices, collider.triangles).area / spacing**2
    return {"fluid": fluid, "layers": layers, "fill_candidates": fill_candidates, "boundary": float(boundary)}


def check_work(scene, max_particles=None) -> dict:
    """Raise BudgetError before building anything when the scene's closed-form work exceeds the budget.

    The fluid count may exceed the budget four times here (it counts whole fill volumes and stream
    layers, an upper estimate; the exact check runs on the built world); lattice candidates and boundary samples by ``WORK_PER_BUDGET_PARTICLE``
    times, up to ``WORK_CEILING``. Stream layers are bounded by the fluid count (every layer holds
    at least one particle).
    """
    limit = budget_limit(scene, max_particles)
    work = work_bound(scene)
    spacing = scene.particle_spacing
    ceiling = min(WORK_PER_BUDGET_PARTICLE * limit + 1_000_000, WORK_CEILING)
    checks = (
        ("particles", work["fluid"], 4 * limit + 1_000_000, "raise particle_spacing or budget.max_particles", 1.0 / 3.0),
        ("stream layers", work["layers"], 4 * limit + 1_000_000, "shorten the streams' frame windows or lower their speed", 1.0),
        ("fill lattice points (the fill meshes' bounding boxes)", work["fill_candidates"], ceiling,
         "make the fill meshes smaller or raise particle_spacing", 1.0 / 3.0),
        ("boundary samples (bounds walls and colliders)", work["boundary"], ceiling,
         "shrink the bounds or colliders to the shot, or raise particle_spacing", 1.0 / 2.0),
    )  # fmt: skip
    for what, count, allowed, fix, power in checks:
        if count > allowed:
            coarser = spacing * (count / allowed) ** power
            raise BudgetError(
                f"scene {scene.name!r}: about {count:,.0f} {what} at spacing {spacing:g} m exceed what a budget of "
                f"{limit:,} particles allows ({allowed:,.0f}); {fix} (a spacing of at least {coarser:.3g} m)"
            )
    return work


def learned_steps_per_frame(scene, model=None) -> int:
    """Learned steps per frame: ceil(frame interval / the model's longest step).

    Read from the model's contract (``engine.solvers.model_contract``; no onnxruntime session).
    ``model`` None is the shipped model; if its contract is missing or fails its check this is 1
    (the bake itself then reports the model error). A named model that fails raises ModelError.
    """
    from .errors import ModelError
    from .learned.solver import step_plan
    from .solvers import model_contract

    try:
        contract = model_contract(model)[0]
    except ModelError:
        if model is not None:
            raise
        return 1
    try:
        step = float(contract["step_froude"]) * math.sqrt(scene.particle_spacing / math.dist(scene.gravity, (0, 0, 0)))
    except ZeroDivisionError:
        return 1
    return step_plan(1.0 / scene.fps, step)[0]


def estimate_scene(scene, solver="sph", max_particles=None, world=None, frames=None, model=None) -> Estimate:
    """Estimate a bake of ``scene`` with ``solver``; raises BudgetError over the budget.

    Args:
        scene: loaded Scene. solver: "sph" or "learned".
        model: the learned preview's model (``engine.solvers.find_model``'s forms); None: the shipped one.
        max_particles: budget override. world: a built World (built here if None).
        frames: number of frames to bake (default the whole shot).

    Returns:
        Estimate.
    """
    from .solvers import check_model_option

    check_model_option(solver, model)
    if world is None:
        from .world import build_world

        check_work(scene, max_particles)
        world = build_world(scene)
    particles, boundary = count_particles(world)
    check_budget(scene, world, max_particles=max_particles, particles=particles)
    frames = int(frames) if frames is not None else scene.frame_end - scene.frame_start + 1
    substeps = learned_steps_per_frame(scene, model) if solver == "learned" else substeps_per_frame(scene)
    rate, overhead, startup, source, is_measured = time_model(solver)
    per_frame = overhead + substeps * max(particles, 1) / rate
    frame_size = frame_file_bytes(particles)
    return Estimate(
        scene_name=scene.name, solver=solver, particles=particles, boundary_particles=boundary,
        max_particles=budget_limit(scene, max_particles), frames=frames,
        memory_bytes=memory_bytes(particles, boundary, solver), frame_bytes=frame_size,
        disk_bytes=frame_size * frames, substeps_per_frame=substeps, seconds_per_frame=per_frame,
        seconds=startup + per_frame * max(frames - 1, 0), throughput=rate, throughput_source=source,
        startup_seconds=startup, overhead_seconds=overhead, is_measured=is_measured,
    )  # fmt: skip


def format_bytes(count) -> str:
    """'1.2 MB' style (decimal units)."""
    count = float(count)
    for unit in ("B", "kB", "MB", "GB"):
        if count < 1000 or unit == "GB":
            return f"{count:.0f} {unit}" if unit == "B" else f"{count:.1f} {unit}"
        count /= 1000.0
    return f"{count:.1f} TB"


#: Lattice points sampled per fill mesh when counting liquid outside the bounds (``fill_outside_bounds``).
OUTSIDE_SAMPLES = 40_000


def fill_outside_bounds(scene, samples=OUTSIDE_SAMPLES) -> dict:
    """How much of each fill emitter the built world will drop: outside the bounds, or inside them
    but closer than the fill clearance to a wall face (``engine.world.FILL_CLEARANCE``).

    Counted on the particle lattice when the fill's bounding box holds at most about ``samples``
    lattice points; otherwise on a coarser lattice, whose fractions scale the fill's closed-form
    count (volume / spacing^3), so the cost does not grow as the spacing shrinks.

    Returns:
        dict name -> {"inside_mesh": particles of the fill, "outside_bounds": of those, outside the
        bounds box, "at_walls": inside it but within the clearance of a wall face} (estimates).
    """
    from .boundary import FACE_NAMES
    from .geometry import inside_closed_mesh, lattice_points, signed_volume
    from .world import FILL_CLEARANCE

    spacing = scene.particle_spacing
    lower, upper = scene.bounds.lower, scene.bounds.upper
    clearance = FILL_CLEARANCE * spacing
    inner_lower, inner_upper = np.array(lower, float), np.array(upper, float)
    for axis in range(3):
        if scene.bounds.faces[FACE_NAMES[2 * axis]] == "wall":
            inner_lower[axis] += clearance - 1e-9 * spacing
        if scene.bounds.faces[FACE_NAMES[2 * axis + 1]] == "wall":
            inner_upper[axis] -= clearance - 1e-9 * spacing
    result = {}
    for emitter in scene.fill_emitters:
        low, high = emitter.vertices.min(axis=0), emitter.vertices.max(axis=0)
        if np.all(low >= inner_lower) and np.all(high <= inner_upper):
            # Wholly inside the bounds and clear of the walls: nothing dropped, no sampling needed.
            volume = abs(signed_volume(emitter.vertices, emitter.triangles)) / spacing**3
            result[emitter.name] = {"inside_mesh": int(round(volume)), "outside_bounds": 0, "at_walls": 0}
            continue
        box_volume = float(np.prod(np.maximum(high - low, spacing)))
        step = max(spacing, (box_volume / samples) ** (1.0 / 3.0))
        points = lattice_points(low, high, step)
        inside = inside_closed_mesh(points, emitter.vertices, emitter.triangles) if len(points) else np.zeros(0, bool)
        outside = np.any((points <= lower) | (points >= upper), axis=1) & inside
        walls = np.any((points < inner_lower) | (points > inner_upper), axis=1) & inside & ~outside
        counts = np.array([np.count_nonzero(inside), np.count_nonzero(outside), np.count_nonzero(walls)], float)
        if step > spacing and counts[0]:
            counts = counts / counts[0] * abs(signed_volume(emitter.vertices, emitter.triangles)) / spacing**3
        result[emitter.name] = dict(zip(("inside_mesh", "outside_bounds", "at_walls"),
                                        (int(round(c)) for c in counts)))
    return result


def quick_estimate(scene, solver="sph", max_particles=None, model=None) -> tuple[Estimate, dict]:
    """The estimate in closed form, without building particles (well under a second at any spacing).

    Particles are ``work_bound``'s fluid count (fill volumes / spacing^3 plus the streams' layers)
    less the fill liquid the world drops outside the bounds and along the walls
    (``fill_outside_bounds``); boundary particles are wall and collider areas /
    spacing^2. Memory, disk and time follow ``estimate_scene``'s models; ``model`` as there.

    Returns:
        (Estimate, outside) with ``outside`` as from ``fill_outside_bounds``.

    Raises:
        BudgetError: over the budget (``check_work``, then the estimated count against the budget).
    """
    from .solvers import check_model_option

    check_model_option(solver, model)
    work = check_work(scene, max_particles)
    outside = fill_outside_bounds(scene)
    dropped = sum(entry["outside_bounds"] + entry["at_walls"] for entry in outside.values())
    particles = max(int(round(work["fluid"])) - dropped, 0)
    boundary = int(round(work["boundary"]))
    limit = budget_limit(scene, max_particles)
    if particles > limit:
        coarser = scene.particle_spacing * (particles / limit) ** (1.0 / 3.0)
        raise BudgetError(
            f"scene {scene.name!r}: about {particles:,} particles exceed the budget of {limit:,}; "
            f"use a particle spacing of at least {coarser:.3g} m or raise the budget"
        )
    frames = scene.frame_end - scene.frame_start + 1
    substeps = learned_steps_per_frame(scene, model) if solver == "learned" else substeps_per_frame(scene)
    rate, overhead, startup, source, is_measured = time_model(solver)
    per_frame = overhead + substeps * max(particles, 1) / rate
    frame_size = frame_file_bytes(particles)
    estimate = Estimate(
        scene_name=scene.name, solver=solver, particles=particles, boundary_particles=boundary,
        max_particles=limit, frames=frames, memory_bytes=memory_bytes(particles, boundary, solver),
        frame_bytes=frame_size, disk_bytes=frame_size * frames, substeps_per_frame=substeps,
        seconds_per_frame=per_frame, seconds=startup + per_frame * max(frames - 1, 0), throughput=rate,
        throughput_source=source, startup_seconds=startup, overhead_seconds=overhead, is_measured=is_measured,
    )  # fmt: skip
    return estimate, outside
