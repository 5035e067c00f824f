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
    """One figure per check key: measured with error bars against the first swept key (a
    series per combination of the other keys), the prediction as a line, the fitted ratio
    measured/predicted (weighted mean, its error and chi^2 per point) in the legend, and
    the residuals z under it; plus the z-score histogram against the standard normal.
    Returns the paths written."""
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
        fig, (ax, res) = plt.subplots(2, 1, sharex=True, figsize=(6.4, 5.6),
                                      gridspec_kw={"height_ratios": (3, 1)})
        groups = rows.groupby([rows[k].astype(str) for k in others], sort=False) if others else [("", rows)]
        n_in = 0
        positive = True
        for label, g in groups:
            gx = np.array([_scalar(v, key) for v in g[first]], dtype=float) * scale_x
            m = g["measured"].to_numpy(float) * scale
            e = g["error"].to_numpy(float) * scale
            p = g["predicted"].to_numpy(float) * scale
            z = g["z"].to_numpy(float)
            positive &= bool(np.all(m > 0) and np.all(p > 0))
            n_in += int(np.sum(np.abs(z) < 2))
            name = _series_name(others, label)
            bars = ax.errorbar(gx, m, yerr=np.where(np.isfinite(e), e, 0.0), fmt="o", ms=4, capsize=2,
                               label="measured" + (f" ({name})" if name else "") + _ratio_text(m, e, p, z))
            colour = bars[0].get_color()
            order = np.argsort(gx)
            ax.plot(gx[order], p[order], "-", color=colour, lw=1.2,
                    label="theory" + (f" ({name})" if name else ""))
            res.plot(gx, z, "o", ms=4, color=colour)
        res.axhspan(-2, 2, color="0.9", zorder=0)
        res.axhline(0.0, color="0.4", lw=0.8)
        res.set_ylabel("z")
        if np.all(x > 0) and x.max() / x.min() >= 4:
            ax.set_xscale("log")
            if positive:
                ax.set_yscale("log")
        quantity = rows["quantity"].iloc[0]
        ax.set_title(f"{quantity}: measured vs theory over {first}\n"
                     f"{n_in} of {len(rows)} within 2 error bars (grey band below)", fontsize=10)
        res.set_xlabel(f"{first}" + (f" ({unit_x})" if unit_x else ""))
        ax.set_ylabel(f"{key}" + (f" ({unit})" if unit else ""))
        ax.legend(fontsize=7)
        fig.tight_layout()
        path = os.path.join(directory, re.sub(r"[^A-Za-z0-9_.-]", "_", key) + ".png")
        fig.savefig(path, dpi=110)
        plt.close(fig)
        paths.append(path)
    paths.append(_z_histogram(plt, checks, directory))
    return paths


def _series_name(others, label):
    """``temperature = 290 K, ...`` for a series of the other swept keys."""
    if not others:
        return ""
    values = label if isinstance(label, tuple) else (label,)
    parts = []
    for k, v in zip(others, values):
        unit, factor = _key_unit(k)
        try:
            shown = f"{float(v) * factor:.4g}"
        except ValueError:
            shown, unit = v, ""
        parts.append(f"{k.split('.')[-1]} = {shown}" + (f" {unit}" if unit else ""))
    return ", ".join(parts)


def fitted_ratio(measured, error, predicted):
    """Weighted mean of measured/predicted (weights 1/sigma^2, sigma = error/|predicted|)
    and its standard error; (nan, nan) without a usable row."""
    m, e, p = (np.asarray(a, dtype=float) for a in (measured, error, predicted))
    ok = np.isfinite(m) & np.isfinite(e) & np.isfinite(p) & (e > 0) & (p != 0)
    if not ok.any():
        return math.nan, math.nan
    r, w = m[ok] / p[ok], (p[ok] / e[ok]) ** 2
    return float(np.sum(w * r) / np.sum(w)), float(1.0 / math.sqrt(np.sum(w)))


def _ratio_text(m, e, p, z):
    ratio, err = fitted_ratio(m, e, p)
    z = z[np.isfinite(z)]
    if not math.isfinite(ratio):
        return ""
    return f": measured/theory {ratio:.4f} ± {err:.4f}, χ²/n {np.mean(z ** 2):.2f} (n = {z.size})"


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


# ------------------------------------------------------------------ cost

#: Columns of the cost table (seconds unless named otherwise).
COST_PARTS = ("setup", "compile", "stepping", "checks", "analyze")


def cost_table(result):
    """Per run: where its time went (s) and its speed. Columns: the swept keys,
    ``replicate``, ``status``, ``wall_time`` (the whole task), ``setup`` (config,
    sampler, file: the run less compile and stepping), ``compile`` (kernels loaded or
    compiled), ``stepping``, ``checks``, ``analyze``, ``steps``, ``ns_per_particle_step``.
    Runs finished before cost was recorded, or refused, have NaN."""
    import pandas as pd
    rows = []
    for i, run in enumerate(result._runs):
        r = result.results.get(i) or {}
        c = r.get("cost") or {}
        nan = math.nan
        row = {**{k: str(v) if isinstance(v, list) else v for k, v in run["values"].items()},
               "replicate": run["replicate"], "status": r.get("status", "not run"),
               "wall_time": r.get("wall_time", nan)}
        if c:
            row.update(setup=max(0.0, c["run"] - c["compile"] - c["stepping"]), compile=c["compile"],
                       stepping=c["stepping"], checks=c["checks"], analyze=c["analyze"], steps=c["steps"],
                       ns_per_particle_step=(1e9 * c["stepping"] / c["particle_steps"]
                                             if c["particle_steps"] else nan))
        rows.append(row)
    columns = (result.plan.keys + ["replicate", "status", "wall_time"] + list(COST_PARTS)
               + ["steps", "ns_per_particle_step"])
    return pd.DataFrame(rows, columns=columns, index=pd.Index(range(len(rows)), name="run"))


def cost_summary(result, elapsed=None, max_rows=12):
    """A text table: mean cost per run at each point (s), the whole sweep on the last line,
    and how the sweep's wall time compares with the sum of its runs' times."""
    table = cost_table(result)
    keys = result.plan.keys
    timed = table[np.isfinite(table["wall_time"].to_numpy(float))]
    head = ["point", "runs", "s/run", "set-up", "compile", "stepping", "checks", "analyze",
            "ns/p-step"]
    lines = []

    def line(label, g):
        vals = [g[c].to_numpy(float) for c in ("wall_time",) + COST_PARTS]
        ns = g["ns_per_particle_step"].to_numpy(float)
        cells = [label, str(len(g))] + [_mean(v, "{:.3g}") for v in vals] + [_mean(ns, "{:.4g}")]
        lines.append(cells)
    if keys:
        groups = list(timed.groupby([timed[k].astype(str) for k in keys], sort=False))
        for label, g in groups[:max_rows]:
            label = label if isinstance(label, tuple) else (label,)
            line(", ".join(f"{k.split('.')[-1]}={_short_number(v)}" for k, v in zip(keys, label)), g)
        if len(groups) > max_rows:
            lines.append([f"... {len(groups) - max_rows} more points"] + [""] * (len(head) - 1))
    line("all runs", timed)
    widths = [max(len(str(r[j])) for r in [head] + lines) for j in range(len(head))]
    fmt = lambda r: "  ".join(str(c).ljust(w) if j == 0 else str(c).rjust(w)  # noqa: E731
                              for j, (c, w) in enumerate(zip(r, widths)))
    out = ["cost per run (mean seconds; ns/p-step: stepping time per particle-step)", fmt(head)]
    out += [fmt(r) for r in lines]
    ran = table.loc[sorted(set(result.ran))]
    total = float(np.nansum(ran["wall_time"].to_numpy(float)))
    if elapsed and len(ran):
        out.append(f"this call: {len(ran)} runs in {elapsed:.3g} s of wall time; their own times add "
                   f"up to {total:.3g} s ({total / elapsed:.2f} runs at once on average)")
    return "\n".join(out)


def _short_number(text):
    try:
        return f"{float(text):.4g}"
    except ValueError:
        return text


def _mean(values, form):
    values = values[np.isfinite(values)]
    return form.format(float(values.mean())) if values.size else "-"
