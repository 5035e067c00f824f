"""The measurement stage on runs of the engine: blur moments, blurred traps, blinking, drift.

Exposure averages are computed here from every-step positions
(langsim.measurement.stage.reference_frames), the reference that the engine's in-kernel
recorder matches bit for bit (tests/test_measurement_run.py). Sources: check-values section 8 (displacement moments with the blur
coefficient R, Berglund 2010 and Vestergaard et al. 2014; R of the recorder's taps derived
in langsim.measurement.formulas), section 13 (Wong & Halvorsen 2006), the two-state Markov
chain's stationary law and exponential survival (common practice).
"""
import math

import numpy as np
import pytest

import langsim
from langsim import config
from langsim.analysis import BlurredTrap, CovarianceDiffusion, OptimalMSDFit
from langsim.measurement import formulas as F
from langsim.measurement.stage import MeasurementStage, measure

Z = 4.5
KT = 1.380649e-23 * 295.15


def free_run(exposure_steps, sigma, n=200, frames=400, period=10, seed=17):
    cfg = {"seed": seed, "particles": {"count": n, "dimensions": 2, "friction": 1e-8},
           "dynamics": {"dt": 1e-3, "steps": frames * period},
           "measurement": {"frame_rate": 1.0 / (period * 1e-3), "exposure": exposure_steps * 1e-3,
                           "localization_error": sigma}}
    spec = config.load(cfg)
    traj = langsim.run(cfg, progress=False)
    return spec, measure(np.asarray(traj.positions), spec.measurement, spec.seed)


@pytest.mark.parametrize("exposure_steps", [10, 4])
def test_displacement_moments_of_blurred_noisy_free_diffusion(exposure_steps):
    sigma, D = 30e-9, KT / 1e-8
    spec, out = free_run(exposure_steps, sigma)
    m = spec.measurement
    R = m.blur                                   # exact R of the trapezoid taps (module notes)
    dt = m.frame_interval
    dx = np.diff(out["positions"], axis=0)       # (frames-1, particles, 2)
    per_var = np.mean(dx * dx, axis=(0, 2))
    per_cov = np.mean(dx[1:] * dx[:-1], axis=(0, 2))
    s, c = F.displacement_moments(D, dt, sigma**2, R)
    n = per_var.size
    assert abs(per_var.mean() - s) <= Z * per_var.std(ddof=1) / math.sqrt(n)
    assert abs(per_cov.mean() - c) <= Z * per_cov.std(ddof=1) / math.sqrt(n)
    # without blur (R = 0) the lag-1 covariance would be -sigma^2: detected
    assert abs(per_cov.mean() - F.displacement_moments(D, dt, sigma**2, 0.0)[1]) > \
        Z * per_cov.std(ddof=1) / math.sqrt(n)
    # the estimators recover D and sigma^2
    for est in (CovarianceDiffusion(dt, blur=R), OptimalMSDFit(dt, blur=R)):
        est.fit(out["positions"])
        assert abs(est.diffusion_ - D) <= Z * est.diffusion_err_
        assert abs(est.localization_variance_ - sigma**2) <= Z * est.localization_variance_err_
    np.testing.assert_allclose(out["time"], np.arange(out["time"].size) * dt)


def test_blurred_trap_variance_against_wong_halvorsen():
    # overdamped trap, flat exposure = frame interval = tau_c (alpha = 1: S = 0.7358, check-values s13)
    k, g, dt = 1e-6, 1e-8, 1e-4
    tau = g / k                                  # 10 ms = 100 steps
    cfg = {"seed": 5, "particles": {"count": 300, "dimensions": 1, "friction": g},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"dt": dt, "steps": 100 * 150},
           "measurement": {"frame_rate": 1.0 / tau, "exposure": tau}}
    spec = config.load(cfg)
    traj = langsim.run(cfg, progress=False)
    out = measure(np.asarray(traj.positions), spec.measurement, spec.seed)
    x = out["true_positions"][:, :, 0]
    v = np.mean(x * x, axis=0)
    se = v.std(ddof=1) / math.sqrt(v.size)
    # exact for the recorder's taps on the Euler-Maruyama chain (derived), and its dt -> 0 limit, W&H
    a = 1 - k * dt / g
    w, o = spec.measurement.exposure_taps()
    exact = F.tap_average_autocovariance([0], w, o, 100, KT / k / (1 - k * dt / (2 * g)), a)[0]
    wh = KT / k * F.wong_halvorsen_factor(1.0)
    assert abs(exact - wh) < 0.5 * se            # discretisation well below the resolution
    assert abs(v.mean() - wh) <= Z * se
    assert abs(v.mean() - KT / k) > Z * se       # the unblurred variance kT/k fails
    est = BlurredTrap(KT, tau, tau, center=0.0).fit(x)
    assert abs(est.stiffness_ - k) <= Z * est.stiffness_err_
    traj.measured = out                          # langsim check: blurred variance and stiffness rows
    rows = {r.quantity: r for r in langsim.check(traj).rows}
    assert rows["blurred variance x"].status == "pass" and rows["stiffness x (blurred trap)"].status == "pass"
    traj.measured = dict(out, true_positions=1.05 * out["true_positions"])
    assert {r.quantity: r for r in langsim.check(traj).rows}["blurred variance x"].status == "fail"


def test_blinking_bleaching_drift_and_localization_error():
    n, frames = 2000, 60
    m = config.load({"seed": 2, "particles": {"count": n, "dimensions": 2, "friction": 1e-8},
                     "dynamics": {"dt": 1e-3, "steps": frames * 10},
                     "measurement": {"frame_rate": 100.0, "exposure": 0.005, "localization_error": [10e-9, 40e-9],
                                     "on_rate": 20.0, "off_rate": 60.0, "photons": 500.0,
                                     "drift_velocity": [1e-6, 0.0], "drift_jitter": 5e-9}}).measurement
    true = np.zeros((frames, n, 2))
    out = MeasurementStage(m, n, 2, 2).process(0, true)
    # stationary on-probability on/(on + off) = 1/4 (two-state Markov chain)
    frac = out["photons"] / 500.0
    p = frac.mean()
    se = frac.mean(axis=0).std(ddof=1) / math.sqrt(n)
    assert abs(p - 0.25) <= Z * se and abs(p - 0.3) > Z * se
    assert np.all(np.isnan(out["positions"][~out["on"]]))
    # localization error: reported - true - drift is N(0, sigma^2) per axis
    err = (out["positions"] - out["drift"][:, None, :])[out["on"]]
    for a, s in enumerate((10e-9, 40e-9)):
        var = np.mean(err[:, a] ** 2)
        assert abs(var / s**2 - 1) <= Z * math.sqrt(2 / err.shape[0])
    # drift: velocity times the exposure middle plus a random walk of 5 nm per frame (y: walk only)
    t_mid = np.arange(frames) * 0.01 + 0.0025
    walk = out["drift"] - np.outer(t_mid, [1e-6, 0.0])
    assert np.all(np.abs(np.diff(walk, axis=0)) < 6 * 5e-9)
    assert walk[0].tolist() == [0.0, 0.0]
    # bleaching only: survival exp(-rate t) of the emitters (frames every 10 ms, rate 5/s)
    mb = config.load({"seed": 2, "particles": {"count": n, "dimensions": 2, "friction": 1e-8},
                      "dynamics": {"dt": 1e-3, "steps": frames * 10},
                      "measurement": {"frame_rate": 100.0, "exposure": 0.01, "bleach_rate": 5.0,
                                      "photons": 100.0}}).measurement
    ob = MeasurementStage(mb, n, 2, 9).process(0, true)
    alive = ob["on"][-1].mean()                  # on during the last exposure: not bleached at its start
    pred = math.exp(-5.0 * 0.01 * (frames - 1))
    assert abs(alive - pred) <= Z * math.sqrt(pred * (1 - pred) / n)


def test_stage_state_round_trip_is_bit_identical():
    # a checkpoint keeps the stage's state; resuming from it gives the same bits, images included
    n, frames = 30, 12
    m = config.load({"seed": 4, "particles": {"count": n, "dimensions": 2, "friction": 1e-8},
                     "dynamics": {"dt": 1e-3, "steps": frames * 10},
                     "measurement": {"frame_rate": 100.0, "exposure": 0.008, "localization_error": 10e-9,
                                     "on_rate": 10.0, "off_rate": 10.0, "bleach_rate": 1.0,
                                     "intensity_spread": 0.3, "drift_jitter": 2e-9, "photons": 800.0,
                                     "pixel_size": 100e-9, "image_shape": [32, 32], "psf_sigma": 130e-9,
                                     "background": 5.0, "read_noise": 1.0, "em_gain": 10.0}}).measurement
    rng = np.random.default_rng(0)
    avg = rng.uniform(-1.5e-6, 1.5e-6, (frames, n, 2))
    path = avg[:, None] + 1e-8 * rng.standard_normal((frames, m.path_samples, n, 2))
    whole = MeasurementStage(m, n, 2, 4).process(0, avg, path)
    first = MeasurementStage(m, n, 2, 4)
    a = first.process(0, avg[:5], path[:5])
    second = MeasurementStage(m, n, 2, 4)
    second.restore(first.state())
    b = second.process(5, avg[5:], path[5:])
    for name in whole:
        np.testing.assert_array_equal(whole[name], np.concatenate([a[name], b[name]]), err_msg=name)
    assert whole["images"].dtype == np.uint16 and whole["images"].shape == (frames, 32, 32)
    with pytest.raises(ValueError, match="in order"):
        second.process(3, avg[:1], path[:1])


def test_check_rows_of_a_measured_run():
    # langsim.check on a run with a camera: displacement moments, estimators, background photons
    cfg = {"seed": 23, "particles": {"count": 30, "dimensions": 2, "friction": 1e-8,
                                     "initial": {"box": [[-4e-6, 4e-6], [-4e-6, 4e-6]]}},
           "dynamics": {"dt": 1e-3, "steps": 5000},
           "measurement": {"frame_rate": 100.0, "exposure": 0.006, "localization_error": 25e-9,
                           "drift_velocity": [3e-7, 0.0], "photons": 1500.0, "pixel_size": 100e-9,
                           "image_shape": [128, 128], "psf_sigma": 100e-9, "background": 4.0, "gain": 2.0,
                           "read_noise": 1.2}}
    traj = langsim.run(cfg, progress=False)          # the engine records group measured
    report = langsim.check(traj)
    keys = {r.quantity: r for r in report.rows}
    for q in ("displacement variance x", "displacement lag-1 covariance y", "D (covariance estimator)",
              "localization variance (optimal MSD fit)", "background mean", "background variance",
              "spot photons (isolated emitters)"):
        assert keys[q].status == "pass", (q, keys[q])
    spot = keys["spot photons (isolated emitters)"]
    traj.measured = dict(traj.measured, photons=1.05 * traj.measured["photons"])   # a wrong photon record
    assert {r.quantity: r for r in langsim.check(traj).rows}["spot photons (isolated emitters)"].status == "fail"
    traj.measured = dict(traj.measured, photons=traj.measured["photons"] / 1.05)
    assert spot.error < 0.01 * spot.predicted
    # a wrong localization error in the file is caught
    traj.measured = dict(traj.measured, positions=traj.measured["positions"] + 25e-9 * np.random.default_rng(
        1).standard_normal(traj.measured["positions"].shape))
    bad = {r.quantity: r for r in langsim.check(traj).rows}
    assert bad["displacement variance x"].status == "fail"
    assert bad["localization variance (covariance estimator)"].status == "fail"
    for a in "xy":      # MSD offset 2 sigma^2 (check-values section 8): passes on the run, fails here
        assert keys[f"localization MSD offset {a}"].status == "pass", keys[f"localization MSD offset {a}"]
        assert bad[f"localization MSD offset {a}"].status == "fail"


def test_engine_adapter_in_chunks_with_a_checkpoint_matches_one_pass():
    # what the engine will do: recorder frames and every-step positions in bursts, a checkpoint
    # (state arrays) in the middle, a fresh adapter restored from it; the output must be bit-identical
    from langsim.measurement.stage import EngineAdapter, reference_frames
    cfg = {"seed": 12, "particles": {"count": 10, "dimensions": 2, "friction": 1e-8},
           "potential": [{"type": "harmonic", "stiffness": 1e-7}],
           "dynamics": {"dt": 1e-4, "steps": 2000},
           "measurement": {"frame_rate": 500.0, "exposure": 0.0016, "localization_error": 5e-9, "photons": 300.0,
                           "on_rate": 50.0, "off_rate": 50.0, "pixel_size": 100e-9, "image_shape": [24, 24],
                           "psf_sigma": 120e-9, "background": 2.0,
                           "detector": {"sampling_rate": 2000.0, "sensitivity": 1e6, "filter": "photodiode",
                                        "diode_frequency": 1000.0, "diode_fraction": 0.4, "noise": 1e-6,
                                        "anti_alias_cutoff": 800.0}}}
    spec = config.load(cfg)
    x = np.asarray(langsim.run({k: v for k, v in cfg.items() if k != "measurement"}, progress=False).positions)
    avg, path = reference_frames(x, spec.measurement)
    one = EngineAdapter(spec)
    assert {r["name"] for r in one.recorders()} == {"true_positions", "path", "detector_positions"}
    assert one.layout(2000)["measured"][0] == avg.shape[0] == 100
    whole = one.frames({"true_positions": avg, "path": path}, 0)
    sig = one.detector(0, x)
    a = EngineAdapter(spec)
    first = a.frames({"true_positions": avg[:4], "path": path[:4]}, 0)
    s1 = a.detector(0, x[:777])
    b = EngineAdapter(spec)
    b.restore({k: np.array(v) for k, v in a.state().items()})      # as read back from a checkpoint
    second = b.frames({"true_positions": avg[4:], "path": path[4:]}, 4)
    s2 = b.detector(777, x[777:])
    for name in whole:
        np.testing.assert_array_equal(whole[name], np.concatenate([first[name], second[name]]), err_msg=name)
    np.testing.assert_array_equal(sig, np.concatenate([s1, s2]))
    assert sig.shape == (2001 // 5 + 1, 10, 2)
