"""What a sweep says about itself: the calibration verdict and the figures.

Calibration: if the error bars of the checks are honest, z = (measured -
predicted)/error is close to a standard normal variate, so about 68.27 % of the
check rows have |z| < 1 and 95.45 % have |z| < 2 (P(|Z| < k) = erf(k/sqrt 2),
standard normal; values from scipy.stats.norm). The verdict compares the
observed fractions with those, each with its exact binomial (Clopper-Pearson)
interval [1] at 99 %: honest when both expected fractions lie inside. Only
rows that pass or fail count (information rows such as asymptotic Kramers
rates do not). Rows of one run share its data and may be correlated, which
widens the true spread of the fractions a little beyond the binomial one.

.. [1] C. J. Clopper, E. S. Pearson, "The use of confidence or fiducial limits
       illustrated in the case of the binomial", Biometrika 26, 404 (1934).
"""
import math
import os
import re
from dataclasses import dataclass

import numpy as np

from ..checks import AXES, DISPLAY_UNITS
from ..validation import ConfigError

#: Level of the binomial intervals of the verdict.
LEVEL = 0.99
#: P(|Z| < 1) and P(|Z| < 2) of a standard normal variable, erf(k / sqrt 2).
EXPECTED = {1: math.erf(1 / math.sqrt(2)), 2: math.erf(2 / math.sqrt(2))}
#: Swept key (its last part) -> (unit shown on a figure's x axis, factor from SI).
KEY_UNITS = {
    "stiffness": ("pN/nm", 1e3), "temperature": ("K", 1.0), "viscosity": ("mPa s", 1e3),
    "dt": ("us", 1e6), "radius": ("nm", 1e9), "friction": ("kg/s", 1.0), "mass": ("kg", 1.0),
    "density": ("kg/m^3", 1.0), "barrier_kT": ("kT", 1.0), "barrier": ("J", 1.0),
    "depth_kT": ("kT", 1.0), "separation": ("nm", 1e9), "center": ("nm", 1e9), "period": ("nm", 1e9),
    "waist": ("nm", 1e9), "force": ("pN", 1e12), "tilt": ("pN", 1e12), "every": ("steps", 1.0),
    "steps": ("steps", 1.0), "duration": ("s", 1.0), "burn_in": ("s", 1.0), "count": ("", 1.0),
}


def clopper_pearson(k, n, level=LEVEL):
    """Exact binomial interval of the fraction k/n at ``level`` (Clopper & Pearson 1934)."""
    from scipy.stats import beta
    a = (1.0 - level) / 2.0
    lo = 0.0 if k == 0 else float(beta.ppf(a, k, n - k + 1))
    hi = 1.0 if k == n else float(beta.ppf(1.0 - a, k + 1, n - k))
    return lo, hi


@dataclass
class Calibration:
    """Fractions of check rows within 1 and 2 error bars, with their binomial intervals.

    ``passed`` is None when no row has a z-score; ``verdict`` is the one-line summary.
    """
    n_rows: int
    within: dict
    intervals: dict
    passed: object
    verdict: str

    def fraction(self, k):
        return self.within[k] / self.n_rows if self.n_rows else math.nan


def calibration(checks):
    """The verdict on a checks table (or any table with ``z`` and ``status`` columns)."""
    judged = checks[checks["status"].isin(["pass", "fail"])]
    z = np.asarray(judged["z"], dtype=float)
    z = z[np.isfinite(z)]
    n = int(z.size)
    if n == 0:
        return Calibration(0, {1: 0, 2: 0}, {}, None,
                           "calibration: no check rows with a z-score; nothing to judge")
    within = {k: int(np.sum(np.abs(z) < k)) for k in (1, 2)}
    intervals = {k: clopper_pearson(within[k], n) for k in (1, 2)}
    honest = {k: intervals[k][0] <= EXPECTED[k] <= intervals[k][1] for k in (1, 2)}
    parts = []
    for k in (1, 2):
        lo, hi = intervals[k]
        parts.append(f"|z| < {k} in {100 * within[k] / n:.1f} % (expected {100 * EXPECTED[k]:.1f} %, "
                     f"{LEVEL:.0%} interval {100 * lo:.1f}-{100 * hi:.1f} %)")
    passed = all(honest.values())
    if passed:
        tail = "error bars honest"
    else:
        k = 1 if not honest[1] else 2
        tail = ("error bars too small (spread larger than claimed)" if within[k] / n < EXPECTED[k]
                else "error bars too large (spread smaller than claimed)")
    verdict = f"calibration of {n} check rows: {parts[0]}, {parts[1]}: {tail}"
    return Calibration(n, within, intervals, passed, verdict)


# ------------------------------------------------------------------ figures

def _scalar(value, key):
    """A number to plot for a swept value: the component of the check's axis for a per-axis
    list, else the value itself; None when it is not a number."""
    if isinstance(value, (list, tuple)):
        axis = AXES.index(key[-1]) if re.search(r"\.[xyz]$", key) else 0
        value = value[axis] if axis < len(value) else value[0]
    if isinstance(value, (bool, str)) or value is None:
        return None
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _key_unit(path):
    return KEY_UNITS.get(path.split(".")[-1], ("", 1.0))


def check_plots_folder(directory, overwrite=False, name="plots"):
    """Refuse a figures folder that is a file, lacks its parent, or holds figures (unless
    ``overwrite``); nothing is created."""
    directory = os.fspath(directory)
    if os.path.exists(directory):
        if not os.path.isdir(directory):
            raise ConfigError(f"{name} {directory!r}: is a file; expected a folder")
        old = [n for n in os.listdir(directory) if n.endswith(".png")]
        if old and not overwrite:
            raise ConfigError(f"{name} {directory!r}: already holds figures ({', '.join(old[:3])}"
                              f"{', ...' if len(old) > 3 else ''}); expected a new or empty folder, "
                              "or overwrite (--overwrite) to replace them")
    elif not os.path.isdir(os.path.dirname(os.path.abspath(directory))):
        raise ConfigError(f"{name} {directory!r}: folder {os.path.dirname(os.path.abspath(directory))!r} "
                          "does not exist; expected an existing parent folder")
    return directory


def _prepare(directory, overwrite):
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        raise ImportError("sweep figures need matplotlib: pip install langsim[plot]") from exc
    directory = check_plots_folder(directory, overwrite)
    os.makedirs(directory, exist_ok=True)
    return plt, directory


def plot_sweep(result, directory, overwrite=False):
    """One figure per check key (measured with error bars against the first swept key, one
    series per combination of the other keys, the prediction as a line) and the z-score
    histogram against the standard normal. Returns the paths written."""
    plt, directory = _prepare(directory, overwrite)
    checks = result.checks
    keys = result.plan.keys
    paths = []
    first, others = keys[0], keys[1:]
    unit_x, scale_x = _key_unit(first)
    for key in dict.fromkeys(checks["key"]):
        rows = checks[checks["key"] == key]
        x = np.array([_scalar(v, key) for v in rows[first]], dtype=object)
        if any(v is None for v in x) or not len(rows):
            continue
        x = x.astype(float) * scale_x
        unit, scale = DISPLAY_UNITS.get(rows["unit"].iloc[0], (rows["unit"].iloc[0], 1.0))
        fig, ax = plt.subplots(figsize=(6.4, 4.4))
        groups = rows.groupby([rows[k].astype(str) for k in others], sort=False) if others else [("", rows)]
        n_in = 0
        for label, g in groups:
            gx = np.array([_scalar(v, key) for v in g[first]], dtype=float) * scale_x
            m = g["measured"].to_numpy(float) * scale
            e = g["error"].to_numpy(float) * scale
            p = g["predicted"].to_numpy(float) * scale
            n_in += int(np.sum(np.abs(g["z"].to_numpy(float)) < 2))
            name = ", ".join(f"{k} = {v}" for k, v in zip(others, label if isinstance(label, tuple)
                                                                   else (label,))) if others else ""
            bars = ax.errorbar(gx, m, yerr=np.where(np.isfinite(e), e, 0.0), fmt="o", ms=4, capsize=2,
                               label=("measured" + (f" ({name})" if name else "")))
            order = np.argsort(gx)
            ax.plot(gx[order], p[order], "-", color=bars[0].get_color(), lw=1.2,
                    label="predicted" + (f" ({name})" if name else ""))
        if np.all(x > 0) and x.max() / x.min() > 20:
            ax.set_xscale("log")
        quantity = rows["quantity"].iloc[0]
        ax.set_title(f"{quantity}: measured vs predicted over {first}\n"
                     f"{n_in} of {len(rows)} within 2 error bars", fontsize=10)
        ax.set_xlabel(f"{first}" + (f" ({unit_x})" if unit_x else ""))
        ax.set_ylabel(f"{key}" + (f" ({unit})" if unit else ""))
        ax.legend(fontsize=7)
        fig.tight_layout()
        path = os.path.join(directory, re.sub(r"[^A-Za-z0-9_.-]", "_", key) + ".png")
        fig.savefig(path, dpi=110)
        plt.close(fig)
        paths.append(path)
    paths.append(_z_histogram(plt, checks, directory))
    return paths


def _z_histogram(plt, checks, directory):
    cal = calibration(checks)
    judged = checks[checks["status"].isin(["pass", "fail"])]
    z = np.asarray(judged["z"], dtype=float)
    z = z[np.isfinite(z)]
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    edges = np.linspace(-4.0, 4.0, 33)
    if z.size:
        ax.hist(np.clip(z, -3.999, 3.999), bins=edges, density=True, alpha=0.6,
                label=f"{z.size} check rows (|z| > 4 in the end bins)")
    grid = np.linspace(-4.0, 4.0, 400)
    ax.plot(grid, np.exp(-0.5 * grid ** 2) / math.sqrt(2 * math.pi), "-",
            label="standard normal (honest error bars)")
    if cal.n_rows:
        ax.plot([], [], " ", label=f"|z| < 1: {100 * cal.fraction(1):.1f} % (68.3 %), "
                                   f"|z| < 2: {100 * cal.fraction(2):.1f} % (95.4 %)")
    ax.set_title("z-scores of all checks vs the standard normal\n" + (
        "error bars honest" if cal.passed else "not judged" if cal.passed is None
        else "error bars not calibrated"), fontsize=10)
    ax.set_xlabel("z = (measured - predicted) / error")
    ax.set_ylabel("probability density")
    ax.legend(fontsize=7)
    fig.tight_layout()
    path = os.path.join(directory, "z_scores.png")
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
