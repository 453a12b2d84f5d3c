"""The run-time world (engine/world.py): stream emission, open faces, walls, collider motion.

External checks:
- Volume flow through a stream: Q = U * A (continuity; any fluid-mechanics text, e.g. Munson,
  Young & Okiishi, "Fundamentals of Fluid Mechanics", ch. 5 [from memory]). Each particle carries
  the volume d^3 of its lattice cell (our sampling convention), so the emitted particle count
  over a window T must be about U * A * T / d^3. The disc lattice count itself is the Gauss
  circle problem: N(r) = pi r^2 + O(r) points of the unit lattice within radius r (Hardy &
  Wright, "An Introduction to the Theory of Numbers" [from memory]); at r = 10 it is 317.
- Rigid motion between frames: a pure translation interpolates linearly; a rotation keeps the
  matrix orthonormal (a rotation matrix has R^T R = I, det R = 1).
"""

import dataclasses
import math

import numpy as np
import pytest

from engine.mesh_io import box_mesh
from engine.scene import scene_from_dict
from engine.state import State
from engine.world import build_world, disc_lattice, interpolate_matrix


def _scene(emitters=(), colliders=(), faces=None, spacing=0.02, fps=24, frames=(1, 25), upper=(1.0, 1.0, 1.0)):
    all_walls = {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    data = {
        "format": "splashdraft-scene", "version": 1, "name": "world_test", "fps": fps,
        "frame_start": frames[0], "frame_end": frames[1], "particle_spacing": spacing,
        "bounds": {"min": [0.0, 0.0, 0.0], "max": list(upper), "faces": faces or all_walls},
        "emitters": list(emitters) or [_corner_block()], "colliders": list(colliders),
    }
    return scene_from_dict(data, allow_inline=True)


def _corner_block():
    """A small fill emitter out of the way, for tests about something else (a scene needs one)."""
    v, t = box_mesh([0.8, 0.8, 0.8], [0.9, 0.9, 0.9])
    return {"name": "corner", "type": "fill", "mesh": _inline(v, t)}


def _inline(vertices, triangles):
    return {"vertices": np.asarray(vertices).tolist(), "triangles": np.asarray(triangles).tolist()}


def test_disc_lattice_count_follows_the_gauss_circle_problem():
    """r = 10 spacings: exactly 317 lattice points (N(10) = 317, Hardy & Wright [from memory]),
    within 1 % of pi r^2 = 314.2; all in the plane normal to the direction."""
    points = disc_lattice((0.5, 0.5, 0.5), (0.0, 0.0, 1.0), 0.2, 0.02)
    assert len(points) == 317
    assert abs(len(points) - math.pi * 100) / (math.pi * 100) < 0.01
    np.testing.assert_allclose(points[:, 2], 0.5)


#: Lattice points within radius r of the origin (Gauss circle problem, [from memory]; N(10)
#: is also checked above against the lattice).
GAUSS_CIRCLE = {3: 29, 5: 81}


@pytest.mark.parametrize("speed,radius", [(1.0, 0.1), (2.5, 0.06)])
def test_stream_emits_the_continuity_volume_flow(speed, radius):
    """Over the stream's window T the emitted count is layers * N(r), layers = T U / d, and
    the volume it carries (count * d^3) is U * A * T (Q = U A) to 5 %: the lattice disc of
    radius 3-5 spacings holds N(r) = 29 / 81 points against pi r^2 = 28.3 / 78.5."""
    spacing, fps = 0.02, 24
    stream = {"name": "spout", "type": "stream", "shape": "disc", "center": [0.5, 0.5, 0.5],
              "direction": [1.0, 0.0, 0.0], "radius": radius, "speed": speed, "frame_start": 1, "frame_end": 12}
    world = build_world(_scene(emitters=[stream], spacing=spacing, fps=fps))
    state = world.initial_state()
    assert state.count == 0
    for k in range(96):  # one second, past the window's end (frame 13 starts at 0.5 s)
        # Move the stream on kinematically, as a solver would, so each new layer finds room.
        state = dataclasses.replace(state, positions=state.positions + state.velocities / 96)
        state = world.emit(state, k / 96, (k + 1) / 96)
    window = 12 / fps
    layers = math.ceil(round(window * speed / spacing, 9))
    assert state.count == layers * GAUSS_CIRCLE[round(radius / spacing)]
    expected = speed * math.pi * radius**2 * window / spacing**3
    assert abs(state.count - expected) / expected < 0.05
    # No emission outside the window; ids are unique and consecutive.
    later = world.emit(state, 1.0, 2.0)
    assert later.count == state.count
    np.testing.assert_array_equal(np.sort(state.ids), np.arange(state.count))
    np.testing.assert_allclose(state.velocities, np.tile([speed, 0.0, 0.0], (state.count, 1)))


def test_stream_layers_are_one_spacing_apart_along_the_flow():
    """Consecutive layers sit d apart along the direction, so the stream enters at the lattice
    number density (1 / d^3), whatever the substep lengths used to emit it."""
    spacing = 0.02
    stream = {"name": "spout", "type": "stream", "shape": "disc", "center": [0.2, 0.5, 0.5],
              "direction": [1.0, 0.0, 0.0], "radius": 0.05, "speed": 1.3, "frame_start": 1, "frame_end": 6}
    world = build_world(_scene(emitters=[stream], spacing=spacing))
    uneven = [0.0, 0.003, 0.011, 0.0125, 0.03, 0.07]
    state = world.initial_state()
    for t0, t1 in zip(uneven[:-1], uneven[1:]):
        # What a solver substep does between emissions, without forces: move, then emit.
        state = dataclasses.replace(state, positions=state.positions + (t1 - t0) * state.velocities)
        state = world.emit(state, t0, t1)
    # At t = 0.07, a layer born at b sits at x = 0.2 + U (0.07 - b), births b = k d / U.
    xs = np.unique(np.round(state.positions[:, 0], 9))
    np.testing.assert_allclose(np.diff(xs), spacing, rtol=1e-9)
    assert len(xs) == math.ceil(0.07 / (spacing / 1.3))


def test_open_face_removes_and_counts_particles_walls_keep_them():
    """Particles past an open face are removed and counted; particles pushed past a wall are
    put back inside it with no velocity into the wall (mass is only lost through open faces)."""
    faces = {"x_min": "wall", "x_max": "open", "y_min": "wall", "y_max": "wall", "z_min": "wall", "z_max": "open"}
    world = build_world(_scene(faces=faces))
    positions = np.array([[1.05, 0.5, 0.5],    # beyond the open x_max face
                          [0.5, 0.5, 1.2],     # beyond the open top
                          [-0.03, 0.5, 0.5],   # beyond the x_min wall
                          [0.5, 0.5, -0.01],   # below the floor wall
                          [0.5, 0.5, 0.5]])    # inside
    velocities = np.array([[1.0, 0, 0], [0, 0, 1.0], [-2.0, 0.3, 0], [0, 0, -1.0], [0.1, 0.1, 0.1]])
    state = State(time=0.0, positions=positions, velocities=velocities, ids=np.arange(5), next_id=5)
    out = world.enforce_bounds(state)
    assert out.removed == 2
    np.testing.assert_array_equal(out.ids, [2, 3, 4])
    assert np.all(out.positions >= world.lower + 0.99 * world.contact_margin)
    assert out.velocities[0, 0] == 0.0 and out.velocities[0, 1] == 0.3
    assert out.velocities[1, 2] == 0.0
    np.testing.assert_array_equal(out.velocities[2], velocities[4])


def test_static_box_collider_pushes_particles_out():
    """A particle inside a closed collider ends outside it, no velocity into the surface."""
    v, t = box_mesh([0.4, 0.4, 0.0], [0.6, 0.6, 0.3])
    collider = {"name": "rock", "mesh": _inline(v, t), "motion": "static"}
    world = build_world(_scene(colliders=[collider]))
    state = State(time=0.0, positions=np.array([[0.5, 0.5, 0.28]]), velocities=np.array([[0.0, 0.0, -1.0]]),
                  ids=np.arange(1), next_id=1)
    out = world.enforce_bounds(state)
    assert out.positions[0, 2] >= 0.3, "pushed out through the nearest face (the top)"
    assert out.velocities[0, 2] >= 0.0


def test_a_collider_resting_on_the_floor_never_keeps_a_particle_inside():
    """A box standing on the floor wall: its bottom face is no exit. A particle deep in the box
    near its bottom, and one that overshot below the floor under the box (a long learned step),
    both end outside the box (winding-number test, Jacobson et al. 2013, "Robust Inside-Outside
    Segmentation using Generalized Winding Numbers", ACM TOG 32(4)) and inside the bounds."""
    from engine.geometry import inside_mesh

    v, t = box_mesh([0.4, 0.4, 0.0], [0.6, 0.6, 0.3])
    collider = {"name": "rock", "mesh": _inline(v, t), "motion": "static"}
    world = build_world(_scene(colliders=[collider]))
    positions = np.array([[0.47, 0.52, 0.01],     # inside, nearest face is the bottom
                          [0.46, 0.55, -0.04]])   # below the floor, under the box
    state = State(time=0.0, positions=positions, velocities=np.zeros((2, 3)), ids=np.arange(2), next_id=2)
    out = world.enforce_bounds(state)
    assert not inside_mesh(out.positions, np.asarray(v, float), np.asarray(t)).any(), out.positions
    assert np.all(out.positions >= world.lower + 0.99 * world.contact_margin)


def test_rigid_collider_motion_interpolates_between_frames():
    """Translation blends linearly between frames; a 90-degree turn over one frame gives an
    orthonormal matrix with det 1 half-way (a rotation, not a squashed blend)."""
    fps = 24
    matrices = np.tile(np.eye(4), (3, 1, 1))
    matrices[:, 0, 3] = [0.0, 0.24, 0.48]
    c, s = math.cos(math.pi / 2), math.sin(math.pi / 2)
    matrices[2, :3, :3] = [[c, -s, 0], [s, c, 0], [0, 0, 1]]
    half = interpolate_matrix(matrices, 0.5 / fps, fps)
    assert half[0, 3] == pytest.approx(0.12)
    turn = interpolate_matrix(matrices, 1.5 / fps, fps)
    rotation = turn[:3, :3]
    np.testing.assert_allclose(rotation.T @ rotation, np.eye(3), atol=1e-12)
    assert np.linalg.det(rotation) == pytest.approx(1.0)
    angle = math.degrees(math.atan2(rotation[1, 0], rotation[0, 0]))
    assert angle == pytest.approx(45.0, abs=1e-9)
    np.testing.assert_allclose(interpolate_matrix(matrices, 2 / fps, fps), matrices[2])


def test_animated_collider_boundary_particles_move_with_it():
    """Boundary samples of a translating collider move by the translation and carry its
    velocity (finite difference of the per-frame transforms: 0.24 m per frame at 24 fps)."""
    fps = 24
    v, t = box_mesh([-0.05, -0.05, -0.05], [0.05, 0.05, 0.05])
    matrices = np.tile(np.eye(4), (25, 1, 1))
    matrices[:, 0, 3] = 0.3 + 0.01 * np.arange(25)
    matrices[:, 1, 3] = 0.5
    matrices[:, 2, 3] = 0.5
    collider = {"name": "paddle", "mesh": _inline(v, t), "motion": "rigid", "transforms": matrices.tolist()}
    world = build_world(_scene(colliders=[collider], fps=fps))
    walls = len(world.wall_positions)
    first = world.boundary_at(0.0).positions[walls:].copy()
    later = world.boundary_at(2.5 / fps)
    np.testing.assert_allclose(later.positions[walls:] - first, np.tile([0.025, 0.0, 0.0], (len(first), 1)),
                               atol=1e-12)
    np.testing.assert_allclose(later.velocities[walls:], np.tile([0.24, 0.0, 0.0], (len(first), 1)), atol=1e-9)
