"""Benchmark of the Blender add-on: frame swap of the points object, install + enable time.

Usage:  .venv/bin/python -m bench.bench_addon [--points 100000] [--wheels]

Targets (Blender 5.0, bpy module): showing a new frame of 100k points on the
liquid object <= 20 ms; the extension installs from its zip into a clean user
folder and enables in < 2 s. Each measurement runs in a fresh child process
(bpy can be imported once per process). Prints a table and writes
bench/results/addon.json.
"""

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

from bench.report import write_result
from tools import blender_env

HERE = Path(__file__).resolve()
TARGETS = {"swap_ms": 20.0, "install_enable_s": 2.0}


def child_swap(points, repeats):
    import bpy
    import numpy as np

    points, repeats = int(points), int(repeats)
    module = blender_env.enable_from_source()
    display = sys.modules[module + ".addon.display"]
    cache = sys.modules[module + ".engine.cache"]  # imported by the display module
    scene = bpy.context.scene
    folder = Path(tempfile.mkdtemp(prefix="splashdraft_bench_")) / "bench" / "v001_sph"
    header = {"scene_name": "bench", "scene_hash": "bench", "solver": {"name": "sph", "settings": {}}, "fps": 24,
              "frame_start": 1, "frame_end": 3 + repeats, "particle_spacing": 0.01, "rest_density": 1000.0}
    writer = cache.CacheWriter(folder, header)
    rng = np.random.default_rng(0)
    frames = {}
    # Frames 1-3 for the refill timings; 4 onwards are each shown once by the NODES timing, so the
    # import node cannot answer from its cache of an earlier visit.
    for frame in range(1, 4 + repeats):
        arrays = {"positions": rng.random((points, 3)), "velocities": rng.normal(size=(points, 3)),
                  "ids": np.arange(points), "density": np.full(points, 1000.0), "pressure": rng.random(points),
                  "zone": rng.integers(0, 3, points), "trapped_air": rng.random(points),
                  "wave_crest": rng.random(points), "foam": rng.random(points)}
        writer.write_frame(frame, arrays, time=(frame - 1) / 24, substeps=4, seconds=0.0)  # frame 1 is t = 0
    reader = cache.open_cache(folder)
    for frame in (1, 2, 3):
        frames[frame] = reader.read_frame(frame)
    scene.splashdraft.cache_dir = str(folder.parents[1])
    scene.splashdraft.shot_name = "bench"
    scene.splashdraft.playback = "REFILL"
    bpy.ops.splashdraft.add_liquid_object()
    obj = scene.splashdraft.display_object
    mesh = obj.data

    def best(function):
        times = []
        for i in range(repeats):
            start = time.perf_counter()
            function(i)
            times.append(time.perf_counter() - start)
        return min(times) * 1e3, float(np.median(times)) * 1e3

    write = best(lambda i: display.write_points(mesh, frames[1 + i % 3]))
    read_write = best(lambda i: display.show_frame(scene, 1 + i % 3, force=True))
    read_only = best(lambda i: reader.read_frame(1 + i % 3))
    frame_set = best(lambda i: scene.frame_set(1 + i % 3))
    shown = len(obj.data.vertices)
    nodes = None
    if display.reader_nodes_available():
        scene.splashdraft.playback = "NODES"
        display.refresh(scene)
        obj.modifiers[display.POINTS_MODIFIER].show_viewport = False  # count the reader's mesh

        def show_in_nodes(i):
            scene.frame_set(4 + i)
            evaluated = obj.evaluated_get(bpy.context.evaluated_depsgraph_get())
            count = len(evaluated.to_mesh().vertices)
            evaluated.to_mesh_clear()
            if count != points:
                raise RuntimeError(f"NODES playback showed {count} points, expected {points}")

        nodes = best(show_in_nodes)
    return {"points": points, "repeats": repeats, "nodes_frame_set_ms": nodes,
            "write_points_ms": write, "read_and_show_ms": read_write, "read_frame_ms": read_only,
            "frame_set_with_spheres_ms": frame_set, "shown": shown,
            "blender": bpy.app.version_string}


def child_install(zip_path):
    start = time.perf_counter()
    import bpy

    import_seconds = time.perf_counter() - start
    module, seconds = blender_env.install_zip(zip_path)
    return {"import_bpy_s": import_seconds, "install_enable_s": seconds, "zip": str(zip_path),
            "zip_mb": Path(zip_path).stat().st_size / 1e6, "blender": bpy.app.version_string}


def main(argv=None):
    parser = argparse.ArgumentParser(description="Benchmark the Splashdraft Blender add-on.")
    parser.add_argument("--points", type=int, default=100_000, help="Points per frame. Default: 100000.")
    parser.add_argument("--repeats", type=int, default=12, help="Timed repeats per step. Default: 12.")
    parser.add_argument("--wheels", action="store_true",
                        help="Also time the linux-x64 zip with bundled wheels (built now; wheels come from wheels/).")
    args = parser.parse_args(argv)
    from tools import build_extension

    results = {"machine": platform.platform(), "cpus": os.cpu_count(), "targets": TARGETS}
    swap, _ = blender_env.run_child(HERE, "child_swap", args.points, args.repeats)
    results["swap"] = swap
    out_dir = Path(tempfile.mkdtemp(prefix="splashdraft_dist_"))
    quick = build_extension.build([], use_wheels=False, out_dir=out_dir, stage_dir=out_dir / "stage")[0]
    installs = {"quick": blender_env.run_child(HERE, "child_install", quick)[0]}
    if args.wheels:
        wheel_zip = build_extension.build(["linux-x64"], out_dir=out_dir, stage_dir=out_dir / "stage")[0]
        installs["linux_wheels"] = blender_env.run_child(HERE, "child_install", wheel_zip)[0]
    results["install"] = installs

    rows = [
        ("frame swap: write_points (mesh + 9 attributes)", swap["write_points_ms"], "ms", TARGETS["swap_ms"]),
        ("frame swap: read PLY (sha256) + write_points", swap["read_and_show_ms"], "ms", TARGETS["swap_ms"]),
        ("  of which read_frame", swap["read_frame_ms"], "ms", None),
        ("scene.frame_set incl. handler + sphere modifier", swap["frame_set_with_spheres_ms"], "ms", None),
    ]
    if swap["nodes_frame_set_ms"] is not None:
        rows.append(("NODES playback: frame_set + Import PLY (new frame)", swap["nodes_frame_set_ms"], "ms", TARGETS["swap_ms"]))
    print(f"Splashdraft add-on benchmark, Blender {swap['blender']}, {args.points:,} points, "
          f"best/median of {args.repeats}")
    print(f"{'step':52s} {'best':>9s} {'median':>9s}  target")
    for name, (best, median), unit, target in rows:
        verdict = "" if target is None else f"<= {target:g} {unit} {'ok' if best <= target else 'MISSED'}"
        print(f"{name:52s} {best:7.2f}{unit} {median:7.2f}{unit}  {verdict}")
    for name, item in installs.items():
        ok = "ok" if item["install_enable_s"] < TARGETS["install_enable_s"] else "MISSED"
        label = f"install + enable from zip ({name}, {item['zip_mb']:.1f} MB)"
        print(f"{label:52s} "
              f"{item['install_enable_s']:8.2f}s {'':9s}  < {TARGETS['install_enable_s']:g} s {ok} "
              f"(import bpy {item['import_bpy_s']:.2f} s, not counted)")
    target = write_result("addon.json", results)
    print(f"wrote {target.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1].startswith("child_"):
        blender_env.child_main(globals())
    sys.exit(main())
