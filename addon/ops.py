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

from ..engine.cache import MANIFEST_NAME
from ..engine.errors import CacheError
from . import display, export, jobs, paths
from .errors_ui import AddonError
from .versions import INPUT_FOLDER, list_versions, next_version_dir

_job = None            # the running jobs.BakeJob
_job_context = {}      # scene name, version name of the running bake


def is_baking() -> bool:
    return _job is not None and _job.is_running


def _worker_args():
    site = paths.wheel_site()
    return dict(python=sys.executable, python_args=tuple(bpy.app.python_args),
                extension_root=paths.EXTENSION_ROOT, wheel_site=site)


def sync_versions(scene, select=None) -> None:
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
        row.notes = "\n".join(info["warnings"] + ([info["problem"]] if info["problem"] else []))
    names = [info["name"] for info in found]
    if keep in names:
        index = names.index(keep)
    else:
        index = len(names) - 1 if names else 0
    if shot.versions_index != index:
        shot.versions_index = index  # its update callback re-shows the frame
    else:
        display.refresh(scene)


def _short(message, input_dir):
    """An engine message for the sidebar: no temporary export paths (the object names the mesh)."""
    for folder in {str(Path(input_dir)), str(Path(input_dir).resolve())}:
        message = message.replace(folder + "/meshes/", "").replace(folder + "/", "")
    return message


def estimate_scene(scene, input_dir) -> tuple:
    """Export the shot to ``input_dir`` and estimate it in closed form (nothing is built).

    Returns:
        (Estimate, warnings, scene path); ``warnings`` are short texts about liquid the bake will
        drop (outside the shot bounds).

    Raises:
        AddonError: the shot cannot be exported, is over the budget, or holds no liquid to bake.
    """
    from ..engine.errors import BudgetError, SplashdraftError
    from ..engine.estimate import quick_estimate, work_bound

    shot = scene.splashdraft
    shot.estimate_text, shot.is_over_budget = "", False  # never leave an earlier estimate on show
    try:
        # The engine validates the exported scene here, in Blender, so a bad scene is named at once.
        exported = export.build_scene(scene, input_dir)
        estimate, outside = quick_estimate(exported.scene, solver=shot.solver)
    except BudgetError:
        shot.is_over_budget = True
        try:
            count = work_bound(exported.scene)["fluid"]
        except SplashdraftError:
            count = float("nan")
        limit = int(shot.max_particles)
        coarser = float(shot.particle_spacing) * max(count / limit, 1.0) ** (1.0 / 3.0)
        shot.estimate_text = (f"about {count:,.0f} particles, over the budget of {limit:,}; "
                              f"set Particle spacing to {coarser:.3g} or more, or raise the budget")
        raise AddonError(shot.estimate_text) from None
    except SplashdraftError as exc:
        shot.estimate_text = _short(str(exc), input_dir)
        raise AddonError(shot.estimate_text) from None
    bounds = next((o.name for o in scene.objects if o.splashdraft.role == "BOUNDS"), "the shot bounds")
    warnings = [f'{jobs.plural(entry["outside_bounds"], "particle")} of "{name}" lie outside "{bounds}" '
                "and are dropped" for name, entry in outside.items() if entry["outside_bounds"]]
    if estimate.particles == 0:
        raise AddonError(f'nothing to bake: the liquid lies outside "{bounds}" or against its walls; '
                         "move the liquid fills inside the bounds")
    shot.estimate_text = jobs.summarize_estimate(estimate.as_dict())
    if warnings:
        shot.estimate_text += "; " + "; ".join(warnings)
    return estimate, warnings, exported.path


def needs_confirmation(estimate_seconds, confirm_minutes) -> bool:
    """True when a bake estimated at ``estimate_seconds`` should be confirmed first (0 minutes: never ask)."""
    return confirm_minutes > 0 and estimate_seconds > 60.0 * confirm_minutes


def _failure_text(exc, what):
    """One sidebar line for an OSError or engine error met while doing ``what`` (no traceback)."""
    from ..engine.errors import SplashdraftError

    if isinstance(exc, (AddonError, SplashdraftError)):
        return str(exc)
    name = getattr(exc, "filename", None)
    reason = getattr(exc, "strerror", None) or type(exc).__name__
    target = f' "{name}"' if name else ""
    return f"{what}: cannot use{target} ({reason}); choose another folder or fix its permissions"


def _check_solver(scene):
    if scene.splashdraft.solver == "learned" and not paths.is_learned_available():
        raise AddonError("solver Learned preview: no trained model is shipped with this build; "
                         "choose the Reference solver")


class SPLASHDRAFT_OT_estimate(bpy.types.Operator):
    """Export the shot and estimate particles, memory, disk and time of a bake"""

    bl_idname = "splashdraft.estimate"
    bl_label = "Estimate"
    bl_options = {"REGISTER"}

    def execute(self, context) -> set[str]:
        from ..engine.errors import SplashdraftError

        scene = context.scene
        folder = Path(tempfile.mkdtemp(prefix="splashdraft_estimate_"))
        try:
            _, warnings, _ = estimate_scene(scene, folder)
        except (AddonError, SplashdraftError, OSError) as exc:
            self.report({"ERROR"}, _failure_text(exc, "estimate"))
            return {"CANCELLED"}
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        self.report({"WARNING"} if warnings else {"INFO"}, "Estimate: " + scene.splashdraft.estimate_text)
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
    def scene(self) -> "bpy.types.Scene | None":
        return bpy.data.scenes.get(self.scene_name)

    def frame_ready(self, frame) -> None:
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

    def progress(self, progress) -> None:
        scene = self.scene
        if scene is not None:
            scene.splashdraft.bake_state = progress.state
            scene.splashdraft.bake_fraction = progress.fraction
            scene.splashdraft.bake_message = progress.status_text()
        if self.workspace is not None:
            self.workspace.status_text_set(progress.status_text(self.label))
        self.window_manager.progress_update(int(progress.fraction * 100))

    def finished(self, progress) -> None:
        scene = self.scene
        if scene is not None:
            sync_versions(scene, select=self.version_name)
            scene.splashdraft.bake_message = progress.status_text()
            folder = _job_context.get("folder")
            if folder and progress.state == "finished":
                _learn_speed(folder, progress.seconds)
                problems = display.check_version(folder)
                for problem in problems:
                    display.warn_once((folder, "check", problem), problem)
                if problems:
                    self.report({"WARNING"}, problems[0] + (f" (and {len(problems) - 1} more)"
                                                            if len(problems) > 1 else ""))
        if self.workspace is not None:
            self.workspace.status_text_set(None)
        self.window_manager.progress_end()
        level = {"finished": "INFO", "cancelled": "WARNING"}.get(progress.state, "ERROR")
        self.report({level}, progress.status_text(self.label))


def _learn_speed(folder, seconds):
    """Keep how fast this computer baked (engine.calibration), so the next estimate's time is measured."""
    from ..engine import calibration

    try:
        reader = display.reader_for(folder)
    except CacheError:
        return
    if seconds:
        calibration.record_bake(reader.manifest["solver"]["name"], reader.manifest, seconds)


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
    def poll(cls, context) -> bool:
        return context.scene is not None and not is_baking()

    def _start(self, context):
        global _job
        scene = context.scene
        _check_solver(scene)
        shot_dir = paths.shot_dir(scene)
        version_dir = next_version_dir(shot_dir, scene.splashdraft.solver)
        try:
            version_dir.mkdir(parents=True, exist_ok=False)
        except OSError as exc:
            raise AddonError(f'Cache folder "{shot_dir.parent}": cannot make a bake folder there '
                             f"({exc.strerror or type(exc).__name__}); choose a folder you can write to") from None
        try:
            _, warnings, scene_path = estimate_scene(scene, version_dir / INPUT_FOLDER)
        except AddonError as exc:
            shutil.rmtree(version_dir, ignore_errors=True)  # nothing was baked: leave no empty version behind
            raise AddonError(f"bake refused: {exc}") from None
        except BaseException:
            shutil.rmtree(version_dir, ignore_errors=True)
            raise
        self.report({"WARNING"} if warnings else {"INFO"},
                    f"Baking {version_dir.name}: {scene.splashdraft.estimate_text}")
        model = paths.learned_model() if scene.splashdraft.solver == "learned" else None
        argv = jobs.bake_command(scene_path=scene_path, out_dir=version_dir, solver=scene.splashdraft.solver,
                                 extra=() if model is None else ("--model", str(model)), **_worker_args())
        _job = jobs.BakeJob(argv, cwd=str(version_dir))
        _job_context.update(scene=scene.name, shot=paths.shot_name(scene), version=version_dir.name,
                            folder=str(version_dir))
        scene.splashdraft.bake_state, scene.splashdraft.bake_fraction = "starting", 0.0
        scene.splashdraft.bake_message = ""
        display.ensure_display_object(scene)
        return _ui_for(context, self)

    def invoke(self, context, event) -> set[str]:
        # Ask before a long bake (the estimate is closed-form, so this costs well under a second).
        from ..engine.errors import SplashdraftError

        shot = context.scene.splashdraft
        folder = Path(tempfile.mkdtemp(prefix="splashdraft_estimate_"))
        try:
            estimate, _, _ = estimate_scene(context.scene, folder)
        except (AddonError, SplashdraftError, OSError):
            return self.execute(context)  # execute reports the same failure
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        if context.window is None or not needs_confirmation(estimate.seconds, shot.confirm_minutes):
            return self.execute(context)
        from ..engine.progress import format_duration
        return context.window_manager.invoke_confirm(
            self, event, title="Long bake", message=f"This bake may take about {format_duration(estimate.seconds)} "
            f"({shot.estimate_text}). Start it?", confirm_text="Bake")

    def execute(self, context) -> set[str]:
        from ..engine.errors import SplashdraftError

        try:
            ui = self._start(context)
        except (AddonError, SplashdraftError, OSError) as exc:
            self.report({"ERROR"}, _failure_text(exc, "bake"))
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

    def modal(self, context, event) -> set[str]:
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


class SPLASHDRAFT_OT_stop_bake(jobs.StopJob, bpy.types.Operator):
    """Stop the running bake after its current frame; finished frames are kept (press again to stop at once)"""

    bl_idname = "splashdraft.stop_bake"
    bl_label = "Stop bake"
    stopping_message = "Stopping the bake after the current frame"

    @classmethod
    def running_job(cls) -> jobs.BakeJob | None:
        return _job


class SPLASHDRAFT_OT_refresh_versions(bpy.types.Operator):
    """Read the shot's cache folder again and list its bakes"""

    bl_idname = "splashdraft.refresh_versions"
    bl_label = "Refresh versions"

    def execute(self, context) -> set[str]:
        sync_versions(context.scene)
        return {"FINISHED"}


class SPLASHDRAFT_OT_add_liquid_object(bpy.types.Operator):
    """Create (or repair) the points object that shows the chosen bake"""

    bl_idname = "splashdraft.add_liquid_object"
    bl_label = "Show liquid"

    def execute(self, context) -> set[str]:
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
    def poll(cls, context) -> bool:
        return context.scene.splashdraft.display_object is not None

    def invoke(self, context, event) -> set[str]:
        if not self.filepath:
            suffix = ".abc" if self.file_format == "ALEMBIC" else ".usdc"
            self.filepath = str(Path(bpy.path.abspath("//") or tempfile.gettempdir()) /
                                (paths.shot_name(context.scene) + suffix))
        context.window_manager.fileselect_add(self)
        return {"RUNNING_MODAL"}

    def execute(self, context) -> set[str]:
        if not self.filepath:
            self.report({"ERROR"}, "export: no file chosen; set File")
            return {"CANCELLED"}
        from ..engine.errors import SplashdraftError

        try:
            written = export_liquid(context.scene, bpy.path.abspath(self.filepath), self.file_format)
        except (AddonError, SplashdraftError, OSError) as exc:
            self.report({"ERROR"}, _failure_text(exc, "export"))
            return {"CANCELLED"}
        self.report({"INFO"}, f"Exported {written}")
        return {"FINISHED"}


def export_liquid(scene, filepath, file_format) -> str:
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
    try:
        reader = display.reader_for(version.folder)
    except CacheError:
        raise AddonError(f"export: version {version.name} has no readable manifest.json; "
                         "bake it again or show another version") from None
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

    def invoke(self, context, event) -> set[str]:
        context.window_manager.fileselect_add(self)
        return {"RUNNING_MODAL"}

    def execute(self, context) -> set[str]:
        version = display.current_version(context.scene)
        if version is None or not self.directory:
            self.report({"ERROR"}, "copy: choose a shown version and a Folder first")
            return {"CANCELLED"}
        target = Path(bpy.path.abspath(self.directory))
        try:
            count = copy_points(version.folder, target)
        except CacheError:
            self.report({"ERROR"}, f"copy: version {version.name} has no readable manifest.json; bake it again")
            return {"CANCELLED"}
        except (OSError, AddonError) as exc:
            self.report({"ERROR"}, _failure_text(exc, "copy"))
            return {"CANCELLED"}
        self.report({"INFO"}, f"Copied {count} PLY files to {target}")
        return {"FINISHED"}


def copy_points(folder, target) -> int:
    """Copy the listed frames of the bake ``folder`` and its manifest into ``target``; returns the count."""
    reader = display.reader_for(folder)
    target.mkdir(parents=True, exist_ok=True)
    for frame in reader.frames:
        shutil.copy2(reader.frame_path(frame), target / reader.frame_path(frame).name)
    shutil.copy2(Path(folder) / MANIFEST_NAME, target / MANIFEST_NAME)
    return len(reader.frames)


classes = (SPLASHDRAFT_OT_estimate, SPLASHDRAFT_OT_bake, SPLASHDRAFT_OT_stop_bake,
           SPLASHDRAFT_OT_refresh_versions, SPLASHDRAFT_OT_add_liquid_object, SPLASHDRAFT_OT_export_liquid,
           SPLASHDRAFT_OT_copy_points)


def register() -> None:
    for cls in classes:
        bpy.utils.register_class(cls)


def unregister() -> None:
    global _job
    if _job is not None and _job.is_running:
        _job.cancel()  # the worker finishes its frame and exits; finished frames stay on disk
    _job = None
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
