"""Per-axis mean and variance with blocking errors; stiffness by equipartition.

kappa = kT / <(x - <x>)^2> per Cartesian axis (equipartition; common practice).
Errors come from Flyvbjerg-Petersen blocking of the frame series (see
:mod:`langsim.analysis.stats`); particles are pooled frame by frame.
"""
import numpy as np

from .stats import Estimator, FrameSource, InsufficientDataError, block_means, blocking

__all__ = ["axis_moments", "Equipartition"]


def axis_moments(positions, start=0, stop=None, min_blocks=16, strict=True):
    """Mean and variance per axis with standard errors, streaming over frames.

    Parameters
    ----------
    positions : array-like, (frames,), (frames, particles) or (frames, particles, dims), m
    start, stop : int
        Frame range used.
    strict : bool
        If False, an axis whose blocking finds no plateau gets NaN errors
        instead of raising InsufficientDataError.

    Returns
    -------
    dict with arrays per axis (scalars for 1D/2D input): ``mean``,
    ``mean_err``, ``variance``, ``variance_err``, ``inefficiency`` (of the
    squared-deviation series, in frames), ``n_frames``.

    Notes
    -----
    The variance is <x^2> - <x>^2 pooled over particles; its error follows
    from blocking the linearised series x^2 - 2 <x> x (delta method), whose
    block means are combinations of the block means of x and x^2.
    """
    src = FrameSource(positions)
    start = src.check_start(start)
    d = src.n_dims

    def transform(blk):
        return np.concatenate([blk.mean(axis=1), (blk * blk).mean(axis=1)], axis=1)

    stop = src.n_frames if stop is None else stop
    # centre on the first frame's mean to keep x^2 - <x>^2 free of cancellation
    shift = src.read(start, start + 1).mean(axis=(0, 1))

    def centred(blk):
        return transform(blk - shift)

    means, base, used, naive = block_means(src, start, stop, transform=centred)
    m1, m2 = means[:, :d], means[:, d:]
    mu = m1.mean(axis=0)
    out = {k: np.empty(d) for k in ("mean", "mean_err", "variance", "variance_err", "inefficiency")}
    for a in range(d):
        out["mean"][a] = mu[a] + shift[a]
        out["variance"][a] = m2[:, a].mean() - mu[a] ** 2
        lin = m2[:, a] - 2.0 * mu[a] * m1[:, a]
        w = np.zeros(2 * d)
        w[d + a], w[a] = 1.0, -2.0 * mu[a]
        try:
            r1 = blocking(m1[:, a], base, used, max(naive[a, a], 0.0), min_blocks)
            r2 = blocking(lin, base, used, max(float(w @ naive @ w), 0.0), min_blocks)
        except InsufficientDataError:
            if strict:
                raise
            out["mean_err"][a] = out["variance_err"][a] = out["inefficiency"][a] = np.nan
            continue
        out["mean_err"][a] = r1.error
        out["variance_err"][a] = r2.error
        out["inefficiency"][a] = r2.inefficiency * base
    res = {k: src.out(v) for k, v in out.items()}
    res["n_frames"] = used
    return res


class Equipartition(Estimator):
    """Trap stiffness from the position variance, kappa = kT/var, per axis.

    Parameters
    ----------
    kT : float, J
        Thermal energy k_B T.
    start : int
        First frame used (discard a transient).

    Attributes (after fit)
    ----------------------
    mean_, mean_err_ : m
    variance_, variance_err_ : m^2
    stiffness_, stiffness_err_ : N/m (error propagated: kappa * err_var/var)
    """

    def __init__(self, kT, start=0):
        self.kT = kT
        self.start = start

    def fit(self, positions):
        if not (isinstance(self.kT, (int, float)) and self.kT > 0):
            raise ValueError(f"kT must be a positive number (J), got {self.kT!r}")
        m = axis_moments(positions, start=self.start)
        self.mean_, self.mean_err_ = m["mean"], m["mean_err"]
        self.variance_, self.variance_err_ = m["variance"], m["variance_err"]
        self.inefficiency_ = m["inefficiency"]
        self.stiffness_ = self.kT / self.variance_
        self.stiffness_err_ = self.stiffness_ * self.variance_err_ / self.variance_
        return self
