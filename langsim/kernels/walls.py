"""Mobility of a sphere near a plane wall, as scalar numba functions for the kernels.

A sphere of radius a whose centre is at distance h from a plane no-slip wall
moves with mobilities mu_par = parallel_factor / gamma0 along the wall and
mu_perp = perpendicular_factor / gamma0 along its normal, gamma0 = 6 pi eta a
being the bulk (Stokes) friction. Both factors are functions of eps = a/h only.

* Parallel: Faxen's series [1, 2] (as restated in the reference notes, section 3),
  1 - 9/16 eps + 1/8 eps^3 - 45/256 eps^4 - 1/16 eps^5; meant for h >~ 1.5 a
  (common practice); closer to contact the true parallel friction grows
  logarithmically while the series stays finite (0.324 at contact).
* Perpendicular: the closed form of Schaffer, Norrelykke & Howard [3],
  1 - 9/8 eps + 1/2 eps^3 - 57/100 eps^4 + 1/5 eps^5 + 7/200 eps^11 - 1/25 eps^12,
  an approximation of Brenner's exact series [4] (which
  :func:`langsim.units.brenner_perpendicular_factor` sums). Computed here
  against the series: within 0.34 % for every gap from 1e-5 a to 1e4 a (largest at a gap of 0.023 a)
  (tests/test_walls.py); the reference notes list it within 0.3 % for gaps
  >= 0.05 a. It vanishes at contact with slope 1/a, so mu_perp ~ (h - a)/a
  like the lubrication limit.

These functions are the implementation: :mod:`langsim.units` calls their
``py_func`` (plain Python, arithmetic only, so they also take numpy arrays of
eps), the kernels inline them.

References
----------
.. [1] H. Faxen, dissertation, Uppsala (1921) / Ann. Phys. (1923) (citation from
       memory).
.. [2] J. Happel, H. Brenner, Low Reynolds Number Hydrodynamics, Noordhoff (1965).
.. [3] E. Schaffer, S. F. Norrelykke, J. Howard, "Surface forces and drag
       coefficients of microspheres near a plane surface measured with optical
       tweezers", Langmuir 23, 3654 (2007) (formula and citation from memory,
       reference notes section 3).
.. [4] H. Brenner, "The slow motion of a sphere through a viscous fluid towards
       a plane surface", Chem. Eng. Sci. 16, 242 (1961).
"""
from numba import njit

#: Smallest gap (h - a)/a at which the mobilities are evaluated: a centre closer
#: to the wall (or inside it, which a soft wall term makes rare) sees the values
#: at this gap, so the kernels never take the square root of a negative mobility.
MIN_GAP = 1e-6


@njit(inline="always", cache=True)
def faxen_parallel(eps):
    """Parallel mobility factor gamma0/gamma_par at eps = a/h (Faxen's series [1, 2])."""
    e2 = eps * eps
    return 1.0 - 0.5625 * eps + e2 * eps * (0.125 - eps * (0.17578125 + 0.0625 * eps))


@njit(inline="always", cache=True)
def closed_form_perpendicular(eps):
    """Perpendicular mobility factor gamma0/gamma_perp at eps = a/h (closed form [3])."""
    e2 = eps * eps
    e3 = e2 * eps
    e11 = e3 * e3 * e3 * e2
    return (1.0 - 1.125 * eps + e3 * (0.5 - eps * (0.57 - 0.2 * eps))
            + e11 * (0.035 - 0.04 * eps))


@njit(inline="always", cache=True)
def closed_form_perpendicular_slope(eps):
    """d(gamma0/gamma_perp)/d eps of :func:`closed_form_perpendicular`."""
    e2 = eps * eps
    e10 = e2 * e2 * e2 * e2 * e2
    return -1.125 + e2 * (1.5 - eps * (2.28 - eps)) + e10 * (0.385 - 0.48 * eps)


@njit(inline="always", cache=True)
def wall_mobility(h, radius):
    """Mobility factors of a sphere whose centre is ``h`` from a plane wall.

    Parameters
    ----------
    h : float, m
        Centre-to-wall distance; values below ``radius * (1 + MIN_GAP)`` are
        evaluated there.
    radius : float, m

    Returns
    -------
    parallel_factor : float
        gamma0/gamma_par (Faxen).
    perpendicular_factor : float
        gamma0/gamma_perp (closed form of Schaffer et al.).
    d_perpendicular_factor_dh : float, 1/m
        Its derivative with respect to h, for the drift kT d(1/gamma_perp)/dh
        = (kT/gamma0) d_perpendicular_factor_dh.
    """
    lowest = radius * (1.0 + MIN_GAP)
    if h < lowest:
        h = lowest
    eps = radius / h
    return (faxen_parallel(eps), closed_form_perpendicular(eps),
            -closed_form_perpendicular_slope(eps) * eps / h)
