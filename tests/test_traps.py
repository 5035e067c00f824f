"""The Rayleigh-regime trap estimate (langsim.traps) against published relations.

- Jones, Marago & Volpe, "Optical Tweezers: Principles and Applications" (2015),
  Fig. 5.7 caption: a field amplitude of 1e5 V/m in water (n = 1.33) is an
  intensity of 1.8e7 W/m^2. With it the depth -(2 pi n a^3 K/c) I0 must equal the
  dipole energy (1/4) alpha E^2, alpha = 4 pi eps0 n^2 a^3 K (Harada & Asakura
  1996, Opt. Commun. 124, 529): this fixes the polarizability's normalisation.
- levitated particle in vacuum: the lateral frequency sqrt(k/m) =
  sqrt(12 P K/(pi rho c w0^4)), independent of the radius (common practice in
  levitated optomechanics, from memory).
- stiffnesses are the curvatures of the beam's energy U = -(2 pi n a^3 K/c) I(r, z)
  (paraxial Gaussian beam, Harada & Asakura 1996), by central differences.
"""
import math

import numpy as np
import pytest
import scipy.constants as sc

from langsim.traps import rayleigh_trap
from langsim.validation import ConfigError


def beam_energy(t, r, z):
    wz2 = t.waist**2 * (1 + (z / t.rayleigh_range) ** 2)
    intensity = t.peak_intensity * t.waist**2 / wz2 * np.exp(-2 * r * r / wz2)
    return -2 * math.pi * t.n_medium * t.radius**3 * t.clausius_mossotti / sc.c * intensity


def test_depth_normalisation_against_published_field_intensity_pair():
    E, I_pub = 1e5, 1.8e7                       # V/m, W/m^2 (Jones, Marago & Volpe 2015, Fig. 5.7)
    n = 1.33
    assert 0.5 * sc.c * n * sc.epsilon_0 * E * E == pytest.approx(I_pub, rel=0.02, abs=0)
    t = rayleigh_trap(1e-3, 633e-9, 0.8e-6, 20e-9, 1.50, n)
    alpha = 4 * math.pi * sc.epsilon_0 * n**2 * t.radius**3 * t.clausius_mossotti
    depth_at = t.depth / t.peak_intensity * I_pub      # depth is linear in the intensity
    assert depth_at == pytest.approx(0.25 * alpha * E * E, rel=0.02, abs=0)
    assert depth_at != pytest.approx(0.5 * alpha * E * E, rel=0.2, abs=0)   # the factor-2 slip would show


def test_stiffness_is_the_curvature_of_the_beam_energy():
    t = rayleigh_trap(50e-3, 1064e-9, 0.7e-6, 40e-9, 1.59, 1.33)
    h = 1e-3 * t.waist
    U = lambda r, z: beam_energy(t, r, z)  # noqa: E731
    assert -U(0.0, 0.0) == pytest.approx(t.depth, rel=1e-12, abs=0)
    lateral = (U(h, 0.0) - 2 * U(0.0, 0.0) + U(-h, 0.0)) / h**2
    axial = (U(0.0, h) - 2 * U(0.0, 0.0) + U(0.0, -h)) / h**2
    assert t.stiffness_lateral == pytest.approx(lateral, rel=1e-5, abs=0)
    assert t.stiffness_axial == pytest.approx(axial, rel=1e-5, abs=0)
    assert t.stiffness_axial != pytest.approx(lateral, rel=0.1, abs=0)
    # the largest axial force of the gradient: max over z of -dU/dz, at z = zR/sqrt 3
    z = np.linspace(0, 3 * t.rayleigh_range, 200001)
    force = -np.gradient(U(0.0, z), z)
    assert np.max(np.abs(force)) == pytest.approx(t.axial_gradient_force, rel=1e-6, abs=0)
    assert t.depth_kT == pytest.approx(t.depth / (sc.k * 295.15), rel=1e-12, abs=0)
    well = t.potential(3)
    assert well["waist"][0] == t.waist and 4 * well["depth"] / well["waist"][2] ** 2 == pytest.approx(
        t.stiffness_axial, rel=1e-12, abs=0)


def test_levitated_lateral_frequency_is_independent_of_radius():
    P, w0, rho = 0.1, 0.6e-6, 2200.0
    for a in (25e-9, 50e-9):
        t = rayleigh_trap(P, 1064e-9, w0, a, 1.45, 1.0)
        omega = math.sqrt(t.stiffness_lateral / (4 / 3 * math.pi * a**3 * rho))
        assert omega == pytest.approx(math.sqrt(12 * P * t.clausius_mossotti / (math.pi * rho * sc.c * w0**4)),
                                      rel=1e-12, abs=0)


def test_validity_limits_are_refused_with_the_limit_named():
    with pytest.raises(ConfigError, match=r"radius = .*wavelength/20"):
        rayleigh_trap(1e-3, 1064e-9, 0.6e-6, 60e-9, 1.59)
    rayleigh_trap(1e-3, 1064e-9, 0.6e-6, 53e-9, 1.59)           # just inside
    with pytest.raises(ConfigError, match=r"n_particle = 1.2.*no trap"):
        rayleigh_trap(1e-3, 1064e-9, 0.6e-6, 50e-9, 1.2, 1.33)
    with pytest.raises(ConfigError, match=r"waist = .*paraxial"):
        rayleigh_trap(1e-3, 1064e-9, 0.2e-6, 50e-9, 1.59)
    with pytest.raises(ConfigError, match=r"scattering force"):
        rayleigh_trap(1e-3, 532e-9, 5e-6, 26e-9, 2.4)             # weak focus, strong scatterer
    with pytest.raises(ConfigError, match=r"power = -1.0: expected a number > 0 \(W\)"):
        rayleigh_trap(-1.0, 1064e-9, 0.6e-6, 50e-9, 1.59)
