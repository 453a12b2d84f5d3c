"""Procedural training and held-out shots (our own simple scenes), as scene dicts.

Every shot is drawn from ``numpy.random.default_rng([family_seed, index])``,
so a shot is fully determined by (kind, index) and the seed recorded in the
data manifest. Sizes are in particle spacings d and converted to metres with
``TRAINING_SPACING``; the fps is chosen so one frame lasts ``frame_step``
sqrt(d/g) (``frame_rate_for_step``); the training takes learned steps of one
or more frames (training/dataset.py).

Training shots: a tank (walls, open top) with 0-2 static obstacles (boxes,
spheres, upright cylinders) and 1-3 liquid sources: blocks and balls dropped
from a height, thrown sideways, columns collapsing, a shallow pool at rest,
and a disc stream pouring in.

Held-out shots use shapes and motions that never occur in training: a ring
(torus) obstacle, a staircase, and a moving paddle (rigid animated collider).
"""

import math

import numpy as np

from engine import mesh_io

#: Particle spacing of the generated shots, m.
TRAINING_SPACING = 0.025
#: Frame interval of the generated shots in Froude time sqrt(d / g) (default; ``--frame-step``).
TARGET_STEP_FROUDE = 0.5
GRAVITY = 9.81

TRAIN_SEED = 20240611
HELDOUT_SEED = 77001


def frame_rate_for_step(spacing=TRAINING_SPACING, step_froude=TARGET_STEP_FROUDE, gravity=GRAVITY) -> tuple[int, float]:
    """Integer fps closest to one frame per ``step_froude`` sqrt(d/g), and the exact frame interval it gives."""
    tau = math.sqrt(spacing / gravity)
    fps = max(1, int(round(1.0 / (step_froude * tau))))
    return fps, 1.0 / (fps * tau)


def _mesh(vertices_triangles):
    vertices, triangles = vertices_triangles
    return {"vertices": np.asarray(vertices, np.float64), "triangles": np.asarray(triangles, np.int64)}


def _base(name, seed, size_m, duration_s, spacing, frame_step=TARGET_STEP_FROUDE):
    fps, _ = frame_rate_for_step(spacing, frame_step)
    return {
        "format": "splashdraft-scene", "version": 1, "name": name,
        "fps": fps, "frame_start": 1, "frame_end": 1 + int(round(duration_s * fps)),
        "particle_spacing": spacing, "seed": int(seed), "gravity": [0.0, 0.0, -GRAVITY],
        "fluid": {"rest_density": 1000.0, "viscosity": 0.02},
        # Walls sit half a spacing outside [0, size]: fill lattices are cell centres (k + 1/2) d, so
        # liquid placed from 0 starts one spacing from the wall particles (at half a spacing the
        # reference solver starts 65 % over-dense in corners and blows up).
        "bounds": {"min": [-0.5 * spacing] * 3, "max": [float(v) - 0.5 * spacing for v in size_m],
                   "faces": {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall",
                             "z_min": "wall", "z_max": "open"}},
        "emitters": [], "colliders": [],
    }  # fmt: skip


def _overlaps(lower, upper, boxes, gap):
    return any(np.all(lower < b_hi + gap) and np.all(upper > b_lo - gap) for b_lo, b_hi in boxes)


#: Training shot families, taken in turn by shot index (``training_scene``): the mixed tank of
#: obstacles and sources, fast throws at a wall, tall collapsing columns, thin-walled containers
#: (walls one spacing thick) filled and emptied by a thrown or falling body, and a box pushed
#: through a pool (a rigid collider moving at constant speed).
FAMILIES = ("mixed", "throw", "tall_column", "container", "pusher")


def training_scene(index, seed=TRAIN_SEED, spacing=TRAINING_SPACING, duration_s=2.0, max_particles=4500,
                   frame_step=TARGET_STEP_FROUDE) -> dict:
    """Scene dict of training shot ``index`` (inline meshes; see the module docstring and ``FAMILIES``).

    ``frame_step`` (sqrt(d/g)) sets the fps only; the shot's content does not depend on it.
    """
    family = FAMILIES[index % len(FAMILIES)]
    rng = np.random.default_rng([seed, index])
    if family != "mixed":
        return _family_scene(family, index, rng, seed, spacing, duration_s, max_particles, frame_step)
    return _mixed_scene(index, rng, seed, spacing, duration_s, max_particles, frame_step)


def _thin_box(lower, upper, wall):
    """An open-topped container (closed mesh): outer box minus inner box, walls ``wall`` thick."""
    lo, hi = np.asarray(lower, float), np.asarray(upper, float)
    outer = mesh_io.box_mesh(lo, hi)
    inner_lo, inner_hi = lo + [wall, wall, wall], hi - [wall, wall, 0.0]
    ov, ot = outer
    # Outer box with its top face replaced by a rim and the inner box inverted.
    iv, it = mesh_io.box_mesh(inner_lo, inner_hi + [0.0, 0.0, 0.0])
    vertices = np.concatenate([ov, iv])
    tol = 1e-9 * max(1.0, abs(hi[2]))
    top_outer = [k for k in range(len(ov)) if abs(ov[k][2] - hi[2]) <= tol]
    top_inner = [k + len(ov) for k in range(len(iv)) if abs(iv[k][2] - hi[2]) <= tol]
    keep_outer = [tri for tri in ot if not all(abs(ov[v][2] - hi[2]) <= tol for v in tri)]
    keep_inner = [tri[::-1] + len(ov) for tri in it if not all(abs(iv[v][2] - hi[2]) <= tol for v in tri)]
    centre = np.array([(lo[0] + hi[0]) / 2, (lo[1] + hi[1]) / 2])

    def ring(ids) -> list[int]:
        return sorted(ids, key=lambda k: math.atan2(vertices[k][1] - centre[1], vertices[k][0] - centre[0]))

    outer_ring, inner_ring = ring(top_outer), ring(top_inner)
    rim = []
    for a in range(4):
        b = (a + 1) % 4
        rim += [[outer_ring[a], outer_ring[b], inner_ring[b]], [outer_ring[a], inner_ring[b], inner_ring[a]]]
    triangles = np.concatenate([np.asarray(keep_outer), np.asarray(keep_inner), np.asarray(rim)])
    return vertices, triangles


def _family_scene(family, index, rng, seed, spacing, duration_s, max_particles, frame_step):
    d = spacing
    if family == "throw":  # a ball or block thrown at a wall, 3 to 12 sqrt(g d)
        size = np.array([rng.uniform(34, 44), rng.uniform(14, 22), rng.uniform(22, 30)])
        scene = _base(f"train_{index:04d}", seed * 1000 + index, size * d, duration_s, spacing, frame_step)
        r = rng.uniform(3.0, 5.5)
        centre = np.array([rng.uniform(r + 1, 12), rng.uniform(r + 1, size[1] - r - 2), rng.uniform(r + 2, size[2] - r - 6)])
        speed = rng.uniform(3.0, 12.0) * math.sqrt(GRAVITY * d)
        direction = np.array([1.0, rng.uniform(-0.3, 0.3), rng.uniform(-0.4, 0.4)])
        velocity = speed * direction / np.linalg.norm(direction)
        if rng.random() < 0.6:
            mesh = mesh_io.ico_sphere_mesh(centre * d, r * d, 3)
        else:
            mesh = mesh_io.box_mesh((centre - r * 0.8) * d, (centre + r * 0.8) * d)
        scene["emitters"].append({"name": "thrown", "type": "fill", "mesh": _mesh(mesh),
                                  "velocity": [float(v) for v in velocity]})
        if rng.random() < 0.5:  # a shallow pool it lands in
            pool = mesh_io.box_mesh((0.0, 0.0, 0.0), ((size[0] - 1) * d, (size[1] - 1) * d, rng.uniform(2, 4) * d))
            scene["emitters"].append({"name": "pool", "type": "fill", "mesh": _mesh(pool)})
        return scene
    if family == "tall_column":  # a column 15 to 60 spacings tall collapsing along the tank
        height = rng.uniform(15, 60)
        width = rng.uniform(4, 9)
        depth = rng.uniform(6, 12)
        size = np.array([rng.uniform(40, 60), depth + 1, height + 6])
        scene = _base(f"train_{index:04d}", seed * 1000 + index, size * d, duration_s, spacing, frame_step)
        width = min(width, max_particles / (depth * height))
        column = mesh_io.box_mesh((0.0, 0.0, 0.0), (width * d, depth * d, height * d))
        scene["emitters"].append({"name": "column", "type": "fill", "mesh": _mesh(column)})
        if rng.random() < 0.5:
            lo = np.array([rng.uniform(width + 8, size[0] - 8), -0.5, -0.5])
            hi = lo + [rng.uniform(2, 5), depth + 1, rng.uniform(2, 8)]
            scene["colliders"].append({"name": "block", "mesh": _mesh(mesh_io.box_mesh(lo * d, hi * d)), "motion": "static"})
        return scene
    if family == "container":  # a thin-walled container that liquid falls or is thrown into
        size = np.array([rng.uniform(28, 36), rng.uniform(20, 26), rng.uniform(28, 36)])
        scene = _base(f"train_{index:04d}", seed * 1000 + index, size * d, duration_s, spacing, frame_step)
        inner = np.array([rng.uniform(10, 16), rng.uniform(8, 14), rng.uniform(6, 12)])
        lo = np.array([rng.uniform(1, size[0] - inner[0] - 3), rng.uniform(1, size[1] - inner[1] - 3), -0.5])
        hi = lo + inner + [2.0, 2.0, 1.0]
        box = _thin_box(lo * d, hi * d, d)
        scene["colliders"].append({"name": "container", "mesh": _mesh(box), "motion": "static"})
        centre = (lo + hi) / 2
        r = rng.uniform(3.0, min(5.5, inner[0] / 2, inner[1] / 2))
        height = hi[2] + r + rng.uniform(2, 8)
        position = centre + [rng.uniform(-8, 8), 0.0, 0.0]
        position[2] = min(height, size[2] - r - 2)
        ball = mesh_io.ico_sphere_mesh(position * d, r * d, 3)
        velocity = [float(rng.uniform(-1, 1) * math.sqrt(GRAVITY * d)), 0.0, float(-rng.uniform(0, 3) * math.sqrt(GRAVITY * d))]
        scene["emitters"].append({"name": "falling", "type": "fill", "mesh": _mesh(ball), "velocity": velocity})
        return scene
    if family == "pusher":  # a box pushed through a pool at constant speed
        size = np.array([rng.uniform(36, 48), rng.uniform(12, 18), rng.uniform(18, 24)])
        scene = _base(f"train_{index:04d}", seed * 1000 + index, size * d, duration_s, spacing, frame_step)
        depth = min(rng.uniform(4, 8), max_particles / ((size[0] - 1) * (size[1] - 1)))
        pool = mesh_io.box_mesh((0.0, 0.0, 0.0), ((size[0] - 1) * d, (size[1] - 1) * d, depth * d))
        scene["emitters"].append({"name": "pool", "type": "fill", "mesh": _mesh(pool)})
        half = np.array([rng.uniform(1.0, 2.5), rng.uniform(3, (size[1] - 4) / 2), rng.uniform(4, 8)])
        box = mesh_io.box_mesh(-half * d, half * d)
        frames = scene["frame_end"] - scene["frame_start"] + 1
        t = np.arange(frames) / scene["fps"]
        speed = rng.uniform(1.0, 4.0) * math.sqrt(GRAVITY * d)
        x = (4.0 + half[0]) * d + speed * np.minimum(t, 0.8 * (size[0] - 12) * d / speed)
        matrices = np.tile(np.eye(4), (frames, 1, 1))
        matrices[:, 0, 3] = x
        matrices[:, 1, 3] = size[1] / 2 * d - 0.5 * d
        matrices[:, 2, 3] = (half[2] - 0.5 + rng.uniform(0, 2)) * d
        scene["colliders"].append({"name": "pusher", "mesh": _mesh(box), "motion": "rigid", "transforms": matrices})
        return scene
    raise ValueError(f"unknown training family {family!r}")


def _mixed_scene(index, rng, seed, spacing, duration_s, max_particles, frame_step):
    """The mixed family: a tank with 0-2 static obstacles and 1-3 sources (module docstring)."""
    d = spacing
    size = np.array([rng.uniform(22, 34), rng.uniform(12, 22), rng.uniform(24, 34)])  # in d
    scene = _base(f"train_{index:04d}", seed * 1000 + index, size * d, duration_s, spacing, frame_step)
    occupied = []  # (lower, upper) in d of obstacles and fills, to keep them apart
    for k in range(int(rng.integers(0, 3))):
        kind = rng.choice(["box", "sphere", "cylinder"])
        for _ in range(20):
            if kind == "box":
                half = rng.uniform([2, 2, 1.5], [5, 6, 5])
                center = np.array([rng.uniform(half[0] + 1, size[0] - half[0] - 1),
                                   rng.uniform(half[1] + 1, size[1] - half[1] - 1),
                                   half[2] + (0 if rng.random() < 0.6 else rng.uniform(0, 6))])
                lo, hi = center - half, center + half
                lo[2] = -0.5 if lo[2] < 0.01 else lo[2]  # rest on the floor (walls at -d/2)
            elif kind == "sphere":
                r = rng.uniform(2.5, 5)
                center = np.array([rng.uniform(r + 1, size[0] - r - 1), rng.uniform(r + 1, size[1] - r - 1),
                                   rng.uniform(r * 0.5, r + 6)])
                lo, hi = center - r, center + r
            else:
                r, h = rng.uniform(1.5, 4), rng.uniform(4, 14)
                center = np.array([rng.uniform(r + 1, size[0] - r - 1), rng.uniform(r + 1, size[1] - r - 1), h / 2])
                lo, hi = center - [r, r, h / 2], center + [r, r, h / 2]
            if not _overlaps(lo, hi, occupied, 1.0):
                break
        else:
            continue
        occupied.append((lo, hi))
        if kind == "box":
            mesh = mesh_io.box_mesh(lo * d, hi * d)
        elif kind == "sphere":
            mesh = mesh_io.ico_sphere_mesh(center * d, r * d, subdivisions=3)
        else:
            mesh = mesh_io.cylinder_mesh((center - [0, 0, 0.25]) * d, r * d, (h + 0.5) * d, segments=24)
        scene["colliders"].append({"name": f"obstacle_{k}", "mesh": _mesh(mesh), "motion": "static"})
    budget = max_particles
    sources = int(rng.integers(1, 4))
    if rng.random() < 0.35:  # a shallow pool at rest that the rest falls into
        depth = rng.uniform(2.5, 5)
        pool = (np.array([0.0, 0.0, 0.0]), np.array([size[0] - 1.0, size[1] - 1.0, depth]))
        count = np.prod(pool[1] - pool[0])
        if count < 0.6 * budget:
            scene["emitters"].append({"name": "pool", "type": "fill", "mesh": _mesh(mesh_io.box_mesh(pool[0] * d, pool[1] * d))})
            budget -= count
    for k in range(sources):
        kind = rng.choice(["block", "ball", "column", "stream"], p=[0.35, 0.25, 0.2, 0.2])
        if kind == "stream" and not any(e["type"] == "stream" for e in scene["emitters"]):
            r = rng.uniform(1.5, 3.0)
            center = np.array([rng.uniform(3, size[0] - 3), rng.uniform(3, size[1] - 3), rng.uniform(size[2] * 0.5, size[2] - 3)])
            direction = np.array([rng.uniform(-1, 1), rng.uniform(-0.5, 0.5), rng.uniform(-1, 0.2)])
            direction /= np.linalg.norm(direction)
            speed = rng.uniform(0.6, 1.6)
            fps = scene["fps"]
            seconds = min(rng.uniform(0.4, 1.2), budget / max(speed * math.pi * r * r / d, 1.0))
            if seconds < 0.1:
                continue
            scene["emitters"].append({
                "name": f"stream_{k}", "type": "stream", "shape": "disc", "center": (center * d).tolist(),
                "direction": direction.tolist(), "radius": r * d, "speed": speed,
                "frame_start": 1, "frame_end": 1 + int(seconds * fps)})  # fmt: skip
            budget -= speed * math.pi * r * r / d * seconds
            continue
        for _ in range(20):
            if kind == "block":
                half = rng.uniform([2.5, 2.5, 2.5], [7, 6, 7])
            elif kind == "ball":
                half = np.full(3, rng.uniform(3, 6))
            else:
                w = rng.uniform(3, 6)
                half = np.array([w, rng.uniform(3, min(8, size[1] / 2 - 1)), rng.uniform(6, 11)])
            half = np.minimum(half, size / 2 - 1.0)
            center = np.array([rng.uniform(half[0] + 0.8, size[0] - half[0] - 0.8),
                               rng.uniform(half[1] + 0.8, size[1] - half[1] - 0.8),
                               rng.uniform(half[2] + 0.8, max(half[2] + 0.9, size[2] - half[2] - 1.0))])
            if kind == "column":
                center[0] = half[0] if rng.random() < 0.5 else size[0] - 1.0 - half[0]
                center[2] = half[2]
            lo, hi = center - half, center + half
            if not _overlaps(lo, hi, occupied, 0.6):
                break
        else:
            continue
        volume = np.prod(2 * half) * (math.pi / 6 if kind == "ball" else 1.0)
        if volume > budget:
            continue
        budget -= volume
        occupied.append((lo, hi))
        speed = rng.uniform(0.0, 1.6) if kind != "column" else 0.0
        velocity = [rng.uniform(-1, 1) * speed, rng.uniform(-0.5, 0.5) * speed, rng.uniform(-1.0, 0.6) * speed]
        mesh = mesh_io.box_mesh(lo * d, hi * d) if kind != "ball" else mesh_io.ico_sphere_mesh(center * d, half[0] * d, 3)
        scene["emitters"].append({"name": f"{kind}_{k}", "type": "fill", "mesh": _mesh(mesh),
                                  "velocity": [float(v) for v in velocity], "jitter": 0.0})
    if not scene["emitters"]:  # always have some liquid
        lo, hi = np.array([1.0, 1.0, 1.0]), np.array([8.0, size[1] - 1, 10.0])
        scene["emitters"].append({"name": "block_fallback", "type": "fill", "mesh": _mesh(mesh_io.box_mesh(lo * d, hi * d))})
    return scene


HELDOUT_KINDS = ("ring", "stairs", "paddle")


def heldout_scene(kind, seed=HELDOUT_SEED, spacing=TRAINING_SPACING, duration_s=10.0) -> dict:
    """Held-out shot dict: ``ring`` (torus obstacle), ``stairs`` (a staircase), ``paddle`` (moving rigid collider)."""
    rng = np.random.default_rng([seed, HELDOUT_KINDS.index(kind)])
    d = spacing
    if kind == "ring":
        size = np.array([30.0, 24.0, 30.0])
        scene = _base("heldout_ring", seed, size * d, duration_s, spacing)
        ring = mesh_io.torus_mesh((15 * d, 12 * d, 6 * d), 6.5 * d, 2.2 * d, 40, 16)
        scene["colliders"].append({"name": "ring", "mesh": _mesh(ring), "motion": "static"})
        ball = mesh_io.ico_sphere_mesh((15 * d + rng.uniform(-1, 1) * d, 12 * d, 20 * d), 5.5 * d, 3)
        scene["emitters"].append({"name": "ball", "type": "fill", "mesh": _mesh(ball), "velocity": [0.3, 0.0, -0.5]})
        return scene
    if kind == "stairs":
        size = np.array([34.0, 14.0, 28.0])
        scene = _base("heldout_stairs", seed, size * d, duration_s, spacing)
        for step in range(4):
            lo = np.array([12.0 + 5.0 * step, -0.5, -0.5]) * d
            hi = np.array([33.5, 13.5, 12.0 - 3.0 * step]) * d
            scene["colliders"].append({"name": f"step_{step}", "mesh": _mesh(mesh_io.box_mesh(lo, hi)), "motion": "static"})
        block = mesh_io.box_mesh(np.array([0.0, 0.0, 0.0]) * d, np.array([10.0, 13.0, 20.0]) * d)
        scene["emitters"].append({"name": "column", "type": "fill", "mesh": _mesh(block)})
        return scene
    if kind == "paddle":
        size = np.array([36.0, 16.0, 24.0])
        scene = _base("heldout_paddle", seed, size * d, duration_s, spacing)
        pool = mesh_io.box_mesh(np.array([0.0, 0.0, 0.0]) * d, np.array([35.0, 15.0, 7.0]) * d)
        scene["emitters"].append({"name": "pool", "type": "fill", "mesh": _mesh(pool)})
        paddle = mesh_io.box_mesh(np.array([-1.0, -7.0, -6.0]) * d, np.array([1.0, 7.0, 6.0]) * d)
        frames = scene["frame_end"] - scene["frame_start"] + 1
        fps = scene["fps"]
        t = np.arange(frames) / fps
        x = (6.0 + 4.5 * (1 - np.cos(2 * np.pi * 0.6 * np.minimum(t, 5.0)))) * d
        matrices = np.tile(np.eye(4), (frames, 1, 1))
        matrices[:, 0, 3] = x
        matrices[:, 1, 3] = 8.0 * d
        matrices[:, 2, 3] = 8.0 * d
        scene["colliders"].append({"name": "paddle", "mesh": _mesh(paddle), "motion": "rigid", "transforms": matrices})
        return scene
    raise ValueError(f"held-out kind {kind!r} is not one of {HELDOUT_KINDS}")
