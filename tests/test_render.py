"""Camera images: spots, photon and camera noise, streaks, against outside references.

Sources: check-values section 14 (pixel-integrated Gaussian of Smith et al. 2010, Nat.
Methods 7, 373; Cramer-Rao bound of Ober, Ram & Ward 2004, Biophys. J. 86, 1185, with the
sheet's numerical value; Mortensen et al. 2010, Nat. Methods 7, 377); scipy.stats for the
Poisson and Gamma laws; Sheppard's correction (W. F. Sheppard, Proc. Lond. Math. Soc. 29,
353 (1898)) for the second moment of a binned spot.
"""
import math

import numpy as np
import pytest
from scipy import special, stats

from langsim import config
from langsim.measurement import formulas as F
from langsim.measurement import render

Z = 4.5
K0, K1 = np.uint64(12345), np.uint64(678)


def camera(**kw):
    table = {"frame_rate": 100.0, "pixel_size": 100e-9, "image_shape": [15, 15], "psf_sigma": 120e-9,
             "photons": 1000.0, "background": 10.0, "gain": 1.0, "read_noise": 0.0, "baseline": 100.0}
    table.update(kw)
    return config.load({"seed": 1, "particles": {"dimensions": 2, "radius": 1e-7},
                        "dynamics": {"dt": 1e-3, "duration": 0.1}, "measurement": table}).measurement.camera


def test_counter_based_poisson_and_gamma_follow_scipy():
    for mu in (0.7, 5.0, 10.0, 37.0, 400.0):
        v = np.array([render.poisson(mu, K0, K1, 3, i, render.PHOTONS) for i in range(40000)])
        lo, hi = int(stats.poisson.ppf(1e-4, mu)), int(stats.poisson.ppf(1 - 1e-4, mu))
        edges = np.arange(lo, hi + 2) - 0.5
        obs = np.histogram(v, edges)[0]
        p = np.diff(stats.poisson.cdf(edges + 0.5 - 1, mu))
        exp = p / p.sum() * obs.sum()
        keep = exp > 5
        chi2 = np.sum((obs[keep] - exp[keep]) ** 2 / exp[keep])
        assert stats.chi2.sf(chi2, keep.sum() - 1) > 1e-5, mu
        # a wrong mean is detected by the same test
        p2 = np.diff(stats.poisson.cdf(edges + 0.5 - 1, mu * 1.05 + 0.3))
        e2 = p2 / p2.sum() * obs.sum()
        chi2w = np.sum((obs[keep] - e2[keep]) ** 2 / np.maximum(e2[keep], 1e-9))
        assert stats.chi2.sf(chi2w, keep.sum() - 1) < 1e-5, mu
    for shape in (0.5, 3.0, 200.0):
        g = np.array([render.gamma(shape, K0, K1, 1, i, render.EM_REGISTER) for i in range(20000)])
        assert stats.kstest(g, stats.gamma(shape).cdf).pvalue > 1e-4
        assert stats.kstest(g, stats.gamma(shape * 1.05).cdf).pvalue < 1e-4


def test_expected_spot_matches_the_pixel_integrated_gaussian():
    # check-values section 14: fractions along x for an emitter at a pixel centre, pixels -3..3
    cam = camera(image_shape=[7, 7])
    spots = np.array([[0.0, 0.0, 120e-9, 1000.0]])
    mu = render.render_frame(spots, cam, 0, (1, 2), noise=False)
    frac = np.array([0.016841, 0.087039, 0.232811, 0.323078, 0.232811, 0.087039, 0.016841])
    np.testing.assert_allclose((mu[3] - 10.0) / (1000 * frac[3]), frac, atol=2e-6)
    assert mu[3, 3] == pytest.approx(114.379240, abs=1e-5)     # the sheet's centre count
    np.testing.assert_allclose(mu, F.expected_spot(0, 0, 120e-9, 1000, 10, 100e-9, (7, 7), cam.origin),
                               rtol=1e-12)


def _ml_fit(img, cam, start):
    """Poisson maximum likelihood of (x, y, N, b) by Fisher scoring (Smith et al. 2010)."""
    a, s = cam.pixel_size, cam.psf_sigma
    rows, cols = img.shape
    ex0 = cam.origin[0] + a * np.arange(cols + 1)
    ey0 = cam.origin[1] + a * np.arange(rows + 1)
    th = np.array(start, dtype=float)
    g = lambda u: np.exp(-u * u / 2) / (math.sqrt(2 * math.pi) * s)  # noqa: E731
    for _ in range(30):
        ux, uy = (ex0 - th[0]) / s, (ey0 - th[1]) / s
        Ex, Ey = 0.5 * np.diff(special.erf(ux / math.sqrt(2))), 0.5 * np.diff(special.erf(uy / math.sqrt(2)))
        dEx, dEy = -np.diff(g(ux)), -np.diff(g(uy))
        mu = th[2] * np.outer(Ey, Ex) + th[3]
        d = np.stack([th[2] * np.outer(Ey, dEx), th[2] * np.outer(dEy, Ex), np.outer(Ey, Ex), np.ones_like(mu)])
        score = np.sum(d * (img / mu - 1.0), axis=(1, 2))
        info = np.einsum("pij,qij->pq", d, d / mu)
        step = np.linalg.solve(info, score)
        th = th + step
        if abs(step[0]) < 1e-13 and abs(step[1]) < 1e-13:
            break
    return th


def test_ml_spot_fit_reaches_the_cramer_rao_bound():
    # check-values section 14: s = 120 nm, a = 100 nm, N = 1000, b = 10: CRLB 25.9218 nm^2 at a
    # pixel centre (x, y, N, b unknown), Mortensen's MLE formula 25.9058 nm^2
    cam = camera()
    assert F.cramer_rao_bound(0, 0, 120e-9, 1000, 10, 100e-9, (41, 41), (-2.05e-6, -2.05e-6)) * 1e18 == \
        pytest.approx(25.921825, rel=1e-5)
    assert F.mortensen_mle_variance(120e-9, 100e-9, 1000, 10) * 1e18 == pytest.approx(25.905761, rel=1e-5)
    rng = np.random.default_rng(21)
    n_fit = 1000
    true = rng.uniform(-50e-9, 50e-9, (n_fit, 2))        # slow emitters: one spot each, anywhere in a pixel
    err = np.empty((n_fit, 2))
    crlb = np.empty(n_fit)
    for f in range(n_fit):
        img = render.render_frame(np.array([[true[f, 0], true[f, 1], 120e-9, 1000.0]]), cam, f, (7, 8))
        counts = img.astype(float) - cam.baseline
        th = _ml_fit(counts, cam, (0.0, 0.0, counts.sum() - 10 * counts.size, 10.0))
        err[f] = th[:2] - true[f]
        crlb[f] = F.cramer_rao_bound(true[f, 0], true[f, 1], 120e-9, 1000, 10, 100e-9, (15, 15), cam.origin)
    bound = crlb.mean()
    for a in range(2):
        assert abs(err[:, a].mean()) <= Z * math.sqrt(bound / n_fit)          # unbiased
        ratio = np.mean(err[:, a] ** 2) / bound
        # ML reaches the bound for N of a few hundred or more (Mortensen 2010): ratio 1 within the
        # standard error of a mean of squared Gaussians, sqrt(2/n)
        assert abs(ratio - 1.0) <= Z * math.sqrt(2.0 / n_fit), ratio
        # fails against the bound of a 4x dimmer spot (a wrong photon count in the image model)
        dim = F.cramer_rao_bound(0, 0, 120e-9, 250, 10, 100e-9, (15, 15), cam.origin)
        assert abs(np.mean(err[:, a] ** 2) / dim - 1.0) > Z * math.sqrt(2.0 / n_fit)


def test_spot_photons_and_background_are_poisson_with_camera_noise():
    n_frames = 400
    # total spot photons: window sum minus background has mean N and variance N + npix b (Poisson)
    cam = camera(image_shape=[31, 31])
    spots = np.array([[0.0, 0.0, 120e-9, 1000.0]])
    tot = np.array([render.render_frame(spots, cam, f, (3, 4)).astype(float).sum() for f in range(n_frames)])
    spot = tot - cam.baseline * 31 * 31 - 10.0 * 31 * 31
    inside = 1000.0 * math.erf(15.5 * 100 / (math.sqrt(2) * 120)) ** 2
    var = inside + 31 * 31 * 10.0
    assert abs(spot.mean() - inside) <= Z * math.sqrt(var / n_frames)
    assert abs(spot.var(ddof=1) / var - 1) <= Z * math.sqrt(2 / n_frames)
    assert abs(spot.mean() - 1.1 * inside) > Z * math.sqrt(var / n_frames)
    # background-only pixels: Poisson(b) (scipy.stats.poisson), mean = var = b
    empty = np.zeros((0, 4))
    cam = camera(image_shape=[64, 64], background=7.5)
    px = np.concatenate([render.render_frame(empty, cam, f, (5, 6)).astype(float).ravel() - 100 for f in range(20)])
    assert abs(px.mean() - 7.5) <= Z * math.sqrt(7.5 / px.size)
    assert abs(px.var() / 7.5 - 1) <= Z * math.sqrt(2 / px.size + 1 / (7.5 * px.size))
    assert stats.chisquare(*(lambda o, e: (o, e / e.sum() * o.sum()))(
        np.bincount(px.astype(int), minlength=40)[:25], stats.poisson.pmf(np.arange(25), 7.5))).pvalue > 1e-5
    # EM register (gain G, counts per photoelectron g): mean g b, variance 2 g^2 b + (g/G)^2 r^2 + 1/12
    # (excess noise factor F^2 = 2 at high gain: Mortensen et al. 2010; rounding: common practice)
    g, G, r = 3.0, 200.0, 50.0
    cam = camera(image_shape=[64, 64], background=7.5, gain=g, em_gain=G, read_noise=r, baseline=500.0)
    px = np.concatenate([render.render_frame(empty, cam, f, (5, 6)).astype(float).ravel() - 500 for f in range(20)])
    var = 2 * g * g * 7.5 + (g / G * r) ** 2 + 1 / 12
    assert abs(px.mean() - g * 7.5) <= Z * math.sqrt(var / px.size)
    kurt_se = math.sqrt(px.var() ** 2 * (stats.kurtosis(px) + 2) / px.size)   # SE of a sample variance
    assert abs(px.var() - var) <= Z * kurt_se
    assert abs(px.var() - var / 2) > Z * kurt_se        # no excess noise would be detected
    # saturation and bit depth
    cam = camera(image_shape=[8, 8], background=5000.0, bit_depth=12)
    assert render.render_frame(empty, cam, 0, (5, 6)).max() == 4095


def test_streak_second_moment_grows_with_speed_as_the_path_average_predicts():
    # along the motion: var = s^2 + a^2/12 (Sheppard) + the weighted variance of the path samples
    cam = camera(image_shape=[16, 160], pixel_size=50e-9, background=0.0)
    w = np.full(33, 1 / 32)
    w[0] = w[-1] = 1 / 64
    t = np.linspace(-0.5, 0.5, 33)
    cols = cam.origin[0] + 50e-9 * (np.arange(160) + 0.5)
    for speed in (0.0, 200e-9, 600e-9, 1500e-9):          # path length per exposure, m
        x = speed * t
        spots = np.column_stack([x, np.zeros(33), np.full(33, 120e-9), 5000.0 * w])
        mu = render.render_frame(spots, cam, 0, (1, 1), noise=False).sum(axis=0)
        m1 = np.sum(cols * mu) / mu.sum()
        var = np.sum((cols - m1) ** 2 * mu) / mu.sum()
        pred = 120e-9 ** 2 + 50e-9 ** 2 / 12 + np.sum(w * x * x)
        assert var == pytest.approx(pred, rel=2e-4)
        # noisy frames: mean of the frame-wise second moment within its standard error
        vals = []
        for f in range(200):
            img = render.render_frame(spots, cam, f, (9, 9)).astype(float).sum(axis=0) - cam.baseline * 16
            c1 = np.sum(cols * img) / img.sum()
            vals.append(np.sum((cols - c1) ** 2 * img) / img.sum())
        vals = np.array(vals)
        se = vals.std(ddof=1) / math.sqrt(vals.size)
        assert abs(vals.mean() - pred) <= Z * se + 0.01 * pred * 0   # estimator bias (N-1)/N below 1e-3
        if speed > 0:
            assert abs(vals.mean() - (120e-9 ** 2 + 50e-9 ** 2 / 12)) > Z * se   # a round spot would fail


def test_frames_are_pure_functions_of_the_counter():
    import numba
    cam = camera(image_shape=[64, 64], read_noise=2.0, em_gain=20.0)
    spots = np.array([[1e-7, -2e-7, 120e-9, 800.0]])
    a = render.render_frame(spots, cam, 5, (11, 12))
    prev = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        b = render.render_frame(spots, cam, 5, (11, 12))
    finally:
        numba.set_num_threads(prev)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, render.render_frame(spots, cam, 6, (11, 12)))
    assert not np.array_equal(a, render.render_frame(spots, cam, 5, (11, 13)))
