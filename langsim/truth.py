"""The ground truth of a run: the numbers a user compares an analysis with.

:func:`ground_truth` turns a validated :class:`~langsim.config.RunSpec` into the
``truth`` table of the resolved config (plain SI numbers, per axis where a value
is per axis; ``None`` on an axis where a value does not apply):

``kT``                  J, Boltzmann constant times temperature
``diffusion``           m^2/s per axis, kT / friction (Einstein relation)
``stiffness``           N/m per axis, the summed trap stiffness (linear forces only)
``variance``            m^2 per axis, kT_noise / stiffness (equipartition; with cold
                        damping kT_noise = kT friction / (friction + feedback))
``corner_frequency``    Hz per axis, overdamped: stiffness / (2 pi friction) [1]
``natural_frequency``   Hz per axis, underdamped: sqrt(stiffness / mass) / (2 pi)
``quality_factor``      per axis, underdamped: mass omega_0 / damping

Values for a coordinate other than a position (an oscillator's angle or charge)
are in that coordinate's SI units. Stiffness and the values that derive from it
are given only when every force of the run is linear (harmonic traps, constant
forces); for other potentials the check table holds the predictions.

.. [1] K. Berg-Sorensen, H. Flyvbjerg, "Power spectrum analysis for optical
       tweezers", Rev. Sci. Instrum. 75, 594 (2004), Eq. (8)-(9).
"""
import math

#: Terms whose force is linear in position: stiffness (and the rest) apply.
LINEAR = ("harmonic", "constant-force", "gravity")


def _per_axis(values):
    return [None if v is None or not math.isfinite(v) else float(v) for v in values]


def ground_truth(spec):
    """The ``truth`` table of ``spec`` (a RunSpec): plain JSON numbers (see the module)."""
    d = spec.particles.dimensions
    kT = float(spec.kT)
    friction = [float(g) for g in spec.particles.friction[:d]]
    truth = {"kT": kT, "diffusion": _per_axis(kT / g if g > 0 else None for g in friction)}
    if not spec.terms or any(t.name not in LINEAR for t in spec.terms):
        return truth
    k = [0.0] * d
    for term in spec.terms:
        if term.name == "harmonic":
            k = [a + float(b) for a, b in zip(k, term.stiffness[:d])]
    if not any(v > 0 for v in k):
        return truth
    damping = [float(g) for g in spec.damping()[:d]]
    noise_kT = [float(v) for v in spec.noise_kT()[:d]]
    truth["stiffness"] = k
    truth["variance"] = _per_axis(q / s if s > 0 else None for q, s in zip(noise_kT, k))
    mass = spec.particles.mass
    if spec.dynamics.regime == "underdamped" and mass:
        omega = [math.sqrt(s / mass) if s > 0 else None for s in k]
        truth["natural_frequency"] = _per_axis(w / (2 * math.pi) if w else None for w in omega)
        truth["quality_factor"] = _per_axis(mass * w / g if w and g > 0 else None
                                            for w, g in zip(omega, damping))
    else:
        truth["corner_frequency"] = _per_axis(s / (2 * math.pi * g) if s > 0 and g > 0 else None
                                              for s, g in zip(k, damping))
    return truth


#: truth key -> (label, unit shown, factor from SI) for a run in metres.
SHOWN = (("kT", "kT", "pN nm", 1e21), ("diffusion", "D", "um^2/s", 1e12),
         ("stiffness", "stiffness", "pN/nm", 1e3), ("variance", "variance", "nm^2", 1e18),
         ("corner_frequency", "corner frequency", "Hz", 1.0),
         ("natural_frequency", "f0", "Hz", 1.0), ("quality_factor", "Q", "", 1.0))


def _show(value, factor):
    if isinstance(value, list):
        if value and all(v == value[0] for v in value):
            return _show(value[0], factor)
        return "[" + ", ".join(_show(v, factor) for v in value) + "]"
    return "-" if value is None else f"{value * factor:.4g}"


def describe(truth, coordinate_unit="m"):
    """The ``truth`` table as one line for people: practical units for a run in metres
    (pN nm, um^2/s, pN/nm, nm^2, Hz), SI otherwise; a per-axis value equal on every
    axis reads as a scalar."""
    parts = []
    for key, label, unit, factor in SHOWN:
        if key not in truth:
            continue
        if coordinate_unit != "m" and key in ("diffusion", "stiffness", "variance"):
            unit, factor = {"diffusion": f"{coordinate_unit}^2/s", "variance": f"{coordinate_unit}^2",
                            "stiffness": f"J/{coordinate_unit}^2"}[key], 1.0
        parts.append(f"{label} {_show(truth[key], factor)}" + (f" {unit}" if unit else ""))
    return ", ".join(parts)
