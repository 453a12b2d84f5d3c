"""The particle model's derived quantities, in one place: support radius, particle mass, time step.

A liquid of rest density rho0 sampled on a lattice of spacing d has particles of mass
m = rho0 d^3 (one lattice cell of liquid, common practice) and a kernel support
H = ``SUPPORT_SPACINGS`` * d. The time step follows the CFL rule of the reference solver
(Bender & Koschier 2015, "Divergence-Free Smoothed Particle Hydrodynamics", SCA):
dt = cfl_factor * d / max|v|, at most ``max_time_step``; a step below ``min_time_step`` means
the liquid moves faster than the solver can follow (``cfl_speed_limit``).

``engine.world.World`` carries H and m for a shot; the solvers, the estimate, the measures
and the scene checks take these rules from here.
"""

#: Kernel support in particle spacings: H = 2 d (about 26 neighbours on a cubic lattice).
SUPPORT_SPACINGS = 2.0


def support_radius(particle_spacing) -> float:
    """H in metres for a particle spacing d in metres: ``SUPPORT_SPACINGS * d``."""
    return SUPPORT_SPACINGS * particle_spacing


def particle_mass(rest_density, particle_spacing) -> float:
    """m = rho0 d^3 in kg (rho0 in kg/m^3, d in metres)."""
    return rest_density * particle_spacing**3


def cfl_step(speed, particle_spacing, cfl_factor, max_time_step) -> float:
    """The CFL time step in seconds: cfl_factor * d / speed, at most ``max_time_step``.

    Args:
        speed: the fastest particle's speed in m/s (0: nothing moves, the step is ``max_time_step``).
        particle_spacing: d in metres. cfl_factor: dimensionless. max_time_step: seconds.
    """
    if speed <= 0.0:
        return max_time_step
    return min(cfl_factor * particle_spacing / speed, max_time_step)


def cfl_speed_limit(particle_spacing, cfl_factor, min_time_step) -> float:
    """The speed (m/s) at which the CFL step reaches ``min_time_step``: cfl_factor * d / min_time_step."""
    return cfl_factor * particle_spacing / min_time_step
