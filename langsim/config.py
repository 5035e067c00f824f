"""Configuration: a TOML file or a mapping of the same shape -> validated model.

The model objects are plain frozen dataclasses in SI units. ``RunSpec.resolved``
is the resolved configuration: the input's shape with every default filled in
and derived values (viscosity "water", Stokes friction, mass, steps/duration,
the seed) as plain SI numbers. Every problem found is reported together in one
:class:`~langsim.validation.ConfigError`, each naming key, value and expectation.
"""
import math
import os
import tomllib
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from . import gas as _gas
from . import guards
from . import oscillators as _osc
from . import potentials as _pot
from . import schemes as _registry
from . import stepcheck as _stepcheck
from . import seeding, surface, units
from .measurement import placement as _placement
from .measurement import spec as _measurement_spec
from .validation import (ConfigError, Errors, Invalid, Table, boolean, choice, integer, number,
                         path_like, per_axis, plain)

#: Schemes by regime (from the registry, :mod:`langsim.schemes`). The first is the regime's default.
SCHEMES = {regime: _registry.names(regime) for regime in ("overdamped", "underdamped")}
#: Stability limits: refused at or above, warned above the accuracy bound.
OVERDAMPED_LIMIT = 2.0      # kappa dt / gamma: Euler-Maruyama diverges beyond
OVERDAMPED_WARN = 0.2       # kappa dt / gamma: EM variance 11 % too high
UNDERDAMPED_LIMIT = 2.0     # omega dt: BAOAB (Verlet) stability limit
UNDERDAMPED_WARN = 0.5      # omega dt: full-step velocity variance 6 % low
VELOCITY_RELAXATION_WARN = 1.0  # dt / (m/gamma): ballistic regime unresolved
#: Default relaxation times of a burn-in.
BURN_IN_RELAXATIONS = 20.0

_POS = number(low=0.0)
_NONNEG = number(low=0.0, low_open=False)


class LangsimWarning(UserWarning):
    """A configuration that runs but is probably not what was meant."""


@dataclass(frozen=True)
class Particles:
    count: int
    dimensions: int
    radius: object
    density: object
    mass: object
    friction: tuple
    initial: object
    burn_in: float
    #: surface.FixedHeight of [medium] wall_distance, or None
    fixed_height: object = None
    feedback: tuple = None     # per axis, kg/s: cold damping (extra damping without noise)
    #: surface.WallFriction of a hydrodynamic wall term (position-dependent friction), or None
    wall_friction: object = None


@dataclass(frozen=True)
class Medium:
    temperature: float
    viscosity: object
    wall_distance: object = None    # m, bead centre to a plane wall (fixed height)
    wall_axis: object = None        # the wall normal; None: the last axis
    gas: object = None         # a langsim.gas.Gas, or None for a liquid

    @property
    def kT(self):
        return units.k_B * self.temperature


@dataclass(frozen=True)
class Dynamics:
    regime: str
    scheme: str
    dt: float
    steps: int
    allow_unstable: bool

    @property
    def duration(self):
        return self.steps * self.dt


@dataclass(frozen=True)
class Output:
    every: int
    path: object
    velocities: bool
    precision: str
    compression: object
    checkpoint_every: float


@dataclass(frozen=True)
class RunSpec:
    """A validated run: model objects plus the resolved configuration."""

    seed: int
    particles: Particles
    medium: Medium
    terms: tuple
    dynamics: Dynamics
    output: Output
    resolved: dict
    measurement: object = None     # langsim.measurement.spec.Measurement, or None
    #: units of the recorded coordinates (an oscillator's own: rad, C, ...)
    units: dict = field(default_factory=lambda: _osc.units_of(None))
    #: Spawn key of the run's SeedSequence (empty for a plain integer seed).
    spawn_key: tuple = ()
    #: Curvature of the user terms per axis (N/m), measured numerically, or None.
    user_curvature: tuple = None
    #: The ``[escape]`` question (:class:`langsim.rates.spec.EscapeSpec`), or None.
    escape: object = None

    @property
    def kT(self):
        return self.medium.kT

    def damping(self):
        """Total damping per axis, kg/s: friction plus cold-damping feedback."""
        fb = self.particles.feedback or (0.0,) * self.particles.dimensions
        return np.array(self.particles.friction) + np.array(fb)

    def noise_kT(self):
        """Thermal energy of the noise per axis, J: kT friction/(friction + feedback)."""
        return self.kT * np.array(self.particles.friction) / self.damping()

    @property
    def n_frames(self):
        return self.dynamics.steps // self.output.every + 1

    def curvature(self):
        """Sum over terms of each axis' largest curvature, N/m (user terms: measured
        numerically, see :func:`langsim.stepcheck.user_curvature`)."""
        d = self.particles.dimensions
        total = sum((t.curvature(d) for t in self.terms), np.zeros(d))
        if self.user_curvature is not None:
            total = total + np.array(self.user_curvature)
        return total


def read(source):
    """The mapping of a TOML file path, or a copy of a mapping.

    A file is refused before parsing when it is too big, not UTF-8, or nested or
    dotted beyond :mod:`langsim.guards`' bounds."""
    from collections.abc import Mapping
    if isinstance(source, (str, bytes, os.PathLike)):
        path = os.fspath(source)
        path = os.fsdecode(path) if isinstance(path, bytes) else path
        if "\x00" in path:
            raise ConfigError(f"config path = {path!r}: contains a NUL character; expected a "
                              "file name")
        try:
            with open(path, "rb") as fh:
                data = fh.read(guards.MAX_CONFIG_BYTES + 1)
        except FileNotFoundError:
            raise ConfigError(f"{path}: no such config file") from None
        except IsADirectoryError:
            raise ConfigError(f"{path}: is a directory, expected a TOML config file") from None
        except (OSError, UnicodeEncodeError) as exc:
            raise ConfigError(f"{path}: cannot be read ({getattr(exc, 'strerror', None) or exc}); "
                              "expected a readable TOML config file") from None
        text = guards.toml_text(data, path)
        try:
            return tomllib.loads(text), path
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"{path}: not valid TOML: {exc}; expected TOML text (key = value "
                              "lines under [table] headers, as in configs/)") from None
        except ValueError as exc:       # an integer beyond Python's digit limit for str -> int
            raise ConfigError(f"{path}: a value the TOML parser cannot convert ({exc}); expected "
                              "numbers of at most a few hundred digits") from None
        except (RecursionError, MemoryError):
            raise ConfigError(f"{path}: too deeply nested or too large to parse; expected a "
                              "plain config file") from None
    if isinstance(source, Mapping):
        try:
            return _copy(source), None
        except RecursionError:
            raise ConfigError("config: tables nested too deeply; expected the shape of a "
                              "config file") from None
    raise ConfigError(f"config = {_fmt_value(source)}: expected a path to a TOML file or a "
                      "mapping")


def _fmt_value(value):
    from .validation import _fmt
    return _fmt(value)


def _copy(mapping):
    """Deep copy that leaves callables and arrays (user terms, positions) shared."""
    from collections.abc import Mapping
    out = {}
    for key, value in mapping.items():
        if isinstance(value, Mapping):
            out[key] = _copy(value)
        elif isinstance(value, list):
            out[key] = [(_copy(v) if isinstance(v, Mapping) else v) for v in value]
        else:
            out[key] = value
    return out


def load(source):
    """Validate a config (TOML path or mapping) into a :class:`RunSpec`.

    Raises
    ------
    ConfigError
        Listing every problem found, each with key, value and expectation.
    """
    mapping, path = read(source)
    try:
        return _load(mapping, path)
    except RecursionError:
        raise ConfigError(f"{path or 'config'}: values nested too deeply; expected the shape "
                          "of a config file") from None


def _load(mapping, path):
    errors = Errors(path)
    mapping, oscillator = _osc.translate(mapping, errors)
    top = Table(errors, "", mapping, key_format="{key}")
    if isinstance(mapping.get("seed"), np.random.SeedSequence):
        seed_value, key = seeding.split_seed(mapping["seed"])
        mapping["seed"] = seed_value
        mapping["spawn_key"] = list(key) + list(mapping.get("spawn_key", []))
    seed = top.get("seed", integer(0, seeding.MAX_SEED))
    spawn_key = tuple(top.get("spawn_key", _spawn_key, default=[]))
    if seed is None:
        seed = seeding.fresh_seed()

    medium = _medium(Table(errors, "[medium]", top.raw("medium"), "[medium] {key}"))
    kT = units.k_B * medium.temperature
    dyn_table = Table(errors, "[dynamics]", top.raw("dynamics"), "[dynamics] {key}")
    regime = dyn_table.get("regime", choice(*SCHEMES), default="overdamped")
    particles = _particles(Table(errors, "[particles]", top.raw("particles"), "[particles] {key}"),
                           medium, regime, errors)
    terms = _terms(top.raw("potential"), particles.dimensions, kT, errors, particles)
    dynamics = _dynamics(dyn_table, regime)
    _check_linear(terms, dynamics, errors)
    particles = replace(particles, wall_friction=surface.wall_friction(terms, particles, medium,
                                                                       dynamics, errors))
    measurement = _measurement_spec.parse(top.raw("measurement"), errors, particles.dimensions,
                                          dynamics.dt, dynamics.steps)
    output = _output(Table(errors, "[output]", top.raw("output"), "[output] {key}"), regime,
                     dynamics)
    escape = None
    if top.has("escape"):
        from .rates.spec import escape_table
        escape = escape_table(Table(errors, "[escape]", top.raw("escape"), "[escape] {key}"),
                              particles.dimensions)
    top.finish()
    errors.raise_if_any()

    provisional = RunSpec(seed, particles, medium, tuple(terms), dynamics, output, {},
                          measurement=measurement, spawn_key=spawn_key)
    table = mapping.get("particles")
    guards.check_derived(provisional, errors, "[particles] friction" if isinstance(table, dict)
                         and "friction" in table else "[particles] radius")
    errors.raise_if_any()
    user_k = _stepcheck.user_curvature(terms, particles.dimensions, kT,
                                       _start_point(particles, terms))
    user_k = None if user_k is None else tuple(float(k) for k in user_k)
    provisional = replace(provisional, user_curvature=user_k)
    particles = replace(particles, burn_in=_burn_in(provisional, errors))
    errors.raise_if_any()
    resolved = {
        "seed": seed,
        "particles": {
            "count": particles.count, "dimensions": particles.dimensions,
            "radius": particles.radius, "density": particles.density, "mass": particles.mass,
            "friction": list(particles.friction),
            "initial": particles.initial if isinstance(particles.initial, str)
            else particles.initial.resolved() if hasattr(particles.initial, "resolved")
            else np.asarray(particles.initial).tolist(),
            "burn_in": particles.burn_in},
        "medium": {"temperature": medium.temperature, "viscosity": medium.viscosity},
        "potential": [t.resolved() for t in terms],
        "dynamics": {"regime": dynamics.regime, "scheme": dynamics.scheme, "dt": dynamics.dt,
                     "steps": dynamics.steps, "duration": dynamics.duration,
                     "allow_unstable": dynamics.allow_unstable},
        "output": {"every": output.every, "path": output.path, "velocities": output.velocities,
                   "precision": output.precision, "compression": output.compression,
                   "checkpoint_every": output.checkpoint_every},
    }
    if particles.fixed_height is not None:
        resolved["medium"].update(wall_distance=medium.wall_distance,
                                  wall_axis=particles.fixed_height.axis)
        resolved["particles"].update(particles.fixed_height.resolved())
    if particles.wall_friction is not None:
        resolved["particles"]["bulk_friction"] = particles.wall_friction.bulk
    if measurement is not None:
        resolved["measurement"] = measurement.resolved
    if particles.feedback is not None:
        resolved["particles"]["feedback"] = list(particles.feedback)
    if medium.gas is not None:
        resolved["medium"].update(medium.gas.resolved())
        if particles.radius is not None:
            resolved["particles"]["knudsen"] = medium.gas.knudsen(particles.radius)
    if oscillator is not None:
        resolved["oscillator"] = oscillator
    if spawn_key:
        resolved["spawn_key"] = list(spawn_key)
    if escape is not None:
        resolved["escape"] = escape.resolved()
    spec = RunSpec(seed, particles, medium, tuple(terms), dynamics, output, resolved,
                   measurement=measurement, units=_osc.units_of(oscillator), spawn_key=spawn_key,
                   user_curvature=user_k, escape=escape)
    from .truth import ground_truth
    resolved["truth"] = ground_truth(spec)      # what an analysis is compared with
    _guard_step(spec, path)
    surface.fixed_height_warnings(spec, f"{path}: " if path else "")
    _osc.quantum_warnings(spec, path)
    return spec


def _check_linear(terms, dynamics, errors):
    """The exact scheme takes linear forces only."""
    if not _registry.get(dynamics.scheme).linear_only:
        return
    for i, t in enumerate(terms):
        if not isinstance(t, (_pot.Harmonic, _pot.ConstantForce)):
            errors.add("[dynamics] scheme", dynamics.scheme,
                       f"a scheme for this potential: 'exact' takes harmonic and constant-force "
                       f"terms only, and potential[{i}] is {t.name!r} (use "
                       f"{' or '.join(repr(s) for s in SCHEMES[dynamics.regime] if s != 'exact')})")
            return


def _start_point(particles, terms):
    """Where a burn-in starts (see :func:`langsim.initial.initial_positions`)."""
    if not isinstance(particles.initial, str) and hasattr(particles.initial, "shape"):
        return np.atleast_2d(np.asarray(particles.initial, dtype=float))[0]
    for t in terms:
        center = getattr(t, "center", None)
        if center is not None:
            return np.array(t.static().center, dtype=float)
    return np.zeros(particles.dimensions)


def _spawn_key(value):
    if not isinstance(value, (list, tuple)) or not all(
            isinstance(k, (int, np.integer)) and not isinstance(k, bool) and 0 <= k < 2**63
            for k in value):
        raise Invalid("a list of integers >= 0 (the spawn key of a numpy SeedSequence)")
    return [int(k) for k in value]


def _medium(t):
    temperature = t.get("temperature", _POS, default=295.15, units="K")
    gas = _gas.read(t, temperature)
    if t.has("gas"):
        for key in ("wall_distance", "wall_axis"):
            if t.has(key):
                t.raw(key)
                t.errors.note(f"{t.where(key)} with [medium] gas: expected no wall correction (the Faxen "
                              "and Brenner corrections are for a liquid, not a rarefied gas)")
        t.finish()
        # 1.0 is a placeholder when the gas is invalid: its error is already reported
        return Medium(temperature, 1.0 if gas is None else gas.viscosity, gas=gas)
    visc = plain(t.raw("viscosity", "water"))
    if isinstance(visc, str) and visc == "water":
        lo, hi = units.WATER_T_RANGE
        if lo <= temperature <= hi:
            viscosity = units.water_viscosity(temperature)
        elif not t.has("viscosity"):
            viscosity = None     # the default does not apply (a cold oscillator); refused where needed
        else:
            t.errors.add(t.where("viscosity"), visc,
                         f"a number > 0 (Pa s): 'water' needs a temperature between {lo} and {hi} K, "
                         f"got {temperature} K")
            viscosity = None
    elif visc is None:
        viscosity = None
    else:
        try:
            viscosity = _POS(visc)
        except Invalid:
            t.errors.add(t.where("viscosity"), visc, "a number > 0 or the string 'water'", "Pa s")
            viscosity = None
    wall_distance = t.get("wall_distance", surface.WALL_DISTANCE, units="m")
    wall_axis = t.get("wall_axis", surface.WALL_AXIS)
    if wall_axis is not None and wall_distance is None and not t.has("wall_distance"):
        t.errors.note(f"[medium] wall_axis = {wall_axis!r} without wall_distance: expected "
                      "[medium] wall_distance (m) too")
    t.finish()
    return Medium(temperature, viscosity, wall_distance, wall_axis)


def _particles(t, medium, regime, errors):
    count = t.get("count", integer(1, 10**9), default=1)
    d = t.get("dimensions", integer(1, 3), default=1)
    radius = t.get("radius", _POS, units="m")
    density = t.get("density", _POS, units="kg/m^3")
    mass = t.get("mass", _POS, units="kg")
    friction = t.get("friction", per_axis(_POS, d), units="kg/s")
    if friction is None:
        if radius is None:
            if not t.has("radius"):
                    errors.note("[particles] radius is missing: expected a number > 0 (m), "
                            "or give [particles] friction (kg/s)")
            friction = [1.0] * d
        elif medium.viscosity is None:
            errors.note("[medium] viscosity is missing: Stokes friction needs it, "
                        "or give [particles] friction (kg/s)")
            friction = [1.0] * d
        elif medium.gas is not None:
            _gas.check_knudsen(medium.gas, radius, errors)
            friction = [medium.gas.sphere_friction(radius)] * d
        else:
            friction = [units.stokes_friction(medium.viscosity, radius)] * d
    fixed = None
    if medium.wall_distance is not None:
        fixed = surface.fixed_height(t, medium, radius, friction, t.has("friction"), d)
        friction = list(fixed.per_axis(d)) if fixed is not None else friction
    if mass is not None and density is not None:
        errors.note("[particles] mass and density are both given: expected one of them")
    if mass is None and density is not None:
        if radius is None:
            errors.note("[particles] density needs radius to give a mass: expected radius (m) or mass (kg)")
        else:
            try:
                mass = units.sphere_mass(radius, density)
            except OverflowError:       # radius**3 beyond float range: refused as derived mass
                mass = math.inf
    if regime == "underdamped" and mass is None and density is None:
        errors.note("[particles] mass is missing: the underdamped regime needs mass (kg) "
                    "or density (kg/m^3) with radius")
    feedback = t.get("feedback", per_axis(_NONNEG, d), units="kg/s")
    if feedback is not None and regime != "underdamped" and any(feedback):
        t.bad("feedback", "0: cold damping acts on the velocity and needs [dynamics] regime = "
                          "'underdamped'", "kg/s")
    initial = _initial(t, count, d)
    if getattr(initial, "density", None) is not None:
        count = _placement.count_from_density(initial, d)
    burn_in = t.get("burn_in", _NONNEG, units="s")
    t.finish()
    return Particles(count, d, radius, density, mass, tuple(friction), initial, burn_in, fixed,
                     None if feedback is None else tuple(feedback))


def _initial(t, count, d):
    value = t.raw("initial", "equilibrium")
    if isinstance(value, dict):       # emitters over a field of view (langsim.measurement.placement)
        return _placement.parse(value, d, t.has("count"), t.where("initial"), t.errors) or "equilibrium"
    if isinstance(value, str):
        if value != "equilibrium":
            t.bad("initial", "'equilibrium', a point of dimensions values, or an array "
                             "of count x dimensions positions (m)")
        return "equilibrium"
    try:
        arr = np.array(value, dtype=float)
    except (TypeError, ValueError, OverflowError):
        arr = None
    if arr is not None and arr.shape == (d,) and np.all(np.isfinite(arr)):
        return arr
    if arr is not None and arr.shape == (count, d) and np.all(np.isfinite(arr)):
        return arr
    shape = "?" if arr is None else arr.shape
    t.errors.add(t.where("initial"), value if arr is None or arr.size < 10 else f"array of shape {shape}",
                 f"'equilibrium', a point of {d} finite values, or an array of shape "
                 f"({count}, {d}) (m)")
    return "equilibrium"


def _terms(value, d, kT, errors, particles):
    if value is None:
        return []
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list):
        errors.add("potential", value, "an array of tables ([[potential]])")
        return []
    terms = []
    for i, entry in enumerate(value):
        t = Table(errors, f"potential[{i}]", entry)
        kind = t.get("type", choice(*_pot.TERMS), required=True)
        if kind is None:
            continue
        cls = _pot.TERMS[kind]
        term = cls.from_table(t, d, kT).bind(particles, t)
        t.finish()
        terms.append(term)
    return terms


def _dynamics(t, regime):
    schemes = SCHEMES[regime] if regime in SCHEMES else SCHEMES["overdamped"]
    scheme = t.get("scheme", choice(*schemes))
    if t.has("scheme") and scheme is None:
        other = [r for r, s in SCHEMES.items() if t.mapping["scheme"] in s]
        if other:
            t.errors.messages[-1] += f"; {t.mapping['scheme']!r} is a scheme of the {other[0]} regime"
    dt = t.get("dt", _POS, required=True, units="s") or 1.0
    steps = t.get("steps", integer(1, guards.MAX_STEPS))
    duration = t.get("duration", _POS, units="s")
    if steps is not None and duration is not None:
        t.errors.note("[dynamics] steps and duration are both given: expected one of them")
    elif steps is None and duration is None:
        if not (t.has("steps") or t.has("duration")):
            t.errors.note("[dynamics] duration is missing: expected duration (s) or steps")
        steps = 1
    elif steps is None:
        ratio = guards.bounded_steps(t.where("duration"), duration, "duration / dt", dt, t.errors)
        steps = max(1, round(ratio)) if ratio is not None else 1
        if ratio is not None and abs(steps * dt - duration) > 1e-9 * duration:
            t.errors.add(t.where("duration"), duration,
                         f"a whole number of steps of dt = {dt!r} s (nearest: {steps * dt!r})", "s")
    allow = t.get("allow_unstable", boolean, default=False)
    t.finish()
    return Dynamics(regime, scheme or schemes[0], dt, steps, allow)


def _output(t, regime, dynamics):
    every = t.get("every", integer(1, guards.MAX_STEPS), default=1)
    if dynamics.steps % every:
        t.errors.add(t.where("every"), every,
                     f"a divisor of the number of steps ({dynamics.steps})")
    path = t.get("path", path_like)
    velocities = t.get("velocities", boolean, default=(regime == "underdamped"))
    if velocities and regime != "underdamped":
        t.bad("velocities", "false: overdamped runs have no velocities")
        velocities = False
    precision = t.get("precision", choice("double", "single"), default="double")
    compression = t.get("compression", choice("none", "gzip", "lzf"), default="none")
    checkpoint_every = t.get("checkpoint_every", _POS, default=30.0, units="s of wall time")
    t.finish()
    return Output(every, path, velocities, precision,
                  None if compression == "none" else compression, checkpoint_every)


def _guard_step(spec, path):
    """Refuse unstable steps, warn about inaccurate ones (ratio and a suggested dt).

    The exact scheme has no stability limit. On axes where the forces are linear
    the fidelity warning (:mod:`langsim.stepcheck`) says exactly how far the
    recorded data are from the continuous process; elsewhere a curvature ratio
    above the accuracy bound warns.
    """
    dyn = spec.dynamics
    where = f"{path}: " if path else ""
    if _registry.get(dyn.scheme).kind == "exact":
        return
    kappa = spec.curvature()
    gamma = np.array(spec.particles.friction)
    where = f"{path}: " if path else ""
    if dyn.regime == "overdamped":
        ratio = kappa * dyn.dt / gamma
        worst = int(np.argmax(ratio))
        r = float(ratio[worst])
        limit, warn, what = OVERDAMPED_LIMIT, OVERDAMPED_WARN, "stiffness*dt/friction"
        suggest = 0.05 * gamma[worst] / kappa[worst] if kappa[worst] > 0 else None
    else:
        m = spec.particles.mass
        omega = np.sqrt(kappa / m)
        r = float(np.max(omega) * dyn.dt)
        worst = int(np.argmax(omega))
        limit, warn, what = UNDERDAMPED_LIMIT, UNDERDAMPED_WARN, "omega*dt"
        suggest = 0.1 / omega[worst] if omega[worst] > 0 else None
        tau_p = m / float(np.max(gamma))
        if dyn.dt > VELOCITY_RELAXATION_WARN * tau_p:
            warnings.warn(f"{where}[dynamics] dt = {dyn.dt!r} s is {dyn.dt / tau_p:.3g} times the "
                          f"velocity relaxation time m/friction = {tau_p:.3g} s: BAOAB stays stable, "
                          f"but the ballistic regime is not resolved (suggested dt <= "
                          f"{0.1 * tau_p:.3g} s)", LangsimWarning, stacklevel=3)
    if r >= limit and not dyn.allow_unstable:
        raise ConfigError(f"{where}[dynamics] dt = {dyn.dt!r}: unstable, {what} = {r:.3g} on axis "
                          f"{worst} (limit {limit:g}); expected dt < {dyn.dt * limit / r:.3g} s, "
                          f"suggested {suggest:.3g} s (set allow_unstable = true to run anyway)")
    fidelity = _stepcheck.fidelity_warning(spec)
    if fidelity is not None:
        warnings.warn(where + fidelity, LangsimWarning, stacklevel=3)
    if r > warn and worst not in _stepcheck.linear_axes(spec):
        warnings.warn(f"{where}[dynamics] dt = {dyn.dt!r} s gives {what} = {r:.3g} on axis {worst}: "
                      f"discretisation error is large (suggested dt = {suggest:.3g} s)",
                      LangsimWarning, stacklevel=3)


def separable(spec):
    """True when every term is a sum of one-dimensional functions of each axis."""
    return all(t.separable for t in spec.terms)


def _burn_in(spec, errors):
    """The burn-in (s, whole steps): as given, 0 where equilibrium is sampled
    exactly, else BURN_IN_RELAXATIONS relaxation times."""
    p = spec.particles
    if p.burn_in is not None:
        value, why = p.burn_in, "burn_in / dt"
    elif isinstance(p.initial, str) and spec.terms and not separable(spec):
        value = BURN_IN_RELAXATIONS * relaxation_time(spec)
        why = (f"the default burn-in, {BURN_IN_RELAXATIONS:g} relaxation times; set "
               "[particles] burn_in yourself")
    else:
        value, why = 0.0, ""
    ratio = guards.bounded_steps("[particles] burn_in", value, why, spec.dynamics.dt, errors)
    if ratio is None:
        return 0.0
    return math.ceil(ratio - 1e-9) * spec.dynamics.dt


def relaxation_time(spec):
    """Slowest relaxation time estimated from the built-in curvature, s.

    Overdamped: friction/stiffness; underdamped: the larger of that and the
    energy relaxation time 2 m/friction. User terms contribute no curvature
    estimate; with none at all the result is 1000 steps.
    """
    kappa = spec.curvature()
    gamma = np.array(spec.particles.friction)
    with np.errstate(divide="ignore"):
        tau = np.where(kappa > 0, gamma / np.where(kappa > 0, kappa, 1.0), 0.0)
    slow = float(np.max(tau))
    if spec.dynamics.regime == "underdamped":
        slow = max(slow, 2.0 * spec.particles.mass / float(np.min(gamma)))
    return slow if slow > 0 else 1000 * spec.dynamics.dt
