"""Oscillators in their own quantities: the ``[oscillator]`` table.

A mechanical mode (coordinate in m), a torsional mode (angle in rad) or an
electrical circuit (charge on the capacitor in C) is the same Langevin
equation as a particle in a one-dimensional harmonic well,

    inertia * q'' = -damping * q' - stiffness * q + sqrt(2 damping kT) xi(t),

so it runs on the same engine. This module is the one place where the
oscillator's quantities are mapped onto a particle's:

============  ==================  ==================  ==================
particle      mechanical          torsional           circuit
============  ==================  ==================  ==================
mass          mass (kg)           moment_of_inertia   inductance (H)
                                  (kg m^2)
friction      friction (kg/s)     damping             resistance (ohm)
                                  (N m s/rad)
stiffness     stiffness (N/m)     torsion_constant    1/capacitance (1/F)
                                  (N m/rad)
position      displacement (m)    angle (rad)         charge (C)
velocity      velocity (m/s)      angular velocity    current (A)
                                  (rad/s)
============  ==================  ==================  ==================

(the electrical column: L q'' + R q' + q/C = V_n with <V_n V_n'> = 2 kT R delta,
reference sheet section 17; torsion: section 10). Without inertia (no mass,
moment of inertia or resonance frequency; a circuit without inductance) the
oscillator is overdamped, e.g. the RC circuit with time constant RC.

:func:`translate` rewrites a config mapping holding ``[oscillator]`` into
``[particles]`` + ``[[potential]]`` before validation, and returns the record
that the resolved config keeps under ``"oscillator"``: the oscillator in its
own terms (given and derived values), the dataset units and the particle
values it maps to.
"""
import math
import warnings

from . import theory
from .units import k_B
from .validation import Invalid, Table, choice, integer, number

#: Relative tolerance within which three given values of (inertia, stiffness,
#: resonance frequency), or two of (damping, quality factor), must agree.
CONSISTENCY_RTOL = 1e-4

_POS = number(low=0.0)
_NONNEG = number(low=0.0, low_open=False)
_FINITE = number()


class Kind:
    """The names and units of one kind of oscillator."""

    def __init__(self, name, inertia, stiffness, damping, coordinate, velocity, units):
        self.name = name
        self.inertia, self.stiffness, self.damping = inertia, stiffness, damping
        self.coordinate, self.velocity = coordinate, velocity
        self.units = units          # key -> unit


KINDS = {
    "mechanical": Kind("mechanical", "mass", "stiffness", "friction", "displacement", "velocity",
                       {"mass": "kg", "stiffness": "N/m", "friction": "kg/s", "positions": "m",
                        "velocities": "m/s"}),
    "torsional": Kind("torsional", "moment_of_inertia", "torsion_constant", "damping", "angle",
                      "angular velocity",
                      {"moment_of_inertia": "kg m^2", "torsion_constant": "N m/rad",
                       "damping": "N m s/rad", "positions": "rad", "velocities": "rad/s"}),
    "circuit": Kind("circuit", "inductance", "capacitance", "resistance", "charge", "current",
                    {"inductance": "H", "capacitance": "F", "resistance": "ohm", "positions": "C",
                     "velocities": "A"}),
}
for _k in KINDS.values():
    _k.units.update({"resonance_frequency": "Hz", "quality_factor": "", "feedback": _k.units[_k.damping]})


def _agree(a, b):
    return abs(a - b) <= CONSISTENCY_RTOL * max(abs(a), abs(b))


def _mode(t, kind):
    """(inertia, stiffness, f0) of a mechanical or torsional mode; inertia None when overdamped."""
    m = t.get(kind.inertia, _POS, units=kind.units[kind.inertia])
    k = t.get(kind.stiffness, _POS, units=kind.units[kind.stiffness])
    f0 = t.get("resonance_frequency", _POS, units="Hz")
    given = [x is not None for x in (m, k, f0)]
    names = (kind.inertia, kind.stiffness, "resonance_frequency")
    if all(given):
        if not _agree(2.0 * math.pi * f0, math.sqrt(k / m)):
            t.errors.note(
                f"[oscillator] {kind.inertia} = {m!r}, {kind.stiffness} = {k!r}, resonance_frequency = "
                f"{f0!r}: contradictory, sqrt({kind.stiffness}/{kind.inertia})/(2 pi) = "
                f"{math.sqrt(k / m) / (2 * math.pi):.6g} Hz; expected any two of them, or three that "
                f"agree to {CONSISTENCY_RTOL:g}")
        return m, k, f0
    if sum(given) == 2:
        w0 = None if f0 is None else 2.0 * math.pi * f0
        if m is None:
            m = k / w0**2
        elif k is None:
            k = m * w0**2
        return m, k, math.sqrt(k / m) / (2.0 * math.pi)
    if k is not None and sum(given) == 1:
        return None, k, None                      # no inertia: overdamped
    missing = " and ".join(n for n, g in zip(names, given) if not g)
    t.errors.note(f"[oscillator] {missing} missing: expected two of {', '.join(names)} "
                  f"({', '.join(kind.units[n] for n in names)}), or {kind.stiffness} alone "
                  "for an overdamped mode")
    return None, None, None


def _damping(t, kind, m, k):
    """The damping coefficient from ``damping`` (or ``friction``) or ``quality_factor``."""
    g = t.get(kind.damping, _POS, units=kind.units[kind.damping])
    q = t.get("quality_factor", _POS)
    if q is not None and m is None:
        t.errors.note(f"[oscillator] quality_factor = {q!r}: a quality factor needs inertia; expected "
                      f"{kind.damping} ({kind.units[kind.damping]}) for an overdamped mode, or "
                      f"{kind.inertia} or resonance_frequency")
        return g or 1.0, None
    if g is None and q is None:
        t.errors.note(f"[oscillator] {kind.damping} is missing: expected {kind.damping} "
                      f"({kind.units[kind.damping]}) or quality_factor")
        return 1.0, None
    if m is None or k is None:
        return g, None
    q_of = math.sqrt(m * k)
    if g is not None and q is not None and not _agree(q, q_of / g):
        t.errors.note(f"[oscillator] {kind.damping} = {g!r}, quality_factor = {q!r}: contradictory, "
                      f"sqrt({kind.inertia} {kind.stiffness})/{kind.damping} = {q_of / g:.6g}; expected "
                      f"one of them, or two that agree to {CONSISTENCY_RTOL:g}")
    if g is None:
        g = q_of / q
    return g, q_of / g


def _circuit(t, kind):
    """(inductance or None, capacitance, resistance) of a circuit."""
    R = t.get("resistance", _POS, required=True, units="ohm")
    C = t.get("capacitance", _POS, required=True, units="F")
    L = t.get("inductance", _POS, units="H")
    return L, C, R


def _initial(t, count, kind):
    """``initial``: "equilibrium", one value for all copies, or ``count`` values (own units)."""
    value = t.raw("initial", "equilibrium")
    if value == "equilibrium":
        return value
    unit = kind.units["positions"]
    try:
        if isinstance(value, (list, tuple)):
            if len(value) != count:
                raise Invalid("")
            return [[_FINITE(v)] for v in value]
        return [_FINITE(value)]
    except Invalid:
        t.errors.add(t.where("initial"), value, f"'equilibrium', a number, or an array of count = {count} "
                     f"numbers ({kind.coordinate})", unit)
        return "equilibrium"


def translate(mapping, errors):
    """Rewrite ``[oscillator]`` into ``[particles]``, ``[[potential]]`` and ``[dynamics] regime``.

    Parameters
    ----------
    mapping : dict, the config as read (not modified)
    errors : langsim.validation.Errors, collects the problems found

    Returns
    -------
    (mapping, record): the mapping the rest of the config layer validates, and
    the oscillator's record for the resolved config (None without ``[oscillator]``).
    """
    if "oscillator" not in mapping:
        return mapping, None
    out = {k: v for k, v in mapping.items() if k != "oscillator"}
    for other, what in (("particles", "[particles]"), ("potential", "[[potential]]")):
        if other in mapping:
            errors.note(f"{what} given with [oscillator]: expected one of them (the oscillator "
                        "sets its own inertia, damping and restoring term)")
    t = Table(errors, "[oscillator]", mapping["oscillator"], "[oscillator] {key}")
    kind_name = t.get("kind", choice(*KINDS), required=True)
    kind = KINDS.get(kind_name, KINDS["mechanical"])
    count = t.get("count", integer(1, 10**9), default=1)
    if kind.name == "circuit":
        m, capacitance, g = _circuit(t, kind)
        k = None if capacitance is None else 1.0 / capacitance
        f0 = q = None
        if None not in (m, k, g):
            f0 = math.sqrt(k / m) / (2.0 * math.pi)
            q = math.sqrt(m * k) / g
    else:
        m, k, f0 = _mode(t, kind)
        g, q = _damping(t, kind, m, k) if k is not None else (None, None)
    feedback = t.get("feedback", _NONNEG, default=0.0, units=kind.units[kind.damping])
    if feedback and m is None and k is not None:
        t.errors.note(f"[oscillator] feedback = {feedback!r}: cold damping acts on the velocity and "
                      f"needs inertia; expected {kind.inertia} (or resonance_frequency), or feedback = 0")
    initial = _initial(t, count, kind)
    t.finish()
    if kind_name is None or k is None or g is None:
        return out, None
    regime = "overdamped" if m is None else "underdamped"
    particles = {"count": count, "dimensions": 1, "friction": g, "initial": initial}
    if m is not None:
        particles["mass"] = m
    if feedback:
        particles["feedback"] = feedback
    out["particles"] = particles
    out["potential"] = [{"type": "harmonic", "stiffness": k}]
    dyn = mapping.get("dynamics")
    if isinstance(dyn, dict):
        if "regime" in dyn and dyn["regime"] != regime:
            errors.add("[dynamics] regime", dyn["regime"],
                       f"{regime!r} for this oscillator (" + ("it has inertia" if m is not None else
                       "it has no inertia: no " + kind.inertia + " or resonance_frequency") + ")")
        out["dynamics"] = {**dyn, "regime": regime}
    elif dyn is None:
        out["dynamics"] = {"regime": regime}
    record = {"kind": kind.name, "count": count,
              "units": {"positions": kind.units["positions"], "velocities": kind.units["velocities"]}}
    if kind.name == "circuit":
        record.update({"resistance": g, "capacitance": capacitance, "inductance": m,
                       "time_constant": g * capacitance if m is None else None})
    else:
        record.update({kind.inertia: m, kind.stiffness: k, kind.damping: g})
    record.update({"resonance_frequency": f0, "quality_factor": q, "feedback": feedback,
                   "as_particle": {"mass": m, "stiffness": k, "friction": g, "feedback": feedback}})
    return out, record


def units_of(record):
    """Dataset units of a run: the oscillator's, or metres for particles."""
    if record is None:
        return {"positions": "m", "velocities": "m/s"}
    return dict(record["units"])


# ---------------------------------------------------------------- describe

def _q(value, unit):
    return "none" if value is None else f"{value:.6g} {unit}".rstrip()


def describe(cfg):
    """Lines for ``langsim info`` in the oscillator's own terms (resolved config), or None."""
    osc = cfg.get("oscillator")
    if not osc:
        return None
    kind = KINDS[osc["kind"]]
    u = kind.units
    if kind.name == "circuit":
        parts = [f"resistance {_q(osc['resistance'], 'ohm')}", f"capacitance {_q(osc['capacitance'], 'F')}",
                 f"inductance {_q(osc['inductance'], 'H')}"]
    else:
        parts = [f"{kind.inertia.replace('_', ' ')} {_q(osc[kind.inertia], u[kind.inertia])}",
                 f"{kind.stiffness.replace('_', ' ')} {_q(osc[kind.stiffness], u[kind.stiffness])}",
                 f"{kind.damping} {_q(osc[kind.damping], u[kind.damping])}"]
    lines = [f"oscillator   {kind.name}, {osc['count']} independent cop{'y' if osc['count'] == 1 else 'ies'}: "
             + ", ".join(parts)]
    if osc["resonance_frequency"] is not None:
        lines.append(f"             resonance frequency {osc['resonance_frequency']:.6g} Hz, quality factor "
                     f"{osc['quality_factor']:.6g}")
    else:
        tau = osc.get("time_constant") or osc["as_particle"]["friction"] / osc["as_particle"]["stiffness"]
        lines.append(f"             overdamped: relaxation time {tau:.6g} s, corner frequency "
                     f"{1.0 / (2.0 * math.pi * tau):.6g} Hz")
    if osc.get("feedback"):
        T = theory.cold_damping_temperature(cfg["medium"]["temperature"], osc["as_particle"]["friction"],
                                            osc["feedback"])
        lines.append(f"             cold damping: feedback {_q(osc['feedback'], u['feedback'])}, effective "
                     f"temperature {T:.6g} K")
    lines.append(f"             {kind.coordinate} in {u['positions']}, {kind.velocity} in {u['velocities']}")
    return lines


# ---------------------------------------------------------------- quantum limit

#: x = hbar omega/kT from which a mode is flagged as not classical: where the thermal
#: part of the Planck energy, hbar omega/(e^x - 1), falls 1 % below kT (x* = 0.0201,
#: reference sheet section 16). The full Planck energy with its zero point,
#: hbar omega (1/2 + 1/(e^x - 1)), is then still within 4e-5 of kT; it is 1 % above
#: kT only from x = 0.347. Both numbers are printed.
QUANTUM_WARN = 0.02


def modes(spec):
    """(axis, omega rad/s, what, kT J) of each axis with a restoring force, in the run's own terms.

    Underdamped: omega0 = sqrt(curvature/mass); overdamped: the relaxation
    rate curvature/friction (the bandwidth of its noise). kT is the noise's
    (the effective temperature under cold damping).
    """
    kappa = spec.curvature()
    kT = spec.noise_kT()
    out = []
    for a in range(spec.particles.dimensions):
        if kappa[a] <= 0:
            continue
        if spec.dynamics.regime == "underdamped":
            out.append((a, math.sqrt(kappa[a] / spec.particles.mass), "resonance", kT[a]))
        else:
            out.append((a, kappa[a] / spec.particles.friction[a], "relaxation rate", kT[a]))
    return out


def quantum_message(omega, kT, what="resonance"):
    """The warning text for a mode, or None when hbar omega/kT < QUANTUM_WARN."""
    x = theory.quantum_ratio(omega, kT)
    if not x >= QUANTUM_WARN:
        return None
    full, thermal = (float(v) for v in theory.planck_energy_ratio(x))
    return (f"hbar omega/kT = {x:.3g} (not small; flagged from {QUANTUM_WARN:g}) for the {what} "
            f"omega = {omega:.6g} rad/s ({omega / (2 * math.pi):.6g} Hz) at kT/k_B = "
            f"{kT / k_B:.6g} K: the Planck mean energy hbar omega (1/2 + 1/(e^x - 1)) is "
            f"{full:.6g} kT ({full - 1:+.3g} relative, zero point included); its thermal part "
            f"hbar omega/(e^x - 1) alone is {thermal:.6g} kT. The simulation is classical (kT "
            "per mode); 'langsim check' shows the quantum values beside the classical ones")


def quantum_warnings(spec, path=None):
    """Warn (LangsimWarning) for each mode whose hbar omega/kT is not small; refuse nothing."""
    from .config import LangsimWarning
    where = f"{path}: " if path else ""
    for a, omega, what, kT in modes(spec):
        text = quantum_message(omega, kT, what)
        if text is not None:
            axis = "" if spec.particles.dimensions == 1 else f" (axis {a})"
            warnings.warn(f"{where}quantum limit{axis}: {text}", LangsimWarning, stacklevel=3)
