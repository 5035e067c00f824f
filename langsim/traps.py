"""Depth and stiffness of a single-beam laser trap for a small sphere (Rayleigh regime).

An estimate for planning, never a calibration: the sphere is a point dipole in a
paraxial Gaussian beam (TEM00) focused to a waist ``w0``. With the relative index
m = n_particle/n_medium and the Clausius-Mossotti factor K = (m^2 - 1)/(m^2 + 2),
the gradient force derives from the energy [1]

    U(r, z) = -(2 pi n_medium a^3 K / c) I(r, z),
    I(r, z) = I0 (w0/w(z))^2 exp(-2 r^2/w(z)^2),  I0 = 2 P/(pi w0^2),
    w(z) = w0 sqrt(1 + z^2/zR^2),  zR = pi w0^2 n_medium/lambda0,

so the depth is U0 = 2 pi n_medium a^3 K I0/c, the lateral stiffness
4 U0/w0^2 and the axial stiffness 2 U0/zR^2. The scattering force at the focus,
F_scat = (n_medium/c) I0 (8 pi/3) k^4 a^6 K^2 with k = 2 pi n_medium/lambda0 [1],
pushes the sphere along the beam; the trap holds axially only when the largest
axial gradient force, (2 pi n_medium a^3 K/c) (9/(8 sqrt 3)) I0/zR at z = zR/sqrt 3,
exceeds it (the stability criterion of [2]).

Validity, refused beyond it (:class:`~langsim.validation.ConfigError`):
- Rayleigh regime: radius <= lambda0/20 (common practice; the dipole
  approximation's error grows with the size parameter k a, [3] Fig. 5.1 shows
  where it departs from the exact calculation);
- paraxial beam: waist >= lambda0/(pi n_medium) (beam divergence below one
  radian); for tightly focused beams (high numerical aperture) the paraxial
  model is itself only an estimate, within a factor of order 2;
- m > 1 (a sphere of lower index than the medium is pushed out of the focus);
- axial stability as above.
Neglected: absorption (heating), the axial shift of the equilibrium by the
scattering force, aberrations, a nearby surface.

Laser safety follows local regulations and the laboratory's laser safety
officer; this model is an estimate, never a substitute for calibrating the
instrument.

References
----------
.. [1] Y. Harada, T. Asakura, "Radiation forces on a dielectric sphere in the
       Rayleigh scattering regime", Opt. Commun. 124, 529 (1996).
.. [2] A. Ashkin, J. M. Dziedzic, J. E. Bjorkholm, S. Chu, "Observation of a
       single-beam gradient force optical trap for dielectric particles",
       Opt. Lett. 11, 288 (1986).
.. [3] P. H. Jones, O. M. Marago, G. Volpe, "Optical Tweezers: Principles and
       Applications", Cambridge University Press (2015), chapter 5.
"""
import math
from dataclasses import dataclass

import scipy.constants as _sc

from .units import k_B
from .validation import ConfigError

__all__ = ["RayleighTrap", "rayleigh_trap", "RAYLEIGH_LIMIT"]

#: Largest radius, in vacuum wavelengths, accepted as the Rayleigh regime (common practice).
RAYLEIGH_LIMIT = 1.0 / 20.0
_C = _sc.c
#: Largest axial gradient of the on-axis intensity I0/(1 + z^2/zR^2), in units of I0/zR (at z = zR/sqrt 3).
_MAX_AXIAL_SLOPE = 9.0 / (8.0 * math.sqrt(3.0))


@dataclass(frozen=True)
class RayleighTrap:
    """What :func:`rayleigh_trap` computes (SI units)."""

    power: float                #: W, at the focus
    wavelength: float           #: m, in vacuum
    waist: float                #: m, 1/e^2 intensity radius at the focus
    radius: float               #: m, of the sphere
    n_particle: float
    n_medium: float
    temperature: float          #: K
    clausius_mossotti: float    #: K = (m^2 - 1)/(m^2 + 2)
    peak_intensity: float       #: W/m^2, I0 = 2 P/(pi w0^2)
    rayleigh_range: float       #: m, zR = pi w0^2 n_medium/lambda0
    depth: float                #: J, U0
    stiffness_lateral: float    #: N/m, 4 U0/w0^2
    stiffness_axial: float      #: N/m, 2 U0/zR^2
    scattering_force: float     #: N, at the focus
    axial_gradient_force: float  #: N, largest axial gradient force
    size_parameter: float       #: k a, k = 2 pi n_medium/lambda0

    @property
    def depth_kT(self):
        """Depth in units of k_B T."""
        return self.depth / (k_B * self.temperature)

    @property
    def stability_ratio(self):
        """Largest axial gradient force over the scattering force at the focus (> 1 holds)."""
        return self.axial_gradient_force / self.scattering_force

    def potential(self, dimensions=3):
        """A ``[[potential]]`` table: a Gaussian well of the same depth and curvatures.

        Laterally exact (the beam's Gaussian profile); along the beam axis (the
        last axis in 3D) the Lorentzian-like profile is replaced by the Gaussian
        of the same curvature, waist sqrt(2) zR, which is deeper in its tails:
        escape times along the axis are then estimates too.
        """
        if dimensions not in (1, 2, 3):
            raise ConfigError(f"dimensions = {dimensions!r}: expected 1, 2 or 3")
        waists = [self.waist] * dimensions
        if dimensions == 3:
            waists[2] = math.sqrt(2.0) * self.rayleigh_range
        return {"type": "gaussian-well", "depth": self.depth, "waist": waists}

    def summary(self):
        """One paragraph in practical units."""
        return (f"Rayleigh-regime estimate for a {2e9 * self.radius:.4g} nm sphere (n = "
                f"{self.n_particle:g} in n = {self.n_medium:g}), {1e3 * self.power:.4g} mW at "
                f"{1e9 * self.wavelength:.4g} nm, waist {1e9 * self.waist:.4g} nm: depth "
                f"{self.depth_kT:.3g} kT, stiffness {1e3 * self.stiffness_lateral:.3g} pN/nm lateral, "
                f"{1e3 * self.stiffness_axial:.3g} pN/nm axial, gradient/scattering "
                f"{self.stability_ratio:.3g}. An estimate: calibrate the instrument itself.")


def _positive(name, value, units):
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    if not (math.isfinite(v) and v > 0):
        raise ConfigError(f"{name} = {value!r}: expected a number > 0 ({units})")
    return v


def rayleigh_trap(power, wavelength, waist, radius, n_particle, n_medium=1.33, temperature=295.15):
    """Depth and stiffness of a single-beam trap for a small sphere, by the dipole approximation.

    Parameters
    ----------
    power : float, W (at the focus)
    wavelength : float, m (in vacuum)
    waist : float, m (1/e^2 intensity radius of the focus)
    radius : float, m (of the sphere)
    n_particle, n_medium : float (refractive indices; water 1.33)
    temperature : float, K (for ``depth_kT``; default 295.15)

    Returns
    -------
    RayleighTrap

    Raises
    ------
    ConfigError
        Outside the model's validity (see the module docstring), naming the
        argument, its value and the limit.

    Examples
    --------
    >>> t = rayleigh_trap(0.5e-3, 1064e-9, 0.6e-6, 50e-9, 1.59)   # polystyrene in water
    >>> round(t.depth_kT, 3)      # far too shallow to hold it: raise the power
    0.095
    """
    P = _positive("power", power, "W")
    lam = _positive("wavelength", wavelength, "m")
    w0 = _positive("waist", waist, "m")
    a = _positive("radius", radius, "m")
    n_p = _positive("n_particle", n_particle, "refractive index")
    n_m = _positive("n_medium", n_medium, "refractive index")
    T = _positive("temperature", temperature, "K")
    if a > RAYLEIGH_LIMIT * lam:
        raise ConfigError(f"radius = {radius!r}: expected at most wavelength/20 = {RAYLEIGH_LIMIT * lam:.4g} m "
                          "for the Rayleigh (dipole) regime; a larger sphere needs Mie theory")
    if w0 < lam / (math.pi * n_m):
        raise ConfigError(f"waist = {waist!r}: expected at least wavelength/(pi n_medium) = "
                          f"{lam / (math.pi * n_m):.4g} m for the paraxial Gaussian beam of this model")
    m = n_p / n_m
    if m <= 1.0:
        raise ConfigError(f"n_particle = {n_particle!r}: expected more than n_medium = {n_m!r}; a sphere of "
                          "lower index is pushed out of the focus, there is no trap")
    K = (m * m - 1.0) / (m * m + 2.0)
    I0 = 2.0 * P / (math.pi * w0 * w0)
    zR = math.pi * w0 * w0 * n_m / lam
    coupling = 2.0 * math.pi * n_m * a**3 * K / _C          # U = -coupling * I
    depth = coupling * I0
    k = 2.0 * math.pi * n_m / lam
    f_scat = n_m / _C * I0 * (8.0 * math.pi / 3.0) * k**4 * a**6 * K * K
    f_grad = coupling * _MAX_AXIAL_SLOPE * I0 / zR
    trap = RayleighTrap(P, lam, w0, a, n_p, n_m, T, K, I0, zR, depth, 4.0 * depth / w0**2,
                        2.0 * depth / zR**2, f_scat, f_grad, k * a)
    if f_grad <= f_scat:
        raise ConfigError(f"waist = {waist!r}: the scattering force ({f_scat:.3g} N) exceeds the largest axial "
                          f"gradient force ({f_grad:.3g} N), so a single beam does not hold the sphere along "
                          "its axis; expected a tighter focus or a smaller sphere")
    return trap
