"""Mean-squared displacement, velocity autocorrelation, relaxation stiffness.

The MSD over all lags uses the FFT identity
MSD(m) = [sum_{j<N-m} (x_{j+m}^2 + x_j^2)]/(N-m) - 2 A(m), A(m) the
unnormalised autocorrelation sum_j x_j x_{j+m}/(N-m), computed by
zero-padded FFT in O(N log N) (common practice; it follows from expanding
the square). Errors at chosen lags come from blocking the series of squared
displacements (model-free; see :mod:`langsim.analysis.stats`).
"""
import math

import numpy as np
from scipy import fft as sp_fft

from .stats import (Estimator, FrameSource, InsufficientDataError, block_means, blocking,
                    single_axis)

__all__ = ["msd_fft", "msd_direct", "msd_at_lags", "mean_msd", "velocity_autocorrelation",
           "lag_autocorrelation", "MSD", "RelaxationStiffness"]


def _series(x, name="x"):
    x = np.asarray(x, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[0] < 2:
        raise ValueError(f"{name} must have shape (frames,) or (frames, dims) with >= 2 frames, "
                         f"got {np.shape(x)}")
    return x


def _max_lag(n, max_lag):
    if max_lag is None:
        return n - 1
    if int(max_lag) != max_lag or not 1 <= max_lag <= n - 1:
        raise ValueError(f"max_lag must be an integer in [1, {n - 1}], got {max_lag!r}")
    return int(max_lag)


def msd_fft(x, max_lag=None):
    """MSD of one trajectory per dimension for lags 0..max_lag (frames), O(N log N).

    x : (frames,) or (frames, dims). Returns (max_lag + 1,) or (max_lag + 1, dims).
    """
    squeeze = np.ndim(x) == 1
    x = _series(x)
    n = x.shape[0]
    L = _max_lag(n, max_lag)
    x = x - x.mean(axis=0)
    size = sp_fft.next_fast_len(n + L + 1, real=True)  # padding n + L avoids circular wrap for lags <= L
    f = sp_fft.rfft(x, size, axis=0)
    acf = sp_fft.irfft(f * np.conj(f), size, axis=0)[:L + 1]
    sq = x * x
    cs = np.concatenate([np.zeros((1, x.shape[1])), np.cumsum(sq, axis=0)])
    m = np.arange(L + 1)
    # sum_{j<N-m} x_{j+m}^2 + x_j^2 = (S_N - S_m) + S_{N-m}
    s = (cs[n] - cs[m]) + cs[n - m]
    out = (s - 2.0 * acf) / (n - m)[:, None]
    out[0] = 0.0
    return out[:, 0] if squeeze else out


def msd_direct(x, max_lag=None):
    """Reference MSD by explicit averaging over all pairs, O(N * max_lag)."""
    squeeze = np.ndim(x) == 1
    x = _series(x)
    L = _max_lag(x.shape[0], max_lag)
    out = np.zeros((L + 1, x.shape[1]))
    for m in range(1, L + 1):
        d = x[m:] - x[:-m]
        out[m] = np.mean(d * d, axis=0)
    return out[:, 0] if squeeze else out


def mean_msd(positions, max_lag=None, start=0, stop=None, particles=None):
    """Particle-averaged MSD per axis by FFT, lags 0..max_lag frames.

    Each particle's trajectory is read column by column (frames x dims in
    memory at a time); ``stop`` (frame) and ``particles`` (the first so many)
    bound what is read. Returns (lags+1,) or (lags+1, dims).
    """
    src = FrameSource(positions)
    start = src.check_start(start)
    stop = src.n_frames if stop is None else min(int(stop), src.n_frames)
    n = stop - start
    L = _max_lag(n, max_lag)
    acc = np.zeros((L + 1, src.n_dims))
    used = src.n_particles if particles is None else max(1, min(int(particles), src.n_particles))
    for p in range(used):
        acc += msd_fft(src.column(p, start, stop), L)
    return src.out(acc / used)


def msd_at_lags(positions, lags, start=0, min_blocks=16, min_replicas=16):
    """Particle-averaged MSD per axis at given lags with standard errors.

    For each lag m every particle's time-averaged squared displacement q_p
    (over its frames) is formed; the MSD is their mean. With at least
    ``min_replicas`` particles, the particles are independent replicas and the
    error is std(q_p)/sqrt(n_particles) (this works for typical tracking data,
    e.g. 200 tracks of 1000 frames, where blocking within a track is too short).
    With fewer particles the particle-averaged series s_j = mean_p (x_{j+m} -
    x_j)^2 is blocked instead (:func:`~langsim.analysis.stats.blocking`).
    Returns ``(msd, err)`` of shape (len(lags), dims) (or (len(lags),)).

    Raises
    ------
    InsufficientDataError
        When blocking is needed and the series is too short; the message and
        ``required_length`` give the frames (from ``start``) that would be enough.
    """
    src = FrameSource(positions)
    start = src.check_start(start)
    lags = np.asarray(lags)
    n = src.n_frames - start
    if lags.ndim != 1 or lags.size == 0 or np.any(lags < 1) or np.any(lags > n - 2) \
            or not np.all(lags == np.round(lags)):
        raise ValueError(f"lags must be a 1D list of integers in [1, {n - 2}], got {lags!r}")
    lags = lags.astype(int)
    msd = np.empty((lags.size, src.n_dims))
    err = np.empty_like(msd)
    replicas = src.n_particles >= min_replicas
    for i, m in enumerate(lags):
        squares = _LagSquares(src, m)
        if replicas:         # per-particle time averages, streamed: O(chunk) memory
            total = np.zeros((src.n_particles, src.n_dims))
            for _, blk in squares.chunks(start):
                total += blk.sum(axis=0)
            q = total / (squares.n_frames - start)
            msd[i], err[i] = q.mean(axis=0), q.std(axis=0, ddof=1) / math.sqrt(len(q))
            continue
        means, base, used, naive = block_means(squares, start)
        exact = sum(blk.mean(axis=1).sum(axis=0) for _, blk in squares.chunks(start))
        for a in range(src.n_dims):
            try:
                r = blocking(means[:, a], base, used, naive[a, a], min_blocks=min_blocks)
            except InsufficientDataError as e:
                need = (e.required_length or 0) + m
                raise InsufficientDataError(
                    f"MSD at lag {m} frames: {e}; that is about {need} frames per particle from frame "
                    f"{start} (or at least {min_replicas} particles, whose independence gives the error)",
                    estimate=e.estimate, required_length=need, length=n) from None
            msd[i, a], err[i, a] = exact[a] / (squares.n_frames - start), r.error
    return src.out(msd), src.out(err)


class _LagSquares(FrameSource):
    """Squared displacements (x_{j+m} - x_j)^2 of a FrameSource as a FrameSource of
    n_frames - m frames; each slice reads two slices of the source (O(chunk) memory)."""

    def __init__(self, src, lag):
        self.src, self.lag = src, int(lag)
        self.data, self.name, self.axis = None, src.name, None
        self.shape = (src.n_frames - self.lag, src.n_particles, src.n_dims)
        self.n_frames, self.n_particles, self.n_dims = self.shape
        self.vector = src.vector

    def chunk_frames(self, particles=None):
        return max(1, self.src.chunk_frames(particles) // 2)

    def read(self, a, b, particles=None):
        d = self.src.read(a + self.lag, b + self.lag, particles) - self.src.read(a, b, particles)
        return d * d


def velocity_autocorrelation(velocities, max_lag=None, start=0):
    """Particle-averaged velocity autocovariance <v(t) v(0)> per axis (mean not removed).

    Returns (max_lag+1,) or (max_lag+1, dims); lag in frames.
    """
    src = FrameSource(velocities, name="velocities")
    start = src.check_start(start)
    n = src.n_frames - start
    L = _max_lag(n, max_lag)
    acc = np.zeros((L + 1, src.n_dims))
    size = 1 << int(math.ceil(math.log2(2 * n)))
    for p in range(src.n_particles):
        v = src.column(p, start)
        f = np.fft.rfft(v, size, axis=0)
        acc += np.fft.irfft(f * np.conj(f), size, axis=0)[:L + 1] / (n - np.arange(L + 1))[:, None]
    return src.out(acc / src.n_particles)


def lag_autocorrelation(x, lag, min_blocks=16):
    """Autocorrelation rho = <dx_j dx_{j+lag}>/<dx_j^2> of a pooled series with its error.

    x : (frames, particles) array (one axis). The error follows from blocking
    the linearised series (dx_j dx_{j+lag} - rho dx_j^2)/<dx^2> (delta method).
    Returns ``(rho, rho_err)``.
    """
    x = np.asarray(x, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    lag = int(lag)
    if not 1 <= lag <= x.shape[0] // 4:
        raise ValueError(f"lag must be in [1, {x.shape[0] // 4}] for {x.shape[0]} frames, got {lag!r}")
    y = x - x.mean(axis=0)
    prod = (y[lag:] * y[:-lag]).mean(axis=1)
    sq = (0.5 * (y[lag:] ** 2 + y[:-lag] ** 2)).mean(axis=1)
    rho = prod.mean() / sq.mean()
    r = blocking((prod - rho * sq) / sq.mean(), min_blocks=min_blocks)
    return float(rho), r.error


class MSD(Estimator):
    """Particle-averaged MSD per axis, by FFT, with blocking errors at chosen lags.

    Parameters
    ----------
    dt : float, s
        Time between frames.
    max_lag : int or None
        Largest lag (frames) of ``msd_``; default a tenth of the frames.
    error_lags : sequence of int or None
        Lags (frames) at which errors are computed; default ~12 log-spaced.
    start : int
        First frame used.

    Attributes (after fit)
    ----------------------
    lags_, time_ : lags in frames and s; msd_ : (lags, dims) or (lags,), m^2
    error_lags_, error_time_, msd_at_error_lags_, msd_err_ : errors at chosen lags
    """

    def __init__(self, dt, max_lag=None, error_lags=None, start=0):
        self.dt = dt
        self.max_lag = max_lag
        self.error_lags = error_lags
        self.start = start

    def fit(self, positions):
        if not (isinstance(self.dt, (int, float)) and self.dt > 0):
            raise ValueError(f"dt must be a positive number (s), got {self.dt!r}")
        n = FrameSource(positions).n_frames - int(self.start)
        L = self.max_lag if self.max_lag is not None else max(1, n // 10)
        self.msd_ = mean_msd(positions, L, self.start)
        self.lags_ = np.arange(L + 1)
        self.time_ = self.lags_ * self.dt
        el = self.error_lags
        if el is None:
            el = np.unique(np.round(np.logspace(0, math.log10(max(L, 1)), 12)).astype(int))
        self.msd_at_error_lags_, self.msd_err_ = msd_at_lags(positions, el, self.start)
        self.error_lags_ = np.asarray(el, dtype=int)
        self.error_time_ = self.error_lags_ * self.dt
        return self


class RelaxationStiffness(Estimator):
    """Trap stiffness from the relaxation time of the position autocorrelation.

    rho(m dt) = exp(-m dt kappa/gamma) for an overdamped trap, so
    kappa = -gamma ln(rho)/(m dt); equivalently from the MSD,
    MSD(t) = 2 var (1 - rho(t)). The lag m is chosen near the relaxation time
    (where rho ~ 1/e, the least noisy choice) unless given.

    Parameters
    ----------
    friction : float, kg/s
    dt : float, s (time between frames)
    lag : int or None
    axis : int or None (for 3D positions)
    start : int

    Attributes (after fit)
    ----------------------
    lag_, rho_, rho_err_, tau_, tau_err_ (s), stiffness_, stiffness_err_ (N/m)
    """

    def __init__(self, friction, dt, lag=None, axis=None, start=0):
        self.friction = friction
        self.dt = dt
        self.lag = lag
        self.axis = axis
        self.start = start

    def fit(self, positions):
        for name in ("friction", "dt"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and v > 0):
                raise ValueError(f"{name} must be a positive number, got {v!r}")
        src, start = single_axis(positions, self.axis, self.start)
        x = np.concatenate([blk[:, :, 0] for _, blk in src.chunks(start)])
        lag = self.lag
        if lag is None:
            acov = np.mean([np.fft.irfft(np.abs(np.fft.rfft(c - c.mean(), 2 * len(c))) ** 2)[:len(c) // 4]
                            for c in x.T[:4]], axis=0)
            below = np.nonzero(acov < acov[0] / math.e)[0]
            if below.size == 0:
                raise InsufficientDataError(
                    f"the autocorrelation does not fall below 1/e within {len(acov)} frames; "
                    f"record at least {4 * 4 * len(acov)} frames", required_length=16 * len(acov),
                    length=x.shape[0])
            lag = max(1, int(below[0]))
        rho, rho_err = lag_autocorrelation(x, lag)
        if not 0.0 < rho < 1.0:
            raise ValueError(f"autocorrelation at lag {lag} is {rho:.3g}, outside (0, 1): "
                             "not a relaxing trapped particle")
        t = lag * self.dt
        self.lag_, self.rho_, self.rho_err_ = lag, rho, rho_err
        self.tau_ = -t / math.log(rho)
        self.tau_err_ = self.tau_ * rho_err / (rho * abs(math.log(rho)))
        self.stiffness_ = self.friction / self.tau_
        self.stiffness_err_ = self.stiffness_ * self.tau_err_ / self.tau_
        return self
