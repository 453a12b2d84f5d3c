"""The scene file (``splashdraft-scene`` version 1): load, validate, save.

``load_scene(path)`` reads the JSON described in DEVELOPERS.md, reads every
referenced mesh and motion array, validates everything once, and returns a
frozen ``Scene``. Every problem is a ``SceneError`` (or ``MeshError`` for
geometry) whose message names the file, the field path or object, the bad value
and the fix, e.g. ``emitter "water_block": mesh is not closed (14 open edges);
close it or use it as a collider``.

Programs that build scenes without files call ``scene_from_dict(data,
base_dir)``. There (and only there) a mesh may be given inline as
``{"vertices": (V, 3), "triangles": (T, 3)}`` and ``transforms`` / deforming
``vertices`` as arrays instead of npz paths. ``save_scene`` writes such inline
arrays as npz files into ``meshes/`` beside the scene file, so a saved scene
always uses paths. Scene files on disk never contain inline arrays.

Dataclass fields follow the JSON keys, except ``Bounds.lower``/``upper`` for
``bounds.min``/``max``, ``Collider.frame_vertices`` for a deforming collider's
per-frame ``vertices`` array, and the ``*_file`` fields holding the paths as
written (None for inline data).

Load-time fixes (documented, not silent failures): a closed mesh wound inside
out (negative volume) is re-wound so its normals point out; a stream direction
is normalised.
"""

import dataclasses
import hashlib
import json
import math
import os
from dataclasses import dataclass
from typing import NoReturn, Optional

import numpy as np

from .boundary import FACE_NAMES
from .errors import MeshError, SceneError
from .geometry import check_mesh
from .inputs import LIMITS, MAX_ARRAY_ELEMENTS, read_json, read_npz, safe_name
from .particle_model import cfl_speed_limit
from .mesh_io import _checked_arrays, read_mesh, write_npz

FORMAT = "splashdraft-scene"
VERSION = 1

DEFAULT_GRAVITY = (0.0, 0.0, -9.81)
DEFAULT_FACES = {name: "wall" for name in FACE_NAMES} | {"z_max": "open"}
FACE_VALUES = ("wall", "open")
MOTIONS = ("static", "rigid", "deforming")

TOP_KEYS = ("format", "version", "name", "fps", "frame_start", "frame_end", "particle_spacing", "seed",
            "gravity", "fluid", "bounds", "solver", "budget", "emitters", "colliders")
TOP_REQUIRED = ("format", "version", "fps", "frame_start", "frame_end", "particle_spacing", "bounds", "emitters")
FILL_KEYS = ("name", "type", "mesh", "velocity", "jitter")
DISC_KEYS = ("name", "type", "shape", "center", "direction", "radius", "speed", "frame_start", "frame_end", "transforms")
MESH_STREAM_KEYS = ("name", "type", "shape", "mesh", "direction", "speed", "frame_start", "frame_end", "transforms")
COLLIDER_KEYS = ("name", "mesh", "motion", "transforms", "vertices", "friction")


# --------------------------------------------------------------------------- dataclasses


@dataclass(frozen=True)
class Fluid:
    rest_density: float = 1000.0  # kg/m^3
    viscosity: float = 0.02  # XSPH coefficient epsilon (dimensionless, per step)


@dataclass(frozen=True)
class Bounds:
    lower: np.ndarray  # (3,) metres, the JSON "min"
    upper: np.ndarray  # (3,) metres, the JSON "max"
    faces: dict  # face name (x_min .. z_max) -> "wall" | "open"


@dataclass(frozen=True)
class SolverSettings:
    cfl_factor: float = 0.4
    max_time_step: float = 0.004  # s
    min_time_step: float = 1e-5  # s
    density_tolerance: float = 0.0005  # average relative compression
    divergence_tolerance: float = 0.001
    max_iterations: int = 100


@dataclass(frozen=True)
class Budget:
    max_particles: int = 1_000_000


@dataclass(frozen=True)
class FillEmitter:
    """Liquid filling a closed mesh at t = 0."""

    name: str
    vertices: np.ndarray  # (V, 3) float64 world space, metres
    triangles: np.ndarray  # (T, 3) int64, outward winding
    velocity: np.ndarray  # (3,) m/s
    jitter: float = 0.0  # fraction of the spacing
    mesh_file: Optional[str] = None
    type: str = "fill"


@dataclass(frozen=True)
class StreamEmitter:
    """Liquid entering through a disc or a mesh surface during a frame window."""

    name: str
    shape: str  # "disc" | "mesh"
    direction: np.ndarray  # (3,) unit vector (object space when transforms are given)
    speed: float  # m/s
    frame_start: int
    frame_end: int
    center: Optional[np.ndarray] = None  # (3,) disc only
    radius: Optional[float] = None  # disc only, metres
    vertices: Optional[np.ndarray] = None  # mesh only, (V, 3)
    triangles: Optional[np.ndarray] = None  # mesh only, (T, 3)
    transforms: Optional[np.ndarray] = None  # (F, 4, 4) or None
    mesh_file: Optional[str] = None
    transforms_file: Optional[str] = None
    type: str = "stream"


@dataclass(frozen=True)
class Collider:
    """A solid the liquid cannot enter: static, rigidly moving or deforming."""

    name: str
    motion: str  # "static" | "rigid" | "deforming"
    vertices: np.ndarray  # (V, 3) from the mesh file (object space for rigid)
    triangles: np.ndarray  # (T, 3) int64
    is_closed: bool  # watertight with volume; otherwise a two-sided sheet
    friction: float = 0.0  # 0 = slip, 1 = tangential velocity matches the collider
    transforms: Optional[np.ndarray] = None  # rigid: (F, 4, 4)
    frame_vertices: Optional[np.ndarray] = None  # deforming: (F, V, 3)
    mesh_file: Optional[str] = None
    motion_file: Optional[str] = None


@dataclass(frozen=True)
class Scene:
    name: str
    fps: float
    frame_start: int
    frame_end: int
    particle_spacing: float  # metres
    seed: int
    gravity: np.ndarray  # (3,) m/s^2
    fluid: Fluid
    bounds: Bounds
    solver: SolverSettings
    budget: Budget
    emitters: tuple  # FillEmitter | StreamEmitter, in file order
    colliders: tuple  # Collider, in file order
    base_dir: str = "."
    source: Optional[str] = None  # the scene file, when loaded from one

    @property
    def fill_emitters(self) -> tuple[FillEmitter, ...]:
        return tuple(e for e in self.emitters if isinstance(e, FillEmitter))

    @property
    def stream_emitters(self) -> tuple[StreamEmitter, ...]:
        return tuple(e for e in self.emitters if isinstance(e, StreamEmitter))

    def time_of_frame(self, frame) -> float:
        """Simulated time in seconds of frame ``frame`` (frame_start is t = 0)."""
        return (frame - self.frame_start) / self.fps

    @property
    def end_time(self) -> float:
        """Simulated time of frame_end in seconds."""
        return self.time_of_frame(self.frame_end)


# --------------------------------------------------------------------------- validation helpers


class _Checker:
    """Turns a bad value into a SceneError naming the file, the field and the fix."""

    def __init__(self, source):
        self.source = source

    def fail(self, where, problem, fix, error=SceneError) -> NoReturn:
        raise error(f"{self.source}: {where}: {problem}; {fix}")

    def mapping(self, value, where) -> dict:
        if not isinstance(value, dict):
            self.fail(where, f"expected an object, got {_show(value)}", "write it as {...}")
        return value

    def keys(self, value, allowed, where, required=()) -> None:
        for key in value:
            if key not in allowed:
                self.fail(where, f'unknown key "{key}"', f"use only {', '.join(allowed)}")
        for key in required:
            if key not in value:
                self.fail(where, f'missing key "{key}"', f'add "{key}"')

    def number(self, value, where, minimum=None, exclusive=False, maximum=None, hint="") -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(where, f"expected a number, got {_show(value)}", f"give a number{hint}")
        try:
            value = float(value)
        except OverflowError:
            value = math.inf
        if not math.isfinite(value):
            self.fail(where, f"must be finite, got {value}", f"give a finite number{hint}")
        if minimum is not None and (value <= minimum if exclusive else value < minimum):
            relation = ">" if exclusive else ">="
            self.fail(where, f"must be {relation} {minimum:g}, got {value:g}", f"give a value {relation} {minimum:g}{hint}")
        if maximum is not None and value > maximum:
            self.fail(where, f"must be <= {maximum:g}, got {value:g}", f"give a value <= {maximum:g}{hint}")
        return value

    def ranged(self, value, where, limit, hint="") -> float:
        """A number within ``LIMITS[limit]`` (see DEVELOPERS.md, scene reference)."""
        low, high = LIMITS[limit]
        return self.number(value, where, low, maximum=high, hint=hint)

    def integer(self, value, where, minimum=None, maximum=None) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer() and abs(value) <= 2**53:
                value = int(value)
            else:
                self.fail(where, f"expected a whole number, got {_show(value)}", "give an integer")
        if minimum is not None and value < minimum:
            self.fail(where, f"must be >= {minimum}, got {_show(value)}", f"give an integer >= {minimum}")
        if maximum is not None and value > maximum:
            self.fail(where, f"must be <= {maximum}, got {_show(value)}", f"give an integer <= {maximum}")
        return int(value)

    def vector3(self, value, where, hint="", limit=None) -> np.ndarray:
        if not isinstance(value, (list, tuple, np.ndarray)) or len(value) != 3:
            self.fail(where, f"expected 3 numbers, got {_show(value)}", f"give [x, y, z]{hint}")
        if limit is not None:
            return np.array([self.ranged(v, f"{where}[{i}]", limit, hint=hint) for i, v in enumerate(value)], np.float64)
        return np.array([self.number(v, f"{where}[{i}]", hint=hint) for i, v in enumerate(value)], np.float64)

    def text(self, value, where) -> str:
        if not safe_name(value):
            self.fail(where, f"expected a name, got {_show(value)}",
                      "give 1 to 100 printable characters without / or \\")
        return value


def _show(value):
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > 10**30:
        return "an integer of more than 30 digits"
    try:
        text = json.dumps(value) if isinstance(value, (dict, list, str, int, float, bool, type(None))) else repr(value)
    except (ValueError, RecursionError):
        text = f"a {type(value).__name__}"
    return text if len(text) <= 60 else text[:57] + "..."


# --------------------------------------------------------------------------- loading


def load_scene(path) -> Scene:
    """Read, validate and resolve a scene file.

    Args:
        path: the scene JSON file; mesh and motion paths are relative to its folder.

    Returns:
        Scene with every mesh and motion array loaded.

    Raises:
        SceneError / MeshError naming the field or object and the fix.
    """
    path = os.fspath(path)
    if "\x00" in path or not os.path.isfile(path):
        raise SceneError(f"{path}: scene file not found; check the path")
    data = read_json(path, SceneError, "scene file", "fix the file (see the scene reference in DEVELOPERS.md)")
    return scene_from_dict(data, os.path.dirname(os.path.abspath(path)), source=path, allow_inline=False)


#: An emitter may start liquid at no more than this fraction of the speed at which the reference
#: solver's CFL step reaches ``solver.min_time_step`` (cfl_factor * spacing / min_time_step): above
#: it, a bake grinds through thousands of substeps per frame and ends in a runaway-velocity error
#: (found by tools/fuzz_inputs.py: a 1000 m/s stream at 3 cm took 4 s to fail on two frames).
EMITTER_SPEED_SHARE = 0.5


def _check_emitter_speeds(check, emitters, spacing, solver):
    limit = EMITTER_SPEED_SHARE * cfl_speed_limit(spacing, solver.cfl_factor, solver.min_time_step)
    for index, emitter in enumerate(emitters):
        speed = float(emitter.speed) if isinstance(emitter, StreamEmitter) else float(np.linalg.norm(emitter.velocity))
        if speed > limit:
            check.fail(f"emitters[{index}]", f'emitter "{emitter.name}" starts liquid at {speed:.4g} m/s, faster than the '
                       f"{limit:.4g} m/s the solver can follow at this particle_spacing and solver.min_time_step",
                       f"give a speed below {limit:.4g} m/s, or lower solver.min_time_step")


def scene_from_dict(data, base_dir=".", source=None, allow_inline=True) -> Scene:
    """Validate a scene given as a dict (the JSON structure) and resolve it.

    Args:
        data: the scene dict. With ``allow_inline`` a mesh may be
            {"vertices": (V, 3), "triangles": (T, 3)} and ``transforms`` or a
            deforming collider's ``vertices`` may be arrays instead of paths.
        base_dir: folder that relative paths are resolved against.
        source: name used in error messages (default "scene").
        allow_inline: accept inline arrays (programs) or only paths (files).

    Returns:
        Scene.
    """
    check = _Checker(source or "scene")
    check.mapping(data, "scene")
    check.keys(data, TOP_KEYS, "scene", TOP_REQUIRED)
    if data["format"] != FORMAT:
        check.fail("format", f"expected \"{FORMAT}\", got {_show(data['format'])}", "this is not a Splashdraft scene file")
    version = check.integer(data["version"], "version")
    if version != VERSION:
        fix = "update Splashdraft" if version > VERSION else f"re-export the scene as version {VERSION}"
        check.fail("version", f"unsupported version {version} (this engine reads version {VERSION})", fix)
    fps = check.number(data["fps"], "fps", 0.0, exclusive=True, hint=" (frames per second)")
    fps = check.ranged(fps, "fps", "fps", hint=" (frames per second)")
    frame_start = check.integer(data["frame_start"], "frame_start", *LIMITS["frame"])
    frame_end = check.integer(data["frame_end"], "frame_end", *LIMITS["frame"])
    if frame_end < frame_start:
        check.fail("frame_end", f"{frame_end} is before frame_start {frame_start}", "set frame_end >= frame_start")
    if frame_end - frame_start + 1 > LIMITS["frames"][1]:
        check.fail("frame_end", f"the shot has {frame_end - frame_start + 1:,} frames, more than {LIMITS['frames'][1]:,}",
                   "bake a shorter frame range")
    spacing = check.number(data["particle_spacing"], "particle_spacing", 0.0, exclusive=True, hint=" in metres")
    spacing = check.ranged(spacing, "particle_spacing", "particle_spacing", hint=" in metres")
    name = check.text(data.get("name", _default_name(source)), "name")
    seed = check.integer(data.get("seed", 0), "seed", *LIMITS["seed"])
    gravity = check.vector3(data.get("gravity", list(DEFAULT_GRAVITY)), "gravity", hint=" in m/s^2", limit="gravity")
    fluid = _fluid(check, data.get("fluid", {}))
    bounds = _bounds(check, data["bounds"], spacing)
    solver = _solver(check, data.get("solver", {}))
    budget = _budget(check, data.get("budget", {}))
    context = _Context(check, base_dir, allow_inline, spacing, frame_start, frame_end)
    emitters_data = data["emitters"]
    if not isinstance(emitters_data, list):
        check.fail("emitters", f"expected a list, got {_show(emitters_data)}", "write emitters as [...]")
    if not emitters_data:
        check.fail("emitters", "the scene has no emitters", "add a fill or stream emitter, or there is no liquid to simulate")
    colliders_data = data.get("colliders", [])
    if not isinstance(colliders_data, list):
        check.fail("colliders", f"expected a list, got {_show(colliders_data)}", "write colliders as [...]")
    names = {}
    emitters = []
    for index, item in enumerate(emitters_data):
        emitter = _emitter(context, item, f"emitters[{index}]")
        _claim_name(check, names, emitter.name, f"emitters[{index}]")
        emitters.append(emitter)
    _check_emitter_speeds(check, emitters, spacing, solver)
    colliders = []
    for index, item in enumerate(colliders_data):
        collider = _collider(context, item, f"colliders[{index}]")
        _claim_name(check, names, collider.name, f"colliders[{index}]")
        colliders.append(collider)
    return Scene(
        name=name, fps=fps, frame_start=frame_start, frame_end=frame_end, particle_spacing=spacing, seed=seed,
        gravity=gravity, fluid=fluid, bounds=bounds, solver=solver, budget=budget, emitters=tuple(emitters),
        colliders=tuple(colliders), base_dir=os.path.abspath(base_dir), source=source,
    )


def _default_name(source):
    if source:
        return os.path.splitext(os.path.basename(source))[0] or "scene"
    return "scene"


def _claim_name(check, names, name, where):
    if name in names:
        check.fail(f"{where}.name", f'"{name}" is already used by {names[name]}', "give every emitter and collider its own name")
    names[name] = where


def _fluid(check, value):
    check.mapping(value, "fluid")
    check.keys(value, ("rest_density", "viscosity"), "fluid")
    return Fluid(
        rest_density=check.ranged(check.number(value.get("rest_density", 1000.0), "fluid.rest_density", 0.0, exclusive=True),
                                  "fluid.rest_density", "rest_density", hint=" in kg/m^3"),
        viscosity=check.number(value.get("viscosity", 0.02), "fluid.viscosity", 0.0, maximum=1.0, hint=" (XSPH coefficient, 0.01-0.05 is usual)"),
    )


def _bounds(check, value, spacing):
    check.mapping(value, "bounds")
    check.keys(value, ("min", "max", "faces"), "bounds", ("min", "max"))
    lower = check.vector3(value["min"], "bounds.min", hint=" in metres", limit="coordinate")
    upper = check.vector3(value["max"], "bounds.max", hint=" in metres", limit="coordinate")
    for axis, label in enumerate("xyz"):
        if lower[axis] >= upper[axis]:
            check.fail("bounds", f"min {label} = {lower[axis]:g} is not below max {label} = {upper[axis]:g}",
                       "make every bounds.min coordinate smaller than bounds.max")
        if upper[axis] - lower[axis] < 2.0 * spacing:
            check.fail("bounds", f"the {label} extent {upper[axis] - lower[axis]:g} m is under two particle spacings ({2 * spacing:g} m)",
                       "enlarge the bounds or reduce particle_spacing")
    faces = dict(DEFAULT_FACES)
    given = value.get("faces", {})
    check.mapping(given, "bounds.faces")
    check.keys(given, FACE_NAMES, "bounds.faces")
    for face, kind in given.items():
        if kind not in FACE_VALUES:
            check.fail(f"bounds.faces.{face}", f"expected \"wall\" or \"open\", got {_show(kind)}", "use \"wall\" or \"open\"")
        faces[face] = kind
    return Bounds(lower=lower, upper=upper, faces=faces)


def _solver(check, value):
    check.mapping(value, "solver")
    names = [f.name for f in dataclasses.fields(SolverSettings)]
    check.keys(value, names, "solver")
    d = SolverSettings()
    settings = SolverSettings(
        cfl_factor=check.ranged(value.get("cfl_factor", d.cfl_factor), "solver.cfl_factor", "cfl_factor"),
        max_time_step=check.ranged(value.get("max_time_step", d.max_time_step), "solver.max_time_step", "time_step", hint=" in seconds"),
        min_time_step=check.ranged(value.get("min_time_step", d.min_time_step), "solver.min_time_step", "time_step", hint=" in seconds"),
        density_tolerance=check.ranged(value.get("density_tolerance", d.density_tolerance), "solver.density_tolerance", "tolerance"),
        divergence_tolerance=check.ranged(value.get("divergence_tolerance", d.divergence_tolerance), "solver.divergence_tolerance", "tolerance"),
        max_iterations=check.integer(value.get("max_iterations", d.max_iterations), "solver.max_iterations", *LIMITS["max_iterations"]),
    )
    if settings.min_time_step > settings.max_time_step:
        check.fail("solver.min_time_step", f"{settings.min_time_step:g} s exceeds max_time_step {settings.max_time_step:g} s",
                   "set min_time_step <= max_time_step")
    return settings


def _budget(check, value):
    check.mapping(value, "budget")
    check.keys(value, ("max_particles",), "budget")
    return Budget(max_particles=check.integer(value.get("max_particles", Budget.max_particles), "budget.max_particles", *LIMITS["max_particles"]))


@dataclass(frozen=True)
class _Context:
    check: _Checker
    base_dir: str
    allow_inline: bool
    spacing: float
    frame_start: int
    frame_end: int


def _emitter(context, item, where):
    check = context.check
    check.mapping(item, where)
    name = check.text(item.get("name"), f"{where}.name") if "name" in item else check.fail(where, 'missing key "name"', 'add "name"')
    label = f'emitter "{name}"'
    kind = item.get("type")
    if kind == "fill":
        check.keys(item, FILL_KEYS, label, ("mesh",))
        vertices, triangles, mesh_file = _mesh(context, item["mesh"], label)
        report = check_mesh(vertices, triangles)
        if report.open_edges or report.non_manifold_edges:
            problem = (f"mesh is not closed ({report.open_edges} open edges)" if report.open_edges
                       else f"mesh is not manifold ({report.non_manifold_edges} edges shared by more than two faces)")
            check.fail(label, problem, "close it or use it as a collider", MeshError)
        if abs(report.volume) <= 1e-12 * max(report.area, 1e-300) ** 1.5:
            check.fail(label, f"mesh has zero volume ({report.volume:.3g} m^3)", "give the fill a solid, closed mesh", MeshError)
        if report.volume < 0:
            triangles = triangles[:, ::-1].copy()
        jitter = check.number(item.get("jitter", 0.0), f"{label}: jitter", 0.0, maximum=0.49, hint=" (fraction of the spacing)")
        velocity = check.vector3(item.get("velocity", [0.0, 0.0, 0.0]), f"{label}: velocity", hint=" in m/s", limit="velocity")
        return FillEmitter(name=name, vertices=vertices, triangles=triangles, velocity=velocity, jitter=jitter, mesh_file=mesh_file)
    if kind != "stream":
        check.fail(f"{label}: type", f"expected \"fill\" or \"stream\", got {_show(kind)}", "use \"fill\" (a volume at the start) or \"stream\"")
    shape = item.get("shape", "disc")
    if shape not in ("disc", "mesh"):
        check.fail(f"{label}: shape", f"expected \"disc\" or \"mesh\", got {_show(shape)}", "use \"disc\" or \"mesh\"")
    if shape == "disc":
        check.keys(item, DISC_KEYS, label, ("center", "direction", "radius", "speed"))
    else:
        check.keys(item, MESH_STREAM_KEYS, label, ("mesh", "direction", "speed"))
    direction = check.vector3(item["direction"], f"{label}: direction", limit="direction")
    length = float(np.linalg.norm(direction))
    if length < 1e-6:
        problem = "is the zero vector" if length == 0 else f"has length {length:g}, too short to give a direction"
        check.fail(f"{label}: direction", problem,
                   "give the direction the liquid leaves in, e.g. [0, 0, -1]")
    speed = check.number(item["speed"], f"{label}: speed", 0.0, exclusive=True, hint=" in m/s")
    speed = check.ranged(speed, f"{label}: speed", "speed", hint=" in m/s")
    frame_start = check.integer(item.get("frame_start", context.frame_start), f"{label}: frame_start", *LIMITS["frame"])
    frame_end = check.integer(item.get("frame_end", context.frame_end), f"{label}: frame_end", *LIMITS["frame"])
    if frame_end < frame_start:
        check.fail(f"{label}: frame_end", f"{frame_end} is before frame_start {frame_start}", "set frame_end >= frame_start")
    transforms, transforms_file = _transforms(context, item.get("transforms"), label)
    fields = dict(name=name, shape=shape, direction=direction / length, speed=speed, frame_start=frame_start,
                  frame_end=frame_end, transforms=transforms, transforms_file=transforms_file)
    if shape == "disc":
        fields["center"] = check.vector3(item["center"], f"{label}: center", hint=" in metres", limit="coordinate")
        radius = check.number(item["radius"], f"{label}: radius", 0.0, exclusive=True, hint=" in metres")
        fields["radius"] = check.ranged(radius, f"{label}: radius", "radius", hint=" in metres")
    else:
        vertices, triangles, mesh_file = _mesh(context, item["mesh"], label)
        report = check_mesh(vertices, triangles)
        if not report.area > 0:
            check.fail(label, "mesh has no area", "give the stream a mesh with faces (a flat patch facing the direction)", MeshError)
        fields.update(vertices=vertices, triangles=triangles, mesh_file=mesh_file)
    return StreamEmitter(**fields)


def _collider(context, item, where):
    check = context.check
    check.mapping(item, where)
    name = check.text(item.get("name"), f"{where}.name") if "name" in item else check.fail(where, 'missing key "name"', 'add "name"')
    label = f'collider "{name}"'
    check.keys(item, COLLIDER_KEYS, label, ("mesh",))
    motion = item.get("motion", "static")
    if motion not in MOTIONS:
        check.fail(f"{label}: motion", f"expected one of {', '.join(MOTIONS)}, got {_show(motion)}", "pick static, rigid or deforming")
    friction = check.number(item.get("friction", 0.0), f"{label}: friction", 0.0, maximum=1.0, hint=" (0 slip .. 1 stick)")
    vertices, triangles, mesh_file = _mesh(context, item["mesh"], label)
    report = check_mesh(vertices, triangles)
    if not report.area > 0:
        check.fail(label, "mesh has no area (all faces degenerate)", "give the collider real faces", MeshError)
    is_closed = report.is_closed and abs(report.volume) > 1e-12 * report.area**1.5
    if is_closed and report.volume < 0:
        triangles = triangles[:, ::-1].copy()
    transforms = frame_vertices = motion_file = None
    if motion == "static":
        for key in ("transforms", "vertices"):
            if item.get(key) is not None:
                check.fail(label, f'a static collider takes no "{key}"', 'remove it or set "motion" to "rigid"/"deforming"')
    elif motion == "rigid":
        if item.get("vertices") is not None:
            check.fail(label, 'a rigid collider takes "transforms", not "vertices"', 'remove "vertices" or set "motion": "deforming"')
        if item.get("transforms") is None:
            check.fail(label, 'rigid motion needs "transforms"', "give an npz with array matrices (F, 4, 4) or set motion static")
        transforms, motion_file = _transforms(context, item["transforms"], label)
    else:
        if item.get("transforms") is not None:
            check.fail(label, 'a deforming collider takes "vertices", not "transforms"', 'remove "transforms" or set "motion": "rigid"')
        if item.get("vertices") is None:
            check.fail(label, 'deforming motion needs "vertices"', "give an npz with array vertices (F, V, 3) or set motion static")
        frame_vertices, motion_file = _frame_vertices(context, item["vertices"], label, len(vertices))
    return Collider(name=name, motion=motion, vertices=vertices, triangles=triangles, is_closed=bool(is_closed),
                    friction=friction, transforms=transforms, frame_vertices=frame_vertices, mesh_file=mesh_file,
                    motion_file=motion_file)


def _resolve(context, value, label, what):
    check = context.check
    if not isinstance(value, str) or not value or "\x00" in value or len(value) > 4096:
        check.fail(label, f"{what} must be a file path, got {_show(value)}", "give a path relative to the scene file")
    return os.path.join(context.base_dir, value)


def _mesh(context, value, label):
    """Read a mesh reference: a path, or (inline allowed) {"vertices", "triangles"}."""
    check = context.check
    if isinstance(value, dict) and context.allow_inline:
        check.keys(value, ("vertices", "triangles"), f"{label}: mesh", ("vertices", "triangles"))
        try:
            vertices = np.array(value["vertices"], np.float64)
            triangles = np.array(value["triangles"])
        except (TypeError, ValueError, OverflowError) as exc:
            check.fail(f"{label}: mesh", f"inline arrays are not numeric ({exc})", "give vertices (V, 3) and triangles (T, 3)", MeshError)
        mesh_file = None
        try:
            vertices, triangles = _checked_arrays("inline mesh", vertices, triangles)
        except MeshError as exc:
            raise MeshError(f"{check.source}: {label}: {exc}") from exc
    else:
        if isinstance(value, dict):
            check.fail(f"{label}: mesh", "inline meshes are not part of the scene file format", "save the mesh to a file and give its path")
        path = _resolve(context, value, f"{label}: mesh", "mesh")
        try:
            vertices, triangles = read_mesh(path)
        except MeshError as exc:
            raise MeshError(f"{check.source}: {label}: {exc}") from exc
        mesh_file = value
    bad = int(np.sum(~np.all(np.isfinite(vertices), axis=1)))
    if bad:
        check.fail(label, f"mesh has {bad} vertices with NaN or infinite coordinates", "fix or delete those vertices", MeshError)
    low, high = LIMITS["coordinate"]
    far = int(np.sum(np.any((vertices < low) | (vertices > high), axis=1)))
    if far:
        check.fail(label, f"mesh has {far} vertices farther than {high:g} m from the origin",
                   "model the shot near the origin in metres (apply the object's scale)", MeshError)
    if len(triangles) == 0:
        check.fail(label, "mesh has no faces", "give a mesh with triangles or polygons", MeshError)
    return vertices, triangles, mesh_file


def _array_source(context, value, label, key, what):
    """Load array ``key`` from an npz path, or take an inline array; returns (array, file or None)."""
    check = context.check
    if isinstance(value, str):
        path = _resolve(context, value, label, what)
        if not os.path.isfile(path):
            check.fail(label, f'{what} file "{value}" not found (looked for {path})', "export it there or fix the path")
        try:
            array = read_npz(path, (key,), SceneError, f'{what} file "{value}"', f'store the array under the name "{key}"')[key]
        except SceneError as exc:
            raise SceneError(f"{check.source}: {label}: {exc}") from None
        source = value
    elif context.allow_inline and isinstance(value, (list, tuple, np.ndarray)):
        try:
            array, source = np.asarray(value), None
        except (ValueError, TypeError) as exc:
            check.fail(label, f"{what} array is not numeric ({exc})", "give an array of floats")
        if array.size > MAX_ARRAY_ELEMENTS:
            check.fail(label, f"{what} array has {array.size:,} values", f"give at most {MAX_ARRAY_ELEMENTS:,}")
    else:
        check.fail(label, f"{what} must be an npz path, got {_show(value)}", "give a path relative to the scene file")
    if not np.issubdtype(array.dtype, np.number) or np.issubdtype(array.dtype, np.complexfloating):
        check.fail(label, f"{what} array has dtype {array.dtype}", "store floats")
    return np.array(array, np.float64), source


def _check_frames(check, label, frames, noun, bounds, not_finite, out_of_bounds):
    """The checks per-frame arrays (F, ...) share: at most the frame limit, finite, every entry within ``bounds``.
    ``not_finite`` and ``out_of_bounds[0]`` are messages with ``{frame}`` (and ``{high}``) to fill in."""
    if len(frames) > LIMITS["frames"][1]:
        check.fail(label, f"{noun} hold {len(frames):,} frames, more than {LIMITS['frames'][1]:,}", "store one per frame")
    axes = tuple(range(1, frames.ndim))
    if not np.all(np.isfinite(frames)):
        frame = int(np.argmax(~np.all(np.isfinite(frames), axis=axes)))
        check.fail(label, not_finite.format(frame=frame), "re-export the motion")
    low, high = bounds
    if np.any((frames < low) | (frames > high)):
        frame = int(np.argmax(np.any((frames < low) | (frames > high), axis=axes)))
        problem, fix = out_of_bounds
        check.fail(label, problem.format(frame=frame, high=high), fix)


def _transforms(context, value, label):
    if value is None:
        return None, None
    check = context.check
    matrices, source = _array_source(context, value, label, "matrices", "transforms")
    if matrices.ndim != 3 or matrices.shape[1:] != (4, 4) or len(matrices) == 0:
        check.fail(label, f"transforms have shape {matrices.shape}, expected (F, 4, 4) with F >= 1",
                   "store one 4x4 world matrix per frame from the scene's frame_start")
    _check_frames(check, label, matrices, "transforms", LIMITS["matrix"],
                  "transform {frame} has NaN or infinite entries",
                  ("transform {frame} has an entry beyond {high:g}", "keep translations and scales within the shot"))
    bottom = np.abs(matrices[:, 3, :] - np.array([0.0, 0.0, 0.0, 1.0])).max(axis=1)
    if np.any(bottom > 1e-9):
        frame = int(np.argmax(bottom > 1e-9))
        check.fail(label, f"transform {frame} has bottom row {matrices[frame, 3].tolist()}, not [0, 0, 0, 1]",
                   "store affine world matrices (column-vector convention, world = M @ [x, y, z, 1])")
    det = np.linalg.det(matrices[:, :3, :3])
    if np.any(det <= 1e-12):
        frame = int(np.argmax(det <= 1e-12))
        check.fail(label, f"transform {frame} is singular or mirrored (determinant {det[frame]:.3g})",
                   "apply negative or zero scale to the mesh instead")
    return matrices, source


def _frame_vertices(context, value, label, vertex_count):
    check = context.check
    frames, source = _array_source(context, value, label, "vertices", "vertices")
    if frames.ndim != 3 or frames.shape[2] != 3 or len(frames) == 0:
        check.fail(label, f"per-frame vertices have shape {frames.shape}, expected (F, V, 3)",
                   "store world-space vertices per frame from the scene's frame_start")
    if frames.shape[1] != vertex_count:
        check.fail(label, f"per-frame vertices have {frames.shape[1]} vertices but the mesh has {vertex_count}",
                   "export the per-frame vertices from the same mesh (same topology)")
    _check_frames(check, label, frames, "per-frame vertices", LIMITS["coordinate"],
                  "per-frame vertices of frame {frame} hold NaN or infinite values",
                  ("per-frame vertices of frame {frame} lie farther than {high:g} m from the origin",
                   "model the shot near the origin in metres"))
    return frames, source


# --------------------------------------------------------------------------- writing and hashing


def scene_to_dict(scene) -> dict:
    """The canonical JSON-able dict of a Scene (defaults written out; inline arrays as arrays).

    Inline arrays (``*_file`` None) stay numpy arrays; ``save_scene`` writes them out.
    """
    def vec(v) -> list[float]:
        return [float(x) for x in v]

    emitters = []
    for e in scene.emitters:
        if isinstance(e, FillEmitter):
            emitters.append({"name": e.name, "type": "fill", "mesh": e.mesh_file or _inline(e.vertices, e.triangles),
                             "velocity": vec(e.velocity), "jitter": e.jitter})
        else:
            item = {"name": e.name, "type": "stream", "shape": e.shape}
            if e.shape == "disc":
                item.update(center=vec(e.center), radius=e.radius)
            else:
                item["mesh"] = e.mesh_file or _inline(e.vertices, e.triangles)
            item.update(direction=vec(e.direction), speed=e.speed, frame_start=e.frame_start, frame_end=e.frame_end,
                        transforms=e.transforms_file if e.transforms is None or e.transforms_file else e.transforms)
            emitters.append(item)
    colliders = []
    for c in scene.colliders:
        item = {"name": c.name, "mesh": c.mesh_file or _inline(c.vertices, c.triangles), "motion": c.motion,
                "friction": c.friction}
        if c.motion == "rigid":
            item["transforms"] = c.motion_file or c.transforms
        elif c.motion == "deforming":
            item["vertices"] = c.motion_file or c.frame_vertices
        colliders.append(item)
    return {
        "format": FORMAT, "version": VERSION, "name": scene.name, "fps": scene.fps,
        "frame_start": scene.frame_start, "frame_end": scene.frame_end, "particle_spacing": scene.particle_spacing,
        "seed": scene.seed, "gravity": vec(scene.gravity),
        "fluid": dataclasses.asdict(scene.fluid),
        "bounds": {"min": vec(scene.bounds.lower), "max": vec(scene.bounds.upper), "faces": dict(scene.bounds.faces)},
        "solver": dataclasses.asdict(scene.solver), "budget": dataclasses.asdict(scene.budget),
        "emitters": emitters, "colliders": colliders,
    }


def _inline(vertices, triangles):
    return {"vertices": vertices, "triangles": triangles}


def save_scene(path, scene, mesh_folder="meshes") -> Scene:
    """Write a scene file (validated first) and any inline arrays as npz beside it.

    Args:
        path: the scene JSON file to write.
        scene: a Scene or a scene dict (inline arrays allowed; relative paths
            are relative to ``path``'s folder, or to the Scene's base_dir).
        mesh_folder: folder (relative to the scene file) for inline arrays, as
            ``<object>.npz``, ``<object>_transforms.npz``, ``<object>_vertices.npz``.

    Returns:
        The Scene as loaded back from the written file.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if isinstance(scene, Scene):
        data = scene_to_dict(scene)
        source_dir = scene.base_dir
    else:
        data = _deep_copy(scene)
        source_dir = folder
    # Validate in the source folder first (inline arrays allowed), so nothing is written for a bad scene.
    scene_from_dict(data, source_dir, source=path)
    os.makedirs(folder, exist_ok=True)
    for key in ("emitters", "colliders"):
        for item in data.get(key, []):
            if not isinstance(item, dict):
                continue
            stem = _safe_stem(str(item.get("name", key)))
            for field, suffix, array_key in (("mesh", "", None), ("transforms", "_transforms", "matrices"),
                                            ("vertices", "_vertices", "vertices")):
                value = item.get(field)
                if value is None:
                    continue
                if isinstance(value, str):
                    item[field] = _relative(os.path.join(source_dir, value), folder)
                    continue
                relative = f"{mesh_folder}/{stem}{suffix}.npz"
                target = os.path.join(folder, relative)
                if field == "mesh":
                    write_npz(target, value["vertices"], value["triangles"])
                else:
                    _write_array(target, array_key, value)
                item[field] = relative
    text = json.dumps(data, indent=2, default=_jsonable)
    temporary = f"{path}.{os.getpid()}.tmp"
    with open(temporary, "w", encoding="utf-8") as handle:
        handle.write(text + "\n")
    os.replace(temporary, path)
    return load_scene(path)


def _deep_copy(value):
    if isinstance(value, dict):
        return {k: _deep_copy(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_deep_copy(v) for v in value]
    return value


def _jsonable(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"cannot write {type(value).__name__} to a scene file")


def _safe_stem(name):
    stem = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)
    return stem or "object"


def _relative(target, folder):
    try:
        return os.path.relpath(os.path.abspath(target), folder).replace(os.sep, "/")
    except ValueError:  # a different drive on Windows
        return os.path.abspath(target)


def _write_array(target, key, array):
    os.makedirs(os.path.dirname(target), exist_ok=True)
    temporary = f"{target}.{os.getpid()}.tmp.npz"
    np.savez(temporary, **{key: np.asarray(array, np.float64)})
    os.replace(temporary, target)


def scene_hash(scene) -> str:
    """sha256 hex of the canonical scene JSON plus the bytes of every mesh and motion array.

    Args:
        scene: a scene file path or a Scene.

    The canonical JSON is ``scene_to_dict`` (defaults written out) with sorted
    keys and no whitespace, and with each mesh / motion reference replaced by
    a marker; the arrays themselves (as loaded: float64 vertices, int64
    triangles, float64 matrices or per-frame vertices) are hashed in scene
    order. So formatting, omitted defaults, file names and the mesh file
    format (OBJ, PLY, npz, inline) do not change the hash; any value does.
    """
    if not isinstance(scene, Scene):
        scene = load_scene(scene)
    data = scene_to_dict(scene)
    for key in ("emitters", "colliders"):
        for item in data[key]:
            for field_name in ("mesh", "transforms", "vertices"):
                if item.get(field_name) is not None:
                    item[field_name] = "<array>"
    arrays = []
    for obj in scene.emitters + scene.colliders:
        for name, dtype in (("vertices", np.float64), ("triangles", np.int64), ("transforms", np.float64),
                            ("frame_vertices", np.float64)):
            value = getattr(obj, name, None)
            if value is not None:
                arrays.append(np.ascontiguousarray(value, dtype))
    digest = hashlib.sha256(json.dumps(data, sort_keys=True, separators=(",", ":")).encode("utf-8"))
    for array in arrays:
        digest.update(str(array.shape).encode("ascii"))
        digest.update(array.tobytes())
    return digest.hexdigest()
