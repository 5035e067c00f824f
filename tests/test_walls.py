"""Wall corrections of the friction of a sphere against published values.

Sources: the reference notes (check-values.md) section 3 (table of Faxen's
series, Brenner's exact series and two closed forms against h/a) and section 18
(Brenner's drag factor at alpha = arccosh(h/a), recalled from Brenner 1961,
Chem. Eng. Sci. 16, 242, Table 1; mobility table against the gap).
"""
import math

import numpy as np
import pytest

from langsim import units
from langsim.kernels import walls

# check-values.md section 3: h/a, Faxen gamma_par/gamma0, Brenner gamma_perp/gamma0,
# Schaffer et al. (2007) closed form, 1/(Bevan-Prieve)
TABLE_3 = [
    (1.05, 2.64076, 21.58582, 21.53069),
    (1.10, 2.36026, 11.45916, 11.45229),
    (1.50, 1.61529, 3.20539, 3.20524),
    (math.cosh(1.0), 1.58393, 3.03606, 3.03560),
    (2.00, 1.38613, 2.12554, 2.12480),
    (3.00, 1.22744, 1.56921, 1.56911),
    (5.00, 1.12587, 1.28509, 1.28510),
    (10.0, 1.05948, 1.12619, 1.12620),
]
# check-values.md section 18: Brenner's lambda at alpha (Brenner 1961, Table 1, as recalled)
BRENNER_ALPHA = [(0.5, 9.2518), (1.0, 3.0361), (1.5, 1.8375), (2.0, 1.4129), (2.5, 1.2220),
                 (3.0, 1.1252)]
# check-values.md section 18: gap/a, D_perp/D0 (Brenner), D_par/D0 (Faxen)
TABLE_18 = [(0.01, 0.009814, 0.336004), (0.1, 0.087266, 0.423682), (0.5, 0.311974, 0.619084),
            (1.0, 0.470470, 0.721436), (4.0, 0.778158, 0.888199)]

A = 0.75e-6  # any radius: the factors depend on h/a only


@pytest.mark.parametrize("ha, faxen, brenner, closed", TABLE_3)
def test_factors_match_the_section_3_table(ha, faxen, brenner, closed):
    # tabulated to 6 significant figures: agreement to 5e-6 relative
    h = ha * A
    assert units.faxen_parallel_factor(h, A) == pytest.approx(faxen, rel=5e-6)
    assert units.brenner_perpendicular_factor(h, A) == pytest.approx(brenner, rel=5e-6)
    assert units.closed_form_perpendicular_factor(h, A) == pytest.approx(closed, rel=5e-6)


@pytest.mark.parametrize("alpha, lam", BRENNER_ALPHA)
def test_brenner_series_matches_his_table(alpha, lam):
    # Brenner 1961 Table 1 to 5 significant figures (section 18, from memory there)
    assert units.brenner_perpendicular_factor(math.cosh(alpha) * A, A) == pytest.approx(lam, abs=6e-5)


@pytest.mark.parametrize("gap, d_perp, d_par", TABLE_18)
def test_mobilities_match_the_section_18_table(gap, d_perp, d_par):
    h = (1.0 + gap) * A
    assert 1.0 / units.brenner_perpendicular_factor(h, A) == pytest.approx(d_perp, rel=1e-5)
    assert 1.0 / units.faxen_parallel_factor(h, A) == pytest.approx(d_par, rel=1e-5)


def test_far_field_limits():
    # Lorentz (1907) / Faxen leading orders: 1 + 9/8 eps and 1 + 9/16 eps as eps -> 0;
    # check-values.md section 3: h/a = 1000 gives 1.0011263 for Brenner's series.
    h = 1000.0 * A
    assert units.brenner_perpendicular_factor(h, A) == pytest.approx(1.0011263, abs=2e-7)
    eps = 1e-4
    assert units.brenner_perpendicular_factor(A / eps, A) - 1 == pytest.approx(9 / 8 * eps, rel=1e-3)
    assert units.faxen_parallel_factor(A / eps, A) - 1 == pytest.approx(9 / 16 * eps, rel=1e-3)


GAPS = np.geomspace(1e-5, 1e4, 600)


def test_closed_form_accuracy_against_brenner():
    """The kernels' closed form stays within 0.34 % of the exact series for every gap
    (computed: 0.333 % at most, at a gap of 0.023 a; the reference notes give 0.3 % for
    gaps >= 0.05 a, where it is 0.26 %). The leading-order form 1/(1 - 9/8 eps)
    (Lorentz 1907) is no such approximation: the check fails on it."""
    h = (1.0 + GAPS) * A
    exact = units.brenner_perpendicular_factor(h, A)
    rel = units.closed_form_perpendicular_factor(h, A) / exact - 1.0
    assert np.max(np.abs(rel)) < 3.4e-3
    assert np.max(np.abs(rel[GAPS >= 0.05])) < 3.0e-3
    far = GAPS > 1.0   # only where the Lorentz form is positive
    lorentz = 1.0 / (1.0 - 9 / 8 * A / h[far])
    assert np.max(np.abs(lorentz / exact[far] - 1.0)) > 3.4e-3


def test_contact_limit_is_lubrication():
    """Near contact gamma_perp/gamma0 -> a/gap (Cox & Brenner 1967 leading term,
    section 18); the closed form's mobility has slope exactly 1/a at contact."""
    gap = 1e-5
    assert units.brenner_perpendicular_factor((1 + gap) * A, A) * gap == pytest.approx(1.0, rel=1e-3)
    assert units.perpendicular_mobility_slope((1 + 1e-9) * A, A) * A == pytest.approx(1.0, rel=1e-6)


def test_slope_is_the_derivative_of_the_closed_form():
    """The drift needs d(gamma0/gamma_perp)/dh of the very mobility the noise uses:
    central differences (truncation O(step^2), common practice)."""
    h = (1.0 + GAPS[GAPS > 1e-3]) * A
    step = 1e-6 * (h - A)
    mob = lambda x: 1.0 / units.closed_form_perpendicular_factor(x, A)  # noqa: E731
    numeric = (mob(h + step) - mob(h - step)) / (2 * step)
    np.testing.assert_allclose(units.perpendicular_mobility_slope(h, A), numeric, rtol=1e-6)
    # and it agrees with the slope of Brenner's exact mobility to the closed form's accuracy
    ex = lambda x: 1.0 / units.brenner_perpendicular_factor(x, A)  # noqa: E731
    exact_slope = (ex(h + step) - ex(h - step)) / (2 * step)
    assert np.max(np.abs(units.perpendicular_mobility_slope(h, A) / exact_slope - 1)) < 0.02


def test_kernel_function_is_the_units_formula():
    """wall_mobility (compiled) gives the same numbers as the units functions, and
    finite ones (those at the smallest gap) for a centre at or inside the wall."""
    for h in ((1.0 + GAPS[::37]) * A):
        par, perp, slope = walls.wall_mobility(h, A)
        assert par == pytest.approx(1.0 / units.faxen_parallel_factor(h, A), rel=1e-14)
        assert perp == pytest.approx(1.0 / units.closed_form_perpendicular_factor(h, A), rel=1e-14)
        assert slope == pytest.approx(units.perpendicular_mobility_slope(h, A), rel=1e-14)
    inside = walls.wall_mobility(0.5 * A, A)
    assert inside == walls.wall_mobility(A * (1 + walls.MIN_GAP), A)
    assert all(math.isfinite(v) for v in inside) and inside[1] > 0


def test_bad_arguments_raise():
    with pytest.raises(ValueError, match="expected centre-to-wall distances > radius"):
        units.brenner_perpendicular_factor(0.5 * A, A)
    with pytest.raises(ValueError, match="expected a number > 0"):
        units.faxen_parallel_factor(1e-6, 0.0)


def test_buoyant_mass_and_sedimentation_length():
    # check-values.md section 11: a = 0.5 um at 25 C, l_g = kT/(m_b g) = 15.14 um for
    # polystyrene (1050 kg/m^3) and 0.666 um for silica (2200 kg/m^3) in water (997.05).
    kT = units.k_B * 298.15
    for rho, lg in ((1050.0, 15.14e-6), (2200.0, 0.666e-6)):
        mb = units.buoyant_mass(0.5e-6, rho, 997.05)
        assert kT / (mb * units.g_n) == pytest.approx(lg, rel=1e-3)


# ------------------------------------------------------------------ fixed height

def _trap_near_wall(h, seed=13):
    return {"seed": seed,
            "particles": {"count": 4, "dimensions": 3, "radius": 0.5e-6},
            "medium": {"temperature": 295.15, "viscosity": "water", "wall_distance": h},
            "potential": [{"type": "harmonic", "stiffness": 1e-5}],
            "dynamics": {"dt": 1e-5, "duration": 1.0}, "output": {"every": 2}}


def test_fixed_height_resolves_per_axis_friction():
    from langsim import config
    spec = config.load(_trap_near_wall(1.5e-6))
    r = spec.resolved
    g0 = units.stokes_friction(units.water_viscosity(295.15), 0.5e-6)
    # section 3 table at h/a = 3: Faxen 1.22744, Brenner 1.56921
    assert r["particles"]["bulk_friction"] == pytest.approx(g0, rel=1e-12)
    assert r["particles"]["friction"] == pytest.approx([1.22744 * g0] * 2 + [1.56921 * g0], rel=5e-6)
    assert r["particles"]["friction_parallel"] == r["particles"]["friction"][0]
    assert r["particles"]["friction_perpendicular"] == r["particles"]["friction"][2]
    assert r["medium"]["wall_distance"] == 1.5e-6 and r["medium"]["wall_axis"] == 2
    # the normal may be an axis that is not simulated: then all axes are parallel
    cfg = _trap_near_wall(1.5e-6)
    cfg["particles"]["dimensions"] = 2
    cfg["potential"][0]["stiffness"] = 1e-5
    cfg["medium"]["wall_axis"] = 2
    assert config.load(cfg).particles.friction == pytest.approx((1.22744 * g0,) * 2, rel=5e-6)


def test_trapped_bead_corner_frequency_uses_the_wall_friction():
    """A bead trapped 1.5 um (3 radii) above a wall: the corner frequencies are
    kappa/(2 pi gamma) with gamma = 1.227 gamma0 along the wall (Faxen) and 1.569 gamma0
    along the normal (Brenner 1961), so ``langsim check`` passes (PSD fit as
    Berg-Sorensen & Flyvbjerg 2004); judged with the bulk Stokes friction instead, the
    same data fail (the corner frequencies are 23 % and 57 % lower than bulk)."""
    import copy
    import warnings

    import langsim
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        traj = langsim.run(_trap_near_wall(1.5e-6), progress=False)
    report = langsim.check(traj)
    rows = {r.quantity: r for r in report.rows}
    assert report.passed, report.format_table()
    for ax in "xyz":
        assert rows[f"corner frequency {ax}"].status == "pass"
    assert any("friction corrected for a wall" in n for n in report.notes)
    bulk = copy.deepcopy(traj.config)
    bulk["particles"]["friction"] = [bulk["particles"]["bulk_friction"]] * 3
    wrong = langsim.check(type(traj)(traj.time, traj.positions, None, bulk, traj.status))
    failed = {r.quantity for r in wrong.rows if r.status == "fail"}
    assert {"corner frequency x", "corner frequency y", "corner frequency z"} <= failed


# ------------------------------------------------------------- sedimentation

# Silica-like beads, a = 0.5 um, 2000 kg/m^3 in water at 25 C: l_g = kT/(m_b g) = 799.3 nm
# (check-values.md section 18 table, with rho_f = 997.05); an electrostatic-like wall of
# 100 kT at contact decaying over 50 nm keeps them off the glass.
T_25 = 298.15


def _sediment(seed=21, count=200, duration=20.0, dt=1e-4, **wall):
    return {"seed": seed,
            "particles": {"count": count, "dimensions": 1, "radius": 0.5e-6, "density": 2000.0},
            "medium": {"temperature": T_25, "viscosity": 0.8900e-3},
            "potential": [{"type": "wall", "strength_kT": 100.0, "range": 50e-9, **wall},
                          {"type": "gravity", "fluid_density": 997.05}],
            "dynamics": {"dt": dt, "duration": duration}, "output": {"every": 100}}


@pytest.fixture(scope="module")
def sediment_bulk():
    import langsim
    return langsim.run(_sediment(hydrodynamic=False), progress=False)


def test_sedimentation_length_from_the_config():
    from langsim import config
    spec = config.load(_sediment(hydrodynamic=False))
    force = -spec.resolved["potential"][1]["force"][0]
    # check-values.md section 18: l_g = 799.317858 nm for this bead at 298.15 K
    assert units.k_B * T_25 / force == pytest.approx(799.317858e-9, rel=1e-8)


def test_decay_length_gives_boltzmann_constant(sediment_bulk):
    """Perrin's other method (check-values.md section 11): above the wall's range the
    heights are exponential with l = kT/(m_b g), so k_B = m_b g l/T. The estimate is
    within 4.5 replica standard errors of the SI value (exact since 2019); heights
    read with a 20 % wrong scale (a mis-calibrated focus drive) fail."""
    from langsim.analysis.near_wall import decay_length
    traj = sediment_bulk
    force = -traj.config["potential"][1]["force"][0]
    wall = traj.config["potential"][0]
    cut = wall["radius"] + wall["range"] * math.log(wall["strength"] / (1e-4 * units.k_B * T_25))
    z = np.asarray(traj.positions[20:, :, 0])    # frame 0 is already an equilibrium sample
    ell, err = decay_length(z, cut)
    k_est, k_err = force * ell / T_25, force * err / T_25
    assert k_err / k_est < 0.05
    assert abs(k_est - units.k_B) < 4.5 * k_err
    ell2, err2 = decay_length(1.2 * z, 1.2 * cut)
    assert abs(force * ell2 / T_25 - units.k_B) > 4.5 * force * err2 / T_25


def test_check_of_a_sedimentation_run(sediment_bulk):
    """``langsim check``: height histogram against exp(-U/kT) of wall and gravity
    (Boltzmann), decay length against kT/(m_b g), short-time D against the bulk value;
    a config claiming 30 % more buoyant weight fails the height rows."""
    import copy

    import langsim
    traj = sediment_bulk
    report = langsim.check(traj)
    rows = {r.key: r for r in report.rows}
    assert report.passed, report.format_table()
    assert rows["height_histogram.x"].status == "pass"
    assert rows["decay_length.x"].status == "pass"
    assert any(k.startswith("diffusion_by_height") and r.status == "pass" for k, r in rows.items())
    heavy = copy.deepcopy(traj.config)
    heavy["potential"][1]["force"] = [1.3 * heavy["potential"][1]["force"][0]]
    wrong = langsim.check(type(traj)(traj.time, traj.positions, None, heavy, traj.status))
    failed = {r.key for r in wrong.rows if r.status == "fail"}
    assert {"height_histogram.x", "decay_length.x"} <= failed


# ------------------------------------------------- calibration of the error bars

def _renewal_heights(rng, shape, keep):
    """Exponential(1) heights, each frame kept from the previous one with probability
    ``keep`` (a Markov chain with the exponential as its stationary law; integrated
    autocorrelation time (1 + keep)/(1 - keep) frames)."""
    fresh = rng.exponential(size=shape)
    stay = rng.random(shape) < keep
    z = fresh.copy()
    for n in range(1, shape[-2]):
        z[..., n, :] = np.where(stay[..., n, :], z[..., n - 1, :], fresh[..., n, :])
    return z


def test_decay_length_error_is_calibrated():
    """z-scores of the decay length over 300 synthetic experiments (correlated exponential
    heights, known l = 1) have mean 0 and standard deviation 1 within 4.5 of their standard
    errors (1/sqrt(300) and 1/sqrt(600)); with blocks shorter than the correlation time the
    errors are too small and the same test fails."""
    from langsim.analysis.near_wall import decay_length
    rng = np.random.Generator(np.random.PCG64(71))
    z = _renewal_heights(rng, (300, 600, 30), keep=0.8)
    cut = 0.5
    good, naive = [], []
    for e in z:
        ell, err = decay_length(e, cut)
        good.append((ell - 1.0) / err)
        ell, err = decay_length(e, cut, n_blocks=300)
        naive.append((ell - 1.0) / err)
    good, naive = np.array(good), np.array(naive)
    assert abs(good.mean()) < 4.5 / math.sqrt(300)
    assert abs(good.std(ddof=1) - 1.0) < 4.5 / math.sqrt(600)
    assert naive.std(ddof=1) - 1.0 > 4.5 / math.sqrt(600)


def test_increments_by_height_error_is_calibrated():
    """Squared increments whose variance depends on the starting height, 2 D(h) tau with
    D = 1 + h: the difference from the prediction, in units of its error, is standard
    normal over 200 experiments x 3 bins; predicting with D = 1.03 (1 + h) is detected."""
    from langsim.analysis.near_wall import increments_by_height
    rng = np.random.Generator(np.random.PCG64(72))
    tau = 0.1
    edges = np.array([0.0, 0.4, 1.1, 20.0])
    zs, biased = [], []
    for _ in range(200):
        h = _renewal_heights(rng, (400, 25), keep=0.7)
        dx = rng.standard_normal((399, 25)) * np.sqrt(2 * (1 + h[:-1]) * tau)
        x = np.concatenate([np.zeros((1, 25)), np.cumsum(dx, axis=0)])
        pos = np.stack([x, h], axis=-1)
        r = increments_by_height(pos, 1, edges, lambda h0, ax: 2 * (1 + h0) * tau, n_blocks=4)
        zs.extend(r["difference"][:, 0] / r["difference_err"][:, 0])
        r = increments_by_height(pos, 1, edges, lambda h0, ax: 2.06 * (1 + h0) * tau, n_blocks=4)
        biased.extend(r["difference"][:, 0] / r["difference_err"][:, 0])
    zs, biased = np.array(zs), np.array(biased)
    n = zs.size
    assert abs(zs.mean()) < 4.5 / math.sqrt(n)
    assert abs(zs.std(ddof=1) - 1.0) < 4.5 / math.sqrt(2 * n)
    assert abs(biased.mean()) > 4.5 / math.sqrt(n)
