"""Training samples from baked shots: id-aligned frame triples -> core inputs and targets.

A shot is a cache of frames a fixed interval apart (training/generate.py). A
learned step spans ``stride`` s frames, dt = s * frame interval (the step is a
node feature, so one model learns several). For 'now' = frame t (with frames
t-2s, t-s, t+s present) and the particles of frame t, with t +- 1 meaning
+- s frames below:

- v_t = (x_t - x_{t-1}) / dt where the particle exists at t-1, else the cached velocity;
- v_{t-1} = (x_{t-1} - x_{t-2}) / dt where it exists at t-2 and t-1, else v_t;
- target a = (x_{t+1} - 2 x_t + x_{t-1}) / dt^2, defined where it exists at t-1 and t+1
  (a finite-difference acceleration consistent with semi-implicit Euler,
  Sanchez-Gonzalez et al. 2020).

Noise injection (Sanchez-Gonzalez et al. 2020): a random walk on the velocity
history, e1, e2 ~ N(0, sigma^2 / 2) in sqrt(g d): v~_{t-1} = v_{t-1} + e1,
v~_t = v_t + e1 + e2, positions x~_t = x_t + dt (2 e1 + e2) (the walk
integrated); the target is the acceleration that returns the *clean* next
velocity from the noisy one, a~ = (v_{t+1} - v~_t) / dt.
"""

import json
from pathlib import Path

import numpy as np

from engine.boundary import BoundaryParticles
from engine.cache import open_cache
from engine.errors import SplashdraftError
from engine.learned import features
from engine.scene import load_scene
from engine.world import build_world


class Shot:
    """One baked shot held in memory: per-frame positions, velocities, ids, times, and its world."""

    def __init__(self, folder, scene_file, cache_dir):
        self.name = Path(folder).name
        reader = open_cache(cache_dir)
        self.frames = reader.frames
        self.positions, self.velocities, self.ids, self.times = [], [], [], []
        for frame in self.frames:
            data = reader.read_frame(frame)
            order = np.argsort(data["ids"], kind="stable")
            self.positions.append(data["positions"][order].astype(np.float64))
            self.velocities.append(data["velocities"][order].astype(np.float64))
            self.ids.append(data["ids"][order].astype(np.int64))
            self.times.append(float(reader.manifest["frames"][str(frame)]["time"]))
        self.scene = load_scene(scene_file)
        self.world = build_world(self.scene)
        self.units = features.Units(self.scene.particle_spacing, self.scene.gravity)
        self.dt = 1.0 / self.scene.fps
        self.is_static = all(c.motion == "static" for c in self.scene.colliders)
        self._boundary = None

    def boundary(self, k) -> BoundaryParticles:
        if self.is_static:
            if self._boundary is None:
                self._boundary = self.world.boundary_at(0.0)
            return self._boundary
        return self.world.boundary_at(self.times[k])

    def sample_indices(self, stride=1) -> list[int]:
        """Frame positions k usable as 'now' (k-2s and k+s exist, and frame k has particles)."""
        return [k for k in range(2 * stride, len(self.frames) - stride) if len(self.ids[k])]

    def lookup(self, k, ids) -> np.ndarray:
        """Index into frame k of each id (or -1; all -1 for a frame position before the first)."""
        if k < 0:
            return np.full(len(ids), -1)
        frame_ids = self.ids[k]
        where = np.searchsorted(frame_ids, ids)
        where = np.clip(where, 0, max(len(frame_ids) - 1, 0))
        found = (len(frame_ids) > 0) & (frame_ids[where] == ids) if len(frame_ids) else np.zeros(len(ids), bool)
        return np.where(found, where, -1)

    def gather(self, k, where, fallback) -> np.ndarray:
        """Positions of frame k at ``where`` (from ``lookup``), ``fallback`` where -1."""
        found = where >= 0
        if not found.any():
            return fallback
        return np.where(found[:, None], self.positions[k][np.maximum(where, 0)], fallback)

    def history(self, k, stride=1) -> tuple:
        """(positions, velocity, previous_velocity, has_previous) of frame position k, world units.

        v_t = (x_t - x_{t-1}) / dt where the particle exists at t-1, else the cached velocity;
        v_{t-1} = (x_{t-1} - x_{t-2}) / dt where it exists at t-2 and t-1, else v_t (also at
        the first frames, where t-1 or t-2 is before the bake).
        """
        ids, x, v_cached = self.ids[k], self.positions[k], self.velocities[k]
        s = stride
        dt = self.dt * s
        i1, i2 = self.lookup(k - s, ids), self.lookup(k - 2 * s, ids)
        has1, has2 = i1 >= 0, i2 >= 0
        x1 = self.gather(k - s, i1, x)
        v = np.where(has1[:, None], (x - x1) / dt, v_cached)
        x2 = self.gather(k - 2 * s, i2, x1)
        v_prev = np.where((has1 & has2)[:, None], (x1 - x2) / dt, v)
        return x, v, v_prev, has1

    def triple(self, k, stride=1) -> dict:
        """Clean arrays for 'now' = frame position k and a step of ``stride`` frames (world units).

        Returns dict: positions (N, 3), velocity (N, 3), previous_velocity (N, 3),
        next_velocity (N, 3), has_target (N,) bool.
        """
        x, v, v_prev, has1 = self.history(k, stride)
        i_next = self.lookup(k + stride, self.ids[k])
        x_next = self.gather(k + stride, i_next, x)
        v_next = (x_next - x) / (self.dt * stride)
        return {"positions": x, "velocity": v, "previous_velocity": v_prev, "next_velocity": v_next,
                "has_target": has1 & (i_next >= 0)}


def load_shots(data_dir, names=None) -> tuple[dict, list]:
    """Load the complete (or partially baked) shots listed in ``data_dir/data_manifest.json``."""
    data_dir = Path(data_dir)
    manifest_path = data_dir / "data_manifest.json"
    try:
        manifest = json.loads(manifest_path.read_text())
    except (OSError, ValueError) as exc:
        raise SplashdraftError(f"{manifest_path}: no readable data manifest ({exc}); run python -m training.generate first") from exc
    shots = []
    for entry in manifest["shots"]:
        if names is not None and entry["name"] not in names:
            continue
        try:
            shot = Shot(data_dir / entry["name"], data_dir / entry["scene"], data_dir / entry["cache"])
        except SplashdraftError:
            continue
        if len(shot.frames) >= 4:
            shots.append(shot)
    return manifest, shots


def make_sample(shot, k, contract_like, rng=None, noise_std=0.0, stride=1) -> tuple:
    """Core inputs (unnormalised Graph) and target for one frame, with optional noise.

    Args:
        shot: Shot. k: frame position ("now"). stride: frames per learned step.
        contract_like: dict with radius_spacings, density_support_spacings,
            max_neighbours, max_boundary_neighbours.
        rng: numpy Generator for the noise; noise_std: sigma in sqrt(g d).

    Returns:
        (Graph, target (N, 3) float32 non-gravity acceleration in g (gravity frame), mask (N,) bool).
    """
    arrays = shot.triple(k, stride)
    units, dt = shot.units, shot.dt * stride
    x, v, v_prev = arrays["positions"], arrays["velocity"], arrays["previous_velocity"]
    if noise_std > 0 and rng is not None:
        scale = noise_std * units.velocity / np.sqrt(2.0)
        e1 = rng.normal(0.0, scale, x.shape)
        e2 = rng.normal(0.0, scale, x.shape)
        v_prev = v_prev + e1
        v = v + e1 + e2
        x = x + dt * (2 * e1 + e2)
    accelerations = (arrays["next_velocity"] - v) / dt
    graph = features.build_graph(
        x, v, v_prev, shot.boundary(k), units, contract_like["radius_spacings"],
        contract_like["density_support_spacings"], contract_like["max_neighbours"],
        contract_like["max_boundary_neighbours"], step_froude=dt / units.time,
    )  # fmt: skip
    target = features.target_from_accelerations(accelerations, units).astype(np.float32)
    return graph, target, arrays["has_target"]


def batch_inputs(samples) -> tuple[dict, np.ndarray, np.ndarray]:
    """Concatenate several (normalised inputs, target, mask) samples into one disjoint graph."""
    keys = ("node_features", "neighbour_index", "neighbour_mask", "edge_features", "boundary_rows", "boundary_slot",
            "boundary_features", "boundary_mask")
    width = max(s[0]["neighbour_index"].shape[1] for s in samples)
    bwidth = max(s[0]["boundary_mask"].shape[1] for s in samples)
    total_rows = sum(len(s[0]["boundary_rows"]) for s in samples)
    out = {key: [] for key in keys}
    offset = boffset = 0
    for inputs, _, _ in samples:
        n, k = inputs["neighbour_index"].shape
        kb = inputs["boundary_mask"].shape[1]
        rows = np.arange(n)[:, None] + offset
        out["node_features"].append(inputs["node_features"])
        index = np.concatenate([inputs["neighbour_index"] + offset, np.repeat(rows, width - k, axis=1)], axis=1)
        out["neighbour_index"].append(index)
        out["neighbour_mask"].append(np.pad(inputs["neighbour_mask"], ((0, 0), (0, width - k))))
        out["edge_features"].append(np.pad(inputs["edge_features"], ((0, 0), (0, width - k), (0, 0))))
        nb = len(inputs["boundary_rows"])
        out["boundary_rows"].append(inputs["boundary_rows"] + offset)
        slot = inputs["boundary_slot"]
        out["boundary_slot"].append(np.where(slot < nb, slot + boffset, total_rows))
        out["boundary_features"].append(np.pad(inputs["boundary_features"], ((0, 0), (0, bwidth - kb), (0, 0))))
        out["boundary_mask"].append(np.pad(inputs["boundary_mask"], ((0, 0), (0, bwidth - kb))))
        offset += n
        boffset += nb
    merged = {key: np.concatenate(values) for key, values in out.items()}
    target = np.concatenate([s[1] for s in samples])
    mask = np.concatenate([s[2] for s in samples])
    return merged, target, mask


def feature_statistics(graphs_and_targets) -> dict:
    """Per-column mean and std of node, edge (masked), boundary (masked) features and of the target (masked)."""
    def stats(values) -> tuple[np.ndarray, np.ndarray]:
        values = np.asarray(values, np.float64)
        if len(values) == 0:
            return np.zeros(values.shape[-1]), np.ones(values.shape[-1])
        mean = values.mean(axis=0)
        std = values.std(axis=0)
        return mean, np.where(std > 1e-6, std, 1.0)

    nodes, edges, walls, targets = [], [], [], []
    for graph, target, mask in graphs_and_targets:
        nodes.append(graph.node_features)
        edges.append(graph.edge_features[graph.neighbour_mask > 0])
        walls.append(graph.boundary_features[graph.boundary_mask > 0])
        targets.append(target[mask])
    out = {}
    for key, values in (("node", nodes), ("edge", edges), ("boundary", walls), ("target", targets)):
        mean, std = stats(np.concatenate(values))
        out[f"{key}_mean"], out[f"{key}_std"] = mean, std
    return out
