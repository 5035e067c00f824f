"""Position detector: photodiode filter, spectrum model, recovered sensitivity.

Sources: Berg-Sorensen, Oddershede, Florin & Flyvbjerg 2003, J. Appl. Phys. 93, 3167 (the
photodiode's power response alpha^2 + (1 - alpha^2)/(1 + (f/f_3dB)^2)); scipy.signal for the
Butterworth response; Berg-Sorensen & Flyvbjerg 2004, Rev. Sci. Instrum. 75, 594 (maximum-
likelihood fit of averaged periodograms, gamma distributed).
"""
import math

import numpy as np
import pytest
from scipy import signal

import langsim
from langsim import config
from langsim.analysis.spectra import segment_averaged_periodogram
from langsim.measurement import detector as det_mod

Z = 4.5
KT = 1.380649e-23 * 295.15


def _cfg(steps=100_000, count=40, **det):
    d = {"sampling_rate": 20_000.0, "sensitivity": 1.0e6, "filter": "photodiode", "diode_frequency": 8.0e3,
         "diode_fraction": 0.3, "noise": 1.0e-5, "anti_alias_cutoff": 8.0e3, "adc_bits": 16, "adc_range": 10.0}
    d.update(det)
    # a 1 um bead (friction 9.4e-9 kg/s), stiffness 1e-5 N/m: f_c = 170 Hz; detector values typical of [1]
    # (f_3dB ~ 8 kHz, alpha ~ 0.3 for a 1064 nm laser on silicon; quoted from memory)
    return {"seed": 31, "particles": {"count": count, "dimensions": 1, "friction": 9.4e-9},
            "potential": [{"type": "harmonic", "stiffness": 1e-5}],
            "dynamics": {"dt": 1e-5, "steps": steps}, "measurement": {"detector": d}}


def test_photodiode_response_is_the_published_filter():
    spec = config.load(_cfg())
    model = det_mod.DetectorModel(spec.measurement.detector, 1, 1, spec.dynamics.dt, spec.seed)
    f = np.array([10.0, 1e3, 4e3, 8e3, 2e4])
    a, f3 = 0.3, 8e3
    published = a * a + (1 - a * a) / (1 + (f / f3) ** 2)
    _, h = signal.sosfreqz(model.sos, worN=f, fs=1e5)
    # the step-rate filter approaches the continuous one as f dt -> 0 (error O(f dt))
    assert np.allclose(model.response_detector_only(f), published, rtol=2 * np.pi * f * 1e-5 + 1e-9)
    assert np.allclose(model.response(f), model.response_detector_only(f) * np.abs(h) ** 2, rtol=1e-9)


def test_detector_signal_spectrum_and_sensitivity():
    cfg = _cfg()
    spec = config.load(cfg)
    traj = langsim.run(cfg, progress=False)
    x = np.asarray(traj.positions)
    m = det_mod.DetectorModel(spec.measurement.detector, x.shape[1], 1, spec.dynamics.dt, spec.seed)
    sig = np.concatenate([m.process(0, x[:37_000]), m.process(37_000, x[37_000:])])   # chunked
    whole = det_mod.DetectorModel(spec.measurement.detector, x.shape[1], 1, spec.dynamics.dt, spec.seed)
    np.testing.assert_array_equal(sig, whole.process(0, x))                               # chunk-independent
    assert sig.shape == (20_001, 40, 1)
    # langsim check reports the sensitivity recovered with the detector model
    traj.measured = {"signal": sig}
    rows = {r.quantity: r for r in langsim.check(traj).rows}
    assert rows["detector sensitivity x"].status == "pass" and rows["detector corner frequency x"].status == "pass"
    traj.measured = {"signal": 1.03 * sig}
    assert {r.quantity: r for r in langsim.check(traj).rows}["detector sensitivity x"].status == "fail"
    interval = m.sampling_interval
    skip = 200                                       # anti-alias and photodiode settling (< 1 ms)
    N = 2048
    f, P, count = segment_averaged_periodogram(sig[skip:, :, 0], interval, N)
    keep = f > 20.0
    gamma, k = 9.4e-9, 1e-5
    D = KT / gamma

    def model(ff, fc, A):
        volts = lambda h: A / D * det_mod.em_trap_psd(h, KT, 2 * math.pi * fc * gamma, gamma, 1e-5)  # noqa: E731
        return det_mod.expected_periodogram(lambda g: m.spectrum(g, volts), N, interval)[keep]
    r = det_mod.fit_sensitivity(f[keep], P[keep], count, model, D, (150.0, 1e12 * D))
    fc = k / (2 * math.pi * gamma)
    assert abs(r["corner_frequency"] - fc) <= Z * r["corner_frequency_err"]
    assert abs(r["sensitivity"] - 1.0e6) <= Z * r["sensitivity_err"]
    # a calibration that ignores the photodiode filter is biased: it fails
    plain = det_mod.DetectorModel(config.load(_cfg(filter="none")).measurement.detector, 40, 1, 1e-5, 31)

    def naive(ff, fc, A):
        volts = lambda h: A / D * det_mod.em_trap_psd(h, KT, 2 * math.pi * fc * gamma, gamma, 1e-5)  # noqa: E731
        return det_mod.expected_periodogram(lambda g: plain.spectrum(g, volts), N, interval)[keep]
    w = det_mod.fit_sensitivity(f[keep], P[keep], count, naive, D, (150.0, 1e12 * D))
    assert abs(w["sensitivity"] - 1.0e6) > Z * w["sensitivity_err"] or \
        abs(w["corner_frequency"] - fc) > Z * w["corner_frequency_err"]
