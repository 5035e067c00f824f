"""Synthetic trajectories with known ground truth for the analysis and check tests.

The overdamped harmonic data are the exactly sampled Ornstein-Uhlenbeck process
in its AR(1) form x_{n+1} = c x_n + sqrt((1 - c^2) kT/kappa) xi_n,
c = exp(-kappa dt/gamma) (Norrelykke & Flyvbjerg 2011, Phys. Rev. E 83, 041103).
"""
import numpy as np
from scipy.signal import lfilter

from langsim.units import k_B

T = 298.15
KT = k_B * T
GAMMA = 8.38827e-9  # a = 0.5 um in water at 25 C (reference notes, section 1)


def rng(seed):
    return np.random.Generator(np.random.PCG64(seed))


def ou_series(seed, n, c, var, shape=()):
    """Stationary AR(1) series of length n with coefficient c and variance var."""
    g = rng(seed)
    xi = g.standard_normal((n,) + shape) * np.sqrt((1 - c * c) * var)
    x0 = g.standard_normal(shape) * np.sqrt(var)
    return lfilter([1.0], [1.0, -c], xi, axis=0, zi=(c * x0)[None, ...])[0]


class Traj:
    """Minimal trajectory: .time, .positions, .velocities, .config."""

    def __init__(self, positions, config, velocities=None):
        self.positions = positions
        self.velocities = velocities
        self.config = config
        dt = config["dynamics"]["dt"] * config["output"]["every"]
        self.time = np.arange(positions.shape[0]) * dt


def config(potential, dims=1, friction=GAMMA, dt=1e-5, steps=10**6, every=1, regime="overdamped",
           scheme="euler-maruyama", temperature=T, mass=None, count=1):
    return {"seed": 1,
            "particles": {"count": count, "dimensions": dims, "radius": 0.5e-6, "density": None, "mass": mass,
                          "friction": [friction] * dims, "initial": "equilibrium", "burn_in": 0.0},
            "medium": {"temperature": temperature, "viscosity": 0.89e-3},
            "potential": potential,
            "dynamics": {"regime": regime, "scheme": scheme, "dt": dt, "steps": steps, "duration": dt * steps},
            "output": {"every": every, "velocities": mass is not None, "precision": "double"}}


def harmonic_trajectory(seed, kappa=(1e-5, 2e-5), frames=2**17, particles=2, dt=2e-5, every=5,
                        center=(0.0, 1e-7)):
    """Euler-Maruyama data in a static anisotropic trap, sampled exactly.

    With a linear force, Euler-Maruyama is the AR(1) recursion
    x_{n+1} = a x_n + sqrt(2 kT dt/gamma) xi_n, a = 1 - kappa dt/gamma; recorded
    every `every` steps it is AR(1) with coefficient a^every and the stationary
    variance (kT/kappa)/(1 - kappa dt/(2 gamma)) (reference notes, section 6).
    """
    kappa = np.asarray(kappa, float)
    d = kappa.size
    pos = np.empty((frames, particles, d))
    for a in range(d):
        r = kappa[a] * dt / GAMMA
        var = KT / kappa[a] / (1 - r / 2)
        pos[:, :, a] = center[a] + ou_series(seed + a, frames, (1 - r) ** every, var, (particles,))
    pot = [{"type": "harmonic", "stiffness": list(kappa), "center": list(center[:d]), "velocity": [0.0] * d,
            "amplitude": [0.0] * d, "frequency": 0.0, "phase": 0.0}]
    cfg = config(pot, dims=d, dt=dt, steps=frames * every, every=every, scheme="euler-maruyama", count=particles)
    return pos, cfg
