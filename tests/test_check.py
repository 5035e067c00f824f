"""check() on synthetic trajectories with known ground truth.

The harmonic data are Euler-Maruyama sampled exactly through its AR(1) form
(stationary variance (kT/kappa)/(1 - kappa dt/(2 gamma)), reference notes section 6);
check() must pass on them and fail, naming the quantity, on wrong inputs.
"""
import copy
import json
import math

import numpy as np
import pytest

from langsim.checks import CheckReport, check, write_plots
from test_analysis import GAMMA, KT, Traj, config, double_well_sim, harmonic_trajectory, rng


@pytest.fixture(scope="module")
def harmonic():
    return harmonic_trajectory(1)


def failed(report):
    return {r.quantity for r in report.rows if r.status == "fail"}


def test_harmonic_passes(harmonic):
    pos, cfg = harmonic
    rep = check(Traj(pos, cfg))
    assert rep.passed, rep.format_table()
    q = {r.quantity for r in rep.rows}
    assert {"variance x", "variance y", "corner frequency x", "diffusion coefficient y (PSD)"} <= q
    assert rep.start_frame > 0 and "transient" in rep.format_table()
    d = json.loads(rep.to_json())
    assert d["passed"] is True and len(d["rows"]) == len(rep.rows)


def test_harmonic_fails_on_scaled_positions(harmonic):
    pos, cfg = harmonic
    rep = check(Traj(1.3 * pos, cfg))
    assert not rep.passed
    assert {"variance x", "variance y", "diffusion coefficient x (PSD)"} <= failed(rep)
    assert "FAILED: variance x" in rep.format_table()


def test_harmonic_fails_on_wrong_temperature(harmonic):
    pos, cfg = harmonic
    bad = copy.deepcopy(cfg)
    bad["medium"]["temperature"] *= 1.1
    assert {"variance x", "variance y"} <= failed(check(Traj(pos, bad)))


def test_harmonic_fails_on_doubled_dt(harmonic):
    pos, cfg = harmonic
    bad = copy.deepcopy(cfg)
    bad["dynamics"]["dt"] *= 2
    assert {"corner frequency x", "corner frequency y"} <= failed(check(Traj(pos, bad)))
    t = Traj(pos, cfg)
    t.time = t.time * 2  # time axis disagreeing with the configuration
    assert "frame interval" in failed(check(t))


def test_free_diffusion_msd_and_moving_trap():
    # EM free diffusion: increments N(0, 2 D dt) exactly (Einstein 1905)
    dt, n = 1e-4, 20000
    D = KT / GAMMA
    pos = np.cumsum(rng(5).standard_normal((n, 3, 2)) * math.sqrt(2 * D * dt), axis=0)
    cfg = config([], dims=2, dt=dt, steps=n)
    rep = check(Traj(pos, cfg))
    assert rep.passed and sum(r.quantity.startswith("MSD") for r in rep.rows) == 6
    bad = copy.deepcopy(cfg)
    bad["particles"]["friction"] = [GAMMA * 0.8] * 2
    assert any(q.startswith("MSD x") for q in failed(check(Traj(pos, bad))))
    mv = config([{"type": "harmonic", "stiffness": [1e-5, 1e-5], "center": [0, 0], "velocity": [1e-6, 1e-6],
                  "amplitude": [0, 0], "frequency": 0.0, "phase": 0.0}], dims=2, dt=dt, steps=n)
    rep = check(Traj(pos, mv))
    assert any("moving trap" in note for note in rep.notes)
    assert not any(r.quantity == "variance x" for r in rep.rows)


def test_underdamped_free_velocity_and_msd():
    # BAOAB free particle: full-step velocity is AR(1), c = exp(-gamma dt/m); q += dt (v_n + v_{n+1})/2
    m, g, dt, n = 1.0, 1.0, 0.05, 40000
    c = math.exp(-g * dt / m)
    gen = rng(6)
    v = np.empty((n, 4, 1))
    v[0] = gen.standard_normal((4, 1))
    noise = gen.standard_normal((n, 4, 1)) * math.sqrt(1 - c * c)
    for i in range(1, n):
        v[i] = c * v[i - 1] + noise[i]
    kT = 1.0
    vel = v * math.sqrt(kT / m)
    pos = np.concatenate([np.zeros((1, 4, 1)), np.cumsum(dt * 0.5 * (vel[1:] + vel[:-1]), axis=0)])
    cfg = config([], dims=1, friction=g, dt=dt, steps=n, regime="underdamped", scheme="baoab",
                 temperature=kT / 1.380649e-23, mass=m)
    rep = check(Traj(pos, cfg, vel))
    assert rep.passed, rep.format_table()
    assert any(r.quantity == "velocity variance x" for r in rep.rows)
    assert "velocity variance x" in failed(check(Traj(pos, cfg, 1.3 * vel)))


def test_double_well_histogram_and_escape():
    # LM double well at 5 kT in reduced units: exact MFPT 36.4835 (notes section 7)
    x = double_well_sim(21, particles=120, steps=60000)
    pos = x[:, :, None]
    pot = [{"type": "double-well", "barrier": 5.0 * KT, "separation": 2.0, "axis": 0, "stiffness": [0.0],
            "center": [0.0]}]
    cfg = config(pot, dims=1, friction=KT, dt=2e-3, steps=60000, every=10, scheme="leimkuhler-matthews")
    rep = check(Traj(pos, cfg))
    assert rep.passed, rep.format_table()
    q = {r.quantity: r for r in rep.rows}
    assert q["Boltzmann histogram x"].status == "pass"
    assert q["escape rate A->B"].status == "pass" and q["escape rate B->A"].status == "pass"
    assert q["escape rate (Kramers, overdamped)"].status == "info"
    hot = copy.deepcopy(cfg)
    hot["medium"]["temperature"] *= 1.25
    assert "Boltzmann histogram x" in failed(check(Traj(pos, hot)))


def test_plots(harmonic, tmp_path):
    pos, cfg = harmonic
    t = Traj(pos[:20000], cfg)
    paths = write_plots(t, check(t), tmp_path)
    assert {p.split("/")[-1] for p in paths} >= {"msd.png", "psd_x.png"}
    with pytest.raises(TypeError, match="CheckReport"):
        write_plots(t, {}, tmp_path)


def test_bad_config_is_named():
    pos, cfg = harmonic_trajectory(2, frames=1000)
    bad = copy.deepcopy(cfg)
    bad["medium"]["temperature"] = -3
    with pytest.raises(ValueError, match="medium.temperature"):
        check(Traj(pos, bad))
    t = Traj(pos, cfg)
    t.config = copy.deepcopy(cfg)
    del t.config["dynamics"]["dt"]
    with pytest.raises(KeyError, match="dynamics.dt"):
        check(t)
    assert isinstance(check(Traj(pos, cfg)), CheckReport)


def test_engine_double_well_escape_rate_vs_mfpt():
    # engine run at 5 kT: rates from core-set counting vs the exact MFPT double integral (HTB 1990)
    langsim = pytest.importorskip("langsim")
    try:
        run = langsim.run
    except (AttributeError, ImportError) as e:
        pytest.skip(f"engine not available: {e}")
    T = 298.15
    cfg = {"seed": 3, "particles": {"count": 128, "dimensions": 1, "radius": 0.5e-6},
           "medium": {"temperature": T},
           "potential": [{"type": "double-well", "barrier": 5 * 1.380649e-23 * T, "separation": 1e-6, "axis": 0}],
           "dynamics": {"regime": "overdamped", "scheme": "leimkuhler-matthews", "dt": 1e-4, "steps": 800000},
           "output": {"every": 20}}
    rep = check(run(cfg, progress=False))
    rows = {r.quantity: r for r in rep.rows}
    assert rep.passed, rep.format_table()
    assert rows["escape rate A->B"].status == "pass" and rows["escape rate B->A"].status == "pass"


def test_public_check_is_the_function_even_after_submodule_imports():
    import langsim
    import langsim.checks  # noqa: F401  (a submodule import must not shadow langsim.check)
    assert langsim.check is check


def test_engine_lm_psd_reports_the_physical_corner_frequency():
    # Leimkuhler-Matthews recorded every step, r = kappa dt/gamma = 0.05: the PSD rows must show the
    # physical f_c = kappa/(2 pi gamma) and D = kT/gamma (Berg-Sorensen & Flyvbjerg 2004 definitions)
    import langsim
    T, dt = 298.15, 1e-5
    gamma = 6 * math.pi * 0.89e-3 * 0.5e-6  # Stokes friction of the configured sphere (common practice)
    k = 0.05 * gamma / dt
    cfg = {"seed": 4, "particles": {"count": 20, "dimensions": 1, "radius": 0.5e-6},
           "medium": {"temperature": T, "viscosity": 0.89e-3},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"regime": "overdamped", "scheme": "leimkuhler-matthews", "dt": dt, "steps": 100000},
           "output": {"every": 1}}
    traj = langsim.run(cfg, progress=False)
    g = traj.config["particles"]["friction"][0]
    assert abs(g / gamma - 1) < 1e-3
    fc, D = k / (2 * math.pi * g), 1.380649e-23 * T / g
    rep = check(traj)
    rows = {r.quantity: r for r in rep.rows}
    assert rep.passed, rep.format_table()
    cf, dc = rows["corner frequency x"], rows["diffusion coefficient x (PSD)"]
    assert cf.predicted == pytest.approx(fc, rel=1e-12) and dc.predicted == pytest.approx(D, rel=1e-12)
    assert abs(cf.measured - fc) <= 4.5 * cf.error and abs(dc.measured - D) <= 4.5 * dc.error
    assert rows["stiffness x (PSD)"].measured == pytest.approx(2 * math.pi * g * cf.measured, rel=1e-12)
    bad = copy.deepcopy(traj.config)
    bad["dynamics"]["dt"] *= 2
    t2 = Traj(np.asarray(traj.positions), bad)
    assert "corner frequency x" in failed(check(t2))


def test_engine_underdamped_psd_rows():
    # configs/cantilever.toml shortened: f0 = sqrt(k/m)/(2 pi), Q = sqrt(k m)/gamma, k from kT/variance
    import langsim
    cfg = {"seed": 12, "particles": {"count": 1, "dimensions": 1, "mass": 2.53303e-11, "friction": 1.59155e-7},
           "medium": {"temperature": 295.15}, "potential": [{"type": "harmonic", "stiffness": 0.1}],
           "dynamics": {"regime": "underdamped", "scheme": "baoab", "dt": 1e-6, "duration": 0.4},
           "output": {"every": 5, "velocities": True}}
    traj = langsim.run(cfg, progress=False)
    rep = check(traj)
    rows = {r.quantity: r for r in rep.rows}
    assert rep.passed, rep.format_table()
    assert rows["resonance frequency x"].predicted == pytest.approx(1e4, rel=1e-5)
    assert rows["quality factor x"].predicted == pytest.approx(10.0, rel=1e-5)
    assert rows["stiffness x (PSD)"].status == "pass"
    bad = check(Traj(1.3 * np.asarray(traj.positions), traj.config))
    assert {"stiffness x (PSD)", "variance x"} <= failed(bad)


def test_nothing_checked_is_not_a_pass(tmp_path):
    # a periodic potential has no exact prediction here: the report must say so and not pass
    import langsim
    from langsim import cli
    cfg = {"seed": 5, "particles": {"count": 4, "dimensions": 1, "friction": GAMMA},
           "medium": {"temperature": 295.15},
           "potential": [{"type": "periodic", "barrier_kT": 2.0, "period": 1e-6}],
           "dynamics": {"dt": 1e-4, "steps": 2000}, "output": {"every": 10, "path": str(tmp_path / "p.h5")}}
    traj = langsim.run(cfg, progress=False)
    rep = check(traj)
    traj.close()
    assert rep.checked == 0 and not rep.passed
    assert "NOTHING CHECKED" in rep.format_table() and "PASSED" not in rep.format_table()
    assert json.loads(rep.to_json())["passed"] is False
    assert cli.main(["check", str(tmp_path / "p.h5")]) == 1
    harmonic = Traj(*harmonic_trajectory(3, frames=4000))
    assert check(harmonic).checked > 0 and check(harmonic).passed


def test_gaussian_well_escape_rows():
    # 3D Gaussian well at 5 kT, frames every step: escapes by the end against the exact radial
    # survival of each particle's start (radial Smoluchowski equation; discrete-monitoring shift of
    # Broadie, Glasserman & Kou 1997); a wrong depth in the config fails, sparse frames are information
    import langsim
    kT, w, gamma, depth = 1.380649e-23 * 295.15, 1e-6, 1e-8, 5.0
    dt = 0.05 * gamma / (4 * depth * kT / w**2)
    cfg = {"seed": 11, "particles": {"count": 300, "dimensions": 3, "friction": gamma},
           "medium": {"temperature": 295.15},
           "potential": [{"type": "gaussian-well", "depth_kT": depth, "waist": w}],
           "dynamics": {"dt": dt, "steps": 1000}, "output": {"every": 1}}
    traj = langsim.run(cfg, progress=False)
    rep = check(traj)
    rows = {r.key: r for r in rep.rows}
    assert rep.passed, rep.format_table()
    assert rows["escapes.radial"].status == "pass" and 50 < rows["escapes.radial"].predicted < 250
    assert rows["escape_rate.radial"].status == "info"
    assert any("no relaxation time is known for gaussian-well" in n for n in rep.notes), rep.notes
    pos = np.asarray(traj.positions)
    bad = copy.deepcopy(traj.config)
    bad["potential"][0]["depth"] *= 1.4
    assert "escapes by the end (radial)" in failed(check(Traj(pos, bad)))
    sparse = copy.deepcopy(traj.config)
    sparse["output"]["every"] = 10                        # the same run seen every 10 steps
    rep = check(Traj(pos[::10], sparse))
    assert {r.status for r in rep.rows} <= {"info"} and not rep.passed
