"""Fidelity of one bake (B, usually the learned preview) against another (A, the reference).

Per frame present in both caches:

- **Chamfer distance**, our convention: the symmetric *mean* nearest-neighbour
  distance, *unsquared*,

      CD(A, B) = 1/2 * ( mean_{a in A} min_{b in B} |a - b|  +  mean_{b in B} min_{a in A} |a - b| ),

  reported in metres and in particle spacings d. The measure goes back to
  Barrow, Tenenbaum, Bolles & Wolf 1977, "Parametric correspondence and
  chamfer matching", IJCAI; the point-cloud form is the one popularised by
  Fan, Su & Guibas 2017, "A Point Set Generation Network for 3D Object
  Reconstruction from a Single Image", CVPR, who sum *squared* distances.
  Conventions differ between papers (squared or not, sum or mean, halved or
  not), so compare numbers only within one convention. Two copies of the same
  cloud give 0; two lattices of one spacing shifted by s < d/2 give s.
- **Density of B** with the SPH estimator (Monaghan 1992, "Smoothed Particle
  Hydrodynamics", ARA&A 30:543): rho_i = sum_j m W(|x_i - x_j|, H) over fluid
  particles (self included) plus rho0 * sum_b V_b W(|x_i - x_b|, H) over the
  boundary particles of the world at that time (Akinci et al. 2012 volumes),
  with the cubic spline, H = 2 d and m = rho0 d^3. When the scene cannot be
  rebuilt (no ``--scene`` and no usable path in the manifest) the boundary term
  is missing and the result says so (``density_includes_boundary`` false).
  Free-surface particles have a truncated kernel support and read low by
  construction; the density fraction therefore counts only particles with at
  least ``FULL_SUPPORT_NEIGHBOURS`` fluid + boundary neighbours within H (the
  interior), and the fraction over all particles is reported beside it. In a
  disordered fluid the first layer under the surface still passes that count
  while its support is cut by the surface, so it reads a few per cent low even
  in a good incompressible bake; ``density_within_3pct_fraction_deep`` counts
  only interior particles whose fluid neighbours within H are all interior too
  (at least about one support below any surface), which separates the solver's
  density error from kernel truncation. Both are reported; the first stays the
  headline figure.
- **Kinetic energy** of A and B: 1/2 m sum |v|^2 in joules with m = rho0 d^3.
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
from scipy.spatial import cKDTree

from .cache import open_cache
from .errors import SplashdraftError
from .kernels import kernel

#: Neighbours within H = 2 d (fluid + boundary, self excluded) for a particle to count as interior.
#: A full cubic-lattice neighbourhood has 26 (physics-references.md section 1); a flat free surface ~17.
FULL_SUPPORT_NEIGHBOURS = 22

#: Support radius of the density estimator, in particle spacings.
DENSITY_SUPPORT_SPACINGS = 2.0

#: Relative density band counted as "within tolerance".
DENSITY_BAND = 0.03


def chamfer_distance(points_a, points_b):
    """Symmetric mean nearest-neighbour distance (unsquared), see the module docstring.

    Args:
        points_a: (Na, 3) float positions in metres.
        points_b: (Nb, 3) float positions in metres.

    Returns:
        (cd, mean_a_to_b, mean_b_to_a) in metres. Both empty -> zeros; exactly
        one empty -> inf.
    """
    a = np.asarray(points_a, np.float64).reshape(-1, 3)
    b = np.asarray(points_b, np.float64).reshape(-1, 3)
    if len(a) == 0 and len(b) == 0:
        return 0.0, 0.0, 0.0
    if len(a) == 0 or len(b) == 0:
        return float("inf"), float("inf"), float("inf")
    a_to_b = cKDTree(b).query(a, k=1, workers=2)[0].mean()
    b_to_a = cKDTree(a).query(b, k=1, workers=2)[0].mean()
    return 0.5 * (a_to_b + b_to_a), float(a_to_b), float(b_to_a)


def sph_density(positions, particle_spacing, rest_density, boundary_positions=None, boundary_volumes=None,
                with_pairs=False):
    """SPH density estimate and neighbour counts (see the module docstring).

    Args:
        positions: (N, 3) float fluid positions, m.
        particle_spacing: d in m; H = 2 d, m = rho0 d^3.
        rest_density: rho0 in kg/m^3.
        boundary_positions: optional (B, 3) boundary particle positions, m.
        boundary_volumes: optional (B,) Akinci volumes V_b, m^3.
        with_pairs: also return the fluid pairs within H.

    Returns:
        density (N,) float64 kg/m^3 and neighbour counts (N,) int64 (fluid +
        boundary within H, self excluded); with ``with_pairs``, also the fluid
        pairs within H ((P, 2) int, i < j).
    """
    positions = np.asarray(positions, np.float64).reshape(-1, 3)
    n = len(positions)
    if n == 0:
        empty = (np.zeros(0), np.zeros(0, np.int64))
        return empty + (np.zeros((0, 2), np.int64),) if with_pairs else empty
    support = DENSITY_SUPPORT_SPACINGS * particle_spacing
    mass = rest_density * particle_spacing**3
    tree = cKDTree(positions)
    pairs = tree.query_pairs(support * (1 - 1e-12), output_type="ndarray")
    w = kernel(np.linalg.norm(positions[pairs[:, 0]] - positions[pairs[:, 1]], axis=1), support)
    total = np.full(n, kernel(0.0, support))
    total += np.bincount(pairs[:, 0], w, n) + np.bincount(pairs[:, 1], w, n)
    counts = np.bincount(pairs[:, 0], minlength=n) + np.bincount(pairs[:, 1], minlength=n)
    density = mass * total
    if boundary_positions is not None and len(boundary_positions):
        bpos = np.asarray(boundary_positions, np.float64).reshape(-1, 3)
        bvol = np.asarray(boundary_volumes, np.float64).reshape(-1)
        sparse = tree.sparse_distance_matrix(cKDTree(bpos), support * (1 - 1e-12), output_type="ndarray")
        rows, cols, dist = sparse["i"], sparse["j"], sparse["v"]
        density += rest_density * np.bincount(rows, bvol[cols] * kernel(dist, support), n)
        counts = counts + np.bincount(rows, minlength=n)
    if with_pairs:
        return density, counts.astype(np.int64), pairs
    return density, counts.astype(np.int64)


def deep_interior(interior, pairs):
    """(N,) bool: interior particles whose fluid neighbours (``pairs``, i < j) are all interior."""
    interior = np.asarray(interior, bool)
    n = len(interior)
    outer = (~interior).astype(np.int64)
    touches_outer = np.bincount(pairs[:, 0], outer[pairs[:, 1]], n) + np.bincount(pairs[:, 1], outer[pairs[:, 0]], n)
    return interior & (touches_outer == 0)


def kinetic_energy(velocities, particle_spacing, rest_density):
    """1/2 m sum |v|^2 in joules, m = rho0 d^3. velocities: (N, 3) m/s."""
    v = np.asarray(velocities, np.float64).reshape(-1, 3)
    return 0.5 * rest_density * particle_spacing**3 * float(np.einsum("ij,ij->", v, v))


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


def count_penetrating(positions, world, time):
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


def compare_caches(dir_a, dir_b, frames=None, scene=None, on_frame=None):
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
    spacing = float(cache_b.manifest.get("particle_spacing", cache_a.manifest.get("particle_spacing", 0)))
    spacing_a = float(cache_a.manifest.get("particle_spacing", spacing))
    if spacing <= 0:
        raise SplashdraftError(f"compare: {dir_b} manifest has no particle_spacing; bake it again")
    if abs(spacing_a - spacing) > 1e-9 * spacing:
        raise SplashdraftError(
            f"compare: particle spacings differ ({dir_a}: {spacing_a} m, {dir_b}: {spacing} m); "
            "compare bakes of the same scene at the same spacing"
        )
    rest_density = float(cache_b.manifest.get("rest_density", 1000.0))
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
        interior = counts >= FULL_SUPPORT_NEIGHBOURS
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
            "kinetic_energy_a_j": kinetic_energy(fa["velocities"], spacing, rest_density),
            "kinetic_energy_b_j": kinetic_energy(fb["velocities"], spacing, rest_density),
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


def format_table(result):
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


def write_plot(result, path):
    """Chamfer (in spacings) and kinetic energy per frame as a PNG; matplotlib if present, else built-in."""
    frames = np.array([r["frame"] for r in result["frames"]], float)
    chamfer = np.array([r["chamfer_spacings"] for r in result["frames"]])
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        from .learned.pngplot import line_plot_png

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

    def on_frame(frame, done, total):
        if frame is None:
            event = {"event": "start", "frames": [0, total - 1], "solver": "compare", "particles": 0}
        else:
            event = {"event": "frame", "frame": frame, "done": done, "total": total}
        print(json.dumps(event), file=sys.stderr, flush=True)

    return on_frame


def main_compare(argv=None):
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
