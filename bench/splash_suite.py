"""The splash-shot suite: does the reference solver keep a splash physical?

Runs each shot of ``bench/splash_shots.py`` with the reference solver (the same
``SphSolver.advance``, ``World`` and energy audit a bake uses, without writing
frames) and prints, per shot:

- ``over %``: the over-energy fraction (engine/energy.py): particles that at some
  frame carried more than 1.5x the highest specific energy the scene puts in;
- ``E/in``: the largest ratio over frames of (liquid energy + energy removed) to
  (initial energy + energy emitted); with static colliders it must stay <= 1.005;
- ``lost``: particles removed through the open top;
- ``p99 v`` against ``v free``: the 99th-percentile speed over all frames against the
  free-fall bound sqrt(2 x ceiling) (textbook mechanics: no particle can be faster
  without work done on it);
- ``side %`` (free stream only): the largest sideways speed of a particle of the
  stream before it meets anything, as a percentage of the stream speed;
- ``cross``: particles that crossed a thin collider (glass wall or sheet) between frames;
- ``it/sub``: pressure + divergence iterations per substep; ``unconv``: substeps whose
  pressure solve stopped at the iteration cap; ``wall s``: wall time.

    nice .venv/bin/python -m bench.splash_suite                    # every shot, 2.5 cm
    nice .venv/bin/python -m bench.splash_suite --shots pour_steps --seconds 0.6

Prints a table and writes JSON (default bench/results/splash_suite.json). Not a test:
the thresholds are the issue's targets, reported, not asserted.
"""

import argparse
import json
import math
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

from engine import energy  # noqa: E402
from engine.scene import scene_from_dict  # noqa: E402
from engine.solvers import make_solver  # noqa: E402
from engine.world import build_world  # noqa: E402
from bench.splash_shots import SHOTS, SPACING, shot  # noqa: E402


def thin_crossings(triangle_sets, before, after, ids_before, ids_after):
    """Particles whose straight path between two frames crosses a collider surface an odd number of times.

    Counted with the segment-triangle test on each (T, 3, 3) array of ``triangle_sets``: the
    colliders at the later time (thin walls and sheets only move slowly in the suite, so the
    later surface stands for both).
    """
    common, ia, ib = np.intersect1d(ids_before, ids_after, return_indices=True)
    if len(common) == 0:
        return 0
    p0, p1 = before[ia], after[ib]
    crossings = np.zeros(len(common), np.int64)
    for triangles in triangle_sets:
        crossings += _segment_hits(p0, p1, triangles)
    return int(np.count_nonzero(crossings % 2))


def _segment_hits(p0, p1, triangles):
    """(N,) number of triangles each segment p0 -> p1 passes through (Moller-Trumbore)."""
    hits = np.zeros(len(p0), np.int64)
    moved = np.flatnonzero(np.linalg.norm(p1 - p0, axis=1) > 0)
    if len(moved) == 0:
        return hits
    a, b, c = triangles[:, 0], triangles[:, 1], triangles[:, 2]
    lo, hi = triangles.min(axis=1), triangles.max(axis=1)
    for k in moved:
        seg_lo, seg_hi = np.minimum(p0[k], p1[k]), np.maximum(p0[k], p1[k])
        near = np.flatnonzero(np.all((lo <= seg_hi) & (hi >= seg_lo), axis=1))
        if len(near) == 0:
            continue
        direction = p1[k] - p0[k]
        e1, e2 = b[near] - a[near], c[near] - a[near]
        pvec = np.cross(direction, e2)
        det = np.einsum("ij,ij->i", e1, pvec)
        ok = np.abs(det) > 1e-15
        inv = np.where(ok, 1.0 / np.where(ok, det, 1.0), 0.0)
        tvec = p0[k] - a[near]
        u = np.einsum("ij,ij->i", tvec, pvec) * inv
        qvec = np.cross(tvec, e1)
        v = (qvec @ direction) * inv
        s = np.einsum("ij,ij->i", e2, qvec) * inv
        inside = ok & (u >= 0) & (v >= 0) & (u + v <= 1) & (s >= 0) & (s <= 1)
        hits[k] = int(np.count_nonzero(inside))
    return hits


def run_shot(name, spacing=SPACING, seconds=None, solver=None):
    """Bake ``name`` in memory with the reference solver and return its row of measures."""
    scene = scene_from_dict(shot(name, spacing, seconds))
    world = build_world(scene)
    solver = solver or make_solver("sph")
    top = energy.ceiling(world)
    state = energy.flag_over(solver.start(world), world, top)
    start_energy = sum(energy.energy_parts(state.positions, state.velocities, world.particle_mass, world.gravity,
                                           world.energy_datum))
    speeds, ratio, side, crossings = [], 0.0, 0.0, 0
    substeps = iterations = unconverged = 0
    clock = time.perf_counter()
    stream = world.streams[0] if world.streams else None
    for frame in range(scene.frame_start + 1, scene.frame_end + 1):
        before, ids_before = state.positions, state.ids
        state, stats = solver.advance(state, world, scene.time_of_frame(frame))
        state = energy.flag_over(state, world, top)
        substeps += stats.substeps
        iterations += stats.iterations
        unconverged += getattr(stats, "unconverged_substeps", 0)
        if world.colliders:
            triangles = [corners for _, corners in world.collider_triangles_at(state.time)]
            crossings += thin_crossings(triangles, before, state.positions, ids_before, state.ids)
        audit = energy.frame_audit(state, world, top)
        supplied = start_energy + audit["emitted_j"]
        if supplied > 0:
            ratio = max(ratio, (audit["kinetic_j"] + audit["potential_j"] + audit["removed_j"]) / supplied)
        if state.count:
            speeds.append(np.linalg.norm(state.velocities, axis=1))
        if name == "free_stream" and state.count:
            # The shot ends before the stream meets the floor: every particle is in free fall.
            falling = np.ones(state.count, bool)
            sideways = state.velocities[falling] - np.outer(state.velocities[falling] @ stream.direction,
                                                            stream.direction)
            if falling.any():
                side = max(side, float(np.max(np.linalg.norm(sideways, axis=1))) / stream.speed)
    wall = time.perf_counter() - clock
    audit = energy.frame_audit(state, world, top)
    all_speeds = np.concatenate(speeds) if speeds else np.zeros(1)
    return {
        "shot": name, "particles": int(state.next_id), "frames": scene.frame_end - scene.frame_start,
        "over_energy_percent": 100.0 * audit["over_energy_fraction"], "energy_ratio_max": ratio,
        "lost": int(state.removed), "p99_speed": float(np.percentile(all_speeds, 99)),
        "max_speed": float(all_speeds.max()), "free_fall_speed": math.sqrt(2.0 * top),
        "sideways_percent": 100.0 * side if name == "free_stream" else None,
        "crossings": crossings if world.colliders else None,
        "iterations_per_substep": iterations / max(substeps, 1), "substeps": substeps,
        "unconverged_substeps": unconverged, "wall_seconds": wall,
    }


def format_table(rows):
    head = (f"{'shot':<12} {'parts':>6} {'over %':>7} {'E/in':>6} {'lost':>5} {'p99 v':>6} {'max v':>6} "
            f"{'v free':>6} {'side %':>6} {'cross':>5} {'it/sub':>6} {'unconv':>6} {'wall s':>7}")
    lines = [head, "-" * len(head)]
    for r in rows:
        side = "" if r["sideways_percent"] is None else f"{r['sideways_percent']:.1f}"
        cross = "" if r["crossings"] is None else str(r["crossings"])
        lines.append(
            f"{r['shot']:<12} {r['particles']:>6} {r['over_energy_percent']:>7.2f} {r['energy_ratio_max']:>6.3f} "
            f"{r['lost']:>5} {r['p99_speed']:>6.2f} {r['max_speed']:>6.2f} {r['free_fall_speed']:>6.2f} {side:>6} "
            f"{cross:>5} {r['iterations_per_substep']:>6.1f} {r['unconverged_substeps']:>6} {r['wall_seconds']:>7.1f}")
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--shots", nargs="+", default=list(SHOTS), choices=SHOTS)
    parser.add_argument("--spacing", type=float, default=SPACING)
    parser.add_argument("--seconds", type=float, default=None, help="shot length (default: each shot's own)")
    parser.add_argument("--json", default=str(ROOT / "bench" / "results" / "splash_suite.json"))
    args = parser.parse_args(argv)
    rows = []
    for name in args.shots:
        rows.append(run_shot(name, args.spacing, args.seconds))
        print(format_table(rows[-1:]).splitlines()[-1], flush=True)
    print()
    print(format_table(rows))
    out = Path(args.json)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"spacing": args.spacing, "seconds": args.seconds, "shots": rows}, indent=2))
    print(f"\nwrote {out}")


if __name__ == "__main__":
    main()
