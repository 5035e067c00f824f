"""Camera frames: pixel-integrated Gaussian spots along the path, photons and camera noise.

Image model (rows along y, columns along x; pixel (0, 0) has its corner at
``origin``). The expected photoelectrons of pixel (i, j) in a frame are

    mu_ij = b + sum_k N_k sum_t w_t dEy_t(i) dEx_t(j),
    dEx_t(j) = [erf((x_{j+1} - x_t)/(sqrt2 s_t)) - erf((x_j - x_t)/(sqrt2 s_t))]/2,

the pixel-integrated Gaussian [1] of each emitter k summed over its path
samples t (positions x_t, weights w_t of the exposure: a fast particle leaves a
streak), with N_k the emitter's expected detected photons in the frame and b
the background per pixel. With 3D positions the PSF widens out of focus,
s_t = s_0 sqrt(1 + ((z_t - focus)/d)^2) (:func:`~langsim.measurement.formulas.defocus_sigma`).

Noise, per pixel: photoelectrons n ~ Poisson(mu_ij). That is the same in law
as drawing each emitter's photon count from a Poisson law of mean N_k and
spreading the photons over pixels, plus Poisson background (superposition and
thinning of Poisson processes). An EM register multiplies n into
Gamma(n, G) electrons (mean n G, excess noise factor F^2 = 2 at high gain; the
model of common practice), read noise adds Gaussian electrons (rms
``read_noise``), and the ADC gives round((gain/G)(electrons)) + baseline counts,
clipped to 0 .. 2**bit_depth - 1 (``gain`` is counts per photoelectron overall).

Every variate is counter-based: Philox4x64-10 [2] keyed by the run's
measurement stream, with the counter (frame, pixel, purpose and draw, stream
tag), so a frame is a pure function of the seed and its inputs: a resumed run
renders the same bits. Poisson variates use inversion (through a guide table of
the background's law for pixels that see background only, sequential search
below a mean of 10 elsewhere) and the transformed rejection of Hormann [3]
above; Gamma variates the method of Marsaglia and Tsang [4]. A pixel's read
noise takes the spare words of its photon block when inversion left them unused.

References
----------
.. [1] C. S. Smith, N. Joseph, B. Rieger, K. A. Lidke, Nat. Methods 7, 373 (2010).
.. [2] J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, Proc. SC'11 (2011).
.. [3] W. Hormann, "The transformed rejection method for generating Poisson
       random variables", Insurance Math. Econom. 12, 39 (1993).
.. [4] G. Marsaglia, W. W. Tsang, "A simple method for generating gamma
       variables", ACM Trans. Math. Softw. 26, 363 (2000).
"""
import math

import numpy as np
from numba import njit, prange

from ..kernels.noise import box_muller, philox4x64, uniform_open

#: Counter word 3 of every measurement variate (the dynamics use 0).
STREAM_TAG = np.uint64(2)
#: Purposes (high 32 bits of counter word 2).
PHOTONS, EM_REGISTER, READ_NOISE = 1, 2, 3
LOCALIZATION, BLINKING, BLINK_START, BRIGHTNESS, DRIFT = 10, 11, 12, 13, 14
#: Half-width of a spot's window, in PSF sigmas (the Gaussian beyond 6 sigma is below 1e-9).
WINDOW_SIGMAS = 6.0
#: Rows per parallel band.
BAND_ROWS = 16
_S32 = np.uint64(32)
_SQRT2 = math.sqrt(2.0)


@njit(inline="always", cache=True)
def counter_word(purpose, draw):
    return (np.uint64(purpose) << _S32) | np.uint64(draw)


@njit(cache=True)
def uniform(k0, k1, c0, c1, purpose, draw):
    """One uniform in (0, 1) for (c0, c1, purpose, draw): lane 0 of the Philox block."""
    w0, w1, w2, w3 = philox4x64(np.uint64(c0), np.uint64(c1), counter_word(purpose, draw), STREAM_TAG, k0, k1)
    return uniform_open(w0)


@njit(cache=True)
def normal_pair(k0, k1, c0, c1, purpose, draw):
    """Two N(0, 1) variates for (c0, c1, purpose, draw) (Box-Muller on lanes 0, 1)."""
    w0, w1, w2, w3 = philox4x64(np.uint64(c0), np.uint64(c1), counter_word(purpose, draw), STREAM_TAG, k0, k1)
    return box_muller(w0, w1)


@njit(cache=True)
def poisson(mu, k0, k1, c0, c1, purpose):
    """Poisson(mu) from the counter stream (c0, c1, purpose); draws 0, 1, ... as needed."""
    if mu <= 0.0:
        return 0
    draw = 0
    if mu < 10.0:
        w0, w1, w2, w3 = philox4x64(np.uint64(c0), np.uint64(c1), counter_word(purpose, 0), STREAM_TAG, k0, k1)
        u = uniform_open(w0)
        p = math.exp(-mu)
        k = 0
        while u > p and k < 200:
            u -= p
            k += 1
            p *= mu / k
        return k
    slam = math.sqrt(mu)
    loglam = math.log(mu)
    b = 0.931 + 2.53 * slam
    a = -0.059 + 0.02483 * b
    invalpha = 1.1239 + 1.1328 / (b - 3.4)
    vr = 0.9277 - 3.6224 / (b - 2.0)
    while True:
        w0, w1, w2, w3 = philox4x64(np.uint64(c0), np.uint64(c1), counter_word(purpose, draw), STREAM_TAG, k0, k1)
        draw += 1
        for lane in range(2):
            U = (uniform_open(w0) if lane == 0 else uniform_open(w2)) - 0.5
            V = uniform_open(w1) if lane == 0 else uniform_open(w3)
            us = 0.5 - abs(U)
            k = math.floor((2.0 * a / us + b) * U + mu + 0.43)
            if us >= 0.07 and V <= vr:
                return int(k)
            if k < 0 or (us < 0.013 and V > us):
                continue
            if (math.log(V) + math.log(invalpha) - math.log(a / (us * us) + b)
                    <= -mu + k * loglam - math.lgamma(k + 1.0)):
                return int(k)


@njit(cache=True)
def gamma(shape, k0, k1, c0, c1, purpose):
    """Gamma(shape, 1) from the counter stream (Marsaglia-Tsang; shape < 1 by the u^(1/shape) boost)."""
    if shape <= 0.0:
        return 0.0
    boost = 1.0
    s = shape
    draw = 0
    if shape < 1.0:
        boost = uniform(k0, k1, c0, c1, purpose, 1 << 30) ** (1.0 / shape)
        s = shape + 1.0
    d = s - 1.0 / 3.0
    c = 1.0 / math.sqrt(9.0 * d)
    while True:
        w0, w1, w2, w3 = philox4x64(np.uint64(c0), np.uint64(c1), counter_word(purpose, draw), STREAM_TAG, k0, k1)
        draw += 1
        x, _ = box_muller(w0, w1)
        v = 1.0 + c * x
        if v <= 0.0:
            continue
        v = v * v * v
        u = uniform_open(w2)
        if u < 1.0 - 0.0331 * x * x * x * x or math.log(u) < 0.5 * x * x + d * (1.0 - v + math.log(v)):
            return boost * d * v


@njit(cache=True)
def _spot_axis(edge0, pixel, n_pix, center, sigma, lo, hi, out):
    """Pixel fractions of pixels lo .. hi-1 along one axis into out[0 .. hi-lo-1]."""
    inv = 1.0 / (_SQRT2 * sigma)
    prev = math.erf((edge0 + lo * pixel - center) * inv)
    for j in range(lo, hi):
        cur = math.erf((edge0 + (j + 1) * pixel - center) * inv)
        out[j - lo] = 0.5 * (cur - prev)
        prev = cur


@njit(cache=True)
def _window(edge0, pixel, n_pix, center, sigma):
    half = WINDOW_SIGMAS * sigma
    lo = int(math.floor((center - half - edge0) / pixel))
    hi = int(math.floor((center + half - edge0) / pixel)) + 1
    return max(lo, 0), min(hi, n_pix)


@njit(cache=True, parallel=True)
def _render(spots, rows, cols, x0, y0, pixel, background, frame, k0, k1, noise, em_gain, read_noise,
            conv, baseline, top, table, guide, out_mu, out_counts):
    """Expected image (out_mu) and, with ``noise``, camera counts (out_counts) of one frame.

    spots: (n, 4) rows of (x, y, sigma, amplitude = photons x weight), one per emitter path sample.
    """
    n_bands = (rows + BAND_ROWS - 1) // BAND_ROWS
    n_spots = spots.shape[0]
    for band in prange(n_bands):
        r0 = band * BAND_ROWS
        r1 = min(rows, r0 + BAND_ROWS)
        ex = np.empty(cols)
        ey = np.empty(BAND_ROWS)
        for i in range(r0, r1):
            for j in range(cols):
                out_mu[i, j] = background
        for k in range(n_spots):
            amp = spots[k, 3]
            if amp <= 0.0:
                continue
            sx, sy, sg = spots[k, 0], spots[k, 1], spots[k, 2]
            ylo, yhi = _window(y0, pixel, rows, sy, sg)
            ylo, yhi = max(ylo, r0), min(yhi, r1)
            if ylo >= yhi:
                continue
            xlo, xhi = _window(x0, pixel, cols, sx, sg)
            if xlo >= xhi:
                continue
            _spot_axis(x0, pixel, cols, sx, sg, xlo, xhi, ex)
            _spot_axis(y0, pixel, rows, sy, sg, ylo, yhi, ey)
            for i in range(ylo, yhi):
                a = amp * ey[i - ylo]
                for j in range(xlo, xhi):
                    out_mu[i, j] += a * ex[j - xlo]
        if noise:
            for i in range(r0, r1):
                for j in range(cols):
                    pix = i * cols + j
                    mu = out_mu[i, j]
                    w0, w1, w2, w3 = philox4x64(np.uint64(frame), np.uint64(pix), counter_word(PHOTONS, 0),
                                                STREAM_TAG, k0, k1)
                    if mu == background and table.size > 0:
                        # background-only pixel: inversion through the guide table of Poisson(b)
                        u = uniform_open(w0)
                        n = guide[int(u * guide.size)]
                        while table[n] < u:
                            n += 1
                        spare = True
                    else:
                        n = poisson(mu, k0, k1, frame, pix, PHOTONS)
                        spare = mu < 10.0          # inversion used lane 0 only
                    e = float(n)
                    if em_gain > 0.0 and n > 0:
                        e = em_gain * gamma(float(n), k0, k1, frame, pix, EM_REGISTER)
                    if read_noise > 0.0:
                        if spare:
                            z, _ = box_muller(w2, w3)
                        else:
                            z, _ = normal_pair(k0, k1, frame, pix, READ_NOISE, 0)
                        e += read_noise * z
                    v = math.floor(conv * e + baseline + 0.5)
                    out_counts[i, j] = min(max(v, 0.0), top)


def poisson_table(mu):
    """CDF of Poisson(mu) up to where the tail is negligible (< 2**-60), and its guide table
    (guide[j] = the smallest k with CDF(k) >= j/m): exact inversion in a few operations."""
    from scipy import stats
    if mu <= 0:
        return np.zeros(0), np.zeros(0, dtype=np.int64)
    k_max = int(mu + 14.0 * math.sqrt(mu) + 30.0)       # tail far below 2**-60 (Chernoff bound)
    cdf = stats.poisson.cdf(np.arange(k_max + 1), mu)
    cdf[-1] = 1.0
    m = k_max + 1
    guide = np.searchsorted(cdf, np.arange(m) / m, side="left").astype(np.int64)
    return cdf, guide


def spots_from_path(path, weights, photons, camera):
    """Spot rows (x, y, sigma, amplitude) of a frame from path samples.

    path : (n_taps, n_particles, dims) m, in the camera's frame (drift applied)
    weights : (n_taps,) summing to 1
    photons : (n_particles,) expected detected photons of each emitter in the frame
    """
    path = np.asarray(path, dtype=np.float64)
    n_taps, n, d = path.shape
    out = np.empty((n_taps, n, 4))
    out[:, :, 0] = path[:, :, 0]
    out[:, :, 1] = path[:, :, 1] if d > 1 else 0.0
    if d > 2 and camera.defocus_depth is not None:
        out[:, :, 2] = camera.psf_sigma * np.sqrt(1.0 + ((path[:, :, 2] - camera.focus) / camera.defocus_depth) ** 2)
    else:
        out[:, :, 2] = camera.psf_sigma
    out[:, :, 3] = np.asarray(weights, dtype=float)[:, None] * np.asarray(photons, dtype=float)[None, :]
    return out.reshape(n_taps * n, 4)


_TABLES = {}


def _background_table(b):
    if b not in _TABLES:
        if len(_TABLES) > 64:
            _TABLES.clear()
        _TABLES[b] = poisson_table(b)
    return _TABLES[b]


def image_dtype(camera):
    return np.uint16 if camera.bit_depth <= 16 else np.uint32


def render_frame(spots, camera, frame, key, noise=True):
    """One frame: camera counts (rows, columns) of ``image_dtype``, or the expected
    photoelectrons (float64) when ``noise`` is False."""
    rows, cols = camera.image_shape
    mu = np.empty((rows, cols))
    counts = np.empty((rows, cols) if noise else (0, 0))
    em = float(camera.em_gain) if camera.em_gain is not None else 0.0
    conv = camera.gain / (camera.em_gain if camera.em_gain is not None else 1.0)
    table, guide = _background_table(float(camera.background))
    _render(np.ascontiguousarray(spots, dtype=np.float64), rows, cols, float(camera.origin[0]),
            float(camera.origin[1]), float(camera.pixel_size), float(camera.background), np.int64(frame),
            np.uint64(key[0]), np.uint64(key[1]), bool(noise), em, float(camera.read_noise), float(conv),
            float(camera.baseline), float(2 ** camera.bit_depth - 1), table, guide, mu, counts)
    return counts.astype(image_dtype(camera)) if noise else mu


def measurement_key(seed, spawn_key=()):
    """Philox key words of the run's "measurement" noise stream
    (:func:`langsim.seeding.stream_key`; child 2 of the run's SeedSequence)."""
    from .. import seeding
    return seeding.stream_key(seed, spawn_key, "measurement")
