"""Blender scene -> the engine's scene file (``splashdraft-scene`` v1) with its meshes.

Reads the role of every object (``Object.splashdraft.role``), samples the
evaluated world-space triangles of the role objects, decides each one's
motion (``motion.classify_motion``) and writes, into ``<version>/input/``:
``meshes/<name>.obj`` (world space at the first frame, metres), for moving
objects ``meshes/<name>_transforms.npz`` (``matrices``, (F, 4, 4)) or
``meshes/<name>_vertices.npz`` (``vertices``, (F, V, 3)), and last
``scene.json`` through the engine's own writer (``engine.scene.save_scene``),
which validates the whole scene here, in Blender's Python, before any worker starts.
"""

from pathlib import Path
from typing import NamedTuple

import bpy
import numpy as np

from ..engine.boundary import FACE_NAMES
from ..engine.cache import SCENE_FILE
from ..engine.scene import FORMAT, VERSION, Scene, save_scene
from . import motion
from .errors_ui import AddonError
from .versions import safe_name

MESH_FOLDER = "meshes"


def role_objects(scene) -> dict:
    """Objects of the scene with a role, grouped: {"FILL": [...], "STREAM": [...], "COLLIDER": [...], "BOUNDS": [...]}."""
    groups = {"FILL": [], "STREAM": [], "COLLIDER": [], "BOUNDS": []}
    for obj in scene.objects:
        role = obj.splashdraft.role
        if role in groups:
            groups[role].append(obj)
    for objects in groups.values():
        objects.sort(key=lambda o: o.name)
    return groups


def may_move(obj) -> bool:
    """True if anything on the object could move or deform it over time.

    Looks at animation data (actions, drivers), constraints, modifiers, shape
    keys and parents; the exporter then samples such objects every frame and
    lets the samples decide (a Bevel modifier alone does not make a collider
    deforming).
    """
    seen = set()
    while obj is not None and obj.name not in seen:
        seen.add(obj.name)
        anim = obj.animation_data
        if anim is not None and (anim.action is not None or len(anim.drivers) or len(anim.nla_tracks)):
            return True
        if len(obj.constraints) or len(obj.modifiers):
            return True
        data = getattr(obj, "data", None)
        if data is not None:
            if getattr(data, "shape_keys", None) is not None:
                return True
            data_anim = getattr(data, "animation_data", None)
            if data_anim is not None and (data_anim.action is not None or len(data_anim.drivers)):
                return True
        obj = obj.parent
    return False


def evaluated_geometry(obj, depsgraph) -> tuple:
    """Object-space vertices (V, 3) float32, triangles (T, 3) int32 and world matrix (4, 4) of the evaluated object.

    Raises:
        AddonError: the object has no mesh geometry after evaluation.
    """
    evaluated = obj.evaluated_get(depsgraph)
    try:
        mesh = evaluated.to_mesh()
    except RuntimeError as exc:
        raise AddonError(f'object "{obj.name}": cannot be turned into a mesh ({exc}); '
                         "give the role to a mesh object") from exc
    try:
        if mesh is None or len(mesh.vertices) == 0:
            raise AddonError(f'object "{obj.name}": has no vertices after its modifiers; '
                             "give it geometry or remove its role")
        vertices = np.empty(len(mesh.vertices) * 3, np.float32)
        mesh.attributes["position"].data.foreach_get("vector", vertices)
        triangles = np.empty(len(mesh.loop_triangles) * 3, np.int32)
        mesh.loop_triangles.foreach_get("vertices", triangles)
    finally:
        evaluated.to_mesh_clear()
    matrix = np.array(evaluated.matrix_world, np.float64)
    return vertices.reshape(-1, 3), triangles.reshape(-1, 3), matrix


def sample_objects(scene, objects, frames) -> dict:
    """Sample every object on every frame of ``frames``.

    Returns:
        {name: {"local": (F, V, 3) float32, "matrices": (F, 4, 4), "triangles": (T, 3)}}.

    Raises:
        AddonError: the vertex count of an object changes between frames.
    """
    samples = {obj.name: {"local": [], "matrices": [], "triangles": None} for obj in objects}
    if not objects:
        return samples
    original = (scene.frame_current, scene.frame_subframe)
    try:
        for frame in frames:
            scene.frame_set(frame)
            depsgraph = bpy.context.evaluated_depsgraph_get()
            for obj in objects:
                vertices, triangles, matrix = evaluated_geometry(obj, depsgraph)
                entry = samples[obj.name]
                if entry["triangles"] is None:
                    entry["triangles"] = triangles
                elif len(vertices) != len(entry["local"][0]) or len(triangles) != len(entry["triangles"]):
                    raise AddonError(
                        f'object "{obj.name}": its mesh changes from {len(entry["local"][0])} to {len(vertices)} '
                        f"vertices at frame {frame}; colliders and sources need the same topology on every frame "
                        "(apply or remove the modifier that rebuilds the mesh, e.g. Remesh)")
                entry["local"].append(vertices)
                entry["matrices"].append(matrix)
    finally:
        scene.frame_set(original[0], subframe=original[1])
    for entry in samples.values():
        entry["local"] = np.stack(entry["local"])
        entry["matrices"] = np.stack(entry["matrices"])
    return samples


def shot_fps(scene) -> float:
    fps = scene.render.fps / scene.render.fps_base
    return int(fps) if float(fps).is_integer() else float(fps)


def _unique_stem(name, used):
    stem = safe_name(name, "object")
    candidate, number = stem, 2
    while candidate.lower() in used:
        candidate, number = f"{stem}_{number}", number + 1
    used.add(candidate.lower())
    return candidate


def _checked_shot(scene, groups) -> tuple[int, int]:
    """The shot's (first, last) frame, once it has liquid, exactly one bounds object and a frame range;
    raises AddonError naming what is missing."""
    if not groups["FILL"] and not groups["STREAM"]:
        raise AddonError("the shot has no liquid: give at least one object the role Liquid fill or Liquid source")
    if not groups["BOUNDS"]:
        raise AddonError("the shot has no bounds: give one object (a box around the action) the role Shot bounds")
    if len(groups["BOUNDS"]) > 1:
        names = ", ".join(f'"{o.name}"' for o in groups["BOUNDS"])
        raise AddonError(f"several objects have the role Shot bounds ({names}); keep it on one of them")
    frame_start, frame_end = int(scene.frame_start), int(scene.frame_end)
    if frame_end < frame_start:
        raise AddonError(f"scene frame range {frame_start}..{frame_end} is empty; set End after Start")
    return frame_start, frame_end


def _box_bounds(box, entry, scale) -> dict:
    """The scene file's "bounds": the world box of the bounds object at the first frame (metres) and its sides."""
    world = motion.world_vertices(entry["local"][0], entry["matrices"][0]) * scale
    low, high = world.min(axis=0), world.max(axis=0)
    if np.any(high - low <= 0):
        raise AddonError(f'shot bounds "{box.name}": its box is flat ({(high - low).round(4).tolist()} m); '
                         "use an object with volume, e.g. a cube")
    return {"min": low.tolist(), "max": high.tolist(),
            "faces": {name: getattr(box.splashdraft, f"face_{name}") for name in FACE_NAMES}}


class Export(NamedTuple):
    """What ``build_scene`` wrote: the scene file, the dict written to it, and the engine's validated Scene."""

    path: Path
    data: dict
    scene: Scene


def build_scene(scene, input_dir) -> Export:
    """Write the scene file and meshes of ``scene``'s shot into ``input_dir`` and validate them with the engine.

    Args:
        scene: the bpy Scene with ``splashdraft`` settings and role objects.
        input_dir: folder to create (``<version>/input``).

    Returns:
        Export: the path of scene.json, the scene dict and the engine's Scene loaded from the file.

    Raises:
        AddonError naming the object or setting at fault (no fill or source, no bounds,
        a deforming source, changing topology).
        SceneError / MeshError (engine): the engine's validation refuses the exported scene
        (e.g. an open fill mesh, a source faster than the solver can follow).
    """
    shot = scene.splashdraft
    scale = float(scene.unit_settings.scale_length) or 1.0
    groups = role_objects(scene)
    frame_start, frame_end = _checked_shot(scene, groups)
    input_dir = Path(input_dir)
    mesh_dir = input_dir / MESH_FOLDER
    mesh_dir.mkdir(parents=True, exist_ok=True)
    files = _MeshFiles(mesh_dir, _sample_roles(scene, groups, frame_start, frame_end), scale)
    emitters = _emitters(groups, files, frame_start, frame_end, scale)
    colliders = _colliders(groups, files)
    box = groups["BOUNDS"][0]
    bounds = _box_bounds(box, files.samples[box.name], scale)

    spacing = float(shot.particle_spacing) * scale
    data = {
        "format": FORMAT, "version": VERSION,
        "name": safe_name(shot.shot_name or scene.name),
        "fps": shot_fps(scene), "frame_start": frame_start, "frame_end": frame_end,
        "particle_spacing": spacing,
        "seed": int(shot.seed),
        "gravity": [float(g) for g in shot.gravity],
        "fluid": {"viscosity": float(shot.viscosity)},
        "bounds": bounds,
        "budget": {"max_particles": int(shot.max_particles)},
        "emitters": emitters,
        "colliders": colliders,
    }
    scene_path = input_dir / SCENE_FILE
    return Export(scene_path, data, save_scene(scene_path, data))


def _sample_roles(scene, groups, frame_start, frame_end) -> dict:
    """``sample_objects`` of every role object: once at the first frame, or on every frame for a source
    or collider that may move (``may_move``)."""
    everyone = [o for objs in groups.values() for o in objs]
    moving = [o for o in groups["STREAM"] + groups["COLLIDER"] if may_move(o)]
    moving_names = {o.name for o in moving}
    still = [o for o in everyone if o.name not in moving_names]
    samples = sample_objects(scene, still, [frame_start])
    samples.update(sample_objects(scene, moving, list(range(frame_start, frame_end + 1))))
    return samples


class _MeshFiles:
    """Writes sampled objects into ``meshes/`` (world space, metres, a unique file stem each) and
    returns the paths as the scene file names them (relative to the scene file)."""

    def __init__(self, mesh_dir, samples, scale):
        self.mesh_dir, self.samples, self.scale = mesh_dir, samples, scale
        self.used = set()

    def mesh(self, obj) -> tuple[str, str]:
        """(stem, path) of the object's OBJ file at the first frame."""
        entry = self.samples[obj.name]
        stem = _unique_stem(obj.name, self.used)
        world0 = motion.world_vertices(entry["local"][0], entry["matrices"][0]) * self.scale
        motion.write_obj(self.mesh_dir / f"{stem}.obj", world0, entry["triangles"], name=stem)
        return stem, f"{MESH_FOLDER}/{stem}.obj"

    def motion_of(self, obj) -> str:
        """The object's motion over the shot, static, rigid or deforming (``motion.classify_motion``)."""
        entry = self.samples[obj.name]
        if len(entry["local"]) < 2:
            return "static"
        return motion.classify_motion(entry["local"], entry["matrices"])

    def transforms(self, obj, stem) -> str:
        """Path of the object's per-frame rigid transforms (relative to the first frame)."""
        matrices = motion.relative_matrices(self.samples[obj.name]["matrices"], self.scale)
        np.savez(self.mesh_dir / f"{stem}_transforms.npz", matrices=matrices)
        return f"{MESH_FOLDER}/{stem}_transforms.npz"

    def vertices(self, obj, stem) -> str:
        """Path of the object's per-frame world-space vertices."""
        entry = self.samples[obj.name]
        world = np.stack([motion.world_vertices(v, m) for v, m in zip(entry["local"], entry["matrices"])])
        np.savez(self.mesh_dir / f"{stem}_vertices.npz", vertices=(world * self.scale).astype(np.float32))
        return f"{MESH_FOLDER}/{stem}_vertices.npz"


def _emitters(groups, files, frame_start, frame_end, scale) -> list:
    """The scene file's "emitters": every liquid fill, then every liquid source (meshes written by ``files``).

    Raises:
        AddonError: a source with a zero direction, an empty frame range, or a changing shape.
    """
    emitters = []
    for obj in groups["FILL"]:
        _, path = files.mesh(obj)
        settings = obj.splashdraft
        emitters.append({"name": obj.name, "type": "fill", "mesh": path,
                         "velocity": [float(v) * scale for v in settings.fill_velocity],
                         "jitter": float(settings.fill_jitter)})
    for obj in groups["STREAM"]:
        stem, path = files.mesh(obj)
        settings = obj.splashdraft
        direction = np.array(settings.stream_direction, np.float64)
        if np.linalg.norm(direction) < 1e-9:
            raise AddonError(f'liquid source "{obj.name}": direction is zero; set a Direction')
        kind = files.motion_of(obj)
        if kind == "deforming":
            raise AddonError(f'liquid source "{obj.name}": its shape changes over the shot (modifiers or shape keys); '
                             "a source may only move rigidly: animate its transform instead")
        start, end = (settings.stream_frame_start, settings.stream_frame_end) if settings.use_stream_frames \
            else (frame_start, frame_end)
        if end < start:
            raise AddonError(f'liquid source "{obj.name}": frame range {start}..{end} is empty; set Until after From')
        emitters.append({"name": obj.name, "type": "stream", "shape": "mesh", "mesh": path,
                         "direction": (direction / np.linalg.norm(direction)).tolist(),
                         "speed": float(settings.stream_speed) * scale,
                         "frame_start": int(start), "frame_end": int(end),
                         "transforms": files.transforms(obj, stem) if kind == "rigid" else None})
    return emitters


def _colliders(groups, files) -> list:
    """The scene file's "colliders", each with its motion (meshes and motion arrays written by ``files``)."""
    colliders = []
    for obj in groups["COLLIDER"]:
        stem, path = files.mesh(obj)
        kind = files.motion_of(obj)
        entry = {"name": obj.name, "mesh": path, "motion": kind, "friction": float(obj.splashdraft.friction)}
        if kind == "rigid":
            entry["transforms"] = files.transforms(obj, stem)
        elif kind == "deforming":
            entry["vertices"] = files.vertices(obj, stem)
        colliders.append(entry)
    return colliders
