"""Per-object roles and per-shot settings stored in the .blend (bpy PropertyGroups).

Lengths and speeds are stored in Blender units like every Blender property, so
they display in the scene's unit system; the exporter converts them to metres
with ``scene.unit_settings.scale_length``.
"""

import bpy
from bpy.props import (BoolProperty, CollectionProperty, EnumProperty, FloatProperty, FloatVectorProperty,
                       IntProperty, PointerProperty, StringProperty)

from ..engine.scene import DEFAULT_FACES

ROLE_ITEMS = (
    ("NONE", "Not used", "This object takes no part in the liquid shot", "BLANK1", 0),
    ("FILL", "Liquid fill", "The closed volume of this mesh starts filled with liquid", "SNAP_VOLUME", 1),
    ("STREAM", "Liquid source", "Liquid pours out of this surface from a start to an end frame; "
     "moving the object moves the source", "FORWARD", 2),
    ("COLLIDER", "Collider", "Liquid flows around this mesh; its animation and deformation are followed",
     "MOD_PHYSICS", 3),
    ("BOUNDS", "Shot bounds", "The world bounding box of this object is the box the liquid lives in",
     "PIVOT_BOUNDBOX", 4),
)

FACE_ITEMS = (
    ("wall", "Wall", "Liquid bounces off this side of the box"),
    ("open", "Open", "Liquid that leaves through this side is dropped from the simulation"),
)



def _box_side(label, facing, face):
    """The property of one side of the shot box (``face`` is the engine's face name, e.g. ``z_max``)."""
    return EnumProperty(name=label, description=f"Behaviour of the box side facing {facing}", items=FACE_ITEMS,
                        default=DEFAULT_FACES[face])


#: Blender 4.5 and newer warn about a "//" default unless the path property says it accepts one
#: (the option does not exist in 4.2, where no warning is shown).
_RELATIVE_PATH = ({"PATH_SUPPORTS_BLEND_RELATIVE"}
                  if "is_path_supports_blend_relative" in bpy.types.Property.bl_rna.properties else set())


def _redraw_display(self, context):
    # Imported here: display imports props' siblings and is only needed once the UI changes something.
    from . import display
    display.refresh(context.scene)


class SPLASHDRAFT_PG_object(bpy.types.PropertyGroup):
    """What an object does in the liquid shot."""

    role: EnumProperty(name="Role", description="What this object does in the liquid shot",
                       items=ROLE_ITEMS, default="NONE")
    # Fill
    fill_velocity: FloatVectorProperty(
        name="Start velocity", description="Velocity the liquid of this fill has on the first frame",
        size=3, subtype="VELOCITY", unit="VELOCITY", default=(0.0, 0.0, 0.0), soft_min=-50.0, soft_max=50.0)
    fill_jitter: FloatProperty(
        name="Jitter", description="Random offset of the initial particles, as a fraction of the particle spacing",
        default=0.0, min=0.0, max=0.49, subtype="FACTOR")
    # Stream
    stream_speed: FloatProperty(
        name="Speed", description="Speed at which liquid leaves the source surface",
        default=1.0, min=0.0, soft_max=20.0, unit="VELOCITY")
    stream_direction: FloatVectorProperty(
        name="Direction", description="World-space direction the liquid leaves the source in (normalised on export)",
        size=3, subtype="DIRECTION", default=(0.0, 0.0, -1.0))
    use_stream_frames: BoolProperty(
        name="Own frame range", description="Pour only between the frames below instead of for the whole shot",
        default=False)
    stream_frame_start: IntProperty(name="From frame", description="First frame the source pours", default=1)
    stream_frame_end: IntProperty(name="Until frame", description="Last frame the source pours", default=24)
    # Collider
    friction: FloatProperty(
        name="Grip", description="Tangential friction of the collider surface (0 slippery, 1 sticky)",
        default=0.0, min=0.0, max=1.0, subtype="FACTOR")
    # Bounds: one side kind per face of the box
    face_x_min: _box_side("-X side", "-X", "x_min")
    face_x_max: _box_side("+X side", "+X", "x_max")
    face_y_min: _box_side("-Y side", "-Y", "y_min")
    face_y_max: _box_side("+Y side", "+Y", "y_max")
    face_z_min: _box_side("Floor", "-Z", "z_min")
    face_z_max: _box_side("Top", "+Z", "z_max")


class SPLASHDRAFT_PG_version(bpy.types.PropertyGroup):
    """One bake folder of the shot (a row of the version list)."""

    name: StringProperty(name="Version", description="Folder name of this bake, e.g. v003_sph")
    folder: StringProperty(name="Folder", description="Absolute path of the bake folder", subtype="DIR_PATH")
    solver: StringProperty(name="Solver", description="Solver that baked this version")
    frames: IntProperty(name="Frames", description="Number of finished frames in this version", min=0)
    particles: IntProperty(name="Particles", description="Particles in the last finished frame", min=0)
    complete: BoolProperty(name="Complete", description="Every frame of the range was baked")
    notes: StringProperty(name="Warnings", description="The bake's named warnings, one per line")


SOLVER_ITEMS = (
    ("sph", "Reference", "Physically based particle solver (DFSPH); slower, the one to trust"),
    ("learned", "Learned preview", "Trained network stepping the particles; fast first look, less accurate"),
)


class SPLASHDRAFT_PG_shot(bpy.types.PropertyGroup):
    """Settings of the liquid shot of a scene, and the state of its bakes."""

    shot_name: StringProperty(
        name="Shot", description="Name of the shot; names the cache folder (empty: the scene name)", default="")
    particle_spacing: FloatProperty(
        name="Particle spacing", description="Distance between neighbouring liquid particles; halving it makes "
        "about eight times as many particles", default=0.02, min=1e-4, soft_min=0.002, soft_max=0.2,
        subtype="DISTANCE", unit="LENGTH", precision=4)
    solver: EnumProperty(name="Solver", description="How the liquid is computed", items=SOLVER_ITEMS, default="sph")
    cache_dir: StringProperty(
        name="Cache folder", description="Folder that receives one sub-folder per shot and one per bake "
        "(// means next to the .blend file)", default="//splashdraft_cache/", subtype="DIR_PATH",
        options=_RELATIVE_PATH)
    max_particles: IntProperty(
        name="Particle budget", description="A bake that would need more particles than this is refused",
        default=400000, min=1, soft_max=5000000)
    gravity: FloatVectorProperty(
        name="Gravity (m/s²)", description="Gravity acceleration in metres per second squared, z up",
        size=3, default=(0.0, 0.0, -9.81))
    viscosity: FloatProperty(
        name="Smoothing", description="Velocity smoothing between neighbours (XSPH coefficient; "
        "0.01 to 0.05 is usual, more looks thicker)", default=0.02, min=0.0, max=0.5)
    seed: IntProperty(name="Seed", description="Random seed of jitter and emission", default=0, min=0)
    # Display
    versions: CollectionProperty(type=SPLASHDRAFT_PG_version)
    versions_index: IntProperty(name="Shown version", description="The bake shown in the viewport and renders",
                                default=0, min=0, update=_redraw_display)
    display_object: PointerProperty(
        name="Liquid object", description="Points object that shows the chosen bake", type=bpy.types.Object)
    point_size: FloatProperty(
        name="Point size", description="Radius of the rendered spheres as a fraction of the particle spacing",
        default=0.5, min=0.05, max=2.0, update=_redraw_display)
    playback: EnumProperty(
        name="Playback", description="How the liquid object gets each frame of the bake",
        items=(("AUTO", "Automatic",
                "Nodes read the files where Blender has the file-import nodes (5.0 and newer), "
                "otherwise the add-on refills the mesh"),
               ("REFILL", "Add-on refills the mesh",
                "The add-on rewrites the points mesh on every frame change; works in every Blender version, "
                "and renders need the add-on installed"),
               ("NODES", "Nodes read the files",
                "A Geometry Nodes modifier reads each frame's file itself (Blender 5.0 and newer); "
                "renders run no Python and need no add-on, only the cache folder at the same path")),
        default="AUTO", update=_redraw_display)
    use_surface: BoolProperty(
        name="Liquid surface", description="Show one joined, smoothed liquid surface built from the points "
        "instead of a sphere per particle (Geometry Nodes; renders need no add-on)",
        default=False, update=_redraw_display)
    surface_reach: FloatProperty(
        name="Reach", description="How far each particle reaches into the surface, in particle spacings; "
        "at least 0.9 so that neighbours join, larger merges more spray into the body",
        default=1.0, min=0.9, max=3.0, update=_redraw_display)
    surface_detail: FloatProperty(
        name="Voxel size", description="Size of the volume cells the surface is built from, in particle spacings; "
        "smaller is finer and slower", default=0.8, min=0.2, max=2.0, update=_redraw_display)
    surface_smoothing: IntProperty(
        name="Smoothing", description="Relaxation passes over the surface; more rounds off the particle bumps "
        "and thins small droplets", default=3, min=0, max=30, update=_redraw_display)
    confirm_minutes: FloatProperty(
        name="Ask above", description="Ask before starting a bake estimated to take longer than this many minutes",
        default=10.0, min=0.0, soft_max=240.0)
    # Estimate and bake state (written by the operators, shown by the panel)
    estimate_text: StringProperty(name="Estimate", description="Summary of the last estimate")
    is_over_budget: BoolProperty(name="Over budget", description="The last estimate exceeded the budget")
    bake_state: StringProperty(name="Bake state", description="State of the running or last bake", default="")
    bake_fraction: FloatProperty(name="Bake progress", description="Share of frames baked",
                                 default=0.0, min=0.0, max=1.0, subtype="FACTOR")
    bake_message: StringProperty(name="Bake message", description="Last message of the bake")


classes = (SPLASHDRAFT_PG_object, SPLASHDRAFT_PG_version, SPLASHDRAFT_PG_shot)


def register() -> None:
    for cls in classes:
        bpy.utils.register_class(cls)
    bpy.types.Object.splashdraft = PointerProperty(type=SPLASHDRAFT_PG_object)
    bpy.types.Scene.splashdraft = PointerProperty(type=SPLASHDRAFT_PG_shot)


def unregister() -> None:
    del bpy.types.Scene.splashdraft
    del bpy.types.Object.splashdraft
    for cls in reversed(classes):
        bpy.utils.unregister_class(cls)
