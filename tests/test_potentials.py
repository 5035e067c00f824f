"""Potential terms: forces are minus the gradient of the energies, moving traps
respond as the exact discrete-time linear response says."""
import cmath
import math
import warnings

import numpy as np
import pytest

import langsim
from langsim import potentials as P
from langsim.config import LangsimWarning
from langsim.kernels.forces import builtin_forces
from langsim.units import k_B

from conftest import Z_MAX, replica_mean, z_score

kT = k_B * 295.15
GAMMA = 9.0e-9

TERMS = [
    P.Harmonic((1e-6, 2e-6, 3e-6), (1e-7, -2e-7, 0.0), (1e-6, 0.0, 0.0), (0.0, 5e-8, 0.0), 3.0, 0.4),
    P.DoubleWell(5 * kT, 1e-6, 1, (1e-6, 0.0, 4e-6), (0.0, 1e-7, -1e-7)),
    P.Periodic(3 * kT, 0.8e-6, 2e-15, 2, (0.0, 0.0, 1e-7)),
    P.GaussianWell(10 * kT, (0.5e-6, 0.7e-6, 1.5e-6), (1e-7, 0.0, -1e-7)),
    P.ConstantForce((1e-14, -2e-14, 3e-14)),
    P.Wall(50 * kT, 0.3e-6, -1.0e-6, 2, 1.0, 0.2e-6, False, kT),
    P.Wall(20 * kT, 0.5e-6, 0.8e-6, 0, -1.0, 0.1e-6, False, kT),
    P.Gravity((0.0, 0.0, -2e-15), 9.80665, 2, 997.0, 2e-15 / 9.80665),
]


@pytest.mark.parametrize("term", TERMS, ids=lambda t: t.name)
def test_builtin_force_is_minus_energy_gradient(term):
    """Central differences of the energy (common practice; truncation O(h^2))."""
    rng = np.random.Generator(np.random.PCG64(4))
    X = rng.normal(scale=0.6e-6, size=(50, 3))
    codes, params = P.builtin_rows([term], 3)
    t = 0.37
    F = np.empty_like(X)
    E = np.empty(len(X))
    builtin_forces(codes, params, X, t, F, E, True)
    h = 1e-11
    for a in range(3):
        Xp, Xm = X.copy(), X.copy()
        Xp[:, a] += h
        Xm[:, a] -= h
        Ep, Em = np.empty(len(X)), np.empty(len(X))
        builtin_forces(codes, params, Xp, t, F.copy(), Ep, True)
        builtin_forces(codes, params, Xm, t, F.copy(), Em, True)
        numeric = -(Ep - Em) / (2 * h)
        scale = np.max(np.abs(numeric)) + 1e-30
        np.testing.assert_allclose(F[:, a], numeric, atol=1e-5 * scale)


@pytest.mark.parametrize("term", TERMS, ids=lambda t: t.name)
def test_python_energy_is_the_kernel_energy(term):
    """The numpy energy of each term (for theory's quadratures) is the compiled one."""
    rng = np.random.Generator(np.random.PCG64(5))
    X = rng.normal(scale=0.6e-6, size=(40, 3))
    codes, params = P.builtin_rows([term], 3)
    F, E = np.empty_like(X), np.empty(len(X))
    builtin_forces(codes, params, X, 0.37, F, E, True)
    np.testing.assert_allclose(term.energy_at(X, 0.37), E, rtol=1e-12, atol=1e-12 * np.max(np.abs(E)))
    shifted = P.Harmonic((1e-6,) * 3, (1e-7, 0.0, 0.0), (0.0,) * 3, (0.0,) * 3)
    assert not np.allclose(shifted.energy_at(X), P.Harmonic((1e-6,) * 3, (0.0,) * 3, (0.0,) * 3,
                                                         (0.0,) * 3).energy_at(X), rtol=1e-3, atol=0.0)


def test_user_term_energies_and_profiles():
    """Expression and function energies; axis and radial profiles of the terms."""
    from numba import njit

    @njit
    def quartic(x, t, force):
        force[0] = -4.0 * 2e12 * x[0] ** 3
        return 2e12 * x[0] ** 4
    x = np.linspace(-1e-6, 1e-6, 7)[:, None]
    expr = P.Expression("a*x**4", {"a": 2e12})
    np.testing.assert_allclose(expr.energy_at(x), 2e12 * x[:, 0] ** 4, rtol=1e-14)
    np.testing.assert_allclose(P.Function(quartic).energy_at(x), 2e12 * x[:, 0] ** 4, rtol=1e-14)
    well = P.GaussianWell(10 * kT, (1e-6,) * 3, (1e-7, 0.0, 0.0))
    trap = P.Harmonic((1e-6,) * 3, (1e-7, 0.0, 0.0), (0.0,) * 3, (0.0,) * 3)
    r = np.linspace(0.0, 2e-6, 5)
    U = P.radial_profile([well, trap], (1e-7, 0.0, 0.0), 3)
    np.testing.assert_allclose(U(r), -10 * kT * np.exp(-2 * r**2 / 1e-12) + 0.5e-6 * r**2, rtol=1e-12)
    with pytest.raises(ValueError, match="not isotropic"):
        P.radial_profile([well], (0.0, 0.0, 0.0), 3)        # not about its centre
    with pytest.raises(ValueError, match="not isotropic"):
        P.radial_profile([TERMS[3]], TERMS[3].center, 3)    # unequal waists
    dw = TERMS[1]
    Ux = P.axis_profile([dw], 1, 3)
    np.testing.assert_allclose(Ux(np.array([1e-7 - 0.5e-6, 1e-7])) - Ux(np.array([1e-7 - 0.5e-6])),
                               [0.0, 5 * kT], rtol=1e-12, atol=1e-12 * kT)


def test_double_well_geometry():
    """Minima at +-separation/2 with U = 0, top U = barrier, U'' = 32 barrier/L^2."""
    L, B = 1e-6, 5 * kT
    term = P.DoubleWell(B, L, 0, (0.0,), (0.0,))
    codes, params = P.builtin_rows([term], 1)
    X = np.array([[-L / 2], [0.0], [L / 2]])
    F, E = np.empty_like(X), np.empty(3)
    builtin_forces(codes, params, X, 0.0, F, E, True)
    np.testing.assert_allclose(E, [0.0, B, 0.0], atol=1e-12 * B)
    np.testing.assert_allclose(F[:, 0], 0.0, atol=1e-25)
    assert term.well_curvature == pytest.approx(32 * B / L**2)


def _run(cfg):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LangsimWarning)
        return langsim.run(cfg, progress=False)


def test_dragged_trap_lag():
    """A trap dragged at speed v: the mean lag behind the centre is gamma v/k
    (Stokes drag balanced by the trap; exact for Euler-Maruyama, since the lag
    y_n obeys y_{n+1} = (1 - k dt/gamma) y_n - v dt + noise)."""
    k, v, dt = 1e-6, 2e-6, 1e-4
    cfg = {"seed": 31, "particles": {"count": 4000, "friction": GAMMA, "initial": [0.0]},
           "medium": {"temperature": 295.15},
           "potential": [{"type": "harmonic", "stiffness": k, "velocity": v}],
           "dynamics": {"dt": dt, "steps": 1000}, "output": {"every": 100}}
    traj = _run(cfg)
    lag = np.asarray(traj.positions[-1, :, 0]) - v * traj.time[-1]  # 11 relaxation times
    mean, err = replica_mean(lag)
    assert abs(z_score(mean, err, -GAMMA * v / k)) < Z_MAX
    assert abs(z_score(mean, err, 0.0)) > Z_MAX


def test_oscillating_trap_response():
    """Trap centre A sin(w t): the mean position follows H(w) A sin, with the
    exact discrete transfer function of Euler-Maruyama
    H = r / (exp(i w dt) - 1 + r), r = k dt/gamma (z-transform of the AR(1)
    recursion; tends to the Lorentzian response 1/(1 + i w gamma/k))."""
    k, dt, A, f = 1e-6, 2e-4, 1e-7, 10.0
    r = k * dt / GAMMA
    steps = 2500  # 5 periods; the first 2 discarded
    cfg = {"seed": 32, "particles": {"count": 2000, "friction": GAMMA},
           "medium": {"temperature": 295.15},
           "potential": [{"type": "harmonic", "stiffness": k, "amplitude": A, "frequency": f}],
           "dynamics": {"dt": dt, "steps": steps}, "output": {"every": 1}}
    traj = _run(cfg)
    w = 2 * math.pi * f
    n0 = 1000
    t = traj.time[n0:]
    x = np.asarray(traj.positions[n0:, :, 0])
    # per-particle projections on sin and cos over whole periods
    s = 2 * np.mean(x * np.sin(w * t)[:, None], axis=0)
    c = 2 * np.mean(x * np.cos(w * t)[:, None], axis=0)
    H = r / (cmath.exp(1j * w * dt) - 1 + r)
    # x_n = A |H| sin(w n dt + arg H): sin part Re(H) A, cos part Im(H) A
    for values, expected in ((s, H.real * A), (c, H.imag * A)):
        mean, err = replica_mean(values)
        assert abs(z_score(mean, err, expected)) < Z_MAX
    mean, err = replica_mean(c)
    assert abs(z_score(mean, err, 0.0)) > Z_MAX  # the phase lag is resolved


def test_constant_force_drift():
    """Free particle pushed by F drifts at F/gamma (Stokes), exactly for Euler-Maruyama."""
    force, dt, n = 2e-14, 1e-3, 500
    cfg = {"seed": 33, "particles": {"count": 4000, "friction": GAMMA, "initial": [0.0]},
           "medium": {"temperature": 295.15},
           "potential": [{"type": "constant-force", "force": force}],
           "dynamics": {"dt": dt, "steps": n}, "output": {"every": n}}
    traj = _run(cfg)
    mean, err = replica_mean(np.asarray(traj.positions[-1, :, 0]))
    assert abs(z_score(mean, err, force / GAMMA * n * dt)) < Z_MAX
    assert abs(z_score(mean, err, 1.2 * force / GAMMA * n * dt)) > Z_MAX
