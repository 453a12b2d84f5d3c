"""Wedges from the sidebar: vary a few scene settings of the current shot and bake every combination.

The panel holds a short list of rows, each a setting of the exported scene (a dotted path such as
``fluid.viscosity``, ``particle_spacing`` or ``emitters.<fill object>.speed``) and its values. Start
exports the shot once into a new ``v004_wedge`` version folder and runs the engine's wedge command
there in a background process, as a bake runs (``jobs.BakeJob``; pure helpers in ``wedge_jobs``).
Every variant is one version of the shot (``versions.list_versions``), listed as soon as it has a
frame and shown on the same liquid object as any bake.
"""

import shutil
import time
from pathlib import Path

import bpy
from bpy.props import CollectionProperty, FloatProperty, IntProperty, PointerProperty, StringProperty

from ..engine.wedge import WEDGE_MANIFEST
from . import display, jobs, ops, paths, wedge_jobs
from .errors_ui import AddonError
from .ui import SidebarPanel
from .versions import INPUT_FOLDER, next_version_dir

_job = None  # the running jobs.BakeJob of the wedge
_run = {}  # scene name, wedge folder, progress (wedge_jobs.WedgeProgress), has_selected


def is_wedging() -> bool:
    return _job is not None and _job.is_running


class SPLASHDRAFT_PG_wedge_row(bpy.types.PropertyGroup):
    """One varied setting: a dotted path into the exported scene and the values to try."""

    key: StringProperty(
        name="Setting", default="fluid.viscosity",
        description="Dotted path of a scene setting, e.g. fluid.viscosity, particle_spacing or "
        "emitters.Water.speed (a fill or source object by its name)")  # fmt: skip
    values: StringProperty(
        name="Values", default="",
        description="Values to try, separated by commas, e.g. 0.01, 0.05; numbers, true/false or words")  # fmt: skip


class SPLASHDRAFT_PG_wedge(bpy.types.PropertyGroup):
    """The wedge settings of a scene and the state of its last wedge."""

    rows: CollectionProperty(type=SPLASHDRAFT_PG_wedge_row)
    workers: IntProperty(
        name="Worker processes", default=0, min=0, max=64,
        description="0 bakes the variants one after another in one background process; N bakes them on a local "
        "Dask cluster of N processes (needs dask[distributed] in Blender's Python)")  # fmt: skip
    scheduler: StringProperty(
        name="Farm address", default="",
        description="Address of a Dask scheduler (tcp://host:8786) to send the variants to instead; the cache "
        "folder must be on storage every farm worker sees")  # fmt: skip
    state: StringProperty(name="Wedge state", description="State of the running or last wedge", default="")
    fraction: FloatProperty(name="Wedge progress", description="Share of the wedge's frames baked",
                            min=0.0, max=1.0, subtype="FACTOR")  # fmt: skip
    message: StringProperty(name="Wedge message", description="Last message of the wedge", default="")


class SPLASHDRAFT_OT_wedge_add_row(bpy.types.Operator):
    """Add a setting to vary"""

    bl_idname = "splashdraft.wedge_add_row"
    bl_label = "Add setting"
    bl_options = {"REGISTER", "UNDO"}

    def execute(self, context) -> set[str]:
        context.scene.splashdraft_wedge.rows.add()
        return {"FINISHED"}


class SPLASHDRAFT_OT_wedge_remove_row(bpy.types.Operator):
    """Remove this setting from the wedge"""

    bl_idname = "splashdraft.wedge_remove_row"
    bl_label = "Remove setting"
    bl_options = {"REGISTER", "UNDO"}

    index: IntProperty(name="Row", description="Row to remove (0 is the first)", default=0, min=0)

    def execute(self, context) -> set[str]:
        rows = context.scene.splashdraft_wedge.rows
        if self.index >= len(rows):
            self.report({"ERROR"}, f"wedge: there is no row {self.index + 1}; the list has {len(rows)}")
            return {"CANCELLED"}
        rows.remove(self.index)
        return {"FINISHED"}


def start_wedge(scene) -> Path:
    """Export the shot into a new wedge version folder and start the wedge worker; returns the folder.

    Raises:
        AddonError: bad rows, an unwritable cache folder, or a shot the estimate refuses.
    """
    global _job
    settings = scene.splashdraft_wedge
    ops._check_solver(scene)
    try:
        vary = wedge_jobs.vary_arguments((row.key, row.values) for row in settings.rows)
    except ValueError as exc:
        raise AddonError(str(exc)) from None
    shot_dir = paths.shot_dir(scene)
    wedge_dir = next_version_dir(shot_dir, "wedge")
    try:
        wedge_dir.mkdir(parents=True, exist_ok=False)
    except OSError as exc:
        raise AddonError(f'Cache folder "{shot_dir.parent}": cannot make a wedge folder there '
                         f"({exc.strerror or type(exc).__name__}); choose a folder you can write to") from None  # fmt: skip
    try:
        _, _, scene_path = ops.estimate_scene(scene, wedge_dir / INPUT_FOLDER)
    except AddonError as exc:
        shutil.rmtree(wedge_dir, ignore_errors=True)
        raise AddonError(f"wedge refused: {exc}") from None
    argv = wedge_jobs.wedge_command(scene_path=scene_path, out_dir=wedge_dir, vary=vary, solver=scene.splashdraft.solver,
                                    workers=settings.workers, scheduler=settings.scheduler, **ops._worker_args())  # fmt: skip
    _job = jobs.BakeJob(argv, cwd=str(wedge_dir))
    _run.clear()
    _run.update(scene=scene.name, folder=wedge_dir, progress=wedge_jobs.WedgeProgress(), has_selected=False)
    settings.state, settings.fraction, settings.message = "starting", 0.0, ""
    display.ensure_display_object(scene)
    return wedge_dir


def tick_wedge() -> bool:
    """One step of the running wedge: read its events, list and show variants; True while it runs."""
    events = _job.poll()
    _job.check_grace()
    progress, folder = _run["progress"], _run["folder"]
    changed = [name for name in (wedge_jobs.apply_wedge_event(progress, e) for e in events) if name]
    if not _job.is_running:
        wedge_jobs.settle_wedge(progress, _job.returncode, _job.progress.other_lines)
    scene = bpy.data.scenes.get(_run["scene"])
    if scene is None:
        return _job.is_running
    settings = scene.splashdraft_wedge
    settings.state, settings.fraction, settings.message = progress.state, progress.fraction, progress.status_text()
    baked = [name for name in changed if progress.variants[name]["done"] > 0]
    if baked or not _job.is_running:
        if not _job.is_running and not (folder / WEDGE_MANIFEST).is_file():
            shutil.rmtree(folder, ignore_errors=True)  # refused before planning: leave no empty version
        select = None
        if baked and not _run["has_selected"]:
            select, _run["has_selected"] = f"{folder.name}/{baked[0]}", True  # show the first variant with frames
        ops.sync_versions(scene, select=select)
        shown = display.current_version(scene)
        if shown is not None and shown.name.startswith(folder.name + "/"):
            display.show_frame(scene, force=True)
    return _job.is_running


class SPLASHDRAFT_OT_wedge_start(bpy.types.Operator):
    """Bake the shot once per combination of the listed values, in a background process (each variant becomes a version)"""

    bl_idname = "splashdraft.wedge_start"
    bl_label = "Start wedge"
    bl_options = {"REGISTER"}

    wait: bpy.props.BoolProperty(
        name="Wait for the result", description="Run the wedge in the foreground and return when it is done "
        "(always so in background mode)", default=False, options={"SKIP_SAVE"})  # fmt: skip

    _timer = None

    @classmethod
    def poll(cls, context) -> bool:
        return context.scene is not None and not is_wedging() and not ops.is_baking()

    def execute(self, context) -> set[str]:
        from ..engine.errors import SplashdraftError

        try:
            folder = start_wedge(context.scene)
        except (AddonError, SplashdraftError, OSError) as exc:
            settings = context.scene.splashdraft_wedge
            settings.state, settings.message = "failed", ops._failure_text(exc, "wedge")
            self.report({"ERROR"}, settings.message)
            return {"CANCELLED"}
        self.report({"INFO"}, f"Wedge {folder.name} started: {context.scene.splashdraft.estimate_text} per variant")
        if bpy.app.background or self.wait or context.window is None:
            while tick_wedge():
                time.sleep(0.1)
            return self._finish()
        self._timer = context.window_manager.event_timer_add(0.25, window=context.window)
        context.window_manager.modal_handler_add(self)
        return {"RUNNING_MODAL"}

    def modal(self, context, event) -> set[str]:
        if event.type != "TIMER":
            return {"PASS_THROUGH"}
        if tick_wedge():
            return {"PASS_THROUGH"}
        context.window_manager.event_timer_remove(self._timer)
        self._timer = None
        return self._finish()

    def _finish(self):
        progress = _run["progress"]
        level = {"finished": "INFO", "cancelled": "WARNING"}.get(progress.state, "ERROR")
        self.report({level}, progress.status_text())
        return {"FINISHED"} if progress.state == "finished" else {"CANCELLED"}


class SPLASHDRAFT_OT_wedge_stop(jobs.StopJob, bpy.types.Operator):
    """Stop the running wedge after each variant's current frame; finished frames are kept (again: at once)"""

    bl_idname = "splashdraft.wedge_stop"
    bl_label = "Stop wedge"
    stopping_message = "Stopping the wedge after the current frames"

    @classmethod
    def running_job(cls) -> jobs.BakeJob | None:
        return _job


class SPLASHDRAFT_PT_wedge(SidebarPanel, bpy.types.Panel):
    bl_label = "Wedge"
    bl_idname = "SPLASHDRAFT_PT_wedge"
    bl_options = {"DEFAULT_CLOSED"}

    def draw(self, context) -> None:
        layout = self.layout
        settings = context.scene.splashdraft_wedge
        for index, row in enumerate(settings.rows):
            line = layout.row(align=True)
            line.prop(row, "key", text="")
            line.prop(row, "values", text="")
            line.operator("splashdraft.wedge_remove_row", text="", icon="X").index = index
        layout.operator("splashdraft.wedge_add_row", icon="ADD")
        column = layout.column()
        column.prop(settings, "workers")
        column.prop(settings, "scheduler")
        if is_wedging():
            layout.prop(settings, "fraction", text=settings.message or "Wedge", slider=True)
            layout.operator("splashdraft.wedge_stop", icon="CANCEL")
        else:
            if settings.message:
                layout.label(text=settings.message, icon="ERROR" if settings.state == "failed" else "INFO")
            layout.operator("splashdraft.wedge_start", icon="PLAY")


classes = (SPLASHDRAFT_PG_wedge_row, SPLASHDRAFT_PG_wedge, SPLASHDRAFT_OT_wedge_add_row,
           SPLASHDRAFT_OT_wedge_remove_row, SPLASHDRAFT_OT_wedge_start, SPLASHDRAFT_OT_wedge_stop,
           SPLASHDRAFT_PT_wedge)  # fmt: skip


def register() -> None:
    for cls in classes:
        bpy.utils.register_class(cls)
    bpy.types.Scene.splashdraft_wedge = PointerProperty(type=SPLASHDRAFT_PG_wedge)


def unregister() -> None:
    global _job
    if _job is not None and _job.is_running:
        _job.cancel()  # the worker finishes its frames and exits; finished frames stay on disk
    _job = None
    del bpy.types.Scene.splashdraft_wedge
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
