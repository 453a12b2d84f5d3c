"""The energy audit: where the liquid's mechanical energy comes from and where it goes.

Per particle, the specific energy is e = |v|^2 / 2 + g h (J/kg), with h the height
along gravity above the lowest corner of the bounds (so e >= 0 inside the bounds).
With walls and static colliders no force does positive work on the liquid, so the
liquid's energy E = sum m e never exceeds what it started with plus what the
emitters brought in, less what left through open faces (common practice; it
follows from the energy equation of inviscid flow, Batchelor 1967, "An
Introduction to Fluid Dynamics", section 3.5, section from memory).

The audit keeps, in the State (so checkpoints carry it and resumes stay exact):
- ``scalars[EMITTED]``: energy (J) of every particle a stream emitted, at emission;
- ``scalars[REMOVED]``: energy (J) of every particle removed through an open face,
  at removal; ``scalars[OVER_REMOVED]``: how many of those had been flagged;
- ``particle_arrays[OVER]``: 1.0 for a particle that at some frame carried more than
  ``OVER_FACTOR`` times the scene's energy ceiling, else 0.0.

The ceiling is the highest specific energy the scene puts in: fill particles at
t = 0, and stream sources at speed^2 / 2 + g h of their highest emission point.
The over-energy fraction is flagged particles (present or removed) over all
particles ever created. It is our own audit measure, not a published one: real
splashes concentrate energy in thin jets, so a few particles may pass it (the
sheet shot sideways at the start of an impact moves much faster than the impact,
Wagner 1932, ZAMM 12, and Riboux & Gordillo 2014, Phys. Rev. Lett. 113:024507;
jets of wave impacts focused into a corner, Peregrine 2003, Annu. Rev. Fluid
Mech. 35; all from memory); a double-digit percentage is a numerical defect.
"""

import dataclasses
from typing import TYPE_CHECKING

import numpy as np

from .measures import kinetic_energy, potential_energy

if TYPE_CHECKING:
    from .state import State

EMITTED = "energy.emitted_j"
REMOVED = "energy.removed_j"
OVER_REMOVED = "energy.over_removed"
OVER = "energy_over"

#: A particle is over-energetic above this multiple of the scene's energy ceiling.
OVER_FACTOR = 1.5


def height_datum(gravity, lower, upper) -> tuple[np.ndarray, float]:
    """(unit_down, offset): height h(x) = offset - unit_down . x is 0 at the lowest bounds corner.

    With zero gravity the height is identically 0 (unit_down = 0, offset = 0).
    """
    gravity = np.asarray(gravity, np.float64)
    g = float(np.linalg.norm(gravity))
    if g == 0.0:
        return np.zeros(3), 0.0
    down = gravity / g
    corners = np.array([[x, y, z] for x in (lower[0], upper[0]) for y in (lower[1], upper[1])
                        for z in (lower[2], upper[2])], np.float64)
    return down, float(np.max(corners @ down))


def specific_energy(positions, velocities, gravity, datum) -> np.ndarray:
    """(N,) |v|^2 / 2 + g h in J/kg, h from ``height_datum``."""
    down, offset = datum
    g = float(np.linalg.norm(gravity))
    kinetic = 0.5 * np.einsum("ij,ij->i", velocities, velocities)
    return kinetic + g * (offset - positions @ down)


def energy_parts(positions, velocities, mass, gravity, datum) -> tuple[float, float]:
    """(kinetic, potential) energy in J of particles of equal ``mass`` (``engine.measures``)."""
    return kinetic_energy(velocities, mass), potential_energy(positions, mass, gravity, datum)


def ceiling(world) -> float:
    """Highest specific energy (J/kg) the scene puts in: fills at t = 0 and stream sources."""
    datum = world.energy_datum
    best = 0.0
    if len(world.initial_positions):
        best = float(np.max(specific_energy(world.initial_positions, world.initial_velocities, world.gravity, datum)))
    for points, speed in world.stream_sources():
        if len(points):
            at_rest = specific_energy(points, np.zeros_like(points), world.gravity, datum)
            best = max(best, 0.5 * speed * speed + float(np.max(at_rest)))
    return best


def flag_over(state, world, top) -> "State":
    """State with ``OVER`` set for particles above ``OVER_FACTOR`` x ``top`` (the ceiling, J/kg)."""
    arrays = dict(state.particle_arrays)
    flags = arrays.get(OVER)
    if flags is None or flags.shape != (state.count,):
        flags = np.zeros(state.count)
    if state.count:
        e = specific_energy(state.positions, state.velocities, world.gravity, world.energy_datum)
        flags = np.maximum(flags, (e > OVER_FACTOR * top).astype(np.float64))
    arrays[OVER] = flags
    return dataclasses.replace(state, particle_arrays=arrays)


def frame_audit(state, world, top) -> dict:
    """The manifest's per-frame ``energy`` entry (all J except the fraction and counts)."""
    kinetic, potential = energy_parts(state.positions, state.velocities, world.particle_mass, world.gravity,
                                      world.energy_datum)
    flags = state.particle_arrays.get(OVER)
    flagged = int(np.count_nonzero(flags)) if flags is not None else 0
    flagged += int(state.scalars.get(OVER_REMOVED, 0.0))
    created = int(state.next_id)
    return {
        "kinetic_j": kinetic,
        "potential_j": potential,
        "emitted_j": float(state.scalars.get(EMITTED, 0.0)),
        "removed_j": float(state.scalars.get(REMOVED, 0.0)),
        "over_energy_particles": flagged,
        "over_energy_fraction": flagged / created if created else 0.0,
        "ceiling_j_per_kg": float(top),
    }
