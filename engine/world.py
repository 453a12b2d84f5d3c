"""From a validated Scene to the run-time arrays every solver uses.

``build_world(scene)`` resolves everything once: the support radius
H = 2 * spacing and the particle mass rest_density * spacing^3 (``engine.particle_model``),
the fluid's viscosity and the solver settings the solvers read, the fill
particles, the stream lattices, and the boundary particles of the bounds walls
and colliders (Akinci et al. 2012 boundary volumes from ``engine.boundary``).
The ``World`` then answers, at any time t:

- ``initial_state()``: fill emitters at t = 0 (ids 0..N-1, in emitter order then
  lattice order x, y, z; particles inside colliders, outside the bounds or
  within half a spacing of an earlier fill's particle are dropped; jitter from
  ``numpy.random.default_rng([scene.seed, emitter_index])``).
- ``emit(state, t0, t1)``: stream emitter layers born in [t0, t1), one layer
  every spacing / speed seconds from the emitter's first frame up to (not
  including) the frame after its last one; each layer is placed where it is at
  t1 (advanced by speed * (t1 - birth)), so layers stay one spacing apart
  whatever the step. Call it once the state has reached t1. Progress is the
  count of layers emitted, kept in ``state.scalars["emit.<name>.layers"]``, so a
  resumed bake continues bit-identically. Emitted velocity is speed along the
  (rotated) direction; the emitter's own motion is not added.
- ``boundary_at(t)``: the ``Boundary`` particles (positions, velocities,
  normals, volumes) of walls and colliders at t.
- ``enforce_bounds(state)``: the hard constraints at ``state.time``.
- ``collider_triangles_at(t)``: world-space collider triangles.
- ``estimate_particles()``: exact counts for the estimate command.

Motion: frame index i = t * fps counts from the scene's frame_start; arrays
hold frames 0..F-1 and are held constant outside. Rigid matrices are
interpolated element-wise per polar factor (rotation re-orthonormalised by
SVD, stretch interpolated linearly); deforming vertices linearly.
"""

import dataclasses
from dataclasses import dataclass, field

import numpy as np
from scipy.spatial import cKDTree

from . import energy
from .boundary import FACE_NAMES, BoundaryParticles, boundary_volumes, sample_box_walls
from .errors import SceneError
from .kernels import kernel
from .particle_model import particle_mass, support_radius
from .geometry import (evaluate_surface, inside_closed_mesh, push_out, sample_surface, sample_volume,
                       signed_volume, triangle_corners)
from .scene import FillEmitter, StreamEmitter
from .state import State, append, select

#: Fraction of the spacing that enforce_bounds keeps particles away from walls and collider surfaces.
CONTACT_MARGIN = 0.25
#: Spacings from its nearest surface sample within which a particle feels a sheet (open collider).
#: Samples lie about one spacing apart, so a particle between them can be 0.7 spacings from the
#: nearest one while touching the sheet; at 1.0 particles rested on sagging sheets unseen and
#: slipped through (bench/splash_suite.py, sheet_drop).
SHEET_REACH = 1.5
#: Spacings a new stream particle keeps from every liquid particle; closer, the space is taken and
#: the particle is not created (World.emit). A free stream's previous layer is one spacing or more
#: away (gravity only stretches it), so only a blocked nozzle is affected.
EMIT_CLEARANCE = 0.75
#: A new stream particle is not created where the liquid already there fills more than this
#: fraction of rest density (SPH sum of the existing particles and the Akinci boundary at the spot,
#: without the new one).
#: A stream's own previous layer, one spacing behind, fills about half; the inside of a pool 1.
EMIT_FILLED_FRACTION = 0.7
#: Fraction of the spacing that fill particles keep from wall planes and collider surface samples at t = 0.
#: The one-layer Akinci boundary over-counts density for fluid closer than about one spacing (a lattice
#: point half a spacing from a wall starts at up to 1.8 rho0 and the first pressure solve blows it apart);
#: the validated tank and dam-break set-ups keep 1.1 spacings (engine/validate.py WALL_GAP).
FILL_CLEARANCE = 1.0


#: What ``boundary_at`` returns: positions (B, 3) m, velocities (B, 3) m/s, normals (B, 3) unit,
#: pointing into the fluid (inward for walls, outward for closed colliders), volumes (B,) m^3 (Akinci 2012).
Boundary = BoundaryParticles


# --------------------------------------------------------------------------- motion helpers


def _frame_position(t, fps, frame_count):
    """(i0, i1, fraction) of the motion array at time t, clamped to the frames given."""
    index = float(np.clip(t * fps, 0.0, frame_count - 1))
    i0 = int(np.floor(index))
    i1 = min(i0 + 1, frame_count - 1)
    return i0, i1, index - i0


def _polar(matrix3):
    u, _, vt = np.linalg.svd(matrix3)
    rotation = u @ vt
    if np.linalg.det(rotation) < 0:
        u[:, -1] *= -1
        rotation = u @ vt
    return rotation


def interpolate_matrix(matrices, t, fps) -> np.ndarray:
    """World matrix (4, 4) at time t from per-frame matrices (F, 4, 4).

    Rotation: polar factor of the element-wise blend of the two frames'
    rotations (re-orthonormalised); stretch and translation: linear blend.
    Exact at frame times; held constant outside the frames given.
    """
    i0, i1, f = _frame_position(t, fps, len(matrices))
    a, b = matrices[i0], matrices[i1]
    if f == 0.0 or i0 == i1:
        return a.copy()
    r0, r1 = _polar(a[:3, :3]), _polar(b[:3, :3])
    stretch = (1 - f) * (r0.T @ a[:3, :3]) + f * (r1.T @ b[:3, :3])
    out = np.eye(4)
    out[:3, :3] = _polar((1 - f) * r0 + f * r1) @ stretch
    out[:3, 3] = (1 - f) * a[:3, 3] + f * b[:3, 3]
    return out


def interpolate_vertices(frames, t, fps) -> tuple[np.ndarray, np.ndarray]:
    """Vertices (V, 3) and vertex velocities (V, 3) at time t from (F, V, 3) frames."""
    i0, i1, f = _frame_position(t, fps, len(frames))
    vertices = (1 - f) * frames[i0] + f * frames[i1]
    moving = i1 > i0 and 0.0 <= t * fps < len(frames) - 1
    velocities = (frames[i1] - frames[i0]) * fps if moving else np.zeros_like(vertices)
    return vertices, velocities


def _apply(matrix, points):
    return points @ matrix[:3, :3].T + matrix[:3, 3]


# --------------------------------------------------------------------------- colliders


@dataclass(frozen=True)
class _ColliderState:
    """A collider resolved once: its surface samples and cached arrays."""

    name: str
    motion: str
    triangles: np.ndarray
    rest_vertices: np.ndarray  # static: world; rigid: object space; deforming: frame 0 (world)
    is_closed: bool
    friction: float
    triangle_index: np.ndarray  # (S,) surface samples
    barycentric: np.ndarray  # (S, 3)
    volumes: np.ndarray  # (S,) rest volumes (recomputed per call for deforming)
    transforms: np.ndarray = None
    frame_vertices: np.ndarray = None
    is_scale_constant: bool = True


def _resolve_collider(collider, spacing, support_radius):
    if collider.motion == "rigid":
        reference = _apply(collider.transforms[0], collider.vertices)
    elif collider.motion == "deforming":
        reference = collider.frame_vertices[0]
    else:
        reference = collider.vertices
    samples = sample_surface(reference, collider.triangles, spacing)
    scale_constant = True
    if collider.motion == "rigid":
        det = np.linalg.det(collider.transforms[:, :3, :3])
        scale_constant = bool(np.all(np.abs(det / det[0] - 1.0) < 1e-6))
    return _ColliderState(
        name=collider.name, motion=collider.motion, triangles=collider.triangles,
        rest_vertices=collider.vertices if collider.motion != "deforming" else collider.frame_vertices[0],
        is_closed=collider.is_closed, friction=collider.friction, triangle_index=samples.triangle_index,
        barycentric=samples.barycentric, volumes=boundary_volumes(samples.points, support_radius),
        transforms=collider.transforms, frame_vertices=collider.frame_vertices, is_scale_constant=scale_constant,
    )


def collider_vertices_at(collider, t, fps) -> tuple[np.ndarray, np.ndarray]:
    """World vertices (V, 3) and vertex velocities (V, 3) of a resolved collider at time t."""
    if collider.motion == "static":
        return collider.rest_vertices, np.zeros_like(collider.rest_vertices)
    if collider.motion == "deforming":
        return interpolate_vertices(collider.frame_vertices, t, fps)
    vertices = _apply(interpolate_matrix(collider.transforms, t, fps), collider.rest_vertices)
    # Forward difference of the interpolated motion: the slope of the segment that starts at t.
    delta = 1e-4 / fps
    ahead = _apply(interpolate_matrix(collider.transforms, t + delta, fps), collider.rest_vertices)
    return vertices, (ahead - vertices) / delta


def collider_samples_at(collider, t, fps, support_radius) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(positions, velocities, normals, volumes) of a resolved collider's boundary particles at t."""
    vertices, vertex_velocities = collider_vertices_at(collider, t, fps)
    positions, normals = evaluate_surface(vertices, collider.triangles, collider.triangle_index, collider.barycentric)
    corners_v = vertex_velocities[collider.triangles[collider.triangle_index]]
    velocities = np.einsum("sk,skj->sj", collider.barycentric, corners_v)
    if collider.motion == "deforming" or not collider.is_scale_constant:
        volumes = boundary_volumes(positions, support_radius)
    else:
        volumes = collider.volumes
    return positions, velocities, normals, volumes


# --------------------------------------------------------------------------- stream emitters


def _perpendicular_basis(direction):
    helper = np.eye(3)[int(np.argmin(np.abs(direction)))]
    u = np.cross(direction, helper)
    u /= np.linalg.norm(u)
    return u, np.cross(direction, u)


def disc_lattice(center, direction, radius, spacing) -> np.ndarray:
    """Square-lattice points of spacing ``spacing`` on a disc (centre included), (P, 3)."""
    u, w = _perpendicular_basis(np.asarray(direction, np.float64))
    k = int(np.floor(radius / spacing))
    i, j = np.meshgrid(np.arange(-k, k + 1), np.arange(-k, k + 1), indexing="ij")
    keep = (i * i + j * j) * spacing * spacing <= radius * radius * (1 + 1e-12)
    return np.asarray(center, np.float64) + spacing * (i[keep][:, None] * u + j[keep][:, None] * w)


@dataclass(frozen=True)
class _StreamState:
    name: str
    points: np.ndarray  # (P, 3) one layer, object space when transforms are given
    direction: np.ndarray  # (3,) unit
    speed: float
    interval: float  # seconds between layers
    start: float  # birth time of layer 0
    end: float  # layers are born strictly before this time
    transforms: np.ndarray = None

    @property
    def key(self) -> str:
        return f"emit.{self.name}.layers"

    @property
    def blocked_key(self) -> str:
        return f"emit.{self.name}.blocked"

    def layers_before(self, time) -> int:
        """Number of layers k >= 0 with start + k * interval < min(time, end)."""
        limit = min(time, self.end)
        if limit <= self.start:
            return 0
        n = int(np.ceil((limit - self.start) / self.interval))
        while n > 0 and self.start + (n - 1) * self.interval >= limit:
            n -= 1
        while self.start + n * self.interval < limit:
            n += 1
        return n


def _resolve_stream(emitter, scene):
    spacing = scene.particle_spacing
    if emitter.shape == "disc":
        points = disc_lattice(emitter.center, emitter.direction, emitter.radius, spacing)
    else:
        points = sample_surface(emitter.vertices, emitter.triangles, spacing).points
    return _StreamState(
        name=emitter.name, points=points, direction=emitter.direction, speed=emitter.speed,
        interval=spacing / emitter.speed, start=scene.time_of_frame(emitter.frame_start),
        end=scene.time_of_frame(emitter.frame_end + 1), transforms=emitter.transforms,
    )


def stream_layer(stream, birth, fps) -> tuple[np.ndarray, np.ndarray]:
    """World positions (P, 3) and unit direction (3,) of the layer born at time ``birth``."""
    if stream.transforms is None:
        return stream.points, stream.direction
    matrix = interpolate_matrix(stream.transforms, birth, fps)
    direction = matrix[:3, :3] @ stream.direction
    return _apply(matrix, stream.points), direction / np.linalg.norm(direction)


# --------------------------------------------------------------------------- the world


@dataclass(frozen=True)
class World:
    """Run-time view of a Scene; build it with ``build_world``. See the module docstring."""

    scene: object
    particle_spacing: float
    support_radius: float  # H = 2 * spacing, metres (engine.particle_model.support_radius)
    particle_mass: float  # kg (engine.particle_model.particle_mass)
    rest_density: float
    gravity: np.ndarray
    viscosity: float  # XSPH coefficient (the scene's fluid.viscosity)
    solver_settings: object  # engine.scene.SolverSettings: the time-step and solve settings, with their defaults
    contact_margin: float  # metres
    lower: np.ndarray
    upper: np.ndarray
    wall_positions: np.ndarray
    wall_normals: np.ndarray
    wall_volumes: np.ndarray
    colliders: tuple  # _ColliderState
    streams: tuple  # _StreamState
    initial_positions: np.ndarray
    initial_velocities: np.ndarray
    fill_counts: dict  # emitter name -> particles at t = 0
    _cache: dict = field(default_factory=dict, compare=False, repr=False)

    @property
    def fps(self) -> float:
        return self.scene.fps

    def time_of_frame(self, frame) -> float:
        return self.scene.time_of_frame(frame)

    # -- states

    def initial_state(self) -> State:
        """State at t = 0 with the fill emitters' particles (ids 0..N-1)."""
        n = len(self.initial_positions)
        return State(time=0.0, positions=self.initial_positions.copy(), velocities=self.initial_velocities.copy(),
                     ids=np.arange(n, dtype=np.int64), next_id=n, removed=0,
                     scalars={s.key: 0.0 for s in self.streams})

    def emit(self, state, t0, t1) -> State:
        """State with the stream layers born in [t0, t1), placed as at t1, where there is room.

        Layers born before t0 that were not emitted yet (by the counter in
        ``state.scalars``) are emitted too, so no layer is ever lost. A new
        particle is not created where the space is taken (``free_space``): within
        ``EMIT_CLEARANCE`` spacings of a liquid particle, within ``CONTACT_MARGIN``
        spacings of a wall or collider sample, where liquid and boundary already fill
        more than ``EMIT_FILLED_FRACTION`` of rest density, inside a closed collider,
        or outside the bounds. Such particles are counted in
        ``scalars["emit.<name>.blocked"]``.
        """
        if t1 < t0:
            raise SceneError(f"emit: t1 = {t1} is before t0 = {t0}; call emit with an increasing interval")
        scalars = dict(state.scalars)
        for stream in self.streams:
            done = int(scalars.get(stream.key, 0))
            target = stream.layers_before(t1)
            if target <= done:
                continue
            positions, velocities = [], []
            for k in range(done, target):
                birth = stream.start + k * stream.interval
                points, direction = stream_layer(stream, birth, self.fps)
                positions.append(points + (stream.speed * (t1 - birth)) * direction)
                velocities.append(np.broadcast_to(stream.speed * direction, points.shape))
            positions, velocities = np.concatenate(positions), np.concatenate(velocities)
            free = self.free_space(positions, state.positions, t1)
            scalars[stream.blocked_key] = scalars.get(stream.blocked_key, 0.0) + float(np.count_nonzero(~free))
            positions, velocities = positions[free], velocities[free]
            state = append(state, positions, velocities)
            scalars[stream.key] = float(target)
            scalars[energy.EMITTED] = scalars.get(energy.EMITTED, 0.0) + self.particle_mass * float(
                np.sum(energy.specific_energy(positions, velocities, self.gravity, self.energy_datum)))
        return dataclasses.replace(state, scalars=scalars)

    def _kernel_sums(self, tree, points, volumes):
        """(P,) sum_j V_j W(|x - x_j|, H) over the tree's points (the filled fraction they make)."""
        distances, index = tree.query(points, k=64, distance_upper_bound=self.support_radius)
        found = np.isfinite(distances)
        weights = np.zeros(distances.shape)
        weights[found] = kernel(distances[found], self.support_radius) * volumes[index[found]]
        return weights.sum(axis=1)

    def free_space(self, points, liquid, t) -> np.ndarray:
        """(P,) bool: where a new particle may be placed at time t (see ``emit``)."""
        spacing = self.particle_spacing
        free = np.all((points > self.lower) & (points < self.upper), axis=1)
        lo, hi = points.min(axis=0) - self.support_radius, points.max(axis=0) + self.support_radius
        near = liquid[np.all((liquid >= lo) & (liquid <= hi), axis=1)]
        filled = np.zeros(len(points))
        if len(near):
            tree = cKDTree(near)
            distance, _ = tree.query(points, k=1, distance_upper_bound=EMIT_CLEARANCE * spacing)
            free &= ~np.isfinite(distance)
            filled += spacing**3 * self._kernel_sums(tree, points, np.ones(len(near)))
        boundary = self.boundary_at(t)
        inside = np.all((boundary.positions >= lo) & (boundary.positions <= hi), axis=1)
        if inside.any():
            tree = cKDTree(boundary.positions[inside])
            distance, _ = tree.query(points, k=1, distance_upper_bound=CONTACT_MARGIN * spacing)
            free &= ~np.isfinite(distance)
            filled += self._kernel_sums(tree, points, boundary.volumes[inside])
        # Interstitial spots of a resting lattice are 0.87 spacings from 8 particles: taken too.
        free &= filled <= EMIT_FILLED_FRACTION
        for collider in self.colliders:
            if collider.is_closed and free.any():
                vertices = collider_vertices_at(collider, t, self.fps)[0]
                if np.all(vertices.min(axis=0) <= hi) and np.all(vertices.max(axis=0) >= lo):
                    free[free] = ~inside_closed_mesh(points[free], vertices, collider.triangles)
        return free

    @property
    def energy_datum(self) -> tuple[np.ndarray, float]:
        """Height datum of the energy audit: the lowest bounds corner (``engine.energy.height_datum``)."""
        return energy.height_datum(self.gravity, self.lower, self.upper)

    def stream_sources(self) -> list[tuple[np.ndarray, float]]:
        """[(points (P, 3), speed)]: every stream's layer points, at every position its motion takes."""
        out = []
        for stream in self.streams:
            if stream.transforms is None:
                out.append((stream.points, stream.speed))
            else:
                out += [(_apply(m, stream.points), stream.speed) for m in stream.transforms]
        return out

    # -- boundary

    def boundary_at(self, t) -> BoundaryParticles:
        """Boundary particles of the walls and colliders at time t (cached for the last t)."""
        t = float(t)
        cached = self._cache.get("boundary")
        if cached is not None and cached[0] == t:
            return cached[1]
        positions = [self.wall_positions]
        velocities = [np.zeros_like(self.wall_positions)]
        normals = [self.wall_normals]
        volumes = [self.wall_volumes]
        per_collider = []
        for collider in self.colliders:
            p, v, n, vol = collider_samples_at(collider, t, self.fps, self.support_radius)
            per_collider.append((p, v, n))
            positions.append(p)
            velocities.append(v)
            normals.append(n)
            volumes.append(vol)
        boundary = Boundary(np.concatenate(positions), np.concatenate(velocities), np.concatenate(normals),
                            np.concatenate(volumes))
        self._cache["boundary"] = (t, boundary)
        self._cache["colliders"] = (t, per_collider)
        return boundary

    @property
    def boundary_segments(self) -> tuple[tuple[str, int, int], ...]:
        """((name, start, stop), ...): which rows of ``boundary_at(t)`` belong to which object.

        "bounds" (the walls) first, then the colliders in scene order; the
        counts do not change with t.
        """
        segments, start = [("bounds", 0, len(self.wall_positions))], len(self.wall_positions)
        for collider in self.colliders:
            segments.append((collider.name, start, start + len(collider.triangle_index)))
            start += len(collider.triangle_index)
        return tuple(segments)

    def collider_triangles_at(self, t) -> list[tuple[str, np.ndarray]]:
        """[(name, (T, 3, 3) world-space triangles)] of every collider at time t."""
        return [(c.name, triangle_corners(collider_vertices_at(c, t, self.fps)[0], c.triangles)) for c in self.colliders]

    # -- constraints

    def enforce_bounds(self, state, previous=None) -> State:
        """Apply the hard constraints at ``state.time``; returns a new State.

        ``previous``: optional (N, 3) positions of the same particles before the step that
        led here; with it, a particle that crossed a sheet or entered a thin collider wall
        is sent back to the side it came from (``geometry.push_out``).

        1. Particles beyond an open bounds face are removed (counted in ``removed``).
        2. Particles inside a collider, or closer than ``contact_margin`` in front
           of it, are moved out along the nearest surface sample's normal; their
           velocity relative to the collider loses its inward normal part and
           the fraction ``friction`` of its tangential part.
        3. Particles are clamped to ``contact_margin`` inside every wall face, and
           their velocity component into the wall is set to zero.
        4. Particles the walls moved get step 2 again: one that was beyond the
           floor under a collider resting on it is clamped into the collider
           (a long learned step can carry a particle that far).
        Collider surface samples on or beyond a wall face are never used as exits.
        """
        positions = state.positions
        outside = np.zeros(len(positions), bool)
        for axis in range(3):
            if self.scene.bounds.faces[FACE_NAMES[2 * axis]] == "open":
                outside |= positions[:, axis] < self.lower[axis]
            if self.scene.bounds.faces[FACE_NAMES[2 * axis + 1]] == "open":
                outside |= positions[:, axis] > self.upper[axis]
        removed = int(np.count_nonzero(outside))
        if removed:
            state = self._account_removed(state, outside)
            state = select(state, ~outside)
            if previous is not None:
                previous = previous[~outside]
        positions = state.positions.copy()
        velocities = state.velocities.copy()
        if self.colliders and len(positions):
            self._push_out_of_colliders(positions, velocities, state.time, previous)
        margin = self.contact_margin
        clamped = np.zeros(len(positions), bool)
        for axis in range(3):
            if self.scene.bounds.faces[FACE_NAMES[2 * axis]] == "wall":
                low = positions[:, axis] < self.lower[axis] + margin
                positions[low, axis] = self.lower[axis] + margin
                velocities[low, axis] = np.maximum(velocities[low, axis], 0.0)
                clamped |= low
            if self.scene.bounds.faces[FACE_NAMES[2 * axis + 1]] == "wall":
                high = positions[:, axis] > self.upper[axis] - margin
                positions[high, axis] = self.upper[axis] - margin
                velocities[high, axis] = np.minimum(velocities[high, axis], 0.0)
                clamped |= high
        if self.colliders and clamped.any():
            again = np.flatnonzero(clamped)
            moved_positions, moved_velocities = positions[again], velocities[again]
            self._push_out_of_colliders(moved_positions, moved_velocities, state.time)
            positions[again], velocities[again] = moved_positions, moved_velocities
        return dataclasses.replace(state, positions=positions, velocities=velocities, removed=state.removed + removed)

    def _account_removed(self, state, leaving):
        """State whose energy-audit scalars include the particles in the mask ``leaving``."""
        scalars = dict(state.scalars)
        e = energy.specific_energy(state.positions[leaving], state.velocities[leaving], self.gravity,
                                   self.energy_datum)
        scalars[energy.REMOVED] = scalars.get(energy.REMOVED, 0.0) + self.particle_mass * float(np.sum(e))
        flags = state.particle_arrays.get(energy.OVER)
        if flags is not None and flags.shape == (state.count,):
            scalars[energy.OVER_REMOVED] = scalars.get(energy.OVER_REMOVED, 0.0) + float(np.count_nonzero(flags[leaving]))
        return dataclasses.replace(state, scalars=scalars)

    def _push_out_of_colliders(self, positions, velocities, t, previous=None):
        """In place: push particle positions out of every collider at time t, fix velocities."""
        self.boundary_at(t)
        _, per_collider = self._cache["colliders"]
        margin = self.contact_margin
        for collider, (sp, sv, sn) in zip(self.colliders, per_collider):
            # Surface samples on or beyond a wall face are no exit: a particle pushed there is
            # clamped straight back by the wall (a box resting on the floor would hand deep
            # particles its bottom face, and they would end inside it again).
            exits = self._inside_walls(sp, margin)
            if not exits.any():
                continue
            if not exits.all():
                sp, sv, sn = sp[exits], sv[exits], sn[exits]
            lo = sp.min(axis=0) - 2 * self.particle_spacing
            hi = sp.max(axis=0) + 2 * self.particle_spacing
            near = np.flatnonzero(np.all((positions >= lo) & (positions <= hi), axis=1))
            if len(near) == 0:
                continue
            before = None if previous is None else previous[near]
            if collider.is_closed:
                vertices = collider_vertices_at(collider, t, self.fps)[0]
                result = push_out(positions[near], sp, sn, margin, vertices=vertices, triangles=collider.triangles,
                                  previous=before)
            else:
                result = push_out(positions[near], sp, sn, margin, two_sided=True, reach=SHEET_REACH * self.particle_spacing,
                                  previous=before)
            moved = near[result.pushed]
            if len(moved) == 0:
                continue
            index = result.sample_index[result.pushed]
            normal = sn[index]
            if not collider.is_closed:
                side = np.sign(np.einsum("ij,ij->i", result.points[result.pushed] - sp[index], normal))
                normal = normal * np.where(side == 0, 1.0, side)[:, None]
            positions[moved] = result.points[result.pushed]
            relative = velocities[moved] - sv[index]
            normal_speed = np.einsum("ij,ij->i", relative, normal)
            tangential = relative - normal_speed[:, None] * normal
            normal_part = np.maximum(normal_speed, 0.0)[:, None] * normal
            velocities[moved] = sv[index] + normal_part + (1.0 - collider.friction) * tangential

    def _inside_walls(self, points, margin):
        """(N,) bool: points more than ``margin`` inside every wall face of the bounds (open faces ignored)."""
        keep = np.ones(len(points), bool)
        for axis in range(3):
            if self.scene.bounds.faces[FACE_NAMES[2 * axis]] == "wall":
                keep &= points[:, axis] > self.lower[axis] + margin
            if self.scene.bounds.faces[FACE_NAMES[2 * axis + 1]] == "wall":
                keep &= points[:, axis] < self.upper[axis] - margin
        return keep

    # -- estimate

    def estimate_particles(self) -> dict:
        """Exact particle counts: {"initial", "emitted", "total", "per_emitter": {name: count}}.

        ``total`` is initial + everything the streams emit in their windows
        (nothing removed through open faces is subtracted).
        """
        per_emitter = dict(self.fill_counts)
        emitted = 0
        for stream in self.streams:
            count = stream.layers_before(np.inf) * len(stream.points)
            per_emitter[stream.name] = count
            emitted += count
        initial = int(len(self.initial_positions))
        return {"initial": initial, "emitted": int(emitted), "total": initial + int(emitted), "per_emitter": per_emitter}


# --------------------------------------------------------------------------- building


def build_world(scene, contact_margin=None) -> World:
    """Resolve a Scene into a World (sampling fills, streams, walls and colliders once).

    Args:
        scene: a validated ``engine.scene.Scene``.
        contact_margin: metres kept between particles and walls/colliders by
            ``enforce_bounds`` (default ``CONTACT_MARGIN * spacing``).

    Raises:
        SceneError: a fill emitter's mesh holds no lattice point at this spacing.
    """
    spacing = scene.particle_spacing
    support = support_radius(spacing)
    lower, upper = scene.bounds.lower, scene.bounds.upper
    wall_positions, wall_normals = sample_box_walls(lower, upper, spacing, scene.bounds.faces)
    wall_volumes = boundary_volumes(wall_positions, support)
    colliders = tuple(_resolve_collider(c, spacing, support) for c in scene.colliders)
    streams = tuple(_resolve_stream(e, scene) for e in scene.emitters if isinstance(e, StreamEmitter))
    positions, velocities, counts = _fill(scene, colliders, support)
    return World(
        scene=scene, particle_spacing=spacing, support_radius=support,
        particle_mass=particle_mass(scene.fluid.rest_density, spacing), rest_density=scene.fluid.rest_density,
        gravity=np.asarray(scene.gravity, np.float64), viscosity=scene.fluid.viscosity, solver_settings=scene.solver,
        contact_margin=CONTACT_MARGIN * spacing if contact_margin is None else float(contact_margin),
        lower=lower, upper=upper, wall_positions=wall_positions, wall_normals=wall_normals, wall_volumes=wall_volumes,
        colliders=colliders, streams=streams, initial_positions=positions, initial_velocities=velocities,
        fill_counts=counts,
    )


def _fill(scene, colliders, support_radius):
    spacing = scene.particle_spacing
    lower, upper = scene.bounds.lower, scene.bounds.upper
    collider_surfaces = []
    for c in colliders:
        vertices = collider_vertices_at(c, 0.0, scene.fps)[0]
        points, _ = evaluate_surface(vertices, c.triangles, c.triangle_index, c.barycentric)
        collider_surfaces.append((c, vertices, cKDTree(points) if len(points) else None))
    accepted, accepted_velocities, counts = [], [], {}
    for index, emitter in enumerate(scene.emitters):
        if not isinstance(emitter, FillEmitter):
            continue
        points = sample_volume(emitter.vertices, emitter.triangles, spacing)
        if len(points) == 0:
            volume = abs(signed_volume(emitter.vertices, emitter.triangles))
            raise SceneError(
                f'emitter "{emitter.name}": mesh holds no particles at spacing {spacing:g} m '
                f"(volume {volume:.3g} m^3); enlarge it or reduce particle_spacing"
            )
        keep = np.all((points > lower) & (points < upper), axis=1)
        clearance = FILL_CLEARANCE * spacing
        for axis in range(3):
            if scene.bounds.faces[FACE_NAMES[2 * axis]] == "wall":
                keep &= points[:, axis] - lower[axis] >= clearance - 1e-9 * spacing
            if scene.bounds.faces[FACE_NAMES[2 * axis + 1]] == "wall":
                keep &= upper[axis] - points[:, axis] >= clearance - 1e-9 * spacing
        for c, vertices, tree in collider_surfaces:
            if c.is_closed:
                keep &= ~inside_closed_mesh(points, vertices, c.triangles)
            if tree is not None:
                distance, _ = tree.query(points, k=1, distance_upper_bound=clearance)
                keep &= ~np.isfinite(distance)
        if accepted:
            earlier = cKDTree(np.concatenate(accepted))
            distance, _ = earlier.query(points, k=1, distance_upper_bound=0.5 * spacing)
            keep &= ~np.isfinite(distance)
        points = points[keep]
        if emitter.jitter:
            rng = np.random.default_rng([scene.seed, index])
            points = points + rng.uniform(-emitter.jitter * spacing, emitter.jitter * spacing, size=points.shape)
        accepted.append(points)
        accepted_velocities.append(np.broadcast_to(emitter.velocity, points.shape))
        counts[emitter.name] = int(len(points))
    if not accepted:
        return np.zeros((0, 3)), np.zeros((0, 3)), counts
    return np.concatenate(accepted), np.array(np.concatenate(accepted_velocities)), counts
