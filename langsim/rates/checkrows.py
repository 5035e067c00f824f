"""``langsim check`` rows for escape from an isotropic (Gaussian) well, from recorded frames.

Each particle inside the escape radius R at frame 0 is followed until its
first frame at r >= R. Given every particle's own start radius, the number
that escape by the end of the run is a sum of independent Bernoulli variables
with the exact probabilities 1 - S(T | r_i(0)) of the radial Smoluchowski
equation (:func:`langsim.theory.radial_survival`), so the check holds for any
initial state, burn-in or not. R is the ``[escape]`` target when the run's
config has a radial one, else the equilibrium-sampling basin, two waists.

Frames are instants: a path can reach R and come back between two frames, so
first passages seen at frames come late. For Brownian motion that is, to
leading order, a continuous first passage to the shifted radius
R + 0.5826 sqrt(2 D dt_frame) (Broadie, Glasserman & Kou 1997, Math. Finance
7, 325: the continuity correction of discretely monitored barriers,
beta = -zeta(1/2)/sqrt(2 pi)); the prediction uses that radius, and the rows
only pass or fail when the shift is below 5 % of R (frames dense enough),
otherwise they are information. (First-passage events recorded by the engine
at the step they happen will remove this.)
"""
import math

import numpy as np
from scipy import stats

from .. import potentials as _pot
from .. import theory

#: Continuity correction of discrete monitoring, -zeta(1/2)/sqrt(2 pi) (Broadie, Glasserman & Kou 1997).
BGK_BETA = 0.5825971579390106
#: Largest correction, relative to R, for which the rows pass or fail.
MAX_SHIFT = 0.05
#: Two-sided normal tail of 4.5 standard errors: the binomial test fails below it.
P_FAIL = 6.8e-6
SRC = ("radial Smoluchowski equation, exact eigen-solution of its detailed-balance discretisation; "
       "Broadie, Glasserman & Kou 1997, Math. Finance 7, 325 (frames)")


def _terms(config):
    """(terms, dimensions, escape or None) rebuilt from a run's resolved config."""
    from ..validation import Errors, Table
    from .spec import parse
    d = int(config["particles"]["dimensions"])
    kT = theory.thermal_energy(float(config["medium"]["temperature"]))
    errors = Errors()
    terms = []
    for i, entry in enumerate(config.get("potential") or []):    # resolved terms: input shape, SI
        terms.append(_pot.TERMS[entry["type"]].from_table(Table(errors, f"potential[{i}]", entry), d, kT))
    errors.raise_if_any()
    esc = config.get("escape")
    esc = None if esc is None else parse({k: v for k, v in esc.items() if v is not None}, d)
    return terms, d, esc


def gaussian_well_rows(traj, kT, friction, frame_dt, regime):
    """(rows, notes): dicts with the fields of :class:`langsim.checks.Row`."""
    notes = []
    if regime != "overdamped":
        return [], ["Gaussian-well escape: underdamped runs have no exact first-passage check here"]
    friction = np.asarray(friction, dtype=float)
    if np.ptp(friction) > 1e-12 * friction.max():
        return [], ["Gaussian-well escape: friction differs between axes; not checked"]
    try:
        terms, d, esc = _terms(traj.config)
    except (ValueError, TypeError, KeyError) as exc:     # ConfigError is a ValueError
        return [], [f"Gaussian-well escape: the run's potential does not load ({exc}); not checked"]
    wells = [t for t in terms if isinstance(t, _pot.GaussianWell)]
    center = wells[0].center
    try:
        U = _pot.radial_profile(terms, center, d)
    except ValueError as exc:
        return [], [f"Gaussian-well escape: {exc}; not checked"]
    if esc is not None and esc.coordinate.kind == "radius" and esc.coordinate.sign > 0 and \
            np.allclose(esc.coordinate.center, center, rtol=0, atol=1e-15):
        R = esc.target
    else:
        R = _pot.GAUSSIAN_BASIN_WAISTS * wells[0].waist[0]
    pos = np.asarray(traj.positions, dtype=float)            # (frames, particles, d)
    r = np.sqrt(np.sum((pos - np.asarray(center)) ** 2, axis=-1))
    inside = r[0] < R
    if not np.any(inside):
        return [], [f"Gaussian-well escape: no particle starts inside R = {R:.4g} m; not checked"]
    out = r[:, inside] >= R
    escaped = out.any(axis=0)
    first = np.where(escaped, np.argmax(out, axis=0), r.shape[0] - 1)
    T = (r.shape[0] - 1) * frame_dt
    D = kT / float(friction[0])
    shift = BGK_BETA * math.sqrt(2.0 * D * frame_dt)
    R_eff = R + shift
    S, integral = theory.radial_survival(U, R_eff, kT, float(friction[0]), d, T, r0=r[0, inside])
    p_escape = np.clip(1.0 - S[:, 0], 0.0, 1.0)
    n0 = int(inside.sum())
    n_esc = int(escaped.sum())
    mean = float(p_escape.sum())
    var = float(np.sum(p_escape * (1.0 - p_escape)))
    coarse = shift > MAX_SHIFT * R
    note = (f"{n0} particles inside R = {R:.4g} m at frame 0; frames every {frame_dt:.3g} s shift the "
            f"radius by {shift / R:.2%}")
    if coarse:
        note += " (frames too sparse to time first passages: information only)"
    z = (n_esc - mean) / math.sqrt(var) if var > 0 else None
    # exact tail of the Poisson-binomial count, by its normal approximation when large, else a
    # binomial of the mean probability (conservative for spread probabilities)
    if var > 25:
        pval = 2 * stats.norm.sf(abs(z))
    else:
        pval = stats.binomtest(n_esc, n0, min(max(mean / n0, 1e-300), 1.0)).pvalue
    status = "info" if coarse else ("pass" if pval >= P_FAIL else "fail")
    rows = [dict(quantity="escapes by the end (radial)", key="escapes.radial", measured=float(n_esc),
                 error=math.sqrt(var) if var > 0 else None, predicted=mean, z=z, status=status,
                 formula=f"sum over particles of 1 - S(T | r0), absorbing at R + {BGK_BETA:.4f} sqrt(2 D dt_frame); "
                         f"binomial p = {pval:.3g} (fail below {P_FAIL:g})",
                 source=SRC, unit="", note=note)]
    time_at_risk = float(np.sum(first * frame_dt))
    if n_esc >= 1 and time_at_risk > 0:
        rate = n_esc / time_at_risk
        pred = mean / float(integral[:, 0].sum())
        rows.append(dict(quantity="escape rate (radial, events per time at risk)", key="escape_rate.radial",
                         measured=rate,
                         error=rate / math.sqrt(n_esc), predicted=pred,
                         z=(rate - pred) / (rate / math.sqrt(n_esc)), status="info",
                         formula="expected escapes over expected time at risk, same survival functions "
                                 f"(1/MFPT from the basin's equilibrium: "
                                 f"{1.0 / theory.mfpt_radial_equilibrium(U, R, R, kT, float(friction[0]), d):.4g} 1/s)",
                         source=SRC, unit="1/s", note="same test as the escape count"))
    return rows, notes
