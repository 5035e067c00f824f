"""The ``[escape]`` table: which escape to measure, how precisely, with what budget.

Contract keys (issue 11): ``coordinate`` ("x", "y", "z", "radius" about
``center``, or a formula of x, y, z through the potentials' safe parser),
``start`` (the start basin is the coordinate on the near side of ``start``),
``target`` (escape means reaching it), ``precision`` (wanted relative
half-width of the 95 % interval, default 0.1), ``method`` ("auto"). Our own
keys: ``max_steps`` (particle-steps) and ``max_wall_time`` (s) limits,
``bridge`` (Brownian-bridge crossing test between steps, overdamped),
``walkers`` (particles of the basin run) and ``replicas`` (per splitting run).
"""
from dataclasses import dataclass

import numpy as np

from .. import potentials as _pot
from ..validation import Invalid, boolean, choice, integer, number, per_axis

#: Methods of ``[escape] method``; "ams" is adaptive multilevel splitting.
METHODS = ("auto", "direct", "ams")
AXES = "xyz"

_POS = number(low=0.0)


@dataclass(frozen=True)
class Coordinate:
    """How far a particle has gone: an axis, the distance from ``center``, or a formula.

    ``sign`` is +1 when escape means the coordinate growing to ``target`` and
    -1 when it falls to it; :meth:`__call__` returns the signed coordinate
    ``sign * q``, so that the start basin is always ``q' < start'``.
    """

    kind: str            # "axis", "radius" or "formula"
    axis: int
    center: tuple
    formula: str
    sign: float

    def raw(self, positions):
        """The coordinate q of positions (..., d) m, before the sign."""
        x = np.asarray(positions, dtype=float)
        if self.kind == "axis":
            return x[..., self.axis].copy()
        if self.kind == "radius":
            s = x - np.asarray(self.center)
            return np.sqrt(np.sum(s * s, axis=-1))
        fn = _formula_function(self.formula, x.shape[-1])
        out = fn(*[x[..., a] for a in range(x.shape[-1])])
        return np.broadcast_to(np.asarray(out, dtype=float), x.shape[:-1]).copy()

    def __call__(self, positions):
        return self.sign * self.raw(positions)

    @property
    def name(self):
        return AXES[self.axis] if self.kind == "axis" else ("radius" if self.kind == "radius" else self.formula)


_FORMULAS = {}


def _formula_function(formula, d):
    """numpy function of (x, y, z) for a coordinate formula, parsed by the potentials' whitelist."""
    import sympy
    key = (formula, d)
    if key not in _FORMULAS:
        expr, coords, t = _pot.parse_energy(formula, {}, d)
        if t in expr.free_symbols:
            raise Invalid("a formula of the position x, y, z only (no time t)")
        _FORMULAS[key] = sympy.lambdify(coords, expr, modules="numpy")
    return _FORMULAS[key]


@dataclass(frozen=True)
class EscapeSpec:
    """A validated ``[escape]`` table (SI units; start and target in the coordinate's units)."""

    coordinate: Coordinate
    start: float
    target: float
    precision: float
    method: str
    max_steps: object
    max_wall_time: object
    bridge: bool
    walkers: int
    replicas: int

    @property
    def start_signed(self):
        return self.coordinate.sign * self.start

    @property
    def target_signed(self):
        return self.coordinate.sign * self.target

    def resolved(self):
        c = self.coordinate
        return {"coordinate": c.name, "center": list(c.center), "start": self.start, "target": self.target,
                "precision": self.precision, "method": self.method, "max_steps": self.max_steps,
                "max_wall_time": self.max_wall_time, "bridge": self.bridge, "walkers": self.walkers,
                "replicas": self.replicas}


def escape_table(t, dimensions):
    """Validate an ``[escape]`` table (a :class:`~langsim.validation.Table`) into an EscapeSpec.

    Problems are added to ``t.errors``; the result is None when there were any.
    """
    n_errors = len(t.errors.messages)
    d = dimensions
    axes = tuple(AXES[:d])
    raw = t.raw("coordinate")
    kind, axis, formula = "axis", 0, ""
    if raw is None:
        t.errors.note(f"{t.where('coordinate')} is missing: expected one of "
                      f"{', '.join(map(repr, axes + ('radius',)))} or a formula of {', '.join(axes)}")
    elif not isinstance(raw, str) or not raw.strip():
        t.bad("coordinate", f"one of {', '.join(map(repr, axes + ('radius',)))} or a formula (a string)")
    elif raw.strip() in axes:
        axis = axes.index(raw.strip())
    elif raw.strip() in AXES:
        t.bad("coordinate", f"an axis of the run (dimensions = {d}): one of {', '.join(map(repr, axes))}, "
                            "'radius' or a formula")
    elif raw.strip() == "radius":
        kind = "radius"
    else:
        kind, formula = "formula", raw.strip()
        try:
            _formula_function(formula, d)
        except Invalid as exc:
            t.errors.add(t.where("coordinate"), raw, exc.expected.replace("an energy expression",
                                                                           "a coordinate formula"))
    center = tuple(t.get("center", per_axis(number(), d), default=[0.0] * d, units="m"))
    start = t.get("start", number(), required=True, units="m, or the formula's units")
    target = t.get("target", number(), required=True, units="m, or the formula's units")
    if start is not None and target is not None and start == target:
        t.errors.add(t.where("target"), target, f"a value other than start = {start!r}")
    if kind == "radius":
        for key, value in (("start", start), ("target", target)):
            if value is not None and value < 0:
                t.errors.add(t.where(key), value, "a distance >= 0 from center", "m")
        if start is not None and target is not None and target < start:
            t.errors.add(t.where("target"), target, f"a radius beyond start = {start!r} (escape leads "
                                                    "away from center)", "m")
    precision = t.get("precision", number(low=0.0, high=1.0, high_open=True), default=0.1,
                      units="relative half-width of the 95 % interval")
    method = t.get("method", choice(*METHODS), default="auto")
    max_steps = t.get("max_steps", integer(1), units="particle-steps")
    max_wall = t.get("max_wall_time", _POS, units="s")
    bridge = t.get("bridge", boolean, default=True)
    walkers = t.get("walkers", integer(2, 10**6), default=256)
    replicas = t.get("replicas", integer(10, 10**5), default=100)
    t.finish()
    if len(t.errors.messages) > n_errors:
        return None
    sign = 1.0 if target > start else -1.0
    return EscapeSpec(Coordinate(kind, axis, center, formula, sign), float(start), float(target),
                      float(precision), method, max_steps, max_wall, bridge, walkers, replicas)


def parse(table, dimensions, where="[escape]"):
    """Validate a plain mapping as an ``[escape]`` table; raises ConfigError."""
    from ..validation import Errors, Table
    errors = Errors()
    spec = escape_table(Table(errors, where, table, where + " {key}"), dimensions)
    errors.raise_if_any()
    return spec
