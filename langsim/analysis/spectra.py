"""Segment-averaged periodograms and maximum-likelihood fits of trap and oscillator spectra.

Normalisation (two-sided, per Hz) as in [1]: for a segment of N samples dt
apart, x^_k = dt sum_j x_j exp(2 pi i k j/N) and P_k = |x^_k|^2/(N dt), whose
expectation is the two-sided PSD. Averaging the periodograms of n
independent segments (and particles) gives values that are gamma
distributed with shape n and mean E[P_k] (exponential for n = 1) [1, 2].
The fits maximise that likelihood, -log L = sum_k n [ln M_k + P_k/M_k] + const;
parameter errors come from the expected Fisher information
I = sum_k n (d ln M_k)(d ln M_k)^T.

References
----------
.. [1] K. Berg-Sorensen, H. Flyvbjerg, "Power spectrum analysis for optical
       tweezers", Rev. Sci. Instrum. 75, 594 (2004).
.. [2] S. F. Norrelykke, H. Flyvbjerg, Phys. Rev. E 83, 041103 (2011).

Scheme models ("euler-maruyama", "leimkuhler-matthews"): data produced by a
discrete overdamped integrator are not an exactly sampled Ornstein-Uhlenbeck
process, so the aliased Lorentzian fitted to them returns a corner frequency
and D that are not the physical kappa/(2 pi gamma) and kT/gamma (for
Leimkuhler-Matthews recorded every step, about half the corner frequency).
:func:`scheme_psd` is the exact expected periodogram of such a recorded
series, parametrised by the physical (f_c, D) at fixed step and recording
interval (derived), so the ML fit returns the physical values.
"""
import math

import numpy as np
from scipy import optimize

from .. import theory
from .stats import Estimator, FrameSource, single_axis

__all__ = ["segment_averaged_periodogram", "fit_psd_model", "scheme_psd", "scheme_model", "baoab_psd", "baoab_model",
           "LorentzianFit", "OscillatorFit", "MODELS", "SCHEMES"]


#: Position values the periodogram holds at once (2^20 float64: 8 MiB), whatever the data's size.
PERIODOGRAM_VALUES = 1 << 20


def segment_averaged_periodogram(positions, dt, segment_length, start=0, axis=None):
    """Periodogram averaged over non-overlapping segments and particles.

    Parameters
    ----------
    positions : (frames,), (frames, particles) or (frames, particles, dims) with ``axis``
    dt : float, s, time between frames
    segment_length : int, samples per segment (>= 8)

    Returns
    -------
    f : (N//2,) Hz, the positive frequencies k/(N dt), k = 1..N//2
    P : (N//2,) m^2/Hz, mean two-sided periodogram
    count : int, number of periodograms averaged (segments x particles)
    """
    src, start = single_axis(positions, axis, start)
    dt = float(dt)
    if not dt > 0:
        raise ValueError(f"dt must be > 0 (s), got {dt!r}")
    N = int(segment_length)
    n_seg = (src.n_frames - start) // N if N >= 8 else 0
    if N != segment_length or n_seg < 1:
        raise ValueError(f"segment_length must be an integer in [8, {src.n_frames - start}], "
                         f"got {segment_length!r}")
    acc = np.zeros(N // 2)
    stop = start + n_seg * N
    group = max(1, PERIODOGRAM_VALUES // N)     # particles per pass
    for p0 in range(0, src.n_particles, group):
        p1 = min(src.n_particles, p0 + group)
        step = N * max(1, PERIODOGRAM_VALUES // (N * (p1 - p0)))
        for a in range(start, stop, step):
            x = src.read(a, min(stop, a + step), slice(p0, p1))[:, :, 0]
            m = x.shape[0] // N
            seg = x[:m * N].reshape(m, N, -1)
            F = np.fft.rfft(seg, axis=1)[:, 1:N // 2 + 1]
            acc += (np.abs(F) ** 2).sum(axis=(0, 2))
    count = n_seg * src.n_particles
    P = acc * dt / N / count
    f = np.arange(1, N // 2 + 1) / (N * dt)
    return f, P, count


def _oscillator_unit(f, f0, Q, dt, n_alias):
    """Two-sided oscillator PSD with unit variance, alias-summed over 2 n_alias + 1 images."""
    w0 = 2.0 * math.pi * f0
    out = np.zeros_like(f)
    images = [0] if dt is None else range(-n_alias, n_alias + 1)
    for k in images:
        g = f if dt is None else f + k / dt
        r = (2.0 * math.pi * g / w0) ** 2
        out += (2.0 / (w0 * Q)) / ((1.0 - r) ** 2 + r / (Q * Q))
    return out


#: name -> (parameter names after the amplitude, unit-amplitude shape function)
MODELS = {
    "lorentzian": (("fc",), lambda f, p, dt, na: theory.lorentzian_psd(f, p[0], 1.0)),
    "aliased": (("fc",), lambda f, p, dt, na: theory.aliased_lorentzian_psd(f, p[0], 1.0, dt)),
    "blurred": (("fc",), lambda f, p, dt, na: theory.blurred_aliased_lorentzian_psd(f, p[0], 1.0, dt)),
    "oscillator": (("f0", "Q"), lambda f, p, dt, na: _oscillator_unit(f, p[0], p[1], None, na)),
    "aliased-oscillator": (("f0", "Q"), lambda f, p, dt, na: _oscillator_unit(f, p[0], p[1], dt, na)),
}

#: overdamped schemes whose recorded spectrum :func:`scheme_psd` gives ("exact": the
#: continuous process sampled at the frames)
SCHEMES = ("euler-maruyama", "leimkuhler-matthews", "exact")


def scheme_psd(f, fc, diffusion, step_dt, every, scheme, segment_length=None):
    """Two-sided spectrum of an overdamped scheme's recorded positions in a harmonic trap, m^2/Hz.

    Per step dt (``step_dt``), with r = kappa dt/gamma = 2 pi f_c dt and
    a = 1 - r, Euler-Maruyama is x' = a x + sqrt(2 D dt) xi (AR(1)) and
    Leimkuhler-Matthews x' = a x + sqrt(2 D dt)(xi + xi')/2 (ARMA(1,1)).
    Recorded every ``every`` steps (frame interval T = every dt), the frame
    autocovariance is g_0 = var, g_m = var rho_1 c^(m-1) (m >= 1), c = a^every,
    with var = (D/(2 pi f_c))/(1 - r/2), rho_1 = c (Euler-Maruyama) or
    var = D/(2 pi f_c), rho_1 = (1 - r/2) a^(every-1) (Leimkuhler-Matthews)
    (derived from the recursions; see :func:`langsim.theory.scheme_position_autocovariance`).

    Without ``segment_length`` this is the spectrum of the infinite series,
    S(f) = T var [1 + 2 rho_1 Re(e^{-iw}/(1 - z))], w = 2 pi f T, z = c e^{-iw}
    (geometric series; equals :func:`langsim.theory.ar1_psd`). With
    ``segment_length`` N it is the exact expectation of the periodogram of N
    frames, (T/N) sum_{|m|<N} (N - |m|) g_m e^{-iwm}
    = T var [1 + 2 rho_1 Re(e^{-iw} (1/(1 - z) - (1 - z^N)/(N (1 - z)^2)))]
    (Fejer-weighted geometric series, derived), which includes leakage.
    Returns NaN where the scheme is unstable (r >= 2) or f_c <= 0.
    """
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {SCHEMES}, got {scheme!r}")
    f = np.asarray(f, dtype=float)
    r = 2.0 * math.pi * fc * step_dt
    if not (0.0 < r < 2.0):
        return np.full(f.shape, np.nan)
    a = math.exp(-r) if scheme == "exact" else 1.0 - r
    c = a ** every
    var = diffusion / (2.0 * math.pi * fc)
    if scheme == "exact":           # the Ornstein-Uhlenbeck process at the frames: AR(1)
        rho1 = c
    elif scheme == "euler-maruyama":
        var /= 1.0 - r / 2.0
        rho1 = c
    else:
        rho1 = (1.0 - r / 2.0) * a ** (every - 1)
    T = step_dt * every
    e = np.exp(-2j * math.pi * f * T)
    z = c * e
    h = 1.0 / (1.0 - z)
    if segment_length is not None:
        h = h - (1.0 - z ** int(segment_length)) * h * h / segment_length
    return T * var * (1.0 + 2.0 * rho1 * (e * h).real)


def _model_steps(step_dt, every, segment_length):
    """Validated (step_dt, every) of a scheme model; checks segment_length too."""
    step_dt = _positive_opt("step_dt", step_dt, allow_none=False)
    if isinstance(every, bool) or int(every) != every or every < 1:
        raise ValueError(f"every must be an integer >= 1, got {every!r}")
    if segment_length is not None and (int(segment_length) != segment_length or segment_length < 2):
        raise ValueError(f"segment_length must be an integer >= 2 or None, got {segment_length!r}")
    return step_dt, int(every)


def scheme_model(scheme, step_dt, every=1, segment_length=None):
    """(names, shape) model for :func:`fit_psd_model`: :func:`scheme_psd` with unit D, parameter fc."""
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {SCHEMES}, got {scheme!r}")
    step_dt, every = _model_steps(step_dt, every, segment_length)
    return (("fc",), lambda f, p, dt, na: scheme_psd(f, p[0], 1.0, step_dt, every, scheme, segment_length))


def _baoab_frame_map(f0, Q, step_dt, every):
    """BAOAB's mean one-step map M for (q, v) with w0 = 2 pi f0, gamma/m = w0/Q, raised to ``every``.

    Same product B A O A B as :func:`langsim.theory.baoab_transition_matrix`,
    written in (f0, Q) (it depends on k, m, gamma only through k/m and gamma/m).
    Returns None where BAOAB is unstable (w0 dt >= 2) or f0, Q <= 0.
    """
    w0 = 2.0 * math.pi * f0
    if not (f0 > 0 and Q > 0 and w0 * step_dt < 2.0):
        return None
    h = step_dt
    c = math.exp(-w0 * h / Q)
    B = np.array([[1.0, 0.0], [-h * w0 * w0 / 2.0, 1.0]])
    A = np.array([[1.0, h / 2.0], [0.0, 1.0]])
    M = B @ A @ np.diag([1.0, c]) @ A @ B
    return np.linalg.matrix_power(M, int(every))


def _exact_frame_map(f0, Q, step_dt, every):
    """Mean map over one frame of the continuous underdamped process: expm(A every dt),
    A = [[0, 1], [-w0^2, -w0/Q]] (what scheme "exact" samples)."""
    from scipy.linalg import expm
    w0 = 2.0 * math.pi * f0
    if not (f0 > 0 and Q > 0):
        return None
    return expm(np.array([[0.0, 1.0], [-w0 * w0, -w0 / Q]]) * (step_dt * every))


def baoab_psd(f, f0, Q, variance, step_dt, every, segment_length=None, scheme="baoab"):
    """Two-sided spectrum of BAOAB's recorded positions in a harmonic well, m^2/Hz.

    For U = k q^2/2, BAOAB's full-step state s = (q, v) obeys
    s' = M s + noise with M = B A O A B (:func:`langsim.theory.baoab_transition_matrix`);
    its stationary covariance is diagonal (<q v> = 0), so the position
    autocovariance at a lag of n steps is var (M^n)_00 with var = kT/k exactly
    (Leimkuhler & Matthews 2013; :func:`langsim.theory.baoab_position_autocorrelation`).
    Recorded every ``every`` steps (T = every dt), the frame autocovariance is
    g_j = var (A^j)_00 with A = M^every. Parameters are the physical
    f0 = sqrt(k/m)/(2 pi), Q = sqrt(k m)/gamma and var = kT/k.

    Without ``segment_length`` this is S(f) = T var [1 + 2 Re (B (I - B)^-1)_00],
    B = A e^{-iw}, w = 2 pi f T (matrix geometric series). With
    ``segment_length`` N it is the exact expectation of the periodogram of N
    frames, (T/N) sum_{|j|<N} (N - |j|) g_j e^{-iwj}
    = T var [1 + 2 Re (B (I - B)^-1 - B (I - B^N)(I - B)^-2 / N)_00]
    (Fejer-weighted matrix geometric series, derived; all factors commute),
    which includes leakage. Returns NaN where BAOAB is unstable (2 pi f0 dt >= 2).
    ``scheme="exact"``: the same for the continuous process, whose stationary
    covariance is diagonal too, with the frame map expm(A T).
    """
    f = np.asarray(f, dtype=float)
    Af = (_exact_frame_map if scheme == "exact" else _baoab_frame_map)(f0, Q, step_dt, every)
    if Af is None:
        return np.full(f.shape, np.nan)
    T = step_dt * every
    u = np.exp(-2j * math.pi * f * T)
    a, b, c, d = Af[0, 0], Af[0, 1], Af[1, 0], Af[1, 1]
    det = a * d - b * c
    dI = 1.0 - u * (a + d) + u * u * det  # det(I - B)
    # (I - B)^-1 = adj/dI with adj = [[1 - u d, u b], [u c, 1 - u a]]; (B (I - B)^-1)_00 = u (a - u det)/dI
    g00 = u * (a - u * det) / dI
    if segment_length is not None:
        N = int(segment_length)
        AN = np.linalg.matrix_power(Af, N)
        uN = u ** N
        # C = B (I - B^N) entries, then (C adj^2)_00 / dI^2
        e00, e01 = 1.0 - uN * AN[0, 0], -uN * AN[0, 1]
        e10, e11 = -uN * AN[1, 0], 1.0 - uN * AN[1, 1]
        c00 = u * (a * e00 + b * e10)
        c01 = u * (a * e01 + b * e11)
        r00, r01, r10, r11 = 1.0 - u * d, u * b, u * c, 1.0 - u * a
        s00 = r00 * r00 + r01 * r10  # (adj^2)_00 and _10
        s10 = r10 * r00 + r11 * r10
        g00 = g00 - (c00 * s00 + c01 * s10) / (dI * dI) / N
    return T * variance * (1.0 + 2.0 * g00.real)


def baoab_model(step_dt, every=1, segment_length=None, scheme="baoab"):
    """(names, shape) model for :func:`fit_psd_model`: :func:`baoab_psd` with unit variance, parameters (f0, Q)."""
    step_dt, every = _model_steps(step_dt, every, segment_length)
    return (("f0", "Q"), lambda f, p, dt, na: baoab_psd(f, p[0], p[1], 1.0, step_dt, every,
                                                         segment_length, scheme))


def _nll_profile(logp, f, P, n, shape):
    h = shape(np.exp(logp))
    if not np.all(np.isfinite(h)) or np.any(h <= 0):
        return np.inf, np.nan
    amp = np.sum(n * P / h) / np.sum(n)
    return float(np.sum(n * (np.log(amp * h) + 1.0))), amp


def fit_psd_model(f, P, count, model, dt=None, n_alias=50, start=None, tol=None):
    """Maximum-likelihood fit of a PSD model to averaged periodogram values.

    Parameters
    ----------
    f, P : arrays, Hz and m^2/Hz (two-sided)
    count : int or array, gamma shape of each value (periodograms averaged)
    model : one of :data:`MODELS`, or a pair (names, shape) such as
        :func:`scheme_model` returns, where ``shape(f, params, dt, n_alias)``
        is the model with unit amplitude. "lorentzian"/"aliased"/"blurred"
        (and one-parameter custom models) have amplitude D (m^2/s) and corner
        frequency fc (Hz); "oscillator" and "aliased-oscillator" have
        amplitude var (m^2), resonance f0 (Hz), Q.
    dt : float, s, sampling interval (needed by aliased models)
    start : initial shape parameters (optional; a grid search is used otherwise)
    tol : float or None, two-parameter models: stop the simplex search when
        the log-parameters agree to ``tol`` and -log L to ``tol`` (default 1e-10, 1e-12)

    Returns
    -------
    dict: ``params`` (amplitude first), ``errors``, ``covariance`` (of the
    parameters, from the Fisher information), ``names``, ``nll``.
    """
    custom = isinstance(model, tuple)
    if custom and not (len(model) == 2 and callable(model[1]) and 1 <= len(model[0]) <= 2):
        raise ValueError(f"a custom model must be a pair (names, shape) with 1 or 2 names, got {model!r}")
    if not custom and model not in MODELS:
        raise ValueError(f"model must be one of {sorted(MODELS)} or a (names, shape) pair, got {model!r}")
    f = np.asarray(f, dtype=float)
    P = np.asarray(P, dtype=float)
    n = np.broadcast_to(np.asarray(count, dtype=float), f.shape)
    if f.shape != P.shape or f.ndim != 1 or f.size < 4:
        raise ValueError(f"f and P must be 1D of equal length >= 4, got {f.shape} and {P.shape}")
    if np.any(P <= 0) or np.any(f <= 0) or np.any(n <= 0):
        raise ValueError("f, P and count must be > 0 (exclude the f = 0 bin)")
    names, unit = model if custom else MODELS[model]
    if not custom and model in ("aliased", "blurred", "aliased-oscillator") and not (dt and dt > 0):
        raise ValueError(f"dt (s) is required by model {model!r}, got {dt!r}")
    shape = lambda p: unit(f, p, dt, n_alias)  # noqa: E731
    obj = lambda lp: _nll_profile(lp, f, P, n, shape)[0]  # noqa: E731
    if len(names) == 1 and start is None:
        # one shape parameter: grid in log fc, then a bounded scalar search between the grid neighbours
        lgrid = np.log(np.geomspace(f[0] / 30.0, f[-1] * 30.0, 61))
        vals = [obj(np.array([v])) for v in lgrid]
        i = int(np.argmin(vals))
        lo, hi = lgrid[max(i - 1, 0)], lgrid[min(i + 1, lgrid.size - 1)]
        res = optimize.minimize_scalar(lambda v: obj(np.array([v])), bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-10})
        logp = np.array([res.x])
    else:
        if start is None:
            cands = [(math.log(v), math.log(q)) for v in np.geomspace(f[0], f[-1], 41)
                     for q in np.geomspace(0.05, 3e3, 25)]
            x0 = np.array(min(cands, key=lambda c: obj(np.array(c))))
        else:
            x0 = np.log(np.asarray(start, dtype=float))
        res = optimize.minimize(obj, x0, method="Nelder-Mead",
                                options={"xatol": tol or 1e-10, "fatol": tol or 1e-12, "maxiter": 4000})
        logp = res.x
    nll, amp = _nll_profile(logp, f, P, n, shape)
    theta = np.concatenate([[math.log(amp)], logp])

    def logm(th):
        return th[0] + np.log(shape(np.exp(th[1:])))

    grads = np.empty((theta.size, f.size))
    for i in range(theta.size):
        h = 1e-5
        tp, tm = theta.copy(), theta.copy()
        tp[i] += h
        tm[i] -= h
        grads[i] = (logm(tp) - logm(tm)) / (2 * h)
    fisher = (grads * n) @ grads.T
    cov_log = np.linalg.inv(fisher)
    params = np.exp(theta)
    cov = cov_log * np.outer(params, params)
    return {"names": ("D" if len(names) == 1 else "variance",) + names, "params": params,
            "errors": np.sqrt(np.diag(cov)), "covariance": cov, "nll": nll}


def _positive_opt(name, v, allow_none=True):
    if v is None and allow_none:
        return None
    if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a positive number, got {v!r}")
    return float(v)


def _default_segment(n):
    """Largest power of two <= n/16 (at most 2^15, at least 8)."""
    return int(max(8, min(1 << 15, 1 << int(math.floor(math.log2(max(n // 16, 8)))))))


class _SpectrumFit(Estimator):
    def _periodogram(self, positions):
        _positive_opt("dt", self.dt, allow_none=False)
        src = FrameSource(positions, axis=self.axis)
        N = self.segment_length or _default_segment(src.n_frames - int(self.start))
        f, P, count = segment_averaged_periodogram(positions, self.dt, N, self.start, self.axis)
        lo = self.f_min if self.f_min is not None else 0.0
        hi = self.f_max if self.f_max is not None else np.inf
        keep = (f >= lo) & (f <= hi)
        if keep.sum() < 4:
            raise ValueError(f"fewer than 4 frequencies in [f_min, f_max] = [{lo!r}, {hi!r}] Hz")
        self.frequencies_, self.psd_, self.psd_count_ = f[keep], P[keep], count
        self.segment_length_ = N


class LorentzianFit(_SpectrumFit):
    """Corner frequency and diffusion coefficient of an overdamped trap from its PSD.

    Parameters
    ----------
    dt : float, s, time between frames
    model : "aliased" (instantaneous samples of the continuous process, [1]),
        "blurred" (full-frame exposure), "lorentzian" (no aliasing), or a
        scheme in :data:`SCHEMES` ("euler-maruyama", "leimkuhler-matthews")
        for data from that integrator: the exact spectrum of its recorded
        positions (:func:`scheme_psd`), so that fc and D are the physical
        kappa/(2 pi gamma) and kT/gamma. Leimkuhler-Matthews recorded every
        step has a spectral zero at the Nyquist frequency, where leakage
        dominates and is correlated across frequencies: use f_max <= 1/(4 dt).
        Segment edges add such correlated noise everywhere at a relative level
        ~ tau_f^2/N (tau_f: relaxation time in frames): prefer N >~ 16 tau_f^2.
    step_dt : float or None, s, integration step (scheme models only;
        default dt/every); every : int or None, steps per frame (scheme
        models; default dt/step_dt, which must then be an integer, or 1).
    leakage : bool, scheme models only: fit the exact expected periodogram of
        a segment (finite-segment leakage included, the default) rather than
        the spectrum of an infinite record.
    segment_length : int or None (default: largest power of two <= frames/16, <= 2^15)
    f_min, f_max : float or None, Hz, fitted band
    kT : float or None, J; friction : float or None, kg/s. With friction,
        stiffness_ = 2 pi gamma fc; otherwise with kT, friction_ = kT/D and
        stiffness_ = 2 pi fc kT/D.
    axis, start : as in :class:`~langsim.analysis.stats.FrameSource`

    Attributes (after fit)
    ----------------------
    corner_frequency_, corner_frequency_err_ (Hz), diffusion_, diffusion_err_
    (m^2/s), covariance_ (of (D, fc)), stiffness_, stiffness_err_, friction_,
    friction_err_ (when computable), frequencies_, psd_, psd_count_,
    segment_length_; scheme models also step_dt_ and every_.
    """

    def __init__(self, dt, model="aliased", segment_length=None, f_min=None, f_max=None,
                 kT=None, friction=None, axis=None, start=0, step_dt=None, every=None, leakage=True):
        self.dt = dt
        self.model = model
        self.step_dt = step_dt
        self.every = every
        self.leakage = leakage
        self.segment_length = segment_length
        self.f_min = f_min
        self.f_max = f_max
        self.kT = kT
        self.friction = friction
        self.axis = axis
        self.start = start

    def _steps(self):
        """Validated (step_dt, every) of a scheme model; None for the continuous-process models."""
        if self.model in ("aliased", "blurred", "lorentzian"):
            return None
        if self.model not in SCHEMES:
            raise ValueError(f"model must be 'aliased', 'blurred', 'lorentzian' or one of {SCHEMES}, "
                             f"got {self.model!r}")
        dt = _positive_opt("dt", self.dt, allow_none=False)
        step = _positive_opt("step_dt", self.step_dt)
        every = self.every
        if every is None:
            every = 1 if step is None else round(dt / step)
        if isinstance(every, bool) or not isinstance(every, (int, np.integer)) or every < 1:
            raise ValueError(f"every must be an integer >= 1, got {self.every!r}")
        step = dt / every if step is None else step
        if not math.isclose(step * every, dt, rel_tol=1e-9):
            raise ValueError(f"dt = {dt!r} s must equal step_dt * every = {step!r} * {every!r}")
        return step, int(every)

    def _model(self, segment_length):
        """The model handed to :func:`fit_psd_model` (a name or a scheme's (names, shape))."""
        steps = self._steps()
        if steps is None:
            return self.model
        if self.leakage and segment_length is None:
            raise ValueError("leakage=True needs the segment length: set segment_length or use leakage=False")
        self.step_dt_, self.every_ = steps
        return scheme_model(self.model, *steps, segment_length if self.leakage else None)

    def fit(self, positions):
        self._steps()  # validate the options before reading the data
        kT = _positive_opt("kT", self.kT)
        gamma = _positive_opt("friction", self.friction)
        self._periodogram(positions)
        return self.fit_spectrum(self.frequencies_, self.psd_, self.psd_count_, kT, gamma)

    def fit_spectrum(self, f, P, count, kT=None, friction=None):
        """Fit given periodogram values (used by :meth:`fit`; also for expected spectra).

        Scheme models with leakage use the segment length of the last
        :meth:`fit`, else ``segment_length``.
        """
        self._shape = self._model(getattr(self, "segment_length_", None) or self.segment_length)
        r = fit_psd_model(f, P, count, self._shape, self.dt)
        (D, fc), cov = r["params"], r["covariance"]
        self.diffusion_, self.corner_frequency_ = D, fc
        self.diffusion_err_, self.corner_frequency_err_ = r["errors"]
        self.covariance_ = cov
        if friction is not None:
            self.stiffness_ = 2.0 * math.pi * friction * fc
            self.stiffness_err_ = 2.0 * math.pi * friction * self.corner_frequency_err_
        elif kT is not None:
            self.friction_ = kT / D
            self.friction_err_ = self.friction_ * self.diffusion_err_ / D
            self.stiffness_ = 2.0 * math.pi * fc * kT / D
            rel = cov[1, 1] / fc**2 + cov[0, 0] / D**2 - 2.0 * cov[0, 1] / (fc * D)
            self.stiffness_err_ = self.stiffness_ * math.sqrt(max(rel, 0.0))
        return self

    def predict(self, f):
        """Fitted two-sided PSD at frequencies f (Hz), m^2/Hz."""
        self._require_fitted("corner_frequency_")
        unit = (MODELS[self._shape] if isinstance(self._shape, str) else self._shape)[1]
        return self.diffusion_ * unit(np.asarray(f, dtype=float), (self.corner_frequency_,), self.dt, 0)


class OscillatorFit(_SpectrumFit):
    """Resonance frequency, quality factor and variance of a damped oscillator from its PSD.

    The model ignores spectral leakage: choose segments much longer than the
    ring-down time Q/(pi f0) (a resolution of f0/Q over 20 or finer), or Q is
    biased low.

    Parameters
    ----------
    dt : float, s; aliased : bool (alias-sum the model over ``n_alias`` images
    each side, for instantaneous samples); segment_length, f_min, f_max,
    axis, start as in :class:`LorentzianFit`; kT : float or None, J.

    Attributes (after fit)
    ----------------------
    resonance_frequency_, quality_factor_, variance_ and their ``*_err_``;
    with kT: stiffness_ = kT/variance_, mass_ = k/w0^2, friction_ = m w0/Q
    (and ``stiffness_err_``).
    """

    def __init__(self, dt, aliased=True, segment_length=None, f_min=None, f_max=None, kT=None,
                 n_alias=50, axis=None, start=0):
        self.dt = dt
        self.aliased = aliased
        self.segment_length = segment_length
        self.f_min = f_min
        self.f_max = f_max
        self.kT = kT
        self.n_alias = n_alias
        self.axis = axis
        self.start = start

    def fit(self, positions):
        kT = _positive_opt("kT", self.kT)
        self._periodogram(positions)
        model = "aliased-oscillator" if self.aliased else "oscillator"
        r = fit_psd_model(self.frequencies_, self.psd_, self.psd_count_, model, self.dt, self.n_alias)
        self.variance_, self.resonance_frequency_, self.quality_factor_ = r["params"]
        self.variance_err_, self.resonance_frequency_err_, self.quality_factor_err_ = r["errors"]
        self.covariance_ = r["covariance"]
        if kT is not None:
            w0 = 2.0 * math.pi * self.resonance_frequency_
            self.stiffness_ = kT / self.variance_
            self.stiffness_err_ = self.stiffness_ * self.variance_err_ / self.variance_
            self.mass_ = self.stiffness_ / w0**2
            self.friction_ = self.mass_ * w0 / self.quality_factor_
        return self

    def predict(self, f):
        """Fitted two-sided PSD at frequencies f (Hz), m^2/Hz."""
        self._require_fitted("resonance_frequency_")
        dt = self.dt if self.aliased else None
        return self.variance_ * _oscillator_unit(np.asarray(f, dtype=float), self.resonance_frequency_,
                                                 self.quality_factor_, dt, self.n_alias)
