"""Potential terms. One definition of each term gives its energy and force.

Built-in terms are encoded as parameter rows for one compiled force function
(:mod:`langsim.kernels.forces`), so any sum of them runs without recompiling.
User terms are an energy expression (parsed through a whitelist, differentiated
with sympy and compiled) or a numba-compilable Python function
``f(x, t, force) -> energy`` that writes -grad U into ``force``.

All values are SI: J, m, N/m, N, s. A per-axis value is a scalar (all axes) or
a sequence of ``dimensions`` values.
"""
import ast
import difflib
import functools
import math
from dataclasses import dataclass, field, replace

import numpy as np

from .kernels import forces as _k
from .validation import Invalid, boolean, choice, number, integer, per_axis, text

#: Energy above the minimum (in kT) beyond which the Boltzmann density is
#: neglected when sampling initial positions: e^-50 ~ 2e-22.
SAMPLING_CUTOFF_KT = 50.0
#: Basin of a Gaussian well for initial sampling: within this many waists.
GAUSSIAN_BASIN_WAISTS = 2.0

_POS = number(low=0.0)
_NONNEG = number(low=0.0, low_open=False)
_REAL = number()


def _row():
    return np.zeros(_k.N_SLOTS)


def _put(row, start, values):
    row[start:start + len(values)] = values


@dataclass(frozen=True)
class Term:
    """Base of all terms."""

    #: Name in the ``type`` key of a ``[[potential]]`` table.
    name = ""
    #: True when the term is a sum of one-dimensional functions of each axis.
    separable = True
    #: Compiled built-in code, or None for user terms.
    code = None

    def resolved(self):
        """The resolved-config table of this term (plain SI values)."""
        out = {"type": self.name}
        for key, value in self.__dict__.items():
            out[key] = list(value) if isinstance(value, tuple) else value
        return out

    def curvature(self, dimensions):
        """Largest curvature of the term along each axis (N/m), for the dt guard."""
        return np.zeros(dimensions)

    def sampling_range(self, axis, kT):
        """Interval holding the Boltzmann density on ``axis``, or None when the
        term does not confine that axis."""
        return None

    def static(self):
        """The same term frozen at its t = 0 configuration."""
        return self

    def bind(self, particles, table):
        """The term completed from the run's ``particles`` (radius, density), once they
        are validated; problems go to ``table.errors``."""
        return self

    def energy_at(self, positions, time=0.0):
        """Energy U (J) at ``positions`` (..., dimensions) m and ``time`` s, in numpy.

        The same function the kernels compute (tests/test_potentials.py checks
        them against each other), for quadratures in :mod:`langsim.theory`.
        """
        raise NotImplementedError(f"{type(self).__name__} has no energy")

    def isotropic(self, dimensions):
        """True when U depends only on the distance from ``center`` (in 1D: U is
        symmetric about it) and not on time, so that :func:`radial_profile` applies."""
        return False


def _positions(positions, d):
    x = np.asarray(positions, dtype=float)
    if x.shape[-1:] != (d,):
        raise ValueError(f"positions must have shape (..., {d}), got {x.shape}")
    return x


def _axes(table, key, d, element, default, units):
    return tuple(table.get(key, per_axis(element, d), default=[default] * d, units=units))


def _barrier(table, kT, key="barrier"):
    """``key`` in J, or ``key_kT`` in units of kT: exactly one of them."""
    in_kT = key + "_kT"
    if table.has(in_kT):
        if table.has(key):
            table.errors.note(f"{table.where(key)} and {in_kT} are both given: expected one")
        table.known.append(key)
        value = table.get(in_kT, _POS, units="kT")
        return None if value is None else value * kT
    table.known.append(in_kT)
    return table.get(key, _POS, required=True, units=f"J, or {in_kT} in units of kT")


def _axis(table, d):
    return table.get("axis", integer(0, d - 1), default=0)


@dataclass(frozen=True)
class Harmonic(Term):
    """U = sum_i stiffness_i/2 (x_i - c_i(t))^2, c(t) = center + velocity t
    + amplitude sin(2 pi frequency t + phase) (a dragged or oscillating trap)."""

    stiffness: tuple
    center: tuple
    velocity: tuple
    amplitude: tuple
    frequency: float = 0.0
    phase: float = 0.0
    name = "harmonic"
    code = _k.HARMONIC

    @classmethod
    def from_table(cls, t, d, kT):
        return cls(
            stiffness=tuple(t.get("stiffness", per_axis(_NONNEG, d), required=True, units="N/m")
                            or [1.0] * d),
            center=_axes(t, "center", d, _REAL, 0.0, "m"),
            velocity=_axes(t, "velocity", d, _REAL, 0.0, "m/s"),
            amplitude=_axes(t, "amplitude", d, _REAL, 0.0, "m"),
            frequency=t.get("frequency", _NONNEG, default=0.0, units="Hz"),
            phase=t.get("phase", _REAL, default=0.0, units="rad"))

    def encode(self, d):
        row = _row()
        _put(row, 0, self.stiffness)
        _put(row, 3, self.center)
        _put(row, 6, self.velocity)
        _put(row, 9, self.amplitude)
        row[12], row[13] = self.frequency, self.phase
        return row

    @property
    def moving(self):
        return any(self.velocity) or (any(self.amplitude) and self.frequency > 0)

    def center_at(self, time):
        return np.array(self.center) + np.array(self.velocity) * time + np.array(
            self.amplitude) * math.sin(2 * math.pi * self.frequency * time + self.phase)

    def curvature(self, d):
        return np.array(self.stiffness[:d], dtype=float)

    def sampling_range(self, axis, kT):
        k = self.stiffness[axis]
        if k <= 0:
            return None
        c = self.center_at(0.0)[axis]
        half = math.sqrt(2 * SAMPLING_CUTOFF_KT * kT / k)
        return c - half, c + half

    def static(self):
        d = len(self.center)
        return Harmonic(self.stiffness, tuple(self.center_at(0.0)), (0.0,) * d, (0.0,) * d, 0.0, 0.0)

    def energy_at(self, positions, time=0.0):
        x = _positions(positions, len(self.center))
        s = x - self.center_at(time)
        return 0.5 * np.sum(np.array(self.stiffness) * s * s, axis=-1)

    def isotropic(self, dimensions):
        return not self.moving and len(set(self.stiffness[:dimensions])) == 1


@dataclass(frozen=True)
class DoubleWell(Term):
    """Quartic double well along ``axis``: U = barrier ((2 s/separation)^2 - 1)^2,
    s = x_axis - center_axis, minima at s = +-separation/2, barrier top at s = 0;
    harmonic with ``stiffness`` on the other axes."""

    barrier: float
    separation: float
    axis: int
    stiffness: tuple
    center: tuple
    name = "double-well"
    code = _k.DOUBLE_WELL

    @classmethod
    def from_table(cls, t, d, kT):
        return cls(barrier=_barrier(t, kT) or 1.0,
                   separation=t.get("separation", _POS, required=True, units="m") or 1.0,
                   axis=_axis(t, d),
                   stiffness=_axes(t, "stiffness", d, _NONNEG, 0.0, "N/m"),
                   center=_axes(t, "center", d, _REAL, 0.0, "m"))

    def encode(self, d):
        row = _row()
        row[0], row[1], row[2] = self.barrier, self.separation, self.axis
        _put(row, 3, self.center)
        _put(row, 6, self.stiffness)
        return row

    @property
    def well_curvature(self):
        """U'' at the minima, N/m (32 barrier / separation^2)."""
        return 32.0 * self.barrier / self.separation**2

    def curvature(self, d):
        out = np.array(self.stiffness[:d], dtype=float)
        out[self.axis] = self.well_curvature
        return out

    def energy_at(self, positions, time=0.0):
        x = _positions(positions, len(self.center))
        s = x - np.array(self.center)
        q = (2.0 * s[..., self.axis] / self.separation) ** 2 - 1.0
        k = np.array(self.stiffness, dtype=float)
        k[self.axis] = 0.0
        return self.barrier * q * q + 0.5 * np.sum(k * s * s, axis=-1)

    def isotropic(self, dimensions):
        return dimensions == 1

    def sampling_range(self, axis, kT):
        c = self.center[axis]
        if axis == self.axis:
            half = 0.5 * self.separation * math.sqrt(
                1.0 + math.sqrt(SAMPLING_CUTOFF_KT * kT / self.barrier))
            return c - half, c + half
        k = self.stiffness[axis]
        if k <= 0:
            return None
        half = math.sqrt(2 * SAMPLING_CUTOFF_KT * kT / k)
        return c - half, c + half


@dataclass(frozen=True)
class Periodic(Term):
    """Tilted periodic potential along ``axis``:
    U = barrier/2 (1 - cos(2 pi s/period)) - tilt s, s = x_axis - center_axis.
    ``barrier`` is the peak-to-peak height of the untilted corrugation."""

    barrier: float
    period: float
    tilt: float
    axis: int
    center: tuple
    name = "periodic"
    code = _k.PERIODIC

    @classmethod
    def from_table(cls, t, d, kT):
        return cls(barrier=_barrier(t, kT) or 1.0,
                   period=t.get("period", _POS, required=True, units="m") or 1.0,
                   tilt=t.get("tilt", _REAL, default=0.0, units="N"),
                   axis=_axis(t, d),
                   center=_axes(t, "center", d, _REAL, 0.0, "m"))

    def encode(self, d):
        row = _row()
        row[0], row[1], row[2], row[3] = self.barrier, self.period, self.tilt, self.axis
        _put(row, 4, self.center)
        return row

    def curvature(self, d):
        out = np.zeros(d)
        out[self.axis] = 0.5 * self.barrier * (2 * math.pi / self.period) ** 2
        return out

    def energy_at(self, positions, time=0.0):
        x = _positions(positions, len(self.center))
        s = x[..., self.axis] - self.center[self.axis]
        return 0.5 * self.barrier * (1.0 - np.cos(2.0 * math.pi * s / self.period)) - self.tilt * s

    def isotropic(self, dimensions):
        return dimensions == 1 and self.tilt == 0.0

    def period_range(self):
        c = self.center[self.axis]
        return c - 0.5 * self.period, c + 0.5 * self.period


@dataclass(frozen=True)
class GaussianWell(Term):
    """Finite-depth well: U = -depth exp(-2 sum_i (x_i - c_i)^2 / waist_i^2)
    (a focused beam's intensity profile, waist = 1/e^2 radius)."""

    depth: float
    waist: tuple
    center: tuple
    name = "gaussian-well"
    code = _k.GAUSSIAN_WELL

    @property
    def separable(self):
        return len(self.center) == 1

    @classmethod
    def from_table(cls, t, d, kT):
        return cls(depth=_barrier(t, kT, "depth") or 1.0,
                   waist=tuple(t.get("waist", per_axis(_POS, d), required=True, units="m")
                               or [1.0] * d),
                   center=_axes(t, "center", d, _REAL, 0.0, "m"))

    def encode(self, d):
        row = _row()
        row[0] = self.depth
        _put(row, 1, self.waist)
        _put(row, 4, self.center)
        return row

    def curvature(self, d):
        return np.array([4.0 * self.depth / w**2 for w in self.waist[:d]])

    def energy_at(self, positions, time=0.0):
        x = _positions(positions, len(self.center))
        s = (x - np.array(self.center)) / np.array(self.waist)
        return -self.depth * np.exp(-2.0 * np.sum(s * s, axis=-1))

    def isotropic(self, dimensions):
        return len(set(self.waist[:dimensions])) == 1

    def sampling_range(self, axis, kT):
        half = GAUSSIAN_BASIN_WAISTS * self.waist[axis]
        return self.center[axis] - half, self.center[axis] + half


@dataclass(frozen=True)
class ConstantForce(Term):
    """U = -force . x (gravity, buoyancy, an applied flow)."""

    force: tuple
    name = "constant-force"
    code = _k.CONSTANT_FORCE

    @classmethod
    def from_table(cls, t, d, kT):
        return cls(force=tuple(t.get("force", per_axis(_REAL, d), required=True, units="N")
                               or [0.0] * d))

    def encode(self, d):
        row = _row()
        _put(row, 0, self.force)
        return row

    def energy_at(self, positions, time=0.0):
        x = _positions(positions, len(self.force))
        return -np.sum(np.array(self.force) * x, axis=-1)

    def isotropic(self, dimensions):
        return not any(self.force[:dimensions])


_SIDES = {"above": 1.0, "below": -1.0}


@dataclass(frozen=True)
class Wall(Term):
    """Steep soft wall at the plane x_axis = position: U = strength exp(-gap/range),
    gap = side (x_axis - position) - radius, the distance from the bead's surface to the
    plane (side +1: beads live above the plane, -1: below it). The form of a screened
    electrostatic repulsion between a charged bead and glass (range = Debye length);
    the energy stays finite inside the wall. With ``hydrodynamic`` the friction also
    depends on the gap (Faxen parallel, closed-form perpendicular, see
    :mod:`langsim.surface`)."""

    strength: float
    range: float
    position: float
    axis: int
    side: float
    radius: float
    hydrodynamic: bool
    kT: float = field(default=0.0, repr=False)    # for the guard curvature only
    name = "wall"
    code = _k.WALL

    @classmethod
    def from_table(cls, t, d, kT):
        side = t.get("side", choice(*_SIDES), default="above")
        return cls(strength=_barrier(t, kT, "strength") or kT,
                   range=t.get("range", _POS, required=True, units="m") or 1.0,
                   position=t.get("position", _REAL, default=0.0, units="m"),
                   axis=t.get("axis", integer(0, d - 1), default=d - 1),
                   side=_SIDES.get(side, 1.0),
                   radius=t.get("radius", _NONNEG, units="m"),
                   hydrodynamic=t.get("hydrodynamic", boolean, default=True),
                   kT=kT)

    def bind(self, particles, t):
        """The bead radius from ``[particles] radius`` unless the term gives its own."""
        if self.radius is not None:
            return self
        if particles.radius is None:
            t.errors.note(f"{t.where('radius')} is missing: expected the bead radius (m), here "
                          "or as [particles] radius (0 for a wall acting on the centre)")
            return replace(self, radius=0.0)
        return replace(self, radius=particles.radius)

    def resolved(self):
        out = super().resolved()
        out.pop("kT")
        out["side"] = "above" if self.side > 0 else "below"
        return out

    def encode(self, d):
        row = _row()
        row[:6] = (self.strength, self.range, self.position, self.axis, self.side, self.radius)
        return row

    def contact(self):
        """Coordinate on ``axis`` of the bead's centre at contact (gap 0), m."""
        return self.position + self.side * self.radius

    def gap_at_energy(self, energy):
        """The gap (m, negative inside the wall) at which U = ``energy`` J."""
        return self.range * math.log(self.strength / energy)

    def curvature(self, d):
        # U'' = U/range^2; for the step guard, taken where U = kT (the region beads
        # visit), or at contact for a wall weaker than kT
        out = np.zeros(d)
        out[self.axis] = min(self.strength, self.kT or self.strength) / self.range**2
        return out

    def sampling_range(self, axis, kT):
        if axis != self.axis:
            return None
        edge = self.contact() + self.side * self.gap_at_energy(SAMPLING_CUTOFF_KT * kT)
        return (edge, math.inf) if self.side > 0 else (-math.inf, edge)

    def energy_at(self, positions, time=0.0):
        x = np.asarray(positions, dtype=float)
        gap = self.side * (x[..., self.axis] - self.position) - self.radius
        return self.strength * np.exp(-gap / self.range)


@dataclass(frozen=True)
class Gravity(ConstantForce):
    """Gravity less buoyancy: U = m_b g x_axis, m_b = (4/3) pi a^3 (rho_p - rho_f), so
    beads (denser than the fluid, g > 0) are pulled toward smaller x_axis. A constant
    force (its row is the force) computed from [particles] radius and density (or mass)."""

    acceleration: float = 0.0
    axis: int = 0
    fluid_density: object = None
    buoyant_mass: float = 0.0
    name = "gravity"

    @classmethod
    def from_table(cls, t, d, kT):
        from . import units
        fluid = t.raw("fluid_density", "water")
        temperature = kT / units.k_B
        lo, hi = units.WATER_T_RANGE
        if fluid == "water" and lo <= temperature <= hi:
            fluid = units.water_density(temperature)
        elif fluid == "water":
            t.bad("fluid_density", f"a number > 0 (kg/m^3): 'water' needs a temperature between "
                                   f"{lo} and {hi} K, got {temperature:g} K")
            fluid = None
        else:
            try:
                fluid = _POS(fluid)
            except Invalid:
                t.bad("fluid_density", "a number > 0 or the string 'water'", "kg/m^3")
                fluid = None
        return cls(force=(0.0,) * d,
                   acceleration=t.get("acceleration", _REAL, default=units.g_n, units="m/s^2"),
                   axis=t.get("axis", integer(0, d - 1), default=d - 1), fluid_density=fluid)

    def bind(self, particles, t):
        """The force from the bead's radius and density (or mass)."""
        from . import units
        if particles.radius is None or (particles.density is None and particles.mass is None):
            t.errors.note(f"{t.where('type')} = 'gravity' needs [particles] radius (m) and density "
                          "(kg/m^3) or mass (kg)")
            return self
        if self.fluid_density is None:
            return self
        volume = units.sphere_mass(particles.radius, 1.0)
        density = particles.density if particles.density is not None else particles.mass / volume
        mb = units.buoyant_mass(particles.radius, density, self.fluid_density)
        force = [0.0] * len(self.force)
        force[self.axis] = -mb * self.acceleration
        return replace(self, force=tuple(force), buoyant_mass=mb)


# ----------------------------------------------------------------- expressions

_FUNCTIONS = ("exp", "log", "sqrt", "sin", "cos", "tan", "sinh", "cosh", "tanh",
              "atan", "Abs")
_CONSTANTS = {"pi": math.pi, "e": math.e}
_COORDS = ("x", "y", "z")
_BINOPS = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}


def _caret(source, node_or_col, message):
    col = node_or_col if isinstance(node_or_col, int) else getattr(node_or_col, "col_offset", 0)
    return f"{message}\n    {source}\n    {' ' * col}^"


#: Bounds of an energy expression: characters, nesting depth (a chain of + - or * /
#: counts once), magnitude of any constant in it or its gradient, and the largest
#: integer exponent kept exact (larger ones are floats: sympy would expand them exactly).
MAX_EXPRESSION_CHARS = 2000
MAX_EXPRESSION_DEPTH = 40
MAX_CONSTANT = 1e300
MAX_EXACT_INTEGER = 2**53
MAX_INT_EXPONENT = 1024
_CHAINS = ((ast.Add, ast.Sub), (ast.Mult, ast.Div))


def _chain_class(node):
    if isinstance(node, ast.BinOp):
        for i, ops in enumerate(_CHAINS):
            if isinstance(node.op, ops):
                return i
    if isinstance(node, ast.UnaryOp):
        return "unary"
    return None


def _depth(tree):
    """Nesting depth of an expression tree, without recursion."""
    deepest, stack = 0, [(tree.body if isinstance(tree, ast.Expression) else tree, 1)]
    while stack:
        node, depth = stack.pop()
        deepest = max(deepest, depth)
        cls = _chain_class(node)
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.operator, ast.unaryop, ast.expr_context)):
                continue
            same = cls is not None and _chain_class(child) == cls and (
                child is getattr(node, "left", None) or child is getattr(node, "operand", None))
            stack.append((child, depth if same else depth + 1))
    return deepest


def _float_op(op, a, b):
    """a op b in float64; raises ArithmeticError or ValueError when it has no real value."""
    if op is ast.Add:
        r = a + b
    elif op is ast.Sub:
        r = a - b
    elif op is ast.Mult:
        r = a * b
    elif op is ast.Div:
        r = a / b
    else:
        r = a ** b
    if isinstance(r, complex):
        raise ValueError("complex")
    return r


def _check_numbers(expr, src, what="the expression"):
    """Refuse complex values, division by zero and constants beyond MAX_CONSTANT; large exact
    integers (from sympy's expansion) become floats. Returns the expression."""
    import sympy
    if expr.has(sympy.zoo) or expr.has(sympy.oo) or expr.has(-sympy.oo) or expr.has(sympy.nan):
        raise Invalid(f"an energy expression with a finite value; {what} divides by zero or "
                      f"is infinite\n    {src}")
    if expr.has(sympy.I):
        raise Invalid(f"a real energy expression; {what} has a complex value (e.g. sqrt of a "
                      f"negative number)\n    {src}")
    big = {}
    for n in expr.atoms(sympy.Number):
        try:
            v = abs(float(n))
        except OverflowError:
            v = math.inf
        if not v <= MAX_CONSTANT:
            size = f"{v:.3g}" if math.isfinite(v) else "a value beyond float range"
            raise Invalid(f"an energy expression whose constants stay below {MAX_CONSTANT:g} in "
                          f"magnitude; {what} holds {size}\n    {src}")
        if n.is_Rational and (abs(n.p) > MAX_EXACT_INTEGER or n.q > MAX_EXACT_INTEGER):
            big[n] = sympy.Float(float(n))
    return expr.xreplace(big) if big else expr


def parse_energy(source, parameters, dimensions):
    """Parse an energy expression into a sympy expression, safely (once per expression:
    validation, kernel generation and the step guard share the result).

    The string is parsed by Python's ``ast`` and rebuilt node by node from a
    whitelist (numbers, the names x, y, z (up to ``dimensions``), t, the
    parameter names, pi, e, the functions in ``_FUNCTIONS``, + - * / **).
    Nothing is evaluated as Python. Arithmetic on constants is done in float64
    (so ``10**10**10`` is refused as too large instead of computed exactly);
    length, nesting depth and the magnitude of constants are bounded.

    Raises
    ------
    Invalid
        With a message pointing at the offending part of the string.
    """
    return _parse_energy(source, tuple(parameters), dimensions)


@functools.lru_cache(maxsize=256)
def _parse_energy(source, parameters, dimensions):
    import sympy

    coords = _COORDS[:dimensions]
    names = {c: sympy.Symbol(c, real=True) for c in coords}
    names["t"] = sympy.Symbol("t", real=True)
    for key in parameters:
        names[key] = sympy.Symbol(key, real=True)
    allowed = sorted(list(names) + list(_CONSTANTS) + list(_FUNCTIONS))
    src = source.strip()
    if len(src) > MAX_EXPRESSION_CHARS:
        raise Invalid(f"an energy expression of at most {MAX_EXPRESSION_CHARS} characters (this "
                      f"one has {len(src)}); a longer energy belongs in a function term")
    try:
        tree = ast.parse(src, mode="eval")
    except SyntaxError as exc:
        raise Invalid(_caret(src, max((exc.offset or 1) - 1, 0),
                             "an energy expression; it does not parse here")) from None
    except (RecursionError, MemoryError, ValueError):
        raise Invalid(f"an energy expression nested at most {MAX_EXPRESSION_DEPTH} deep") from None
    depth = _depth(tree)
    if depth > MAX_EXPRESSION_DEPTH:
        raise Invalid(f"an energy expression nested at most {MAX_EXPRESSION_DEPTH} deep (this "
                      f"one: {depth}; a chain of + - or * / counts once)")

    def unknown(node, name):
        close = difflib.get_close_matches(name, allowed, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        if name in _COORDS:
            hint = f" ({name} needs dimensions > {_COORDS.index(name)})"
        return Invalid(_caret(src, node, f"an energy expression; unknown name {name!r}{hint}; "
                                         f"allowed: {', '.join(allowed)}"))

    def number(node, value):
        """A sympy number for a float64 value; exact Integer when small and integral."""
        if isinstance(value, int) and abs(value) <= MAX_EXACT_INTEGER:
            return sympy.Integer(value)
        try:
            v = float(value)
        except OverflowError:
            v = math.inf
        if not abs(v) <= MAX_CONSTANT:
            raise Invalid(_caret(src, node, f"an energy expression whose constants stay below "
                                            f"{MAX_CONSTANT:g} in magnitude; this one is "
                                            f"{'beyond float range' if not math.isfinite(v) else f'{v:.3g}'}"))
        return sympy.Float(v)

    def constant(node, a, b, op):
        """a op b of two sympy numbers, evaluated in float64."""
        try:
            v = _float_op(op, float(a), float(b))
        except ZeroDivisionError:
            raise Invalid(_caret(src, node, "an energy expression; this divides by zero")) from None
        except (OverflowError, ValueError) as exc:
            why = "has a complex value" if "complex" in str(exc) or isinstance(exc, ValueError) \
                else "overflows"
            raise Invalid(_caret(src, node, f"a real, finite energy expression; this {why}")) from None
        exact = (a.is_Integer and b.is_Integer and op is not ast.Div
                 and not (op is ast.Pow and b < 0) and abs(v) <= MAX_EXACT_INTEGER)
        return number(node, int(v) if exact else v)

    def binary(node, a, b):
        op = type(node.op)
        if a.is_Number and b.is_Number:
            return constant(node, a, b, op)
        if op is ast.Add:
            return a + b
        if op is ast.Sub:
            return a - b
        if op is ast.Mult:
            return a * b
        if op is ast.Div:
            return a / b
        if b.is_Integer and abs(int(b)) > MAX_INT_EXPONENT:
            b = sympy.Float(float(b))
        return a ** b

    def build(node):
        if isinstance(node, ast.Expression):
            return build(node.body)
        if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) \
                and not isinstance(node.value, bool):
            return number(node, node.value)
        if isinstance(node, ast.Name):
            if node.id in names:
                return names[node.id]
            if node.id in _CONSTANTS:
                return sympy.pi if node.id == "pi" else sympy.E
            raise unknown(node, node.id)
        if isinstance(node, ast.BinOp) and isinstance(node.op, ast.BitXor):
            raise Invalid(_caret(src, node.right, "an energy expression; '^' is not a power here, "
                                                  "write ** instead"))
        if isinstance(node, ast.BinOp) and type(node.op) in _BINOPS:
            chain, cls = [], _chain_class(node)
            while (isinstance(node, ast.BinOp) and type(node.op) in _BINOPS
                   and _chain_class(node) == cls and cls is not None):   # a + b - c ...: a loop
                chain.append(node)
                node = node.left
            if not chain:
                return binary(node, build(node.left), build(node.right))
            value = build(node)
            for link in reversed(chain):
                value = binary(link, value, build(link.right))
            return value
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            sign = 1
            while isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
                sign = -sign if isinstance(node.op, ast.USub) else sign
                node = node.operand
            v = build(node)
            return -v if sign < 0 else v
        if isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.func.id not in _FUNCTIONS:
                fname = node.func.id if isinstance(node.func, ast.Name) else ast.unparse(node.func)
                raise unknown(node, fname)
            if node.keywords or len(node.args) != 1:
                raise Invalid(_caret(src, node, f"an energy expression; {node.func.id}() takes "
                                                "exactly one argument"))
            arg = build(node.args[0])
            if arg.is_Number:
                return function_of_number(node, node.func.id, arg)
            return getattr(sympy, node.func.id)(arg)
        what = type(node).__name__
        raise Invalid(_caret(src, node, f"an energy expression; {what} is not allowed "
                                        "(only numbers, names, + - * / ** and functions)"))

    def function_of_number(node, name, arg):
        fn = abs if name == "Abs" else getattr(math, name)
        try:
            return number(node, float(fn(float(arg))))
        except ValueError:
            raise Invalid(_caret(src, node, f"a real energy expression; {name}({float(arg):g}) "
                                            "has no real value")) from None
        except OverflowError:
            raise Invalid(_caret(src, node, f"a finite energy expression; {name}({float(arg):g}) "
                                            "overflows")) from None

    expr = _check_numbers(build(tree), src)
    return expr, [names[c] for c in coords], names["t"]


def _sympy_diff(expr, symbol):
    import sympy
    return sympy.diff(expr, symbol)


def _parameter_name(key):
    """A name the expression parser sees as itself (Python normalises identifiers NFKC)."""
    import keyword
    import unicodedata
    return (isinstance(key, str) and key.isidentifier() and not keyword.iskeyword(key)
            and unicodedata.normalize("NFKC", key) == key
            and key not in _COORDS + ("t",) + tuple(_CONSTANTS) + _FUNCTIONS)


@dataclass(frozen=True)
class Expression(Term):
    """A user energy U(x, y, z, t) in J, given as a string with named parameters."""

    energy: str
    parameters: dict = field(default_factory=dict)
    name = "expression"
    separable = False

    @classmethod
    def from_table(cls, t, d, kT):
        energy = t.get("energy", text, required=True) or "0"
        params = t.raw("parameters", {})
        if not isinstance(params, dict):
            t.bad("parameters", "a table of name = number")
            params = {}
        clean = {}
        for key, value in params.items():
            where = (f"{t.path}.parameters.{key}" if isinstance(key, str) and key.isidentifier()
                     else f"{t.path}.parameters[{key!r}]")
            if not _parameter_name(key):
                t.errors.add(where, key, "a parameter name that is a (non-keyword) identifier "
                                         "and not x, y, z, t, pi, e or a function name")
                continue
            try:
                clean[key] = number()(value)
            except Invalid as exc:
                t.errors.add(where, value, exc.expected)
        try:
            expr, coords, _ = parse_energy(energy, clean, d)
            for c in coords:      # the force is compiled too: its constants are checked now
                _check_numbers(-_sympy_diff(expr, c), energy.strip(), f"its derivative in {c}")
        except Invalid as exc:
            t.errors.add(t.where("energy"), energy, exc.expected, "J")
        return cls(energy=energy, parameters=clean)

    def resolved(self):
        return {"type": self.name, "energy": self.energy, "parameters": dict(self.parameters)}

    def sympy_energy(self, d, substitute=True):
        """(sympy energy, coordinate symbols, time symbol); parameters replaced
        by their values unless ``substitute`` is False."""
        import sympy
        expr, coords, t = parse_energy(self.energy, self.parameters, d)
        if not substitute:
            return expr, coords, t
        values = {sympy.Symbol(k, real=True): v for k, v in self.parameters.items()}
        return expr.subs(values), coords, t

    def energy_at(self, positions, time=0.0):
        x = np.asarray(positions, dtype=float)
        d = x.shape[-1]
        fn = _lambdified(self, d)
        out = fn(*[x[..., a] for a in range(d)], float(time))
        return np.broadcast_to(np.asarray(out, dtype=float), x.shape[:-1]).copy()


@dataclass(frozen=True)
class Function(Term):
    """A Python/numba function ``f(x, t, force) -> energy`` (Python API only).

    ``x`` is the position (dimensions,) in m, ``t`` the time in s; the
    function writes -grad U (N) into ``force`` (dimensions,) and returns U (J).
    """

    function: object
    name = "function"
    separable = False

    @classmethod
    def from_table(cls, t, d, kT):
        fn = t.raw("function")
        if not callable(fn):
            t.bad("function", "a callable f(x, t, force) -> energy")
            return cls(function=None)
        from .guards import compile_user_function
        try:        # compiled now, so that a function numba refuses fails before any file exists
            _compiled(fn, compile_user_function)
        except Invalid as exc:
            t.bad("function", exc.expected)
        return cls(function=fn)

    def energy_at(self, positions, time=0.0):
        x = np.asarray(positions, dtype=float)
        flat = x.reshape(-1, x.shape[-1])
        force = np.empty(flat.shape[1])
        out = np.array([float(self.function(np.ascontiguousarray(p), float(time), force)) for p in flat])
        return out.reshape(x.shape[:-1])

    def resolved(self):
        fn = self.function
        return {"type": self.name,
                "function": f"{getattr(fn, '__module__', '?')}.{getattr(fn, '__qualname__', repr(fn))}"}


_LAMBDIFIED = {}


def _lambdified(term, d):
    """numpy function (x, y, z, t) -> U of an expression term, cached per (energy, parameters, d).

    The expression went through :func:`parse_energy`'s whitelist, so the
    generated numpy code holds only numbers, coordinates and whitelisted functions."""
    import sympy
    key = (term.energy, tuple(sorted(term.parameters.items())), d)
    if key not in _LAMBDIFIED:
        if len(_LAMBDIFIED) > 64:
            _LAMBDIFIED.clear()
        expr, coords, t = term.sympy_energy(d)
        _LAMBDIFIED[key] = sympy.lambdify(coords + [t], expr, modules="numpy")
    return _LAMBDIFIED[key]


def total_energy(terms, positions, time=0.0):
    """Sum of the terms' energies (J) at ``positions`` (..., dimensions) m."""
    x = np.asarray(positions, dtype=float)
    out = np.zeros(x.shape[:-1])
    for term in terms:
        out = out + term.energy_at(x, time)
    return out


def axis_profile(terms, axis, dimensions, point=None, time=0.0):
    """U along ``axis`` through ``point`` (default the origin): a vectorised callable of
    the coordinate on that axis (m) -> J.

    For separable terms the other coordinates add only a constant, so this is
    the 1D potential of that axis for :func:`langsim.theory.mfpt`.
    """
    base = np.zeros(dimensions) if point is None else np.array(point, dtype=float)

    def U(s):
        s = np.asarray(s, dtype=float)
        x = np.broadcast_to(base, s.shape + (dimensions,)).copy()
        x[..., axis] = s
        return total_energy(terms, x, time)
    return U


def radial_profile(terms, center, dimensions):
    """U(r) along a ray from ``center`` when every term is isotropic about it, else ValueError.

    A vectorised callable of the distance r (m) -> J, for
    :func:`langsim.theory.mfpt_radial`.
    """
    c = np.array(center, dtype=float)
    for term in terms:
        tc = getattr(term, "center", None)
        own = None if tc is None else np.array(tc[:dimensions], dtype=float)
        if not term.isotropic(dimensions) or (own is not None and not np.allclose(own, c, rtol=0.0,
                                                                                  atol=1e-15)):
            raise ValueError(f"potential term {term.name!r} is not isotropic about {c.tolist()}")
    direction = np.zeros(dimensions)
    direction[0] = 1.0

    def U(r):
        r = np.asarray(r, dtype=float)
        return total_energy(terms, c + r[..., None] * direction)
    return U


#: Registry: config ``type`` string -> term class.
TERMS = {cls.name: cls for cls in (Harmonic, DoubleWell, Periodic, GaussianWell,
                                   ConstantForce, Wall, Gravity, Expression, Function)}


def builtin_rows(terms, d):
    """(codes, params) arrays of the built-in terms of ``terms``."""
    built = [t for t in terms if t.code is not None]
    codes = np.array([t.code for t in built], dtype=np.int64)
    params = np.array([t.encode(d) for t in built], dtype=np.float64).reshape(len(built), _k.N_SLOTS)
    return codes, params


@dataclass(frozen=True)
class UserTerms:
    """The user terms of a run, as source code for the compiled kernels.

    ``source`` defines ``extra_force(pos, t, force, P) -> energy`` (numba
    compilable), which writes -grad U of all user terms into ``force``;
    ``parameters`` is the float64 vector P (expression parameters are read
    from it at run time, so a sweep over their values compiles once);
    ``objects`` are Python objects the source refers to by name (user
    functions); ``key`` identifies the source when it may be cached on disk
    (None when it refers to objects).
    """

    source: str
    parameters: np.ndarray
    objects: dict
    key: object


def user_terms(terms, d):
    """A :class:`UserTerms` for the expression and function terms, or None."""
    import hashlib

    import sympy
    from sympy.printing.pycode import pycode

    exprs = [t for t in terms if isinstance(t, Expression)]
    funcs = [t.function for t in terms if isinstance(t, Function)]
    if not exprs and not funcs:
        return None
    lines = ["def extra_force(pos, t, force, P):"]
    lines += [f"    {c} = pos[{i}]" for i, c in enumerate(_COORDS[:d])]
    lines.append("    energy = 0.0")
    values = []
    if exprs:
        total = 0
        coords = None
        for i, term in enumerate(exprs):
            expr, coords, _ = term.sympy_energy(d, substitute=False)
            # parameters of term i are read as P[...] under names of their own, renamed all
            # at once (xreplace): a parameter called like a generated name (_p0) is not captured
            renames = {}
            for name in sorted(term.parameters):
                renames[sympy.Symbol(name, real=True)] = sympy.Symbol(f"_p{len(values)}", real=True)
                values.append(term.parameters[name])
            total = total + expr.xreplace(renames)
        lines += [f"    _p{k} = P[{k}]" for k in range(len(values))]
        for i, c in enumerate(coords):
            lines.append(f"    force[{i}] = {pycode(-sympy.diff(total, c), fully_qualified_modules=True)}")
        lines.append(f"    energy += {pycode(total, fully_qualified_modules=True)}")
    else:
        lines += [f"    force[{i}] = 0.0" for i in range(d)]
    objects = {}
    if funcs:
        lines.append(f"    scratch = np.empty({d})")
        for k, fn in enumerate(funcs):
            objects[f"_user_function{k}"] = fn if hasattr(fn, "py_func") else _njit(fn)
            lines.append(f"    energy += _user_function{k}(pos, t, scratch)")
            lines += [f"    force[{i}] += scratch[{i}]" for i in range(d)]
    lines.append("    return energy")
    source = "\n".join(lines).replace("math.Abs", "abs") + "\n"
    key = None if objects else hashlib.sha256(f"{d}\n{source}".encode()).hexdigest()[:24]
    return UserTerms(source, np.array(values, dtype=np.float64), objects, key)


def coordinate_source(formula, d):
    """Source of ``extra_coordinate(pos, P) -> float`` for a stop coordinate given as a
    formula in x, y, z (the same whitelist parser as energy expressions; no t, no parameters).

    Raises
    ------
    Invalid
        For a formula the parser refuses or one that uses t.
    """
    from sympy.printing.pycode import pycode
    expr, coords, t = parse_energy(formula, {}, d)
    if t in expr.free_symbols:
        raise Invalid(f"a coordinate formula in {', '.join(_COORDS[:d])} (no t): {formula!r}")
    lines = ["def extra_coordinate(pos, P):"]
    lines += [f"    {c} = pos[{i}]" for i, c in enumerate(_COORDS[:d])]
    lines.append(f"    return {pycode(expr, fully_qualified_modules=True)}")
    return "\n".join(lines).replace("math.Abs", "abs") + "\n"


#: Plain Python functions of function terms and their compiled dispatchers.
_COMPILED = {}


def _compiled(fn, compile_function):
    """The dispatcher compiled for ``fn`` (cached while ``fn`` lives)."""
    import weakref
    key = id(fn)
    entry = _COMPILED.get(key)
    if entry is not None and entry[0]() is fn:
        return entry[1]
    dispatcher = compile_function(fn)
    try:
        ref = weakref.ref(fn, lambda _, key=key, table=_COMPILED: table.pop(key, None))
    except TypeError:                       # not weak-referenceable: keep it alive instead
        ref = (lambda obj: (lambda: obj))(fn)
    _COMPILED[key] = (ref, dispatcher)
    return dispatcher


def _njit(fn):
    from .guards import compile_user_function
    return _compiled(fn, compile_user_function)
