"""Emitters spread over a field of view: ``[particles] initial`` as a table.

- ``initial = {box = [[x0, x1], [y0, y1]]}``: uniform in a box (one range per axis;
  axes without a range start at 0; a range may be a single number, a fixed value);
- ``initial = {disc = R, center = [x, y]}``: uniform in a disc of radius R in the
  x-y plane (``z = [z0, z1]`` or a number for 3D; default 0);
- either with ``density`` (particles per m^2 of the box or disc, or per m^3 for a
  3D box): the count is then density x area (rounded; ``[particles] count`` must
  not be given as well).

Positions come from the run's initial-state stream, so they are reproducible
from the seed.
"""
import math
from dataclasses import dataclass

import numpy as np

from ..validation import _is_number


@dataclass(frozen=True)
class Placement:
    """Uniform initial positions in a box or a disc (SI)."""
    region: str              # "box" | "disc"
    ranges: tuple            # per axis (lo, hi); for a disc: the z range (or (0, 0))
    center: tuple            # disc centre (x, y)
    radius: float            # disc radius, m
    density: float           # per m^2 or m^3, or None

    def measure(self, dims):
        """Area (m^2) or volume (m^3) that ``density`` refers to."""
        if self.region == "disc":
            return math.pi * self.radius ** 2
        widths = [hi - lo for lo, hi in self.ranges if hi > lo]
        return float(np.prod(widths)) if widths else 0.0

    def draw(self, count, dims, rng):
        """Positions (count, dims), m."""
        x = np.zeros((count, dims))
        if self.region == "box":
            for a, (lo, hi) in enumerate(self.ranges):
                x[:, a] = lo + (hi - lo) * rng.random(count)
            return x
        r = self.radius * np.sqrt(rng.random(count))
        phi = 2.0 * math.pi * rng.random(count)
        x[:, 0] = self.center[0] + r * np.cos(phi)
        if dims > 1:
            x[:, 1] = self.center[1] + r * np.sin(phi)
        if dims > 2:
            lo, hi = self.ranges[0]
            x[:, 2] = lo + (hi - lo) * rng.random(count)
        return x

    def resolved(self):
        if self.region == "box":
            out = {"box": [list(r) for r in self.ranges]}
        else:
            out = {"disc": self.radius, "center": list(self.center), "z": list(self.ranges[0])}
        if self.density is not None:
            out["density"] = self.density
        return out


def _range(v):
    if _is_number(v) and math.isfinite(v):
        return (float(v), float(v))
    if isinstance(v, (list, tuple)) and len(v) == 2 and all(_is_number(u) and math.isfinite(u) for u in v) \
            and v[0] <= v[1]:
        return (float(v[0]), float(v[1]))
    return None


EXPECTED = ("a table {box = [[x0, x1], ...] (m, one range per axis)} or {disc = radius (m), center = [x, y]}, "
            "optionally with density (per m^2, or m^3 for a 3D box)")


def parse(value, dims, count_given, where, errors):
    """A :class:`Placement` from the ``initial`` table, or None after reporting the problem."""
    keys = set(value)
    region = [k for k in ("box", "disc") if k in keys]
    allowed = {"box": {"box", "density"}, "disc": {"disc", "center", "z", "density"}}
    if len(region) != 1:
        errors.add(where, value, EXPECTED)
        return None
    region = region[0]
    extra = keys - allowed[region]
    if extra:
        errors.add(where, value, f"{EXPECTED}; unknown key(s) {sorted(extra)} for a {region}")
        return None
    density = value.get("density")
    if density is not None and not (_is_number(density) and math.isfinite(density) and density > 0):
        errors.add(where + ".density", density, "a number > 0 (particles per m^2, or m^3 for a 3D box)")
        return None
    if density is not None and count_given:
        errors.note(f"{where} has a density and [particles] count is given too: expected one of them "
                    "(the count follows from density x area)")
        return None
    if region == "box":
        raw = value["box"]
        ranges = [_range(r) for r in raw] if isinstance(raw, (list, tuple)) else [None]
        if not 1 <= len(ranges) <= dims or any(r is None for r in ranges):
            errors.add(where + ".box", raw, f"1 to {dims} ranges [lo, hi] with lo <= hi (m), one per axis "
                                            "from x (a number fixes that axis)")
            return None
        ranges += [(0.0, 0.0)] * (dims - len(ranges))
        p = Placement("box", tuple(ranges), (0.0, 0.0), 0.0, density)
        if density is not None and p.measure(dims) <= 0:
            errors.add(where + ".box", raw, "ranges with lo < hi for density to give a count")
            return None
        return p
    radius = value["disc"]
    if not (_is_number(radius) and math.isfinite(radius) and radius > 0):
        errors.add(where + ".disc", radius, "a radius > 0 (m)")
        return None
    if dims < 2:
        errors.add(where, value, "a box for 1D particles (a disc needs dimensions >= 2)")
        return None
    center = value.get("center", [0.0, 0.0])
    if not (isinstance(center, (list, tuple)) and len(center) == 2 and all(_is_number(c) for c in center)):
        errors.add(where + ".center", center, "[x, y] (m)")
        return None
    z = _range(value.get("z", 0.0))
    if z is None:
        errors.add(where + ".z", value.get("z"), "a number or a range [z0, z1] (m)")
        return None
    return Placement("disc", (z,), (float(center[0]), float(center[1])), float(radius), density)


def count_from_density(placement, dims):
    """Particles for a placement with a density (at least 1)."""
    return max(1, int(round(placement.density * placement.measure(dims))))
