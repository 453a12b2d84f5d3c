"""Benchmark of the liquid surface (the add-on's Geometry Nodes surface) at splash-frame sizes.

Usage:  .venv/bin/python -m bench.bench_surface [--points 100000] [--repeats 5] [--compare detail=0.6]

Target (Blender 5.0, bpy module, 2 cores): building the joined surface of one
100k-particle frame <= 0.3 s (wall time; CPU seconds of the process are printed beside it,
steadier on a shared machine). ``--compare detail=0.6,smoothing=2`` also times the same frames
with other settings (``reach``, ``detail``, ``smoothing`` in spacings, as ``surface_inputs`` takes
them; ``graph=old`` builds the node graph as it was before 2026-12-05: Volume to Mesh resampling the
volume at the voxel size, the nearest particle looked up in the point cloud), alternating frame by frame, for ratios
measured in the same run; ``--compare-detail 0.6`` is short for ``--compare detail=0.6``. ``--stages``
times the graph cut after each step (``display.SURFACE_STAGES``) on the same frames.

The frame is made up here: a resting pool (a jittered lattice slab), a one-particle-thick curved
sheet rising from it and a cloud of droplets (70 / 20 / 10 % of the points), at 1 cm spacing. Each
repeat moves every particle a little (a new frame: nothing is reused from the last evaluation) and
times Blender's evaluation of one object at a time (refill of the mesh excluded). Runs in a child process (bpy can be imported once per process).
Prints a table and writes bench/results/surface.json.
"""

import argparse
import os
import platform
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

from bench.report import write_result
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


def parse_compare(text):
    """``"detail=0.6,graph=old"`` -> ({"detail": 0.6}, "old"); raises ValueError naming the bad item."""
    settings, graph = {}, "new"
    for item in filter(None, text.split(",")):
        key, _, value = item.partition("=")
        key, value = key.strip(), value.strip()
        if key == "graph" and value in ("new", "old"):
            graph = value
        elif key in ("reach", "detail", "smoothing") and value:
            settings[key] = int(value) if key == "smoothing" else float(value)
        else:
            raise ValueError(f"--compare: cannot read {item!r}; use reach=, detail=, smoothing= (spacings, "
                             f"passes) or graph=new|old, separated by commas")
    return settings, graph


def old_graph_copy(display, group):
    """A copy of the surface group as it was before 2026-12-05 (same mesh and attributes): Volume to Mesh
    resamples the volume at the voxel size, and the nearest particle is looked up in the point cloud."""
    old = group.copy()
    source = next(node for node in old.nodes if node.bl_idname == "NodeGroupInput")
    to_points = next(node for node in old.nodes if node.bl_idname == "GeometryNodeMeshToPoints")
    for node in old.nodes:
        if node.bl_idname == "GeometryNodeVolumeToMesh":
            display._set_resolution_mode(node, "VOXEL_SIZE")
            old.links.new(source.outputs["Voxel Size"], node.inputs["Voxel Size"])
        elif node.bl_idname in ("GeometryNodeSampleNearest", "GeometryNodeSampleIndex"):
            old.links.new(to_points.outputs["Points"], node.inputs["Geometry"])
    return old


def stage_copy(display, group, stage):
    """A copy of the surface group whose output is the geometry after the step node named ``stage``."""
    cut = group.copy()
    sink = next(node for node in cut.nodes if node.bl_idname == "NodeGroupOutput")
    cut.links.new(cut.nodes[stage].outputs[0], sink.inputs["Geometry"])
    return cut


def child_surface(points, repeats, compare="", stages="0"):
    import inspect

    import bpy
    import numpy as np

    points, repeats, stages = int(points), int(repeats), stages == "1"
    settings, graph = parse_compare(compare)
    blender_env.reset_scene()
    module = blender_env.enable_from_source()
    display = sys.modules[module + ".addon.display"]
    spacing = 0.01
    rng = np.random.default_rng(0)
    group = display.surface_group(display.liquid_material())
    defaults = display.surface_inputs(spacing)
    configurations = [("default", group, defaults)]
    if compare:
        configurations.append(("compare", old_graph_copy(display, group) if graph == "old" else group,
                               display.surface_inputs(spacing, **settings)))
    if stages:
        configurations += [(stage, stage_copy(display, group, stage), defaults) for stage in display.SURFACE_STAGES]
    objects = {}
    for label, node_group, inputs in configurations:
        obj = bpy.data.objects.new(f"bench {label}", bpy.data.meshes.new(f"bench {label}"))
        bpy.context.scene.collection.objects.link(obj)
        modifier = obj.modifiers.new("surface", "NODES")
        modifier.node_group = node_group
        for name, value in inputs.items():
            modifier[node_group.interface.items_tree[name].identifier] = value
        objects[label] = obj
    base = splash_frame(points, spacing, rng)
    out = {label: {"seconds": [], "cpu_seconds": []} for label in objects}
    marks = {"zone": np.zeros(points, np.int8), "trapped_air": np.zeros(points), "wave_crest": np.zeros(points),
             "foam": rng.random(points)}
    for repeat in range(repeats + 1):
        positions = base + rng.normal(scale=0.02 * spacing, size=base.shape)
        velocities = rng.normal(size=base.shape)
        for label, obj in objects.items():
            for other in objects.values():  # evaluate one object at a time
                other.hide_viewport = other is not obj
            display.write_points(obj.data, {"positions": positions, "velocities": velocities,
                                            "ids": np.arange(points), "density": np.full(points, 1000.0),
                                            "pressure": np.zeros(points), **marks})
            start, cpu = time.perf_counter(), time.process_time()
            evaluated = obj.evaluated_get(bpy.context.evaluated_depsgraph_get())
            wall, cpu = time.perf_counter() - start, time.process_time() - cpu
            if repeat == 0:
                out[label]["first_seconds"] = wall
            else:
                out[label]["seconds"].append(wall)
                out[label]["cpu_seconds"].append(cpu)
            if evaluated.type == "MESH":
                result = evaluated.to_mesh()
                out[label]["vertices"], out[label]["faces"] = len(result.vertices), len(result.polygons)
                evaluated.to_mesh_clear()
    settings_spacings = {name: p.default for name, p in inspect.signature(display.surface_inputs).parameters.items()
                         if name != "spacing"}
    return {"blender": bpy.app.version_string, **out.pop("default"), "compare": out.pop("compare", None),
            "stages": out, "defaults": settings_spacings}


def middle(values):
    """The median of a list (the upper one of the two middle values for an even count)."""
    return sorted(values)[len(values) // 2]


def load_average():
    """The 1-minute load average (as `uptime` prints it): how busy the shared machine was."""
    return os.getloadavg()[0]


def main(argv=None):
    parser = argparse.ArgumentParser(description="Time the liquid surface build of one splash frame in Blender.")
    parser.add_argument("--points", type=int, default=100_000, help="Particles in the frame. Default: 100000.")
    parser.add_argument("--repeats", type=int, default=5, help="Timed frames after one warm-up. Default: 5.")
    parser.add_argument("--compare", default="",
                        help="Also time other settings, alternating frame by frame: comma-separated reach=, detail=, "
                             "smoothing= (spacings, passes) and graph=new|old (old: the node graph as it was "
                             "before 2026-12-05, same mesh). Default: off.")
    parser.add_argument("--compare-detail", type=float, default=0.0,
                        help="Short for --compare detail=VALUE. Default: off.")
    parser.add_argument("--stages", action="store_true",
                        help="Also time the default graph cut after each of its steps, alternating with the rest, "
                             "to see which step costs what. Default: off.")
    args = parser.parse_args(argv)
    compare = ",".join(filter(None, [args.compare, f"detail={args.compare_detail}" if args.compare_detail else ""]))
    try:
        parse_compare(compare)
    except ValueError as error:
        parser.error(str(error))
    uptime_before = load_average()
    result, _ = blender_env.run_child(HERE, "child_surface", args.points, args.repeats, compare, int(args.stages),
                                      timeout=1200)
    uptime_after = load_average()
    best, median, cpu = min(result["seconds"]), middle(result["seconds"]), middle(result["cpu_seconds"])
    verdict = "met" if median <= TARGET_SECONDS else "missed"
    defaults = result["defaults"]
    print(f"Splashdraft liquid surface, Blender {result['blender']}, {args.points:,} particles at 1 cm "
          f"(defaults: reach {defaults['reach']}, voxel {defaults['detail']}, smoothing {defaults['smoothing']} spacings)")
    print(f"{'step':40s} {'best':>8s} {'median':>8s} {'cpu med':>8s}  target")
    print(f"{'surface build per frame':40s} {best:7.3f}s {median:7.3f}s {cpu:7.3f}s  <= {TARGET_SECONDS} s: {verdict}")
    print(f"{'first frame (warm-up)':40s} {result['first_seconds']:7.3f}s")
    print(f"surface: {result['vertices']:,} vertices, {result['faces']:,} faces")
    results = {"points": args.points, "blender": result["blender"], "machine": platform.machine(),
               "settings_spacings": defaults,
               "best_seconds": best, "median_seconds": median, "all_seconds": result["seconds"],
               "median_cpu_seconds": cpu, "all_cpu_seconds": result["cpu_seconds"],
               "vertices": result["vertices"], "faces": result["faces"], "target_seconds": TARGET_SECONDS,
               "target_met": median <= TARGET_SECONDS}
    other = result.get("compare")
    if other:
        other_median, other_cpu = middle(other["seconds"]), middle(other["cpu_seconds"])
        print(f"{'same frames, ' + compare:40s} {min(other['seconds']):7.3f}s "
              f"{other_median:7.3f}s {other_cpu:7.3f}s  ({other['vertices']:,} vertices; default/this: wall "
              f"{median / other_median:.2f}, cpu {cpu / other_cpu:.2f})")
        results["compare"] = {"settings": compare, "median_seconds": other_median,
                              "median_cpu_seconds": other_cpu, "all_seconds": other["seconds"],
                              "vertices": other["vertices"], "faces": other["faces"],
                              "default_over_this_wall": median / other_median, "default_over_this_cpu": cpu / other_cpu}
    if result["stages"]:
        print(f"{'graph cut after step (same frames)':40s} {'median':>8s} {'cpu med':>8s} {'cpu step':>8s}")
        results["stages"], previous = [], 0.0
        for stage, times in result["stages"].items():
            stage_wall, stage_cpu = middle(times["seconds"]), middle(times["cpu_seconds"])
            print(f"{stage:40s} {stage_wall:7.3f}s {stage_cpu:7.3f}s {stage_cpu - previous:+7.3f}s")
            results["stages"].append({"step": stage, "median_seconds": stage_wall, "median_cpu_seconds": stage_cpu})
            previous = stage_cpu
    print(f"load average (1 min) before / after: {uptime_before:.2f} / {uptime_after:.2f} on {os.cpu_count()} cores")
    results["load_average_before_after"] = [uptime_before, uptime_after]
    target = write_result("surface.json", results)
    print(f"wrote {target.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1].startswith("child_"):
        blender_env.child_main(globals())
    else:
        sys.exit(main())
