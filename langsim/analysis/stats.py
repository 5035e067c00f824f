"""Error bars for time-correlated data: blocking and autocorrelation times.

Data may be numpy arrays or lazy array-likes (e.g. an h5py Dataset) of shape
(frames,), (frames, particles) or (frames, particles, dims); they are read in
slices along frames (:class:`FrameSource`), so a file larger than memory can be
analysed by the streaming estimators.

References
----------
.. [1] H. Flyvbjerg, H. G. Petersen, "Error estimates on averages of
       correlated data", J. Chem. Phys. 91, 461 (1989).
.. [2] N. Madras, A. D. Sokal, "The pivot algorithm: a highly efficient Monte
       Carlo method for the self-avoiding walk", J. Stat. Phys. 50, 109 (1988)
       (automatic windowing of the integrated autocorrelation time).
.. [3] R. M. Lee, G. J. Conduit, N. Nemec, P. Lopez Rios, N. D. Drummond,
       "Strategies for improving the efficiency of quantum Monte Carlo
       calculations", Phys. Rev. E 83, 066706 (2011) (choice of the blocking
       level; criterion quoted from memory).
"""
import math
from dataclasses import dataclass

import numpy as np

__all__ = ["InsufficientDataError", "NotFittedError", "FrameSource", "autocovariance",
           "integrated_autocorr_time", "BlockingResult", "blocking", "block_means",
           "blocked_mean"]

#: Most frames read per slice by the streaming estimators ...
CHUNK_FRAMES = 1 << 18
#: ... and most bytes of float64 per slice: memory stays O(this) whatever the file size.
CHUNK_BYTES = 32 * 2**20


class InsufficientDataError(ValueError):
    """The series is too short for a trustworthy error estimate.

    Attributes
    ----------
    estimate : object
        The partial estimate (e.g. the autocorrelation time or the error at the
        largest usable blocking level), usable with caution.
    required_length : int or None
        Number of samples that would be enough by the same criterion.
    length : int or None
        Number of samples that were given.
    """

    def __init__(self, message, estimate=None, required_length=None, length=None):
        super().__init__(message)
        self.estimate = estimate
        self.required_length = required_length
        self.length = length


class NotFittedError(RuntimeError):
    """An estimator was used before ``fit``."""


class Estimator:
    """Minimal scikit-learn-like base: options in ``__init__``, results end in ``_``."""

    def _require_fitted(self, attribute):
        if not hasattr(self, attribute):
            raise NotFittedError(f"This {type(self).__name__} instance is not fitted yet; "
                                 f"call fit(data) before using {attribute!r}")

    def get_params(self):
        """Constructor options as a dict."""
        return {k: v for k, v in vars(self).items() if not k.endswith("_") and not k.startswith("_")}

    def __repr__(self):
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"


class FrameSource:
    """Read-only view of frame-major data, returned in float64 slices.

    Parameters
    ----------
    data : array-like
        Shape (frames,), (frames, particles) or (frames, particles, dims);
        anything with ``shape`` and slicing along the first axis (numpy
        array, h5py Dataset, memmap).
    axis : int or None
        For 3D data, keep only this Cartesian axis (then it behaves like
        (frames, particles)).
    name : str
        Argument name used in error messages.
    """

    def __init__(self, data, axis=None, name="positions"):
        shape = getattr(data, "shape", None)
        if shape is None:
            data = np.asarray(data, dtype=float)
            shape = data.shape
        shape = tuple(int(s) for s in shape)
        if len(shape) not in (1, 2, 3):
            raise ValueError(f"{name} must have shape (frames,), (frames, particles) or "
                             f"(frames, particles, dims), got shape {shape}")
        if shape[0] < 2:
            raise ValueError(f"{name} must hold at least 2 frames, got shape {shape}")
        if len(shape) == 3 and axis is not None:
            if not 0 <= int(axis) < shape[2]:
                raise ValueError(f"axis must be in [0, {shape[2]}) for {name} of shape {shape}, got {axis!r}")
        elif axis not in (None, 0):
            raise ValueError(f"axis applies to 3D {name} (frames, particles, dims); got axis={axis!r} "
                             f"for shape {shape}")
        self.data, self.shape, self.name = data, shape, name
        self.axis = None if len(shape) != 3 else axis
        self.n_frames = shape[0]
        self.n_particles = shape[1] if len(shape) > 1 else 1
        self.n_dims = shape[2] if (len(shape) == 3 and self.axis is None) else 1
        #: True when results carry a trailing dims axis
        self.vector = len(shape) == 3 and self.axis is None

    def chunk_frames(self, particles=None):
        """Frames per slice: at most CHUNK_FRAMES and CHUNK_BYTES of float64."""
        width = (self.n_particles if particles is None else particles) * self.n_dims * 8
        return int(max(1, min(CHUNK_FRAMES, CHUNK_BYTES // max(1, width))))

    def read(self, a, b, particles=None):
        """Frames a..b-1 as float64 of shape (b - a, particles, dims); ``particles`` a slice
        of particles (default all). Only the kept axis and particles are read."""
        sel = slice(None) if particles is None else particles
        if len(self.shape) == 1:
            block = np.asarray(self.data[a:b], dtype=np.float64)
        else:
            key = (slice(a, b), sel) + ((self.axis,) if self.axis is not None else ())
            try:
                block = np.asarray(self.data[key], dtype=np.float64)
            except (TypeError, IndexError, ValueError):   # an array-like sliced by frames only
                block = np.asarray(self.data[a:b], dtype=np.float64)[(slice(None),) + key[1:]]
        block = block.reshape(b - a, -1 if len(self.shape) > 1 else 1, self.n_dims)
        if not np.all(np.isfinite(block)):
            raise ValueError(f"{self.name} contains non-finite values in frames {a}..{b - 1}")
        return block

    def chunks(self, start=0, stop=None, chunk=None, overlap=0):
        """Yield (first_frame, array) slices covering start..stop-1.

        Consecutive slices share ``overlap`` frames (for lagged products).
        """
        stop = self.n_frames if stop is None else stop
        chunk = max(self.chunk_frames() if chunk is None else int(chunk), overlap + 1)
        a = start
        while a < stop:
            b = min(stop, a + chunk + overlap)
            yield a, self.read(a, b)
            if b == stop:
                break
            a = b - overlap

    def column(self, particle, start=0, stop=None):
        """All frames of one particle as (frames, dims), read slice by slice."""
        stop = self.n_frames if stop is None else stop
        step = self.chunk_frames(particles=1)
        p = slice(particle, particle + 1)
        return np.concatenate([self.read(a, min(stop, a + step), p)[:, 0, :]
                               for a in range(start, stop, step)])

    def out(self, values):
        """Drop the dims axis of a result when the input had none."""
        values = np.asarray(values)
        if self.vector:
            return values
        values = values[..., 0]
        return float(values) if values.ndim == 0 else values

    def check_start(self, start, needed=2):
        start = int(start)
        if not 0 <= start <= self.n_frames - needed:
            raise ValueError(f"start must be in [0, {self.n_frames - needed}] for {self.n_frames} "
                             f"frames, got {start!r}")
        return start


def single_axis(positions, axis, start, name="positions"):
    """FrameSource restricted to one Cartesian axis, and the checked start frame."""
    src = FrameSource(positions, axis=axis, name=name)
    if src.vector and src.n_dims > 1:
        raise ValueError(f"axis must be given for {name} with {src.n_dims} dims")
    return src, src.check_start(start)


def autocovariance(x, max_lag=None):
    """Autocovariance of a 1D series (mean removed, biased 1/N normalisation), by FFT."""
    x = np.asarray(x, dtype=float)
    if x.ndim != 1 or x.size < 2:
        raise ValueError(f"x must be a 1D series of at least 2 values, got shape {x.shape}")
    n = x.size
    max_lag = n - 1 if max_lag is None else min(int(max_lag), n - 1)
    y = x - x.mean()
    size = 1 << int(math.ceil(math.log2(2 * n)))
    f = np.fft.rfft(y, size)
    return np.fft.irfft(f * np.conj(f), size)[:max_lag + 1] / n


def integrated_autocorr_time(x, c=5.0, min_factor=50.0):
    """Integrated autocorrelation time tau = 1 + 2 sum_t rho(t), in samples.

    The sum is cut at the smallest window M with M >= c tau(M) [2]. The
    standard error of the mean is then sqrt(var tau / N).

    Raises
    ------
    InsufficientDataError
        If N < ``min_factor`` tau, or no window satisfies the criterion;
        ``estimate`` is the partial tau and ``required_length`` the
        length that would be enough.
    """
    x = np.asarray(x, dtype=float)
    acov = autocovariance(x)
    n = x.size
    if acov[0] <= 0:
        raise ValueError("x is constant: its autocorrelation time is undefined")
    rho = acov / acov[0]
    taus = 2.0 * np.cumsum(rho) - 1.0
    window = np.arange(taus.size) >= c * taus
    if not np.any(window):
        tau = float(taus[-1])
        raise InsufficientDataError(
            f"autocorrelation window never closed for a series of {n} samples "
            f"(tau >= {tau:.3g}); need at least {int(math.ceil(min_factor * tau))} samples",
            estimate=tau, required_length=int(math.ceil(min_factor * tau)), length=n)
    tau = max(float(taus[np.argmax(window)]), 1e-12)
    if n < min_factor * tau:
        raise InsufficientDataError(
            f"series of {n} samples is shorter than {min_factor:g} autocorrelation times "
            f"(tau = {tau:.3g} samples); need at least {int(math.ceil(min_factor * tau))}",
            estimate=tau, required_length=int(math.ceil(min_factor * tau)), length=n)
    return tau


@dataclass
class BlockingResult:
    """Outcome of :func:`blocking` for one column.

    ``error`` is the standard error of the mean at the chosen level,
    ``error_err`` its own standard error, ``inefficiency`` the statistical
    inefficiency (error^2 / naive error^2, i.e. the integrated autocorrelation
    time in samples), ``block_size`` in samples.
    """
    mean: float
    error: float
    error_err: float
    level: int
    block_size: int
    n_blocks: int
    inefficiency: float
    level_errors: np.ndarray


def blocking(series, base_block=1, n_samples=None, naive_variance=None, min_blocks=16):
    """Flyvbjerg-Petersen blocking of a 1D series of (block) means [1].

    Parameters
    ----------
    series : 1D array
        Samples, or means of consecutive blocks of ``base_block`` samples.
    base_block : int
        Samples per entry of ``series``.
    n_samples, naive_variance : optional
        Total sample count and sample variance of the underlying samples when
        ``series`` holds block means (default: from ``series``).
    min_blocks : int
        Fewest blocks a level may have to be chosen.

    The chosen level is the smallest whose block size B (samples) satisfies
    B^3 > 2 n g^2, g the inefficiency measured at that level [3].

    Raises
    ------
    InsufficientDataError
        When no level with at least ``min_blocks`` blocks satisfies the
        criterion; ``estimate`` is the BlockingResult at the largest such
        level, ``required_length`` the sample count that would be enough.
    """
    y = np.asarray(series, dtype=float)
    if y.ndim != 1 or y.size < 2:
        raise ValueError(f"series must be 1D with at least 2 entries, got shape {y.shape}")
    n = y.size * base_block if n_samples is None else int(n_samples)
    var0 = (np.var(y, ddof=1) if naive_variance is None else float(naive_variance))
    mean = float(y.mean())
    if var0 <= 0:
        return BlockingResult(mean, 0.0, 0.0, 0, base_block, y.size, 1.0, np.zeros(1))
    se0sq = var0 / n
    errors, results = [], []
    level, cur, bsize = 0, y, base_block
    while cur.size >= min_blocks:
        se = math.sqrt(np.var(cur, ddof=1) / cur.size)
        errors.append(se)
        g = max(se * se / se0sq, 1.0)
        results.append(BlockingResult(mean, se, se / math.sqrt(2.0 * (cur.size - 1)), level, bsize,
                                      cur.size, g, None))
        m = cur.size // 2
        cur = 0.5 * (cur[:2 * m:2] + cur[1:2 * m:2])
        level += 1
        bsize *= 2
    if not results:
        raise InsufficientDataError(
            f"series has {y.size} entries; at least {min_blocks} are needed for blocking",
            required_length=min_blocks * base_block, length=n)
    errors = np.array(errors)
    for r in results:
        r.level_errors = errors
        if r.block_size**3 > 2.0 * n * r.inefficiency**2:
            return r
    last = results[-1]
    g = last.inefficiency
    # n blocks of B = n/min_blocks samples satisfy B^3 > 2 n g^2 once n > min_blocks^1.5 sqrt(2) g.
    # g is only a lower bound here (it has not reached its plateau), so at least one more
    # blocking level, i.e. twice the samples, is needed whatever that bound says.
    need = max(int(math.ceil(min_blocks**1.5 * math.sqrt(2.0) * g)), 2 * n)
    raise InsufficientDataError(
        f"blocking found no plateau: {n} samples with inefficiency >= {g:.3g}; at least {need} "
        f"samples are needed (partial error {last.error:.3g})",
        estimate=last, required_length=need, length=n)


def block_means(source, start=0, stop=None, max_blocks=1 << 16, transform=None):
    """Stream a FrameSource into means of equal consecutive frame blocks.

    Each frame is first reduced by ``transform`` (a function of the
    (n, particles, dims) slice returning (n, k)); the default averages over
    particles, giving (n, dims). Returns ``(means, base_block, n_used,
    naive_variance)``: block means (n_blocks, k), frames per block, frames
    used (a multiple of the block size; the remainder at the end is dropped)
    and the sample covariance matrix (k, k) of the n_used reduced frames.
    """
    stop = source.n_frames if stop is None else stop
    total = stop - start
    base = max(1, int(math.ceil(total / max_blocks)))
    n_blocks = total // base
    used = n_blocks * base
    if transform is None:
        def transform(blk):
            return blk.mean(axis=1)
    s1, s2 = None, None
    carry = None
    out = []
    for _, blk in source.chunks(start, start + used,
                                chunk=base * max(1, source.chunk_frames() // base)):
        y = transform(blk)
        if carry is not None:
            y = np.concatenate([carry, y])
        m = y.shape[0] // base
        if s1 is None:
            s1, s2 = np.zeros(y.shape[1]), np.zeros((y.shape[1], y.shape[1]))
        part = y[:m * base]
        out.append(part.reshape(m, base, -1).mean(axis=1))
        s1 += part.sum(axis=0)
        s2 += part.T @ part
        carry = y[m * base:]
    means = np.concatenate(out)
    mu = s1 / used
    naive = (s2 / used - np.outer(mu, mu)) * used / max(used - 1, 1)
    return means, base, used, naive


def blocked_mean(values, base_block=1, n_samples=None, naive_variance=None, min_blocks=16):
    """Mean and blocking error of each column of ``values`` (n, k): lists of BlockingResult."""
    values = np.asarray(values, dtype=float)
    if values.ndim == 1:
        values = values[:, None]
    nv = [None] * values.shape[1] if naive_variance is None else list(naive_variance)
    return [blocking(values[:, j], base_block, n_samples, nv[j], min_blocks)
            for j in range(values.shape[1])]
