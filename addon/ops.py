"""Operators: estimate, bake (modal, or waiting in background/scripts), cancel, versions, export.

Operators stay thin: they gather settings, call plain functions (``export``,
``jobs``, ``display``) and report. One bake runs at a time.
"""

import shutil
import sys
import tempfile
import time
from pathlib import Path

import bpy
from bpy.props import BoolProperty, EnumProperty, StringProperty

from . import display, export, jobs, paths
from .errors_ui import AddonError
from .versions import INPUT_FOLDER, list_versions, next_version_dir

_job = None            # the running jobs.BakeJob
_job_context = {}      # scene name, version name of the running bake


def is_baking():
    return _job is not None and _job.is_running


def _worker_args():
    site = paths.wheel_site()
    return dict(python=sys.executable, python_args=tuple(bpy.app.python_args),
                extension_root=paths.EXTENSION_ROOT, wheel_site=site)


def sync_versions(scene, select=None):
    """Refresh the scene's version list from the shot folder; optionally show the version named ``select``."""
    shot = scene.splashdraft
    try:
        found = list_versions(paths.shot_dir(scene))
    except AddonError:
        found = []
    shown = display.current_version(scene)
    keep = select or (shown.name if shown is not None else None)
    shot.versions.clear()
    for info in found:
        row = shot.versions.add()
        row.name, row.folder, row.solver = info["name"], str(info["path"]), info["solver"]
        row.frames, row.particles, row.complete = info["frames"], info["particles"], info["complete"]
    names = [info["name"] for info in found]
    if keep in names:
        index = names.index(keep)
    else:
        index = len(names) - 1 if names else 0
    if shot.versions_index != index:
        shot.versions_index = index  # its update callback re-shows the frame
    else:
        display.refresh(scene)


def estimate_scene(scene, input_dir):
    """Export the shot to ``input_dir`` and run the engine's estimate.

    Returns:
        (estimate dict or None, message, scene path).
    """
    scene_path, _ = export.build_scene(scene, input_dir)
    argv = jobs.estimate_command(scene_path=scene_path, solver=scene.splashdraft.solver, **_worker_args())
    estimate, message = jobs.run_estimate(argv)
    shot = scene.splashdraft
    if estimate is not None:
        shot.estimate_text = jobs.summarize_estimate(estimate)
        shot.is_over_budget = False
    else:
        shot.is_over_budget = "budget" in message.lower()
        if shot.is_over_budget:
            message += "; in the Splashdraft tab, raise Particle spacing or the Particle budget"
        shot.estimate_text = message
    return estimate, message, scene_path


def _check_solver(scene):
    if scene.splashdraft.solver == "learned" and not paths.is_learned_available():
        raise AddonError("solver Learned preview: no trained model is shipped with this build; "
                         "choose the Reference solver")


class SPLASHDRAFT_OT_estimate(bpy.types.Operator):
    """Export the shot and estimate particles, memory, disk and time of a bake"""

    bl_idname = "splashdraft.estimate"
    bl_label = "Estimate"
    bl_options = {"REGISTER"}

    def execute(self, context):
        scene = context.scene
        folder = Path(tempfile.mkdtemp(prefix="splashdraft_estimate_"))
        try:
            estimate, message, _ = estimate_scene(scene, folder)
        except AddonError as exc:
            self.report({"ERROR"}, str(exc))
            return {"CANCELLED"}
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        if estimate is None:
            self.report({"ERROR"}, message)
            return {"CANCELLED"}
        self.report({"INFO"}, "Estimate: " + scene.splashdraft.estimate_text)
        return {"FINISHED"}


class _BakeUI:
    """What the bake worker's progress does to Blender (``jobs.tick``'s ``ui``)."""

    def __init__(self, context, scene_name, shot_label, version_name, report):
        self.window_manager = context.window_manager
        self.workspace = context.workspace
        self.scene_name, self.version_name, self.report = scene_name, version_name, report
        self.label = f"{shot_label} {version_name}"
        self.has_listed = False

    @property
    def scene(self):
        return bpy.data.scenes.get(self.scene_name)

    def frame_ready(self, frame):
        scene = self.scene
        if scene is None:
            return
        if not self.has_listed:
            # First finished frame: list the new version and show it while the bake goes on.
            sync_versions(scene, select=self.version_name)
            self.has_listed = True
        else:
            shown = display.current_version(scene)
            if shown is not None and shown.name == self.version_name:
                display.show_frame(scene, force=True)

    def progress(self, progress):
        scene = self.scene
        if scene is not None:
            scene.splashdraft.bake_state = progress.state
            scene.splashdraft.bake_fraction = progress.fraction
            scene.splashdraft.bake_message = progress.status_text()
        if self.workspace is not None:
            self.workspace.status_text_set(progress.status_text(self.label))
        self.window_manager.progress_update(int(progress.fraction * 100))

    def finished(self, progress):
        scene = self.scene
        if scene is not None:
            sync_versions(scene, select=self.version_name)
            scene.splashdraft.bake_message = progress.status_text()
        if self.workspace is not None:
            self.workspace.status_text_set(None)
        self.window_manager.progress_end()
        level = {"finished": "INFO", "cancelled": "WARNING"}.get(progress.state, "ERROR")
        self.report({level}, progress.status_text(self.label))


class SPLASHDRAFT_OT_bake(bpy.types.Operator):
    """Estimate, then bake the shot into a new cache version in a separate process (Esc stops it after the current frame)"""

    bl_idname = "splashdraft.bake"
    bl_label = "Bake liquid"
    bl_options = {"REGISTER"}

    wait: BoolProperty(
        name="Wait for the result", description="Bake in the foreground and return when it is done "
        "(always so in background mode)", default=False, options={"SKIP_SAVE"})

    _timer = None
    _ui = None

    @classmethod
    def poll(cls, context):
        return context.scene is not None and not is_baking()

    def _start(self, context):
        global _job
        scene = context.scene
        _check_solver(scene)
        version_dir = next_version_dir(paths.shot_dir(scene), scene.splashdraft.solver)
        version_dir.mkdir(parents=True, exist_ok=False)
        try:
            estimate, message, scene_path = estimate_scene(scene, version_dir / INPUT_FOLDER)
            if estimate is None:
                raise AddonError(f"bake refused: {message}")
        except BaseException:
            shutil.rmtree(version_dir, ignore_errors=True)  # nothing was baked: leave no empty version behind
            raise
        self.report({"INFO"}, f"Baking {version_dir.name}: {scene.splashdraft.estimate_text}")
        argv = jobs.bake_command(scene_path=scene_path, out_dir=version_dir, solver=scene.splashdraft.solver,
                                 **_worker_args())
        _job = jobs.BakeJob(argv, cwd=str(version_dir))
        _job_context.update(scene=scene.name, shot=paths.shot_name(scene), version=version_dir.name,
                            folder=str(version_dir))
        scene.splashdraft.bake_state, scene.splashdraft.bake_fraction = "starting", 0.0
        scene.splashdraft.bake_message = ""
        display.ensure_display_object(scene)
        return _ui_for(context, self)

    def execute(self, context):
        try:
            ui = self._start(context)
        except AddonError as exc:
            self.report({"ERROR"}, str(exc))
            return {"CANCELLED"}
        context.window_manager.progress_begin(0, 100)
        if bpy.app.background or self.wait or context.window is None:
            return self._run_to_end(ui)
        self._ui = ui
        self._timer = context.window_manager.event_timer_add(0.2, window=context.window)
        context.window_manager.modal_handler_add(self)
        return {"RUNNING_MODAL"}

    def _run_to_end(self, ui):
        # Background mode / scripts: the same worker and the same tick, on this thread.
        shown = -1
        while jobs.tick(_job, ui):
            if _job.progress.done != shown:
                shown = _job.progress.done
                print(_job.progress.status_text(_job_context["shot"]), flush=True)
            time.sleep(0.1)
        return {"FINISHED"} if _job.progress.state == "finished" else {"CANCELLED"}

    def modal(self, context, event):
        if event.type == "ESC" and event.value == "PRESS":
            _job.cancel()
        if event.type != "TIMER":
            return {"PASS_THROUGH"}
        if jobs.tick(_job, self._ui):
            return {"PASS_THROUGH"}
        context.window_manager.event_timer_remove(self._timer)
        self._timer = None
        return {"FINISHED"} if _job.progress.state == "finished" else {"CANCELLED"}


def _ui_for(context, operator):
    return _BakeUI(context, _job_context["scene"], _job_context["shot"], _job_context["version"], operator.report)


class SPLASHDRAFT_OT_stop_bake(bpy.types.Operator):
    """Stop the running bake after its current frame; finished frames are kept (press again to stop at once)"""

    bl_idname = "splashdraft.stop_bake"
    bl_label = "Stop bake"

    @classmethod
    def poll(cls, context):
        return is_baking()

    def execute(self, context):
        _job.cancel()
        self.report({"INFO"}, "Stopping the bake after the current frame")
        return {"FINISHED"}


class SPLASHDRAFT_OT_refresh_versions(bpy.types.Operator):
    """Read the shot's cache folder again and list its bakes"""

    bl_idname = "splashdraft.refresh_versions"
    bl_label = "Refresh versions"

    def execute(self, context):
        sync_versions(context.scene)
        return {"FINISHED"}


class SPLASHDRAFT_OT_add_liquid_object(bpy.types.Operator):
    """Create (or repair) the points object that shows the chosen bake"""

    bl_idname = "splashdraft.add_liquid_object"
    bl_label = "Show liquid"

    def execute(self, context):
        obj = display.ensure_display_object(context.scene)
        sync_versions(context.scene)
        display.show_frame(context.scene, force=True)
        self.report({"INFO"}, f'Liquid shown on "{obj.name}"')
        return {"FINISHED"}


EXPORT_ITEMS = (
    ("ALEMBIC", "Alembic (.abc)", "Animated point mesh with per-frame point counts"),
    ("USD", "USD (.usdc)", "Animated point mesh in a USD crate file"),
)


class SPLASHDRAFT_OT_export_liquid(bpy.types.Operator):
    """Export the shown bake as an animated point mesh through Blender's Alembic or USD exporter"""

    bl_idname = "splashdraft.export_liquid"
    bl_label = "Export liquid"

    file_format: EnumProperty(name="Format", description="File format to write", items=EXPORT_ITEMS,
                              default="ALEMBIC")
    filepath: StringProperty(name="File", description="Where to write the file", subtype="FILE_PATH")

    @classmethod
    def poll(cls, context):
        return context.scene.splashdraft.display_object is not None

    def invoke(self, context, event):
        if not self.filepath:
            suffix = ".abc" if self.file_format == "ALEMBIC" else ".usdc"
            self.filepath = str(Path(bpy.path.abspath("//") or tempfile.gettempdir()) /
                                (paths.shot_name(context.scene) + suffix))
        context.window_manager.fileselect_add(self)
        return {"RUNNING_MODAL"}

    def execute(self, context):
        if not self.filepath:
            self.report({"ERROR"}, "export: no file chosen; set File")
            return {"CANCELLED"}
        try:
            written = export_liquid(context.scene, bpy.path.abspath(self.filepath), self.file_format)
        except AddonError as exc:
            self.report({"ERROR"}, str(exc))
            return {"CANCELLED"}
        self.report({"INFO"}, f"Exported {written}")
        return {"FINISHED"}


def export_liquid(scene, filepath, file_format):
    """Write the shown bake to ``filepath`` (Alembic or USD); returns the path.

    The exporters skip a mesh without modifiers as static and see an empty
    point cloud after Mesh to Points (host notes §9), so the sphere and
    surface modifiers are switched off and a pass-through one added for the
    export, then everything is put back.
    """
    obj = scene.splashdraft.display_object
    version = display.current_version(scene)
    if obj is None or version is None:
        raise AddonError("export: nothing to export; bake the shot and show a version first")
    reader = display.reader_for(version.folder)
    if not reader.frames:
        raise AddonError(f"export: version {version.name} has no finished frames; bake it first")
    start, end = reader.frames[0], reader.frames[-1]
    Path(filepath).parent.mkdir(parents=True, exist_ok=True)
    states = {m.name: (m.show_viewport, m.show_render) for m in obj.modifiers}
    selection = [o for o in scene.objects if o.select_get()]
    view_layer = bpy.context.view_layer
    active = view_layer.objects.active
    pass_through = obj.modifiers.new("Splashdraft export", "NODES")
    pass_through.node_group = display.pass_through_group()
    try:
        for modifier in obj.modifiers:
            # The file reader (NODES playback) makes the points: it stays on.
            if modifier is not pass_through and modifier.name != display.READER_MODIFIER:
                modifier.show_viewport = modifier.show_render = False
        for other in selection:
            other.select_set(False)
        obj.select_set(True)
        view_layer.objects.active = obj
        if file_format == "ALEMBIC":
            bpy.ops.wm.alembic_export(filepath=filepath, start=start, end=end, selected=True,
                                      evaluation_mode="RENDER", export_custom_properties=True,
                                      as_background_job=False)
        else:
            bpy.ops.wm.usd_export(filepath=filepath, selected_objects_only=True, export_animation=True,
                                  evaluation_mode="RENDER", export_materials=False)
    finally:
        obj.modifiers.remove(pass_through)
        for modifier in obj.modifiers:
            if modifier.name in states:
                modifier.show_viewport, modifier.show_render = states[modifier.name]
        obj.select_set(False)
        for other in selection:
            other.select_set(True)
        view_layer.objects.active = active
        display.show_frame(scene, force=True)
    return filepath


class SPLASHDRAFT_OT_copy_points(bpy.types.Operator):
    """Copy the shown bake's PLY point files and manifest to a folder, as they are"""

    bl_idname = "splashdraft.copy_points"
    bl_label = "Copy PLY sequence"

    directory: StringProperty(name="Folder", description="Folder that receives the PLY files", subtype="DIR_PATH")

    def invoke(self, context, event):
        context.window_manager.fileselect_add(self)
        return {"RUNNING_MODAL"}

    def execute(self, context):
        version = display.current_version(context.scene)
        if version is None or not self.directory:
            self.report({"ERROR"}, "copy: choose a shown version and a Folder first")
            return {"CANCELLED"}
        target = Path(bpy.path.abspath(self.directory))
        try:
            count = copy_points(version.folder, target)
        except (OSError, AddonError) as exc:
            self.report({"ERROR"}, f"copy to {target}: {exc}")
            return {"CANCELLED"}
        self.report({"INFO"}, f"Copied {count} PLY files to {target}")
        return {"FINISHED"}


def copy_points(folder, target):
    """Copy the listed frames of the bake ``folder`` and its manifest into ``target``; returns the count."""
    reader = display.reader_for(folder)
    target.mkdir(parents=True, exist_ok=True)
    for frame in reader.frames:
        shutil.copy2(reader.frame_path(frame), target / reader.frame_path(frame).name)
    shutil.copy2(Path(folder) / "manifest.json", target / "manifest.json")
    return len(reader.frames)


classes = (SPLASHDRAFT_OT_estimate, SPLASHDRAFT_OT_bake, SPLASHDRAFT_OT_stop_bake,
           SPLASHDRAFT_OT_refresh_versions, SPLASHDRAFT_OT_add_liquid_object, SPLASHDRAFT_OT_export_liquid,
           SPLASHDRAFT_OT_copy_points)


def register():
    for cls in classes:
        bpy.utils.register_class(cls)


def unregister():
    global _job
    if _job is not None and _job.is_running:
        _job.cancel()  # the worker finishes its frame and exits; finished frames stay on disk
    _job = None
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
