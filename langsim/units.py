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


# ----------------------------------------------------------------------- gases
#
# References (gas media)
# .. [6] Air: eta0 = 1.716e-5 Pa s at 273.15 K, S = 110.4 K, as in the reference sheet
#        (section 15); the U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF) writes the same law
#        as beta T^1.5/(T + S) with beta = 1.458e-6 kg/(m s K^0.5) (1.71604e-5 Pa s at
#        273.15 K; from memory).
# .. [7] F. M. White, Viscous Fluid Flow, 3rd ed. (McGraw-Hill 2006), Table 1-2: Sutherland
#        constants of nitrogen (from memory).
# .. [8] Crane Co., Flow of Fluids Through Valves, Fittings and Pipe, Technical Paper 410
#        (1988): Sutherland constants of helium (from memory, as commonly tabulated).
# .. [9] C. Cunningham, Proc. R. Soc. A 83, 357 (1910); slip coefficients of
#        J. H. Kim, G. W. Mulholland, S. R. Kukuck, D. Y. H. Pui, J. Res. NIST 110, 31 (2005)
#        (alpha, beta, gamma = 1.165, 0.483, 0.997; fitted for 0.5 < Kn < 83) and of
#        C. N. Davies, Proc. Phys. Soc. 57, 259 (1945) (1.257, 0.400, 1.10).
# .. [10] P. S. Epstein, "On the resistance experienced by spheres in their motion through
#        gases", Phys. Rev. 23, 710 (1924): F = delta (4 pi/3) a^2 rho c_bar v.

#: Gases of ``[medium] gas``: Sutherland's law eta = eta0 (T/T0)^1.5 (T0 + S)/(T + S)
#: with (eta0 Pa s, T0 K, S K), and the molar mass (kg/mol).
GASES = {
    "air": {"eta0": 1.716e-5, "T0": 273.15, "S": 110.4,                      # [6]
            "molar_mass": 28.9647e-3},     # dry air (reference sheet section 15; from memory)
    "nitrogen": {"eta0": 1.663e-5, "T0": 273.0, "S": 107.0,        # White, Table 1-2 [7]
                 "molar_mass": 28.0134e-3},  # N2, IUPAC atomic weights
    "helium": {"eta0": 1.90e-5, "T0": 273.0, "S": 79.4,            # Crane TP-410 [8]
               "molar_mass": 4.002602e-3},   # He-4, IUPAC atomic weight
}
#: Temperatures (K) where the Sutherland constants above are offered: the range of
#: the CRC Handbook table they agree with to within its stated 3 % (see tests/test_gas.py).
GAS_T_RANGE = (200.0, 500.0)
#: Slip laws of ``[medium] slip``: Cunningham C = 1 + Kn (A1 + A2 exp(-A3/Kn)), Kn = lambda/a [9].
SLIP_COEFFICIENTS = {"kim-2005": (1.165, 0.483, 0.997), "davies-1945": (1.257, 0.400, 1.10)}
#: Epstein's coefficient for diffuse reflection from a sphere that conducts heat
#: perfectly, 1 + pi/8 [10] (a non-conducting sphere has 1 + 9 pi/64, 3.5 % more).
EPSTEIN_DIFFUSE = 1.0 + math.pi / 8.0
#: Molar gas constant, J/(mol K) (exact: k_B N_A).
R_GAS = _sc.R
#: Avogadro constant, 1/mol (exact).
N_A = _sc.N_A
#: Reduced Planck constant, J s (exact).
hbar = _sc.hbar


def gas_viscosity(gas, temperature):
    """Dilute-gas viscosity by Sutherland's law with the constants of :data:`GASES`, Pa s.

    eta = eta0 (T/T0)^(3/2) (T0 + S)/(T + S) [6-8]; independent of pressure
    (kinetic theory; holds down to the free-molecular regime, where it only
    enters through the mean free path).
    """
    c = GASES[gas]
    return c["eta0"] * (temperature / c["T0"]) ** 1.5 * (c["T0"] + c["S"]) / (temperature + c["S"])


def molecule_mass(gas):
    """Mass of one molecule of ``gas``, kg."""
    return GASES[gas]["molar_mass"] / N_A


def mean_molecular_speed(gas, temperature):
    """Mean thermal speed c_bar = sqrt(8 kT/(pi m)) of the gas molecules, m/s."""
    return math.sqrt(8.0 * k_B * temperature / (math.pi * molecule_mass(gas)))


def gas_density(gas, temperature, pressure):
    """Ideal-gas mass density p m/(kT), kg/m^3."""
    return pressure * molecule_mass(gas) / (k_B * temperature)


def mean_free_path(gas, temperature, pressure, viscosity=None):
    """Mean free path from the viscosity, lambda = (eta/p) sqrt(pi kT/(2 m)) = 2 eta/(rho c_bar), m.

    This is the viscosity-based definition (eta = rho c_bar lambda/2) that the
    reference sheet (section 15) uses with the slip laws; hard-sphere and
    Millikan definitions differ by up to a factor 1.43, so use a slip law
    only with the lambda it was fitted with. Kim et al. quote 67.3 nm for air at
    296.15 K and 101.3 kPa (from memory); this gives 65.9 nm there.
    """
    eta = gas_viscosity(gas, temperature) if viscosity is None else viscosity
    return eta / pressure * math.sqrt(math.pi * k_B * temperature / (2.0 * molecule_mass(gas)))


def slip_correction(knudsen, law="kim-2005"):
    """Cunningham slip correction C(Kn) = 1 + Kn (A1 + A2 exp(-A3/Kn)), Kn = lambda/a [9]."""
    a1, a2, a3 = SLIP_COEFFICIENTS[law]
    kn = float(knudsen)
    return 1.0 + kn * (a1 + a2 * math.exp(-a3 / kn)) if kn > 0 else 1.0


def epstein_friction(gas, temperature, pressure, radius, delta=EPSTEIN_DIFFUSE):
    """Free-molecular friction of a sphere, delta (4 pi/3) a^2 rho c_bar (Epstein 1924 [10]), kg/s."""
    return (delta * 4.0 * math.pi / 3.0 * radius**2 * gas_density(gas, temperature, pressure)
            * mean_molecular_speed(gas, temperature))


def gas_friction(gas, temperature, pressure, radius, law="kim-2005"):
    """Friction of a sphere in a gas at any Knudsen number, kg/s.

    ``law`` "kim-2005" or "davies-1945": Stokes drag with Cunningham's slip
    correction, 6 pi eta a/C(Kn) [1, 9], which tends to Stokes for Kn -> 0 and
    to Epstein's free-molecular form with delta = 9/(4 (A1 + A2)) for Kn -> oo
    (1.365 for Kim et al., 2 % below Epstein's diffuse 1 + pi/8); "epstein":
    the free-molecular drag with delta = 1 + pi/8 [10] (valid for Kn >> 1 only).
    """
    if law == "epstein":
        return epstein_friction(gas, temperature, pressure, radius)
    eta = gas_viscosity(gas, temperature)
    kn = mean_free_path(gas, temperature, pressure, eta) / radius
    return stokes_friction(eta, radius) / slip_correction(kn, law)
