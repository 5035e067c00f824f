"""The engine's dynamics against exact and published results.

Each test: a scenario, an estimator (particles as independent replicas, see
conftest), and a closed form with its source. Each estimator is also shown to
reject a wrong trajectory.
"""
import math
import warnings

import numpy as np
import pytest
from scipy import integrate, stats

import langsim
from langsim.config import LangsimWarning
from langsim.units import k_B

from conftest import Z_MAX, per_particle_variance, replica_mean, z_score

T = 295.15
kT = k_B * T
GAMMA = 9.0e-9  # kg/s, about a 1 um bead in water


def _run(cfg, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LangsimWarning)
        return langsim.run(cfg, progress=False, **kw)


# ------------------------------------------------------------ overdamped


@pytest.mark.parametrize("scheme", ["euler-maruyama", "leimkuhler-matthews"])
def test_overdamped_equipartition_anisotropic_3d(scheme):
    """<x_i^2> per axis at finite dt.

    Euler-Maruyama on a harmonic term is an AR(1) process whose exact
    stationary variance is (kT/k)/(1 - k dt/(2 gamma)); Leimkuhler-Matthews
    gives kT/k exactly at any stable step (check-values.md section 6, derived
    there by a discrete Lyapunov solve; Leimkuhler & Matthews 2013, AMRX).
    """
    dt = 1e-4
    ratios = np.array([0.02, 0.2, 0.8])  # k dt / gamma per axis
    stiffness = ratios * GAMMA / dt
    cfg = {"seed": 11, "particles": {"count": 3000, "dimensions": 3, "friction": GAMMA,
                                     "initial": "equilibrium"},
           "medium": {"temperature": T},
           "potential": [{"type": "harmonic", "stiffness": stiffness.tolist()}],
           "dynamics": {"scheme": scheme, "dt": dt, "steps": 600}, "output": {"every": 2}}
    traj = _run(cfg)
    # discard 10 relaxation times of the slowest axis (50 steps) so the start
    # from the exact Boltzmann density has relaxed to the scheme's own one
    mean, err = per_particle_variance(traj.positions, start=250)
    exact = kT / stiffness
    if scheme == "euler-maruyama":
        exact = exact / (1 - ratios / 2)
    z = z_score(mean, err, exact)
    assert np.all(np.abs(z) < Z_MAX), z
    # the check discriminates: the continuous-time value is wrong on the
    # coarse axes for Euler-Maruyama, and 1.3x scaled positions fail everywhere
    if scheme == "euler-maruyama":
        assert np.all(np.abs(z_score(mean, err, kT / stiffness)[1:]) > Z_MAX)
    bad, bad_err = per_particle_variance(np.asarray(traj.positions) * 1.3, start=250)
    assert np.all(np.abs(z_score(bad, bad_err, exact)) > Z_MAX)


def test_free_diffusion_msd():
    """<(x(t) - x(0))^2> = 2 D t per axis (Einstein 1905), D = kT/gamma;
    exact for Euler-Maruyama without force at any dt."""
    dt, n = 1e-3, 400
    cfg = {"seed": 5, "particles": {"count": 4000, "dimensions": 2, "friction": [GAMMA, 2 * GAMMA]},
           "medium": {"temperature": T}, "dynamics": {"dt": dt, "steps": n},
           "output": {"every": 4}}
    traj = _run(cfg)
    x = np.asarray(traj.positions)
    D = kT / np.array([GAMMA, 2 * GAMMA])
    for frame in (1, 10, 100):
        disp2 = (x[frame] - x[0]) ** 2
        mean, err = replica_mean(disp2)
        t = traj.time[frame]
        assert np.all(np.abs(z_score(mean, err, 2 * D * t)) < Z_MAX)
        # a diffusion coefficient 30 % off is rejected
        assert np.all(np.abs(z_score(mean, err, 1.3 * 2 * D * t)) > Z_MAX)


def _double_well_density(barrier, separation, edges):
    """Bin probabilities of exp(-U/kT), U = barrier ((2x/L)^2 - 1)^2, by quadrature."""
    def w(x):
        q = 2 * x / separation
        return math.exp(-barrier * (q * q - 1) ** 2 / kT)
    z = integrate.quad(w, -3 * separation, 3 * separation, points=[-separation / 2, 0, separation / 2],
                       limit=200)[0]
    return np.array([integrate.quad(w, a, b)[0] / z for a, b in zip(edges[:-1], edges[1:])])


def test_double_well_relaxes_to_boltzmann():
    """Started all in the left well, particles hop until their distribution is
    the Boltzmann density (Gibbs; the integral by scipy quad). Final positions
    of independent particles: a chi-square test of bin counts."""
    L = 1e-6
    barrier = 2.0 * kT
    curvature = 32 * barrier / L**2
    # 1000 well relaxation times, about 15 hopping times (Kramers, overdamped)
    dt = 0.1 * GAMMA / curvature
    cfg = {"seed": 8, "particles": {"count": 10000, "friction": GAMMA, "initial": [-L / 2]},
           "medium": {"temperature": T},
           "potential": [{"type": "double-well", "barrier_kT": 2.0, "separation": L}],
           "dynamics": {"scheme": "leimkuhler-matthews", "dt": dt, "steps": 10000},
           "output": {"every": 10000}}
    traj = _run(cfg)
    final = np.asarray(traj.positions[-1, :, 0])
    edges = np.linspace(-1.5 * L, 1.5 * L, 41)
    counts, _ = np.histogram(final, bins=edges)
    p = _double_well_density(barrier, L, edges)
    expected = p * final.size
    keep = expected > 20
    chi2 = np.sum((counts[keep] - expected[keep]) ** 2 / expected[keep])
    dof = keep.sum() - 1
    assert stats.chi2.sf(chi2, dof) > 1e-4, chi2
    # the same statistic rejects the initial state and a 20 % wrong temperature
    start = np.asarray(traj.positions[0, :, 0])
    c0, _ = np.histogram(start, bins=edges)
    assert stats.chi2.sf(np.sum((c0[keep] - expected[keep]) ** 2 / expected[keep]), dof) < 1e-6
    p_hot = _double_well_density(barrier / 1.2, L, edges) * final.size
    chi_hot = np.sum((counts[keep] - p_hot[keep]) ** 2 / p_hot[keep])
    assert stats.chi2.sf(chi_hot, dof) < 1e-6


# ----------------------------------------------------------- underdamped


def test_baoab_exact_variances_at_large_step():
    """BAOAB on a harmonic term at omega dt = 1.5: <q^2> = kT/k exactly and the
    full-step <v^2> = (kT/m)(1 - omega^2 dt^2/4) = 0.4375 kT/m, independent of
    friction (Leimkuhler & Matthews 2013; check-values.md section 6 table)."""
    k, m = 0.1, 2.533e-11          # a micro-cantilever, check-values.md section 5
    omega = math.sqrt(k / m)
    dt = 1.5 / omega
    gamma = m / dt                 # Gamma dt = 1
    cfg = {"seed": 21, "particles": {"count": 4000, "friction": gamma, "mass": m},
           "medium": {"temperature": T},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"regime": "underdamped", "dt": dt, "steps": 400},
           "output": {"every": 1, "velocities": True}}
    traj = _run(cfg)
    start = 50  # velocities start Maxwell-Boltzmann (kT/m); relaxation time ~ 1 step
    q_mean, q_err = per_particle_variance(traj.positions, start)
    v_mean, v_err = per_particle_variance(traj.velocities, start)
    assert abs(z_score(q_mean, q_err, kT / k)[0]) < Z_MAX
    assert abs(z_score(v_mean, v_err, 0.4375 * kT / m)[0]) < Z_MAX
    # the continuous-time kT/m is rejected: that is the scheme's known bias
    assert abs(z_score(v_mean, v_err, kT / m)[0]) > Z_MAX


def test_underdamped_equipartition_3d():
    """<x_i^2> = kT/k_i and <v_i^2> = kT/m (equipartition) for a silica bead,
    at a small step where BAOAB's velocity bias omega^2 dt^2/4 is < 1e-4."""
    m = 1.15192e-15                # 0.5 um silica bead, check-values.md section 5
    stiffness = np.array([1e-6, 4e-6, 1.6e-5])
    omega = np.sqrt(stiffness / m)
    dt = 0.01 / omega.max()
    cfg = {"seed": 4, "particles": {"count": 2000, "dimensions": 3, "radius": 0.5e-6,
                                     "density": 2200.0},
           "medium": {"temperature": T},
           "potential": [{"type": "harmonic", "stiffness": stiffness.tolist()}],
           "dynamics": {"regime": "underdamped", "dt": dt, "steps": 1000},
           "output": {"every": 10}}
    traj = _run(cfg)
    q_mean, q_err = per_particle_variance(traj.positions)
    v_mean, v_err = per_particle_variance(traj.velocities)
    assert np.all(np.abs(z_score(q_mean, q_err, kT / stiffness)) < Z_MAX)
    assert np.all(np.abs(z_score(v_mean, v_err, kT / m * (1 - (omega * dt) ** 2 / 4))) < Z_MAX)
    wrong, wrong_err = per_particle_variance(np.asarray(traj.velocities) * 1.3)
    assert np.all(np.abs(z_score(wrong, wrong_err, kT / m)) > Z_MAX)


def test_ornstein_fuerth_msd():
    """Free underdamped particle with Maxwell-Boltzmann start:
    MSD(t) = 2 D [t - tau_p (1 - exp(-t/tau_p))], tau_p = m/gamma
    (Uhlenbeck & Ornstein 1930; check-values.md section 5)."""
    m, gamma = 1.15192e-15, 8.38827e-9
    tau = m / gamma
    dt = tau / 50
    cfg = {"seed": 9, "particles": {"count": 20000, "friction": gamma, "mass": m},
           "medium": {"temperature": T},
           "dynamics": {"regime": "underdamped", "dt": dt, "steps": 1000},
           "output": {"every": 5}}
    traj = _run(cfg)
    x = np.asarray(traj.positions[:, :, 0])
    D = kT / gamma
    for frame in (2, 10, 50, 200):   # t = 0.2, 1, 5, 20 tau_p
        t = traj.time[frame]
        mean, err = replica_mean((x[frame] - x[0]) ** 2)
        of = 2 * D * (t - tau * (1 - math.exp(-t / tau)))
        assert abs(z_score(mean, err, of)) < Z_MAX, (frame, mean / of)
    # the ballistic and the diffusive asymptotes are both rejected at t = tau_p
    mean, err = replica_mean((x[10] - x[0]) ** 2)
    t = traj.time[10]
    assert abs(z_score(mean, err, kT * t**2 / m)) > Z_MAX
    assert abs(z_score(mean, err, 2 * D * t)) > Z_MAX
