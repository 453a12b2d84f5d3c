"""The Splashdraft tab of the 3D viewport sidebar (N panel)."""

import textwrap

import bpy

from ..engine.boundary import FACE_NAMES
from . import display, ops, paths

TAB = "Splashdraft"


class SidebarPanel:
    """Where every Splashdraft panel sits: its tab in the 3D view's sidebar."""

    bl_space_type = "VIEW_3D"
    bl_region_type = "UI"
    bl_category = TAB


class SPLASHDRAFT_UL_versions(bpy.types.UIList):
    """Rows of the bake list: version, solver, finished frames."""

    def draw_item(self, context, layout, data, item, icon, active_data, active_propname, index) -> None:
        row = layout.row(align=True)
        row.label(text=item.name, icon="CHECKMARK" if item.complete else "TIME")
        row.label(text=f"{item.frames} fr")
        row.label(text=f"{item.particles:,} pts")


class SPLASHDRAFT_PT_shot(SidebarPanel, bpy.types.Panel):
    bl_label = "Liquid shot"
    bl_idname = "SPLASHDRAFT_PT_shot"

    def draw(self, context) -> None:
        layout = self.layout
        scene = context.scene
        shot = scene.splashdraft
        layout.use_property_split = True
        layout.use_property_decorate = False
        col = layout.column()
        col.prop(shot, "shot_name")
        col.prop(shot, "particle_spacing")
        row = col.row(align=True)
        row.prop(scene, "frame_start", text="Frames")
        row.prop(scene, "frame_end", text="")
        col.prop(scene.render, "fps", text="Frame rate")
        if paths.is_learned_available():
            col.prop(shot, "solver")
        col.prop(shot, "max_particles")
        col.prop(shot, "confirm_minutes")
        col.prop(shot, "cache_dir")

        box = layout.box()
        box.operator("splashdraft.estimate", icon="INFO")
        if shot.estimate_text:
            box.label(text=shot.estimate_text, icon="ERROR" if shot.is_over_budget else "NONE")

        if ops.is_baking():
            if hasattr(layout, "progress"):
                layout.progress(factor=shot.bake_fraction, type="BAR", text=shot.bake_message or "Baking")
            else:
                layout.label(text=shot.bake_message or "Baking")
            layout.operator("splashdraft.stop_bake", icon="CANCEL")
        else:
            layout.operator("splashdraft.bake", icon="PLAY")
            if shot.bake_message:
                layout.label(text=shot.bake_message)


class SPLASHDRAFT_PT_liquid(SidebarPanel, bpy.types.Panel):
    bl_label = "Liquid behaviour"
    bl_idname = "SPLASHDRAFT_PT_liquid"
    bl_parent_id = "SPLASHDRAFT_PT_shot"
    bl_options = {"DEFAULT_CLOSED"}

    def draw(self, context) -> None:
        layout = self.layout
        layout.use_property_split = True
        shot = context.scene.splashdraft
        layout.prop(shot, "gravity")
        layout.prop(shot, "viscosity")
        layout.prop(shot, "seed")


class SPLASHDRAFT_PT_object(SidebarPanel, bpy.types.Panel):
    bl_label = "Object role"
    bl_idname = "SPLASHDRAFT_PT_object"

    @classmethod
    def poll(cls, context) -> bool:
        return context.object is not None

    def draw(self, context) -> None:
        layout = self.layout
        layout.use_property_split = True
        layout.use_property_decorate = False
        obj = context.object
        settings = obj.splashdraft
        layout.label(text=obj.name, icon="OBJECT_DATA")
        layout.prop(settings, "role")
        role = settings.role
        if role == "FILL":
            layout.prop(settings, "fill_velocity")
            layout.prop(settings, "fill_jitter")
        elif role == "STREAM":
            layout.prop(settings, "stream_speed")
            layout.prop(settings, "stream_direction")
            layout.prop(settings, "use_stream_frames")
            if settings.use_stream_frames:
                row = layout.row(align=True)
                row.prop(settings, "stream_frame_start", text="Frames")
                row.prop(settings, "stream_frame_end", text="")
        elif role == "COLLIDER":
            layout.prop(settings, "friction")
            layout.label(text="Motion and deformation are read from the object", icon="INFO")
        elif role == "BOUNDS":
            grid = layout.grid_flow(columns=2, even_columns=True)
            for name in FACE_NAMES:
                grid.prop(settings, f"face_{name}")


class SPLASHDRAFT_PT_versions(SidebarPanel, bpy.types.Panel):
    bl_label = "Bakes"
    bl_idname = "SPLASHDRAFT_PT_versions"

    def draw(self, context) -> None:
        layout = self.layout
        shot = context.scene.splashdraft
        row = layout.row()
        row.template_list("SPLASHDRAFT_UL_versions", "", shot, "versions", shot, "versions_index", rows=3)
        row.operator("splashdraft.refresh_versions", text="", icon="FILE_REFRESH")
        if 0 <= shot.versions_index < len(shot.versions) and shot.versions[shot.versions_index].notes:
            box = layout.box()
            for note in shot.versions[shot.versions_index].notes.splitlines():
                for k, line in enumerate(textwrap.wrap(note, 52)):
                    box.label(text=line, icon="ERROR" if k == 0 else "BLANK1")
        layout.use_property_split = True
        layout.prop(shot, "display_object")
        layout.operator("splashdraft.add_liquid_object", icon="OUTLINER_OB_POINTCLOUD")
        layout.prop(shot, "use_surface")
        if shot.use_surface:
            col = layout.column(align=True)
            col.prop(shot, "surface_reach")
            col.prop(shot, "surface_detail")
            col.prop(shot, "surface_smoothing")
        else:
            layout.prop(shot, "point_size")
        layout.prop(shot, "playback")
        warnings = display.reported_warnings()
        if warnings:
            layout.label(text=warnings[-1], icon="ERROR")


class SPLASHDRAFT_PT_handoff(SidebarPanel, bpy.types.Panel):
    bl_label = "Hand-off"
    bl_idname = "SPLASHDRAFT_PT_handoff"
    bl_options = {"DEFAULT_CLOSED"}

    def draw(self, context) -> None:
        col = self.layout.column(align=True)
        col.operator("splashdraft.export_liquid", text="Alembic…", icon="EXPORT").file_format = "ALEMBIC"
        col.operator("splashdraft.export_liquid", text="USD…", icon="EXPORT").file_format = "USD"
        col.operator("splashdraft.copy_points", text="PLY sequence…", icon="FILE_FOLDER")


classes = (SPLASHDRAFT_UL_versions, SPLASHDRAFT_PT_shot, SPLASHDRAFT_PT_liquid, SPLASHDRAFT_PT_object,
           SPLASHDRAFT_PT_versions, SPLASHDRAFT_PT_handoff)


def register() -> None:
    for cls in classes:
        bpy.utils.register_class(cls)


def unregister() -> None:
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
