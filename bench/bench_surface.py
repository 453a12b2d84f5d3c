"""Benchmark of the liquid surface (the add-on's Geometry Nodes surface) at splash-frame sizes.

Usage:  .venv/bin/python -m bench.bench_surface [--points 100000] [--repeats 5]

Target (Blender 5.0, bpy module, 2 cores): building the joined surface of one
100k-particle frame <= 0.3 s. The frame is made up here: a resting pool (a
jittered lattice slab), a one-particle-thick curved sheet rising from it and a
cloud of droplets (70 / 20 / 10 % of the points), at 1 cm spacing. Each repeat
moves every particle a little (a new frame: nothing is reused from the last
evaluation) and times Blender's evaluation of the object (refill of the mesh
excluded). Runs in a child process (bpy can be imported once per process).
Prints a table and writes bench/results/surface.json.
"""

import argparse
import json
import platform
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

from tools import blender_env

HERE = Path(__file__).resolve()
TARGET_SECONDS = 0.3


def splash_frame(points, spacing, rng):
    """(points, 3) positions in metres: pool slab, curved sheet and droplets of one splash frame."""
    import numpy as np

    pool_count, sheet_count = int(points * 0.7), int(points * 0.2)
    side = int(round((pool_count / 10) ** 0.5))
    axis = (np.arange(side) + 0.5) * spacing
    layers = (np.arange(10) + 0.5) * spacing
    pool = np.stack(np.meshgrid(axis, axis, layers, indexing="ij"), -1).reshape(-1, 3)[:pool_count]
    pool += rng.normal(scale=0.05 * spacing, size=pool.shape)
    width = side * spacing
    u = rng.random(sheet_count) * np.pi
    v = rng.random(sheet_count) * width
    radius = 0.3 * width
    sheet = np.stack([0.5 * width + radius * np.cos(u), v, 10 * spacing + radius * np.sin(u)], axis=1)
    drops = rng.random((points - len(pool) - sheet_count, 3)) * [width, width, 0.6 * width] + [0, 0, 12 * spacing]
    return np.concatenate([pool, sheet, drops])


def child_surface(points, repeats):
    import bpy
    import numpy as np

    points, repeats = int(points), int(repeats)
    blender_env.reset_scene()
    module = blender_env.enable_from_source()
    display = sys.modules[module + ".addon.display"]
    spacing = 0.01
    rng = np.random.default_rng(0)
    mesh = bpy.data.meshes.new("bench liquid")
    obj = bpy.data.objects.new("bench liquid", mesh)
    bpy.context.scene.collection.objects.link(obj)
    modifier = obj.modifiers.new("surface", "NODES")
    modifier.node_group = display.surface_group(display.liquid_material())
    for name, value in display.surface_inputs(spacing).items():
        modifier[modifier.node_group.interface.items_tree[name].identifier] = value
    base = splash_frame(points, spacing, rng)
    seconds, sizes = [], []
    for _ in range(repeats + 1):
        positions = base + rng.normal(scale=0.02 * spacing, size=base.shape)
        velocities = rng.normal(size=base.shape)
        display.write_points(mesh, {"positions": positions, "velocities": velocities, "ids": np.arange(points),
                                    "density": np.full(points, 1000.0), "pressure": np.zeros(points)})
        start = time.perf_counter()
        evaluated = obj.evaluated_get(bpy.context.evaluated_depsgraph_get())
        seconds.append(time.perf_counter() - start)
        result = evaluated.to_mesh()
        sizes.append((len(result.vertices), len(result.polygons)))
        evaluated.to_mesh_clear()
    return {"blender": bpy.app.version_string, "seconds": seconds[1:], "first_seconds": seconds[0],
            "vertices": sizes[-1][0], "faces": sizes[-1][1]}


def main(argv=None):
    parser = argparse.ArgumentParser(description="Time the liquid surface build of one splash frame in Blender.")
    parser.add_argument("--points", type=int, default=100_000, help="Particles in the frame. Default: 100000.")
    parser.add_argument("--repeats", type=int, default=5, help="Timed frames after one warm-up. Default: 5.")
    args = parser.parse_args(argv)
    result, _ = blender_env.run_child(HERE, "child_surface", args.points, args.repeats, timeout=1200)
    seconds = sorted(result["seconds"])
    best, median = seconds[0], seconds[len(seconds) // 2]
    verdict = "met" if median <= TARGET_SECONDS else "missed"
    print(f"Splashdraft liquid surface, Blender {result['blender']}, {args.points:,} particles at 1 cm "
          f"(defaults: reach 1.0, voxel 0.6, smoothing 3 spacings)")
    print(f"{'step':40s} {'best':>8s} {'median':>8s}  target")
    print(f"{'surface build per frame':40s} {best:7.3f}s {median:7.3f}s  <= {TARGET_SECONDS} s: {verdict}")
    print(f"{'first frame (warm-up)':40s} {result['first_seconds']:7.3f}s")
    print(f"surface: {result['vertices']:,} vertices, {result['faces']:,} faces")
    results = {"points": args.points, "blender": result["blender"], "machine": platform.machine(),
               "best_seconds": best, "median_seconds": median, "all_seconds": result["seconds"],
               "vertices": result["vertices"], "faces": result["faces"], "target_seconds": TARGET_SECONDS,
               "target_met": median <= TARGET_SECONDS}
    target = ROOT / "bench" / "results" / "surface.json"
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(json.dumps(results, indent=1) + "\n")
    print(f"wrote {target.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1].startswith("child_"):
        blender_env.child_main(globals())
    else:
        sys.exit(main())
