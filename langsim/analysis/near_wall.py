"""Estimators for beads near a wall: sedimentation decay length, short-time diffusion by height.

Samples of one particle are correlated in time, so errors come from replicas:
each particle's frames are cut into time blocks long compared with the
autocorrelation time of its height, and (particle, block) pairs are the
replicas of a ratio estimator (sum of values / number of values): its
standard error is the delta-method one, sqrt(sum_j (s_j - r n_j)^2 J/(J - 1))
/ sum_j n_j over J replicas (batch means with unequal counts; common practice).
"""
import math

import numpy as np

from .stats import InsufficientDataError, integrated_autocorr_time, single_axis, FrameSource

__all__ = ["replica_blocks", "ratio_mean", "decay_length", "increments_by_height"]

#: Fewest replicas for an error bar.
MIN_REPLICAS = 20


def replica_blocks(heights, min_replicas=MIN_REPLICAS, factor=10.0):
    """Time blocks per particle: each at least ``factor`` autocorrelation times of the heights.

    Parameters
    ----------
    heights : (frames, particles) array, m

    Returns
    -------
    int, blocks per particle (replicas = blocks x particles >= ``min_replicas``)

    Raises
    ------
    InsufficientDataError
        When fewer replicas than ``min_replicas`` fit.
    """
    n, P = heights.shape
    taus = []
    for j in range(min(P, 4)):
        try:
            taus.append(integrated_autocorr_time(heights[:, j], min_factor=factor))
        except InsufficientDataError as e:
            taus.append(e.estimate)
    tau = max(taus)
    per = max(1, int(n // (factor * tau)))
    if per * P < min_replicas:
        need = int(math.ceil(min_replicas / P * factor * tau))
        raise InsufficientDataError(
            f"the heights hold {P} particles x {n} frames with autocorrelation time {tau:.3g} frames: "
            f"{per * P} independent blocks, fewer than {min_replicas}; about {need} frames per "
            "particle would be enough", estimate=tau, required_length=need, length=n)
    return per


def ratio_mean(sums, counts):
    """Ratio estimator sum(sums)/sum(counts) over replicas and its standard error.

    Parameters
    ----------
    sums, counts : arrays (replicas, ...), the sum of the values and their number per replica

    Returns
    -------
    mean, error : arrays (...); NaN where fewer than 2 replicas hold values
    """
    sums = np.asarray(sums, dtype=float)
    counts = np.asarray(counts, dtype=float)
    total = counts.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = sums.sum(axis=0) / total
        used = (counts > 0).sum(axis=0)
        resid = sums - mean * counts
        var = (resid * resid).sum(axis=0) * used / np.maximum(used - 1, 1) / (total * total)
    return mean, np.where(used >= 2, np.sqrt(var), np.nan)


def decay_length(heights, cut, n_blocks=None):
    """Decay length of an exponential height distribution above ``cut``, with its error.

    Above the range of the wall's repulsion the stationary density of
    sedimenting beads is exp(-z/l) (barometric; Perrin 1909, from memory); the
    maximum-likelihood estimate of l from the heights above ``cut`` is their mean
    excess over ``cut`` (memorylessness of the exponential).

    Parameters
    ----------
    heights : (frames, particles) array, m
    cut : float, m
    n_blocks : int or None, time blocks per particle (default :func:`replica_blocks`)

    Returns
    -------
    length, error : float, m
    """
    z = np.asarray(heights, dtype=float)
    if z.ndim != 2:
        raise ValueError(f"heights must have shape (frames, particles), got {z.shape}")
    B = replica_blocks(z) if n_blocks is None else int(n_blocks)
    L = z.shape[0] // B
    blocks = z[:L * B].reshape(B, L, z.shape[1])
    above = blocks > cut
    sums = np.where(above, blocks - cut, 0.0).sum(axis=1).reshape(-1)
    counts = above.sum(axis=1).reshape(-1)
    if counts.sum() < MIN_REPLICAS:
        raise InsufficientDataError(f"only {int(counts.sum())} heights above cut = {cut!r} m",
                                    length=int(counts.sum()))
    mean, err = ratio_mean(sums, counts)
    return float(mean), float(err)


def increments_by_height(positions, height_axis, edges, prediction, lag=1, start=0, n_blocks=None):
    """Mean squared displacement over ``lag`` frames, per axis, binned by the starting height.

    Parameters
    ----------
    positions : (frames, particles, dims) array-like, m (read in chunks)
    height_axis : int, the axis whose coordinate bins the pairs
    edges : increasing array of bin edges on that axis (m); pairs outside are left out
    prediction : callable(h0, axis) -> expected squared displacement (m^2) of a pair
        that starts at height coordinate(s) h0, for ``axis``
    lag, start : frames
    n_blocks : int or None, time blocks per particle (default: from the heights'
        autocorrelation, :func:`replica_blocks`)

    Returns
    -------
    dict with (bins, dims) arrays ``measured``, ``predicted`` (means of dx^2 and of the
    prediction over the same pairs), ``difference`` and ``difference_err`` (their
    difference and its replica standard error), ``counts``, and ``mean_height`` (bins,).
    """
    src = FrameSource(positions)
    if not src.vector:
        raise ValueError(f"positions must have shape (frames, particles, dims), got {src.shape}")
    start = src.check_start(start)
    d, P = src.n_dims, src.n_particles
    edges = np.asarray(edges, dtype=float)
    nb = edges.size - 1
    n = src.n_frames - start
    if n <= lag:
        raise InsufficientDataError(f"{n} frames after start are too few for lag {lag}", length=n)
    if n_blocks is None:
        hsrc, _ = single_axis(positions, height_axis, start)
        heights = np.concatenate([blk[:, :, 0] for _, blk in hsrc.chunks(start)])
        n_blocks = replica_blocks(heights)
    L = max(1, (n - lag) // int(n_blocks))
    R = int(n_blocks) * P
    sq = np.zeros((R, nb, d))
    pr = np.zeros((R, nb, d))
    cnt = np.zeros((R, nb))
    hsum = np.zeros(nb)
    for a, blk in src.chunks(start, overlap=lag):
        h0 = blk[:-lag, :, height_axis]
        frames = a + np.arange(h0.shape[0]) - start
        block = np.minimum(frames // L, int(n_blocks) - 1)
        keep = (frames < L * int(n_blocks))[:, None] & (h0 >= edges[0]) & (h0 < edges[-1])
        b = np.clip(np.searchsorted(edges, h0, side="right") - 1, 0, nb - 1)
        rep = block[:, None] * P + np.arange(P)[None, :]
        flat = (rep * nb + b)[keep]
        cnt += np.bincount(flat, minlength=R * nb).reshape(R, nb)
        hsum += np.bincount(b[keep], weights=h0[keep], minlength=nb)
        for ax in range(d):
            dx = blk[lag:, :, ax] - blk[:-lag, :, ax]
            sq[:, :, ax] += np.bincount(flat, weights=(dx * dx)[keep], minlength=R * nb).reshape(R, nb)
            pr[:, :, ax] += np.bincount(flat, weights=np.asarray(prediction(h0[keep], ax), dtype=float),
                                        minlength=R * nb).reshape(R, nb)
    counts = cnt.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        measured = sq.sum(axis=0) / counts[:, None]
        predicted = pr.sum(axis=0) / counts[:, None]
        mean_height = hsum / counts
    diff, err = ratio_mean(sq - pr, np.repeat(cnt[:, :, None], d, axis=2))
    return {"measured": measured, "predicted": predicted, "difference": diff, "difference_err": err,
            "counts": counts, "mean_height": mean_height}
