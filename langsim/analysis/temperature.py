"""Temperatures and the Boltzmann constant from trajectories, with error bars.

:class:`EffectiveTemperature` measures the temperature of a mode (for
example one cooled by feedback) from a trajectory and one known parameter,
three ways [1]:

- ``"position"``: T = kappa <(x - <x>)^2>/k_B, known stiffness (equipartition);
- ``"velocity"``: T = m <(v - <v>)^2>/k_B, known mass (equipartition);
- ``"spectrum"``: the spectrum's area <x^2> times its width, with a known
  damping coefficient gamma: underdamped, kT = <x^2> k and k = gamma w0 Q
  (w0 = 2 pi f0), so kT = <x^2> 2 pi f0 Q gamma; overdamped, kT = D gamma
  with D the fitted diffusion coefficient (area kT/k times 2 pi f_c = k/gamma).
  ``gamma`` is the mode's total damping (under feedback, thermal plus
  feedback: the linewidth times the mass).

:class:`BoltzmannFromDiffusion` is Perrin's use of Brownian motion: given T,
the viscosity and the radius of free spheres, k_B = 6 pi eta a D/T and
N_A = R/k_B from the MSD, with a statistical error from independent replicas
(particles, else time blocks of non-overlapping displacements) and an
optional systematic budget in quadrature [2, 3].

References
----------
.. [1] Equipartition and the fluctuation-dissipation theorem (common practice);
       reference sheet sections 5, 10, 17.
.. [2] A. Einstein, Ann. Phys. 17, 549 (1905); J. Perrin, Ann. Chim. Phys. 18, 5
       (1909) (from memory).
.. [3] Reference sheet section 19 (estimate per particle, report the mean and
       its standard error across particles; add radius, viscosity and
       temperature uncertainties).
"""
import math

import numpy as np

from .. import units
from .equipartition import axis_moments
from .spectra import _default_segment, baoab_model, segment_averaged_periodogram, fit_psd_model, scheme_model
from .stats import Estimator, FrameSource, InsufficientDataError, single_axis

__all__ = ["EffectiveTemperature", "BoltzmannFromDiffusion", "spectrum_temperature"]

METHODS = ("position", "velocity", "spectrum")
#: Fewest independent replicas behind a standard error across replicas.
MIN_REPLICAS = 16


def _positive(name, value, required=True):
    if value is None and not required:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)) or not (
            math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive number, got {value!r}")
    return float(value)


def spectrum_temperature(fit, friction, overdamped):
    """(T, error) in K from the result of :func:`~langsim.analysis.spectra.fit_psd_model`.

    Underdamped (params variance, f0, Q): T = variance 2 pi f0 Q gamma/k_B;
    overdamped (params D, fc): T = D gamma/k_B. The error propagates the
    Fisher covariance of the fitted parameters.
    """
    p, cov = np.asarray(fit["params"]), np.asarray(fit["covariance"])
    if overdamped:
        return p[0] * friction / units.k_B, math.sqrt(cov[0, 0]) * friction / units.k_B
    T = p[0] * 2.0 * math.pi * p[1] * p[2] * friction / units.k_B
    grad = T / p                        # T is a product: dT/dp_i = T/p_i
    return T, math.sqrt(max(float(grad @ cov @ grad), 0.0))


class EffectiveTemperature(Estimator):
    """Temperature of a mode with its standard error, from one known parameter.

    Parameters
    ----------
    method : "position", "velocity" or "spectrum"
    stiffness : float, N/m (or the mode's own units, e.g. N m/rad; "position")
    mass : float, kg ("velocity")
    friction : float, kg/s, total damping of the mode ("spectrum")
    dt : float, s, time between frames ("spectrum")
    regime : "underdamped" (default) or "overdamped" ("spectrum")
    scheme, step_dt, every : for data of a langsim integrator, the spectrum
        model is the scheme's exact expected periodogram ("baoab",
        "euler-maruyama", "leimkuhler-matthews"; step_dt and every of the
        run); None fits the spectrum of an exactly sampled continuous process
        (aliased Lorentzian or oscillator).
    segment_length : int, frames per periodogram segment ("spectrum"; default
        the largest power of two <= frames/16)
    f_max : float or None, Hz, highest fitted frequency ("spectrum"; for an
        underdamped mode about 2 f0, where segment-edge leakage stays small)
    start : int, first frame used; axis : int or None (3D data)
    guess : (f0, Q) or None, starting point of an underdamped spectral fit

    Attributes (after fit)
    ----------------------
    temperature_, temperature_err_ : K
    kT_ : J
    fit_ : dict of the spectral fit ("spectrum")
    """

    def __init__(self, method="position", stiffness=None, mass=None, friction=None, dt=None,
                 regime="underdamped", scheme=None, step_dt=None, every=1, segment_length=None,
                 f_max=None, start=0, axis=None, guess=None):
        self.method = method
        self.stiffness = stiffness
        self.mass = mass
        self.friction = friction
        self.dt = dt
        self.regime = regime
        self.scheme = scheme
        self.step_dt = step_dt
        self.every = every
        self.segment_length = segment_length
        self.f_max = f_max
        self.start = start
        self.axis = axis
        self.guess = guess

    def fit(self, data):
        """``data``: positions ("position", "spectrum") or velocities ("velocity")."""
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {self.method!r}")
        if self.method == "spectrum":
            return self._fit_spectrum(data)
        known = (_positive("stiffness", self.stiffness) if self.method == "position"
                 else _positive("mass", self.mass))
        _, start = single_axis(data, self.axis, self.start,
                               "positions" if self.method == "position" else "velocities")
        m = axis_moments(data, start=start)
        var, err = m["variance"], m["variance_err"]
        if np.ndim(var):
            var, err = var[self.axis or 0], err[self.axis or 0]
        var, err = float(var), float(err)
        self.temperature_ = known * var / units.k_B
        self.temperature_err_ = known * err / units.k_B
        self.kT_ = self.temperature_ * units.k_B
        return self

    def _fit_spectrum(self, positions):
        gamma = _positive("friction", self.friction)
        dt = _positive("dt", self.dt)
        if self.regime not in ("underdamped", "overdamped"):
            raise ValueError(f"regime must be 'underdamped' or 'overdamped', got {self.regime!r}")
        over = self.regime == "overdamped"
        src = FrameSource(positions, axis=self.axis)
        n = src.n_frames - int(self.start)
        N = self.segment_length or _default_segment(n)
        f, P, count = segment_averaged_periodogram(positions, dt, N, self.start, self.axis)
        if self.f_max is not None:
            keep = f <= self.f_max
            f, P = f[keep], P[keep]
        if self.scheme is None:
            model = "aliased" if over else "aliased-oscillator"
        else:
            step = dt / self.every if self.step_dt is None else _positive("step_dt", self.step_dt)
            model = (scheme_model(self.scheme, step, self.every, N) if over
                     else baoab_model(step, self.every, N))
            if not over and self.scheme != "baoab":
                raise ValueError(f"an underdamped spectrum model exists for scheme 'baoab', got {self.scheme!r}")
        self.fit_ = fit_psd_model(f, P, count, model, dt, start=None if over else self.guess, tol=1e-8)
        self.temperature_, self.temperature_err_ = spectrum_temperature(self.fit_, gamma, over)
        self.kT_ = self.temperature_ * units.k_B
        return self


class BoltzmannFromDiffusion(Estimator):
    """k_B (and N_A) from the mean-squared displacement of free spheres (Perrin's method).

    k_B = 6 pi eta a D/T with D = MSD(t)/(2 t) per axis (or, with ``mass``,
    MSD = 2 D [t - tau (1 - e^(-t/tau))], tau = m/(6 pi eta a), Ornstein-Fuerth),
    and N_A = R/k_B with the exact molar gas constant R.

    Parameters
    ----------
    temperature : K; viscosity : Pa s; radius : m
    dt : s, time between frames
    lag : int, frames per displacement (non-overlapping displacements are used)
    mass : kg or None, inertial correction of the MSD
    radius_rel_err, viscosity_rel_err, temperature_rel_err : relative standard
        uncertainties of the inputs, added in quadrature to the statistical
        error in ``boltzmann_total_err_`` (the viscosity's should include its
        own temperature dependence: T enters twice)
    start : int, first frame used

    Attributes (after fit)
    ----------------------
    diffusion_, diffusion_err_ (m^2/s), boltzmann_, boltzmann_err_ (J/K,
    statistical), boltzmann_total_err_, avogadro_, avogadro_err_ (1/mol,
    statistical), avogadro_total_err_, n_replicas_

    Notes
    -----
    The statistical error is the standard error across independent replicas:
    the particles when there are at least 16, else 16 or more time blocks of
    each particle's non-overlapping displacements (independent for diffusion).
    """

    def __init__(self, temperature, viscosity, radius, dt, lag=1, mass=None, radius_rel_err=0.0,
                 viscosity_rel_err=0.0, temperature_rel_err=0.0, start=0):
        self.temperature = temperature
        self.viscosity = viscosity
        self.radius = radius
        self.dt = dt
        self.lag = lag
        self.mass = mass
        self.radius_rel_err = radius_rel_err
        self.viscosity_rel_err = viscosity_rel_err
        self.temperature_rel_err = temperature_rel_err
        self.start = start

    def fit(self, positions):
        T = _positive("temperature", self.temperature)
        eta = _positive("viscosity", self.viscosity)
        a = _positive("radius", self.radius)
        dt = _positive("dt", self.dt)
        lag = int(self.lag)
        if lag != self.lag or lag < 1:
            raise ValueError(f"lag must be an integer >= 1, got {self.lag!r}")
        src = FrameSource(positions)
        start = src.check_start(self.start)
        x = src.read(start, src.n_frames)[::lag]           # (samples, particles, dims)
        steps = np.diff(x, axis=0)
        sq = (steps * steps).mean(axis=2)                  # (displacements, particles)
        n_disp, n_part = sq.shape
        blocks = 1 if n_part >= MIN_REPLICAS else int(math.ceil(MIN_REPLICAS / n_part))
        per = n_disp // blocks
        if per < 1:
            raise InsufficientDataError(
                f"{n_disp} displacements of {n_part} particle(s) cannot form {MIN_REPLICAS} replicas",
                required_length=blocks * lag + 1 + start, length=src.n_frames)
        reps = sq[:per * blocks].reshape(blocks, per, n_part).mean(axis=1).ravel()
        t = lag * dt
        gamma = units.stokes_friction(eta, a)
        if self.mass is None:
            denom = 2.0 * t
        else:
            tau = _positive("mass", self.mass) / gamma
            denom = 2.0 * (t - tau * -math.expm1(-t / tau))
        d = reps / denom
        self.n_replicas_ = d.size
        self.diffusion_ = float(d.mean())
        self.diffusion_err_ = float(d.std(ddof=1) / math.sqrt(d.size))
        self.boltzmann_ = gamma * self.diffusion_ / T
        self.boltzmann_err_ = gamma * self.diffusion_err_ / T
        rel_stat = self.boltzmann_err_ / self.boltzmann_
        rel_sys = math.sqrt(self.radius_rel_err**2 + self.viscosity_rel_err**2 + self.temperature_rel_err**2)
        self.boltzmann_total_err_ = self.boltzmann_ * math.hypot(rel_stat, rel_sys)
        self.avogadro_ = units.R_GAS / self.boltzmann_
        self.avogadro_err_ = self.avogadro_ * rel_stat
        self.avogadro_total_err_ = self.avogadro_ * math.hypot(rel_stat, rel_sys)
        return self
