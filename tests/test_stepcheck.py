"""The step guard for user terms, the exact scheme's scope and the fidelity warning.

Sources: Euler-Maruyama's exact stationary variance in a harmonic trap,
(kT/k)/(1 - k dt/2 gamma) (derived from the AR(1) recursion; Leimkuhler &
Matthews 2013, AMRX, discuss the same invariant-measure error), checked here
against a simulation; the curvature of 0.5 k x^2 and of a quartic (closed forms).
"""
import math
import warnings

import numpy as np
import pytest
from numba import njit

import langsim
from langsim import config as _config
from langsim import stepcheck
from langsim.units import k_B, stokes_friction, water_viscosity
from langsim.validation import ConfigError

from conftest import Z_MAX

T = 295.15
kT = k_B * T
GAMMA = stokes_friction(water_viscosity(T), 0.5e-6)
K = 1e-5
TAU = GAMMA / K


def _trap(steps_per_frame, frames=1000, **particles):
    frame = TAU / 4
    return {"seed": 4, "particles": {"radius": 0.5e-6, **particles},
            "potential": [{"type": "harmonic", "stiffness": K}],
            "dynamics": {"dt": frame / steps_per_frame, "steps": frames * steps_per_frame},
            "output": {"every": steps_per_frame}}


def _warnings_of(cfg):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        _config.load(cfg)
    return [str(w.message) for w in caught]


def test_fidelity_warning_fires_at_2_steps_per_frame_and_not_at_50():
    found = _warnings_of(_trap(2))
    r = 0.125                                 # k dt / gamma at two steps per tau/4
    expected = f"variance {1 / (1 - r / 2) - 1:+.1%}"
    assert any("not the continuous one" in m and expected in m for m in found), found
    assert not any("not the continuous one" in m for m in _warnings_of(_trap(50)))
    # the exact scheme has nothing to warn about
    cfg = _trap(2)
    cfg["dynamics"]["scheme"] = "exact"
    assert _warnings_of(cfg) == []


def test_the_reported_variance_bias_is_what_the_run_gives():
    """The warning's +6.7 % is measured: 20000 particles, variance of frames after 20 tau,
    standard error from independent frames 2 tau apart (particles and frames as replicas)."""
    bias = stepcheck.fidelity(_config.load(_trap(2, 1)))[0]["variance"]
    cfg = _trap(2, frames=200, count=20000)
    traj = langsim.run(cfg, progress=False)
    x = np.asarray(traj.positions[80::8, :, 0])           # frames 2 tau apart, after 20 tau
    per_frame = (x * x).mean(axis=1) / (kT / K) - 1.0
    mean, se = per_frame.mean(), per_frame.std(ddof=1) / math.sqrt(per_frame.size)
    assert abs(mean - bias) < Z_MAX * se
    # wrong input: the continuous process (no bias) is refused by the same test
    assert abs(mean - 0.0) > Z_MAX * se


def test_user_term_curvature_feeds_the_guard_and_the_burn_in():
    expr = {"type": "expression", "energy": "0.5*k*x**2", "parameters": {"k": K}}
    cfg = {"seed": 1, "particles": {"radius": 0.5e-6}, "potential": [expr],
           "dynamics": {"dt": 1e-5, "steps": 10}}
    spec = _config.load(cfg)
    assert spec.user_curvature[0] == pytest.approx(K, rel=1e-6)
    # default burn-in: 20 relaxation times gamma/k (not 20,000 steps)
    assert spec.particles.burn_in == pytest.approx(20 * TAU, rel=1e-2)
    # an unstable step is refused before anything runs (k dt / gamma = 3.5)
    with pytest.raises(ConfigError, match="unstable"):
        _config.load({**cfg, "dynamics": {"dt": 3.5 * TAU, "steps": 10}})


def test_curvature_of_a_function_term_is_the_larger_of_start_and_minimum():
    """U = a (x - c)^4 + (k/2) (x - c)^2 starting at x = 0: U'' = 12 a c^2 + k there, k at the
    minimum x = c; the guard takes the larger (closed form)."""
    @njit
    def bowl(x, t, force):
        s = x[0] - 2e-7
        force[0] = -4e9 * s ** 3 - K * s
        return 1e9 * s ** 4 + 0.5 * K * s * s

    spec = _config.load({"seed": 1, "particles": {"radius": 0.5e-6},
                         "potential": [{"type": "function", "function": bowl}],
                         "dynamics": {"dt": 1e-7, "steps": 10}})
    assert spec.user_curvature[0] == pytest.approx(K + 12e9 * (2e-7) ** 2, rel=1e-4)


def test_exact_scheme_refuses_nonlinear_terms():
    cfg = {"seed": 1, "particles": {"radius": 0.5e-6},
           "potential": [{"type": "harmonic", "stiffness": K},
                         {"type": "double-well", "barrier_kT": 3, "separation": 1e-6}],
           "dynamics": {"scheme": "exact", "dt": 1e-3, "steps": 10}}
    with pytest.raises(ConfigError, match=r"potential\[1\] is 'double-well'"):
        _config.load(cfg)
    cfg["potential"] = cfg["potential"][:1]
    assert _config.load(cfg).dynamics.scheme == "exact"
