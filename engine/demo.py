"""The built-in demo shot: a block of water let go in an open-topped trough with a rough boulder.

Everything is generated here (no downloads, no artist data): the trough is
the scene's bounds box with walls on five sides and an open top; the
boulder is an icosphere whose vertices are pushed in and out along their
normals by a smooth random field (a sum of a few random plane waves on the
unit sphere, fixed seed), so it is closed, outward-wound and reproducible;
the water is a box-shaped fill emitter against the trough's far end. Let go
at t = 0, the block collapses, runs along the floor, breaks over the boulder
and climbs the opposite wall.

Presets (particle spacing, frames at 24 fps):

- ``full``: spacing 0.02 m, about 24k particles, frames 1..60 (2.5 s).
- ``small``: spacing 0.05 m, about 1.2k particles, frames 1..12; for tests
  and quick checks.
"""

import json
from pathlib import Path

import numpy as np

from .mesh_io import box_mesh, ico_sphere_mesh, write_obj

DEMO_NAME = "trough_boulder"
TROUGH_SIZE = (1.6, 0.6, 0.8)  # metres: length x width x height of the bounds
WATER_BLOCK = ((0.0, 0.0, 0.0), (0.6, 0.6, 0.62))  # corners, metres (against the x_min wall)
BOULDER_CENTER = (1.05, 0.3, 0.07)
BOULDER_RADIUS = 0.17
BOULDER_SEED = 20241
PRESETS = {
    "full": {"particle_spacing": 0.02, "frame_end": 60},
    "small": {"particle_spacing": 0.05, "frame_end": 12},
}


def boulder_mesh(center=BOULDER_CENTER, radius=BOULDER_RADIUS, roughness=0.18, subdivisions=3, seed=BOULDER_SEED) -> tuple[np.ndarray, np.ndarray]:
    """A rough boulder: icosphere radially displaced by a smooth random field.

    r(n) = radius * (1 + roughness * f(n)), f(n) = sum_k a_k sin(w_k d_k . n + phi_k) / sum_k a_k,
    with 6 random unit directions d_k, frequencies w_k in [1.5, 4.5], phases and
    amplitudes a_k ~ 1/w_k from ``numpy.random.default_rng(seed)``. |f| <= 1, so
    r > 0 for roughness < 1 and the surface stays closed and star-shaped.

    Returns:
        (vertices (V, 3) float64 m, triangles (T, 3) int64), outward winding.
    """
    unit_vertices, triangles = ico_sphere_mesh((0.0, 0.0, 0.0), 1.0, subdivisions)
    rng = np.random.default_rng(seed)
    directions = rng.normal(size=(6, 3))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    frequencies = rng.uniform(1.5, 4.5, size=6)
    phases = rng.uniform(0.0, 2.0 * np.pi, size=6)
    amplitudes = 1.0 / frequencies
    field = np.sin(unit_vertices @ directions.T * frequencies + phases) @ amplitudes / amplitudes.sum()
    # Squash slightly in z so the boulder sits like a rock rather than a ball.
    scale = np.array([1.0, 0.9, 0.75])
    vertices = unit_vertices * (radius * (1.0 + roughness * field))[:, None] * scale
    return vertices + np.asarray(center, np.float64), triangles


def demo_scene_dict(spacing=None, preset="full", frame_end=None) -> dict:
    """The demo scene as a ``splashdraft-scene`` dict (mesh paths relative to the scene folder)."""
    settings = dict(PRESETS[preset])
    if spacing is not None:
        settings["particle_spacing"] = float(spacing)
    if frame_end is not None:
        settings["frame_end"] = int(frame_end)
    return {
        "format": "splashdraft-scene",
        "version": 1,
        "name": DEMO_NAME,
        "fps": 24,
        "frame_start": 1,
        "frame_end": settings["frame_end"],
        "particle_spacing": settings["particle_spacing"],
        "seed": 0,
        "gravity": [0.0, 0.0, -9.81],
        "fluid": {"rest_density": 1000.0, "viscosity": 0.02},
        "bounds": {
            "min": [0.0, 0.0, 0.0],
            "max": list(TROUGH_SIZE),
            "faces": {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall",
                      "z_min": "wall", "z_max": "open"},
        },  # fmt: skip
        "budget": {"max_particles": 400000},
        "emitters": [
            {"name": "water_block", "type": "fill", "mesh": "meshes/water_block.obj", "velocity": [0.0, 0.0, 0.0]}
        ],
        "colliders": [{"name": "boulder", "mesh": "meshes/boulder.obj", "motion": "static", "friction": 0.0}],
    }


def write_demo_scene(folder, spacing=None, preset="full", frame_end=None) -> Path:
    """Write the demo scene (JSON + OBJ meshes) into ``folder``; returns the scene file path.

    Args:
        folder: output folder (created). Writes ``trough_boulder.json`` and
            ``meshes/water_block.obj``, ``meshes/boulder.obj``.
        spacing: particle spacing in metres (default: the preset's).
        preset: "full" or "small" (see the module docstring).
        frame_end: last frame (default: the preset's).
    """
    folder = Path(folder)
    (folder / "meshes").mkdir(parents=True, exist_ok=True)
    write_obj(folder / "meshes" / "water_block.obj", *box_mesh(*WATER_BLOCK))
    write_obj(folder / "meshes" / "boulder.obj", *boulder_mesh())
    scene_path = folder / f"{DEMO_NAME}.json"
    temporary = scene_path.with_name("." + scene_path.name + ".tmp")
    temporary.write_text(json.dumps(demo_scene_dict(spacing, preset, frame_end), indent=1) + "\n")
    temporary.replace(scene_path)
    return scene_path
