"""Fidelity of one bake (B, usually the learned preview) against another (A, the reference).

Per frame present in both caches, with the measures of ``engine.measures`` (where each is defined):

- **Chamfer distance** of A and B, in metres and in particle spacings d;
- **Density of B** with the SPH estimator, over the interior and the deep interior
  and beside it over all particles, with the boundary particles of the world at
  that time. When the scene cannot be rebuilt (no ``--scene`` and no usable path
  in the manifest) the boundary term is missing and the result says so
  (``density_includes_boundary`` false). The deep-interior fraction separates
  the solver's density error from kernel truncation at the surface; the
  interior fraction stays the headline figure;
- **Kinetic energy** of A and B in joules;
- **Penetration**: particles of B inside a collider at that frame's time, by
  the generalised winding number (engine.geometry.inside_mesh); needs the
  scene. Reported as null when the scene cannot be rebuilt.

``python -m engine compare DIR_A DIR_B [--json] [--plot FILE.png]`` prints a
table on stderr and, with ``--json``, the result on stdout.
"""

import argparse
import json
import sys
from time import monotonic
from pathlib import Path

import numpy as np

from .cache import open_cache
from .errors import SplashdraftError
from .particle_model import particle_mass
from .measures import (
    DENSITY_BAND,
    DENSITY_SUPPORT_SPACINGS,
    FULL_SUPPORT_NEIGHBOURS,
    chamfer_distance,
    deep_interior,
    interior_mask,
    kinetic_energy,
    sph_density,
)

def _collider_meshes(world, time):
    """List of (vertices, triangles) of the world's colliders at ``time``.

    ``World.collider_triangles_at`` gives (name, (T, 3, 3) corners); the corners become a
    triangle soup with 3T vertices, which the winding-number inside test accepts.
    """
    out = []
    for _name, corners in world.collider_triangles_at(time):
        corners = np.asarray(corners, np.float64).reshape(-1, 3, 3)
        out.append((corners.reshape(-1, 3), np.arange(3 * len(corners), dtype=np.int64).reshape(-1, 3)))
    return out


def count_penetrating(positions, world, time) -> int:
    """Particles strictly inside any collider of ``world`` at ``time`` (winding number)."""
    from .geometry import inside_mesh

    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    inside = np.zeros(len(positions), bool)
    for vertices, triangles in _collider_meshes(world, time):
        inside |= inside_mesh(positions, vertices, triangles)
    return int(np.count_nonzero(inside))


def _world_from(scene_path, dir_b, manifest):
    """Rebuild the World of bake B; returns (World or None, what was used, in words).

    In order: an explicit ``--scene`` (refused unless its hash is B's ``scene_hash``); the copy of
    the scene stored in B's folder at bake time (``engine.cache.SCENE_COPY``); the scene file
    named in B's manifest, only when its hash still matches. Otherwise None: the scene B was
    baked from is not available, and the result says so.
    """
    from .cache import SCENE_COPY
    from .scene import load_scene, scene_hash
    from .world import build_world

    expected = manifest.get("scene_hash")
    if scene_path:
        path = Path(scene_path)
        if not path.is_file():
            raise SplashdraftError(f"compare: scene file {path} does not exist; pass an existing --scene")
        scene = load_scene(path)
        if scene_hash(scene) != expected:
            raise SplashdraftError(
                f"compare: --scene {path} is not the scene {dir_b} was baked from (its hash differs); "
                "pass that scene, or leave --scene out to use the copy stored in the cache"
            )
        return build_world(scene), f"{path} (--scene)"
    stored = Path(dir_b) / SCENE_COPY
    if stored.is_file():
        scene = load_scene(stored)
        if scene_hash(scene) != expected:
            raise SplashdraftError(
                f"compare: the scene copy {stored} does not match its cache's scene_hash; bake {dir_b} again"
            )
        return build_world(scene), f"{stored} (the copy stored in cache B)"
    named = manifest.get("scene_file")
    if isinstance(named, str) and "\x00" not in named and Path(named).is_file():
        try:
            scene = load_scene(named)
        except SplashdraftError:
            return None, None
        if scene_hash(scene) == expected:
            return build_world(scene), f"{named} (named in cache B's manifest; its hash matches)"
    return None, None


def _shared_spacing(cache_a, cache_b, dir_a, dir_b) -> float:
    """The particle spacing both bakes were made at (metres); raises SplashdraftError when it is missing or differs."""
    spacing = float(cache_b.manifest.get("particle_spacing", cache_a.manifest.get("particle_spacing", 0)))
    spacing_a = float(cache_a.manifest.get("particle_spacing", spacing))
    if spacing <= 0:
        raise SplashdraftError(f"compare: {dir_b} manifest has no particle_spacing; bake it again")
    if abs(spacing_a - spacing) > 1e-9 * spacing:
        raise SplashdraftError(
            f"compare: particle spacings differ ({dir_a}: {spacing_a} m, {dir_b}: {spacing} m); "
            "compare bakes of the same scene at the same spacing"
        )
    return spacing


def _frames_to_compare(cache_a, cache_b, frames, dir_a, dir_b) -> list:
    """The frames both caches hold (``frames``, sorted, if given); raises SplashdraftError when one is missing
    or none is shared."""
    common = sorted(set(cache_a.frames) & set(cache_b.frames))
    if frames is not None:
        wanted = sorted(set(int(f) for f in frames))
        missing = [f for f in wanted if f not in common]
        if missing:
            raise SplashdraftError(
                f"compare: frames {missing[:5]} are not in both caches (common: "
                f"{common[0] if common else '-'}..{common[-1] if common else '-'}); pick frames both bakes have"
            )
        common = wanted
    if not common:
        raise SplashdraftError(f"compare: {dir_a} and {dir_b} share no frame; bake the same frame range")
    return common


def compare_caches(dir_a, dir_b, frames=None, scene=None, on_frame=None) -> dict:
    """Compare bake B against bake A frame by frame.

    Args:
        dir_a: reference cache folder (A).
        dir_b: cache folder under test (B, e.g. the learned preview).
        frames: iterable of frame numbers, or None for every frame in both.
        scene: optional scene file used to rebuild the world (boundary density
            term and collider penetration); default: the manifest's scene path
            if it names one.
        on_frame: optional callable ``on_frame(frame, done, total)`` after each compared frame.

    Returns:
        dict with ``mean_chamfer_spacings``, ``max_chamfer_spacings``,
        ``density_within_3pct_fraction`` (interior particles of B, averaged over
        frames), ``penetrating_particles`` (sum over frames, or None without a
        scene), ``frames`` (list of per-frame dicts), the conventions used, and
        the inputs.

    Raises:
        CacheError: a folder is not a readable cache.
        SplashdraftError: the caches share no frame or disagree in spacing.
    """
    cache_a, cache_b = open_cache(dir_a), open_cache(dir_b)
    spacing = _shared_spacing(cache_a, cache_b, dir_a, dir_b)
    rest_density = float(cache_b.manifest.get("rest_density", 1000.0))
    mass = particle_mass(rest_density, spacing)
    common = _frames_to_compare(cache_a, cache_b, frames, dir_a, dir_b)
    world, scene_used = _world_from(scene, dir_b, cache_b.manifest)
    fps = float(cache_b.manifest.get("fps", 24))
    frame_start = int(cache_b.manifest.get("frame_start", common[0]))
    rows = []
    for frame in common:
        if on_frame is not None and not rows:
            on_frame(None, 0, len(common))
        fa, fb = cache_a.read_frame(frame), cache_b.read_frame(frame)
        cd, a_to_b, b_to_a = chamfer_distance(fa["positions"], fb["positions"])
        entry_b = cache_b.manifest["frames"][str(frame)]
        time = float(entry_b.get("time", (frame - frame_start) / fps))
        boundary = world.boundary_at(time) if world is not None else None
        density, counts, pairs = sph_density(
            fb["positions"], spacing, rest_density,
            boundary.positions if boundary is not None else None,
            boundary.volumes if boundary is not None else None, with_pairs=True,
        )
        deviation = density / rest_density - 1.0
        interior = interior_mask(counts)
        deep = deep_interior(interior, pairs)
        within = np.abs(deviation) <= DENSITY_BAND
        rows.append({
            "frame": frame,
            "time": time,
            "particles_a": int(len(fa["ids"])),
            "particles_b": int(len(fb["ids"])),
            "chamfer_m": cd,
            "chamfer_spacings": cd / spacing,
            "a_to_b_m": a_to_b,
            "b_to_a_m": b_to_a,
            "interior_particles_b": int(interior.sum()),
            "density_within_3pct_fraction": float(within[interior].mean()) if interior.any() else None,
            "density_within_3pct_fraction_all": float(within.mean()) if len(within) else None,
            "deep_interior_particles_b": int(deep.sum()),
            "density_within_3pct_fraction_deep": float(within[deep].mean()) if deep.any() else None,
            "density_mean_deviation_interior": float(deviation[interior].mean()) if interior.any() else None,
            "density_max_deviation_interior": float(np.abs(deviation[interior]).max()) if interior.any() else None,
            "kinetic_energy_a_j": kinetic_energy(fa["velocities"], mass),
            "kinetic_energy_b_j": kinetic_energy(fb["velocities"], mass),
            "penetrating_particles": count_penetrating(fb["positions"], world, time) if world is not None else None,
            "energy_a": _audit(cache_a, frame),
            "energy_b": _audit(cache_b, frame),
        })
        if on_frame is not None:
            on_frame(frame, len(rows), len(common))
    chamfers = np.array([r["chamfer_spacings"] for r in rows])
    fractions = [r["density_within_3pct_fraction"] for r in rows if r["density_within_3pct_fraction"] is not None]
    deep_fractions = [r["density_within_3pct_fraction_deep"] for r in rows
                      if r["density_within_3pct_fraction_deep"] is not None]
    penetration = None if world is None else int(sum(r["penetrating_particles"] for r in rows))
    return {
        "cache_a": str(dir_a),
        "cache_b": str(dir_b),
        "particle_spacing_m": spacing,
        "rest_density": rest_density,
        "frames_compared": len(rows),
        "mean_chamfer_spacings": float(chamfers.mean()),
        "max_chamfer_spacings": float(chamfers.max()),
        "density_within_3pct_fraction": float(np.mean(fractions)) if fractions else None,
        "density_within_3pct_fraction_deep": float(np.mean(deep_fractions)) if deep_fractions else None,
        "penetrating_particles": penetration,
        "over_energy_fraction_a": _last_over_energy(rows, "energy_a"),
        "over_energy_fraction_b": _last_over_energy(rows, "energy_b"),
        "scene": scene_used,
        "density_includes_boundary": world is not None,
        "conventions": {
            "chamfer": "0.5*(mean_a min_b |a-b| + mean_b min_a |a-b|), unsquared; metres and particle spacings",
            "density": (
                f"SPH cubic spline, H = {DENSITY_SUPPORT_SPACINGS} d, m = rho0 d^3, fluid"
                + (" + Akinci boundary particles" if world is not None else " only (scene not rebuilt)")
                + f"; fraction over particles with >= {FULL_SUPPORT_NEIGHBOURS} neighbours within H"
                + "; _deep: over those whose fluid neighbours within H all pass that count too"
            ),
            "kinetic_energy": "0.5 * rho0 d^3 * sum |v|^2, joules",
            "penetration": "generalised winding number > 1/2 in any collider" if world is not None
            else "not computed: scene not available (pass --scene)",
        },
        "frames": rows,
    }


def _audit(cache, frame):
    """The energy audit the bake recorded for ``frame`` (engine.energy.frame_audit), or None."""
    return cache.manifest["frames"].get(str(frame), {}).get("energy")


def _last_over_energy(rows, key):
    """Over-energy fraction at the last compared frame that has an audit (it only grows), or None."""
    audits = [r[key] for r in rows if r[key]]
    return float(audits[-1]["over_energy_fraction"]) if audits else None


def format_table(result) -> str:
    """Human-readable per-frame table (str) for stderr."""
    head = f"{'frame':>6} {'nA':>7} {'nB':>7} {'CD [d]':>8} {'CD [mm]':>8} {'rho 3%':>7} {'KE A [J]':>10} {'KE B [J]':>10} {'inside':>6}"
    lines = [head]
    for r in result["frames"]:
        frac = "-" if r["density_within_3pct_fraction"] is None else f"{100 * r['density_within_3pct_fraction']:.1f}"
        pen = "-" if r["penetrating_particles"] is None else str(r["penetrating_particles"])
        lines.append(
            f"{r['frame']:>6} {r['particles_a']:>7} {r['particles_b']:>7} {r['chamfer_spacings']:>8.3f} "
            f"{1000 * r['chamfer_m']:>8.2f} {frac:>7} {r['kinetic_energy_a_j']:>10.4g} {r['kinetic_energy_b_j']:>10.4g} {pen:>6}"
        )
    frac = result["density_within_3pct_fraction"]
    deep = result.get("density_within_3pct_fraction_deep")
    lines.append(
        f"mean Chamfer {result['mean_chamfer_spacings']:.3f} d, max {result['max_chamfer_spacings']:.3f} d "
        f"(symmetric mean NN distance, unsquared); density within 3 %: "
        f"{'-' if frac is None else f'{100 * frac:.1f} %'} of interior particles "
        f"({'-' if deep is None else f'{100 * deep:.1f} %'} of those a support below the surface)"
        f"{'' if result['density_includes_boundary'] else ' (fluid only, no scene)'}; "
        f"penetrating: {result['penetrating_particles'] if result['penetrating_particles'] is not None else 'not checked (no scene)'}"
    )
    over = [result.get("over_energy_fraction_a"), result.get("over_energy_fraction_b")]
    lines.append("over-energy fraction (engine.energy): " + ", ".join(
        f"{name} {'not audited' if value is None else f'{100 * value:.2f} %'}" for name, value in zip("AB", over)))
    return "\n".join(lines)


def write_plot(result, path) -> None:
    """Chamfer (in spacings) and kinetic energy per frame as a PNG; matplotlib if present, else built-in."""
    frames = np.array([r["frame"] for r in result["frames"]], float)
    chamfer = np.array([r["chamfer_spacings"] for r in result["frames"]])
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        from .pngplot import line_plot_png

        line_plot_png([("chamfer (spacings)", frames, chamfer)], path, x_label="frame", y_label="chamfer d")
        return
    fig, axis = plt.subplots(2, 1, figsize=(7, 5), sharex=True)
    axis[0].plot(frames, chamfer)
    axis[0].set_ylabel("Chamfer [spacings]")
    axis[1].plot(frames, [r["kinetic_energy_a_j"] for r in result["frames"]], label="A")
    axis[1].plot(frames, [r["kinetic_energy_b_j"] for r in result["frames"]], label="B")
    axis[1].set_ylabel("kinetic energy [J]")
    axis[1].set_xlabel("frame")
    axis[1].legend()
    fig.savefig(path, dpi=100)
    plt.close(fig)


def _parser():
    parser = argparse.ArgumentParser(
        prog="python -m engine compare",
        description=(
            "Compare bake B against bake A frame by frame: symmetric mean nearest-neighbour (Chamfer) "
            "distance, SPH density of B, kinetic energy of both and particles of B inside colliders. "
            "A table goes to stderr; --json puts the full result on stdout."
        ),
    )
    parser.add_argument("dir_a", help="Reference cache folder (A).")
    parser.add_argument("dir_b", help="Cache folder under test (B), e.g. the learned preview.")
    parser.add_argument("--json", action="store_true", help="Print the result as JSON on stdout.")
    parser.add_argument("--plot", metavar="FILE.png", help="Write a PNG of Chamfer distance per frame.")
    parser.add_argument("--scene", help="Scene file of the bakes, to add the boundary density term and check "
                        "collider penetration (default: the path in B's manifest, if any).")
    parser.add_argument("--frames", help="Frame range A:B (inclusive) to compare; default all common frames.")
    parser.add_argument("--progress", choices=("none", "json"), default="none",
                        help="json: one JSON event per line on stderr (start, frame, finished, error), as the "
                        "bake command writes them; default none.")
    return parser


def _json_events(enabled):
    """An ``on_frame`` callback that writes bake-style progress events to stderr (or None)."""
    if not enabled:
        return None

    def on_frame(frame, done, total) -> None:
        if frame is None:
            event = {"event": "start", "frames": [0, total - 1], "solver": "compare", "particles": 0}
        else:
            event = {"event": "frame", "frame": frame, "done": done, "total": total}
        print(json.dumps(event), file=sys.stderr, flush=True)

    return on_frame


def main_compare(argv=None) -> int:
    """``python -m engine compare``; returns the exit status (0, or an engine error's exit code)."""
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return 0 if exc.code == 0 else 64
    frames = None
    try:
        if args.frames:
            try:
                first, last = (int(x) for x in args.frames.split(":"))
                if not 0 <= last - first < 100_000:
                    raise ValueError
            except ValueError:
                print(f"compare: --frames {args.frames!r} is not A:B with integers, A <= B, at most 100,000 frames; "
                      "e.g. --frames 1:48", file=sys.stderr)  # fmt: skip
                return 64
            frames = range(first, last + 1)
        started = monotonic()
        result = compare_caches(args.dir_a, args.dir_b, frames=frames, scene=args.scene,
                                on_frame=_json_events(args.progress == "json"))
        print(format_table(result), file=sys.stderr)
        if args.plot:
            write_plot(result, args.plot)
        if args.json:
            print(json.dumps(result, indent=1), flush=True)
    except SplashdraftError as exc:
        if args.progress == "json":
            print(json.dumps({"event": "error", "message": str(exc)}), file=sys.stderr, flush=True)
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    if args.progress == "json":
        print(json.dumps({"event": "finished", "frames": result["frames_compared"], "cache": str(args.dir_b),
                          "seconds": round(monotonic() - started, 3)}), file=sys.stderr, flush=True)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main_compare())
