"""Cold damping, effective-temperature estimators, and k_B from the MSD (Perrin).

Outside references:
- cold damping: a Langevin equation with damping gamma + gamma_fb and noise 2 gamma kT is
  thermal at T gamma/(gamma + gamma_fb) (fluctuation-dissipation theorem; common practice);
  the exact Ornstein-Uhlenbeck velocity update of the O step (Gillespie 1996, Phys. Rev. E 54,
  2084; from memory) keeps it exact at any step;
- BAOAB: positions exact kT/k, full-step velocity variance (kT/m)(1 - w0^2 dt^2/4) (reference
  sheet section 6; Leimkuhler & Matthews 2013, AMRX);
- k_B = 6 pi eta a D/T (Einstein 1905, Ann. Phys. 17, 549; reference sheet sections 11, 19),
  compared with scipy.constants.k and scipy.constants.N_A; water viscosity IAPWS 2008.
Statistics: particles are independent replicas; bound Z_MAX; error-bar coverage tested.
"""
import copy
import math

import numpy as np
import pytest
import scipy.constants

import langsim
from langsim import units
from langsim.analysis import BoltzmannFromDiffusion, EffectiveTemperature
from langsim.checks import check

from conftest import Z_MAX, replica_mean, z_score

T = 295.15
KT = units.k_B * T


def test_cold_damping_is_exact_in_the_O_step_per_axis():
    # free particles, BAOAB, a coarse O step (gamma dt/m = 1): the full-step velocity variance of a
    # free particle is exactly kT_noise/m; feedback 0, gamma, 4 gamma on the three axes
    m, g, dt = 1e-15, 1e-9, 1e-6
    cfg = {"seed": 21, "particles": {"count": 2000, "dimensions": 3, "mass": m, "friction": g,
                                     "feedback": [0.0, g, 4 * g]},
           "medium": {"temperature": T}, "dynamics": {"regime": "underdamped", "dt": dt, "steps": 200}}
    traj = langsim.run(cfg, progress=False)
    v2, err = replica_mean((np.asarray(traj.velocities[1:]) ** 2).mean(axis=0))
    want = KT / m * np.array([1.0, 0.5, 0.2])
    assert np.all(np.abs(z_score(v2, err, want)) < Z_MAX), (v2 / (KT / m), err / (KT / m))
    assert np.all(np.abs(z_score(v2[1:], err[1:], KT / m)) > Z_MAX)     # fails against the bath temperature
    assert traj.config["particles"]["feedback"] == [0.0, g, 4 * g]


@pytest.fixture(scope="module")
def cooled_mode():
    # a 10 kHz mechanical mode, Q = 20 without feedback, cooled by feedback = 4 gamma to T/5, Q_eff = 4
    k, f0, Q = 0.1, 1e4, 20.0
    m = k / (2 * math.pi * f0) ** 2
    g = math.sqrt(k * m) / Q
    cfg = {"seed": 22, "oscillator": {"kind": "mechanical", "stiffness": k, "resonance_frequency": f0,
                                      "quality_factor": Q, "feedback": 4 * g, "count": 16},
           "medium": {"temperature": T}, "dynamics": {"dt": 1e-6, "steps": 5 * 65536}, "output": {"every": 5}}
    return langsim.run(cfg, progress=False), k, m, g


def test_cold_damping_effective_temperature_and_broadened_peak(cooled_mode):
    traj, k, m, g = cooled_mode
    T_eff = T * g / (g + 4 * g)
    start = 500
    x2, err = replica_mean((np.asarray(traj.positions[start:, :, 0]) ** 2).mean(axis=0))
    assert abs(z_score(x2, err, units.k_B * T_eff / k)) < Z_MAX          # BAOAB positions exact at T_eff
    assert abs(z_score(x2, err, KT / k)) > Z_MAX
    rep = check(traj)
    rows = {r.quantity: r for r in rep.rows}
    assert rep.passed, rep.format_table()
    assert rows["quality factor"].predicted == pytest.approx(math.sqrt(k * m) / (5 * g))     # broadened
    assert rows["displacement variance"].predicted == pytest.approx(units.k_B * T_eff / k)   # lowered
    for way in ("position variance", "velocity variance", "spectrum"):
        r = rows[f"effective temperature ({way})"]
        assert abs(r.z) < Z_MAX and r.status == "info"
    # wrong input: the same data checked as if there were no feedback
    bare = copy.copy(traj)
    bare.config = copy.deepcopy(traj.config)
    bare.config["particles"].pop("feedback")
    bad = {r.quantity for r in check(bare).rows if r.status == "fail"}
    assert {"displacement variance", "velocity variance", "quality factor"} <= bad


def test_effective_temperature_three_ways_with_calibrated_errors(cooled_mode):
    traj, k, m, g = cooled_mode
    T_eff = T / 5
    dt, every = 1e-6, 5
    f0, Q_eff = math.sqrt(k / m) / (2 * math.pi), math.sqrt(k * m) / (5 * g)
    x = np.asarray(traj.positions[500:])
    v = np.asarray(traj.velocities[500:])
    corr = 1 - k / m * dt**2 / 4                 # BAOAB full-step velocities (section 6)
    z = {"position": [], "velocity": [], "spectrum": []}
    # 16 copies -> 8 independent pairs: z of each estimate, coverage of the error bars
    for p in range(0, 16, 2):
        xs, vs = x[:, p:p + 2], v[:, p:p + 2]
        z["position"].append(z_score(*_fit(EffectiveTemperature("position", stiffness=k), xs), T_eff))
        z["velocity"].append(z_score(*_fit(EffectiveTemperature("velocity", mass=m), vs), T_eff * corr))
        sp = EffectiveTemperature("spectrum", friction=5 * g, dt=dt * every, scheme="baoab", step_dt=dt,
                                  every=every, segment_length=4096, f_max=2 * f0, guess=(f0, Q_eff))
        z["spectrum"].append(z_score(*_fit(sp, xs), T_eff))
    for way, zs in z.items():
        zs = np.array(zs)
        assert np.all(np.abs(zs) < Z_MAX), (way, zs)
        # coverage: the mean square of 8 z-scores is chi-square(8)/8, 1 +- 0.5: below 3.25 (4.5 SE) and
        # above 0.1 (P = 1e-3); error bars 2x too small would give about 4
        assert 0.1 < np.mean(zs**2) < 3.25, (way, zs)
    # a wrong known parameter is seen
    assert abs(z_score(*_fit(EffectiveTemperature("position", stiffness=1.2 * k), x), T_eff)) > Z_MAX


def _fit(est, data):
    est.fit(data)
    return est.temperature_, est.temperature_err_


# ------------------------------------------------------------- k_B (Perrin)
A_BEAD = 0.5e-6


@pytest.fixture(scope="module")
def diffusion_run():
    # 4000 free 1 um beads in water at 25 C, 2D, Euler-Maruyama (increments exactly N(0, 2 D dt))
    cfg = {"seed": 23, "particles": {"count": 4000, "dimensions": 2, "radius": A_BEAD},
           "medium": {"temperature": 298.15, "viscosity": "water"},
           "dynamics": {"dt": 0.01, "steps": 200}}
    return langsim.run(cfg, progress=False)


def test_boltzmann_constant_from_msd_against_scipy(diffusion_run):
    traj = diffusion_run
    eta = traj.config["medium"]["viscosity"]
    est = BoltzmannFromDiffusion(298.15, eta, A_BEAD, 0.01, radius_rel_err=0.01).fit(traj.positions)
    assert est.n_replicas_ == 4000
    assert abs(z_score(est.boltzmann_, est.boltzmann_err_, scipy.constants.k)) < Z_MAX
    assert abs(z_score(est.avogadro_, est.avogadro_err_, scipy.constants.N_A)) < Z_MAX
    # the statistical error is sqrt(2/(d N K)) relative (exact chi-square, reference sheet section 19)
    assert est.boltzmann_err_ / est.boltzmann_ == pytest.approx(math.sqrt(2 / (2 * 4000 * 200)), rel=0.1)
    # the radius dominates the budget (section 19)
    assert est.boltzmann_total_err_ > 5 * est.boltzmann_err_
    # a 3 % wrong radius fails against scipy.constants.k at the statistical error
    wrong = BoltzmannFromDiffusion(298.15, eta, 1.03 * A_BEAD, 0.01).fit(traj.positions)
    assert abs(z_score(wrong.boltzmann_, wrong.boltzmann_err_, scipy.constants.k)) > Z_MAX


def test_boltzmann_error_bar_coverage(diffusion_run):
    # 100 independent experiments of 40 beads, and 10 of a single bead (time blocks as replicas)
    x = np.asarray(diffusion_run.positions)
    eta = diffusion_run.config["medium"]["viscosity"]
    zs = []
    for g in range(100):
        e = BoltzmannFromDiffusion(298.15, eta, A_BEAD, 0.01).fit(x[:, 40 * g:40 * (g + 1)])
        zs.append(z_score(e.boltzmann_, e.boltzmann_err_, scipy.constants.k))
    zs = np.array(zs)
    # mean square of 100 z-scores (t-distributed, 39 dof: E z^2 = 39/37): 1.05 +- 0.15, 4.5 SE;
    # the fraction within 1 error: 0.683 +- 0.047 (binomial), 4.5 SE
    assert 0.4 < np.mean(zs**2) < 1.7, np.mean(zs**2)
    assert 0.47 < np.mean(np.abs(zs) < 1) < 0.89
    single = BoltzmannFromDiffusion(298.15, eta, A_BEAD, 0.01).fit(x[:, :1])
    assert single.n_replicas_ == 16 and abs(z_score(single.boltzmann_, single.boltzmann_err_,
                                                    scipy.constants.k)) < Z_MAX
