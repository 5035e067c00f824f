"""Closed forms of what an instrument sees: motion blur, localization noise, camera spots.

Nothing here simulates; every function takes SI quantities (or dimensionless
ratios) and returns SI quantities. The estimators of :mod:`langsim.analysis.diffusion`
and the checks of :mod:`langsim.measurement.checks` compare data with these.

Motion blur of a freely diffusing particle
------------------------------------------
A frame reports the shutter-weighted average of the true path over its
exposure plus Gaussian localization noise of variance sigma^2 per axis. With
S(t) the cumulative, normalised shutter function of one frame interval Dt, the
*blur coefficient* is R = (1/Dt) int_0^Dt S(t)[1 - S(t)] dt, 0 <= R <= 1/4
[1, 2]. The measured displacements per axis are a moving average of order one:

    <dx_n^2>          = 2 D Dt (1 - 2R) + 2 sigma^2
    <dx_n dx_{n+1}>   = 2 R D Dt - sigma^2
    <dx_n dx_{n+m}>   = 0 for m >= 2

Shutters and their R (derived; [1, 2] for the flat and flash cases):

========================  =====================================================
``flat`` exposure t_E      R = t_E / (6 Dt)        (1/6 for the whole frame)
``strobe`` (one flash)     R = 0
``pulses``, n flashes      R = (t_E / Dt) (n^2 - 1) / (6 n^2), flashes at the
evenly over t_E            midpoints of n equal parts of the exposure
========================  =====================================================

The in-kernel recorder averages positions at steps (taps) with weights; the
exact R of a set of taps is :func:`tap_blur_coefficient`
R_d = (1/P) sum_{l=0}^{P-1} S_l (1 - S_l), S_l the summed weight of the taps at
offsets <= l steps, P the frame period in steps (derived here: the weight of the
increment of step l in frame n is 1 - S_l, in frame n + 1 it is S_l). It is exact
for the engine's free-particle update (Gaussian increments of variance 2 D dt),
so the moments above hold with R_d exactly. A flat exposure of E steps sampled
with trapezoid weights gives R_d = (E^2/6 + 1/12)/(E P): the continuous value
plus dt^2/(12 t_E Dt).

References
----------
.. [1] A. J. Berglund, "Statistics of camera-based single-particle tracking",
       Phys. Rev. E 82, 011917 (2010).
.. [2] C. L. Vestergaard, P. C. Blainey, H. Flyvbjerg, "Optimal estimation of
       diffusion coefficients from single-particle trajectories", Phys. Rev. E
       89, 022726 (2014).
.. [3] W. P. Wong, K. Halvorsen, "The effect of integration time on fluctuation
       measurements: calibrating an optical trap in the presence of motion
       blur", Opt. Express 14, 12517 (2006).
.. [4] K. I. Mortensen, L. S. Churchman, J. A. Spudich, H. Flyvbjerg,
       "Optimized localization analysis for single-molecule tracking and
       super-resolution microscopy", Nat. Methods 7, 377 (2010).
.. [5] R. J. Ober, S. Ram, E. S. Ward, "Localization accuracy in single-molecule
       microscopy", Biophys. J. 86, 1185 (2004).
.. [6] C. S. Smith, N. Joseph, B. Rieger, K. A. Lidke, "Fast, single-molecule
       localization that achieves theoretically minimum uncertainty", Nat.
       Methods 7, 373 (2010) (the pixel-integrated Gaussian).
.. [7] B. Zhang, J. Zerubia, J.-C. Olivo-Marin, "Gaussian approximations of
       fluorescence microscope point-spread function models", Appl. Opt. 46,
       1819 (2007).
"""
import math

import numpy as np

__all__ = ["SHUTTERS", "blur_coefficient", "tap_blur_coefficient", "trapezoid_taps",
           "displacement_moments", "ma1_total_covariance", "cve_variance", "cve_variance_leading",
           "wong_halvorsen_factor", "wong_halvorsen_lag_factor", "blurred_trap_psd",
           "tap_average_autocovariance", "pixel_fractions", "expected_spot", "spot_fisher_information",
           "cramer_rao_bound", "mortensen_mle_variance", "psf_sigma_from_optics",
           "defocus_sigma"]

#: Shutter shapes of ``[measurement] shutter``.
SHUTTERS = ("flat", "strobe", "pulses")
#: sigma of the Gaussian matched to the paraxial Airy spot (peak-fixed L2 fit), in lambda/NA [7]
#: (0.210285; the "0.21 lambda/NA" of common practice).
AIRY_SIGMA_PER_LAMBDA_NA = 0.210285


def blur_coefficient(shutter, exposure, frame_interval, pulses=1):
    """Blur coefficient R of a shutter (dimensionless, 0 <= R <= 1/4).

    Parameters
    ----------
    shutter : {"flat", "strobe", "pulses"}
    exposure : float, s
        Exposure time t_E <= frame_interval (ignored for "strobe").
    frame_interval : float, s
    pulses : int, default 1
        Number of flashes of a "pulses" shutter (evenly spread over t_E).
    """
    if shutter not in SHUTTERS:
        raise ValueError(f"shutter must be one of {SHUTTERS}, got {shutter!r}")
    if not (frame_interval > 0 and 0 <= exposure <= frame_interval * (1 + 1e-12)):
        raise ValueError(f"need 0 <= exposure <= frame_interval, got {exposure!r}, {frame_interval!r}")
    ratio = exposure / frame_interval
    if shutter == "flat":
        return ratio / 6.0
    if shutter == "strobe":
        return 0.0
    n = int(pulses)
    if n < 1:
        raise ValueError(f"pulses must be >= 1, got {pulses!r}")
    return ratio * (n * n - 1) / (6.0 * n * n)


def tap_blur_coefficient(weights, offsets, period):
    """Exact blur coefficient of a weighted average of positions at step offsets.

    Parameters
    ----------
    weights : (n_taps,) array, summing to 1
    offsets : (n_taps,) int array, steps after the start of the frame (0 .. period)
    period : int, steps between frames

    Returns
    -------
    float
        R_d = (1/P) sum_{l=0}^{P-1} S_l (1 - S_l), S_l = sum of weights with offset <= l.
    """
    w = np.asarray(weights, dtype=float)
    o = np.asarray(offsets, dtype=np.int64)
    if w.shape != o.shape or w.ndim != 1 or w.size == 0:
        raise ValueError("weights and offsets must be 1D arrays of the same length")
    if not math.isclose(w.sum(), 1.0, rel_tol=1e-9) or np.any(o < 0) or np.any(o > period):
        raise ValueError("weights must sum to 1 and offsets lie in [0, period]")
    cum = np.zeros(int(period) + 1)
    np.add.at(cum, o, w)
    S = np.cumsum(cum)[:int(period)]
    return float(np.sum(S * (1.0 - S)) / period)


def trapezoid_taps(exposure_steps, n_taps=None):
    """Offsets and trapezoid weights of a flat exposure of ``exposure_steps`` steps.

    With ``n_taps`` (at least 2, and n_taps - 1 dividing the exposure) the
    taps are that many, evenly spaced; default every step (exposure_steps + 1
    taps). A zero-length exposure is one tap of weight 1 (a strobe).
    """
    E = int(exposure_steps)
    if E == 0:
        return np.array([1.0]), np.array([0], dtype=np.int64)
    n = E + 1 if n_taps is None else int(n_taps)
    if n < 2 or E % (n - 1):
        raise ValueError(f"n_taps - 1 must divide the exposure of {E} steps, got n_taps={n_taps!r}")
    offsets = np.arange(n, dtype=np.int64) * (E // (n - 1))
    w = np.full(n, 1.0 / (n - 1))
    w[0] = w[-1] = 0.5 / (n - 1)
    return w, offsets


def displacement_moments(diffusion, frame_interval, sigma2, blur):
    """Variance and lag-1 covariance of measured displacements per axis, m^2 [1, 2].

    Returns ``(2 D Dt (1 - 2R) + 2 sigma^2, 2 R D Dt - sigma^2)``.
    """
    ddt = diffusion * frame_interval
    return 2.0 * ddt * (1.0 - 2.0 * blur) + 2.0 * sigma2, 2.0 * blur * ddt - sigma2


def ma1_total_covariance(n, s, c):
    """Covariance of the totals A = sum_{k<n} dx_k^2 and C = sum_{k<n-1} dx_k dx_{k+1}.

    For a stationary Gaussian series with variance ``s``, lag-1 covariance ``c``
    and no longer-range correlation (Isserlis' theorem; derived):
    Var A = 2[n s^2 + 2(n-1) c^2], Var C = (n-1)(s^2 + c^2) + 2(n-2) c^2,
    Cov(A, C) = 4 (n-1) s c. ``n`` may be an array (one entry per track).
    Returns ``(var_A, var_C, cov_AC)`` (summed over the entries of ``n``).
    """
    n = np.asarray(n, dtype=float)
    m = np.maximum(n - 1.0, 0.0)
    var_a = 2.0 * (n * s * s + 2.0 * m * c * c)
    var_c = m * (s * s + c * c) + 2.0 * np.maximum(n - 2.0, 0.0) * c * c
    cov = 4.0 * m * s * c
    return float(np.sum(var_a)), float(np.sum(var_c)), float(np.sum(cov))


def cve_variance(n, diffusion, frame_interval, sigma2, blur):
    """Exact variances of the covariance-based estimates of D and sigma^2.

    The estimates are D = m2/(2 Dt) + c1/Dt and sigma^2 = R m2 + (2R - 1) c1 [2],
    with m2 = A/sum(n) and c1 = C/sum(n - 1) pooled over tracks of ``n``
    displacements each (an int or an array). Exact for Gaussian displacements
    (from :func:`ma1_total_covariance`; derived); the leading 1/n term of the D
    variance is that of [2] (:func:`cve_variance_leading`).

    Returns ``(var_D, var_sigma2, cov)`` in m^4/s^2, m^4, m^4/s.
    """
    s, c = displacement_moments(diffusion, frame_interval, sigma2, blur)
    n = np.atleast_1d(np.asarray(n, dtype=float))
    na, nc = float(n.sum()), float(np.maximum(n - 1, 0).sum())
    va, vc, cac = ma1_total_covariance(n, s, c)
    vm, vcc, cmc = va / na**2, vc / nc**2, cac / (na * nc)
    a1, b1 = 1.0 / (2.0 * frame_interval), 1.0 / frame_interval
    a2, b2 = blur, 2.0 * blur - 1.0
    var_d = a1 * a1 * vm + b1 * b1 * vcc + 2 * a1 * b1 * cmc
    var_s = a2 * a2 * vm + b2 * b2 * vcc + 2 * a2 * b2 * cmc
    cov = a1 * a2 * vm + b1 * b2 * vcc + (a1 * b2 + a2 * b1) * cmc
    return var_d, var_s, cov


def cve_variance_leading(n, diffusion, frame_interval, sigma2, blur):
    """Var D of the covariance-based estimator as published [2] (quoted from memory,
    leading term re-derived): D^2 [(6 + 4 eps + 2 eps^2)/n + 4 (1 + eps)^2/n^2],
    eps = sigma^2/(D Dt) - 2R, for one track of n displacements."""
    eps = sigma2 / (diffusion * frame_interval) - 2.0 * blur
    return diffusion**2 * ((6 + 4 * eps + 2 * eps**2) / n + 4 * (1 + eps)**2 / n**2)


# ---------------------------------------------------------------- trapped particle
def wong_halvorsen_factor(alpha):
    """S(alpha) = var(measured)/var(true) of a trapped particle seen through a flat
    exposure W, alpha = W/tau_c [3]: 2/alpha - 2(1 - exp(-alpha))/alpha^2."""
    a = np.asarray(alpha, dtype=float)
    small = a < 1e-4
    safe = np.where(small, 1.0, a)
    out = np.where(small, 1.0 - a / 3.0 + a * a / 12.0, 2.0 / safe - 2.0 * -np.expm1(-safe) / safe**2)
    return out if out.ndim else float(out)


def wong_halvorsen_lag_factor(alpha):
    """A(alpha) = [sinh(alpha/2)/(alpha/2)]^2: Cov(X_0, X_n) = (kT/k) A e^{-n Dt/tau}, n >= 1,
    for frames Dt >= W apart (derived; check-values section 13)."""
    a = np.asarray(alpha, dtype=float)
    h = np.where(a < 1e-8, 1.0, a / 2.0)
    out = np.where(a < 1e-8, 1.0 + a * a / 12.0, (np.sinh(h) / h) ** 2)
    return out if out.ndim else float(out)


def blurred_trap_psd(f, variance, tau, exposure, frame_interval):
    """Two-sided PSD (m^2/Hz) of a trapped particle's exposure-averaged, sampled positions.

    P(f) = Dt [v S(a) + 2 v A(a) (c cos th - c^2)/(1 - 2 c cos th + c^2)],
    v = kT/k, a = W/tau, c = exp(-Dt/tau), th = 2 pi f Dt: the sum over aliases of
    the Lorentzian times the sinc^2 exposure filter [3] (closed form derived;
    check-values section 13).
    """
    f = np.asarray(f, dtype=float)
    a = exposure / tau
    c = math.exp(-frame_interval / tau)
    th = 2.0 * math.pi * f * frame_interval
    geo = (c * np.cos(th) - c * c) / (1.0 - 2.0 * c * np.cos(th) + c * c)
    return frame_interval * variance * (wong_halvorsen_factor(a) + 2.0 * wong_halvorsen_lag_factor(a) * geo)


def tap_average_autocovariance(lags, weights, offsets, period, step_variance, step_factor):
    """Autocovariance of tap averages X_n = sum_j w_j x_{nP + o_j} of an AR(1) series.

    The series x_{k+1} = a x_k + noise (stationary variance ``step_variance``,
    ``step_factor`` = a, e.g. the Euler-Maruyama trap 1 - k dt/gamma) has
    Cov(x_i, x_j) = v a^|i-j|; so Cov(X_0, X_m) = v sum_ij w_i w_j a^|m P + o_j - o_i|
    (exact for the discrete recorder; its dt -> 0 limit is [3]).
    """
    w = np.asarray(weights, dtype=float)
    o = np.asarray(offsets, dtype=float)
    lags = np.atleast_1d(np.asarray(lags, dtype=float))
    diff = o[None, :] - o[:, None]
    ww = w[:, None] * w[None, :]
    out = np.array([np.sum(ww * step_factor ** np.abs(m * period + diff)) for m in lags])
    return step_variance * out


# ---------------------------------------------------------------- camera spots
def pixel_fractions(edges, center, sigma):
    """Fractions of a 1D Gaussian (mean ``center``, std ``sigma``) in the bins ``edges``.

    ``0.5 [erf((e_{i+1} - c)/(sqrt2 s)) - erf((e_i - c)/(sqrt2 s))]`` [6].
    """
    from scipy import special
    e = (np.asarray(edges, dtype=float) - center) / (math.sqrt(2.0) * sigma)
    return 0.5 * np.diff(special.erf(e))


def expected_spot(x, y, sigma, photons, background, pixel_size, shape, origin=(0.0, 0.0)):
    """Expected photons per pixel of one in-focus emitter: N dEx dEy + b [6].

    Rows run along y, columns along x; pixel (0, 0) has its lower corner at ``origin``.
    Returns an array of ``shape`` (rows, columns).
    """
    rows, cols = shape
    ex = origin[0] + pixel_size * np.arange(cols + 1)
    ey = origin[1] + pixel_size * np.arange(rows + 1)
    return photons * np.outer(pixel_fractions(ey, y, sigma), pixel_fractions(ex, x, sigma)) + background


def spot_fisher_information(x, y, sigma, photons, background, pixel_size, shape, origin=(0.0, 0.0),
                            excess=1.0):
    """Fisher information of (x, y, N, b) for Poisson pixels with the pixel-integrated Gaussian.

    I_pq = sum_ij (d mu/dp)(d mu/dq)/mu [5]; an EM register's excess noise
    factor F^2 = ``excess`` divides it (common practice; [4]).
    """
    from scipy import special
    rows, cols = shape
    ex = (origin[0] + pixel_size * np.arange(cols + 1) - x) / sigma
    ey = (origin[1] + pixel_size * np.arange(rows + 1) - y) / sigma
    Ex, Ey = 0.5 * np.diff(special.erf(ex / math.sqrt(2))), 0.5 * np.diff(special.erf(ey / math.sqrt(2)))
    g = lambda u: np.exp(-u * u / 2) / (math.sqrt(2 * math.pi) * sigma)  # noqa: E731
    dEx, dEy = -np.diff(g(ex)), -np.diff(g(ey))
    mu = photons * np.outer(Ey, Ex) + background
    d = [photons * np.outer(Ey, dEx), photons * np.outer(dEy, Ex), np.outer(Ey, Ex), np.ones_like(mu)]
    return np.array([[np.sum(a * b / mu) for b in d] for a in d]) / excess


def cramer_rao_bound(x, y, sigma, photons, background, pixel_size, shape, origin=(0.0, 0.0), excess=1.0):
    """Cramer-Rao lower bound on the variance of x (m^2) with (x, y, N, b) unknown [5]."""
    info = spot_fisher_information(x, y, sigma, photons, background, pixel_size, shape, origin, excess)
    return float(np.linalg.inv(info)[0, 0])


def mortensen_mle_variance(sigma, pixel_size, photons, background, excess=1.0):
    """Mortensen's closed form of the ML localization variance per axis (m^2) [4]:
    F (s_a^2/N) [1 + int_0^1 ln t/(1 + t/tau) dt]^-1, s_a^2 = s^2 + a^2/12,
    tau = 2 pi s_a^2 b/(N a^2) (b: background photons per pixel). Agrees with the
    numerical Cramer-Rao bound to 0.13 % (check-values section 14)."""
    from scipy import integrate
    sa2 = sigma * sigma + pixel_size * pixel_size / 12.0
    b = max(background, 1e-300)
    tau = 2.0 * math.pi * sa2 * b / (photons * pixel_size * pixel_size)
    val = integrate.quad(lambda t: math.log(t) / (1.0 + t / tau), 0.0, 1.0, limit=500)[0]
    return excess * sa2 / photons / (1.0 + val)


def psf_sigma_from_optics(wavelength, numerical_aperture):
    """Gaussian sigma (m) matched to the paraxial Airy spot: 0.21 lambda/NA [7]."""
    return AIRY_SIGMA_PER_LAMBDA_NA * wavelength / numerical_aperture


def defocus_sigma(sigma0, z, depth):
    """PSF sigma at defocus z: sigma0 sqrt(1 + (z/d)^2).

    The Gaussian-beam (Rayleigh) form of common practice for the widening of a
    defocused spot, with ``depth`` d the defocus at which the spot is sqrt(2)
    wider (m). Photons are conserved, so the peak falls as 1/(1 + (z/d)^2).
    """
    z = np.asarray(z, dtype=float)
    return sigma0 * np.sqrt(1.0 + (z / depth) ** 2)
