"""Exact mean first-passage times (1D and radial), their basin averages and the
Gaussian well's asymptotes, against the worked values of the reference notes
(shared/reference/check-values.md section 12.3, reproduced there by three
independent quadratures in calc/s1_rare_events.py) and against scipy quad.
"""
import math

import numpy as np
import pytest
from scipy import integrate

from langsim import theory as th

# Section 12.3(a): U = B((2x/L)^2 - 1)^2, L = 1, kT = gamma = 1: T(-L/2 -> +L/2), T(-L/2 -> 0)
QUARTIC = {10.0: (6.381773e+02, 3.190669e+02), 15.0: (6.217006e+04, 3.108501e+04),
           20.0: (6.870764e+06, 3.435382e+06)}
# Section 12.3(b): U = -D exp(-2 r^2/w^2), w = 1, kT = gamma = 1: T(0 -> R), T_sep(Z_h), T_KL(R)
GAUSS_3D = [(5, 1.5, 1.598869e+00, 8.820434e-01, 9.973249e-01), (5, 2, 2.450849e+00, 1.222204e+00, 1.221700e+00),
            (10, 1.5, 3.331264e+01, 2.593406e+01, 3.139893e+01), (10, 2, 5.598946e+01, 4.345514e+01, 4.547724e+01),
            (15, 1.5, 1.702064e+03, 1.470807e+03, 1.920712e+03), (15, 2, 3.310310e+03, 2.860589e+03, 3.133058e+03),
            (20, 1.5, 1.210928e+05, 1.090929e+05, 1.519730e+05), (20, 2, 2.671355e+05, 2.406641e+05, 2.716626e+05)]
GAUSS_2D = [(5, 1.5, 4.555218e+00, 3.319959e+00, 4.336942e+00), (10, 2, 3.491255e+02, 3.081954e+02, 3.786704e+02),
            (15, 1.5, 1.224957e+04, 1.136145e+04, 1.923154e+04), (20, 2, 2.777450e+06, 2.630268e+06, 3.480239e+06)]
# 7 significant digits in the tables
REL = 1e-6


def gauss(depth):
    return lambda r: -depth * np.exp(-2.0 * np.asarray(r) ** 2)


@pytest.mark.parametrize("B", sorted(QUARTIC))
def test_quartic_double_well_table(B):
    U = th.quartic_double_well(B, 1.0)
    t_min, t_top = QUARTIC[B]
    assert th.mfpt(U, -0.5, 0.5, 1.0, 1.0) == pytest.approx(t_min, rel=REL)
    assert th.mfpt(U, -0.5, 0.0, 1.0, 1.0) == pytest.approx(t_top, rel=REL)
    assert th.mfpt(U, 0.5, -0.5, 1.0, 1.0) == pytest.approx(t_min, rel=REL)       # mirror image
    assert th.mfpt(th.quartic_double_well(B + 0.1, 1.0), -0.5, 0.5, 1.0, 1.0) != pytest.approx(t_min, rel=0.05)


@pytest.mark.parametrize("d, rows", [(3, GAUSS_3D), (2, GAUSS_2D)])
def test_gaussian_well_radial_tables(d, rows):
    for depth, R, exact, sep, langer in rows:
        assert th.mfpt_radial(gauss(depth), 0.0, R, 1.0, 1.0, d) == pytest.approx(exact, rel=REL)
        assert th.gaussian_well_separable_time(depth, 1.0, R, 1.0, 1.0, d) == pytest.approx(sep, rel=REL)
        assert th.gaussian_well_langer_time(depth, 1.0, R, 1.0, 1.0, d) == pytest.approx(langer, rel=REL)
        # the Jacobian matters: the other dimension is far off
        assert th.mfpt_radial(gauss(depth), 0.0, R, 1.0, 1.0, 5 - d) != pytest.approx(exact, rel=0.05)


def test_radial_convergence_table_and_asymptote_error():
    # section 12.3 convergence table, 3D, R = 3w; (exact/T_sep - 1) -> d(d + 2)/(8 depth) (derived there)
    for depth, exact, ratio in ((20, 4.241781e+05, 1.109993), (40, 5.711906e+13, 1.050467),
                                (80, 3.931355e+30, 1.024290)):
        T = th.mfpt_radial(gauss(depth), 0.0, 3.0, 1.0, 1.0, 3)
        assert T == pytest.approx(exact, rel=REL)
        assert T / th.gaussian_well_separable_time(depth, 1.0, 3.0, 1.0, 1.0, 3) == pytest.approx(ratio, rel=REL)
    assert th.gaussian_well_separable_error(80.0, 1.0, 3) == pytest.approx(15 / 640)
    assert 0.024290 / th.gaussian_well_separable_error(80.0, 1.0, 3) == pytest.approx(1.036, abs=0.01)


def test_si_units_scale_with_w2_gamma_over_kT():
    kT, gamma, w = 4.07e-21, 8.4e-9, 0.8e-6
    U = lambda r: -10 * kT * np.exp(-2 * np.asarray(r) ** 2 / w**2)  # noqa: E731
    assert th.mfpt_radial(U, 0.0, 2 * w, kT, gamma, 3) == pytest.approx(5.598946e+01 * w * w * gamma / kT, rel=REL)


def test_start_at_the_reflecting_point_and_finite_depth_default():
    # a 1D Gaussian well symmetric about 0: reflecting at its centre = exit from |x| < R = radial d = 1
    U = gauss(5.0)
    t_reflect = th.mfpt(U, 0.0, 1.5, 1.0, 1.0, x_reflect=0.0)
    assert t_reflect == pytest.approx(th.mfpt_radial(U, 0.0, 1.5, 1.0, 1.0, 1), rel=1e-9)
    # independent: scipy quad of the Pontryagin double integral (HTB 1990)
    inner = lambda y: integrate.quad(lambda z: math.exp(-U(z)), 0.0, y, epsrel=1e-12)[0]  # noqa: E731
    ref = integrate.quad(lambda y: math.exp(U(y)) * inner(y), 0.0, 1.5, epsrel=1e-12)[0]
    assert t_reflect == pytest.approx(ref, rel=1e-8)
    assert th.mfpt(U, 0.0, 1.5, 1.0, 1.0, x_reflect=-0.5) > 1.1 * ref     # farther reflecting point
    # reflecting at -infinity does not exist for a finite-depth well: said, not a divergent number
    with pytest.raises(ValueError, match="does not confine"):
        th.mfpt(U, 0.0, 1.5, 1.0, 1.0)
    with pytest.raises(ValueError, match="x_reflect"):
        th.mfpt(U, 0.0, 1.5, 1.0, 1.0, x_reflect=0.2)


def test_basin_averages_equal_the_average_of_point_times():
    # T_eq = int p(x) T(x) dx over the basin's Boltzmann density, by scipy quad of the point times
    U = th.quartic_double_well(5.0, 2.0)
    s = -0.3
    w = lambda x: math.exp(-float(U(x)))  # noqa: E731
    Z = integrate.quad(w, -4.0, s, points=[-1.0], epsrel=1e-11)[0]
    avg = integrate.quad(lambda x: w(x) * th.mfpt(U, x, 1.0, 1.0, 1.0), -3.0, s, points=[-1.0],
                         epsrel=1e-9, limit=200)[0] / Z
    T_eq = th.mfpt_equilibrium(U, s, 1.0, 1.0, 1.0)
    assert T_eq == pytest.approx(avg, rel=1e-6)
    assert T_eq != pytest.approx(th.mfpt(U, -1.0, 1.0, 1.0, 1.0), rel=1e-3)
    assert th.mfpt_equilibrium(U, -s, -1.0, 1.0, 1.0) == pytest.approx(T_eq, rel=1e-9)   # mirror image
    G = gauss(10.0)
    wr = lambda r: r * r * math.exp(-float(G(r)))  # noqa: E731
    Zr = integrate.quad(wr, 0.0, 1.0, epsrel=1e-11)[0]
    avg_r = integrate.quad(lambda r: wr(r) * th.mfpt_radial(G, r, 2.0, 1.0, 1.0, 3), 0.0, 1.0,
                           epsrel=1e-9, limit=200)[0] / Zr
    T_r = th.mfpt_radial_equilibrium(G, 1.0, 2.0, 1.0, 1.0, 3)
    assert T_r == pytest.approx(avg_r, rel=1e-6)
    # section 12.3: the equilibrium start shortens T by about w^2 gamma/(4 depth kT)-ish, a small change
    assert 0.0 < (5.598946e+01 - T_r) < 0.1


def test_bad_arguments_are_named():
    with pytest.raises(ValueError, match="dimensions"):
        th.mfpt_radial(gauss(5.0), 0.0, 1.5, 1.0, 1.0, 4)
    with pytest.raises(ValueError, match="r0"):
        th.mfpt_radial(gauss(5.0), 2.0, 1.5, 1.0, 1.0, 3)
    with pytest.raises(ValueError, match="basin_edge"):
        th.mfpt_equilibrium(th.quartic_double_well(5.0, 2.0), 1.0, 1.0, 1.0, 1.0)
    with pytest.raises(ValueError, match="no barrier"):
        th.gaussian_well_langer_time(2.0, 1.0, 1.5, 1.0, 1.0, 3)
