"""Analysis estimators on synthetic data with known answers.

Synthetic data (helpers below, also used by test_check.py): the exactly sampled
Ornstein-Uhlenbeck process in its AR(1) form x_{n+1} = c x_n + sqrt((1 - c^2) kT/kappa) xi_n,
c = exp(-kappa dt/gamma) (Norrelykke & Flyvbjerg 2011, Phys. Rev. E 83, 041103); numpy
Generator(PCG64(seed)) throughout.
"""
import math

import h5py
import numpy as np
import pytest
from scipy.signal import lfilter

from langsim.units import k_B

T = 298.15
KT = k_B * T
GAMMA = 8.38827e-9  # a = 0.5 um in water at 25 C (reference notes, section 1)


def rng(seed):
    return np.random.Generator(np.random.PCG64(seed))


def ou_series(seed, n, c, var, shape=()):
    """Stationary AR(1) series of length n with coefficient c and variance var."""
    g = rng(seed)
    xi = g.standard_normal((n,) + shape) * np.sqrt((1 - c * c) * var)
    x0 = g.standard_normal(shape) * np.sqrt(var)
    return lfilter([1.0], [1.0, -c], xi, axis=0, zi=(c * x0)[None, ...])[0]


class Traj:
    """Minimal trajectory: .time, .positions, .velocities, .config."""

    def __init__(self, positions, config, velocities=None):
        self.positions = positions
        self.velocities = velocities
        self.config = config
        dt = config["dynamics"]["dt"] * config["output"]["every"]
        self.time = np.arange(positions.shape[0]) * dt


def config(potential, dims=1, friction=GAMMA, dt=1e-5, steps=10**6, every=1, regime="overdamped",
           scheme="euler-maruyama", temperature=T, mass=None, count=1):
    return {"seed": 1,
            "particles": {"count": count, "dimensions": dims, "radius": 0.5e-6, "density": None, "mass": mass,
                          "friction": [friction] * dims, "initial": "equilibrium", "burn_in": 0.0},
            "medium": {"temperature": temperature, "viscosity": 0.89e-3},
            "potential": potential,
            "dynamics": {"regime": regime, "scheme": scheme, "dt": dt, "steps": steps, "duration": dt * steps},
            "output": {"every": every, "velocities": mass is not None, "precision": "double"}}


def harmonic_trajectory(seed, kappa=(1e-5, 2e-5), frames=2**17, particles=2, dt=2e-5, every=5,
                        center=(0.0, 1e-7)):
    """Euler-Maruyama data in a static anisotropic trap, sampled exactly.

    With a linear force, Euler-Maruyama is the AR(1) recursion
    x_{n+1} = a x_n + sqrt(2 kT dt/gamma) xi_n, a = 1 - kappa dt/gamma; recorded
    every `every` steps it is AR(1) with coefficient a^every and the stationary
    variance (kT/kappa)/(1 - kappa dt/(2 gamma)) (reference notes, section 6).
    """
    kappa = np.asarray(kappa, float)
    d = kappa.size
    pos = np.empty((frames, particles, d))
    for a in range(d):
        r = kappa[a] * dt / GAMMA
        var = KT / kappa[a] / (1 - r / 2)
        pos[:, :, a] = center[a] + ou_series(seed + a, frames, (1 - r) ** every, var, (particles,))
    pot = [{"type": "harmonic", "stiffness": list(kappa), "center": list(center[:d]), "velocity": [0.0] * d,
            "amplitude": [0.0] * d, "frequency": 0.0, "phase": 0.0}]
    cfg = config(pot, dims=d, dt=dt, steps=frames * every, every=every, scheme="euler-maruyama", count=particles)
    return pos, cfg


def double_well_sim(seed, particles=150, steps=60000, dt=2e-3, every=10, dU=5.0):
    """Leimkuhler-Matthews simulation of U = dU (x^4 - 2 x^2), kT = gamma = 1 (fast, numpy)."""
    g = rng(seed)
    x = np.where(g.random(particles) < 0.5, -1.0, 1.0)
    out = np.empty((steps // every, particles))
    s = math.sqrt(2 * dt)
    prev = g.standard_normal(particles)
    for i in range(steps):
        xi = g.standard_normal(particles)
        x = x - dt * dU * (4 * x**3 - 4 * x) + s * 0.5 * (xi + prev)
        prev = xi
        if (i + 1) % every == 0:
            out[(i + 1) // every - 1] = x
    return out


# ------------------------------------------------------------------- tests
from langsim import theory as th  # noqa: E402
from langsim.analysis import (MSD, BoltzmannTest, Equipartition, EscapeRate, InsufficientDataError,  # noqa: E402
                              LorentzianFit, NotFittedError, OscillatorFit, RelaxationStiffness, axis_moments,
                              blocking, integrated_autocorr_time, msd_direct, msd_fft, msd_at_lags)
from langsim.analysis import stats as st  # noqa: E402

Z = 4.5  # tolerance in standard errors
C, VAR = 0.8, 2.0


def within(meas, err, true, z=Z):
    return abs(meas - true) <= z * err


def test_autocorr_time_and_blocking_on_ar1():
    # AR(1): tau_int = (1 + c)/(1 - c) (common practice; Madras & Sokal 1988)
    x = ou_series(1, 200000, C, VAR)
    tau = integrated_autocorr_time(x)
    assert abs(tau / 9.0 - 1) < 4.5 * math.sqrt(2 * (2 * 5 * 9 + 1) / 200000)  # Sokal's variance of tau
    r = blocking(x)
    exact_se = math.sqrt(VAR * 9.0 / x.size)
    assert within(r.error, r.error_err, exact_se)
    with pytest.raises(InsufficientDataError) as e:
        integrated_autocorr_time(x[:200])
    assert e.value.required_length > 200 and e.value.estimate > 1


def test_blocking_too_short_reports_partial_estimate():
    x = ou_series(2, 300, 0.99, 1.0)
    with pytest.raises(InsufficientDataError) as e:
        blocking(x)
    assert e.value.required_length > 300 and e.value.estimate.error > 0


def test_equipartition_errors_are_calibrated():
    # 200 cheap repeats: about 68 % of estimates within 1 sigma (binomial sd 3.3 %)
    xs = ou_series(3, 4000, C, VAR, (200,))
    hits_v = hits_m = 0
    for j in range(200):
        m = axis_moments(xs[:, j])
        hits_v += abs(m["variance"] - VAR) <= m["variance_err"]
        hits_m += abs(m["mean"]) <= m["mean_err"]
    for h in (hits_v, hits_m):
        assert abs(h / 200 - 0.683) < 4.5 * math.sqrt(0.683 * 0.317 / 200)


def test_equipartition_stiffness_and_wrong_input(tmp_path, monkeypatch):
    kappa = np.array([1e-5, 3e-5])
    pos = np.stack([ou_series(10 + a, 50000, math.exp(-k * 1e-4 / GAMMA), KT / k, (3,))
                    for a, k in enumerate(kappa)], axis=-1)
    before = pos.copy()
    est = Equipartition(KT).fit(pos)
    np.testing.assert_array_equal(pos, before)  # input not mutated
    assert np.all(np.abs(est.stiffness_ - kappa) <= Z * est.stiffness_err_)
    wrong = Equipartition(KT).fit(1.3 * pos)  # a wrong trajectory is detected
    assert np.all(np.abs(wrong.stiffness_ - kappa) > Z * wrong.stiffness_err_)
    # an h5py dataset read in slices gives the same result as the array
    monkeypatch.setattr(st, "CHUNK_FRAMES", 4096)
    with h5py.File(tmp_path / "p.h5", "w") as f:
        f["x"] = pos
    with h5py.File(tmp_path / "p.h5", "r") as f:
        est2 = Equipartition(KT).fit(f["x"])
    np.testing.assert_allclose(est2.variance_, est.variance_, rtol=1e-10)


def test_estimator_api():
    est = Equipartition(KT)
    with pytest.raises(NotFittedError, match="Equipartition"):
        est._require_fitted("stiffness_")
    with pytest.raises(NotFittedError, match="LorentzianFit"):
        LorentzianFit(1e-4).predict([1.0])
    assert est.get_params() == {"kT": KT, "start": 0}
    with pytest.raises(ValueError, match="kT"):
        Equipartition(-1.0).fit(np.zeros(100))
    with pytest.raises(ValueError, match="positions"):
        Equipartition(KT).fit(np.zeros((5, 2, 2, 2)))


def test_msd_fft_matches_direct_and_ou_theory():
    x = ou_series(4, 3000, C, VAR, (2,))
    np.testing.assert_allclose(msd_fft(x, 300), msd_direct(x, 300), rtol=1e-9, atol=1e-12)
    dt = 1e-4
    k = 1e-5
    c = math.exp(-k * dt / GAMMA)
    pos = ou_series(5, 100000, c, KT / k, (4,))
    m = MSD(dt, max_lag=100).fit(pos)
    theo = th.ou_msd(m.error_time_, KT, k, GAMMA)
    assert np.all(np.abs(m.msd_at_error_lags_ - theo) <= Z * m.msd_err_)
    wrong = msd_at_lags(pos * 1.3, [8], 0)
    assert abs(wrong[0][0] - th.ou_msd(8 * dt, KT, k, GAMMA)) > Z * wrong[1][0]


def test_relaxation_stiffness():
    dt, k = 1e-4, 1e-5
    pos = ou_series(6, 100000, math.exp(-k * dt / GAMMA), KT / k, (2,))
    r = RelaxationStiffness(GAMMA, dt).fit(pos)
    assert within(r.stiffness_, r.stiffness_err_, k)
    r2 = RelaxationStiffness(GAMMA, 2 * dt).fit(pos)  # wrong frame interval
    assert not within(r2.stiffness_, r2.stiffness_err_, k)


def test_lorentzian_fit_recovers_trap_and_errors_are_calibrated():
    dt, k = 1e-4, 1e-5
    c = math.exp(-k * dt / GAMMA)
    fc = th.corner_frequency(k, GAMMA)
    pos = ou_series(7, 2**17, c, KT / k, (2,))
    fit = LorentzianFit(dt, kT=KT, segment_length=1024).fit(pos)
    assert within(fit.corner_frequency_, fit.corner_frequency_err_, fc)
    assert within(fit.diffusion_, fit.diffusion_err_, KT / GAMMA)
    assert within(fit.stiffness_, fit.stiffness_err_, k)
    assert within(fit.friction_, fit.friction_err_, GAMMA)
    bad = LorentzianFit(2 * dt, segment_length=1024).fit(pos)  # wrong dt
    assert not within(bad.corner_frequency_, bad.corner_frequency_err_, fc)
    xs = ou_series(8, 2**12, c, KT / k, (100,))
    hits = 0
    for j in range(100):
        f = LorentzianFit(dt, segment_length=256).fit(xs[:, j])
        hits += abs(f.corner_frequency_ - fc) <= f.corner_frequency_err_
    assert abs(hits / 100 - 0.683) < 4.5 * math.sqrt(0.683 * 0.317 / 100)


def exact_oscillator(seed, n, k, m, g, dt, particles=2):
    """Exactly sampled underdamped oscillator: x_{n+1} = E x_n + noise (Norrelykke & Flyvbjerg 2011)."""
    from scipy.linalg import expm
    A = np.array([[0.0, 1.0], [-k / m, -g / m]])
    E = expm(A * dt)
    S = np.diag([1.0 / k, 1.0 / m])  # kT = 1
    L = np.linalg.cholesky(S - E @ S @ E.T)
    gen = rng(seed)
    z = gen.standard_normal((n, particles, 2)) @ L.T
    out = np.empty((n, particles))
    s = gen.standard_normal((particles, 2)) * np.sqrt(np.diag(S))
    for i in range(n):
        s = s @ E.T + z[i]
        out[i] = s[:, 0]
    return out


def test_oscillator_fit_recovers_f0_q_and_stiffness():
    k, f0, Q = 1.0, 50.0, 5.0
    m = k / (2 * math.pi * f0) ** 2
    g = math.sqrt(m * k) / Q
    x = exact_oscillator(9, 2**14, k, m, g, 2e-3, particles=8)
    # segments long against the ring-down time Q/(pi f0), so leakage is negligible
    fit = OscillatorFit(2e-3, kT=1.0, segment_length=4096).fit(x)
    assert within(fit.resonance_frequency_, fit.resonance_frequency_err_, f0)
    assert within(fit.quality_factor_, fit.quality_factor_err_, Q)
    assert within(fit.stiffness_, fit.stiffness_err_, k)
    assert not within(fit.stiffness_ * 1.69, fit.stiffness_err_, k)


@pytest.fixture(scope="module")
def well():
    return double_well_sim(11)


def test_boltzmann_histogram_passes_and_fails_on_wrong_temperature(well):
    U = lambda x: 5.0 * (x**4 - 2 * x**2)  # noqa: E731
    ok = BoltzmannTest(U, 1.0, (-2.2, 2.2)).fit(well)
    assert ok.p_value_ > 1e-5
    assert BoltzmannTest(U, 1.2, (-2.2, 2.2)).fit(well).p_value_ < 1e-5
    assert BoltzmannTest(U, 1.0, (-2.2, 2.2)).fit(1.1 * well).p_value_ < 1e-5


def test_boltzmann_p_values_uniform_under_null():
    # Gaussian (harmonic) AR(1) data: the p-value should be uniform, P(p < 0.1) = 0.1
    xs = ou_series(12, 4000, 0.5, 1.0, (60,))
    U = lambda x: 0.5 * x * x  # noqa: E731
    p = np.array([BoltzmannTest(U, 1.0, (-9.0, 9.0), n_bins=6).fit(xs[:, j]).p_value_ for j in range(60)])
    assert abs(np.mean(p < 0.1) - 0.1) < 4.5 * math.sqrt(0.09 / 60)


def test_escape_rate_vs_exact_mfpt(well):
    # Exact MFPT minimum -> minimum at 5 kT: 36.4835 (Hanggi, Talkner & Borkovec 1990; notes section 7)
    e = EscapeRate(-1.0, 1.0, 2e-2).fit(well)
    assert e.n_events_ > 100
    assert within(e.rate_, e.rate_err_, 1 / 36.4835)
    assert e.rate_ci_[0] < e.rate_ < e.rate_ci_[1]
    bad = EscapeRate(-1.0, 1.0, 4e-2).fit(well)  # frame interval recorded doubled
    assert not within(bad.rate_, bad.rate_err_, 1 / 36.4835)


def test_core_set_counter_streams_like_dwell_times():
    # chunked one-pass counting equals per-particle dwell_times on the whole series, any chunking
    from langsim.analysis.escape import CoreSetCounter, dwell_times
    g = rng(14)
    for trial in range(60):
        n, p = int(g.integers(2, 300)), int(g.integers(1, 7))
        x = np.cumsum(g.normal(size=(n, p)), axis=0) * g.uniform(0.2, 2)
        lo, hi = -g.uniform(0, 2), g.uniform(0, 2)
        counter = CoreSetCounter(p, lo, hi)
        for blk in np.split(x, np.sort(g.integers(0, n, size=int(g.integers(0, 5))))):
            if blk.shape[0]:
                counter.feed(blk)
        r = counter.result()
        ref = [dwell_times(x[:, j], lo, hi) for j in range(p)]
        for k in ("dwell_a", "dwell_b"):
            assert sorted(r[k].tolist()) == sorted(np.concatenate([q[k] for q in ref]).tolist())
        for k in ("exposure_a", "exposure_b"):
            assert r[k] == sum(q[k] for q in ref)


class CountingFrames:
    """Array-like that counts the frames read through slicing."""

    def __init__(self, data):
        self.data, self.shape, self.read = data, data.shape, 0

    def __getitem__(self, key):
        out = self.data[key]
        self.read += out.shape[0]
        return out


def test_escape_rate_reads_each_frame_once(well):
    # linear in particles: one pass over the frames whatever the number of particles
    src = CountingFrames(well[:, :, None])
    e = EscapeRate(-1.0, 1.0, 2e-2).fit(src)
    assert src.read == well.shape[0]
    ref = EscapeRate(-1.0, 1.0, 2e-2).fit(well)
    assert e.rate_ == ref.rate_ and e.n_events_ == ref.n_events_


def test_escape_rate_telegraph_calibration():
    # two-state Markov chain, switching probability q per frame: rate -ln(1 - q)/dt exactly
    gen = rng(13)
    hits = 0
    q = 0.02
    for j in range(100):
        flips = gen.random((5000, 1)) < q
        x = np.where(np.cumsum(flips, axis=0) % 2 == 0, -1.0, 1.0)
        e = EscapeRate(-0.5, 0.5, 1.0).fit(x)
        hits += abs(e.rate_ - (-math.log(1 - q))) <= e.rate_err_
    assert abs(hits / 100 - 0.683) < 4.5 * math.sqrt(0.683 * 0.317 / 100)


# ------------------------------------------------ spectra of the discrete schemes
def scheme_series(scheme, seed, r, every, frames, particles):
    """Positions of an overdamped scheme in a harmonic trap, from its recursion (kT = kappa = 1).

    Euler-Maruyama x' = a x + sqrt(2 r) xi, Leimkuhler-Matthews x' = a x + sqrt(2 r)(xi + xi')/2,
    a = 1 - r, r = kappa dt/gamma (gamma = 1/dt in these units, so D = dt); recorded every `every` steps.
    The start is drawn from the stationary variance and the first 20 relaxation times are discarded.
    """
    g = rng(seed)
    burn = int(20 / r)
    steps = frames * every + burn
    xi = g.standard_normal((steps + 1, particles))
    noise = math.sqrt(2 * r) * (xi[1:] if scheme == "euler-maruyama" else 0.5 * (xi[1:] + xi[:-1]))
    x0 = g.standard_normal(particles) / math.sqrt(1 - r / 2)
    x = lfilter([1.0], [1.0, -(1 - r)], noise, axis=0, zi=((1 - r) * x0)[None])[0]
    return x[burn + every - 1::every]


def test_scheme_psd_is_the_exact_expected_periodogram():
    # references: the exact autocovariances (theory.scheme_position_autocovariance) through the
    # Fejer sum (theory.expected_periodogram), and theory.ar1_psd for the infinite record
    from langsim.analysis.spectra import scheme_psd
    kT, k, g, dt, N = 1.0, 1.0, 1.0 / 0.03, 1.0, 512  # r = kappa dt/gamma = 0.03
    fc, D = k / (2 * math.pi * g), kT / g
    for scheme in ("euler-maruyama", "leimkuhler-matthews"):
        for every in (1, 5):
            T = dt * every
            acov = th.scheme_position_autocovariance(scheme, np.arange(N), kT, k, g, dt, every)
            f = np.arange(1, N // 2 + 1) / (N * T)
            ref = th.expected_periodogram(acov, T)[1:]
            assert np.allclose(scheme_psd(f, fc, D, dt, every, scheme, N), ref, rtol=1e-9)
            assert not np.allclose(scheme_psd(f, 1.01 * fc, D, dt, every, scheme, N), ref, rtol=1e-3)
            c = (1 - k * dt / g) ** every
            inf = th.ar1_psd(f[:-1], acov[0], c, T, acov[1] / acov[0] / c)
            assert np.allclose(scheme_psd(f[:-1], fc, D, dt, every, scheme), inf, rtol=1e-9)
            # fitted to its own exact expectation, the ML fit returns the physical (f_c, D): no bias
            fit = LorentzianFit(T, model=scheme, every=every, segment_length=N).fit_spectrum(f, ref, 100)
            assert abs(fit.corner_frequency_ / fc - 1) < 1e-6 and abs(fit.diffusion_ / D - 1) < 1e-6


@pytest.mark.parametrize("scheme", ["euler-maruyama", "leimkuhler-matthews"])
@pytest.mark.parametrize("every", [1, 5])
def test_scheme_fit_recovers_physical_corner_frequency_and_D(scheme, every):
    # r = kappa dt/gamma per step; 20 frames per relaxation time in both cases (units kT = kappa = 1)
    r = 0.05 if every == 1 else 0.01
    dt = 1.0
    fc, D = r / (2 * math.pi * dt), r  # f_c = kappa/(2 pi gamma), D = kT/gamma with gamma = dt/r
    x = scheme_series(scheme, 40 + every, r, every, 2**15, 8)
    T = dt * every
    # LM recorded every step has a spectral zero at Nyquist: fit below half of it (see checks._psd_rows)
    f_max = 0.25 / T if (scheme, every) == ("leimkuhler-matthews", 1) else None
    fit = LorentzianFit(T, model=scheme, step_dt=dt, segment_length=4096, f_max=f_max, friction=dt / r).fit(x)
    assert fit.every_ == every
    assert within(fit.corner_frequency_, fit.corner_frequency_err_, fc)
    assert within(fit.diffusion_, fit.diffusion_err_, D)
    assert within(fit.stiffness_, fit.stiffness_err_, 1.0)
    assert not within(fit.corner_frequency_, fit.corner_frequency_err_, 0.8 * fc)
    assert not within(fit.diffusion_, fit.diffusion_err_, 0.9 * D)
    if (scheme, every) == ("leimkuhler-matthews", 1):  # the continuous-process model is far off here
        old = LorentzianFit(T, segment_length=4096).fit(x)
        assert old.corner_frequency_ < 0.7 * fc
    with pytest.raises(ValueError, match="step_dt"):
        LorentzianFit(T, model=scheme, step_dt=0.3 * dt, every=every).fit(x)


def baoab_series(seed, k, m, g, kT, h, every, frames, chains):
    """Positions of BAOAB (B A O A B, exact O step) in U = k q^2/2, recorded every `every` steps.

    Started from the exact stationary law of the full-step state: q ~ N(0, kT/k),
    v ~ N(0, (kT/m)(1 - w0^2 h^2/4)) independent (Leimkuhler & Matthews 2013, derived).
    """
    r = rng(seed)
    w2, c = k / m, math.exp(-g * h / m)
    s = math.sqrt((1 - c * c) * kT / m)
    q = r.standard_normal(chains) * math.sqrt(kT / k)
    v = r.standard_normal(chains) * math.sqrt(kT / m * (1 - w2 * h * h / 4))
    out = np.empty((frames, chains))
    for i in range(frames):
        for _ in range(every):
            v -= 0.5 * h * w2 * q
            q += 0.5 * h * v
            v = c * v + s * r.standard_normal(chains)
            q += 0.5 * h * v
            v -= 0.5 * h * w2 * q
        out[i] = q
    return out


CANT = dict(k=0.1, m=2.53303e-11, g=1.59155e-7, kT=k_B * 295.15, h=1e-6, every=5)  # configs/cantilever.toml


def test_baoab_psd_is_the_exact_expected_periodogram():
    # reference: var (M^n)_00 from theory.baoab_position_autocorrelation (matrix powers) through the
    # Fejer sum theory.expected_periodogram (derived, exact)
    from langsim.analysis.spectra import baoab_model, baoab_psd, fit_psd_model
    k, m, g, kT, h, every = CANT.values()
    f0, Q, var, T, N = math.sqrt(k / m) / (2 * math.pi), math.sqrt(k * m) / g, kT / k, h * every, 512
    ref = th.expected_periodogram(var * th.baoab_position_autocorrelation(np.arange(N) * every, k, m, g, h), T)[1:]
    f = np.arange(1, N // 2 + 1) / (N * T)
    assert np.allclose(baoab_psd(f, f0, Q, var, h, every, N), ref, rtol=1e-9, atol=0)
    assert not np.allclose(baoab_psd(f, f0, 1.01 * Q, var, h, every, N), ref, rtol=1e-3, atol=0)
    # infinite record: the N -> infinity limit of the leakage-included form (leakage falls as 1/N)
    inf = baoab_psd(f, f0, Q, var, h, every)
    e20, e22 = (np.max(np.abs(baoab_psd(f, f0, Q, var, h, every, n) / inf - 1)) for n in (2**20, 2**22))
    assert e22 < 2e-3 and 3.5 < e20 / e22 < 4.5
    # fitted to its own exact expectation, the ML fit returns the configured (var, f0, Q): no bias
    r = fit_psd_model(f, ref, 100, baoab_model(h, every, N))
    assert np.allclose(r["params"], [var, f0, Q], rtol=1e-6)


def test_baoab_fit_recovers_f0_q_and_stiffness():
    from langsim.analysis.spectra import baoab_model, segment_averaged_periodogram, fit_psd_model
    k, m, g, kT, h, every = CANT.values()
    f0, Q = math.sqrt(k / m) / (2 * math.pi), math.sqrt(k * m) / g
    x = baoab_series(21, k, m, g, kT, h, every, 2**14, 32)
    f, P, n = segment_averaged_periodogram(x, h * every, 2**13)
    keep = f <= 2 * f0  # band used by checks._baoab_psd_rows
    r = fit_psd_model(f[keep], P[keep], n, baoab_model(h, every, 2**13), start=(0.9 * f0, 5.0), tol=1e-8)
    (var, f0m, Qm), (ve, fe, Qe) = r["params"], r["errors"]
    assert within(f0m, fe, f0) and within(Qm, Qe, Q)
    assert within(kT / var, kT / var * ve / var, k)
    assert not within(Qm, Qe, 0.9 * Q) and not within(kT / var, kT / var * ve / var, 0.9 * k)
    assert not within(f0m, fe, 1.01 * f0)
