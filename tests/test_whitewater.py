"""engine.whitewater: zone (interior / surface / spray) and the white-water potentials.

Sources:
- Ihmsen, Akinci, Akinci & Teschner 2012, "Unified spray, foam and bubbles for particle-based
  fluids", The Visual Computer 28 [formulas from memory, docs/physics-references.md]: the
  trapped-air potential sum_j |v_ij| (1 - v^_ij . x^_ij) (1 - |x_ij| / h), the wave-crest
  curvature of the surface normals, the clamp Phi, and "fewer than 6 neighbours = spray".
  The oracle here is that formula written as a plain per-particle loop, and two-particle cases
  solved by hand.
- Neighbour counts on a cubic lattice within H = 2 d (26 in the bulk, 17 on a flat face; counted
  by hand, common practice; physics-references.md section 1).
- A real bake of both solvers (engine.bake): a lone droplet launched away from a resting block
  is spray in every frame, the block's centre is interior at frame 1.
"""

import json

import numpy as np
import pytest

from engine.bake import bake
from engine.cache import open_cache, parse_frame
from engine.mesh_io import box_mesh, write_obj
from engine.whitewater import (STANDARD_GRAVITY, SUPPORT_SPACINGS, ZONE_INTERIOR, ZONE_SPRAY, ZONE_SURFACE,
                               clamp_potential, whitewater)

SPACING = 0.02


def lattice(n, spacing=SPACING, origin=(0.0, 0.0, 0.0)):
    grid = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), axis=-1).reshape(-1, 3)
    return (grid + 0.5) * spacing + np.asarray(origin)


def trapped_air_loop(positions, velocities, spacing):
    """Ihmsen et al. 2012's trapped-air sum, one particle at a time (velocities in sqrt(g0 d))."""
    h = SUPPORT_SPACINGS * spacing
    unit = np.sqrt(STANDARD_GRAVITY * spacing)
    out = np.zeros(len(positions))
    for i in range(len(positions)):
        for j in range(len(positions)):
            x_ij = positions[i] - positions[j]
            r = np.linalg.norm(x_ij)
            if i == j or r >= h:
                continue
            v_ij = (velocities[i] - velocities[j]) / unit
            speed = np.linalg.norm(v_ij)
            if speed == 0:
                continue
            out[i] += speed * (1 - np.dot(v_ij / speed, x_ij / r)) * (1 - r / h)
    return out


def test_zone_of_a_lattice_block_and_a_lone_droplet():
    """A 12^3 block: the 10^3 particles under the faces have all 26 lattice neighbours within 2 d
    (interior); the face layer has at most 17 (surface). A particle 10 spacings away has none:
    fewer than 6, spray (Ihmsen et al.'s spray class)."""
    block = lattice(12)
    droplet = block.mean(axis=0) + [0.0, 0.0, 10 * 12 * SPACING]
    positions = np.vstack([block, droplet])
    zone = whitewater(positions, np.zeros_like(positions), SPACING)["zone"]
    inner = np.all((block > SPACING) & (block < 11 * SPACING), axis=1)
    assert np.all(zone[:-1][inner] == ZONE_INTERIOR)
    assert np.all(zone[:-1][~inner] == ZONE_SURFACE)
    assert zone[-1] == ZONE_SPRAY


def test_boundary_particles_make_a_layer_on_the_floor_interior():
    """The bottom layer of a block standing on a floor of boundary particles (one lattice layer
    below) has its 26 neighbours again; without the floor it is surface."""
    block = lattice(6)
    floor = lattice(8, origin=(-SPACING, -SPACING, -SPACING))
    floor = floor[floor[:, 2] < 0]
    bottom_centre = np.all((block[:, :2] > SPACING) & (block[:, :2] < 5 * SPACING), axis=1) & (block[:, 2] < SPACING)
    alone = whitewater(block, np.zeros_like(block), SPACING)["zone"]
    standing = whitewater(block, np.zeros_like(block), SPACING, boundary_positions=floor)["zone"]
    assert np.all(alone[bottom_centre] == ZONE_SURFACE)
    assert np.all(standing[bottom_centre] == ZONE_INTERIOR)


def test_the_density_search_passed_in_gives_the_same_measures_and_lattice_counts():
    """The learned bake hands ``whitewater`` the pairs and counts of its SPH density search
    (engine.measures.sph_density, with_pairs=True) instead of searching again: every measure must
    come out the same, and the counts are the lattice's (26 within H = 2 d in the bulk, 17 on a
    flat face, counted by hand; physics-references.md section 1), floor particles included."""
    from engine.measures import sph_density

    rng = np.random.default_rng(7)
    block = lattice(8) + rng.uniform(-0.1, 0.1, (8**3, 3)) * SPACING
    floor = lattice(10, origin=(-SPACING, -SPACING, -SPACING))
    floor = floor[floor[:, 2] < 0]
    velocities = rng.normal(size=block.shape)
    _, counts, pairs = sph_density(block, SPACING, 1000.0, floor, np.full(len(floor), SPACING**3), with_pairs=True)
    alone = whitewater(block, velocities, SPACING, boundary_positions=floor)
    shared = whitewater(block, velocities, SPACING, boundary_positions=floor, neighbours=(pairs, counts))
    for name in alone:
        np.testing.assert_array_equal(shared[name], alone[name], err_msg=name)
    exact = lattice(8)
    _, counts, _ = sph_density(exact + 1e-9, SPACING, 1000.0, with_pairs=True)
    inner = np.all((exact > SPACING) & (exact < 7 * SPACING), axis=1)
    face = (exact[:, 2] > 7 * SPACING) & np.all((exact[:, :2] > SPACING) & (exact[:, :2] < 7 * SPACING), axis=1)
    assert np.all(counts[inner] == 26) and np.all(counts[face] == 17)


def test_trapped_air_matches_the_published_sum_and_hand_solved_pairs():
    """Random cloud: the vectorised potential equals the per-particle loop of the formula.
    Two particles d apart (H = 2 d, weight 1/2) closing head-on at relative speed s (in
    sqrt(g0 d)): v^_ij . x^_ij = -1, so each gets s * 2 * 1/2 = s; moving apart: 0; moving
    together: 0."""
    rng = np.random.default_rng(4)
    positions = rng.uniform(0, 6 * SPACING, size=(150, 3))
    velocities = rng.normal(size=(150, 3))
    result = whitewater(positions, velocities, SPACING)
    np.testing.assert_allclose(result["raw_trapped_air"], trapped_air_loop(positions, velocities, SPACING),
                               rtol=1e-10, atol=1e-12)
    unit = np.sqrt(STANDARD_GRAVITY * SPACING)
    pair = np.array([[0.0, 0.0, 0.0], [SPACING, 0.0, 0.0]])
    closing = np.array([[1.5, 0, 0], [-1.5, 0, 0]]) * unit  # relative speed 3
    np.testing.assert_allclose(whitewater(pair, closing, SPACING)["raw_trapped_air"], [3.0, 3.0], rtol=1e-12)
    np.testing.assert_allclose(whitewater(pair, -closing, SPACING)["raw_trapped_air"], [0.0, 0.0], atol=1e-12)
    together = np.array([[2.0, 1.0, 0], [2.0, 1.0, 0]]) * unit
    np.testing.assert_allclose(whitewater(pair, together, SPACING)["raw_trapped_air"], [0.0, 0.0], atol=1e-12)


def test_clamp_is_the_published_ramp():
    """Phi(I, 5, 20): 0 up to 5, (I - 5) / 15 between, 1 from 20 on."""
    np.testing.assert_allclose(clamp_potential([0, 5, 12.5, 20, 80], 5, 20), [0, 0, 0.5, 1, 1])


def test_wave_crest_is_zero_on_a_flat_face_and_positive_on_a_rising_ball():
    """A resting flat top face has equal normals, so no curvature. A ball of radius 4 d whose
    particles all move outwards (v^ . n^ = 1 >= 0.6) is convex everywhere: its surface particles
    get a positive crest potential, and a sharper ball (radius 2.5 d) a larger one (the normals of
    neighbours a distance r apart on a sphere of radius R differ by about r / R); moving inwards,
    none (v^ . n^ < 0.6)."""
    block = lattice(8)
    top_middle = (block[:, 2] > 7 * SPACING) & np.all((block[:, :2] > 2 * SPACING) & (block[:, :2] < 6 * SPACING), axis=1)
    moving_up = np.tile([0.0, 0.0, 1.0], (len(block), 1))
    assert np.all(whitewater(block, moving_up, SPACING)["raw_wave_crest"][top_middle] == 0.0)
    cloud = lattice(9) - 4.5 * SPACING
    medians = []
    for radius in (4.0, 2.5):
        ball = cloud[np.linalg.norm(cloud, axis=1) <= radius * SPACING]
        outwards = ball / np.maximum(np.linalg.norm(ball, axis=1), 1e-9)[:, None]
        rising = whitewater(ball, 2.0 * outwards, SPACING)
        skin = rising["zone"] != ZONE_INTERIOR
        assert np.all(rising["raw_wave_crest"][skin] > 0.0)
        assert np.all(rising["raw_wave_crest"][~skin] == 0.0)
        medians.append(np.median(rising["raw_wave_crest"][skin]))
        sinking = whitewater(ball, -2.0 * outwards, SPACING)
        assert np.all(sinking["raw_wave_crest"] == 0.0)
    assert medians[1] > 1.5 * medians[0] > 0


def test_empty_input_gives_empty_arrays():
    result = whitewater(np.zeros((0, 3)), np.zeros((0, 3)), SPACING)
    assert all(len(result[name]) == 0 for name in ("zone", "trapped_air", "wave_crest", "foam"))


def droplet_scene(folder):
    """A 0.3 m block of water in a corner of the box and one particle (a 5 cm fill cell) thrown up
    and sideways 0.6 m away from it, at 5 cm spacing."""
    spacing = 0.05
    (folder / "meshes").mkdir(parents=True, exist_ok=True)
    write_obj(folder / "meshes" / "block.obj", *box_mesh((0.0, 0.0, 0.0), (0.35, 0.35, 0.35)))
    write_obj(folder / "meshes" / "drop.obj", *box_mesh((0.9, 0.2, 0.55), (0.95, 0.25, 0.6)))
    scene = {
        "format": "splashdraft-scene", "version": 1, "name": "droplet", "fps": 24, "frame_start": 1,
        "frame_end": 4, "particle_spacing": spacing,
        "bounds": {"min": [0, 0, 0], "max": [1.3, 0.5, 1.0]},
        "emitters": [{"name": "block", "type": "fill", "mesh": "meshes/block.obj"},
                     {"name": "drop", "type": "fill", "mesh": "meshes/drop.obj", "velocity": [0.3, 0.0, 1.0]}],
    }  # fmt: skip
    path = folder / "droplet.json"
    path.write_text(json.dumps(scene))
    return path


@pytest.mark.parametrize("solver", ["sph", "learned"])
def test_a_real_bake_marks_the_lone_droplet_as_spray_in_every_frame(tmp_path, solver):
    """Every frame of a real bake carries the attributes; the thrown droplet (it never comes within
    2 spacings of the block) is spray in every frame, and at frame 1 the block's middle particle is
    interior and nothing foams (the fill starts at rest: no kinetic-energy potential; the thrown
    droplet has no neighbours: no trapped air, no crest); under a tenth of the collapsing block is
    spray in any frame (its front may throw a few particles)."""
    scene = droplet_scene(tmp_path)
    bake(scene, solver, tmp_path / "out", use_signals=False)
    reader = open_cache(tmp_path / "out")
    assert reader.frames == [1, 2, 3, 4]
    drop_id = None
    for frame in reader.frames:
        arrays = parse_frame(reader.frame_path(frame).read_bytes())
        assert {"zone", "trapped_air", "wave_crest", "foam"} <= set(arrays)
        positions = arrays["positions"]
        if drop_id is None:
            drop_id = int(arrays["ids"][np.argmax(positions[:, 0])])
            middle = np.argmin(np.linalg.norm(positions - [0.2, 0.2, 0.2], axis=1))
            assert arrays["zone"][middle] == ZONE_INTERIOR
            # Liquid at rest makes no white water, nor does a particle alone.
            assert arrays["foam"].max() == 0.0
        drop = np.flatnonzero(arrays["ids"] == drop_id)[0]
        assert positions[drop, 0] > 0.85 and positions[:, 0][arrays["ids"] != drop_id].max() < 0.7, \
            "the droplet stays clear of the block"
        assert arrays["zone"][drop] == ZONE_SPRAY, frame
        assert np.all((arrays["foam"] >= 0) & (arrays["foam"] <= 1))
        block = arrays["ids"] != drop_id
        assert np.mean(arrays["zone"][block] == ZONE_SPRAY) < 0.1, frame  # the bulk is liquid, not spray
