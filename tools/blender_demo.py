"""Headless demo: build the demo shot in Blender, bake it through the add-on, render a contact sheet.

Usage (the bpy module is in the venv, so this runs with the venv's Python):

    .venv/bin/python -m tools.blender_demo                  # small preset, out/blender_demo/
    .venv/bin/python -m tools.blender_demo --preset full    # 25k particles, 60 frames (long)
    .venv/bin/python -m tools.blender_demo --solver learned # the learned preview instead
    .venv/bin/python -m tools.blender_demo --surface        # render the joined liquid surface

Steps: enable the add-on from this working tree in an isolated Blender user
folder; build the demo shot of ``engine.demo`` (trough = shot bounds with an
open top, water block = liquid fill, rough boulder = collider) as Blender
objects with add-on roles; bake with ``bpy.ops.splashdraft.bake()``; render
several frames with Cycles (CPU) and tile them into
``out/blender_demo/contact_sheet.png``; save ``out/blender_demo/demo.blend``.
With ``--surface`` the liquid renders as its joined surface and
``out/blender_demo/surface.json`` lists, per rendered frame, the particles and
the surface's vertices, faces, connected components, enclosed volume and
particles x spacing^3.
"""

import argparse
import importlib
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def parse_args(argv=None):
    parser = argparse.ArgumentParser(description="Bake and render the demo shot through the Blender add-on.")
    parser.add_argument("--preset", choices=("small", "full"), default="small",
                        help="Demo preset of engine.demo (small: 0.05 m spacing, 12 frames). Default: small.")
    parser.add_argument("--spacing", type=float, help="Particle spacing in metres (default: the preset's).")
    parser.add_argument("--frame-end", type=int, help="Last frame (default: the preset's).")
    parser.add_argument("--out", type=Path, default=ROOT / "out" / "blender_demo", help="Output folder.")
    parser.add_argument("--tiles", type=int, default=6, help="Frames on the contact sheet. Default: 6.")
    parser.add_argument("--size", type=int, nargs=2, default=(320, 180), metavar=("W", "H"),
                        help="Size of one tile in pixels. Default: 320 180.")
    parser.add_argument("--samples", type=int, default=16, help="Cycles samples per tile. Default: 16.")
    parser.add_argument("--solver", choices=("sph", "learned"), default="sph",
                        help="sph: the reference solver; learned: the shipped learned preview. Default: sph.")
    parser.add_argument("--surface", action="store_true",
                        help="Render the joined liquid surface instead of spheres and write surface.json.")
    return parser.parse_args(argv)


def mesh_object(name, vertices, triangles, collection):
    import bpy

    mesh = bpy.data.meshes.new(name)
    mesh.from_pydata([tuple(v) for v in vertices], [], [tuple(int(i) for i in t) for t in triangles])
    mesh.update()
    obj = bpy.data.objects.new(name, mesh)
    collection.objects.link(obj)
    return obj


def plain_material(name, colour):
    import bpy

    material = bpy.data.materials.new(name)
    if material.node_tree is None:
        material.use_nodes = True
    shader = next(n for n in material.node_tree.nodes if n.type == "BSDF_PRINCIPLED")
    shader.inputs["Base Color"].default_value = colour
    shader.inputs["Roughness"].default_value = 0.8
    return material


def build_demo_shot(scene, demo, mesh_io, spacing, frame_end, cache_dir):
    """Blender objects for engine.demo's shot; returns the objects by role."""
    import bpy
    from mathutils import Vector

    collection = scene.collection
    size = demo.TROUGH_SIZE
    trough = mesh_object("Trough", *mesh_io.box_mesh((0.0, 0.0, 0.0), size), collection)
    trough.splashdraft.role = "BOUNDS"
    trough.splashdraft.face_z_max = "open"
    trough.hide_render = True
    trough.display_type = "WIRE"
    water = mesh_object("Water block", *mesh_io.box_mesh(*demo.WATER_BLOCK), collection)
    water.splashdraft.role = "FILL"
    water.hide_render = True
    water.display_type = "WIRE"
    boulder = mesh_object("Boulder", *demo.boulder_mesh(), collection)
    boulder.splashdraft.role = "COLLIDER"
    boulder.data.materials.append(plain_material("Boulder stone", (0.35, 0.3, 0.25, 1.0)))
    for polygon in boulder.data.polygons:
        polygon.use_smooth = True
    # Context for the render only (no role): the trough's floor and back walls.
    floor = mesh_object("Trough floor", *mesh_io.box_mesh((-0.02, -0.02, -0.02), (size[0] + 0.02, size[1] + 0.02, 0.0)),
                        collection)
    back = mesh_object("Trough back", *mesh_io.box_mesh((-0.02, size[1], 0.0), (size[0] + 0.02, size[1] + 0.02, size[2])),
                       collection)
    wall_material = plain_material("Trough wall", (0.75, 0.75, 0.72, 1.0))
    floor.data.materials.append(wall_material)
    back.data.materials.append(wall_material)

    shot = scene.splashdraft
    shot.shot_name = demo.DEMO_NAME
    shot.particle_spacing = spacing
    shot.cache_dir = str(cache_dir)
    scene.frame_start, scene.frame_end = 1, frame_end
    scene.render.fps = 24

    camera = bpy.data.objects.new("Camera", bpy.data.cameras.new("Camera"))
    collection.objects.link(camera)
    camera.location = (size[0] * 0.5, -1.55, 1.25)
    target = Vector((size[0] * 0.5, size[1] * 0.5, 0.15))
    camera.rotation_euler = (target - camera.location).to_track_quat("-Z", "Y").to_euler()
    camera.data.lens = 30
    scene.camera = camera
    sun = bpy.data.objects.new("Sun", bpy.data.lights.new("Sun", "SUN"))
    sun.data.energy = 3.5
    sun.rotation_euler = (0.7, 0.2, 0.6)
    collection.objects.link(sun)
    world = scene.world or bpy.data.worlds.new("World")
    scene.world = world
    world.color = (0.55, 0.6, 0.65)
    return {"bounds": trough, "fill": water, "collider": boulder}


def mesh_triangles(mesh):
    """A mesh's vertex positions ((V, 3) float64, its own space) and loop triangles ((T, 3) int32 vertex indices)."""
    import numpy as np

    positions = np.empty(len(mesh.vertices) * 3, np.float32)
    mesh.attributes["position"].data.foreach_get("vector", positions)
    mesh.calc_loop_triangles()
    triangles = np.empty(len(mesh.loop_triangles) * 3, np.int32)
    mesh.loop_triangles.foreach_get("vertices", triangles)
    return positions.reshape(-1, 3).astype(np.float64), triangles.reshape(-1, 3)


def surface_stats(obj, particles, spacing):
    """The evaluated liquid surface of ``obj`` at the current frame, as one row of surface.json.

    Components: connected vertex sets (scipy.sparse.csgraph); enclosed volume: divergence theorem over
    the triangles (sum of det[a, b, c] / 6).
    """
    import bpy
    import numpy as np
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    evaluated = obj.evaluated_get(bpy.context.evaluated_depsgraph_get())
    mesh = evaluated.to_mesh()
    count = len(mesh.vertices)
    positions, triangles = mesh_triangles(mesh)
    corners = positions[triangles]
    volume = float(np.einsum("ij,ij->i", corners[:, 0], np.cross(corners[:, 1], corners[:, 2])).sum() / 6.0)
    edges = np.empty(len(mesh.edges) * 2, np.int32)
    mesh.edges.foreach_get("vertices", edges)
    edges = edges.reshape(-1, 2)
    graph = coo_matrix((np.ones(len(edges)), (edges[:, 0], edges[:, 1])), shape=(count, count))
    components = int(connected_components(graph, directed=False)[0]) if count else 0
    row = {"frame": int(bpy.context.scene.frame_current), "particles": int(particles), "vertices": count,
           "faces": len(mesh.polygons), "components": components, "enclosed_volume_m3": volume,
           "particle_volume_m3": particles * spacing ** 3}
    evaluated.to_mesh_clear()
    return row


def render_contact_sheet(scene, frames, tile_size, samples, folder, on_frame=None):
    """Render ``frames`` and tile them (rows of 3) into folder/contact_sheet.png; returns its path."""
    import bpy
    import numpy as np

    scene.render.engine = "CYCLES"
    scene.cycles.device = "CPU"
    scene.cycles.samples = samples
    scene.cycles.use_denoising = False
    scene.render.resolution_x, scene.render.resolution_y = tile_size
    scene.render.resolution_percentage = 100
    scene.render.image_settings.file_format = "PNG"
    width, height = tile_size
    columns = min(3, len(frames))
    rows = (len(frames) + columns - 1) // columns
    sheet = np.ones((rows * height, columns * width, 4), np.float32)
    for index, frame in enumerate(frames):
        scene.frame_set(frame)
        if on_frame is not None:
            on_frame(frame)
        path = folder / f"frame_{frame:04d}.png"
        scene.render.filepath = str(path)
        bpy.ops.render.render(write_still=True)
        image = bpy.data.images.load(str(path))
        pixels = np.empty(width * height * 4, np.float32)
        image.pixels.foreach_get(pixels)
        bpy.data.images.remove(image)
        row, column = divmod(index, columns)
        # Blender images start at the bottom row: the first tile goes top-left.
        y0 = (rows - 1 - row) * height
        sheet[y0:y0 + height, column * width:(column + 1) * width] = pixels.reshape(height, width, 4)
    out = bpy.data.images.new("contact_sheet", columns * width, rows * height, alpha=True)
    out.pixels.foreach_set(sheet.ravel())
    target = folder / "contact_sheet.png"
    out.filepath_raw = str(target)
    out.file_format = "PNG"
    out.save()
    return target


def main(argv=None):
    args = parse_args(argv)
    os.environ["BLENDER_USER_RESOURCES"] = tempfile.mkdtemp(prefix="splashdraft_demo_user_")
    started = time.perf_counter()
    import bpy
    import numpy as np

    from tools import blender_env

    bpy.ops.wm.read_factory_settings(use_empty=True)  # first: it also resets the add-on list
    module = blender_env.enable_from_source()
    demo = importlib.import_module(module + ".engine.demo")
    mesh_io = importlib.import_module(module + ".engine.mesh_io")
    preset = demo.PRESETS[args.preset]
    spacing = args.spacing or preset["particle_spacing"]
    frame_end = args.frame_end or preset["frame_end"]
    out = args.out.resolve()
    out.mkdir(parents=True, exist_ok=True)

    scene = bpy.context.scene
    build_demo_shot(scene, demo, mesh_io, spacing, frame_end, out / "cache")
    scene.splashdraft.solver = args.solver
    bpy.ops.splashdraft.estimate()
    print(f"blender_demo: estimate: {scene.splashdraft.estimate_text}", flush=True)
    bake_start = time.perf_counter()
    result = bpy.ops.splashdraft.bake()
    bake_seconds = time.perf_counter() - bake_start
    version = scene.splashdraft.versions[-1] if len(scene.splashdraft.versions) else None
    if result != {"FINISHED"} or version is None:
        print(f"blender_demo: bake failed: {scene.splashdraft.bake_message}", file=sys.stderr)
        return 1
    print(f"blender_demo: baked {version.name}: {version.frames} frames, {version.particles:,} particles "
          f"in {bake_seconds:.1f} s -> {version.folder}", flush=True)
    count = max(1, min(args.tiles, frame_end))
    frames = sorted({int(round(f)) for f in np.linspace(1, frame_end, count)}) if count > 1 else [1]
    rows, on_frame = [], None
    if args.surface:
        import json

        scene.splashdraft.use_surface = True
        cache = importlib.import_module(module + ".engine.cache")
        reader = cache.open_cache(version.folder)
        scale = float(scene.unit_settings.scale_length) or 1.0
        bake_spacing = float(reader.manifest["particle_spacing"])

        def on_frame(frame):
            particles = reader.manifest["frames"].get(str(frame), {}).get("particles", 0)
            # Volumes in m^3: the surface is in Blender units (scale_length metres each).
            row = surface_stats(scene.splashdraft.display_object, particles, bake_spacing)
            row["enclosed_volume_m3"] *= scale ** 3
            rows.append(row)
    render_start = time.perf_counter()
    sheet = render_contact_sheet(scene, frames, tuple(args.size), args.samples, out, on_frame)
    if args.surface:
        (out / "surface.json").write_text(json.dumps({"frames": rows}, indent=1) + "\n", encoding="utf-8")
        for row in rows:
            print(f"blender_demo: surface frame {row['frame']}: {row['particles']} particles, "
                  f"{row['vertices']} vertices, {row['components']} components, enclosed "
                  f"{row['enclosed_volume_m3']:.4f} m3 vs particles x spacing^3 {row['particle_volume_m3']:.4f} m3",
                  flush=True)
    render_seconds = time.perf_counter() - render_start
    bpy.ops.wm.save_as_mainfile(filepath=str(out / "demo.blend"))
    print(f"blender_demo: contact sheet of frames {frames}: {sheet} (render {render_seconds:.1f} s); "
          f"scene saved to {out / 'demo.blend'}; total {time.perf_counter() - started:.1f} s", flush=True)
    return 0


if __name__ == "__main__":
    code = main()
    sys.stdout.flush()
    os._exit(code)
