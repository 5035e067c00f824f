"""langsim.theory against published formulas and worked values.

Worked values are those of the project's reference notes (shared/reference/check-values.md,
reproduced by check_values_calc.py); section numbers refer to them. Independent
cross-checks use scipy quadrature and numpy linear algebra.
"""
import math

import numpy as np
import pytest
from scipy import integrate
from scipy.linalg import solve_discrete_lyapunov

from langsim import theory as th
from langsim.units import k_B, stokes_friction, water_viscosity

KT = k_B * 298.15
GAMMA = stokes_friction(water_viscosity(298.15), 0.5e-6)  # a = 0.5 um, water 25 C (section 1)
D = KT / GAMMA
KAPPA = 1e-5


def test_ou_trap_worked_values():
    assert GAMMA == pytest.approx(8.38827e-9, rel=1e-6) and D == pytest.approx(4.90733e-13, rel=1e-6)
    # Section 4 table (Berg-Sorensen & Flyvbjerg 2004, Rev. Sci. Instrum. 75, 594)
    assert th.corner_frequency(KAPPA, GAMMA) == pytest.approx(189.7351, rel=1e-6)
    assert th.relaxation_time(GAMMA, KAPPA) == pytest.approx(0.83883e-3, rel=1e-5)
    assert th.equipartition_variance(KT, KAPPA) == pytest.approx(4.11640e-16, rel=1e-5)
    assert th.lorentzian_psd(0.0, 189.7351, D, one_sided=True) == pytest.approx(1.38118e-18, rel=1e-5)
    msd = th.ou_msd([1e-4, 1e-3, 1e-2], KT, KAPPA, GAMMA)
    np.testing.assert_allclose(msd, [9.25221e-17, 5.73357e-16, 8.23276e-16], rtol=1e-5)


def test_aliased_lorentzian_worked_values_and_alias_sum():
    fc = 189.7351
    f = np.array([1.0, fc, 250.0, 500.0])
    ratio = th.aliased_lorentzian_psd(f, fc, D, 1e-3) / th.lorentzian_psd(f, fc, D)
    np.testing.assert_allclose(ratio, [1.11572, 1.24728, 1.35570, 2.52994], rtol=1e-5)   # section 4
    assert th.aliased_lorentzian_psd(fc, fc, D, 1e-3) == pytest.approx(4.306793e-19, rel=1e-6)
    r5 = th.aliased_lorentzian_psd([fc, 2500.0], fc, D, 2e-4) / th.lorentzian_psd([fc, 2500.0], fc, D)
    np.testing.assert_allclose(r5, [1.00949, 2.46992], rtol=1e-5)
    n = np.arange(-200000, 200001)  # independent: the alias sum (BSF 2004)
    for fk in (3.0, 123.0, 480.0):
        assert th.aliased_lorentzian_psd(fk, fc, D, 1e-3) == pytest.approx(
            np.sum(th.lorentzian_psd(fk + n * 1e3, fc, D)), rel=1e-5)


def test_blur_factor_and_blurred_psd():
    tau = th.relaxation_time(GAMMA, KAPPA)
    vals = [th.blur_variance_factor(W, tau) for W in (1e-4, 1e-3, 5e-3)]
    np.testing.assert_allclose(vals, [0.961419, 0.697596, 0.279386], rtol=2e-6)  # table rounding; Wong & Halvorsen 2006
    W = 1e-3  # independent double integral of the averaged autocorrelation
    direct = 2 / W**2 * integrate.quad(lambda u: (W - u) * math.exp(-u / tau), 0, W)[0]
    assert th.blur_variance_factor(W, tau) == pytest.approx(direct, rel=1e-10)
    fc = th.corner_frequency(KAPPA, GAMMA)
    np.testing.assert_allclose(th.blurred_aliased_lorentzian_psd([10, 60, 100], fc, D, 1 / 200.),
                               [6.848922e-19, 5.391747e-19, 4.600678e-19], rtol=1e-6)  # Lansdorp & Saleh 2012
    np.testing.assert_allclose(th.blurred_aliased_lorentzian_psd([10, 300, 500], fc, D, 1e-3),
                               [6.884562e-19, 1.526709e-19, 0.7162632e-19], rtol=1e-6)
    # its integral over the band is the blurred variance (section 4)
    area = 2 * integrate.quad(lambda f: th.blurred_aliased_lorentzian_psd(f, fc, D, 1e-3), 0, 500)[0]
    assert area == pytest.approx(KT / KAPPA * th.blur_variance_factor(1e-3, tau), rel=1e-7)


def test_expected_periodogram_tends_to_aliased_lorentzian():
    fc, dt, N = 189.7351, 1e-4, 4096
    c = math.exp(-2 * math.pi * fc * dt)
    acov = KT / KAPPA * c ** np.arange(N)
    E = th.expected_periodogram(acov, dt)[1:]
    f = np.arange(1, N // 2 + 1) / (N * dt)
    # leakage is of relative order tau/(N dt) = 0.2 %
    np.testing.assert_allclose(E, th.aliased_lorentzian_psd(f, fc, D, dt), rtol=5e-3)


def test_underdamped_worked_values():
    m = 4 / 3 * math.pi * (0.5e-6) ** 3 * 2200.0                 # section 5, silica bead
    taup = m / GAMMA
    assert taup == pytest.approx(1.37325e-7, rel=1e-5)
    np.testing.assert_allclose(th.ornstein_furth_msd([0.1 * taup, taup, 10 * taup], KT, m, GAMMA),
                               [6.519856e-22, 4.958267e-20, 1.213023e-18], rtol=1e-5)
    # cantilever k = 0.1 N/m, f0 = 10 kHz, Q = 10, 295 K
    k, w0 = 0.1, 2 * math.pi * 1e4
    me = k / w0**2
    ge = me * w0 / 10
    kTc = k_B * 295.0
    assert me == pytest.approx(2.53303e-11, rel=1e-5) and ge == pytest.approx(1.59155e-7, rel=1e-5)
    assert th.quality_factor(k, me, ge) == pytest.approx(10.0, rel=1e-12)
    assert math.sqrt(th.oscillator_psd(0.0, kTc, k, me, ge)) == pytest.approx(509.21e-15, rel=1e-4)
    assert math.sqrt(th.oscillator_psd(1e4, kTc, k, me, ge)) == pytest.approx(5.0921e-12, rel=1e-4)
    for Q in (0.3, 10.0):  # integral kT/k for any Q (section 5), by quadrature
        g = me * w0 / Q
        area = integrate.quad(lambda u: th.oscillator_psd(1e4 * math.tan(u), kTc, k, me, g) * 1e4 / math.cos(u)**2,
                              0, math.pi / 2, limit=2000, epsrel=1e-10)[0]
        assert area == pytest.approx(kTc / k, rel=1e-7)


@pytest.mark.parametrize("Q", [0.2, 0.5, 3.0])
def test_oscillator_autocorrelation_is_fourier_transform_of_psd(Q):
    # Chandrasekhar 1943, Rev. Mod. Phys. 15, 1; checked by numerical inverse transform
    k, m = 1.0, 1.0
    g = math.sqrt(m * k) / Q
    for t in (0.3, 1.7):
        ft = integrate.quad(lambda f: th.oscillator_psd(f, 1.0, k, m, g), 0, np.inf, weight="cos",
                            wvar=2 * math.pi * t, limit=500)[0]
        assert th.oscillator_autocorrelation(t, 1.0, k, m, g) == pytest.approx(ft, rel=1e-6, abs=1e-9)


def test_ornstein_furth_equals_vacf_double_integral():
    # MSD(t) = 2 int_0^t (t - s) VACF(s) ds (section 5, derived)
    t = 2.5
    val = 2 * integrate.quad(lambda s: (t - s) * th.velocity_autocorrelation(s, 1.0, 2.0, 1.5), 0, t)[0]
    assert th.ornstein_furth_msd(t, 1.0, 2.0, 1.5) == pytest.approx(val, rel=1e-10)


def test_integrator_tables():
    # Section 6: EM and LM variances / (kT/kappa) at kappa dt/gamma = 0.01 .. 1.5
    for r, em in ((0.01, 1.005025125628), (0.1, 1.052631578947), (0.5, 1.333333333333),
                  (1.0, 2.0), (1.5, 4.0)):
        assert th.em_variance(1.0, 1.0, 1.0, r) == pytest.approx(em, rel=1e-11)
        assert th.lm_variance(1.0, 1.0, 1.0, r) == 1.0
    assert th.lm_lag1_autocorrelation(1.0, 1.0, 0.5) == 0.75
    for hw, gh, p2 in ((0.1, 0.1, 0.9975), (0.5, 0.5, 0.9375), (1.0, 10.0, 0.75), (1.5, 0.01, 0.4375),
                       (1.9, 2.0, 0.0975)):
        assert th.baoab_velocity_variance(1.0, 1.0, hw, stiffness=1.0) == pytest.approx(p2, rel=1e-12)
        assert th.baoab_position_variance(1.0, 1.0, 1.0, hw) == 1.0
        # independent: discrete Lyapunov solve of the BAOAB recursion with numpy/scipy
        c = math.exp(-gh)
        M = th.baoab_transition_matrix(1.0, 1.0, gh / hw, hw)
        B = np.array([[1, 0], [-hw / 2, 1]])
        A = np.array([[1, hw / 2], [0, 1]])
        Nn = B @ A @ np.array([[0.0], [math.sqrt(1 - c * c)]])
        S = solve_discrete_lyapunov(M, Nn @ Nn.T)
        assert S[0, 0] == pytest.approx(1.0, rel=1e-10) and S[1, 1] == pytest.approx(p2, rel=1e-10)
        lag3 = np.linalg.matrix_power(M, 3) @ S
        assert th.baoab_position_autocorrelation([3], 1.0, 1.0, gh / hw, hw)[0] == pytest.approx(lag3[0, 0], rel=1e-10)
    with pytest.raises(ValueError, match="unstable"):
        th.em_variance(1.0, 1.0, 1.0, 2.5)


def test_free_msd_of_schemes_tend_to_continuum():
    # BAOAB free MSD -> Ornstein-Furth and LM MSD -> 2Dt as dt -> 0 (section 5, derived)
    t = 1.3
    for h in (1e-2, 1e-3):
        n = round(t / h)
        err = abs(th.baoab_free_msd(n, 1.0, 1.0, 1.0, h) / th.ornstein_furth_msd(n * h, 1.0, 1.0, 1.0) - 1)
        assert err < 0.2 * h
    assert th.lm_free_msd(1, 1.0, 0.1) == pytest.approx(0.1)
    assert th.lm_free_msd(10, 1.0, 0.1) == pytest.approx(1.9)


def test_double_well_mfpt_and_kramers_values():
    # Section 7 (Hanggi, Talkner & Borkovec 1990): U = dU (x^4 - 2 x^2), kT = gamma = 1
    for dU, t0, t1, kod in ((5.0, 18.0952, 36.4835, 3.033142e-2), (8.0, 218.6489, 437.5044, 2.416180e-3)):
        U = lambda x, dU=dU: dU * (x**4 - 2 * x**2)  # noqa: E731
        assert th.mfpt(U, -1.0, 0.0, 1.0, 1.0) == pytest.approx(t0, rel=2e-6)
        assert th.mfpt(U, -1.0, 1.0, 1.0, 1.0) == pytest.approx(t1, rel=2e-6)
        assert th.mfpt(U, 1.0, -1.0, 1.0, 1.0) == pytest.approx(t1, rel=2e-6)   # mirror
        kmin, ktop = th.double_well_curvatures(dU, 2.0)
        assert th.kramers_rate_overdamped(kmin, ktop, 1.0, dU, 1.0) == pytest.approx(kod, rel=1e-6)
    # langsim's parametrisation with the minima at +-1 (L = 2) is the same potential
    assert th.mfpt(th.quartic_double_well(5.0, 2.0), -1.0, 1.0, 1.0, 1.0) == pytest.approx(36.4835, rel=2e-6)
    # a = 1 variant: MFPT 81.5797 (x_m^2 = sqrt 5)
    U1 = lambda x: x**4 - 2 * math.sqrt(5) * x**2  # noqa: E731
    xm = 5 ** 0.25
    assert th.mfpt(U1, -xm, xm, 1.0, 1.0) == pytest.approx(81.5797, rel=2e-6)


def test_underdamped_rate_table():
    # Section 7 underdamped table, dU = 5 kT, m = 1, x_m = 1 (Mel'nikov & Meshkov 1986)
    Ib = th.double_well_action(5.0, 2.0, 1.0)
    assert Ib == pytest.approx(5.962848, rel=1e-6)
    assert th.barrier_action(th.quartic_double_well(5.0, 2.0), -1.0, 0.0, 1.0) == pytest.approx(Ib, rel=1e-8)
    table = {0.01: (4.0442e-4, 6.7747e-3, 3.3039e-4, 1.7951e-4), 1.0: (4.0442e-2, 6.0663e-3, 5.5296e-3, 5.1161e-3),
             100.0: (4.0442, 3.0271e-4, 3.0271e-4, 3.0271e-4)}
    for G, (ked, ksd, kmm, ksym) in table.items():
        assert th.kramers_rate_energy_diffusion(40.0, 1.0, G, Ib, 5.0, 1.0) == pytest.approx(ked, rel=1e-4)
        assert th.kramers_rate_spatial_diffusion(40.0, 20.0, 1.0, G, 5.0, 1.0) == pytest.approx(ksd, rel=1e-4)
        assert th.kramers_rate_turnover(40.0, 20.0, 1.0, G, Ib, 5.0, 1.0) == pytest.approx(kmm, rel=1e-4)
        assert th.kramers_rate_turnover(40.0, 20.0, 1.0, G, Ib, 5.0, 1.0, True) == pytest.approx(ksym, rel=1e-4)
    assert th.melnikov_meshkov_factor(0.001) / 0.001 == pytest.approx(0.97428, rel=1e-4)
    assert th.transition_state_rate(math.sqrt(40), 5.0, 1.0) == pytest.approx(6.782311e-3, rel=1e-6)


def test_bad_inputs_name_the_argument():
    with pytest.raises(ValueError, match="stiffness"):
        th.corner_frequency(-1.0, 1.0)
    with pytest.raises(ValueError, match="friction"):
        th.ou_msd(1.0, 1.0, 1.0, 0.0)
    with pytest.raises(TypeError, match="potential"):
        th.mfpt(3.0, 0, 1, 1, 1)
    with pytest.raises(ValueError, match="scheme"):
        th.scheme_position_variance("rk4", 1, 1, 1, 0.1)


def test_mfpt_in_si_units_scales_with_xm2_gamma_over_kT():
    # same well in SI: times scale by x_m^2 gamma/kT (notes section 7, worked example)
    kT, gamma, L = 4.1e-21, 8.4e-9, 1e-6
    U = th.quartic_double_well(5 * kT, L)
    assert th.mfpt(U, -L / 2, L / 2, kT, gamma) == pytest.approx(36.4835 * (L / 2)**2 * gamma / kT, rel=2e-6)
