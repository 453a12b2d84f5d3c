"""Preview against reference in the sidebar: measure in the background, show the figures.

The operator runs the engine's ``compare`` in a child process (like a bake: ``jobs.BakeJob``
reads its JSON progress lines; Blender stays usable, Esc or Stop ends it), stores the result
beside the preview version (``comparison.report_paths``) and the panel under Bakes shows the
summary and a short per-frame list whenever both versions exist.
"""

import sys

import bpy

from . import comparison, display, jobs, paths
from .ui import SidebarPanel

_state = {}          # "job": the running compare BakeJob; "pair", "folders", "paths", "scene"
_reports = {}        # json path -> (mtime_ns, result or None)


def is_comparing() -> bool:
    job = _state.get("job")
    return job is not None and job.is_running


def current_pair(scene) -> tuple | None:
    """(reference row, preview row) of the scene's Bakes list to compare, or None."""
    shot = scene.splashdraft
    shown = display.current_version(scene)
    if shown is None:
        return None
    rows = {row.name: row for row in shot.versions}
    pair = comparison.pick_pair([{"name": r.name, "solver": r.solver, "frames": r.frames} for r in shot.versions],
                                shown.name)
    return (rows[pair[0]], rows[pair[1]]) if pair else None


def stored_result(scene) -> tuple:
    """(pair, stored result or None) for the scene's current pair; (None, None) without a pair."""
    pair = current_pair(scene)
    if pair is None:
        return None, None
    json_path, _, _ = comparison.report_paths(pair[1].folder, pair[0].name)
    try:
        mtime = json_path.stat().st_mtime_ns
    except OSError:
        return pair, None
    cached = _reports.get(str(json_path))
    if cached is None or cached[0] != mtime:
        cached = (mtime, comparison.read_report(json_path))
        _reports[str(json_path)] = cached
    return pair, cached[1]


class SPLASHDRAFT_OT_compare(bpy.types.Operator):
    """Measure the learned preview against the reference bake in the background: distance between the
    two point clouds per frame, motion energy and over-energy (Esc stops it)"""

    bl_idname = "splashdraft.compare"
    bl_label = "Measure preview against reference"
    bl_options = {"REGISTER"}

    _timer = None

    @classmethod
    def poll(cls, context) -> bool:
        return context.scene is not None and not is_comparing() and current_pair(context.scene) is not None

    def execute(self, context) -> set[str]:
        pair = current_pair(context.scene)
        if pair is None:
            self.report({"ERROR"}, "compare: bake a Reference and a Learned preview version of this shot first")
            return {"CANCELLED"}
        reference, preview = pair
        json_path, _, png_path = comparison.report_paths(preview.folder, reference.name)
        argv = comparison.compare_command(python=sys.executable, python_args=tuple(bpy.app.python_args),
                                          extension_root=paths.EXTENSION_ROOT, reference_dir=reference.folder,
                                          preview_dir=preview.folder, plot_path=png_path,
                                          wheel_site=paths.wheel_site())
        try:
            job = jobs.BakeJob(argv, cwd=preview.folder)
        except OSError as exc:
            self.report({"ERROR"}, f"compare: cannot start the engine ({exc.strerror or exc}); reinstall the extension")
            return {"CANCELLED"}
        _state.update(job=job, names=(reference.name, preview.name), json_path=json_path,
                      folders={reference.name: reference.folder, preview.name: preview.folder})
        if bpy.app.background or context.window is None:
            job.wait()  # background mode and scripts: no event loop, so wait here
            return self._finish()
        self._timer = context.window_manager.event_timer_add(0.2, window=context.window)
        context.window_manager.modal_handler_add(self)
        return {"RUNNING_MODAL"}

    def modal(self, context, event) -> set[str]:
        job = _state["job"]
        if event.type == "ESC" and event.value == "PRESS":
            job.cancel()
        if event.type != "TIMER":
            return {"PASS_THROUGH"}
        job.poll()
        for area in context.screen.areas if context.screen else ():
            if area.type == "VIEW_3D":
                area.tag_redraw()
        if job.is_running:
            return {"PASS_THROUGH"}
        context.window_manager.event_timer_remove(self._timer)
        self._timer = None
        return self._finish()

    def _finish(self):
        job, (reference, preview) = _state["job"], _state["names"]
        progress = job.progress
        if progress.state == "cancelled":
            self.report({"WARNING"}, "compare stopped; nothing was stored")
            return {"CANCELLED"}
        result = comparison.parse_result(job.stdout_lines) if progress.state == "finished" else None
        if result is None:
            message = comparison.short_message(progress.message or "no result", _state["folders"])
            self.report({"ERROR"}, f"compare {preview} against {reference}: {message}")
            return {"CANCELLED"}
        from ..engine.compare import format_table

        try:
            comparison.write_report(result, _state["json_path"], format_table(result))
        except OSError as exc:
            self.report({"ERROR"}, f"compare: cannot store the result in {preview} ({exc.strerror or exc}); "
                        "check the cache folder's permissions")
            return {"CANCELLED"}
        lines = comparison.summary_lines(result)
        self.report({"INFO"}, f"{preview} against {reference}: {lines[1]}; {lines[3]}")
        return {"FINISHED"}


class SPLASHDRAFT_OT_stop_compare(jobs.StopJob, bpy.types.Operator):
    """Stop the running measurement; nothing is stored"""

    bl_idname = "splashdraft.stop_compare"
    bl_label = "Stop measuring"

    @classmethod
    def running_job(cls) -> jobs.BakeJob | None:
        return _state.get("job")


class SPLASHDRAFT_PT_fidelity(SidebarPanel, bpy.types.Panel):
    bl_label = "Preview against reference"
    bl_idname = "SPLASHDRAFT_PT_fidelity"
    bl_parent_id = "SPLASHDRAFT_PT_versions"

    def draw(self, context) -> None:
        layout = self.layout
        pair, result = stored_result(context.scene)
        if pair is None:
            layout.label(text="Bake a Reference and a Learned preview to compare")
            return
        reference, preview = pair
        layout.label(text=f"{preview.name} against {reference.name}")
        if is_comparing():
            job = _state["job"]
            text = f"Measuring frame {job.progress.done} of {job.progress.total or '?'}"
            if hasattr(layout, "progress"):
                layout.progress(factor=job.progress.fraction, type="BAR", text=text)
            else:
                layout.label(text=text)
            layout.operator("splashdraft.stop_compare", icon="CANCEL")
            return
        layout.operator("splashdraft.compare", icon="DRIVER_DISTANCE")
        if result is None:
            return
        column = layout.column(align=True)
        for line in comparison.summary_lines(result):
            column.label(text=line)
        box = layout.box()
        box.label(text="Per frame (distance in spacings)")
        frames = box.column(align=True)
        for line in comparison.frame_lines(result):
            frames.label(text=line)
        _, table, plot = comparison.report_paths(preview.folder, reference.name)
        row = box.row(align=True)
        for path, text, icon in ((table, "Every frame", "TEXT"), (plot, "Plot", "IMAGE_DATA")):
            if path.is_file():
                row.operator("wm.path_open", text=text, icon=icon).filepath = str(path)


classes = (SPLASHDRAFT_OT_compare, SPLASHDRAFT_OT_stop_compare, SPLASHDRAFT_PT_fidelity)


def register() -> None:
    for cls in classes:
        bpy.utils.register_class(cls)


def unregister() -> None:
    job = _state.get("job")
    if job is not None and job.is_running:
        job.cancel()
    _state.clear()
    _reports.clear()
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
