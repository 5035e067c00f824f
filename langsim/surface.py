"""Beads near a plane wall: the configuration side of the wall corrections.

* Fixed height (``[medium] wall_distance``, ``[medium] wall_axis``): the bead's
  centre is taken to stay at the given distance from the wall, as for a bead
  held by a trap whose excursions along the wall normal are small; the friction
  becomes per axis, Faxen's parallel value along the wall and Brenner's exact
  perpendicular value along the normal (:mod:`langsim.units`).
* Position-dependent (a ``wall`` potential term with ``hydrodynamic = true``,
  :class:`langsim.potentials.Wall`): friction and noise follow the bead's
  distance from the wall, with the drift kT d(1/gamma)/dz in the overdamped
  scheme; the run carries a :class:`WallFriction` for the engine's friction
  stage, which evaluates :func:`langsim.kernels.walls.wall_mobility` per step.

Validation happens here, once; kernels get plain numbers.
"""
import math
import warnings
from dataclasses import dataclass

from . import units
from .validation import integer, number

#: The wall normal may name any of the three axes; one beyond ``dimensions``
#: is not simulated (every simulated axis then lies along the wall).
MAX_WALL_AXIS = 2
#: Faxen's series is meant for centre-to-wall distances above this many radii
#: (common practice, reference notes section 3).
FAXEN_RANGE = 1.5
#: Warn when trap excursions of one standard deviation along the normal change
#: the friction by more than this fraction (fixed height).
EXCURSION_WARN = 0.01

WALL_DISTANCE = number(low=0.0)
WALL_AXIS = integer(0, MAX_WALL_AXIS)


@dataclass(frozen=True)
class FixedHeight:
    """Friction of a bead held at a fixed distance from a wall."""

    distance: float         # m, centre to wall
    axis: int               # the wall normal (may be >= dimensions: not simulated)
    bulk: float             # kg/s
    parallel: float         # kg/s, Faxen
    perpendicular: float    # kg/s, Brenner

    def per_axis(self, dimensions):
        return tuple(self.perpendicular if a == self.axis else self.parallel
                     for a in range(dimensions))

    def resolved(self):
        return {"bulk_friction": self.bulk, "friction_parallel": self.parallel,
                "friction_perpendicular": self.perpendicular}


@dataclass(frozen=True)
class WallFriction:
    """What the engine's friction stage needs for position-dependent wall friction.

    Mobilities are ``wall_mobility(h, radius)`` factors of 1/``bulk`` at the
    centre-to-wall distance h = side (x[axis] - position); along the normal the
    overdamped drift is side kT/bulk d(factor)/dh (Ito) when ``drift``.
    """

    axis: int
    position: float         # m, the wall plane's coordinate on ``axis``
    side: float             # +1: beads live at x[axis] > position; -1: below it
    radius: float           # m
    bulk: float             # kg/s, the friction far from the wall
    drift: bool = True      # False only to show what the drift term is for (tests)

    def as_tuple(self):
        return (self.axis, self.position, self.side, self.radius)


#: Schemes that can run with position-dependent friction: the engine's friction
#: stage has the Ito drift of the Euler-Maruyama rule (one fresh noise per step;
#: Leimkuhler-Matthews' averaged noise would need another drift).
WALL_SCHEMES = ("euler-maruyama",)


def wall_friction(terms, particles, medium, dynamics, errors):
    """The :class:`WallFriction` of the run's hydrodynamic wall term, or None."""
    walls = [(i, t) for i, t in enumerate(terms) if t.name == "wall" and t.hydrodynamic]
    if not walls:
        return None
    i, wall = walls[0]
    where = f"potential[{i}].hydrodynamic"
    if len(walls) > 1:
        errors.note(f"potential[{walls[1][0]}].hydrodynamic = true: expected at most one wall "
                    "term with hydrodynamic friction (the corrections of two walls do not add); "
                    "set hydrodynamic = false on the others")
    if medium.wall_distance is not None:
        errors.note(f"{where} = true and [medium] wall_distance are both given: expected one "
                    "(friction from the position, or at a fixed height)")
    if particles.radius is None or not wall.radius > 0:
        errors.note(f"{where} = true: the wall friction needs the bead radius > 0 (m), "
                    "[particles] radius or the term's radius")
        return None
    if len(set(particles.friction)) > 1:
        errors.note(f"{where} = true: expected a single [particles] friction (the bulk value the "
                    f"wall correction multiplies), got {list(particles.friction)!r} (kg/s)")
    if dynamics.scheme not in WALL_SCHEMES:
        errors.note(f"[dynamics] scheme = {dynamics.scheme!r}: expected "
                    f"{' or '.join(repr(s) for s in WALL_SCHEMES)} (overdamped) with "
                    f"{where} = true (position-dependent friction); or set {where} = false "
                    "(bulk friction) or [medium] wall_distance (a fixed height)")
    return WallFriction(wall.axis, wall.position, wall.side, wall.radius, particles.friction[0])


def fixed_height(t, medium, radius, friction, given, dimensions):
    """The per-axis friction at ``[medium] wall_distance``, or None (with errors noted).

    ``t`` is the ``[particles]`` table (for messages), ``friction`` the bulk
    friction per axis (given or Stokes), ``given`` whether the user gave it.
    """
    errors = t.errors
    h = medium.wall_distance
    if radius is None:
        errors.note(f"[medium] wall_distance = {h!r}: the wall correction needs [particles] radius (m)")
        return None
    if given and len(set(friction)) > 1:
        t.bad("friction", "a single number with [medium] wall_distance: it is the bulk friction "
                          "that the wall correction multiplies", "kg/s")
        return None
    if not h > radius:
        errors.add("[medium] wall_distance", h, f"a number > [particles] radius = {radius!r}: "
                   "the distance from the bead's centre to the wall", "m")
        return None
    bulk = friction[0]
    par, perp = units.wall_frictions(bulk, h, radius)
    axis = medium.wall_axis if medium.wall_axis is not None else dimensions - 1
    return FixedHeight(h, axis, bulk, par, perp)


def fixed_height_warnings(spec, where):
    """Warnings about the validity of a fixed height (Faxen's range, trap excursions)."""
    from .config import LangsimWarning
    fh = spec.particles.fixed_height
    if fh is None:
        return
    a = spec.particles.radius
    if fh.distance < FAXEN_RANGE * a:
        warnings.warn(f"{where}[medium] wall_distance = {fh.distance!r} m is {fh.distance / a:.3g} "
                      f"radii: Faxen's parallel series is meant for >= {FAXEN_RANGE:g} radii and "
                      "underestimates the parallel friction closer to the wall", LangsimWarning,
                      stacklevel=4)
    if fh.axis >= spec.particles.dimensions:
        return
    kappa = spec.curvature()[fh.axis]
    if kappa <= 0:
        warnings.warn(f"{where}[medium] wall_distance: nothing confines axis {fh.axis} (the wall "
                      "normal), so the bead does not stay at a fixed height",
                      LangsimWarning, stacklevel=4)
        return
    sigma = math.sqrt(spec.kT / kappa)
    change = excursion_sensitivity(fh.distance, a) * sigma
    if change > EXCURSION_WARN:
        warnings.warn(f"{where}[medium] wall_distance: the rms excursion along the wall normal, "
                      f"sqrt(kT/stiffness) = {sigma * 1e9:.3g} nm, changes the perpendicular "
                      f"friction by {100 * change:.2g} %: a fixed height is a poor approximation "
                      "(stiffer axial trap or larger distance)", LangsimWarning, stacklevel=4)


def excursion_sensitivity(h, radius):
    """|d ln gamma_perp/dh| at centre-to-wall distance h, 1/m (Brenner's series).

    An excursion s along the normal changes the perpendicular friction by about
    s times this (the parallel friction by less: Faxen's slope is about half).
    """
    step = 1e-5 * (h - radius)
    lo, hi = (units.brenner_perpendicular_factor(h - step, radius),
              units.brenner_perpendicular_factor(h + step, radius))
    return abs(math.log(hi / lo)) / (2.0 * step)
