"""Closed-form predictions and quadratures for Langevin dynamics.

Nothing here simulates. Every function takes SI quantities and returns SI
quantities; ``kT`` is a thermal energy k_B T in J, ``friction`` a friction
coefficient gamma in kg/s, ``stiffness`` a spring constant in N/m, ``mass`` in
kg, times in s and frequencies f in Hz (angular frequencies are named omega).
Spectral densities are per Hz; "two-sided" densities integrate over
-inf < f < inf to the variance, "one-sided" ones (twice as large) over f >= 0.

Contents: equipartition; the overdamped harmonic trap (Ornstein-Uhlenbeck
process) with its aliased and motion-blurred spectra; the underdamped free
particle and damped oscillator; exact stationary statistics of the discrete
schemes the engine implements, at finite time step, for harmonic forces; exact
mean first-passage times of overdamped diffusion by quadrature, in 1D and for
isotropic wells in 2D and 3D, from a point or from the start basin's Boltzmann
density; Kramers-type escape rates and the Gaussian well's asymptotes (for
information, with their expected errors); helpers for the quartic double well.

References
----------
.. [1] K. Berg-Sorensen, H. Flyvbjerg, "Power spectrum analysis for optical
       tweezers", Rev. Sci. Instrum. 75, 594 (2004).
.. [2] S. F. Norrelykke, H. Flyvbjerg, "Harmonic oscillator in heat bath:
       exact simulation of time-lapse-recorded data and exact analytical
       benchmark statistics", Phys. Rev. E 83, 041103 (2011).
.. [3] W. P. Wong, K. Halvorsen, "The effect of integration time on
       fluctuation measurements: calibrating an optical trap in the presence
       of motion blur", Opt. Express 14, 12517 (2006).
.. [4] B. M. Lansdorp, O. A. Saleh, "Power spectrum and Allan variance
       methods for calibrating single-molecule video-tracking instruments",
       Rev. Sci. Instrum. 83, 025115 (2012).
.. [5] G. E. Uhlenbeck, L. S. Ornstein, "On the theory of the Brownian
       motion", Phys. Rev. 36, 823 (1930).
.. [6] S. Chandrasekhar, "Stochastic problems in physics and astronomy",
       Rev. Mod. Phys. 15, 1 (1943).
.. [7] B. Leimkuhler, C. Matthews, "Rational construction of stochastic
       numerical methods for molecular sampling", Appl. Math. Res. Express
       2013(1) (2013).
.. [8] P. Hanggi, P. Talkner, M. Borkovec, "Reaction-rate theory: fifty
       years after Kramers", Rev. Mod. Phys. 62, 251 (1990).
.. [9] V. I. Mel'nikov, S. V. Meshkov, "Theory of activated rate processes:
       exact solution of the Kramers problem", J. Chem. Phys. 85, 1018 (1986).
.. [10] V. I. Mel'nikov, "The Kramers problem: fifty years of development",
        Phys. Rep. 209, 1 (1991).
.. [11] H. Nyquist, "Thermal agitation of electric charge in conductors",
        Phys. Rev. 32, 110 (1928); J. B. Johnson, Phys. Rev. 32, 97 (1928).
.. [12] M. Planck (1900); H. B. Callen, T. A. Welton, Phys. Rev. 83, 34 (1951)
        (mean energy of a quantum oscillator with its zero point; from memory).

Exact finite-step results for the schemes ([D] below) were derived by solving
the linear recursions (2x2 discrete Lyapunov equations) and cross-checked
numerically; they are tabulated in the project's reference notes.
"""
import math

import numpy as np
from scipy import integrate, optimize

from .units import hbar, k_B

__all__ = [
    "thermal_energy", "equipartition_variance", "velocity_variance",
    "relaxation_time", "corner_frequency", "diffusion_coefficient",
    "ou_autocorrelation", "ou_msd", "free_msd",
    "lorentzian_psd", "aliased_lorentzian_psd", "blur_variance_factor",
    "blurred_aliased_lorentzian_psd", "ar1_psd", "expected_periodogram",
    "ornstein_furth_msd", "velocity_autocorrelation", "quality_factor",
    "oscillator_psd", "oscillator_autocorrelation", "slowest_relaxation_rate",
    "em_variance", "em_lag1_autocorrelation", "lm_variance",
    "lm_lag1_autocorrelation", "baoab_position_variance",
    "baoab_velocity_variance", "baoab_transition_matrix",
    "baoab_position_autocorrelation", "baoab_free_msd", "lm_free_msd",
    "scheme_position_variance", "scheme_position_autocovariance",
    "mfpt", "mfpt_equilibrium", "mfpt_radial", "mfpt_radial_equilibrium", "radial_survival",
    "gaussian_well_langer_time", "gaussian_well_separable_time", "gaussian_well_separable_error",
    "transition_state_rate", "kramers_rate_overdamped",
    "kramers_rate_spatial_diffusion", "kramers_rate_energy_diffusion",
    "barrier_action", "melnikov_meshkov_factor", "kramers_rate_turnover",
    "quartic_double_well", "double_well_curvatures", "double_well_action",
    "cold_damping_temperature", "quantum_ratio", "planck_energy_ratio", "planck_mean_energy",
    "circuit_voltage_psd",
]


def _positive(name, value):
    """Return ``value`` as float after checking that it is finite and > 0."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name} must be a positive number, got {value!r}") from None
    if not math.isfinite(v) or v <= 0.0:
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}")
    return v


def _times(name, t):
    t = np.asarray(t, dtype=float)
    if not np.all(np.isfinite(t)):
        raise ValueError(f"{name} must be finite, got {t!r}")
    return t


# --------------------------------------------------------------- equipartition
def thermal_energy(temperature):
    """k_B T in J for ``temperature`` in K (k_B exact, SI 2019)."""
    return k_B * _positive("temperature", temperature)


def equipartition_variance(kT, stiffness):
    """Position variance kT/kappa of a harmonic degree of freedom, m^2."""
    return _positive("kT", kT) / _positive("stiffness", stiffness)


def velocity_variance(kT, mass):
    """Velocity variance kT/m per Cartesian component, (m/s)^2."""
    return _positive("kT", kT) / _positive("mass", mass)


# ------------------------------------------------------ overdamped harmonic trap
def relaxation_time(friction, stiffness):
    """Relaxation time tau = gamma/kappa of an overdamped trap, s."""
    return _positive("friction", friction) / _positive("stiffness", stiffness)


def corner_frequency(stiffness, friction):
    """Corner frequency f_c = kappa/(2 pi gamma), Hz [1]."""
    return _positive("stiffness", stiffness) / (2.0 * math.pi * _positive("friction", friction))


def diffusion_coefficient(kT, friction):
    """Einstein diffusion coefficient D = kT/gamma per dimension, m^2/s."""
    return _positive("kT", kT) / _positive("friction", friction)


def ou_autocorrelation(t, kT, stiffness, friction):
    """Position autocovariance <x(t)x(0)> = (kT/kappa) exp(-|t|/tau), m^2 [2]."""
    t = _times("t", t)
    tau = relaxation_time(friction, stiffness)
    return equipartition_variance(kT, stiffness) * np.exp(-np.abs(t) / tau)


def ou_msd(t, kT, stiffness, friction):
    """Mean-squared displacement per dimension in a harmonic trap, m^2.

    MSD(t) = (2 kT/kappa)(1 - exp(-|t|/tau)): 2 D t for t << tau, plateau
    2 kT/kappa [2].
    """
    t = _times("t", t)
    tau = relaxation_time(friction, stiffness)
    return 2.0 * equipartition_variance(kT, stiffness) * -np.expm1(-np.abs(t) / tau)


def free_msd(t, diffusion):
    """Free diffusion MSD per dimension 2 D |t| (Einstein 1905), m^2."""
    return 2.0 * _positive("diffusion", diffusion) * np.abs(_times("t", t))


def lorentzian_psd(f, fc, diffusion, one_sided=False):
    """Lorentzian PSD of a continuously observed trapped particle, m^2/Hz.

    Two-sided S(f) = D / (2 pi^2 (f_c^2 + f^2)) as in [1]; the one-sided
    version is twice that (plateau 4 kT gamma/kappa^2 at f = 0).
    """
    f = _times("f", f)
    s = _positive("diffusion", diffusion) / (2.0 * math.pi**2 * (_positive("fc", fc)**2 + f**2))
    return 2.0 * s if one_sided else s


def ar1_psd(f, variance, c, dt, b=1.0, one_sided=False):
    """Exact spectrum of a sampled series with autocovariance of AR(1) shape.

    The series has autocovariance g_0 = ``variance`` at lag 0 and
    g_m = variance * b * c^m at lags m >= 1 (``dt`` apart). b = 1 is an AR(1)
    process (the exactly sampled OU process or Euler-Maruyama); b != 1 covers
    ARMA(1,1) series such as the Leimkuhler-Matthews scheme. Two-sided
    density: S(f) = dt g_0 [1 + 2 b (c cos w - c^2)/(1 - 2 c cos w + c^2)],
    w = 2 pi f dt (sum of the geometric series; common practice).
    """
    f = _times("f", f)
    variance = _positive("variance", variance)
    dt = _positive("dt", dt)
    if not -1.0 < c < 1.0:
        raise ValueError(f"c must lie in (-1, 1) for a stationary series, got {c!r}")
    cw = np.cos(2.0 * math.pi * f * dt)
    s = dt * variance * (1.0 + 2.0 * b * (c * cw - c * c) / (1.0 - 2.0 * c * cw + c * c))
    return 2.0 * s if one_sided else s


def aliased_lorentzian_psd(f, fc, diffusion, dt, one_sided=False):
    """Aliased Lorentzian: PSD of instantaneous samples taken every ``dt``.

    P(f) = (Delta x)^2 dt / (1 + c^2 - 2 c cos(2 pi f dt)) with
    c = exp(-2 pi f_c dt) and (Delta x)^2 = (1 - c^2) D/(2 pi f_c) [1, 2]; it
    equals the alias sum of :func:`lorentzian_psd` over all images f + n/dt.
    Two-sided unless ``one_sided``; valid for 0 <= f <= 1/(2 dt).
    """
    fc = _positive("fc", fc)
    dt = _positive("dt", dt)
    c = math.exp(-2.0 * math.pi * fc * dt)
    return ar1_psd(f, _positive("diffusion", diffusion) / (2.0 * math.pi * fc), c, dt,
                   one_sided=one_sided)


def blur_variance_factor(exposure, tau):
    """Ratio of measured to true variance for samples averaged over ``exposure``.

    S(alpha) = 2/alpha - (2/alpha^2)(1 - exp(-alpha)), alpha = exposure/tau
    [3]. Naive equipartition on blurred data overestimates kappa by 1/S.
    """
    alpha = _positive("exposure", exposure) / _positive("tau", tau)
    if alpha < 1e-4:  # series avoids cancellation: 1 - alpha/3 + alpha^2/12
        return 1.0 - alpha / 3.0 + alpha * alpha / 12.0
    return 2.0 / alpha - 2.0 / alpha**2 * -math.expm1(-alpha)


def blurred_aliased_lorentzian_psd(f, fc, diffusion, dt, one_sided=False):
    """PSD of sampled data each averaged over the full frame (exposure = dt).

    P(f) = (D/(2 pi^2 f_c^2)) {1 + (f_s/(pi f_c)) sin^2(pi f/f_s) sinh(2 pi f_c/f_s)
    / [cos(2 pi f/f_s) - cosh(2 pi f_c/f_s)]}, f_s = 1/dt, two-sided [4]
    (written here in f_c and D: kappa/gamma = 2 pi f_c, kT/kappa = D/(2 pi f_c)).
    Its integral over the Nyquist band is (kT/kappa) S(dt/tau).
    """
    f = _times("f", f)
    fc = _positive("fc", fc)
    D = _positive("diffusion", diffusion)
    fs = 1.0 / _positive("dt", dt)
    a = 2.0 * math.pi * fc / fs
    s = D / (2.0 * math.pi**2 * fc**2) * (
        1.0 + fs / (math.pi * fc) * np.sin(math.pi * f / fs)**2 * math.sinh(a)
        / (np.cos(2.0 * math.pi * f / fs) - math.cosh(a)))
    return 2.0 * s if one_sided else s


def expected_periodogram(acov, dt):
    """Exact expectation of a periodogram of N samples from autocovariances.

    E[P_k] = (dt/N) sum_{|m|<N} (N - |m|) g_m exp(-2 pi i k m/N) for the
    normalisation P_k = |dt sum_j x_j e^{2 pi i k j/N}|^2 / (N dt) of [1]
    (two-sided). ``acov`` holds g_0 .. g_{N-1}; returns E[P_k] for
    k = 0 .. N//2 (the Fejer-smoothed spectrum, so leakage is included).
    """
    acov = np.asarray(acov, dtype=float)
    if acov.ndim != 1 or acov.size < 2:
        raise ValueError(f"acov must be a 1D array of at least 2 autocovariances, got shape {acov.shape}")
    n = acov.size
    w = (n - np.arange(n)) * acov
    spec = 2.0 * np.fft.rfft(w).real - w[0]
    return _positive("dt", dt) / n * spec


# --------------------------------------------------------------- underdamped
def ornstein_furth_msd(t, kT, mass, friction):
    """Ornstein-Furth MSD per dimension of a free underdamped particle, m^2.

    MSD(t) = 2 D [t - tau_p (1 - exp(-t/tau_p))], D = kT/gamma, tau_p = m/gamma;
    ballistic kT t^2/m for t << tau_p [5].
    """
    t = np.abs(_times("t", t))
    taup = _positive("mass", mass) / _positive("friction", friction)
    D = diffusion_coefficient(kT, friction)
    x = t / taup
    # t - tau_p(1 - e^{-x}) = tau_p (x - 1 + e^{-x}); series for small x
    small = x < 1e-5
    core = np.where(small, x * x / 2.0 - x**3 / 6.0, x + np.expm1(-np.where(small, 0.0, x)))
    return 2.0 * D * taup * core


def velocity_autocorrelation(t, kT, mass, friction):
    """Velocity autocovariance (kT/m) exp(-|t| gamma/m) of a free particle, (m/s)^2 [5]."""
    t = _times("t", t)
    return velocity_variance(kT, mass) * np.exp(-np.abs(t) * _positive("friction", friction) / mass)


def quality_factor(stiffness, mass, friction):
    """Quality factor Q = sqrt(m k)/gamma of a damped oscillator."""
    return math.sqrt(_positive("mass", mass) * _positive("stiffness", stiffness)) / _positive(
        "friction", friction)


def oscillator_psd(f, kT, stiffness, mass, friction, one_sided=True):
    """Displacement PSD of a thermally driven damped oscillator, m^2/Hz.

    One-sided S(f) = 4 kT gamma / [(k - m w^2)^2 + gamma^2 w^2], w = 2 pi f;
    S(0) = 4 kT gamma/k^2, S(f0) = Q^2 S(0), integral kT/k ([6]; common
    practice for thermal calibration). Two-sided is half.
    """
    f = _times("f", f)
    kT, k = _positive("kT", kT), _positive("stiffness", stiffness)
    m, g = _positive("mass", mass), _positive("friction", friction)
    w = 2.0 * math.pi * f
    s = 4.0 * kT * g / ((k - m * w * w)**2 + (g * w)**2)
    return s if one_sided else s / 2.0


def oscillator_autocorrelation(t, kT, stiffness, mass, friction):
    """Position autocovariance of the damped oscillator, m^2.

    C(t) = (kT/k) e^{-Gamma|t|/2} [cos w1 t + (Gamma/(2 w1)) sin w1 |t|],
    w1 = sqrt(w0^2 - Gamma^2/4), Gamma = gamma/m [6]; continued analytically
    (cosh/sinh) for Q < 1/2 and to (1 + Gamma|t|/2) e^{-Gamma|t|/2} at Q = 1/2.
    """
    t = np.abs(_times("t", t))
    G = _positive("friction", friction) / _positive("mass", mass)
    w0sq = _positive("stiffness", stiffness) / mass
    disc = w0sq - G * G / 4.0
    var = equipartition_variance(kT, stiffness)
    if abs(disc) <= 1e-12 * w0sq:
        shape = 1.0 + G * t / 2.0
    elif disc > 0:
        w1 = math.sqrt(disc)
        shape = np.cos(w1 * t) + G / (2.0 * w1) * np.sin(w1 * t)
    else:
        w1 = math.sqrt(-disc)
        # e^{-G t/2}[cosh + (G/2w1) sinh] written with decaying exponentials only
        lam_slow, lam_fast = G / 2.0 - w1, G / 2.0 + w1
        return var * (0.5 * (1.0 + G / (2.0 * w1)) * np.exp(-lam_slow * t)
                      + 0.5 * (1.0 - G / (2.0 * w1)) * np.exp(-lam_fast * t))
    return var * np.exp(-G * t / 2.0) * shape


def slowest_relaxation_rate(mass, friction, stiffness=0.0):
    """Slowest decay rate (1/s) of the mean position/velocity of a linear Langevin system.

    Underdamped (``mass`` given): Gamma/2 for Q >= 1/2, Gamma/2 - sqrt(Gamma^2/4 - w0^2)
    otherwise (roots of m s^2 + gamma s + k); free particle: Gamma (velocity).
    Overdamped (``mass`` None): kappa/gamma (free: 0, no relaxation).
    """
    g = _positive("friction", friction)
    if stiffness < 0:
        raise ValueError(f"stiffness must be >= 0, got {stiffness!r}")
    if mass is None:
        return stiffness / g
    G = g / _positive("mass", mass)
    if stiffness == 0:
        return G
    disc = G * G / 4.0 - stiffness / mass
    if disc <= 0:
        return G / 2.0
    # G/2 - sqrt(disc) computed without cancellation
    return (stiffness / mass) / (G / 2.0 + math.sqrt(disc))


# ------------------------------------------ exact finite-step scheme statistics
def _step_ratio(stiffness, friction, dt):
    r = _positive("stiffness", stiffness) * _positive("dt", dt) / _positive("friction", friction)
    if r >= 2.0:
        raise ValueError(f"stiffness*dt/friction = {r:g} >= 2: the overdamped scheme is unstable")
    return r


def em_variance(kT, stiffness, friction, dt):
    """Exact stationary variance of overdamped Euler-Maruyama in a harmonic trap, m^2.

    (kT/kappa) / (1 - kappa dt/(2 gamma)) at any stable step kappa dt/gamma < 2 [D].
    """
    r = _step_ratio(stiffness, friction, dt)
    return equipartition_variance(kT, stiffness) / (1.0 - r / 2.0)


def em_lag1_autocorrelation(stiffness, friction, dt):
    """Lag-1 (one step) autocorrelation 1 - kappa dt/gamma of Euler-Maruyama; lag n: its n-th power [D]."""
    return 1.0 - _step_ratio(stiffness, friction, dt)


def lm_variance(kT, stiffness, friction, dt):
    """Stationary variance of the overdamped Leimkuhler-Matthews scheme: kT/kappa exactly [7, D]."""
    _step_ratio(stiffness, friction, dt)
    return equipartition_variance(kT, stiffness)


def lm_lag1_autocorrelation(stiffness, friction, dt):
    """Lag-1 autocorrelation 1 - kappa dt/(2 gamma) of the Leimkuhler-Matthews scheme.

    Lag n >= 1: rho_1 a^{n-1} with a = 1 - kappa dt/gamma (ARMA(1,1)) [D].
    """
    return 1.0 - _step_ratio(stiffness, friction, dt) / 2.0


def _baoab_x(stiffness, mass, dt):
    x = _positive("stiffness", stiffness) / _positive("mass", mass) * _positive("dt", dt)**2 / 4.0
    if x >= 1.0:
        raise ValueError(f"dt*omega0 = {2 * math.sqrt(x):g} >= 2: BAOAB is unstable")
    return x


def baoab_position_variance(kT, stiffness, mass, dt):
    """BAOAB full-step position variance for U = k q^2/2: kT/k exactly (h w0 < 2) [7, D]."""
    _baoab_x(stiffness, mass, dt)
    return equipartition_variance(kT, stiffness)


def baoab_velocity_variance(kT, mass, dt, stiffness=0.0):
    """BAOAB full-step velocity variance (kT/m)(1 - w0^2 dt^2/4), w0^2 = k/m [D].

    Exact for a harmonic force at any friction; kT/m for a free particle.
    """
    if stiffness == 0:
        return velocity_variance(kT, mass)
    return velocity_variance(kT, mass) * (1.0 - _baoab_x(stiffness, mass, dt))


def baoab_transition_matrix(stiffness, mass, friction, dt):
    """Mean one-step map M of BAOAB for (q, v) in a harmonic well.

    M = B A O A B with B = [[1, 0], [-h w0^2/2, 1]], A = [[1, h/2], [0, 1]],
    O = diag(1, exp(-gamma h/m)) [7]; E[(q, v)_{n+1} | (q, v)_n] = M (q, v)_n.
    """
    _baoab_x(stiffness, mass, dt)
    h = dt
    w2 = stiffness / mass
    c = math.exp(-_positive("friction", friction) * h / mass)
    B = np.array([[1.0, 0.0], [-h * w2 / 2.0, 1.0]])
    A = np.array([[1.0, h / 2.0], [0.0, 1.0]])
    O = np.array([[1.0, 0.0], [0.0, c]])
    return B @ A @ O @ A @ B


def baoab_position_autocorrelation(lags, stiffness, mass, friction, dt):
    """Exact position autocorrelation of BAOAB at integer step lags: (M^n)_{00}.

    Valid because the stationary full-step covariance is diagonal (<q v> = 0) [D].
    """
    M = baoab_transition_matrix(stiffness, mass, friction, dt)
    lags = np.atleast_1d(np.asarray(lags))
    if lags.size and (np.any(lags < 0) or not np.all(lags == np.round(lags))):
        raise ValueError(f"lags must be non-negative integers, got {lags!r}")
    return np.array([np.linalg.matrix_power(M, int(n))[0, 0] for n in lags])


def baoab_free_msd(lags, kT, mass, friction, dt):
    """Exact MSD of BAOAB for a free particle after ``lags`` steps of size dt, m^2.

    The full-step velocity is AR(1) with c = exp(-gamma dt/m) and variance kT/m,
    and q_{n+1} - q_n = (dt/2)(v_n + v_{n+1}), so
    MSD(n) = dt^2 (kT/m) [n (1 + c)/2 + (1 + c)^2 g(n)/2],
    g(n) = [n (1 - c) - (1 - c^n)]/(1 - c)^2 [D]. Tends to
    :func:`ornstein_furth_msd` as dt -> 0.
    """
    n = np.asarray(lags, dtype=float)
    if np.any(n < 0):
        raise ValueError(f"lags must be >= 0, got {lags!r}")
    c = math.exp(-_positive("friction", friction) * _positive("dt", dt) / _positive("mass", mass))
    omc = -math.expm1(-friction * dt / mass)
    g = (n * omc + np.expm1(n * math.log(c))) / omc**2
    return dt * dt * velocity_variance(kT, mass) * (n * (1.0 + c) / 2.0 + (1.0 + c)**2 * g / 2.0)


def lm_free_msd(lags, diffusion, dt):
    """Exact MSD of the overdamped Leimkuhler-Matthews scheme for free diffusion, m^2.

    Noise (xi_n + xi_{n+1})/2 telescopes: MSD(n) = 2 D dt (n - 1/2) for n >= 1
    steps, 0 at n = 0 [D]. (Euler-Maruyama gives 2 D dt n exactly.)
    """
    n = np.asarray(lags, dtype=float)
    if np.any(n < 0):
        raise ValueError(f"lags must be >= 0, got {lags!r}")
    return np.where(n > 0, 2.0 * _positive("diffusion", diffusion) * _positive("dt", dt) * (n - 0.5), 0.0)


_OVERDAMPED = ("euler-maruyama", "leimkuhler-matthews", "exact")


def scheme_position_variance(scheme, kT, stiffness, friction, dt, mass=None):
    """Exact stationary position variance of ``scheme`` in a harmonic well, m^2.

    ``scheme``: "euler-maruyama", "leimkuhler-matthews", "baoab" (needs
    ``mass``) or "exact" (exactly sampled continuous process: kT/kappa).
    """
    if scheme == "euler-maruyama":
        return em_variance(kT, stiffness, friction, dt)
    if scheme == "leimkuhler-matthews":
        return lm_variance(kT, stiffness, friction, dt)
    if scheme == "baoab":
        if mass is None:
            raise ValueError("mass is required for scheme 'baoab', got None")
        return baoab_position_variance(kT, stiffness, mass, dt)
    if scheme == "exact":
        return equipartition_variance(kT, stiffness)
    raise ValueError(f"scheme must be one of {_OVERDAMPED + ('baoab',)}, got {scheme!r}")


def scheme_position_autocovariance(scheme, lags, kT, stiffness, friction, dt, every=1):
    """Exact autocovariance of an overdamped scheme's recorded positions, m^2.

    Frames are ``every`` steps of size ``dt`` apart; ``lags`` count frames.
    Euler-Maruyama: var * a^{n every}, a = 1 - kappa dt/gamma; Leimkuhler-Matthews:
    (kT/kappa) rho_1 a^{n every - 1} for n >= 1; "exact": (kT/kappa) exp(-n every dt/tau).
    """
    n = np.asarray(lags, dtype=float)
    if np.any(n < 0):
        raise ValueError(f"lags must be >= 0, got {lags!r}")
    if int(every) != every or every < 1:
        raise ValueError(f"every must be an integer >= 1, got {every!r}")
    steps = n * every
    if scheme == "exact":
        return ou_autocorrelation(steps * dt, kT, stiffness, friction)
    var = scheme_position_variance(scheme, kT, stiffness, friction, dt)
    a = em_lag1_autocorrelation(stiffness, friction, dt)
    if scheme == "euler-maruyama":
        return var * np.power(a, steps)
    if scheme == "leimkuhler-matthews":
        rho1 = lm_lag1_autocorrelation(stiffness, friction, dt)
        return np.where(steps > 0, var * rho1 * np.power(a, np.maximum(steps - 1, 0)), var)
    raise ValueError(f"scheme must be one of {_OVERDAMPED}, got {scheme!r}")


# ---------------------------------------------------------------- escape
def _check_potential(potential):
    if not callable(potential):
        raise TypeError(f"potential must be a callable U(x) returning J, got {potential!r}")


#: Energy above the lowest point of a domain (in kT) beyond which the Boltzmann
#: weight of an unbounded side is cut off: e^-60 ~ 1e-26 of the weight.
TAIL_CUTOFF_KT = 60.0
#: Grid points per segment of the first first-passage quadrature; doubled until converged.
_GRID_START = 1 << 11
_GRID_MAX = 1 << 22


def _energies(potential, x):
    """U on an array of points, for vectorised and scalar-only callables alike."""
    x = np.asarray(x, dtype=float)
    try:
        u = np.asarray(potential(x), dtype=float)
    except (TypeError, ValueError):
        u = None
    if u is None or u.shape != x.shape:
        u = np.array([float(potential(v)) for v in x.ravel()]).reshape(x.shape)
    return u


def _tail_end(u, inner, step):
    """A point beyond ``inner`` (in the direction of ``step``) where the reduced
    energy ``u`` lies TAIL_CUTOFF_KT above its lowest value in between, or None
    when the side does not confine (a finite-depth well, a free axis)."""
    far = inner + step
    for _ in range(64):
        grid = np.linspace(inner, far, 257)
        vals = u(grid)
        if vals[-1] - np.min(vals) > TAIL_CUTOFF_KT and vals[-1] >= np.max(vals[-9:]):
            above = np.flatnonzero(vals - np.minimum.accumulate(vals) > TAIL_CUTOFF_KT)
            return float(grid[above[0]])
        far = inner + 2.0 * (far - inner)
    return None


def _passage_integrals(u, lo, b, knot, jac, basin, rtol):
    """Mean first-passage time in reduced units (D = 1), reflecting at ``lo``,
    absorbing at ``b`` > ``knot`` >= ``lo``.

    With the weight w(y) = y^jac e^{-u(y)} and I(y) = int_lo^y w:
    from the point ``knot``: T = int_knot^b I/w dy (Pontryagin; [8]);
    averaged over the Boltzmann density on [lo, knot] (``basin``):
    T = (1/I(knot)) int_lo^knot I^2/w dy + int_knot^b I/w dy (the same,
    integrated over the start point by parts [D]). Composite Simpson on two
    uniform segments split at ``knot``, the grid doubled until two successive
    results agree to ``rtol`` (Richardson estimate of Simpson's error).
    """
    previous = None
    n = _GRID_START
    while True:
        parts = []
        for a, c in ((lo, knot), (knot, b)):
            y = np.linspace(a, c, n + 1)
            parts.append((y, u(y)))
        umin = min(float(np.min(p[1])) for p in parts)
        total_i = 0.0
        pieces = []
        for y, uy in parts:
            shift = uy - umin
            jw = np.ones_like(y) if jac == 0 else np.where(y > 0, y, 0.0) ** jac
            w = jw * np.exp(-shift)
            if y[-1] > y[0]:
                cum = total_i + integrate.cumulative_simpson(w, x=y, initial=0.0)
            else:
                cum = np.full_like(y, total_i)
            with np.errstate(divide="ignore", over="ignore", invalid="ignore"):  # I/w in logs
                f = np.where(jw > 0, np.exp(np.log(cum) + shift - np.log(jw)), 0.0)
            pieces.append((y, cum, f))
            total_i = float(cum[-1])
        (y1, i1, f1), (y2, i2, f2) = pieces
        outer = integrate.simpson(f2, x=y2) if y2[-1] > y2[0] else 0.0
        if basin:
            if not i1[-1] > 0:
                raise ValueError("the start basin holds no Boltzmann weight")
            outer += integrate.simpson(i1 * f1, x=y1) / i1[-1] if y1[-1] > y1[0] else 0.0
        if previous is not None and abs(outer - previous) <= 15.0 * rtol * abs(outer):
            return outer
        if 2 * n > _GRID_MAX:
            raise ValueError(f"first-passage quadrature did not converge to rtol = {rtol:g} "
                             f"(last two results {previous!r}, {outer!r})")
        previous = outer
        n *= 2


def _mfpt_1d(potential, x0, x_abs, kT, friction, x_reflect, rtol, basin):
    _check_potential(potential)
    kT = _positive("kT", kT)
    D = kT / _positive("friction", friction)
    x0, x_abs = float(x0), float(x_abs)
    if not (math.isfinite(x0) and math.isfinite(x_abs)):
        raise ValueError(f"start and absorbing point must be finite, got {x0!r}, {x_abs!r}")
    if x0 == x_abs and not basin:
        return 0.0
    what = "basin_edge" if basin else "x0"
    if x_abs < x0:
        raise ValueError(f"{what} = {x0!r} must lie on the reflecting side of x_abs = {x_abs!r}")
    ell = x_abs - x0 if x_abs > x0 else 1.0
    if basin and x_reflect is not None and math.isfinite(x_reflect):
        ell = x_abs - x_reflect

    def u(s):  # reduced energy on the reduced coordinate s = (x - x0)/ell
        return _energies(potential, x0 + ell * s) / kT

    b = (x_abs - x0) / ell
    if x_reflect is None or x_reflect == -math.inf:
        lo = _tail_end(u, 0.0, -1.0)
        if lo is None:
            raise ValueError(
                "the potential does not confine the particle on the reflecting side (a "
                "finite-depth well or a free axis): with a reflecting point at infinity the "
                "mean first-passage time is infinite. Give x_reflect (for a well symmetric "
                "about its centre c, x_reflect = c gives the exit time from |x - c| < "
                "|x_abs - c|), or use mfpt_radial for an isotropic well")
    else:
        lo = (float(x_reflect) - x0) / ell
        if lo > 0:
            raise ValueError(f"x_reflect = {x_reflect!r} must lie at or below {what} = {x0!r}")
    return ell * ell * _passage_integrals(u, lo, b, 0.0, 0, basin, rtol) / D


def _mirror(potential, x0, x_abs, x_reflect):
    """Mirror image x -> -x of a problem whose absorbing point lies below the start."""
    xr = None if x_reflect is None else -float(x_reflect)
    return (lambda x: potential(-np.asarray(x, dtype=float))), -x0, -x_abs, xr


def mfpt(potential, x0, x_abs, kT, friction, x_reflect=None, rtol=1e-9):
    """Exact mean first-passage time of 1D overdamped diffusion, by quadrature, s.

    T(x0 -> x_abs) = (1/D) int_{x0}^{x_abs} dy e^{U(y)/kT} int_{x_R}^{y} dz e^{-U(z)/kT}
    (Pontryagin; [8]) with D = kT/gamma, reflecting at ``x_reflect`` and
    absorbing at ``x_abs`` (either side of ``x0``).

    Parameters
    ----------
    potential : callable U(x) -> J, x in m (vectorised or scalar)
    x0, x_abs : float, m
        Start and absorbing point. A start at the reflecting point is allowed.
    kT : float, J
    friction : float, kg/s
    x_reflect : float or None, m
        Reflecting point on the far side of ``x0`` from ``x_abs``. None (the
        default): at infinity, where the potential confines the particle;
        for a finite-depth well (or a free axis) that time is infinite and a
        ValueError says so.
    rtol : float
        Relative accuracy of the quadrature.

    To compare with a rate k: MFPT to the barrier top ~ 1/(2k); to the other
    minimum ~ 1/k (the quantity to compare with Kramers' rate).
    """
    if float(x_abs) < float(x0):
        potential, x0, x_abs, x_reflect = _mirror(potential, float(x0), float(x_abs), x_reflect)
    return _mfpt_1d(potential, x0, x_abs, kT, friction, x_reflect, rtol, basin=False)


def mfpt_equilibrium(potential, basin_edge, x_abs, kT, friction, x_reflect=None, rtol=1e-9):
    """Mean first-passage time to ``x_abs`` from the Boltzmann density of the start basin, s.

    The start is distributed as e^{-U/kT} between the reflecting point and
    ``basin_edge``; the result is the average of :func:`mfpt` over it,
    T = (1/D) [ (1/I_s) int_R^s I(y)^2 e^{U(y)/kT} dy + int_s^b I(y) e^{U(y)/kT} dy ],
    I(y) = int_R^y e^{-U/kT}, s = basin_edge, b = x_abs ([8]; the average taken
    by parts, derived). This is the inverse of the escape rate that
    :func:`langsim.escape_rate` measures. Arguments as for :func:`mfpt`.
    """
    if float(x_abs) < float(basin_edge):
        potential, basin_edge, x_abs, x_reflect = _mirror(potential, float(basin_edge), float(x_abs),
                                                          x_reflect)
    if float(basin_edge) >= float(x_abs):
        raise ValueError(f"basin_edge = {basin_edge!r} must lie before x_abs = {x_abs!r}")
    return _mfpt_1d(potential, basin_edge, x_abs, kT, friction, x_reflect, rtol, basin=True)


def _mfpt_radial(potential, r0, r_abs, kT, friction, dimensions, rtol, basin):
    _check_potential(potential)
    d = int(dimensions)
    if d not in (1, 2, 3) or d != dimensions:
        raise ValueError(f"dimensions must be 1, 2 or 3, got {dimensions!r}")
    kT = _positive("kT", kT)
    D = kT / _positive("friction", friction)
    R = _positive("r_abs", r_abs)
    r0 = float(r0)
    if not 0.0 <= r0 <= R or (basin and r0 <= 0.0):
        what = "basin_edge" if basin else "r0"
        raise ValueError(f"{what} must lie in {'(' if basin else '['}0, r_abs = {R!r}], got {r0!r}")

    def u(s):
        return _energies(potential, R * s) / kT
    return R * R * _passage_integrals(u, 0.0, 1.0, r0 / R, d - 1, basin, rtol) / D


def mfpt_radial(potential, r0, r_abs, kT, friction, dimensions, rtol=1e-9):
    """Mean first-passage time from radius ``r0`` to the sphere ``r_abs`` in an isotropic well, s.

    T(r0 -> R) = (1/D) int_{r0}^{R} dr e^{U(r)/kT} r^{1-d} int_0^r r'^{d-1} e^{-U(r')/kT} dr'
    for overdamped diffusion in d = 1, 2, 3 dimensions (the r^{d-1} Jacobian
    of the backward equation, regular at r = 0; reference notes section 12.3,
    derived there from [8]). A start at the centre (r0 = 0) is allowed; d = 1
    is the exit from |x - c| < R of a well symmetric about c.

    Parameters
    ----------
    potential : callable U(r) -> J, r in m (the well's energy along a ray from its centre)
    r0, r_abs : float, m
    kT : float, J
    friction : float, kg/s
    dimensions : int
    """
    return _mfpt_radial(potential, r0, r_abs, kT, friction, dimensions, rtol, basin=False)


def mfpt_radial_equilibrium(potential, basin_edge, r_abs, kT, friction, dimensions, rtol=1e-9):
    """Mean first-passage time to ``r_abs`` from the Boltzmann density within ``basin_edge``, s.

    The average of :func:`mfpt_radial` over r^{d-1} e^{-U/kT} on [0, basin_edge]
    (as :func:`mfpt_equilibrium`, derived): the inverse of the escape rate
    :func:`langsim.escape_rate` measures for an isotropic well. It exceeds the
    time from the centre by O(intra-well relaxation), about w^2 gamma/(4 depth)
    for a Gaussian well (reference notes section 12.3).
    """
    return _mfpt_radial(potential, basin_edge, r_abs, kT, friction, dimensions, rtol, basin=True)


def radial_survival(potential, r_abs, kT, friction, dimensions, t, r0=None, n_cells=600):
    """Probability of not yet having reached r = r_abs in an isotropic well, and its time integral.

    The radial Smoluchowski equation on [0, r_abs] (reflecting at 0, absorbing
    at r_abs) is discretised in ``n_cells`` finite volumes whose hopping rates
    obey detailed balance with the weights w = r^{d-1} e^{-U/kT} (the kind of
    discretisation the reference notes, section 7, use for the relaxation
    eigenvalue; common practice); its symmetrised generator is diagonalised
    exactly, so S(t) = sum_k a_k b_k exp(-lambda_k t) with a_k = phi_k . sqrt(w)
    and b_k = phi_k[i]/sqrt(w_i) for a start in cell i, or a_k/sum(w) for the
    Boltzmann start. With the Boltzmann start the mean first-passage time
    sum_k a_k b_k/lambda_k agrees with :func:`mfpt_radial_equilibrium` to about
    1e-6 at the default ``n_cells``.

    Parameters
    ----------
    potential : callable U(r) -> J
    r_abs : float, m
    kT : float, J
    friction : float, kg/s
    dimensions : int
    t : float or array, s
    r0 : array of float, m, optional
        Start radii (linear interpolation between cell centres); default the
        Boltzmann density inside ``r_abs``.

    Returns
    -------
    (S, integral) : arrays of shape (len(r0), len(t)) (or (len(t),) without r0)
        S(t) and int_0^t S(t') dt' (s).
    """
    from scipy.linalg import eigh_tridiagonal
    _check_potential(potential)
    kT = _positive("kT", kT)
    D = kT / _positive("friction", friction)
    R = _positive("r_abs", r_abs)
    d = int(dimensions)
    if d not in (1, 2, 3) or d != dimensions:
        raise ValueError(f"dimensions must be 1, 2 or 3, got {dimensions!r}")
    t = np.atleast_1d(_times("t", t))
    n = int(n_cells)
    h = R / n
    centres = (np.arange(n) + 0.5) * h
    faces = np.arange(1, n + 1) * h                     # inner faces 1..n-1 and the absorbing face n
    u_c = _energies(potential, centres) / kT
    u_f = _energies(potential, faces) / kT
    umin = min(u_c.min(), u_f.min())
    w = centres ** (d - 1) * np.exp(-(u_c - umin))
    wf = faces ** (d - 1) * np.exp(-(u_f - umin))
    c = D / (h * h) * wf[:-1]                           # w_i k_{i->i+1} = w_{i+1} k_{i+1->i}
    out = np.zeros(n)
    out[:-1] += c / w[:-1]
    out[1:] += c / w[1:]
    out[-1] += 2.0 * D / (h * h) * wf[-1] / w[-1]       # into the absorber, half a cell away
    rates, vectors = eigh_tridiagonal(out, -c / np.sqrt(w[:-1] * w[1:]))
    a = vectors.T @ np.sqrt(w)                          # (k,)
    if r0 is None:
        coef = (a * a / w.sum())[None, :]               # (1, k)
    else:
        r0 = np.atleast_1d(np.asarray(r0, dtype=float))
        if np.any(r0 < 0) or np.any(r0 > R):
            raise ValueError(f"r0 must lie in [0, r_abs = {R!r}]")
        per_cell = vectors / np.sqrt(w)[:, None]        # (cell, k): phi_k[i]/sqrt(w_i)
        grid = np.concatenate(([0.0], centres, [R]))
        rows = np.vstack([per_cell[0], per_cell, np.zeros(n)])   # S = 0 at the absorber
        idx = np.clip(np.searchsorted(grid, r0, side="right") - 1, 0, n)
        frac = (r0 - grid[idx]) / (grid[idx + 1] - grid[idx])
        coef = a[None, :] * ((1 - frac)[:, None] * rows[idx] + frac[:, None] * rows[idx + 1])
    decay = np.exp(-np.outer(rates, t))                 # (k, t)
    S = coef @ decay
    integral = coef @ (-np.expm1(-np.outer(rates, t)) / rates[:, None])
    if r0 is None:
        return S[0], integral[0]
    return S, integral


def _gaussian_well_args(depth, waist, r_abs, kT, dimensions):
    bD = _positive("depth", depth) / _positive("kT", kT)
    w = _positive("waist", waist)
    rho = _positive("r_abs", r_abs) / w
    d = int(dimensions)
    if d not in (2, 3) or d != dimensions:
        raise ValueError(f"dimensions must be 2 or 3 for the radial estimates, got {dimensions!r}")
    return bD, w, rho, d


def _harmonic_population(bD, d):
    """Z_h = e^{bD} Gamma(d/2) / (2 (2 bD)^{d/2}): radial weight of the harmonic well, units w^d."""
    from scipy import special
    return math.exp(bD) * special.gamma(d / 2.0) / (2.0 * (2.0 * bD) ** (d / 2.0))


def gaussian_well_langer_time(depth, waist, r_abs, kT, friction, dimensions):
    """Radial Kramers-Langer estimate of the escape time from a Gaussian well, s (information only).

    U(r) = -depth exp(-2 r^2/w^2) has no saddle; the radial free energy
    F(rho) = U/kT - (d - 1) ln rho (rho = r/w) has an entropic maximum rho_dagger
    (4 (depth/kT) rho^2 e^{-2 rho^2} = d - 1; needs depth/kT > (d - 1) e/2).
    T_KL = (w^2 gamma/kT) Z_h e^{F(rho_dagger)} sqrt(2 pi/|F''|) Phi((R/w - rho_dagger) sqrt|F''|),
    Z_h the harmonic well population, Phi the normal CDF (reference notes
    section 12.3, derived; Langer's parabolic-barrier method, [8]).

    Expected error: the parabolic-barrier approximation is never good here
    (the entropic barrier stands < 0.5 kT above its shoulder); exact/T_KL
    ranges from 0.56 to 2.0 over 5-20 kT and is still 1.22 at 80 kT. Compare
    with :func:`mfpt_radial` instead.
    """
    from scipy import special
    bD, w, rho, d = _gaussian_well_args(depth, waist, r_abs, kT, dimensions)
    if bD <= (d - 1) * math.e / 2.0:
        raise ValueError(f"depth/kT = {bD:g} <= (d - 1) e/2 = {(d - 1) * math.e / 2:g}: "
                         "the radial free energy has no barrier")
    r2 = optimize.brentq(lambda q: 4.0 * bD * q * math.exp(-2.0 * q) - (d - 1), 0.5, 50.0, xtol=1e-15)
    rd = math.sqrt(r2)
    kap = abs((d - 1) * (2.0 - 4.0 * r2) / r2)
    eF = math.exp(-bD * math.exp(-2.0 * r2)) * rd ** (1 - d)
    t = _harmonic_population(bD, d) * eF * math.sqrt(2.0 * math.pi / kap) * special.ndtr((rho - rd) * math.sqrt(kap))
    return t * w * w * _positive("friction", friction) / kT


def gaussian_well_separable_time(depth, waist, r_abs, kT, friction, dimensions):
    """Large-depth asymptote of the escape time from a Gaussian well, s (information only).

    Well population times outer diffusive resistance:
    T_sep = (w^2 gamma/kT) Z_h int_{1/2}^{R/w} e^{U(rho)/kT} rho^{1-d} d rho,
    Z_h = e^{depth/kT} Gamma(d/2)/(2 (2 depth/kT)^{d/2}) (reference notes
    section 12.3, derived). Expected error: the exact time is longer by a
    relative d(d + 2) kT/(8 depth) (anharmonicity of the well): 9 % in 3D
    and 5 % in 2D at 20 kT.
    """
    bD, w, rho, d = _gaussian_well_args(depth, waist, r_abs, kT, dimensions)
    if rho <= 0.5:
        raise ValueError(f"r_abs/waist = {rho:g} must exceed 1/2 for the separable estimate")
    outer = integrate.quad(lambda q: math.exp(-bD * math.exp(-2.0 * q * q)) * q ** (1 - d), 0.5, rho,
                           epsabs=0.0, epsrel=1e-10, limit=200)[0]
    return _harmonic_population(bD, d) * outer * w * w * _positive("friction", friction) / kT


def gaussian_well_separable_error(depth, kT, dimensions):
    """Expected relative error d(d + 2) kT/(8 depth) of :func:`gaussian_well_separable_time`."""
    return dimensions * (dimensions + 2) * _positive("kT", kT) / (8.0 * _positive("depth", depth))


def transition_state_rate(omega_a, barrier, kT):
    """Transition-state rate (omega_a/2 pi) e^{-Delta U/kT}, 1/s [8]."""
    return _positive("omega_a", omega_a) / (2.0 * math.pi) * math.exp(
        -_positive("barrier", barrier) / _positive("kT", kT))


def kramers_rate_overdamped(curvature_min, curvature_top, friction, barrier, kT):
    """Smoluchowski-limit Kramers rate sqrt(U''_a |U''_b|)/(2 pi gamma) e^{-Delta U/kT}, 1/s [8].

    Rate of leaving one well for the other (to a point well past the barrier),
    not to the barrier top; a symmetric double well relaxes at twice this rate.
    ``curvature_top`` is |U''| at the barrier top, N/m. Asymptotic in
    kT/Delta U (about +0.5 kT/Delta U relative error; ~10 % at 5 kT).
    """
    return math.sqrt(_positive("curvature_min", curvature_min) * _positive(
        "curvature_top", curvature_top)) / (2.0 * math.pi * _positive("friction", friction)) * math.exp(
        -_positive("barrier", barrier) / _positive("kT", kT))


def kramers_rate_spatial_diffusion(curvature_min, curvature_top, mass, friction, barrier, kT):
    """Kramers' moderate-to-strong friction rate, 1/s [8].

    k = (w_a/(2 pi w_b)) [sqrt(Gamma^2/4 + w_b^2) - Gamma/2] e^{-Delta U/kT},
    Gamma = gamma/m; tends to :func:`kramers_rate_overdamped` for Gamma >> w_b.
    One well's escape rate to the other well.
    """
    m = _positive("mass", mass)
    wa = math.sqrt(_positive("curvature_min", curvature_min) / m)
    wb = math.sqrt(_positive("curvature_top", curvature_top) / m)
    G = _positive("friction", friction) / m
    # sqrt(G^2/4 + wb^2) - G/2 = wb^2/(sqrt(...) + G/2) without cancellation
    return wa / (2.0 * math.pi * wb) * wb * wb / (math.sqrt(G * G / 4.0 + wb * wb) + G / 2.0) * math.exp(
        -_positive("barrier", barrier) / _positive("kT", kT))


def barrier_action(potential, x_min, x_top, mass, rtol=1e-10):
    """Action I_b = closed-orbit integral of p dx at the barrier energy, J s.

    The orbit runs from the outer turning point (U(x) = U(x_top) on the far
    side of the minimum ``x_min``) to ``x_top`` and back:
    I_b = 2 int sqrt(2 m (U(x_top) - U(x))) dx.
    """
    _check_potential(potential)
    m = _positive("mass", mass)
    E = float(potential(x_top))
    if not potential(x_min) < E:
        raise ValueError(f"x_min = {x_min!r} must lie below the barrier energy U(x_top) = {E!r}")
    step = x_min - x_top
    far = x_min + step
    for _ in range(60):
        if potential(far) > E:
            break
        far += step
    else:
        raise ValueError("no outer turning point found: the well is not confining on the far side")
    turn = optimize.brentq(lambda x: potential(x) - E, far, x_min, xtol=1e-14 * abs(step), rtol=1e-15)
    lo, hi = sorted((turn, x_top))
    val = integrate.quad(lambda x: math.sqrt(max(2.0 * m * (E - potential(x)), 0.0)), lo, hi,
                         epsabs=0.0, epsrel=rtol, limit=400, points=[x_min])[0]
    return 2.0 * val


def kramers_rate_energy_diffusion(curvature_min, mass, friction, action, barrier, kT):
    """Weak-damping (energy-diffusion) Kramers rate Gamma (I_b/kT)(w_a/2 pi) e^{-Delta U/kT}, 1/s [8].

    Valid when Delta = Gamma I_b/kT << 1 (energy lost per orbit near the
    barrier in units of kT).
    """
    m = _positive("mass", mass)
    G = _positive("friction", friction) / m
    wa = math.sqrt(_positive("curvature_min", curvature_min) / m)
    return G * _positive("action", action) / _positive("kT", kT) * transition_state_rate(wa, barrier, kT)


def melnikov_meshkov_factor(delta):
    """Mel'nikov-Meshkov depopulation factor A(Delta) [9].

    A = exp{(1/pi) int_0^inf dy ln[1 - exp(-Delta (y^2 + 1/4))]/(y^2 + 1/4)};
    A -> 1 for Delta -> inf and A/Delta -> 1 for Delta -> 0.
    """
    d = _positive("delta", delta)
    val = integrate.quad(lambda y: math.log(-math.expm1(-d * (y * y + 0.25))) / (y * y + 0.25),
                         0.0, math.inf, limit=500)[0]
    return math.exp(val / math.pi)


def kramers_rate_turnover(curvature_min, curvature_top, mass, friction, action, barrier, kT,
                          symmetric_double_well=False):
    """Mel'nikov-Meshkov rate bridging weak and moderate friction, 1/s [9, 10].

    k = A(Delta) k_SD with Delta = Gamma I_b/kT (one well escaping over a
    barrier into a sink). For a symmetric double well where energy diffuses on
    both sides use ``symmetric_double_well=True``: k = [A(Delta)^2/A(2 Delta)] k_SD,
    which tends to k_ED/2 at weak damping; this is the rate out of one well,
    and the population relaxation rate is the sum of both wells' rates.
    Asymptotic in kT/Delta U: expect errors of order 10 % at 5 kT.
    """
    delta = _positive("friction", friction) / _positive("mass", mass) * _positive(
        "action", action) / _positive("kT", kT)
    ksd = kramers_rate_spatial_diffusion(curvature_min, curvature_top, mass, friction, barrier, kT)
    A = melnikov_meshkov_factor(delta)
    if symmetric_double_well:
        return A * A / melnikov_meshkov_factor(2.0 * delta) * ksd
    return A * ksd


# ------------------------------------------------------- quartic double well
def quartic_double_well(barrier, separation, center=0.0):
    """langsim's quartic double well U(x) = Delta U ((2 s/L)^2 - 1)^2, s = x - center, J.

    Minima at s = +-L/2 with U = 0, barrier top at s = 0 with U = Delta U.
    Returns a vectorised callable of x (m).
    """
    dU = _positive("barrier", barrier)
    L = _positive("separation", separation)
    c = float(center)

    def U(x):
        u = (2.0 * (np.asarray(x, dtype=float) - c) / L)**2 - 1.0
        return dU * u * u
    return U


def double_well_curvatures(barrier, separation):
    """(U'' at the minima, |U''| at the top) = (32 Delta U/L^2, 16 Delta U/L^2), N/m."""
    dU = _positive("barrier", barrier)
    L = _positive("separation", separation)
    return 32.0 * dU / L**2, 16.0 * dU / L**2


def double_well_action(barrier, separation, mass):
    """Barrier-energy action of the quartic double well, I_b = (4/3) L sqrt(m Delta U), J s.

    (8/3) x_m sqrt(m Delta U) with x_m = L/2; closed form of :func:`barrier_action`.
    """
    return 4.0 / 3.0 * _positive("separation", separation) * math.sqrt(
        _positive("mass", mass) * _positive("barrier", barrier))


# ---------------------------------------------------- cold damping, quantum limit, circuits
def cold_damping_temperature(temperature, friction, feedback):
    """Effective temperature T gamma/(gamma + gamma_fb) of a mode under velocity feedback, K.

    Feedback adds damping gamma_fb without noise; the Langevin equation with
    total damping gamma + gamma_fb and noise 2 gamma kT is the thermal one at
    T gamma/(gamma + gamma_fb) (fluctuation-dissipation; common practice).
    """
    return temperature * friction / (friction + feedback)


def quantum_ratio(omega, kT):
    """x = hbar omega / kT of a mode of angular frequency ``omega`` (rad/s)."""
    return hbar * omega / kT


def planck_energy_ratio(x):
    """Mean energy of a quantum oscillator over kT at x = hbar omega/kT [12].

    Returns ``(with_zero_point, thermal)``: (x/2) coth(x/2) = x (1/2 + 1/(e^x - 1))
    (= 1 + x^2/12 - ...) and the thermal part alone x/(e^x - 1) (= 1 - x/2 + ...).
    Both tend to 1, the classical kT, as x -> 0 (reference sheet section 16).
    """
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        thermal = np.where(x > 0, x / np.expm1(x), 1.0)
    return thermal + x / 2.0, thermal


def planck_mean_energy(omega, kT):
    """Planck mean energy hbar omega (1/2 + 1/(e^x - 1)) of a mode, zero point included, J [12]."""
    return planck_energy_ratio(quantum_ratio(omega, kT))[0] * kT


def circuit_voltage_psd(f, kT, resistance, capacitance, inductance=0.0):
    """One-sided capacitor-voltage noise density of a series RLC (or RC) circuit, V^2/Hz.

    The resistor's Johnson noise 4 kT R [11] filtered by the circuit,
    S_V(f) = 4 kT R / |1 - w^2 L C + i w R C|^2, w = 2 pi f; for L = 0 the RC
    low-pass 4 kT R/(1 + (w R C)^2). Integrates to kT/C (reference sheet
    sections 9 and 17).
    """
    w = 2.0 * math.pi * np.asarray(f, dtype=float)
    return 4.0 * kT * resistance / ((1.0 - w * w * inductance * capacitance) ** 2
                                    + (w * resistance * capacitance) ** 2)
