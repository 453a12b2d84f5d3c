"""Play a bake back: one points-only mesh object per shot, refilled on every frame change.

The object keeps its name, modifiers and material when the artist switches
versions; only the vertices and their attributes change. Attributes on the
points: ``velocity`` (Blender units/s, what motion blur reads), ``speed``
(m/s), ``id`` (int), ``density`` (kg/m³), ``pressure`` (Pa), and the engine's
white-water measures (``engine.whitewater``): ``zone`` (int: 0 interior,
1 surface, 2 spray), ``trapped_air``, ``wave_crest`` and ``foam`` (0..1). The
default material whitens foam and spray.

Rendering: a Geometry Nodes modifier turns the vertices into spheres
(Mesh to Points, radius = point size x spacing) and sets a material coloured by
speed; a second modifier, switched by ``use_surface``, builds one joined liquid surface instead
(``surface_group``).

Two ways to play back (the shot's ``playback`` setting; ``AUTO``, the default, picks
``NODES`` where Blender has the file-import nodes and ``REFILL`` elsewhere):

- ``REFILL`` (any Blender): a persistent frame-change handler rewrites the
  mesh. Renders run it too, so the add-on must be installed where you render.
- ``NODES`` (Blender 5.0 and newer, which have the PLY file-import node): a
  first Geometry Nodes modifier reads the current frame's PLY file itself
  (frame number -> file name -> Import PLY -> unit scale -> ``velocity``,
  ``speed``, ``id`` attributes), so no Python runs while rendering and the
  .blend renders without the add-on; the base mesh stays empty.

The frame handlers never raise into Blender: a missing, truncated or corrupt
frame (checked against the manifest's checksum) shows as empty under
``REFILL`` and is named in the panel and once on the console; under ``NODES``
a ``frame_change_post`` handler checks the shown frame the same way (the
reader node itself shows what the file holds), and a finished bake is checked
whole.
"""

from pathlib import Path
from typing import Optional

import bpy
import numpy as np

from ..engine.cache import FRAME_FILE_PATTERN, MANIFEST_NAME, CacheReader, open_cache
from ..engine.errors import CacheError

POINTS_GROUP = "Splashdraft points"
SURFACE_GROUP = "Splashdraft liquid surface"
#: Revision of the surface graph, stored on the node group; a file saved with an older graph (2:
#: Volume to Mesh on the volume's own grid, the nearest particle looked up among the mesh vertices)
#: gets the current one when its liquid object is next set up.
SURFACE_REVISION = 2
REVISION_KEY = "splashdraft_revision"
PASS_GROUP = "Splashdraft pass-through"
READER_GROUP = "Splashdraft file reader"
READER_MODIFIER = "Splashdraft file reader"
POINTS_MODIFIER = "Splashdraft spheres"
SURFACE_MODIFIER = "Splashdraft surface"
MATERIAL_NAME = "Splashdraft liquid"

_readers = {}       # folder -> (manifest mtime_ns, CacheReader)
_warned = set()     # (folder, kind) already reported
_reported = []      # the messages printed, oldest first (shown by the panel, read by tests)
_last_shown = {}    # display object name -> (folder, frame, mtime) last written


def warn_once(key, message) -> None:
    """Print a warning the first time ``key`` is seen (never raises)."""
    if key in _warned:
        return
    _warned.add(key)
    _reported.append(message)
    print(f"Splashdraft warning: {message}")


def reported_warnings() -> list[str]:
    """Warnings printed since the last ``clear_warnings`` (list of str)."""
    return list(_reported)


def clear_warnings() -> None:
    _warned.clear()
    _reported.clear()
    _last_shown.clear()
    _checked.clear()


def reader_for(folder) -> CacheReader:
    """Open (or reuse) the cache reader of ``folder``; reopened whenever the manifest changes (running bakes).

    Raises:
        CacheError: no readable cache there.
    """
    folder = str(folder)
    manifest = Path(folder) / MANIFEST_NAME
    try:
        mtime = manifest.stat().st_mtime_ns
    except OSError as exc:
        raise CacheError(f"{manifest}: no manifest yet; bake this version first") from exc
    cached = _readers.get(folder)
    if cached is not None and cached[0] == mtime:
        return cached[1]
    reader = open_cache(folder)
    _readers[folder] = (mtime, reader)
    return reader


def empty_frame() -> dict:
    return {"positions": np.zeros((0, 3), np.float32), "velocities": np.zeros((0, 3), np.float32),
            "ids": np.zeros(0, np.int32), "density": np.zeros(0, np.float32), "pressure": np.zeros(0, np.float32)}


#: White-water attributes of the points and the surface: name -> Blender attribute type.
WHITEWATER_ATTRIBUTES = {"zone": "INT", "trapped_air": "FLOAT", "wave_crest": "FLOAT", "foam": "FLOAT"}


def write_points(mesh, arrays, scale_length=1.0) -> None:
    """Replace the vertices of ``mesh`` by the particles of one frame.

    Args:
        mesh: a bpy Mesh (its vertices and attributes are replaced).
        arrays: ``positions``, ``velocities`` (N, 3) m and m/s; ``ids``, ``density``, ``pressure`` (N,);
            optionally the white-water arrays (``WHITEWATER_ATTRIBUTES``; zeros when absent).
        scale_length: metres per Blender unit (positions and velocity are divided by it).
    """
    positions = np.asarray(arrays["positions"], np.float32)
    velocities = np.asarray(arrays["velocities"], np.float32)
    count = len(positions)
    mesh.clear_geometry()
    if count:
        mesh.vertices.add(count)
        inverse = np.float32(1.0 / scale_length)
        mesh.attributes["position"].data.foreach_set(
            "vector", np.ascontiguousarray(positions * inverse if scale_length != 1.0 else positions).ravel())
    attrs = mesh.attributes
    values = {
        "velocity": ("FLOAT_VECTOR", "vector", velocities * np.float32(1.0 / scale_length)),
        "speed": ("FLOAT", "value", np.sqrt(np.einsum("ij,ij->i", velocities, velocities))),
        "id": ("INT", "value", np.asarray(arrays["ids"], np.int32)),
        "density": ("FLOAT", "value", np.asarray(arrays["density"], np.float32)),
        "pressure": ("FLOAT", "value", np.asarray(arrays["pressure"], np.float32)),
    }
    for name, kind in WHITEWATER_ATTRIBUTES.items():
        # Caches baked before the white-water attributes existed show as unmarked liquid (zeros).
        values[name] = (kind, "value", arrays.get(name, np.zeros(count)))
    for name, (kind, key, data) in values.items():
        attribute = attrs.get(name) or attrs.new(name, kind, "POINT")
        if count:
            dtype = np.int32 if kind == "INT" else np.float32
            attribute.data.foreach_set(key, np.ascontiguousarray(data, dtype).ravel())
    mesh.update()


def current_version(scene) -> "bpy.types.PropertyGroup | None":
    """The version row shown for ``scene`` (or None)."""
    shot = scene.splashdraft
    if not len(shot.versions):
        return None
    index = min(max(shot.versions_index, 0), len(shot.versions) - 1)
    return shot.versions[index]


def frame_arrays(folder, frame) -> dict:
    """Arrays of ``frame`` in the bake ``folder``, or an empty frame (warned once) when it cannot be read."""
    try:
        reader = reader_for(folder)
    except CacheError:
        warn_once((folder, "open"), f"version {Path(folder).name}: no readable manifest.json; "
                  "bake this version again")
        return empty_frame()
    if str(int(frame)) not in reader.manifest["frames"]:
        return empty_frame()  # outside the baked range (or not baked yet): nothing to show, nothing wrong
    try:
        return reader.read_frame(frame)
    except CacheError:
        warn_once((folder, "frame", int(frame)), f"{frame_problem(folder, frame)} (shown empty)")
        return empty_frame()


def reads_in_nodes(scene) -> bool:
    """True when the shot plays back through the file-reader node tree (NODES, or AUTO on Blender 5.0+)."""
    return scene.splashdraft.playback in ("NODES", "AUTO") and reader_nodes_available()


def reader_nodes_available() -> bool:
    """The PLY file-import and string-format nodes exist (Blender 5.0 and newer)."""
    return hasattr(bpy.types, "GeometryNodeImportPLY") and hasattr(bpy.types, "FunctionNodeFormatString")


def show_frame(scene, frame=None, force=False) -> Optional[int]:
    """Fill the scene's liquid object with ``frame`` (default: the current frame) of the shown version.

    Returns the number of points shown, or None when there is nothing to show into
    (no liquid object, or NODES playback, where the modifier reads the file itself).
    """
    shot = scene.splashdraft
    obj = shot.display_object
    if obj is None or obj.type != "MESH" or reads_in_nodes(scene):
        return None
    frame = scene.frame_current if frame is None else int(frame)
    version = current_version(scene)
    folder = version.folder if version is not None else ""
    manifest = Path(folder) / MANIFEST_NAME if folder else None
    try:
        mtime = manifest.stat().st_mtime_ns if manifest is not None else 0
    except OSError:
        mtime = 0
    key = (folder, frame, mtime)
    if not force and _last_shown.get(obj.name) == key:
        return len(obj.data.vertices)
    arrays = frame_arrays(folder, frame) if folder else empty_frame()
    write_points(obj.data, arrays, float(scene.unit_settings.scale_length) or 1.0)
    _last_shown[obj.name] = key
    return len(arrays["positions"])


@bpy.app.handlers.persistent
def on_frame_change(scene, depsgraph=None) -> None:
    """frame_change_pre handler: show the new frame; never raises into Blender's loop."""
    try:
        show_frame(scene)
    except Exception as exc:  # noqa: BLE001 - a handler must not break playback or rendering
        warn_once(("handler", type(exc).__name__), f"could not show frame {scene.frame_current}: {exc}")


_checked = {}       # frame file path -> ((size, mtime_ns), problem text or None)


def frame_problem(folder, frame) -> Optional[str]:
    """Why a listed frame of the bake ``folder`` cannot be shown as baked, or None when it is sound.

    Missing, truncated or altered files are found by the manifest's checksum (and the PLY parse),
    each file once per size and modification time. Frames the manifest does not list are not
    problems (outside the baked range). The text is short, names the version, frame and file,
    and says what to do.
    """
    try:
        reader = reader_for(folder)
    except CacheError:
        return f"version {Path(folder).name}: its manifest.json is missing or damaged; bake this version again"
    if str(int(frame)) not in reader.manifest["frames"]:
        return None
    path = reader.frame_path(frame)
    version = Path(folder).name
    try:
        stat = path.stat()
    except OSError:
        return f"version {version}: frame {frame} ({path.name}) is missing; bake this version again"
    key = (stat.st_size, stat.st_mtime_ns)
    cached = _checked.get(str(path))
    if cached is not None and cached[0] == key:
        return cached[1]
    try:
        reader.read_frame(frame)
        problem = None
    except CacheError:
        problem = f"version {version}: frame {frame} ({path.name}) is damaged; bake this version again"
    _checked[str(path)] = (key, problem)
    return problem


def check_version(folder) -> list[str]:
    """Problems of every listed frame of ``folder`` (list of str; empty when all are sound)."""
    try:
        frames = reader_for(folder).frames
    except CacheError:
        return [frame_problem(folder, 0)]
    return [problem for problem in (frame_problem(folder, frame) for frame in frames) if problem]


@bpy.app.handlers.persistent
def on_frame_checked(scene, depsgraph=None) -> None:
    """frame_change_post handler: in NODES playback, check the shown frame (REFILL checks as it reads).

    The file-reader node shows whatever the file holds; this names a damaged or missing frame in the
    panel and once on the console. Renders of the .blend without the add-on simply skip the check.
    """
    try:
        if scene.splashdraft.display_object is None or not reads_in_nodes(scene):
            return
        version = current_version(scene)
        if version is None:
            return
        problem = frame_problem(version.folder, scene.frame_current)
        if problem:
            warn_once((version.folder, "frame", scene.frame_current), problem)
    except Exception as exc:  # noqa: BLE001 - a handler must not break playback or rendering
        warn_once(("check", type(exc).__name__), f"could not check frame {scene.frame_current}: {exc}")


@bpy.app.handlers.persistent
def on_file_loaded(*_args) -> None:
    """load_post handler: forget readers and warnings of the previous file."""
    _readers.clear()
    clear_warnings()


# --- building the object, its node groups and material ------------------------------------------

def _new_group(name):
    group = bpy.data.node_groups.get(name)
    if group is not None:
        return group, False
    group = bpy.data.node_groups.new(name, "GeometryNodeTree")
    group.interface.new_socket("Geometry", in_out="INPUT", socket_type="NodeSocketGeometry")
    group.interface.new_socket("Geometry", in_out="OUTPUT", socket_type="NodeSocketGeometry")
    return group, True


def _input_socket(group, name, socket_type, default, minimum=0.0):
    socket = group.interface.new_socket(name, in_out="INPUT", socket_type=socket_type)
    socket.default_value = default
    if hasattr(socket, "min_value"):
        socket.min_value = minimum
    return socket


#: The speed colouring (our own): colour follows the height a still drop would have to fall to move
#: as fast, h = speed^2 / (2 g), from 0 (resting) to ``FALL_HEIGHT_FOR_TOP`` metres and above.
#: Being quadratic in speed, slow flow stays dark and only the energetic splash lights up.
FALL_HEIGHT_FOR_TOP = 0.45  # m; a free fall of 45 cm ends at about 3 m/s
STANDARD_GRAVITY = 9.80665  # m/s^2
#: Ramp stops (position, linear RGBA): deep teal at rest, jade when moving, amber in the fast splash.
SPEED_RAMP = ((0.0, (0.015, 0.12, 0.13, 1.0)), (0.45, (0.05, 0.48, 0.42, 1.0)), (1.0, (0.96, 0.66, 0.24, 1.0)))
#: Foam and spray (our own): a warm chalk white the speed colour blends into by the foam measure,
#: fully for spray particles (``zone`` 2).
FOAM_COLOUR = (0.86, 0.84, 0.78, 1.0)


def _socket(sockets, identifier):
    # Mix nodes carry one socket per data type under the same name; the identifier picks the colour one.
    return next(socket for socket in sockets if socket.identifier == identifier)


def liquid_material() -> "bpy.types.Material":
    """Material coloured by the ``speed`` attribute through the fall-height ramp above, whitened by
    the ``foam`` attribute and for spray (``zone`` 2)."""
    material = bpy.data.materials.get(MATERIAL_NAME)
    if material is not None:
        return material
    material = bpy.data.materials.new(MATERIAL_NAME)
    if material.node_tree is None:  # 4.2 makes no tree until use_nodes is set (5.0 always has one)
        material.use_nodes = True
    nodes, links = material.node_tree.nodes, material.node_tree.links
    shader = next(n for n in nodes if n.type == "BSDF_PRINCIPLED")
    attribute = nodes.new("ShaderNodeAttribute")
    attribute.attribute_name = "speed"
    height = nodes.new("ShaderNodeMath")  # speed^2 / (2 g), in metres
    height.operation = "MULTIPLY"
    links.new(attribute.outputs["Fac"], height.inputs[0])
    links.new(attribute.outputs["Fac"], height.inputs[1])
    scale = nodes.new("ShaderNodeMapRange")
    scale.inputs["From Max"].default_value = FALL_HEIGHT_FOR_TOP * 2.0 * STANDARD_GRAVITY
    links.new(height.outputs["Value"], scale.inputs["Value"])
    ramp = nodes.new("ShaderNodeValToRGB")
    elements = ramp.color_ramp.elements
    elements.new(0.5)
    for element, (position, colour) in zip(elements, SPEED_RAMP):
        element.position, element.color = position, colour
    links.new(scale.outputs["Result"], ramp.inputs["Fac"])
    # White water (engine.whitewater): foam (0..1) and spray (zone 2) blend towards FOAM_COLOUR.
    foam = nodes.new("ShaderNodeAttribute")
    foam.attribute_name = "foam"
    zone = nodes.new("ShaderNodeAttribute")
    zone.attribute_name = "zone"
    is_spray = nodes.new("ShaderNodeMath")
    is_spray.operation = "GREATER_THAN"
    is_spray.inputs[1].default_value = 1.5
    links.new(zone.outputs["Fac"], is_spray.inputs[0])
    whiteness = nodes.new("ShaderNodeMath")
    whiteness.operation = "MAXIMUM"
    links.new(foam.outputs["Fac"], whiteness.inputs[0])
    links.new(is_spray.outputs["Value"], whiteness.inputs[1])
    mix = nodes.new("ShaderNodeMix")
    mix.data_type = "RGBA"
    _socket(mix.inputs, "B_Color").default_value = FOAM_COLOUR
    links.new(whiteness.outputs["Value"], _socket(mix.inputs, "Factor_Float"))
    links.new(ramp.outputs["Color"], _socket(mix.inputs, "A_Color"))
    links.new(_socket(mix.outputs, "Result_Color"), shader.inputs["Base Color"])
    shader.inputs["Roughness"].default_value = 0.12
    material.diffuse_color = SPEED_RAMP[1][1]
    return material


def points_group(material) -> "bpy.types.NodeTree":
    """Mesh to Points (radius input) + Set Material."""
    group, is_new = _new_group(POINTS_GROUP)
    if not is_new:
        return group
    _input_socket(group, "Radius", "NodeSocketFloat", 0.01)
    nodes, links = group.nodes, group.links
    source, sink = nodes.new("NodeGroupInput"), nodes.new("NodeGroupOutput")
    to_points = nodes.new("GeometryNodeMeshToPoints")
    set_material = nodes.new("GeometryNodeSetMaterial")
    set_material.inputs["Material"].default_value = material
    links.new(source.outputs["Geometry"], to_points.inputs["Mesh"])
    links.new(source.outputs["Radius"], to_points.inputs["Radius"])
    links.new(to_points.outputs["Points"], set_material.inputs["Geometry"])
    links.new(set_material.outputs["Geometry"], sink.inputs["Geometry"])
    return group


def surface_group_is_current(group) -> bool:
    """Whether ``group`` is the surface graph of this add-on's revision."""
    return group.name == SURFACE_GROUP and group.get(REVISION_KEY) == SURFACE_REVISION


def surface_group(material) -> "bpy.types.NodeTree":
    """Points -> joined, smoothed liquid surface carrying ``velocity``, ``speed``, ``zone`` and ``foam`` (4.2+).

    Steps: every point becomes a sphere of ``Radius`` in a volume of ``Voxel Size`` (Points to
    Volume); the union is meshed (Volume to Mesh), so neighbouring particles join into one
    closed surface; every vertex moves ``Shrink`` inwards along its normal, so a flat face of
    the liquid sits about half a spacing beyond the outer particles (where the particles' own
    volume ends); then the mesh is relaxed ``Smoothing`` times (Blur Attribute on positions,
    which rounds the sphere bumps). A lone droplet keeps a sphere of about
    ``Radius - Shrink`` and a one-particle sheet a thickness of about twice that, so spray and
    thin sheets stay visible. Each vertex takes ``velocity``, ``speed``, ``zone`` and ``foam`` of
    its nearest particle, for shading and motion blur. Every input is a length in Blender units (set
    from the particle spacing by ``apply_display_settings``).
    """
    old = bpy.data.node_groups.get(SURFACE_GROUP)
    if old is not None and not surface_group_is_current(old):
        old.name = SURFACE_GROUP + " (superseded)"  # left without users, dropped when the file is saved
    group, is_new = _new_group(SURFACE_GROUP)
    if not is_new:
        return group
    group[REVISION_KEY] = SURFACE_REVISION
    _input_socket(group, "Radius", "NodeSocketFloat", 0.02)
    _input_socket(group, "Voxel Size", "NodeSocketFloat", 0.01, minimum=1e-4)
    _input_socket(group, "Shrink", "NodeSocketFloat", 0.01)
    _input_socket(group, "Smoothing", "NodeSocketInt", 2, minimum=0)
    nodes, links = group.nodes, group.links
    source, sink = nodes.new("NodeGroupInput"), nodes.new("NodeGroupOutput")
    to_points = nodes.new("GeometryNodeMeshToPoints")
    links.new(source.outputs["Geometry"], to_points.inputs["Mesh"])
    to_volume = nodes.new("GeometryNodePointsToVolume")
    to_volume.name = SURFACE_STAGES[0]
    to_volume.inputs["Density"].default_value = 1.0
    _set_resolution_mode(to_volume, "VOXEL_SIZE")
    links.new(to_points.outputs["Points"], to_volume.inputs["Points"])
    links.new(source.outputs["Radius"], to_volume.inputs["Radius"])
    links.new(source.outputs["Voxel Size"], to_volume.inputs["Voxel Size"])
    # Mesh the grid at its own resolution: a voxel size here, even the same one, makes the node
    # resample the grid first, about 30 % of the build for the same mesh (bench_surface.py).
    to_mesh = nodes.new("GeometryNodeVolumeToMesh")
    to_mesh.name = SURFACE_STAGES[1]
    _set_resolution_mode(to_mesh, "GRID")
    links.new(to_volume.outputs["Volume"], to_mesh.inputs["Volume"])
    # Relax the sphere bumps: average each vertex with its neighbours (Smoothing times).
    position = nodes.new("GeometryNodeInputPosition")
    blur = nodes.new("GeometryNodeBlurAttribute")
    blur.data_type = "FLOAT_VECTOR"
    links.new(position.outputs["Position"], blur.inputs["Value"])
    links.new(source.outputs["Smoothing"], blur.inputs["Iterations"])
    relax = nodes.new("GeometryNodeSetPosition")
    relax.name = SURFACE_STAGES[3]
    links.new(blur.outputs["Value"], relax.inputs["Position"])
    # Move the surface in, from the sphere union to where the particles' volume ends.
    normal = nodes.new("GeometryNodeInputNormal")
    inward = nodes.new("ShaderNodeVectorMath")
    inward.operation = "SCALE"
    links.new(normal.outputs["Normal"], inward.inputs[0])
    negate = nodes.new("ShaderNodeMath")
    negate.operation = "MULTIPLY"
    negate.inputs[1].default_value = -1.0
    links.new(source.outputs["Shrink"], negate.inputs[0])
    links.new(negate.outputs["Value"], inward.inputs["Scale"])
    shrink = nodes.new("GeometryNodeSetPosition")
    shrink.name = SURFACE_STAGES[2]
    links.new(to_mesh.outputs["Mesh"], shrink.inputs["Geometry"])
    links.new(inward.outputs["Vector"], shrink.inputs["Offset"])
    # Shrink first, relax after: relaxing a droplet's small sphere first would leave the shrink
    # nothing to take from (it would vanish); this way a lone droplet keeps about half a spacing.
    links.new(shrink.outputs["Geometry"], relax.inputs["Geometry"])
    # Velocity, speed, zone and foam of the nearest particle, for shading and motion blur.
    # The nearest particle is looked up once and stored: a field feeding several Store nodes is
    # evaluated once per node, and the lookup is the costly part (measured: bench/bench_surface.py).
    # Looked up among the input mesh's vertices, not the point cloud made from them (same points, same
    # order): 4.2's Sample Nearest on a point cloud took 2.3 CPU s at 100k particles against 0.13 s on
    # the vertices (5.0: about the same either way; bench_surface.py --stages).
    nearest = nodes.new("GeometryNodeSampleNearest")
    nearest.domain = "POINT"
    links.new(source.outputs["Geometry"], nearest.inputs["Geometry"])
    keep_index = nodes.new("GeometryNodeStoreNamedAttribute")
    keep_index.name = SURFACE_STAGES[4]
    keep_index.data_type = "INT"
    keep_index.domain = "POINT"
    keep_index.inputs["Name"].default_value = NEAREST_ATTRIBUTE
    links.new(relax.outputs["Geometry"], keep_index.inputs["Geometry"])
    links.new(nearest.outputs["Index"], keep_index.inputs["Value"])
    read_index = nodes.new("GeometryNodeInputNamedAttribute")
    read_index.data_type = "INT"
    read_index.inputs["Name"].default_value = NEAREST_ATTRIBUTE
    geometry = keep_index.outputs["Geometry"]
    for attribute, kind in (("velocity", "FLOAT_VECTOR"), ("speed", "FLOAT"), ("zone", "INT"), ("foam", "FLOAT")):
        read = nodes.new("GeometryNodeInputNamedAttribute")
        read.data_type = kind
        read.inputs["Name"].default_value = attribute
        sample = nodes.new("GeometryNodeSampleIndex")
        sample.data_type = kind
        sample.domain = "POINT"
        links.new(source.outputs["Geometry"], sample.inputs["Geometry"])
        links.new(read.outputs["Attribute"], sample.inputs["Value"])
        links.new(read_index.outputs["Attribute"], sample.inputs["Index"])
        store = nodes.new("GeometryNodeStoreNamedAttribute")
        store.data_type = kind
        store.domain = "POINT"
        store.inputs["Name"].default_value = attribute
        links.new(geometry, store.inputs["Geometry"])
        links.new(sample.outputs[0], store.inputs["Value"])
        geometry = store.outputs["Geometry"]
    forget_index = nodes.new("GeometryNodeRemoveAttribute")
    forget_index.name = SURFACE_STAGES[5]
    forget_index.inputs["Name"].default_value = NEAREST_ATTRIBUTE
    links.new(geometry, forget_index.inputs["Geometry"])
    smooth = nodes.new("GeometryNodeSetShadeSmooth")
    links.new(forget_index.outputs["Geometry"], smooth.inputs[0])
    set_material = nodes.new("GeometryNodeSetMaterial")
    set_material.inputs["Material"].default_value = material
    links.new(smooth.outputs[0], set_material.inputs["Geometry"])
    links.new(set_material.outputs["Geometry"], sink.inputs["Geometry"])
    return group


#: Names of the surface group's step nodes in the order they run; the first output of each is the
#: geometry so far (``bench/bench_surface.py --stages`` times the graph cut after each).
SURFACE_STAGES = ("Spheres to volume", "Volume to surface", "Inward offset", "Relax", "Nearest particle",
                  "Attributes")


#: Temporary surface attribute: the index of each vertex's nearest particle (removed before output).
NEAREST_ATTRIBUTE = "splashdraft_nearest"


#: Where a flat face of the surface should sit beyond the outermost particle centres, in spacings:
#: half a spacing is where the particles' own volume (spacing^3 each) ends; the extra 0.05 makes up
#: for the fog threshold of Volume to Mesh and the smoothing (measured on lattice blocks).
FACE_OFFSET = 0.55


def surface_inputs(spacing, reach=1.0, detail=0.8, smoothing=3) -> dict:
    """Inputs of the surface node group, in Blender units, from settings in particle spacings.

    Args:
        spacing: particle spacing in Blender units.
        reach: sphere radius per particle, in spacings (>= 0.9: on a cubic lattice the farthest point
            from every particle is sqrt(3)/2 = 0.87 spacings away, so smaller radii leave holes).
        detail: voxel size, in spacings. smoothing: relaxation passes.

    Returns:
        dict of the group's inputs: Radius, Voxel Size, Shrink, Smoothing.
    """
    return {"Radius": spacing * reach, "Voxel Size": spacing * detail,
            "Shrink": spacing * max(reach - FACE_OFFSET, 0.0), "Smoothing": int(smoothing)}


#: Resolution modes of the volume nodes: 4.2's node property value -> 5.0's menu item.
_RESOLUTION_MENU_ITEMS = {"VOXEL_SIZE": "Size", "GRID": "Grid"}


def _set_resolution_mode(node, mode):
    # 4.2 has a node property; 5.0 turned it into a menu input socket.
    if hasattr(node, "resolution_mode"):
        node.resolution_mode = mode
    elif "Resolution Mode" in node.inputs:
        node.inputs["Resolution Mode"].default_value = _RESOLUTION_MENU_ITEMS[mode]


def pass_through_group() -> "bpy.types.NodeTree":
    """Input -> output; lets Alembic/USD see the points as an animated mesh (host notes §9)."""
    group, is_new = _new_group(PASS_GROUP)
    if is_new:
        source, sink = group.nodes.new("NodeGroupInput"), group.nodes.new("NodeGroupOutput")
        group.links.new(source.outputs["Geometry"], sink.inputs["Geometry"])
    return group


def reader_group() -> "bpy.types.NodeTree":
    """Scene frame -> file name -> Import PLY -> metres to scene units -> velocity/speed/id/zone attributes.

    Inputs: ``Path Pattern`` (a Python-style format string with ``{frame}``, e.g.
    ``/cache/v001_sph/points_{frame:04d}.ply``) and ``Scale`` (Blender units per metre).
    The PLY's own properties (vx, vy, vz, id, density, pressure, zone, trapped_air, wave_crest,
    foam) arrive as float point attributes; density, pressure and the white-water floats keep
    their names, ``id`` and ``zone`` are stored again as integers.
    """
    group, is_new = _new_group(READER_GROUP)
    if not is_new:
        return group
    group.interface.new_socket("Path Pattern", in_out="INPUT", socket_type="NodeSocketString")
    _input_socket(group, "Scale", "NodeSocketFloat", 1.0, minimum=1e-9)
    nodes, links = group.nodes, group.links
    source, sink = nodes.new("NodeGroupInput"), nodes.new("NodeGroupOutput")
    time = nodes.new("GeometryNodeInputSceneTime")
    name = nodes.new("FunctionNodeFormatString")
    name.format_items.new("INT", "frame")
    links.new(source.outputs["Path Pattern"], name.inputs["Format"])
    links.new(time.outputs["Frame"], name.inputs["frame"])
    load = nodes.new("GeometryNodeImportPLY")
    links.new(name.outputs["String"], load.inputs["Path"])
    scale_vector = nodes.new("ShaderNodeCombineXYZ")
    for axis in "XYZ":
        links.new(source.outputs["Scale"], scale_vector.inputs[axis])
    transform = nodes.new("GeometryNodeTransform")
    links.new(load.outputs["Mesh"], transform.inputs["Geometry"])
    links.new(scale_vector.outputs["Vector"], transform.inputs["Scale"])
    velocity_ms = nodes.new("ShaderNodeCombineXYZ")
    for axis, prop in zip("XYZ", ("vx", "vy", "vz")):
        read = nodes.new("GeometryNodeInputNamedAttribute")
        read.data_type = "FLOAT"
        read.inputs["Name"].default_value = prop
        links.new(read.outputs["Attribute"], velocity_ms.inputs[axis])
    velocity = nodes.new("ShaderNodeVectorMath")
    velocity.operation = "SCALE"
    links.new(velocity_ms.outputs["Vector"], velocity.inputs[0])
    links.new(source.outputs["Scale"], velocity.inputs["Scale"])
    speed = nodes.new("ShaderNodeVectorMath")
    speed.operation = "LENGTH"
    links.new(velocity_ms.outputs["Vector"], speed.inputs[0])
    read_id = nodes.new("GeometryNodeInputNamedAttribute")
    read_id.data_type = "FLOAT"
    read_id.inputs["Name"].default_value = "id"
    geometry = transform.outputs["Geometry"]
    read_zone = nodes.new("GeometryNodeInputNamedAttribute")
    read_zone.data_type = "FLOAT"
    read_zone.inputs["Name"].default_value = "zone"
    for attribute, kind, value in (("velocity", "FLOAT_VECTOR", velocity.outputs["Vector"]),
                                   ("speed", "FLOAT", speed.outputs["Value"]),
                                   ("id", "INT", read_id.outputs["Attribute"]),
                                   ("zone", "INT", read_zone.outputs["Attribute"])):
        store = nodes.new("GeometryNodeStoreNamedAttribute")
        store.data_type = kind
        store.domain = "POINT"
        store.inputs["Name"].default_value = attribute
        links.new(geometry, store.inputs["Geometry"])
        links.new(value, store.inputs["Value"])
        geometry = store.outputs["Geometry"]
    links.new(geometry, sink.inputs["Geometry"])
    return group


def path_pattern(folder) -> str:
    """The reader's format string for the frames of ``folder`` (braces in the path escaped)."""
    escaped = str(Path(bpy.path.abspath(folder)).resolve()).replace("{", "{{").replace("}", "}}")
    return f"{escaped}/{FRAME_FILE_PATTERN}"


def _apply_reader(scene, obj):
    """Add, update or remove the file-reader modifier to match the shot's playback mode."""
    modifier = obj.modifiers.get(READER_MODIFIER)
    if not reads_in_nodes(scene):
        if modifier is not None:
            obj.modifiers.remove(modifier)
            _last_shown.pop(obj.name, None)
        return
    if modifier is None:
        modifier = obj.modifiers.new(READER_MODIFIER, "NODES")
        modifier.node_group = reader_group()
        obj.modifiers.move(len(obj.modifiers) - 1, 0)
    if len(obj.data.vertices):
        obj.data.clear_geometry()
    _last_shown.pop(obj.name, None)
    version = current_version(scene)
    group = modifier.node_group
    modifier[_socket_id(group, "Path Pattern")] = path_pattern(version.folder) if version is not None else ""
    modifier[_socket_id(group, "Scale")] = 1.0 / (float(scene.unit_settings.scale_length) or 1.0)


def _socket_id(group, name):
    return group.interface.items_tree[name].identifier


def ensure_display_object(scene) -> "bpy.types.Object":
    """The scene's liquid object, created (with modifiers and material) if missing.

    Returns the bpy Object; also stored in ``scene.splashdraft.display_object``.
    """
    shot = scene.splashdraft
    obj = shot.display_object
    if obj is None or obj.type != "MESH" or obj.name not in bpy.data.objects:
        from .paths import shot_name
        name = f"{shot_name(scene)} liquid"
        mesh = bpy.data.meshes.new(name)
        obj = bpy.data.objects.new(name, mesh)
        scene.collection.objects.link(obj)
        shot.display_object = obj
    if obj.name not in scene.objects:
        scene.collection.objects.link(obj)
    # The frame handler rewrites the mesh during renders; with a UI, lock it so the viewport
    # does not read the mesh meanwhile (bpy.app.handlers docs, "Note on Altering Data").
    scene.render.use_lock_interface = True
    material = liquid_material()
    if not obj.data.materials:
        obj.data.materials.append(material)
    if POINTS_MODIFIER not in obj.modifiers:
        obj.modifiers.new(POINTS_MODIFIER, "NODES").node_group = points_group(material)
    surface = obj.modifiers.get(SURFACE_MODIFIER) or obj.modifiers.new(SURFACE_MODIFIER, "NODES")
    if surface.node_group is None or not surface_group_is_current(surface.node_group):
        surface.node_group = surface_group(material)  # also replaces older files' surfaces
    apply_display_settings(scene)
    return obj


def apply_display_settings(scene) -> None:
    """Point radius, voxel size and the spheres/surface switch from the shot settings."""
    shot = scene.splashdraft
    obj = shot.display_object
    if obj is None:
        return
    spacing = float(shot.particle_spacing)
    version = current_version(scene)
    if version is not None:
        # The bake's own spacing wins: the setting may have changed since.
        try:
            reader = reader_for(version.folder)
            scale = float(scene.unit_settings.scale_length) or 1.0
            spacing = float(reader.manifest.get("particle_spacing", spacing * scale)) / scale
        except CacheError:
            pass
    _apply_reader(scene, obj)
    points = obj.modifiers.get(POINTS_MODIFIER)
    if points is not None and points.node_group is not None:
        points[_socket_id(points.node_group, "Radius")] = spacing * shot.point_size
        points.show_viewport = points.show_render = not shot.use_surface
    surface = obj.modifiers.get(SURFACE_MODIFIER)
    if surface is not None and surface.node_group is not None:
        for name, value in surface_inputs(spacing, shot.surface_reach, shot.surface_detail,
                                          shot.surface_smoothing).items():
            surface[_socket_id(surface.node_group, name)] = value
        surface.show_viewport = surface.show_render = bool(shot.use_surface)
    obj.data.update()


def refresh(scene) -> None:
    """Re-apply settings and re-show the current frame (after a version switch or setting change)."""
    try:
        if scene.splashdraft.display_object is not None:
            apply_display_settings(scene)
            show_frame(scene, force=True)
    except Exception as exc:  # noqa: BLE001 - called from property updates, must not raise into the UI
        warn_once(("refresh", type(exc).__name__), f"could not refresh the liquid object: {exc}")


def register() -> None:
    if on_frame_change not in bpy.app.handlers.frame_change_pre:
        bpy.app.handlers.frame_change_pre.append(on_frame_change)
    if on_frame_checked not in bpy.app.handlers.frame_change_post:
        bpy.app.handlers.frame_change_post.append(on_frame_checked)
    if on_file_loaded not in bpy.app.handlers.load_post:
        bpy.app.handlers.load_post.append(on_file_loaded)


def unregister() -> None:
    for handlers, function in ((bpy.app.handlers.frame_change_pre, on_frame_change),
                               (bpy.app.handlers.frame_change_post, on_frame_checked),
                               (bpy.app.handlers.load_post, on_file_loaded)):
        for existing in list(handlers):
            if getattr(existing, "__name__", "") == function.__name__ and \
                    getattr(existing, "__module__", "") == function.__module__:
                handlers.remove(existing)
    _readers.clear()
    clear_warnings()
