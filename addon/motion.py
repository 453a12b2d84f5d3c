"""Classify and encode the motion of a role object (no bpy here).

The add-on samples an object once per frame of the shot: its evaluated mesh
vertices in object space (Blender units) and its world matrix. From those it
decides what the engine's scene format needs (DEVELOPERS.md, "Scene file"):

- ``static``: the world-space vertices never change -> one mesh file;
- ``rigid``: the object-space vertices never change and the change of world
  matrix is a rotation plus translation -> mesh file + per-frame matrices;
- ``deforming``: anything else -> mesh file + per-frame world vertices.

Lengths leave this module in metres: ``metres = Blender units x scale_length``
(the scene's unit scale).
"""

import numpy as np


def world_vertices(local_vertices, matrix) -> np.ndarray:
    """(V, 3) object-space vertices and a (4, 4) world matrix -> (V, 3) world vertices (same units)."""
    local_vertices = np.asarray(local_vertices, np.float64)
    matrix = np.asarray(matrix, np.float64)
    return local_vertices @ matrix[:3, :3].T + matrix[:3, 3]


def _tolerance(vertices):
    """Absolute tolerance for "did not move": a millionth of the object's extent (float32 round-off is ~1e-7)."""
    extent = float(np.ptp(vertices, axis=0).max()) if len(vertices) else 0.0
    return max(extent, 1e-9) * 1e-6


def classify_motion(local_frames, matrices) -> str:
    """Decide ``static`` / ``rigid`` / ``deforming`` from per-frame samples.

    Args:
        local_frames: (F, V, 3) float, object-space vertices per frame (Blender units).
        matrices: (F, 4, 4) float, world matrices per frame.

    Returns:
        str: "static", "rigid" or "deforming".
    """
    local_frames = np.asarray(local_frames, np.float64)
    matrices = np.asarray(matrices, np.float64)
    world = np.stack([world_vertices(v, m) for v, m in zip(local_frames, matrices)])
    tol = _tolerance(world[0])
    if np.abs(world - world[0]).max(initial=0.0) <= tol:
        return "static"
    if np.abs(local_frames - local_frames[0]).max(initial=0.0) <= _tolerance(local_frames[0]):
        relative = relative_matrices(matrices)
        rotations = relative[:, :3, :3]
        gram = np.einsum("fij,fkj->fik", rotations, rotations)
        if np.abs(gram - np.eye(3)).max(initial=0.0) <= 1e-5:
            return "rigid"
    return "deforming"


def relative_matrices(matrices, scale_length=1.0) -> np.ndarray:
    """World matrices -> matrices that move the first frame's world-space mesh to each frame.

    ``R_f = M_f @ inv(M_0)``, so ``world_f = R_f @ [world_0, 1]`` (column vectors).
    Translations are converted to metres (x ``scale_length``); the 3x3 part is
    unit-free. Object scale stays in the mesh file, so a rigid ``R_f`` is a
    pure rotation + translation even for scaled objects.

    Args:
        matrices: (F, 4, 4) world matrices (Blender units).
        scale_length: metres per Blender unit.

    Returns:
        (F, 4, 4) float64.
    """
    matrices = np.asarray(matrices, np.float64)
    relative = matrices @ np.linalg.inv(matrices[0])
    relative[:, :3, 3] *= scale_length
    relative[:, 3, :] = (0.0, 0.0, 0.0, 1.0)
    return relative


def write_obj(path, vertices, triangles, name="mesh") -> None:
    """Write a triangle mesh as Wavefront OBJ (``v x y z`` lines, 1-based ``f i j k``).

    Args:
        vertices: (V, 3) float, metres. triangles: (T, 3) int, 0-based vertex indices.
    """
    vertices = np.asarray(vertices, np.float64).reshape(-1, 3)
    triangles = np.asarray(triangles, np.int64).reshape(-1, 3)
    with open(path, "w", encoding="ascii", newline="\n") as handle:
        handle.write(f"# splashdraft export: {name}\no {name}\n")
        np.savetxt(handle, vertices, fmt="v %.9g %.9g %.9g")
        np.savetxt(handle, triangles + 1, fmt="f %d %d %d")
