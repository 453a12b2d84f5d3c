"""engine.estimate.quick_estimate and fill_outside_bounds: the estimate without building particles.

Oracles: closed-form box geometry (a box fill [a, b] on the cell-centre lattice of spacing h holds
prod((b - a) / h) particles when its sides are multiples of h; the part outside an axis-aligned
bounds box is the box difference, common practice) and, for the demo shot with its curved
boulder, the particles of the built world (engine.world: an independent path through volume
sampling).
"""

import numpy as np
import pytest

from engine.demo import demo_scene_dict, write_demo_scene
from engine.errors import BudgetError
from engine.estimate import fill_outside_bounds, quick_estimate
from engine.mesh_io import box_mesh
from engine.scene import load_scene, scene_from_dict
from engine.world import build_world


def box_scene(fill_lower, fill_upper, spacing=0.05, bounds=((0, 0, 0), (1.0, 1.0, 1.0))):
    vertices, triangles = box_mesh(fill_lower, fill_upper)
    data = {"format": "splashdraft-scene", "version": 1, "name": "box", "fps": 24, "frame_start": 1,
            "frame_end": 3, "particle_spacing": spacing,
            "bounds": {"min": list(bounds[0]), "max": list(bounds[1])},
            "emitters": [{"name": "water", "type": "fill",
                          "mesh": {"vertices": vertices.tolist(), "triangles": triangles.tolist()}}],
            "colliders": []}
    return scene_from_dict(data)


def test_box_fill_count_is_the_closed_form_lattice_count():
    """0.4 x 0.3 x 0.5 m at 5 cm: 8 x 6 x 10 = 480 particles, nothing outside the bounds."""
    estimate, outside = quick_estimate(box_scene((0.1, 0.1, 0.1), (0.5, 0.4, 0.6)))
    assert estimate.particles == 480
    assert outside == {"water": {"inside_mesh": 480, "outside_bounds": 0, "at_walls": 0}}


def test_half_outside_and_wholly_outside_fills_are_counted_as_dropped():
    """A 0.4 m cube straddling the x = 1 wall by half: 512 particles, 256 outside and the 64 of the
    layer next to the wall kept clear (engine.world.FILL_CLEARANCE = 1 spacing); moved fully past
    the wall: all 512 outside and nothing left to bake."""
    half = box_scene((0.8, 0.2, 0.2), (1.2, 0.6, 0.6))
    estimate, outside = quick_estimate(half)
    assert outside["water"]["inside_mesh"] == 512 and outside["water"]["outside_bounds"] == 256
    assert outside["water"]["at_walls"] == 64 and estimate.particles == 192
    gone = box_scene((1.2, 0.2, 0.2), (1.6, 0.6, 0.6))
    estimate, outside = quick_estimate(gone)
    assert outside["water"]["outside_bounds"] == outside["water"]["inside_mesh"] == 512
    assert estimate.particles == 0


def test_a_fine_spacing_is_counted_on_a_coarser_lattice_within_a_few_percent():
    """At 2 mm the cube holds 200^3 = 8,000,000 particles; sampling stays at ~20k points and the
    count for the half outside (4,000,000) is within 4 % (a 40k-point lattice has ~34 cells per axis,
    so a face may shift by one cell: 1/34 ~ 3 %)."""
    scene = box_scene((0.8, 0.2, 0.2), (1.2, 0.6, 0.6), spacing=0.002)
    outside = fill_outside_bounds(scene)["water"]
    assert outside["inside_mesh"] == pytest.approx(8_000_000, rel=0.04)
    assert outside["outside_bounds"] == pytest.approx(4_000_000, rel=0.04)


def test_demo_shot_count_is_within_five_percent_of_the_built_world(tmp_path):
    """The demo's water block (0.6 x 0.6 x 0.62 m) at 5 cm: the built world and the closed form agree
    within 5 %: volume / spacing^3 counts 12.4 cells in z where the lattice holds 12 (3.3 %)."""
    scene = load_scene(write_demo_scene(tmp_path, preset="small"))
    estimate, _ = quick_estimate(scene)
    built = build_world(scene).estimate_particles()["total"]
    assert estimate.particles == pytest.approx(built, rel=0.05)


def test_over_budget_is_refused_without_building_and_names_the_spacing():
    """1 mm spacing on a 0.4 m cube: 64 million particles against a budget of 400,000."""
    scene = box_scene((0.1, 0.1, 0.1), (0.5, 0.5, 0.5), spacing=0.001)
    with pytest.raises(BudgetError, match=r"particles .* budget of 400,000 .*spacing of at least"):
        quick_estimate(scene, max_particles=400_000)
