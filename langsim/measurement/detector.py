"""A position detector for traps: volts through sensitivity, filters, noise, sampling and an ADC.

Chain, per particle, evaluated at the step rate 1/dt on the positions of every step:

1. volts u = M x, M = diag(sensitivity) (1 + cross_talk) (V/m; rows are output channels);
2. the detector's own response:
   - ``first-order``: a low-pass of 3 dB frequency ``cutoff``, y_k = a y_{k-1} + (1 - a) u_k,
     a = exp(-2 pi cutoff dt);
   - ``photodiode``: the silicon photodiode of Berg-Sorensen et al. [1]: a fraction
     alpha (``diode_fraction``) of the signal is instantaneous, the rest arrives
     through a first-order low-pass at f_3dB (``diode_frequency``), impulse response
     alpha delta(t) + (1 - alpha) 2 pi f_3dB exp(-2 pi f_3dB t), whose power response
     is exactly their |H|^2 = alpha^2 + (1 - alpha^2)/(1 + (f/f_3dB)^2);
3. electronic noise: white, one-sided density ``noise`` (V/sqrt(Hz)), i.e. variance
   noise^2/(2 dt) per step;
4. an anti-aliasing Butterworth low-pass of order ``anti_alias_order`` at
   ``anti_alias_cutoff`` (scipy.signal.butter, second-order sections at the step rate);
5. sampling every ``sampling_steps`` steps;
6. an ADC of ``adc_bits`` over +- ``adc_range`` V: rounding to the nearest code, clipping.

Each filter is a discrete filter at the step rate with carried state, so the
output does not depend on how the run is chunked, and :meth:`Detector.spectrum`
is the exact expected spectrum of the sampled signal for an Euler-Maruyama
trap (transfer functions of the same discrete filters, aliasing by the
decimation sum, quantization as white noise of q^2/12). The noise is
counter-based on the measurement stream (key, step, channel).

References
----------
.. [1] K. Berg-Sorensen, L. Oddershede, E.-L. Florin, H. Flyvbjerg, "Unintended
       filtering in a typical photodiode detection system for optical tweezers",
       J. Appl. Phys. 93, 3167 (2003).
.. [2] K. Berg-Sorensen, H. Flyvbjerg, Rev. Sci. Instrum. 75, 594 (2004).
"""
import math

import numpy as np
from numba import njit
from scipy import optimize, signal

from ..kernels.noise import box_muller, philox4x64
from . import render

#: Purpose of the detector's electronic noise variates.
DETECTOR_NOISE = 20


@njit(cache=True)
def _noise(k0, k1, step0, n_steps, n_channels, scale, out):
    for s in range(n_steps):
        st = np.uint64(step0 + s)
        for c in range(0, n_channels, 2):
            w0, w1, w2, w3 = philox4x64(st, np.uint64(c // 2), render.counter_word(DETECTOR_NOISE, 0),
                                        render.STREAM_TAG, k0, k1)
            z0, z1 = box_muller(w0, w1)
            out[s, c] += scale * z0
            if c + 1 < n_channels:
                out[s, c + 1] += scale * z1


class DetectorModel:
    """Streams every-step positions into detector samples (``measured/signal``, V).

    Parameters
    ----------
    detector : langsim.measurement.spec.Detector
    n_particles, dims : int
    dt : float, s
    seed : int
    """

    def __init__(self, detector, n_particles, dims, dt, seed, spawn_key=()):
        self.det = detector
        self.n, self.d, self.dt = int(n_particles), int(dims), float(dt)
        self.M = detector.matrix(self.d)
        key = render.measurement_key(seed, spawn_key)
        self.k0, self.k1 = np.uint64(key[0]), np.uint64(key[1])
        self.sos = None
        if detector.anti_alias_cutoff is not None:
            self.sos = signal.butter(detector.anti_alias_order, detector.anti_alias_cutoff, fs=1.0 / dt,
                                     output="sos")
        self.reset()

    @property
    def sampling_interval(self):
        return self.det.sampling_steps * self.dt

    def _lowpass_coefficient(self):
        f = self.det.cutoff if self.det.filter == "first-order" else self.det.diode_frequency
        return math.exp(-2.0 * math.pi * f * self.dt)

    def reset(self):
        ch = self.n * self.d
        self.step = 0
        self.lp = None                               # low-pass state (first value sets it)
        self.zi = None                               # anti-alias state (steady state of the first value)

    def state(self):
        """Filter states as arrays of fixed shapes (a checkpoint slot keeps its shape), with
        flags saying whether each has been set by a first value."""
        ch = self.n * self.d
        n_sos = 0 if self.sos is None else self.sos.shape[0]
        return {"step": np.array(self.step),
                "lp_set": np.array(float(self.lp is not None)),
                "lp": np.zeros(ch) if self.lp is None else self.lp.copy(),
                "zi_set": np.array(float(self.zi is not None)),
                "zi": np.zeros((n_sos, 2, ch)) if self.zi is None else self.zi.copy()}

    def restore(self, state):
        self.step = int(state["step"])
        self.lp = np.array(state["lp"], dtype=float) if float(state["lp_set"]) else None
        self.zi = np.array(state["zi"], dtype=float) if float(state["zi_set"]) else None

    def process(self, step0, positions):
        """Samples (k, particles, dims) V from the positions of steps step0 .. step0 + len - 1."""
        if step0 != self.step:
            raise ValueError(f"steps must come in order: expected step {self.step}, got {step0}")
        x = np.asarray(positions, dtype=np.float64)
        k = x.shape[0]
        u = np.einsum("ab,knb->kna", self.M, x).reshape(k, -1)
        det = self.det
        if det.filter in ("first-order", "photodiode"):
            a = self._lowpass_coefficient()
            if self.lp is None:
                self.lp = u[0].copy()                # start in the steady state of the first value
            y, zf = signal.lfilter([1.0 - a], [1.0, -a], u, axis=0, zi=(a * self.lp)[None, :])
            self.lp = y[-1].copy()
            if det.filter == "photodiode":
                y = det.diode_fraction * u + (1.0 - det.diode_fraction) * y
            u = y
        if det.noise > 0:
            u = np.ascontiguousarray(u)
            _noise(self.k0, self.k1, np.int64(step0), k, u.shape[1], det.noise / math.sqrt(2.0 * self.dt), u)
        if self.sos is not None:
            if self.zi is None:
                self.zi = signal.sosfilt_zi(self.sos)[:, :, None] * u[0][None, None, :]
            u, self.zi = signal.sosfilt(self.sos, u, axis=0, zi=self.zi)
        first = (-step0) % det.sampling_steps
        v = u[first::det.sampling_steps]
        if det.adc_bits is not None:
            q = 2.0 * det.adc_range / 2 ** det.adc_bits
            v = np.clip(np.round(v / q) * q, -det.adc_range, det.adc_range - q)
        self.step = step0 + k
        return v.reshape(-1, self.n, self.d)

    # ------------------------------------------------------------ spectra
    def response(self, f):
        """Power response |H(f)|^2 of detector filter x anti-alias filter at the step rate (f in Hz)."""
        f = np.asarray(f, dtype=float)
        z = np.exp(-2j * math.pi * f * self.dt)
        H = np.ones_like(z)
        det = self.det
        if det.filter in ("first-order", "photodiode"):
            a = self._lowpass_coefficient()
            lp = (1.0 - a) / (1.0 - a * z)
            H = lp if det.filter == "first-order" else det.diode_fraction + (1.0 - det.diode_fraction) * lp
        p = np.abs(H) ** 2
        if self.sos is not None:
            p = p * np.abs(self._sos_response(z)) ** 2
        return p

    def _sos_response(self, z):
        h = np.ones_like(z)
        for b0, b1, b2, a0, a1, a2 in self.sos:
            h = h * (b0 + b1 * z + b2 * z * z) / (a0 + a1 * z + a2 * z * z)
        return h

    def spectrum(self, f, channel_psd):
        """Expected two-sided PSD (V^2/Hz) of the sampled signal of one channel.

        channel_psd(f) is the step-rate PSD of that channel's volts before the filters
        (e.g. sensitivity^2 times the position spectrum); returns the decimation sum of
        response x channel_psd + filtered electronic noise, plus the ADC's q^2/12.
        """
        f = np.asarray(f, dtype=float)
        M = self.det.sampling_steps
        fs = 1.0 / self.sampling_interval
        total = np.zeros_like(f)
        noise = 0.5 * self.det.noise ** 2           # two-sided density of the white electronic noise
        for m in range(M):
            fm = f + m * fs
            resp = self.response(fm)
            total += resp * channel_psd(fm)
            if noise > 0:                            # the noise enters after the detector's filter
                total += noise * resp / self.response_detector_only(fm)
        if self.det.adc_bits is not None:
            q = 2.0 * self.det.adc_range / 2 ** self.det.adc_bits
            total += q * q / 12.0 * self.sampling_interval
        return total

    def response_detector_only(self, f):
        """|H|^2 of the detector's own filter alone (noise enters after it)."""
        f = np.asarray(f, dtype=float)
        z = np.exp(-2j * math.pi * f * self.dt)
        det = self.det
        if det.filter == "none":
            return np.ones_like(f)
        a = self._lowpass_coefficient()
        lp = (1.0 - a) / (1.0 - a * z)
        H = lp if det.filter == "first-order" else det.diode_fraction + (1.0 - det.diode_fraction) * lp
        return np.abs(H) ** 2


def em_trap_psd(f, kT, stiffness, friction, dt):
    """Step-rate two-sided PSD (m^2/Hz) of an Euler-Maruyama trapped coordinate (AR(1), exact)."""
    a = 1.0 - stiffness * dt / friction
    var = kT / stiffness / (1.0 - stiffness * dt / (2.0 * friction))
    w = 2.0 * math.pi * np.asarray(f, dtype=float) * dt
    return dt * var * (1.0 - a * a) / (1.0 - 2.0 * a * np.cos(w) + a * a)


def expected_periodogram(psd, segment_length, interval, oversample=8):
    """Exact expectation of a segment periodogram (leakage included) from a PSD function.

    The autocovariance is the inverse transform of ``psd`` on a grid ``oversample``
    times finer than the segment's, then :func:`langsim.theory.expected_periodogram`.
    Returns E[P_k] for k = 1 .. N//2.
    """
    from .. import theory
    N = int(segment_length)
    L = oversample * N
    fg = np.fft.rfftfreq(L, interval)
    acov = np.fft.irfft(psd(fg), L)[:N] / interval
    return theory.expected_periodogram(acov, interval)[1:N // 2 + 1]


def fit_sensitivity(f, P, count, model, D, start):
    """ML fit of (corner frequency, amplitude A) of a detector spectrum; sensitivity sqrt(A/D).

    ``model(f, fc, A)`` is the expected PSD; the periodogram values P (averages of
    ``count`` periodograms) are gamma distributed [2]. Returns a dict with
    ``corner_frequency``, ``sensitivity`` and their errors (Fisher information).
    """
    f, P = np.asarray(f, float), np.asarray(P, float)
    n = np.broadcast_to(np.asarray(count, dtype=float), f.shape)

    def nll(th):
        m = model(f, math.exp(th[0]), math.exp(th[1]))
        if not np.all(np.isfinite(m)) or np.any(m <= 0):
            return np.inf
        return float(np.sum(n * (np.log(m) + P / m)))
    res = optimize.minimize(nll, np.log(start), method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-10, "maxiter": 4000})
    th = res.x
    grads = []
    for i in range(2):
        h = 1e-5
        tp, tm = th.copy(), th.copy()
        tp[i] += h
        tm[i] -= h
        grads.append((np.log(model(f, *np.exp(tp))) - np.log(model(f, *np.exp(tm)))) / (2 * h))
    g = np.array(grads)
    cov = np.linalg.inv((g * n) @ g.T)
    fc, A = np.exp(th)
    s = math.sqrt(A / D)
    return {"corner_frequency": fc, "corner_frequency_err": fc * math.sqrt(cov[0, 0]),
            "amplitude": A, "sensitivity": s, "sensitivity_err": 0.5 * s * math.sqrt(cov[1, 1])}
