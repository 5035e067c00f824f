"""Physical constants, Stokes drag, the viscosity of liquid water, wall corrections.

Every physical constant used by the package comes from this module, which takes
them from :mod:`scipy.constants` (CODATA; k_B is exact in the SI since 2019).

References
----------
.. [1] G. G. Stokes, Trans. Cambridge Philos. Soc. 9, 8 (1851).
.. [2] M. L. Huber et al., "New international formulation for the viscosity of
       H2O", J. Phys. Chem. Ref. Data 38, 101 (2009) (IAPWS 2008).
.. [3] G. S. Kell, "Density, thermal expansivity, and compressibility of liquid
       water from 0 to 150 C", J. Chem. Eng. Data 20, 97 (1975).
.. [4] H. Brenner, "The slow motion of a sphere through a viscous fluid towards
       a plane surface", Chem. Eng. Sci. 16, 242 (1961).
.. [5] H. Faxen (1923), as given in J. Happel, H. Brenner, Low Reynolds Number
       Hydrodynamics (1965); E. Schaffer, S. F. Norrelykke, J. Howard, Langmuir
       23, 3654 (2007): see :mod:`langsim.kernels.walls`.
"""
import math

import numpy as np
import scipy.constants as _sc

#: Boltzmann constant, J/K (exact, SI 2019).
k_B = _sc.k
#: Standard acceleration of gravity, m/s^2.
g_n = _sc.g
#: 0 degC in kelvin.
ZERO_CELSIUS = _sc.zero_Celsius

# IAPWS 2008 reference constants [2].
_T_STAR = 647.096  # K
_RHO_STAR = 322.0  # kg/m^3
_MU_STAR = 1.0e-6  # Pa s
_H0 = (1.67752, 2.20462, 0.6366564, -0.241605)
# Nonzero H_ij (i: temperature index, j: density index) of IAPWS 2008, Table 3.
_HIJ = {
    (0, 0): 0.520094, (1, 0): 0.0850895, (2, 0): -1.08374, (3, 0): -0.289555,
    (0, 1): 0.222531, (1, 1): 0.999115, (2, 1): 1.88797, (3, 1): 1.26613,
    (5, 1): 0.120573,
    (0, 2): -0.281378, (1, 2): -0.906851, (2, 2): -0.772479, (3, 2): -0.489837,
    (4, 2): -0.257040,
    (0, 3): 0.161913, (1, 3): 0.257399,
    (0, 4): -0.0325372, (3, 4): 0.0698452,
    (4, 5): 0.00872102,
    (3, 6): -0.00435673, (5, 6): -0.000593264,
}

#: Temperature range (K) over which :func:`water_viscosity` is offered: liquid
#: water at ambient pressure, where Kell's density correlation [3] holds.
WATER_T_RANGE = (273.15, 373.15)


def water_density(temperature):
    """Density of air-free liquid water at 1 atm (Kell 1975 [3]).

    Parameters
    ----------
    temperature : float, K

    Returns
    -------
    float, kg/m^3
    """
    t = temperature - ZERO_CELSIUS
    num = (999.83952 + 16.945176 * t - 7.9870401e-3 * t**2 - 46.170461e-6 * t**3
           + 105.56302e-9 * t**4 - 280.54253e-12 * t**5)
    return num / (1.0 + 16.879850e-3 * t)


def water_viscosity(temperature):
    """Dynamic viscosity of liquid water at ambient pressure.

    IAPWS 2008 formulation [2] without the critical enhancement (negligible away
    from the critical point), evaluated at Kell's density [3]. Stated
    uncertainty of the formulation for liquid water near ambient conditions:
    about 1 %.

    Parameters
    ----------
    temperature : float, K
        Between 273.15 and 373.15 K.

    Returns
    -------
    float, Pa s
    """
    tb = temperature / _T_STAR
    rb = water_density(temperature) / _RHO_STAR
    mu0 = 100.0 * math.sqrt(tb) / sum(h / tb**i for i, h in enumerate(_H0))
    s = sum(h * (1.0 / tb - 1.0)**i * (rb - 1.0)**j for (i, j), h in _HIJ.items())
    return mu0 * math.exp(rb * s) * _MU_STAR


def stokes_friction(viscosity, radius):
    """Stokes drag coefficient 6 pi eta a of a no-slip sphere [1], kg/s."""
    return 6.0 * math.pi * viscosity * radius


def sphere_mass(radius, density):
    """Mass of a homogeneous sphere, kg."""
    return 4.0 / 3.0 * math.pi * radius**3 * density


# ----------------------------------------------------------- wall corrections
# A sphere of radius a, centre at distance h from a plane no-slip wall. The
# factors are frictions relative to the bulk value gamma0 (>= 1); their
# inverses are the mobility factors the kernels use (langsim.kernels.walls,
# whose formulas these functions call, so there is one definition of each).


def _eps(h, radius):
    h = np.asarray(h, dtype=float)
    if not radius > 0:
        raise ValueError(f"radius = {radius!r}: expected a number > 0 (m)")
    if np.any(~(h > radius)):
        raise ValueError(f"h = {h!r}: expected centre-to-wall distances > radius = {radius!r} (m)")
    return radius / h


def _walls():
    from .kernels import walls   # numba: imported on first use only
    return walls


def faxen_parallel_factor(h, radius):
    """gamma_par/gamma0 of a sphere at centre-to-wall distance ``h`` (Faxen's series [5]).

    Parameters
    ----------
    h : float or array, m (> radius); radius : float, m

    Returns
    -------
    float or array, >= 1. Meant for h >~ 1.5 radius (common practice).
    """
    return 1.0 / _walls().faxen_parallel.py_func(_eps(h, radius))


def closed_form_perpendicular_factor(h, radius):
    """gamma_perp/gamma0 from the closed form of Schaffer et al. [5] (what the kernels use).

    Within 0.34 % of :func:`brenner_perpendicular_factor` for all gaps.
    """
    return 1.0 / _walls().closed_form_perpendicular.py_func(_eps(h, radius))


def perpendicular_mobility_slope(h, radius):
    """d(gamma0/gamma_perp)/dh of the closed form, 1/m: the kernels' drift is kT/gamma0 times this."""
    eps = _eps(h, radius)
    return -_walls().closed_form_perpendicular_slope.py_func(eps) * eps / np.asarray(h, dtype=float)


def brenner_perpendicular_factor(h, radius, rtol=1e-16):
    """gamma_perp/gamma0 from Brenner's exact series [4] (reference notes, sections 3 and 18).

    lambda = (4/3) sinh(alpha) sum_n n(n+1)/((2n-1)(2n+3))
    [(2 sinh((2n+1)alpha) + (2n+1) sinh(2 alpha)) / (4 sinh^2((n+1/2)alpha)
    - (2n+1)^2 sinh^2(alpha)) - 1], alpha = arccosh(h/radius), summed in the
    overflow-free form (numerator and denominator times exp(-(2n+1) alpha))
    until a term is below ``rtol`` of the sum.

    Parameters
    ----------
    h : float or array, m (> radius); radius : float, m

    Returns
    -------
    float or array, >= 1.
    """
    ratio = 1.0 / _eps(h, radius)
    alpha = np.arccosh(ratio)
    sh, sh2 = np.sinh(alpha), np.sinh(2.0 * alpha)
    total = np.zeros_like(alpha)
    n = 1
    while True:
        m = 2 * n + 1
        e = np.exp(-m * alpha)
        num = (1.0 - e * e) + m * sh2 * e
        den = (1.0 - e) ** 2 - m * m * sh * sh * e
        term = n * (n + 1) / ((2 * n - 1) * (2 * n + 3)) * (num / den - 1.0)
        total = total + term
        if n > 5 and np.all(np.abs(term) <= rtol * np.abs(total)):
            break
        n += 1
    out = 4.0 / 3.0 * sh * total
    return float(out) if out.ndim == 0 else out


def wall_frictions(bulk_friction, h, radius):
    """(gamma_par, gamma_perp), kg/s, at a fixed height: Faxen parallel, Brenner perpendicular."""
    return (bulk_friction * faxen_parallel_factor(h, radius),
            bulk_friction * brenner_perpendicular_factor(h, radius))


def buoyant_mass(radius, density, fluid_density):
    """(4/3) pi a^3 (rho_p - rho_f), kg: gravity minus buoyancy is this times g."""
    return 4.0 / 3.0 * math.pi * radius**3 * (density - fluid_density)
