"""A wedge started from the add-on, in real Blender (the bpy module), each check in its own child process.

The shot of ``test_addon_blender.build_shot`` (a water block, a rock, a keyed paddle; 4 frames)
gets one wedge row, ``fluid.viscosity`` = 0.01 and 0.2, and ``splashdraft.wedge_start`` runs in
the background as a bake does (the wedge runs in a child process; background mode waits). Oracles
outside the add-on: each variant's scene file (the value the engine baked with), the engine's own
bake of that variant scene through its command line in a separate process (PLY bytes must be equal:
the wedge adds nothing to the bake), the PLY frames parsed by ``test_addon_blender.parse_ply``
from the layout in DEVELOPERS.md (what the display object shows must equal them), and Blender's RNA
registry for registration. The two viscosities must give different frames, so a wedge whose rows
were ignored cannot pass.
"""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tools import blender_env

pytestmark = [pytest.mark.blender,
              pytest.mark.skipif(not blender_env.has_bpy(), reason="the bpy module is not installed")]

ROOT = blender_env.ROOT
HERE = Path(__file__).resolve()
VALUES = (0.01, 0.2)


@pytest.mark.parametrize("workers", [0, 2])
def test_wedge_from_the_panel_bakes_each_variant_as_a_version_the_object_shows(tmp_path, workers):
    """workers 0: one background process bakes the variants in turn; 2: a local Dask cluster inside it."""
    result, output = blender_env.run_child(HERE, "child_wedge", tmp_path, workers, timeout=900)
    assert result["operator"] == ["FINISHED"], output[-4000:]
    assert result["state"] == "finished" and "2 variants complete" in result["message"], result
    names = [v["name"] for v in result["versions"]]
    assert names == ["v001_wedge/v00_viscosity-0.01", "v001_wedge/v01_viscosity-0.2"], names
    for version, value in zip(result["versions"], VALUES):
        assert version["frames"] == 4 and version["complete"], version
        assert version["scene_viscosity"] == value  # the engine baked this variant with this value
        assert version["playback"], version
        for frame in version["playback"]:
            assert frame["mesh_count"] == frame["cache_count"] > 0, frame
            assert frame["max_position_error"] <= 1e-6 and frame["ids_equal"], frame
    assert result["same_object"], "every variant shows on the one liquid object"
    assert result["variants_differ"], "viscosity 0.01 and 0.2 baked the same frames: the row was not applied"

    # The engine's plain bake of each variant scene, run here in a separate process: byte-identical frames.
    for version in result["versions"]:
        reference = tmp_path / f"reference_{version['name'].split('/')[-1]}"
        done = subprocess.run([sys.executable, "-m", "engine", "bake", version["scene_file"], "--out", str(reference),
                               "--progress", "none"], cwd=ROOT, capture_output=True, text=True, timeout=600)  # fmt: skip
        assert done.returncode == 0, done.stderr
        folder = Path(version["folder"])
        for frame in range(1, 5):
            name = f"points_{frame:04d}.ply"
            assert (folder / name).read_bytes() == (reference / name).read_bytes(), f"{version['name']} {name}"

    refusals = result["refusals"]
    assert "wedge row 1" in refusals["duplicate"] and "listed twice" in refusals["duplicate"], refusals
    assert "wedge row 2: Values is empty" in refusals["empty"], refusals
    assert "'emitters.Tap' names nothing" in refusals["unknown"] and "Water" in refusals["unknown"], refusals
    assert refusals["versions_after"] == names, "a refused wedge leaves no version behind"
    assert "Traceback" not in json.dumps(refusals)
    assert result["registration"] == {"after_disable": False, "after_enable": True}


def test_wedge_panel_draws_only_existing_properties_and_operators():
    """The wedge panel, drawn with one row, names only properties and operators that exist (Blender's RNA)."""
    result, output = blender_env.run_child(HERE, "child_panel", timeout=300)
    assert result["missing"] == [], result["missing"]
    assert result["props_drawn"] >= 4 and result["operators_drawn"] >= 3, result
    assert result["category"] == "Splashdraft"


# --- child side (bpy imported) ------------------------------------------------------------------

def child_wedge(tmp, workers):
    import bpy
    import addon_utils

    from tests.test_addon_blender import build_shot, mesh_arrays, parse_ply

    tmp = Path(tmp)
    scene = blender_env.reset_scene()
    module = blender_env.enable_from_source()
    build_shot(scene, tmp / "cache")
    shot = scene.splashdraft
    shot.playback = "REFILL"  # this child checks the mesh the add-on writes
    wedge = scene.splashdraft_wedge
    row = wedge.rows.add()
    row.key, row.values = "fluid.viscosity", ", ".join(str(v) for v in VALUES)
    wedge.workers = int(workers)
    result = bpy.ops.splashdraft.wedge_start()
    out = {"operator": sorted(result), "state": wedge.state, "message": wedge.message, "versions": []}
    obj = shot.display_object
    last_frames = []
    for index, version in enumerate(shot.versions):
        shot.versions_index = index
        folder = Path(version.folder)
        scene_file = folder / "scene" / "scene.json"
        entry = {"name": version.name, "frames": version.frames, "complete": version.complete,
                 "folder": str(folder), "scene_file": str(folder.parent / "scenes" / folder.name / "scene.json"),
                 "scene_viscosity": json.loads(scene_file.read_text())["fluid"]["viscosity"], "playback": []}
        for frame in range(1, 5):
            scene.frame_set(frame)
            records = parse_ply(folder / f"points_{frame:04d}.ply")
            positions, _, ids = mesh_arrays(shot.display_object)
            cache = np.stack([records["x"], records["y"], records["z"]], axis=1)
            same = len(positions) == len(records)
            entry["playback"].append({
                "frame": frame, "mesh_count": len(positions), "cache_count": int(len(records)),
                "max_position_error": float(np.abs(positions - cache).max()) if same else 1.0,
                "ids_equal": bool(same and np.array_equal(ids, records["id"]))})
        last_frames.append(cache)
        out["versions"].append(entry)
    out["same_object"] = shot.display_object == obj and obj is not None
    out["variants_differ"] = len(last_frames) == 2 and (
        last_frames[0].shape != last_frames[1].shape or not np.array_equal(last_frames[0], last_frames[1]))

    # Refusals, in the panel's words, leaving no version behind.
    refusals = {}
    for label, key, values in (("duplicate", "fluid.viscosity", "0.01, 0.01"), ("empty", None, None),
                               ("unknown", "emitters.Tap.speed", "1, 2")):
        if key is not None:
            row.key, row.values = key, values
        else:
            row.key, row.values = "fluid.viscosity", "0.03"
            wedge.rows.add().values = ""
        try:
            bpy.ops.splashdraft.wedge_start()
        except RuntimeError:
            pass  # an operator's ERROR report reaches a script as RuntimeError; the panel keeps the message
        refusals[label] = wedge.message if wedge.state == "failed" else f"not refused (state {wedge.state})"
        while len(wedge.rows) > 1:
            wedge.rows.remove(1)
    refusals["versions_after"] = [v.name for v in shot.versions]
    out["refusals"] = refusals

    addon_utils.disable(module, default_set=True)
    after_disable = hasattr(bpy.types.Scene, "splashdraft_wedge") or hasattr(bpy.types, "SPLASHDRAFT_PT_wedge")
    addon_utils.enable(module, default_set=True)
    out["registration"] = {"after_disable": after_disable,
                           "after_enable": hasattr(bpy.types.Scene, "splashdraft_wedge")}
    return out


def child_panel():
    import bpy

    from tests.test_addon_blender import RecordingLayout

    blender_env.reset_scene()
    module = blender_env.enable_from_source()
    wedge_ui = sys.modules[module + ".addon.wedge_ui"]
    scene = bpy.context.scene
    scene.splashdraft_wedge.rows.add()
    log = {"missing": [], "props_drawn": 0, "operators_drawn": 0}

    class Context:
        pass

    Context.scene = scene
    wedge_ui.SPLASHDRAFT_PT_wedge.draw(type("Self", (), {"layout": RecordingLayout(log)})(), Context)
    log["category"] = wedge_ui.SPLASHDRAFT_PT_wedge.bl_category
    return log


if __name__ == "__main__":
    blender_env.child_main(globals())
