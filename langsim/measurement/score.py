"""Scoring a user's localization (and tracking) pipeline against the ground truth.

Per frame, the user's localizations are matched one-to-one to the emitters
that were on and in the field of view, minimising the summed distance
(scipy.optimize.linear_sum_assignment), pairs farther apart than
``max_distance`` being no match. Then: recall = matched / true emitters,
precision = matched / localizations, Jaccard index = matched / (true +
localizations - matched), and per axis the bias (mean error, with its standard
error) and RMSE of the matched localizations against the ground truth in the
image frame (``true_positions`` + ``drift``). Errors are also binned by the
emitters' photons, beside Mortensen's maximum-likelihood precision of the
camera's in-focus spot [1]. With a ``track`` column the user's tracks give a
diffusion coefficient (covariance-based estimator) to set against the truth.

References
----------
.. [1] K. I. Mortensen et al., Nat. Methods 7, 377 (2010).
"""
import csv
import json
import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import linear_sum_assignment

from ..validation import ConfigError

#: Units accepted for a localization table, in metres (px: pixels of the camera, from its origin).
UNITS = {"m": 1.0, "um": 1e-6, "nm": 1e-9}
AXES = "xyz"


def read_table(path, units="m", pixel_size=None, origin=(0.0, 0.0)):
    """A localization table (CSV with a header: frame, x, y[, z][, track][, photons]) as arrays.

    Returns a dict with ``frame`` (int), ``xyz`` (rows, dims) m, ``track`` (int or None).
    """
    try:
        with open(path, newline="") as fh:
            rows = list(csv.reader(line for line in fh if line.strip() and not line.startswith("#")))
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such localization table") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: cannot be read as a CSV table ({exc})") from None
    if not rows:
        raise ConfigError(f"{path}: empty; expected a CSV table with a header line frame,x,y[,z][,track]")
    head = [h.strip().lower() for h in rows[0]]
    missing = [c for c in ("frame", "x", "y") if c not in head]
    if missing:
        raise ConfigError(f"{path}: header {rows[0]!r} lacks {', '.join(missing)}; expected columns "
                          "frame, x, y and optionally z, track")
    idx = {c: head.index(c) for c in head}
    cols = ["x", "y"] + (["z"] if "z" in idx else [])
    frame, xyz, track = [], [], []
    for n, r in enumerate(rows[1:], start=2):
        try:
            f = float(r[idx["frame"]])
            if f != int(f):
                raise ValueError
            frame.append(int(f))
            xyz.append([float(r[idx[c]]) for c in cols])
            if "track" in idx:
                track.append(int(float(r[idx["track"]])))
        except (ValueError, IndexError):
            raise ConfigError(f"{path}: line {n} = {r!r}: expected an integer frame and numbers "
                              f"for {', '.join(cols)}") from None
    xyz = np.array(xyz, dtype=float).reshape(-1, len(cols))
    if not np.all(np.isfinite(xyz)):
        raise ConfigError(f"{path}: non-finite coordinates; expected finite numbers")
    if units == "px":
        if pixel_size is None:
            raise ConfigError("--units px: the file has no images, so no pixel size; expected m, um or nm")
        xyz[:, :2] = np.asarray(origin)[None, :] + xyz[:, :2] * pixel_size
        if xyz.shape[1] > 2:
            xyz[:, 2] *= pixel_size
    elif units in UNITS:
        xyz *= UNITS[units]
    else:
        raise ConfigError(f"--units {units!r}: expected one of m, um, nm, px")
    return {"frame": np.array(frame, dtype=np.int64), "xyz": xyz,
            "track": np.array(track, dtype=np.int64) if track else None}


@dataclass
class Score:
    """What :func:`score` found; ``to_dict`` for JSON, ``format_table`` for people."""
    n_true: int
    n_found: int
    n_matched: int
    recall: float
    precision: float
    jaccard: float
    bias: list
    bias_err: list
    rmse: list
    max_distance: float
    by_photons: list = field(default_factory=list)
    diffusion: dict = None

    def to_dict(self):
        def clean(v):
            if isinstance(v, dict):
                return {k: clean(u) for k, u in v.items()}
            if isinstance(v, (list, tuple)):
                return [clean(u) for u in v]
            if isinstance(v, (np.floating, np.integer)):
                v = v.item()
            return None if isinstance(v, float) and not math.isfinite(v) else v
        return {k: clean(v) for k, v in self.__dict__.items() if not k.startswith("_")}

    def to_json(self):
        return json.dumps(self.to_dict(), indent=2)

    def format_table(self):
        lines = [f"{'quantity':<34} {'value':>24}",
                 f"{'true emitters (on, in view)':<34} {self.n_true:>24d}",
                 f"{'localizations':<34} {self.n_found:>24d}",
                 f"{'matched (within ' + format(self.max_distance * 1e9, '.4g') + ' nm)':<34} {self.n_matched:>24d}",
                 f"{'recall':<34} {self.recall:>24.4f}",
                 f"{'precision':<34} {self.precision:>24.4f}",
                 f"{'Jaccard index':<34} {self.jaccard:>24.4f}"]
        for a in range(len(self.rmse)):
            lines.append(f"{'bias ' + AXES[a] + ' (nm)':<34} {self.bias[a] * 1e9:>13.3f} +- {self.bias_err[a] * 1e9:.2g}")
            lines.append(f"{'RMSE ' + AXES[a] + ' (nm)':<34} {self.rmse[a] * 1e9:>24.3f}")
        for b in self.by_photons:
            lines.append(f"{'RMSE x at ' + format(b['photons'], '.4g') + ' photons (nm)':<34} "
                         f"{b['rmse'][0] * 1e9:>13.3f}  (n = {b['n']}"
                         + (f", ML bound {b['bound'] * 1e9:.3g})" if b.get("bound") else ")"))
        if self.diffusion:
            d = self.diffusion
            lines.append(f"{'D from your tracks (um^2/s)':<34} {d['measured'] * 1e12:>13.4g} +- "
                         f"{d['error'] * 1e12:.2g}")
            lines.append(f"{'D true (um^2/s)':<34} {d['true'] * 1e12:>24.4g}")
        return "\n".join(lines)


def match_frame(truth, found, max_distance):
    """Indices (i_true, i_found) of the optimal one-to-one match within ``max_distance``."""
    if truth.shape[0] == 0 or found.shape[0] == 0:
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int)
    d = np.sqrt(((truth[:, None, :] - found[None, :, :]) ** 2).sum(axis=2))
    big = max_distance * 1e6 + 1.0
    cost = np.where(d <= max_distance, d, big)
    i, j = linear_sum_assignment(cost)
    keep = d[i, j] <= max_distance
    return i[keep], j[keep]


def score(truth, visible, found, max_distance, photons=None, bound=None, bins=5):
    """Score localizations against the truth.

    Parameters
    ----------
    truth : (frames, n, dims) true positions in the image frame, m
    visible : (frames, n) bool, emitters that count as present (on and in view)
    found : dict from :func:`read_table` (``frame``, ``xyz``)
    max_distance : float, m
    photons : (frames, n) or None, for errors binned by photons
    bound : callable photons -> localization standard deviation (m), or None
    """
    frames, n, dims = truth.shape
    fx = found["xyz"]
    use = min(dims, fx.shape[1])
    bad = (found["frame"] < 0) | (found["frame"] >= frames)
    if np.any(bad):
        raise ConfigError(f"localization table: frame {int(found['frame'][bad][0])} outside the movie's "
                          f"0 .. {frames - 1}")
    order = np.argsort(found["frame"], kind="stable")
    fr = found["frame"][order]
    starts = np.searchsorted(fr, np.arange(frames + 1))
    errs, phot, matched_found = [], [], np.zeros(fx.shape[0], bool)
    n_true = int(visible.sum())
    for f in range(frames):
        rows = order[starts[f]:starts[f + 1]]
        vis = np.flatnonzero(visible[f])
        i, j = match_frame(truth[f, vis, :use], fx[rows, :use], max_distance)
        errs.append(fx[rows[j], :use] - truth[f, vis[i], :use])
        matched_found[rows[j]] = True
        if photons is not None:
            phot.append(photons[f, vis[i]])
    err = np.concatenate(errs) if errs else np.zeros((0, use))
    m = err.shape[0]
    nf = fx.shape[0]
    res = Score(n_true, nf, m, m / n_true if n_true else float("nan"), m / nf if nf else float("nan"),
                m / (n_true + nf - m) if (n_true + nf - m) else float("nan"),
                err.mean(axis=0).tolist() if m else [float("nan")] * use,
                (err.std(axis=0, ddof=1) / math.sqrt(m)).tolist() if m > 1 else [float("nan")] * use,
                np.sqrt(np.mean(err * err, axis=0)).tolist() if m else [float("nan")] * use, max_distance)
    res._errors = err
    if photons is not None and m >= 2 * bins:
        p = np.concatenate(phot)
        res._photons = p
        edges = np.unique(np.quantile(p, np.linspace(0, 1, bins + 1)))
        for lo, hi in zip(edges[:-1], edges[1:]):
            sel = (p >= lo) & (p <= hi)
            if sel.sum() < 2:
                continue
            mid = float(np.median(p[sel]))
            res.by_photons.append({"photons": mid, "n": int(sel.sum()),
                                   "rmse": np.sqrt(np.mean(err[sel] ** 2, axis=0)).tolist(),
                                   "bound": float(bound(mid)) if bound is not None and mid > 0 else None})
    return res


def plot_errors(result, path, title="localization error vs photons"):
    """Error vs photons: RMSE per photon bin with the ML bound; returns the path."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots()
    b = result.by_photons
    if b:
        n = np.array([r["photons"] for r in b])
        for a in range(len(b[0]["rmse"])):
            ax.loglog(n, [r["rmse"][a] * 1e9 for r in b], "o", label=f"RMSE {AXES[a]} (your pipeline)")
        if b[0].get("bound"):
            nn = np.geomspace(n.min() * 0.8, n.max() * 1.25, 50)
            ax.loglog(n, [r["bound"] * 1e9 for r in b], "k--",
                      label="ML precision, in-focus spot (Mortensen 2010)")
    ax.set_xlabel("photons per emitter per frame")
    ax.set_ylabel("localization error (nm)")
    ax.set_title(f"{title}: recall {result.recall:.3f}, precision {result.precision:.3f}, "
                 f"Jaccard {result.jaccard:.3f}", fontsize=9)
    ax.legend(fontsize=7)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
