"""Blur, localization error and the diffusion estimators against published values.

Sources: check-values section 8 (Berglund 2010, PRE 82, 011917; Vestergaard, Blainey &
Flyvbjerg 2014, PRE 89, 022726: displacement moments, the covariance-based estimator and
its Monte Carlo table), section 13 (Wong & Halvorsen 2006, Opt. Express 14, 12517),
section 19 (Qian, Sheetz & Elson 1991, Biophys. J. 60, 910, with the sheet's Monte Carlo).
Synthetic tracks are drawn exactly from the joint Gaussian of (end point, exposure average)
of Brownian motion (check-values section 8), independent of the engine.
"""
import math

import numpy as np
import pytest
from scipy import integrate

from langsim.analysis import MSD, CovarianceDiffusion, InsufficientDataError, OptimalMSDFit, BlurredTrap
from langsim.analysis.diffusion import msd_point_covariance
from langsim.analysis.msd import msd_at_lags
from langsim.analysis.stats import blocking
from langsim.measurement import formulas as F

Z = 4.5


def blurred_tracks(rng, n_tracks, n_frames, D, dt, exposure, sigma, dims=1):
    """Positions (frames, tracks, dims): flat exposure [0, t_E] of each frame, exact Gaussian."""
    shape = (n_frames, n_tracks, dims)
    e1 = math.sqrt(2 * D * exposure) * rng.standard_normal(shape)          # B(t_E) - B(0)
    u = math.sqrt(2 * D * exposure / 12.0) * rng.standard_normal(shape)    # mean - (endpoints)/2
    e2 = math.sqrt(2 * D * (dt - exposure)) * rng.standard_normal(shape)
    start = np.concatenate([np.zeros((1,) + shape[1:]), np.cumsum(e1 + e2, axis=0)[:-1]])
    return start + e1 / 2 + u + sigma * rng.standard_normal(shape)


def test_blur_coefficients_of_shutters():
    # flat exposure: R = t_E/(6 Dt); flash: 0 (check-values section 8)
    assert F.blur_coefficient("flat", 1.0, 1.0) == pytest.approx(1 / 6)
    assert F.blur_coefficient("flat", 0.25, 1.0) == pytest.approx(1 / 24)
    assert F.blur_coefficient("strobe", 0.5, 1.0) == 0.0
    # pulse train: R = (1/Dt) int S(1 - S) dt of the staircase shutter, by quadrature
    for n, tE in ((1, 0.5), (3, 0.8), (7, 1.0)):
        S = lambda t: min(n, math.floor(t / tE * n + 0.5)) / n if t < tE else 1.0  # noqa: E731
        num = integrate.quad(lambda t: S(t) * (1 - S(t)), 0, 1.0, points=[tE * (k + .5) / n for k in range(n)],
                             limit=200)[0]
        assert F.blur_coefficient("pulses", tE, 1.0, pulses=n) == pytest.approx(num, rel=1e-7)
    # discrete taps: trapezoid over E steps gives (E^2/6 + 1/12)/(E P) and tends to the flat value
    for E, P in ((1, 1), (10, 10), (40, 100)):
        w, o = F.trapezoid_taps(E)
        assert F.tap_blur_coefficient(w, o, P) == pytest.approx((E * E / 6 + 1 / 12) / (E * P))
    w, o = F.trapezoid_taps(4000)
    assert F.tap_blur_coefficient(w, o, 4000) == pytest.approx(1 / 6, rel=1e-6)
    assert F.tap_blur_coefficient([1.0], [0], 50) == 0.0


def test_cve_variance_reproduces_the_published_table():
    # check-values section 8 table, "Var D formula" column: D = Dt = 1, sigma = 0.5, N = 200
    for R, published in ((1 / 6, 0.02849), (1 / 12, 0.03185), (1 / 24, 0.03375)):
        assert F.cve_variance(200, 1.0, 1.0, 0.25, R)[0] == pytest.approx(published, abs=6e-6)
        assert F.cve_variance_leading(200, 1.0, 1.0, 0.25, R) == pytest.approx(published, abs=6e-6)


@pytest.mark.parametrize("exposure", [1.0, 0.5, 0.25])
def test_displacement_moments_and_cve_against_monte_carlo(exposure):
    # check-values section 8 Monte Carlo table: D = Dt = 1, sigma = 0.5, N = 200 displacements per track
    rng = np.random.default_rng(81)
    n_tracks, N = 4000, 200
    x = blurred_tracks(rng, n_tracks, N + 1, 1.0, 1.0, exposure, 0.5)[:, :, 0]
    R = F.blur_coefficient("flat", exposure, 1.0)
    dx = np.diff(x, axis=0)
    m2 = np.mean(dx * dx, axis=0)
    c1 = np.mean(dx[1:] * dx[:-1], axis=0)
    s, c = F.displacement_moments(1.0, 1.0, 0.25, R)
    for per_track, pred in ((m2, s), (c1, c)):
        assert abs(per_track.mean() - pred) <= Z * per_track.std(ddof=1) / math.sqrt(n_tracks)
    D = m2 / 2 + c1
    s2 = R * m2 + (2 * R - 1) * c1
    var_d, var_s, _ = F.cve_variance(N, 1.0, 1.0, 0.25, R)
    assert abs(D.mean() - 1.0) <= Z * math.sqrt(var_d / n_tracks)
    assert abs(s2.mean() - 0.25) <= Z * math.sqrt(var_s / n_tracks)
    # variance of the estimates: standard error of a sample variance ~ var sqrt(2/(n-1)) (near-Gaussian)
    assert abs(D.var(ddof=1) - var_d) <= Z * var_d * math.sqrt(2 / (n_tracks - 1))
    assert abs(s2.var(ddof=1) - var_s) <= Z * var_s * math.sqrt(2 / (n_tracks - 1))
    # fails on a wrong blur coefficient: sigma^2 computed with R = 0 is far off
    wrong = (0 * m2 - c1).mean()
    assert abs(wrong - 0.25) > Z * math.sqrt(var_s / n_tracks)


@pytest.mark.parametrize("errors", ["tracks", "model"])
def test_estimators_errors_are_calibrated(errors):
    # 300 small data sets: about 68.3 % of estimates within one error bar (binomial sd 2.7 %)
    rng = np.random.default_rng(7 if errors == "tracks" else 8)
    D, dt, sigma, tE = 0.5e-12, 0.01, 30e-9, 0.01
    R = F.blur_coefficient("flat", tE, dt)
    hits = np.zeros(4)
    reps = 300
    for _ in range(reps):
        x = blurred_tracks(rng, 40, 60, D, dt, tE, sigma, dims=2)
        cve = CovarianceDiffusion(dt, blur=R, errors=errors).fit(x)
        msd = OptimalMSDFit(dt, blur=R, errors=errors, max_points=12).fit(x)
        hits += [abs(cve.diffusion_ - D) <= cve.diffusion_err_,
                 abs(cve.localization_variance_ - sigma**2) <= cve.localization_variance_err_,
                 abs(msd.diffusion_ - D) <= msd.diffusion_err_,
                 abs(msd.localization_variance_ - sigma**2) <= msd.localization_variance_err_]
    sd = math.sqrt(0.683 * 0.317 / reps)
    assert np.all(np.abs(hits / reps - 0.683) < Z * sd), hits / reps


def test_estimators_on_typical_tracking_data_and_wrong_input():
    # 200 tracks x 1000 frames in 2D (the data set of issue 10), full-frame exposure, 20 nm error
    rng = np.random.default_rng(3)
    D, dt, sigma = 0.4e-12, 0.01, 20e-9
    x = blurred_tracks(rng, 200, 1000, D, dt, dt, sigma, dims=2)
    R = 1 / 6
    for est in (CovarianceDiffusion(dt, blur=R), OptimalMSDFit(dt, blur=R)):
        est.fit(x)
        assert est.error_method_ == "tracks"
        assert abs(est.diffusion_ - D) <= Z * est.diffusion_err_
        assert abs(est.localization_variance_ - sigma**2) <= Z * est.localization_variance_err_
        # the same data with a wrong frame interval give a D that fails
        wrong = type(est)(2 * dt, blur=R).fit(x)
        assert abs(wrong.diffusion_ - D) > Z * wrong.diffusion_err_
    # gaps (NaN) split tracks and keep the estimate unbiased
    xg = x.copy()
    xg[rng.random(xg.shape[:2]) < 0.1] = np.nan
    g = CovarianceDiffusion(dt, blur=R).fit(xg)
    assert abs(g.diffusion_ - D) <= Z * g.diffusion_err_
    # per-axis estimates
    pa = CovarianceDiffusion(dt, blur=R, pool_axes=False).fit(x)
    assert pa.diffusion_.shape == (2,) and np.all(np.abs(pa.diffusion_ - D) <= Z * pa.diffusion_err_)


def test_msd_of_typical_tracking_data():
    # issue 10: MSD(...).fit raised "blocking found no plateau" on 200 tracks x 1000 frames
    rng = np.random.default_rng(5)
    D, dt = 0.4e-12, 0.01
    x = np.cumsum(math.sqrt(2 * D * dt) * rng.standard_normal((1000, 200, 2)), axis=0)
    m = MSD(dt).fit(x)
    # Einstein: MSD = 2 D t per axis (check-values section 8)
    assert np.all(np.abs(m.msd_at_error_lags_ - 2 * D * m.error_time_[:, None]) <= Z * m.msd_err_)
    wrong = msd_at_lags(1.2 * x, [10])
    assert np.all(np.abs(wrong[0] - 2 * D * 10 * dt) > Z * wrong[1])
    # few particles: blocking within the track; too short, the advice is in frames and honest
    with pytest.raises(InsufficientDataError) as e:
        msd_at_lags(x[:, :2], [10])
    assert e.value.required_length >= 2 * 990 + 10 and "frames" in str(e.value)


def test_blocking_advice_is_at_least_one_more_level():
    rng = np.random.default_rng(9)
    y = np.convolve(rng.standard_normal(1100), np.ones(100) / 10, mode="valid")[:990]
    with pytest.raises(InsufficientDataError) as e:
        blocking(y)
    assert e.value.required_length >= 2 * 990 and e.value.length == 990


def test_msd_point_covariance_against_qian_and_monte_carlo():
    # check-values section 19: 1D relative error of the time-averaged MSD, K = 1000 steps,
    # Monte Carlo of the sheet (4000 trajectories): 0.04411, 0.11807, 0.37923 at n = 1, 10, 100
    K = 1000
    C = msd_point_covariance([K + 1], 100, 2.0, 0.0)
    for n, mc in ((1, 0.04411), (10, 0.11807), (100, 0.37923)):
        rel = math.sqrt(C[n - 1, n - 1]) / ((K - n + 1) * 2.0 * n)
        assert abs(rel - mc) <= Z * mc / math.sqrt(2 * 4000)
    # exact covariance with blur and noise against a fresh Monte Carlo of S(n) totals
    rng = np.random.default_rng(11)
    R, sigma2 = 1 / 6, 0.3
    x = blurred_tracks(rng, 20000, 41, 1.0, 1.0, 1.0, math.sqrt(sigma2))[:, :, 0]
    S = np.array([np.sum((x[n:] - x[:-n]) ** 2, axis=0) for n in (1, 2, 5)])
    s, c = F.displacement_moments(1.0, 1.0, sigma2, R)
    C = msd_point_covariance([41], 5, s, c)[np.ix_([0, 1, 4], [0, 1, 4])]
    emp = np.cov(S)
    # standard error of a sample covariance of near-Gaussian totals: sqrt((C_ii C_jj + C_ij^2)/n)
    se = np.sqrt((np.outer(np.diag(C), np.diag(C)) + C * C) / S.shape[1])
    assert np.all(np.abs(emp - C) <= Z * se)
    assert not np.all(np.abs(emp - msd_point_covariance([41], 5, s, 0.0)[np.ix_([0, 1, 4], [0, 1, 4])])
                      <= Z * se)


def test_wong_halvorsen_values_and_blurred_trap():
    # check-values section 13 table (sigma^2 = tau = 1)
    for a, S, A in ((0.1, 0.967484, 1.000834), (1.0, 0.735759, 1.086161), (10.0, 0.180001, 220.2447)):
        assert F.wong_halvorsen_factor(a) == pytest.approx(S, abs=1e-6)
        assert F.wong_halvorsen_lag_factor(a) == pytest.approx(A, rel=1e-6)
    # PSD table: W = Dt = tau = 1 at f Dt = 0, 0.25, 0.5: 2.0, 0.4768117, 0.1515314
    assert F.blurred_trap_psd([0.0, 0.25, 0.5], 1.0, 1.0, 1.0, 1.0) == pytest.approx(
        [2.0, 0.4768117, 0.1515314], rel=1e-6)
    # exact OU on a fine grid, trapezoid exposure average (check-values s2_motion_blur.py method)
    rng = np.random.default_rng(13)
    kT, k, gamma = 4e-21, 1e-6, 1e-8
    tau = gamma / k
    W = tau
    sub, n_frames, n_part = 40, 400, 200
    h = W / sub
    cc = math.exp(-h / tau)
    sd = math.sqrt(kT / k * (1 - cc * cc))
    xs = math.sqrt(kT / k) * rng.standard_normal(n_part)
    frames = np.empty((n_frames, n_part))
    for f in range(n_frames):
        acc = 0.5 * xs
        for j in range(sub):
            xs = cc * xs + sd * rng.standard_normal(n_part)
            acc = acc + (xs if j < sub - 1 else 0.5 * xs)
        frames[f] = acc / sub
    est = BlurredTrap(kT, W, W, center=0.0).fit(frames)
    pred = kT / k * F.wong_halvorsen_factor(1.0)
    assert abs(est.variance_ - pred) <= Z * est.variance_err_
    assert abs(est.stiffness_ - k) <= Z * est.stiffness_err_
    assert abs(est.tau_ - tau) <= Z * est.tau_err_
    # naive equipartition over-states the stiffness by 1/S = 1.36 (check-values section 13): it fails
    assert abs(est.naive_stiffness_ - k) > Z * est.stiffness_err_


def test_optimal_number_of_msd_points():
    # Michalet 2010: the optimal number of points is 2 for small reduced localization error
    # x = sigma^2/(D Dt) and grows with x (quoted from memory). The variance of the slope-D for each
    # p, from the exact covariance of MSD points, against a Monte Carlo of 4000 single tracks (x = 3).
    rng = np.random.default_rng(17)
    D, dt, n_frames, P = 1.0, 1.0, 100, 12
    x = blurred_tracks(rng, 4000, n_frames, D, dt, 1e-12, math.sqrt(3.0))[:, :, 0]
    M = np.array([np.mean((x[n:] - x[:-n]) ** 2, axis=0) for n in range(1, P + 1)])
    s, c = F.displacement_moments(D, dt, 3.0, 0.0)
    C = msd_point_covariance([n_frames], P, s, c) / np.outer(n_frames - np.arange(1, P + 1),
                                                             n_frames - np.arange(1, P + 1))
    var_model, var_mc = [], []
    for p in range(2, P + 1):
        u, _ = OptimalMSDFit._line(p, dt)
        d_hat = u @ M[:p] / 2
        var_model.append(u @ C[:p, :p] @ u / 4)
        var_mc.append(d_hat.var(ddof=1))
        assert abs(var_mc[-1] - var_model[-1]) <= Z * var_model[-1] * math.sqrt(2 / 4000), p
    best = 2 + int(np.argmin(var_model))
    assert 3 <= best <= 8
    fits = [OptimalMSDFit(dt, blur=0.0).fit(blurred_tracks(rng, 50, 200, D, dt, 1e-12, math.sqrt(v))).n_points_
            for v in (0.01, 3.0, 30.0)]
    assert fits[0] == 2 and fits[0] < fits[1] < fits[2]
