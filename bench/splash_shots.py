"""The splash-shot suite's scenes: ordinary splash shots of our own invention, as scene dicts.

Each shot is sized in particle spacings d (default 2.5 cm) so one spacing
argument scales the whole suite. Tanks keep walls half a spacing outside the
liquid's lattice (fill lattices are cell centres (k + 1/2) d) and an open top.

- ``pour_steps``: a disc stream 0.6 m up pours down at 1.5 m/s onto a staircase.
- ``free_stream``: the same stream 1.6 m up in a tall tank, for 0.35 s: it meets nothing.
- ``throw_wall``: a ball of water 0.24 m across thrown at 3 m/s against a tank wall.
- ``ring_dam``: a 0.4 m water block released beside a ring-shaped obstacle.
- ``dam_column``: a plain dam break: a 0.6 m column, 0.3 m deep, released along a 1.6 m tank.
- ``drop_pool``: a ball dropped into a shallow pool.
- ``thin_glass``: a ball dropped into a glass whose walls are one spacing thick.
- ``sheet_drop``: a block falling onto a thin open sheet spanning the tank that sags (deforming collider).

``static`` tells whether every collider is static (energy can then only go down).
"""

import math

import numpy as np

from engine import mesh_io

SPACING = 0.025
GRAVITY = 9.81
SHOTS = ("pour_steps", "free_stream", "throw_wall", "ring_dam", "dam_column", "drop_pool", "thin_glass", "sheet_drop")

#: Shots whose liquid surges along +x over a floor at z = 0: the surge front is measured on them
#: (``bench.eval_learned``).
SURGE_SHOTS = ("ring_dam", "dam_column")


def _mesh(vertices_triangles):
    vertices, triangles = vertices_triangles
    return {"vertices": np.asarray(vertices, np.float64), "triangles": np.asarray(triangles, np.int64)}


def _tank(name, size_m, seconds, spacing, fps=48):
    half = 0.5 * spacing
    return {
        "format": "splashdraft-scene", "version": 1, "name": name,
        "fps": fps, "frame_start": 1, "frame_end": 1 + int(round(seconds * fps)),
        "particle_spacing": spacing, "seed": 0, "gravity": [0.0, 0.0, -GRAVITY],
        "fluid": {"rest_density": 1000.0, "viscosity": 0.02},
        "bounds": {"min": [-half] * 3, "max": [float(v) - half for v in size_m],
                   "faces": {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall",
                             "z_min": "wall", "z_max": "open"}},
        "emitters": [], "colliders": [],
    }  # fmt: skip


def _snap(value, spacing):
    """``value`` rounded to the lattice of cell faces k * spacing."""
    return round(value / spacing) * spacing


def _glass_mesh(center_xy, radius, height, wall, segments=32):
    """A closed cup: an outer cylinder of ``radius`` minus an inner one, floor ``wall`` thick, open top."""
    cx, cy = center_xy
    inner = radius - wall
    angles = np.linspace(0.0, 2.0 * math.pi, segments, endpoint=False)
    ring = np.stack([np.cos(angles), np.sin(angles)], axis=1)
    rings = [(radius, 0.0), (radius, height), (inner, height), (inner, wall)]
    vertices = [np.column_stack([cx + r * ring[:, 0], cy + r * ring[:, 1], np.full(segments, z)]) for r, z in rings]
    vertices = np.concatenate(vertices + [np.array([[cx, cy, 0.0], [cx, cy, wall]])])
    bottom, top = 4 * segments, 4 * segments + 1
    triangles = []
    for k in range(segments):
        n = (k + 1) % segments
        for level in range(3):  # outer side, rim, inner side: quads between consecutive rings
            a, b = level * segments + k, level * segments + n
            c, d = (level + 1) * segments + n, (level + 1) * segments + k
            triangles += [(a, b, c), (a, c, d)]
        triangles.append((bottom, n, k))  # outer floor, facing down
        triangles.append((top, 3 * segments + k, 3 * segments + n))  # inner floor, facing up
    return vertices, np.asarray(triangles, np.int64)


def shot(name, spacing=SPACING, seconds=None):
    """Scene dict of the suite shot ``name`` (see the module docstring)."""
    d = spacing
    if name in ("pour_steps", "free_stream"):
        free = name == "free_stream"  # a tall tank the stream does not reach the floor of in its 0.35 s
        scene = _tank(name, (0.9, 0.4, 1.8 if free else 0.8), (0.35 if free else 1.2) if seconds is None else seconds, d)
        if name == "pour_steps":
            for step in range(4):
                lo = np.array([0.3 + 0.15 * step, 0.0, 0.0]) - 0.5 * d
                hi = np.array([0.9, 0.4, 0.36 - 0.08 * step]) - 0.5 * d
                scene["colliders"].append({"name": f"step_{step}", "mesh": _mesh(mesh_io.box_mesh(lo, hi)),
                                           "motion": "static"})
        scene["emitters"].append({
            "name": "spout", "type": "stream", "shape": "disc", "center": [0.35, 0.2, 1.6 if free else 0.6],
            "direction": [0.0, 0.0, -1.0], "radius": 0.05, "speed": 1.5, "frame_start": 1,
            "frame_end": 1 + int(0.6 * scene["fps"])})  # fmt: skip
        return scene
    if name == "throw_wall":
        scene = _tank(name, (1.0, 0.5, 0.7), 1.0 if seconds is None else seconds, d)
        ball = mesh_io.ico_sphere_mesh((0.3, 0.25, 0.3), 0.12, 3)
        scene["emitters"].append({"name": "ball", "type": "fill", "mesh": _mesh(ball), "velocity": [3.0, 0.0, 0.5]})
        return scene
    if name == "ring_dam":
        scene = _tank(name, (0.9, 0.6, 0.7), 1.2 if seconds is None else seconds, d)
        ring = mesh_io.torus_mesh((0.55, 0.3, 0.07), 0.15, 0.05, 40, 16)
        scene["colliders"].append({"name": "ring", "mesh": _mesh(ring), "motion": "static"})
        block = mesh_io.box_mesh((0.0, 0.0, 0.0), (0.2, 0.6 - d, 0.4))
        scene["emitters"].append({"name": "block", "type": "fill", "mesh": _mesh(block)})
        return scene
    if name == "dam_column":
        scene = _tank(name, (1.6, 0.3, 0.8), 1.0 if seconds is None else seconds, d)
        column = mesh_io.box_mesh((0.0, 0.0, 0.0), (0.3, 0.3 - d, 0.6))
        scene["emitters"].append({"name": "column", "type": "fill", "mesh": _mesh(column)})
        return scene
    if name == "drop_pool":
        scene = _tank(name, (0.6, 0.4, 0.7), 1.0 if seconds is None else seconds, d)
        pool = mesh_io.box_mesh((0.0, 0.0, 0.0), (0.6 - d, 0.4 - d, 0.1))
        ball = mesh_io.ico_sphere_mesh((0.3, 0.2, 0.4), 0.08, 3)
        scene["emitters"] += [{"name": "pool", "type": "fill", "mesh": _mesh(pool)},
                              {"name": "ball", "type": "fill", "mesh": _mesh(ball), "velocity": [0.0, 0.0, -1.0]}]
        return scene
    if name == "thin_glass":
        scene = _tank(name, (0.5, 0.5, 0.8), 1.0 if seconds is None else seconds, d)
        glass = _glass_mesh((0.25 - 0.5 * d, 0.25 - 0.5 * d), 0.16, 0.3, d)
        scene["colliders"].append({"name": "glass", "mesh": _mesh(glass), "motion": "static"})
        ball = mesh_io.ico_sphere_mesh((0.25 - 0.5 * d, 0.25 - 0.5 * d, 0.5), 0.09, 3)
        scene["emitters"].append({"name": "ball", "type": "fill", "mesh": _mesh(ball), "velocity": [0.0, 0.0, -0.5]})
        return scene
    if name == "sheet_drop":
        seconds = 1.0 if seconds is None else seconds
        scene = _tank(name, (0.5, 0.4, 0.8), seconds, d)
        sheet_v, sheet_t = mesh_io.plane_mesh((0.25 - 0.5 * d, 0.2 - 0.5 * d, 0.3), (0.5 + d, 0.4 + d), (10, 8))
        frames = scene["frame_end"] - scene["frame_start"] + 1
        t = np.arange(frames) / scene["fps"]
        x = (sheet_v[:, 0] - sheet_v[:, 0].min()) / np.ptp(sheet_v[:, 0])
        y = (sheet_v[:, 1] - sheet_v[:, 1].min()) / np.ptp(sheet_v[:, 1])
        bulge = np.sin(math.pi * x) * np.sin(math.pi * y)  # zero at the edges
        sag = 0.08 * np.minimum(t / 0.8, 1.0)
        vertices = np.repeat(sheet_v[None], frames, axis=0)
        vertices[:, :, 2] -= sag[:, None] * bulge[None, :]
        scene["colliders"].append({"name": "sheet", "mesh": _mesh((sheet_v, sheet_t)), "motion": "deforming",
                                   "vertices": vertices})
        block = mesh_io.box_mesh((0.1, 0.1, 0.45), (0.35, 0.3, 0.6))
        scene["emitters"].append({"name": "block", "type": "fill", "mesh": _mesh(block)})
        return scene
    raise ValueError(f"unknown shot {name!r}; choose from {SHOTS}")
