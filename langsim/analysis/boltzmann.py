"""Position histogram against the Boltzmann density of a 1D potential.

Bins are chosen with equal Boltzmann probability 1/k (the outer two open to
+-inf), so every expected count is large. Correlated samples are handled by
batch means: the trajectory of each particle is cut into time blocks long
compared with its autocorrelation time, and the covariance of the bin
fractions is estimated from the block-to-block scatter. The test statistic
is the chi-square with that covariance (Hotelling's T^2 on k - 1 bins), whose
null distribution is ((B - 1) q/(B - q)) F(q, B - q), q = k - 1, B blocks
(Hotelling 1931, Ann. Math. Stat. 2, 360; batch means: common practice). The
effective sample size of bin i, N p_i (1 - p_i)/Var(n_i), is reported.
"""
import math

import numpy as np
from scipy import integrate, optimize, stats

from .stats import (Estimator, FrameSource, InsufficientDataError, integrated_autocorr_time,
                    single_axis)

__all__ = ["boltzmann_weights", "equal_probability_edges", "boltzmann_test", "BoltzmannTest"]


def _check_support(support):
    try:
        lo, hi = (float(s) for s in support)
    except (TypeError, ValueError):
        raise ValueError(f"support must be a pair (low, high) in m, got {support!r}") from None
    if not lo < hi:
        raise ValueError(f"support must satisfy low < high, got {support!r}")
    return lo, hi


def boltzmann_weights(potential, kT, support, n_grid=4001):
    """Normalised Boltzmann density on a grid: returns (x, p(x), cdf(x)).

    p(x) = exp(-U(x)/kT)/Z on ``support`` (mass outside is neglected; choose
    it where U exceeds its minimum by >~ 30 kT). Trapezoid CDF on
    ``n_grid`` points; Z by adaptive quadrature.
    """
    if not callable(potential):
        raise TypeError(f"potential must be a callable U(x) in J, got {potential!r}")
    if not (isinstance(kT, (int, float)) and kT > 0):
        raise ValueError(f"kT must be a positive number (J), got {kT!r}")
    lo, hi = _check_support(support)
    x = np.linspace(lo, hi, n_grid)
    u = np.array([float(potential(v)) for v in x]) / kT
    umin = u.min()
    w = np.exp(-(u - umin))
    scale = hi - lo
    Z = integrate.quad(lambda s: math.exp(umin - potential(lo + s * scale) / kT), 0.0, 1.0,
                       limit=400, points=list((x[np.argsort(u)[:5]] - lo) / scale))[0] * scale
    p = w / Z
    cdf = integrate.cumulative_trapezoid(p, x, initial=0.0)
    cdf /= cdf[-1]
    return x, p, cdf


def equal_probability_edges(potential, kT, support, n_bins):
    """Inner bin edges (n_bins - 1 values, m) splitting the Boltzmann density into equal parts."""
    if int(n_bins) != n_bins or n_bins < 2:
        raise ValueError(f"n_bins must be an integer >= 2, got {n_bins!r}")
    x, p, cdf = boltzmann_weights(potential, kT, support)
    targets = np.arange(1, int(n_bins)) / n_bins
    edges = []
    for q in targets:
        j = int(np.searchsorted(cdf, q))
        a, b = x[max(j - 1, 0)], x[min(j, x.size - 1)]
        f = lambda v: np.interp(v, x, cdf) - q  # noqa: E731
        edges.append(optimize.brentq(f, a, b) if f(a) * f(b) < 0 else a)
    return np.array(edges)


def _bin_probabilities(potential, kT, support, edges):
    x, p, cdf = boltzmann_weights(potential, kT, support)
    c = np.concatenate([[0.0], np.interp(edges, x, cdf), [1.0]])
    return np.diff(c)


#: Frames (from the start) used to estimate the autocorrelation time that sets the
#: default block length; the test itself streams over all frames.
TAU_FRAMES = 1 << 20
#: Most blocks (all particles) chosen by default: enough for the covariance of 10-20 bins,
#: and the block counts stay small whatever the number of frames.
MAX_BLOCKS = 4096


def boltzmann_test(x, potential, kT, support, n_bins=10, n_blocks=None, dt=None):
    """Chi-square test of a pooled 1D position sample against exp(-U/kT).

    Parameters
    ----------
    x : (frames, particles) or (frames,) array, m (or a lazily sliced array-like)
    potential : callable U(x), J; kT : J; support : (low, high), m
    n_bins : int, equal-probability bins
    n_blocks : int or None, time blocks per particle (default: blocks of at
        least 10 integrated autocorrelation times, enough for 3 n_bins blocks overall)

    Returns
    -------
    dict: statistic (chi-square with block covariance), dof, p_value, edges,
    probabilities, observed (fractions), errors, n_eff (per bin), n_blocks.
    """
    shape = getattr(x, "shape", None)
    if shape is None:
        x = np.asarray(x, dtype=float)
        shape = x.shape
    if len(shape) not in (1, 2):
        raise ValueError(f"x must have shape (frames,) or (frames, particles), got {tuple(shape)}")
    return _stream_test(FrameSource(x, name="x"), 0, potential, kT, support, n_bins, n_blocks)


def _stream_test(src, start, potential, kT, support, n_bins, n_blocks):
    """The test of :func:`boltzmann_test` over ``src`` (one axis), read slice by slice."""
    n, P = src.n_frames - start, src.n_particles
    q = int(n_bins) - 1
    edges = equal_probability_edges(potential, kT, support, n_bins)
    probs = _bin_probabilities(potential, kT, support, edges)
    if n_blocks is None:
        head = min(n, TAU_FRAMES)
        taus = []
        for j in range(min(P, 4)):
            try:
                taus.append(integrated_autocorr_time(src.column(j, start, start + head)[:, 0],
                                                     min_factor=10.0))
            except InsufficientDataError as e:
                taus.append(e.estimate)
        tau = max(taus)
        per = max(1, int(n // (10.0 * tau)))
        need = int(math.ceil(3 * n_bins / P))
        if per < need:
            raise InsufficientDataError(
                f"the positions hold {P} x {n} frames with autocorrelation time {tau:.3g} frames: "
                f"{per * P} independent blocks, fewer than 3 n_bins = {3 * n_bins}; about "
                f"{int(math.ceil(need * 10 * tau))} frames per particle would be enough",
                estimate=tau, required_length=int(math.ceil(need * 10 * tau)), length=n)
        n_blocks = min(per, max(need, MAX_BLOCKS // P))   # longer blocks beyond MAX_BLOCKS
    n_blocks = int(n_blocks)
    B = n_blocks * P
    if B <= q + 1:
        raise ValueError(f"n_blocks x particles = {B} must exceed n_bins = {n_bins}")
    L = n // n_blocks
    counts = np.zeros((n_blocks, P, n_bins))
    for a, blk in src.chunks(start, start + L * n_blocks):
        idx = np.searchsorted(edges, blk[:, :, 0], side="right")        # (frames, particles)
        block = (a - start + np.arange(idx.shape[0])) // L
        flat = (block[:, None] * P + np.arange(P)[None, :]) * n_bins + idx
        counts += np.bincount(flat.ravel(), minlength=counts.size).reshape(counts.shape)
    frac = (counts / L).reshape(B, n_bins)
    obs = frac.mean(axis=0)
    S = np.cov(frac[:, :q], rowvar=False, ddof=1) / B
    d = obs[:q] - probs[:q]
    T2 = float(d @ np.linalg.solve(S, d))
    Fstat = (B - q) / (q * (B - 1)) * T2
    pval = float(stats.f.sf(Fstat, q, B - q))
    var_all = frac.var(axis=0, ddof=1) / B
    n_eff = probs * (1 - probs) / np.maximum(var_all, 1e-300)
    return {"statistic": T2, "dof": q, "p_value": pval, "edges": edges, "probabilities": probs,
            "observed": obs, "errors": np.sqrt(var_all), "n_eff": n_eff, "n_blocks": B}


class BoltzmannTest(Estimator):
    """Goodness of fit of the position histogram to the Boltzmann density of ``potential``.

    Parameters
    ----------
    potential : callable U(x) along the tested axis, J
    kT : float, J
    support : (low, high), m, range holding essentially all the probability
    n_bins : int; n_blocks : int or None; axis, start : as for FrameSource

    Attributes (after fit)
    ----------------------
    statistic_, dof_, p_value_, edges_, probabilities_, observed_, errors_, n_eff_, n_blocks_
    """

    def __init__(self, potential, kT, support, n_bins=10, n_blocks=None, axis=None, start=0):
        self.potential = potential
        self.kT = kT
        self.support = support
        self.n_bins = n_bins
        self.n_blocks = n_blocks
        self.axis = axis
        self.start = start

    def fit(self, positions):
        src, start = single_axis(positions, self.axis, self.start)
        r = _stream_test(src, start, self.potential, self.kT, self.support, self.n_bins,
                         self.n_blocks)
        for k, v in r.items():
            setattr(self, k + "_", v)
        return self
