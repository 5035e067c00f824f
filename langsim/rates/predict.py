"""Theory for an escape problem: exact mean first-passage times where they exist, asymptotes for information.

Exact (overdamped): the coordinate is an axis and every term separates by axis
(the 1D problem of that axis, :func:`langsim.theory.mfpt_equilibrium`), or the
coordinate is the radius about a centre every term is isotropic about, with
isotropic friction (:func:`langsim.theory.mfpt_radial_equilibrium`). Both start
from the Boltzmann density of the start basin, as the rate drivers do; both are
the continuous-time values, so a run agrees with them once the time step is
fine enough (the Brownian-bridge test removes most of the discrete-monitoring bias).

For information, with their expected errors: the Gaussian well's separable
and Kramers-Langer asymptotes, Kramers' overdamped rate for a double well, and
the Mel'nikov-Meshkov turnover rate for underdamped double wells.
"""
import math

import numpy as np

from .. import potentials as _pot
from .. import theory

SRC_HTB = "Hanggi, Talkner & Borkovec 1990, Rev. Mod. Phys. 62, 251"
SRC_RADIAL = "reference notes section 12.3 (radial backward equation, derived); " + SRC_HTB
SRC_MM = "Mel'nikov & Meshkov 1986, J. Chem. Phys. 85, 1018; Mel'nikov 1991, Phys. Rep. 209, 1"


def _row(name, mfpt, exact, formula, source, expected_error=""):
    return {"name": name, "rate": 1.0 / mfpt, "mfpt": mfpt, "exact": exact, "formula": formula,
            "source": source, "expected_error": expected_error, "z": None}


def predictions(spec, escape):
    """Theory rows (dicts) for a RunSpec and its EscapeSpec; ``notes`` explain what is missing."""
    rows, notes = [], []
    c = escape.coordinate
    d = spec.particles.dimensions
    kT = spec.kT
    terms = [t for t in spec.terms]
    friction = np.array(spec.particles.friction, dtype=float)
    under = spec.dynamics.regime == "underdamped"
    if under:
        notes.append("underdamped dynamics: no exact first-passage time; asymptotes only")
    elif c.kind == "axis" and all(t.separable for t in terms):
        U = _pot.axis_profile(terms, c.axis, d)
        try:
            T = theory.mfpt_equilibrium(U, escape.start, escape.target, kT, friction[c.axis])
            rows.append(_row("exact MFPT (1D, from the basin's Boltzmann density)", T, True,
                             "Pontryagin double integral along the escape axis, averaged over the start basin",
                             SRC_HTB))
        except ValueError as exc:
            notes.append(f"no exact 1D time: {exc}")
    elif c.kind == "radius":
        try:
            U = _pot.radial_profile(terms, c.center, d)
        except ValueError as exc:
            U = None
            notes.append(f"no exact radial time: {exc}")
        if U is not None and np.ptp(friction) > 1e-12 * friction.max():
            notes.append("no exact radial time: the friction is not the same on every axis")
        elif U is not None:
            T = theory.mfpt_radial_equilibrium(U, escape.start, escape.target, kT, friction[0], d)
            rows.append(_row(f"exact MFPT (radial, {d}D, from the basin's Boltzmann density)", T, True,
                             "radial double integral with the r^(d-1) Jacobian, averaged over the start basin",
                             SRC_RADIAL))
    else:
        notes.append("no exact time for this coordinate and potential (formula coordinate, or terms "
                     "that do not separate along it)")
    rows += _asymptotes(spec, escape, under, notes)
    return rows, notes


def _asymptotes(spec, escape, under, notes):
    rows = []
    c = escape.coordinate
    d = spec.particles.dimensions
    kT = spec.kT
    friction = float(spec.particles.friction[0])
    wells = [t for t in spec.terms if isinstance(t, _pot.GaussianWell)]
    if (not under and c.kind == "radius" and d in (2, 3) and len(spec.terms) == 1 and wells
            and wells[0].isotropic(d) and escape.target > 0.5 * wells[0].waist[0]):
        w = wells[0]
        err = theory.gaussian_well_separable_error(w.depth, kT, d)
        rows.append(_row("Gaussian well, separable asymptote (information)",
                         theory.gaussian_well_separable_time(w.depth, w.waist[0], escape.target, kT, friction, d),
                         False, "well population x outer diffusive resistance", SRC_RADIAL,
                         f"exact time longer by about d(d+2)kT/(8 depth) = {err:.1%}"))
        try:
            rows.append(_row("Gaussian well, radial Kramers-Langer (information)",
                             theory.gaussian_well_langer_time(w.depth, w.waist[0], escape.target, kT, friction, d),
                             False, "parabolic entropic barrier in the radial free energy", SRC_RADIAL,
                             "off by factors 0.56-2.0 at 5-20 kT (no saddle, only an entropic barrier)"))
        except ValueError as exc:
            notes.append(f"Kramers-Langer estimate: {exc}")
    wells = [t for t in spec.terms if isinstance(t, _pot.DoubleWell)]
    if wells and c.kind == "axis" and wells[0].axis == c.axis and len(spec.terms) == 1:
        w = wells[0]
        top = w.center[w.axis]
        beyond = escape.target != top and (escape.target - top) * (escape.start - top) <= 0
        kmin, ktop = theory.double_well_curvatures(w.barrier, w.separation)
        g = float(spec.particles.friction[w.axis])
        if beyond and not under:
            k = theory.kramers_rate_overdamped(kmin, ktop, g, w.barrier, kT)
            rows.append(_row("Kramers, overdamped (information)", 1.0 / k, False,
                             "sqrt(U''min |U''top|)/(2 pi gamma) exp(-barrier/kT)", SRC_HTB,
                             f"asymptotic: about +0.5 kT/barrier = {0.5 * kT / w.barrier:.1%} too fast"))
        elif beyond:
            m = spec.particles.mass
            Ib = theory.double_well_action(w.barrier, w.separation, m)
            k = theory.kramers_rate_turnover(kmin, ktop, m, g, Ib, w.barrier, kT)
            rows.append(_row("Mel'nikov-Meshkov turnover (information)", 1.0 / k, False,
                             "A(Delta) k_SD, one well escaping into the other (absorbed beyond the top)",
                             SRC_MM, "asymptotic in kT/barrier: errors of order 10 % at 5 kT"))
    return rows


def score(rows, rate, rate_low, rate_high):
    """Fill each row's z: ln(measured/predicted) in units of the measured log-scale error."""
    if not (rate > 0 and rate_low > 0 and rate_high > rate_low):
        return rows
    sigma = (math.log(rate_high) - math.log(rate_low)) / (2 * 1.959963984540054)
    for r in rows:
        r["z"] = math.log(rate / r["rate"]) / sigma
    return rows
