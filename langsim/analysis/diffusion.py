"""Diffusion coefficient and localization error from measured tracks, and blurred traps.

Measured tracks carry motion blur (blur coefficient R of the shutter) and
localization noise (variance sigma^2 per axis); their displacements are a
moving average of order one (see :mod:`langsim.measurement.formulas`). Two
estimators return D and sigma^2 with errors:

- :class:`CovarianceDiffusion`, the covariance-based estimator of Vestergaard,
  Blainey & Flyvbjerg [1]: D = <dx^2>/(2 Dt) + <dx_n dx_{n+1}>/Dt,
  sigma^2 = R <dx^2> + (2R - 1) <dx_n dx_{n+1}>; unbiased, nearly optimal for
  reduced localization errors eps = sigma^2/(D Dt) - 2R below about 1.
- :class:`OptimalMSDFit`, the unweighted least-squares line through the first
  p points of the time-averaged MSD, MSD(n) = 2 D n Dt + 2 sigma^2 - 4 R D Dt,
  with the number of points p chosen to minimise the variance of D (Michalet
  [2]); the variance of each choice comes from the exact covariance of
  overlapping MSD points for Gaussian moving-average displacements (derived
  here, in place of the paper's approximations), re-evaluated until p is stable.

Tracks are (frames, particles, dims) arrays (NaN marks a missing localization:
a blink, a particle outside the field of view), a (frames, dims) array for one
track, or a list of (frames_i, dims) arrays. A missing frame splits a track into
segments; the displacements of segments separated by a missing frame are
uncorrelated. Axes are pooled (isotropic diffusion) unless ``pool_axes=False``.

Errors: with at least ``min_tracks`` tracks, from the scatter between tracks
(independent replicas; a ratio estimator linearised per track, the
cluster-robust variance of common practice); with fewer, from the exact
variance of the estimator for Gaussian displacements at the estimated
parameters (:func:`~langsim.measurement.formulas.cve_variance`).

For trapped particles, :class:`BlurredTrap` undoes the blur of a flat exposure:
the measured variance is (kT/k) S(W/tau) and the lag-1 covariance
(kT/k) A(W/tau) exp(-Dt/tau) (Wong & Halvorsen [3]), solved for k and tau.

References
----------
.. [1] C. L. Vestergaard, P. C. Blainey, H. Flyvbjerg, Phys. Rev. E 89, 022726 (2014).
.. [2] X. Michalet, "Mean square displacement analysis of single-particle
       trajectories with localization error: Brownian motion in an isotropic
       medium", Phys. Rev. E 82, 041914 (2010).
.. [3] W. P. Wong, K. Halvorsen, Opt. Express 14, 12517 (2006).
"""
import math

import numpy as np
from scipy import optimize

from ..measurement import formulas
from .stats import Estimator, InsufficientDataError

__all__ = ["track_segments", "CovarianceDiffusion", "OptimalMSDFit", "BlurredTrap",
           "msd_point_covariance"]

#: Tracks needed for errors from the scatter between tracks.
MIN_TRACKS = 30


def track_segments(tracks, axis=None):
    """Split tracks into runs of consecutive finite frames.

    Returns a list of ``(track_index, segment)`` with segment (frames, dims) float64,
    at least 2 frames each. ``axis`` keeps one Cartesian axis.
    """
    if isinstance(tracks, (list, tuple)):
        items = [np.asarray(t, dtype=float) for t in tracks]
        items = [t[:, None] if t.ndim == 1 else t for t in items]
    else:
        arr = np.asarray(tracks, dtype=float)
        if arr.ndim == 1:
            arr = arr[:, None, None]
        elif arr.ndim == 2:
            arr = arr[:, None, :]
        if arr.ndim != 3:
            raise ValueError(f"tracks must be (frames, particles, dims), (frames, dims) or a list of "
                             f"(frames, dims) arrays, got shape {arr.shape}")
        items = [arr[:, p, :] for p in range(arr.shape[1])]
    out = []
    for i, t in enumerate(items):
        if t.ndim != 2:
            raise ValueError(f"track {i} must be (frames, dims), got shape {t.shape}")
        if axis is not None:
            t = t[:, [int(axis)]]
        ok = np.all(np.isfinite(t), axis=1)
        if not ok.any():
            continue
        edges = np.flatnonzero(np.diff(np.concatenate([[0], ok.astype(np.int8), [0]])))
        for a, b in zip(edges[::2], edges[1::2]):
            if b - a >= 2:
                out.append((i, t[a:b]))
    return out


def _positive(name, v):
    if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a positive number, got {v!r}")
    return float(v)


def _blur(v):
    if not (isinstance(v, (int, float)) and 0.0 <= v <= 0.25):
        raise ValueError(f"blur must be the blur coefficient R in [0, 1/4] (1/6 for a full-frame "
                         f"exposure, 0 for a flash), got {v!r}")
    return float(v)


def _cluster_cov(totals, counts, estimates):
    """Cluster-robust covariance of ratio estimates sum(totals)/sum(counts) (columns)."""
    T, N = np.asarray(totals, float), np.asarray(counts, float)
    g = T.shape[0]
    infl = (T - estimates[None, :] * N) / N.sum(axis=0)[None, :]
    return infl.T @ infl * g / (g - 1)


class _TrackEstimator(Estimator):
    def _check(self):
        _positive("frame_interval", self.frame_interval)
        _blur(self.blur)
        if self.errors not in ("auto", "tracks", "model"):
            raise ValueError(f"errors must be 'auto', 'tracks' or 'model', got {self.errors!r}")

    def _use_tracks(self, n_groups):
        return self.errors == "tracks" or (self.errors == "auto" and n_groups >= self.min_tracks)

    def _finish(self, d, derr, s2, s2err, extra=None):
        self.diffusion_ = d[0] if len(d) == 1 else np.array(d)
        self.diffusion_err_ = derr[0] if len(d) == 1 else np.array(derr)
        self.localization_variance_ = s2[0] if len(d) == 1 else np.array(s2)
        self.localization_variance_err_ = s2err[0] if len(d) == 1 else np.array(s2err)
        lv = np.atleast_1d(self.localization_variance_)
        self.localization_error_ = np.where(lv > 0, np.sqrt(np.abs(lv)), 0.0)
        if self.localization_error_.size == 1:
            self.localization_error_ = float(self.localization_error_[0])
        return self


class CovarianceDiffusion(_TrackEstimator):
    """Covariance-based estimator of D and sigma^2 (Vestergaard, Blainey & Flyvbjerg [1]).

    Parameters
    ----------
    frame_interval : float, s
        Time between frames Dt.
    blur : float, default 1/6
        Blur coefficient R of the shutter (1/6: flat exposure over the whole
        frame; exposure t_E: t_E/(6 Dt); a flash: 0). Only sigma^2 depends on it.
    pool_axes : bool, default True
        Pool the axes (isotropic diffusion); else one estimate per axis.
    axis : int or None
        Use only this Cartesian axis.
    errors : {"auto", "tracks", "model"}
        Errors from the scatter between tracks ("tracks"; needs several), from
        the exact variance at the estimated parameters ("model"), or "auto":
        tracks when there are at least ``min_tracks`` track segments.
    min_tracks : int, default 30

    Attributes (after fit)
    ----------------------
    diffusion_, diffusion_err_ : m^2/s
    localization_variance_, localization_variance_err_ : m^2 (sigma^2; may come out negative
        when sigma is small: it is an unbiased estimate)
    localization_error_ : m, sqrt of max(sigma^2, 0)
    displacement_variance_, displacement_covariance_ : m^2, the pooled <dx^2> and <dx_n dx_{n+1}>
    n_displacements_, n_tracks_, error_method_
    """

    def __init__(self, frame_interval, blur=1.0 / 6.0, pool_axes=True, axis=None, errors="auto",
                 min_tracks=MIN_TRACKS):
        self.frame_interval = frame_interval
        self.blur = blur
        self.pool_axes = pool_axes
        self.axis = axis
        self.errors = errors
        self.min_tracks = min_tracks

    def fit(self, tracks):
        self._check()
        dt, R = float(self.frame_interval), float(self.blur)
        segs = track_segments(tracks, self.axis)
        if not segs:
            raise InsufficientDataError("no track has two consecutive localizations", length=0)
        dims = segs[0][1].shape[1]
        axis_sets = [list(range(dims))] if self.pool_axes else [[a] for a in range(dims)]
        # per track (particle) totals, for the scatter between tracks
        ids = sorted({i for i, _ in segs})
        where = {i: k for k, i in enumerate(ids)}
        out = {k: [] for k in ("d", "de", "s", "se", "m2", "c1", "n")}
        use_tracks = self._use_tracks(len(ids))
        for axes in axis_sets:
            tot = np.zeros((len(ids), 4))           # A, n_A, C, n_C
            lengths = []
            for i, seg in segs:
                dx = np.diff(seg[:, axes], axis=0)
                k = where[i]
                tot[k, 0] += np.sum(dx * dx)
                tot[k, 1] += dx.size
                tot[k, 2] += np.sum(dx[1:] * dx[:-1])
                tot[k, 3] += dx[1:].size
                lengths.extend([dx.shape[0]] * len(axes))
            if tot[:, 3].sum() == 0:
                raise InsufficientDataError("the tracks hold no pair of consecutive displacements "
                                            "(need 3 consecutive localizations)", length=0)
            m2 = tot[:, 0].sum() / tot[:, 1].sum()
            c1 = tot[:, 2].sum() / tot[:, 3].sum()
            D = m2 / (2 * dt) + c1 / dt
            s2 = R * m2 + (2 * R - 1) * c1
            if use_tracks:
                cov = _cluster_cov(tot[:, [0, 2]], tot[:, [1, 3]], np.array([m2, c1]))
                vd = cov[0, 0] / (4 * dt * dt) + cov[1, 1] / dt**2 + cov[0, 1] / dt**2
                vs = R * R * cov[0, 0] + (2 * R - 1) ** 2 * cov[1, 1] + 2 * R * (2 * R - 1) * cov[0, 1]
            else:
                n = np.array(lengths, dtype=float)
                va, vc, cac = formulas.ma1_total_covariance(n, m2, c1)
                na, nc = tot[:, 1].sum(), tot[:, 3].sum()
                vm, vcc, cmc = va / na**2, vc / nc**2, cac / (na * nc)
                vd = vm / (4 * dt * dt) + vcc / dt**2 + cmc / dt**2
                vs = R * R * vm + (2 * R - 1) ** 2 * vcc + 2 * R * (2 * R - 1) * cmc
            out["d"].append(D)
            out["de"].append(math.sqrt(max(vd, 0.0)))
            out["s"].append(s2)
            out["se"].append(math.sqrt(max(vs, 0.0)))
            out["m2"].append(m2)
            out["c1"].append(c1)
            out["n"].append(int(tot[:, 1].sum()))
        one = len(axis_sets) == 1
        self.displacement_variance_ = out["m2"][0] if one else np.array(out["m2"])
        self.displacement_covariance_ = out["c1"][0] if one else np.array(out["c1"])
        self.n_displacements_ = out["n"][0] if one else np.array(out["n"])
        self.n_tracks_ = len(ids)
        self.error_method_ = "tracks" if use_tracks else "model"
        return self._finish(out["d"], out["de"], out["s"], out["se"])


def msd_point_covariance(lengths, max_lag, s, c):
    """Covariance (max_lag x max_lag) of the totals S(n) = sum_j (x_{j+n} - x_j)^2, n = 1..max_lag,
    summed over segments of ``lengths`` frames, for Gaussian displacements with variance ``s``
    and lag-1 covariance ``c`` (moving average of order one; derived).

    Cov(S(n), S(m)) = sum_{p, q} 2 g(q - p)^2 (Isserlis), g(h) = s ov(h) + c [ov(h+1) + ov(h-1)],
    ov(h) = |[0, n) intersect [h, h + m)| (increments shared by the two windows).
    """
    L = int(max_lag)
    out = np.zeros((L, L))
    uniq, cnt = np.unique(np.asarray(lengths, dtype=np.int64), return_counts=True)
    for n in range(1, L + 1):
        for m in range(n, L + 1):
            h = np.arange(-m - 2, n + 3)

            def ov(hh):
                return np.maximum(0, np.minimum(n, hh + m) - np.maximum(0, hh))
            g = s * ov(h) + c * (ov(h + 1) + ov(h - 1))
            total = 0.0
            for length, k in zip(uniq, cnt):
                kn, km = length - n, length - m
                if km <= 0:
                    continue
                count = np.maximum(0, np.minimum(kn, km - h) - np.maximum(0, -h))
                total += k * np.sum(2.0 * g * g * count)
            out[n - 1, m - 1] = out[m - 1, n - 1] = total
    return out


class OptimalMSDFit(_TrackEstimator):
    """D and sigma^2 from a line through the first p MSD points, p chosen optimally [2].

    MSD(n Dt) = 2 D n Dt + 2 sigma^2 - 4 R D Dt per axis (check-values section 8);
    an unbiased least-squares line through n = 1..p gives slope 2D and intercept
    a, so sigma^2 = a/2 + 2 R D Dt. Starting from p = 2, p is set to the value
    that minimises the variance of D (``target="diffusion"``) or of sigma^2
    (``target="localization"``) at the current estimates, and the fit repeated
    until p no longer changes (the iteration of [2]).

    Parameters
    ----------
    frame_interval : float, s
    blur : float, default 1/6 (blur coefficient R)
    max_points : int, default 50
        Largest p considered.
    target : {"diffusion", "localization"}
    pool_axes, axis, errors, min_tracks : as :class:`CovarianceDiffusion`

    Attributes (after fit)
    ----------------------
    diffusion_, diffusion_err_, localization_variance_, localization_variance_err_,
    localization_error_, n_points_ (p), lags_ (frames 1..max_points), msd_ (m^2 per lag),
    n_tracks_, error_method_
    """

    def __init__(self, frame_interval, blur=1.0 / 6.0, max_points=50, target="diffusion", pool_axes=True,
                 axis=None, errors="auto", min_tracks=MIN_TRACKS):
        self.frame_interval = frame_interval
        self.blur = blur
        self.max_points = max_points
        self.target = target
        self.pool_axes = pool_axes
        self.axis = axis
        self.errors = errors
        self.min_tracks = min_tracks

    @staticmethod
    def _line(p, dt):
        x = np.arange(1, p + 1) * dt
        u = (x - x.mean()) / np.sum((x - x.mean()) ** 2)
        v = 1.0 / p - x.mean() * u
        return u, v                       # slope = u . M, intercept = v . M

    def fit(self, tracks):
        self._check()
        if self.target not in ("diffusion", "localization"):
            raise ValueError(f"target must be 'diffusion' or 'localization', got {self.target!r}")
        dt, R = float(self.frame_interval), float(self.blur)
        segs = track_segments(tracks, self.axis)
        if not segs:
            raise InsufficientDataError("no track has two consecutive localizations", length=0)
        dims = segs[0][1].shape[1]
        longest = max(s.shape[0] for _, s in segs)
        L = int(min(self.max_points, longest - 1))
        if L < 2:
            raise InsufficientDataError("tracks of at least 3 frames are needed for two MSD points",
                                        required_length=3, length=longest)
        axis_sets = [list(range(dims))] if self.pool_axes else [[a] for a in range(dims)]
        ids = sorted({i for i, _ in segs})
        where = {i: k for k, i in enumerate(ids)}
        use_tracks = self._use_tracks(len(ids))
        res = {k: [] for k in ("d", "de", "s", "se", "p", "msd")}
        for axes in axis_sets:
            S = np.zeros((len(ids), L))
            K = np.zeros((len(ids), L))
            lengths = []
            for i, seg in segs:
                x = seg[:, axes]
                k = where[i]
                for n in range(1, min(L, x.shape[0] - 1) + 1):
                    d = x[n:] - x[:-n]
                    S[k, n - 1] += np.sum(d * d)
                    K[k, n - 1] += d.size
                lengths.extend([x.shape[0]] * len(axes))
            ok = K.sum(axis=0) > 0
            Lp = int(np.argmin(ok)) if not ok.all() else L
            M = S[:, :Lp].sum(axis=0) / K[:, :Lp].sum(axis=0)
            p, seen = 2, []
            while True:
                u, v = self._line(p, dt)
                slope, icpt = u @ M[:p], v @ M[:p]
                D = slope / 2.0
                s2 = icpt / 2.0 + 2.0 * R * D * dt
                if p in seen or len(seen) > 20:
                    break
                seen.append(p)
                s_inc, c_inc = formulas.displacement_moments(max(D, 1e-300), dt, s2, R)
                C = msd_point_covariance(lengths, Lp, s_inc, c_inc)
                C /= np.outer(K[:, :Lp].sum(axis=0), K[:, :Lp].sum(axis=0))
                best, pick = math.inf, p
                for q in range(2, Lp + 1):
                    uq, vq = self._line(q, dt)
                    cq = C[:q, :q]
                    var = (uq @ cq @ uq) / 4.0 if self.target == "diffusion" else \
                        ((vq / 2 + R * dt * uq) @ cq @ (vq / 2 + R * dt * uq))
                    if var < best:
                        best, pick = var, q
                p = pick
            u, v = self._line(p, dt)
            wd = u / 2.0
            ws = v / 2.0 + R * dt * u
            if use_tracks:
                Kt = K[:, :p].sum(axis=0)
                infl = (S[:, :p] - M[None, :p] * K[:, :p]) / Kt[None, :]
                g = len(ids)
                vd = np.sum((infl @ wd) ** 2) * g / (g - 1)
                vs = np.sum((infl @ ws) ** 2) * g / (g - 1)
            else:
                s_inc, c_inc = formulas.displacement_moments(max(D, 1e-300), dt, s2, R)
                C = msd_point_covariance(lengths, p, s_inc, c_inc)
                C /= np.outer(K[:, :p].sum(axis=0), K[:, :p].sum(axis=0))
                vd, vs = wd @ C @ wd, ws @ C @ ws
            res["d"].append(D)
            res["de"].append(math.sqrt(max(vd, 0.0)))
            res["s"].append(s2)
            res["se"].append(math.sqrt(max(vs, 0.0)))
            res["p"].append(p)
            res["msd"].append(M / len(axes))
        one = len(axis_sets) == 1
        self.n_points_ = res["p"][0] if one else np.array(res["p"])
        self.lags_ = np.arange(1, len(res["msd"][0]) + 1)
        self.msd_ = res["msd"][0] if one else np.stack(res["msd"], axis=-1)
        self.n_tracks_ = len(ids)
        self.error_method_ = "tracks" if use_tracks else "model"
        return self._finish(res["d"], res["de"], res["s"], res["se"])


class BlurredTrap(Estimator):
    """Stiffness and relaxation time of a trapped bead seen through a flat exposure [3].

    The measured variance V = (kT/k) S(W/tau) and lag-1 autocorrelation
    rho = A(W/tau) exp(-Dt/tau)/S(W/tau) (check-values section 13) are solved for
    tau, then k = kT S(W/tau)/V. Errors by the delta method from the scatter
    between particles (independent replicas; at least 2 needed, 16 or more advised).

    Parameters
    ----------
    kT : float, J
    frame_interval : float, s (Dt)
    exposure : float, s (W <= Dt)
    axis : int or None
    start : int, first frame used
    center : float or None, m
        The trap centre when known; default each particle's mean (which biases the
        variance by about -2 tau/(n Dt) relative for n frames).

    Attributes (after fit)
    ----------------------
    variance_, variance_err_ (m^2), rho_, tau_, tau_err_ (s), stiffness_, stiffness_err_ (N/m),
    naive_stiffness_ (kT/V, what equipartition without the blur correction gives)
    """

    def __init__(self, kT, frame_interval, exposure, axis=None, start=0, center=None):
        self.kT = kT
        self.frame_interval = frame_interval
        self.exposure = exposure
        self.axis = axis
        self.start = start
        self.center = center

    def _solve(self, V, rho):
        dt, W = self.frame_interval, self.exposure

        def f(logtau):
            tau = math.exp(logtau)
            h = 0.5 * W / tau
            # log A(a) = 2 log(sinh(h)/h), written so that it cannot overflow
            log_a = 2.0 * (h + math.log1p(-math.exp(-2.0 * h)) - math.log(2.0 * h)) if h > 1e-6 else h * h / 3.0
            return log_a - dt / tau - math.log(formulas.wong_halvorsen_factor(2.0 * h)) - math.log(rho)
        lo, hi = math.log(dt) - 12, math.log(dt) + 16
        if not (0 < rho < 1) or f(lo) * f(hi) > 0:
            raise ValueError(f"lag-1 autocorrelation {rho:.4g} outside the range a blurred trap can give")
        tau = math.exp(optimize.brentq(f, lo, hi, xtol=1e-14))
        S = formulas.wong_halvorsen_factor(W / tau)
        return tau, self.kT * S / V

    def fit(self, positions):
        _positive("kT", self.kT)
        _positive("frame_interval", self.frame_interval)
        if not (isinstance(self.exposure, (int, float)) and 0 < self.exposure <= self.frame_interval * (1 + 1e-12)):
            raise ValueError(f"exposure must be in (0, frame_interval], got {self.exposure!r}")
        x = np.asarray(positions, dtype=float)
        if x.ndim == 3:
            if self.axis is None and x.shape[2] > 1:
                raise ValueError("axis must be given for positions with several dims")
            x = x[:, :, 0 if self.axis is None else int(self.axis)]
        elif x.ndim == 1:
            x = x[:, None]
        x = x[int(self.start):]
        if x.shape[1] < 2 or x.shape[0] < 8:
            raise InsufficientDataError("BlurredTrap needs at least 2 particles (replicas) of 8 frames",
                                        length=x.shape[0])
        y = x - (x.mean(axis=0) if self.center is None else float(self.center))
        v_p = np.mean(y * y, axis=0)
        c_p = np.mean(y[1:] * y[:-1], axis=0)
        V, C = v_p.mean(), c_p.mean()
        tau, k = self._solve(V, C / V)
        # delta method over particles: numerical gradient of (tau, k) in (V, C)
        n = x.shape[1]
        cov = np.cov(np.stack([v_p, c_p]), ddof=1) / n
        grad = np.empty((2, 2))
        for j, (dv, dc) in enumerate(((1e-6 * V, 0.0), (0.0, 1e-6 * V))):
            tp, kp = self._solve(V + dv, (C + dc) / (V + dv))
            tm, km = self._solve(V - dv, (C - dc) / (V - dv))
            h = 2 * (dv + dc)
            grad[:, j] = [(tp - tm) / h, (kp - km) / h]
        var = grad @ cov @ grad.T
        self.variance_, self.variance_err_ = V, math.sqrt(cov[0, 0])
        self.rho_ = C / V
        self.tau_, self.tau_err_ = tau, math.sqrt(max(var[0, 0], 0))
        self.stiffness_, self.stiffness_err_ = k, math.sqrt(max(var[1, 1], 0))
        self.naive_stiffness_ = self.kT / V
        return self
