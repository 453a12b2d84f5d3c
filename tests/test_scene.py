"""engine.scene: load, validate, save and hash ``splashdraft-scene`` v1 files.

The contract is the scene format in DEVELOPERS.md. Every bad input below is
built by hand so the expected fault is known independently of the loader:
e.g. a box with one face removed has exactly 4 open edges, two boxes sharing
one side edge have 1 edge used by four triangles (counting argument, [D]).
Each error message is pinned with ``pytest.raises(match=...)``: it must name
the field or object and say how to fix it (docs/style.md, "Errors").
"""

import copy
import json
import os

from pathlib import Path

import numpy as np
import pytest

from engine.errors import MeshError, SceneError
from engine.mesh_io import box_mesh, plane_mesh, write_npz, write_obj, write_ply
from engine.scene import (FillEmitter, StreamEmitter, load_scene, save_scene, scene_from_dict, scene_hash,
                          scene_to_dict)


def _write_assets(folder):
    meshes = folder / "meshes"
    meshes.mkdir(parents=True, exist_ok=True)
    v, t = box_mesh([0.1, 0.1, 0.05], [0.5, 0.9, 0.5])
    write_obj(meshes / "water_block.obj", v, t)
    v, t = box_mesh([1.0, 0.4, 0.0], [1.2, 0.6, 0.2])
    write_ply(meshes / "boulder.ply", v, t)
    v, t = box_mesh([-0.05, -0.2, -0.05], [0.05, 0.2, 0.05])
    write_obj(meshes / "paddle.obj", v, t)
    matrices = np.tile(np.eye(4), (5, 1, 1))
    matrices[:, 0, 3] = np.linspace(1.4, 1.6, 5)
    matrices[:, 2, 3] = 0.3
    np.savez(meshes / "paddle_transforms.npz", matrices=matrices)
    v, t = plane_mesh((1.7, 0.5, 0.6), (0.3, 0.3), (3, 3))
    write_npz(meshes / "sheet.npz", v, t)
    np.savez(meshes / "sheet_vertices.npz", vertices=np.stack([v + [0, 0, 0.01 * k] for k in range(4)]))
    v, t = plane_mesh((0.0, 0.0, 0.0), (0.1, 0.1), (1, 1))
    write_obj(meshes / "tap.obj", v, t)


def _scene_dict():
    return {
        "format": "splashdraft-scene", "version": 1, "name": "trough", "fps": 24, "frame_start": 1, "frame_end": 12,
        "particle_spacing": 0.05, "seed": 3, "gravity": [0.0, 0.0, -9.81],
        "fluid": {"rest_density": 1000.0, "viscosity": 0.02},
        "bounds": {"min": [0, 0, 0], "max": [2, 1, 1.2],
                   "faces": {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall",
                             "z_min": "wall", "z_max": "open"}},
        "solver": {"cfl_factor": 0.4, "max_time_step": 0.004, "min_time_step": 1e-5, "density_tolerance": 0.0005,
                   "divergence_tolerance": 0.001, "max_iterations": 100},
        "budget": {"max_particles": 400000},
        "emitters": [
            {"name": "water_block", "type": "fill", "mesh": "meshes/water_block.obj", "velocity": [0, 0, 0], "jitter": 0.0},
            {"name": "spout", "type": "stream", "shape": "disc", "center": [0.2, 0.5, 0.8], "direction": [2, 0, 0],
             "radius": 0.05, "speed": 1.5, "frame_start": 1, "frame_end": 6, "transforms": None},
            {"name": "tap", "type": "stream", "shape": "mesh", "mesh": "meshes/tap.obj", "direction": [0, 0, -1],
             "speed": 1.0, "frame_start": 1, "frame_end": 8},
        ],
        "colliders": [
            {"name": "boulder", "mesh": "meshes/boulder.ply", "motion": "static", "friction": 0.0},
            {"name": "paddle", "mesh": "meshes/paddle.obj", "motion": "rigid", "transforms": "meshes/paddle_transforms.npz",
             "friction": 0.0},
            {"name": "sheet", "mesh": "meshes/sheet.npz", "motion": "deforming", "vertices": "meshes/sheet_vertices.npz",
             "friction": 0.5},
        ],
    }


@pytest.fixture
def scene_dir(tmp_path):
    _write_assets(tmp_path)
    return tmp_path


def _save(folder, data, name="scene.json"):
    path = folder / name
    path.write_text(json.dumps(data, indent=1))
    return path


def test_full_scene_loads_with_arrays_and_defaults(scene_dir):
    """The DEVELOPERS.md example structure loads; arrays have the documented shapes; defaults fill in."""
    scene = load_scene(_save(scene_dir, _scene_dict()))
    assert scene.name == "trough" and scene.fps == 24.0 and scene.particle_spacing == 0.05
    fill, spout, tap = scene.emitters
    assert isinstance(fill, FillEmitter) and fill.triangles.shape == (12, 3) and fill.vertices.dtype == np.float64
    assert isinstance(spout, StreamEmitter) and np.allclose(spout.direction, [1, 0, 0])  # normalised
    assert tap.shape == "mesh" and tap.vertices.shape == (4, 3)
    boulder, paddle, sheet = scene.colliders
    assert boulder.is_closed and paddle.transforms.shape == (5, 4, 4)
    assert not sheet.is_closed and sheet.frame_vertices.shape == (4, 16, 3) and sheet.friction == 0.5
    assert scene.time_of_frame(13) == pytest.approx(0.5)

    minimal = {k: v for k, v in _scene_dict().items() if k in ("format", "version", "fps", "frame_start", "frame_end",
                                                                  "particle_spacing", "bounds", "emitters")}
    minimal["bounds"] = {"min": [0, 0, 0], "max": [2, 1, 1.2]}
    minimal["emitters"] = [{"name": "w", "type": "fill", "mesh": "meshes/water_block.obj"}]
    scene = load_scene(_save(scene_dir, minimal, "minimal.json"))
    assert scene.name == "minimal" and scene.seed == 0 and np.allclose(scene.gravity, [0, 0, -9.81])
    assert scene.fluid.rest_density == 1000.0 and scene.fluid.viscosity == 0.02
    assert scene.bounds.faces == {"x_min": "wall", "x_max": "wall", "y_min": "wall", "y_max": "wall",
                                  "z_min": "wall", "z_max": "open"}
    assert scene.budget.max_particles == 1_000_000 and scene.solver.max_iterations == 100
    assert scene.colliders == ()


def test_inside_out_fill_mesh_is_rewound(scene_dir):
    """A closed fill mesh with inward winding (negative signed volume) is re-wound on load, as documented."""
    v, t = box_mesh([0.1, 0.1, 0.1], [0.4, 0.4, 0.4])
    write_obj(scene_dir / "meshes" / "inverted.obj", v, t[:, ::-1])
    data = _scene_dict()
    data["emitters"][0]["mesh"] = "meshes/inverted.obj"
    scene = load_scene(_save(scene_dir, data))
    from engine.geometry import signed_volume

    assert signed_volume(scene.emitters[0].vertices, scene.emitters[0].triangles) == pytest.approx(0.027)


def _set(path, value):
    def mutate(data, folder):
        target = data
        for key in path[:-1]:
            target = target[key]
        if value is _DELETE:
            del target[path[-1]]
        else:
            target[path[-1]] = value
    return mutate


_DELETE = object()


def _mesh_file(name, vertices, triangles, writer=write_obj, path=("emitters", 0, "mesh")):
    def mutate(data, folder):
        writer(folder / "meshes" / name, vertices, triangles)
        _set(path, f"meshes/{name}")(data, folder)
    return mutate


def _raw_file(name, content, path=("emitters", 0, "mesh")):
    def mutate(data, folder):
        (folder / "meshes" / name).write_bytes(content)
        _set(path, f"meshes/{name}")(data, folder)
    return mutate


def _array_file(name, key, array, path):
    def mutate(data, folder):
        np.savez(folder / "meshes" / name, **{key: array})
        _set(path, f"meshes/{name}")(data, folder)
    return mutate


_box_v, _box_t = box_mesh([0.1, 0.1, 0.1], [0.4, 0.4, 0.4])
_two_v = np.vstack([box_mesh([0, 0, 0], [1, 1, 1])[0], box_mesh([1, 1, 0], [2, 2, 1])[0]]) * 0.2
_two_t = np.vstack([box_mesh([0, 0, 0], [1, 1, 1])[1], box_mesh([1, 1, 0], [2, 2, 1])[1] + 8])
# Merge the coincident vertices of the shared side edge x = y = 0.2 (box A's 6, 7 = box B's 8, 9).
_two_t = np.where(_two_t == 8, 6, np.where(_two_t == 9, 7, _two_t))
_flat_v = np.array([[0.1, 0.1, 0.2], [0.4, 0.1, 0.2], [0.4, 0.4, 0.2], [0.1, 0.4, 0.2]])
_flat_t = np.array([[0, 1, 2], [0, 2, 3], [1, 0, 3], [1, 3, 2]])  # two sides with different diagonals: closed, volume 0
_nan_v = _box_v.copy()
_nan_v[2] = np.nan

CATALOGUE = [
    ("unknown top key", _set(("gravty",), [0, 0, -1]), SceneError, r'scene: unknown key "gravty"; use only format, version'),
    ("unknown emitter key", _set(("emitters", 0, "velocty"), [0, 0, 0]), SceneError,
     r'emitter "water_block": unknown key "velocty"; use only name, type, mesh, velocity, jitter'),
    ("fps as text", _set(("fps",), "24"), SceneError, r'fps: expected a number, got "24"'),
    ("zero spacing", _set(("particle_spacing",), 0), SceneError, r"particle_spacing: must be > 0, got 0; give a value > 0"),
    ("negative fps", _set(("fps",), -24), SceneError, r"fps: must be > 0, got -24"),
    ("frames reversed", _set(("frame_end",), 0), SceneError, r"frame_end: 0 is before frame_start 1; set frame_end >= frame_start"),
    ("frame as float", _set(("frame_start",), 1.5), SceneError, r"frame_start: expected a whole number, got 1.5"),
    ("bounds min >= max", _set(("bounds", "max"), [2, 1, 0]), SceneError, r"bounds: min z = 0 is not below max z = 0"),
    ("bounds short vector", _set(("bounds", "min"), [0, 0]), SceneError, r"bounds.min: expected 3 numbers, got \[0, 0\]"),
    ("bad face value", _set(("bounds", "faces", "z_max"), "lid"), SceneError,
     r'bounds.faces.z_max: expected "wall" or "open", got "lid"; use "wall" or "open"'),
    ("unknown face", _set(("bounds", "faces", "top"), "open"), SceneError, r'bounds.faces: unknown key "top"; use only x_min'),
    ("no emitters", _set(("emitters",), []), SceneError, r"emitters: the scene has no emitters; add a fill or stream emitter"),
    ("missing mesh file", _set(("emitters", 0, "mesh"), "meshes/nowhere.obj"), MeshError,
     r'emitter "water_block": .*nowhere\.obj: mesh file not found; export the mesh there or fix the path'),
    ("unreadable mesh", _raw_file("junk.ply", b"solid junk\n"), MeshError,
     r'emitter "water_block": .*junk\.ply: not a PLY file'),
    ("NaN vertices", _mesh_file("nan.npz", _nan_v, _box_t, write_npz), MeshError,
     r'emitter "water_block": mesh has 1 vertices with NaN or infinite coordinates; fix or delete those vertices'),
    ("open fill mesh", _mesh_file("open.obj", _box_v, np.delete(_box_t, [0, 6], axis=0)), MeshError,
     r'emitter "water_block": mesh is not closed \(4 open edges\); close it or use it as a collider'),
    ("non-manifold fill mesh", _mesh_file("two.obj", _two_v, _two_t), MeshError,
     r'emitter "water_block": mesh is not manifold \(1 edges shared by more than two faces\)'),
    ("zero-volume fill mesh", _mesh_file("flat.obj", _flat_v, _flat_t), MeshError,
     r'emitter "water_block": mesh has zero volume'),
    ("jitter too large", _set(("emitters", 0, "jitter"), 0.7), SceneError, r'emitter "water_block": jitter: must be <= 0.49'),
    ("transforms wrong shape", _array_file("bad_t.npz", "matrices", np.zeros((3, 4)), ("colliders", 1, "transforms")),
     SceneError, r'collider "paddle": transforms have shape \(3, 4\), expected \(F, 4, 4\)'),
    ("transforms wrong key", _array_file("bad_k.npz", "matrix", np.tile(np.eye(4), (2, 1, 1)), ("colliders", 1, "transforms")),
     SceneError, r'collider "paddle": transforms file "meshes/bad_k.npz" has no array "matrices"'),
    ("transforms singular", _array_file("bad_s.npz", "matrices", np.tile(np.diag([1.0, 0.0, 1.0, 1.0]), (2, 1, 1)),
                                        ("colliders", 1, "transforms")),
     SceneError, r'collider "paddle": transform 0 is singular or mirrored'),
    ("transforms projective", _array_file("bad_p.npz", "matrices", np.tile(np.array(
        [[1.0, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0.5, 1]]), (2, 1, 1)), ("colliders", 1, "transforms")),
     SceneError, r"transform 0 has bottom row \[0.0, 0.0, 0.5, 1.0\], not \[0, 0, 0, 1\]"),
    ("deforming topology", _array_file("bad_v.npz", "vertices", np.zeros((4, 7, 3)), ("colliders", 2, "vertices")),
     SceneError, r'collider "sheet": per-frame vertices have 7 vertices but the mesh has 16; export the per-frame vertices'),
    ("deforming shape", _array_file("bad_v2.npz", "vertices", np.zeros((4, 16)), ("colliders", 2, "vertices")),
     SceneError, r'collider "sheet": per-frame vertices have shape \(4, 16\), expected \(F, V, 3\)'),
    ("rigid without transforms", _set(("colliders", 1, "transforms"), _DELETE), SceneError,
     r'collider "paddle": rigid motion needs "transforms"'),
    ("static with transforms", _set(("colliders", 0, "transforms"), "meshes/paddle_transforms.npz"), SceneError,
     r'collider "boulder": a static collider takes no "transforms"'),
    ("bad motion", _set(("colliders", 0, "motion"), "spinning"), SceneError,
     r'collider "boulder": motion: expected one of static, rigid, deforming, got "spinning"'),
    ("duplicate names", _set(("colliders", 0, "name"), "water_block"), SceneError,
     r'colliders\[0\].name: "water_block" is already used by emitters\[0\]; give every emitter and collider its own name'),
    ("stream speed zero", _set(("emitters", 1, "speed"), 0), SceneError, r'emitter "spout": speed: must be > 0, got 0'),
    ("stream zero direction", _set(("emitters", 1, "direction"), [0, 0, 0]), SceneError,
     r'emitter "spout": direction: is the zero vector; give the direction the liquid leaves in'),
    ("stream radius missing", _set(("emitters", 1, "radius"), _DELETE), SceneError, r'emitter "spout": missing key "radius"'),
    ("stream bad shape", _set(("emitters", 1, "shape"), "square"), SceneError, r'emitter "spout": shape: expected "disc" or "mesh"'),
    ("emitter bad type", _set(("emitters", 0, "type"), "pour"), SceneError, r'emitter "water_block": type: expected "fill" or "stream"'),
    ("wrong format", _set(("format",), "other-scene"), SceneError, r'format: expected "splashdraft-scene", got "other-scene"'),
    ("newer version", _set(("version",), 2), SceneError, r"version: unsupported version 2 \(this engine reads version 1\); update Splashdraft"),
    ("inline mesh in a file", _set(("emitters", 0, "mesh"), {"vertices": [[0, 0, 0]], "triangles": []}), SceneError,
     r'emitter "water_block": mesh: inline meshes are not part of the scene file format; save the mesh to a file'),
    ("gravity wrong length", _set(("gravity",), [0, -9.81]), SceneError, r"gravity: expected 3 numbers"),
    ("bool as number", _set(("fluid", "rest_density"), True), SceneError, r"fluid.rest_density: expected a number, got true"),
    ("min step above max", _set(("solver", "min_time_step"), 0.01), SceneError,
     r"solver.min_time_step: 0.01 s exceeds max_time_step 0.004 s"),
    ("emitters not a list", _set(("emitters",), {"name": "x"}), SceneError, r"emitters: expected a list"),
]


@pytest.mark.parametrize("label, mutate, error, pattern", CATALOGUE, ids=[c[0] for c in CATALOGUE])
def test_validation_catalogue(scene_dir, label, mutate, error, pattern):
    """Each hand-made fault gives its own named error with the fix (see the module docstring)."""
    data = copy.deepcopy(_scene_dict())
    mutate(data, scene_dir)
    path = _save(scene_dir, data)
    with pytest.raises(error, match=pattern) as caught:
        load_scene(path)
    assert str(caught.value).startswith(str(path))


def test_file_level_errors(tmp_path):
    """Missing and malformed scene files are SceneErrors naming the file, the line and the fix."""
    with pytest.raises(SceneError, match=r"nowhere\.json: scene file not found"):
        load_scene(tmp_path / "nowhere.json")
    broken = tmp_path / "broken.json"
    broken.write_text('{"format": "splashdraft-scene",\n "version": 1,,}')
    with pytest.raises(SceneError, match=r"broken\.json: scene file is not valid JSON \(line 2, column"):
        load_scene(broken)


def test_hash_ignores_formatting_and_defaults_but_not_content(scene_dir):
    """scene_hash: sha256 of canonical JSON (defaults written out, sorted keys) + mesh bytes (DEVELOPERS.md).

    A mesh written in another format with the same arrays keeps the hash; one changed coordinate changes it.
    """
    data = _scene_dict()
    reference = scene_hash(_save(scene_dir, data))
    reordered = dict(reversed(list(data.items())))
    reordered["fluid"] = {}  # the defaults, written out by the canonical form
    assert scene_hash(_save(scene_dir, reordered, "b.json")) == reference
    changed = copy.deepcopy(data)
    changed["emitters"][1]["speed"] = 1.6
    assert scene_hash(_save(scene_dir, changed, "c.json")) != reference
    v, t = box_mesh([0.1, 0.1, 0.05], [0.5, 0.9, 0.5])
    write_ply(scene_dir / "meshes" / "water_block.ply", v, t)
    as_ply = copy.deepcopy(data)
    as_ply["emitters"][0]["mesh"] = "meshes/water_block.ply"
    assert scene_hash(_save(scene_dir, as_ply, "d.json")) == reference
    v, t = box_mesh([0.1, 0.1, 0.05], [0.5, 0.9, 0.5001])
    write_obj(scene_dir / "meshes" / "water_block.obj", v, t)
    assert scene_hash(scene_dir / "scene.json") != reference


def test_save_round_trip_and_inline_arrays(scene_dir, tmp_path_factory):
    """save_scene writes a scene that loads back equal; inline arrays from programs become npz files."""
    scene = load_scene(_save(scene_dir, _scene_dict()))
    elsewhere = tmp_path_factory.mktemp("copy") / "deep" / "shot.json"
    again = save_scene(elsewhere, scene)
    assert scene_to_dict(again)["emitters"][1] == scene_to_dict(scene)["emitters"][1]
    np.testing.assert_array_equal(again.colliders[1].transforms, scene.colliders[1].transforms)
    assert scene_hash(again) == scene_hash(scene)  # same content; mesh paths are relative to the new folder
    assert json.loads(elsewhere.read_text())["emitters"][0]["mesh"].endswith("meshes/water_block.obj")

    v, t = box_mesh([0.2, 0.2, 0.2], [0.6, 0.6, 0.6])
    program = _scene_dict()
    program["emitters"][0]["mesh"] = {"vertices": v, "triangles": t}
    program["colliders"][1]["transforms"] = np.tile(np.eye(4), (3, 1, 1))
    inline_scene = scene_from_dict(program, base_dir=scene_dir)
    assert inline_scene.emitters[0].mesh_file is None
    # A dict's relative mesh paths resolve against the folder it is saved into (save_scene docstring).
    target = Path(scene_dir) / "program.json"
    loaded = save_scene(target, program)
    assert os.path.isfile(target.parent / "meshes" / "water_block.npz")
    assert os.path.isfile(target.parent / "meshes" / "paddle_transforms.npz")
    np.testing.assert_array_equal(loaded.emitters[0].vertices, v)
    assert scene_hash(loaded) == scene_hash(target)
    with pytest.raises(MeshError, match=r'emitter "water_block": mesh is not closed'):
        program["emitters"][0]["mesh"] = {"vertices": v, "triangles": t[2:]}
        save_scene(tmp_path_factory.mktemp("bad") / "scene.json", program)
