"""Engine behaviour: determinism, guard rails, user terms, initial states."""
import math
import warnings

import numpy as np
import pytest
from numba import njit
from scipy import integrate, stats

import langsim
from langsim import engine
from langsim.config import ConfigError, LangsimWarning
from langsim.units import k_B

from conftest import Z_MAX, per_particle_variance, z_score

T = 295.15
kT = k_B * T
GAMMA = 9.0e-9


def _cfg(**over):
    cfg = {"seed": 77, "particles": {"count": 300, "dimensions": 2, "friction": GAMMA, "mass": 1e-15},
           "medium": {"temperature": T},
           "potential": [{"type": "harmonic", "stiffness": [1e-6, 3e-6]},
                         {"type": "double-well", "barrier_kT": 3.0, "separation": 1e-6, "axis": 1}],
           "dynamics": {"regime": "underdamped", "dt": 1e-8, "steps": 600},
           "output": {"every": 3}}
    for key, value in over.items():
        cfg[key] = {**cfg.get(key, {}), **value} if isinstance(value, dict) else value
    return cfg


def _run(cfg, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LangsimWarning)
        return langsim.run(cfg, progress=False, **kw)


# ---------------------------------------------------------- determinism


@pytest.mark.parametrize("regime, scheme", [("underdamped", "baoab"),
                                            ("overdamped", "euler-maruyama"),
                                            ("overdamped", "leimkuhler-matthews")])
def test_bit_identical_across_threads_and_chunks(regime, scheme, monkeypatch):
    cfg = _cfg(dynamics={"regime": regime, "scheme": scheme,
                         "dt": 1e-8 if regime == "underdamped" else 1e-5})
    a = _run(cfg, threads=1)
    b = _run(cfg, threads=2)
    monkeypatch.setattr(engine, "CHUNK_PARTICLE_STEPS", 300 * 3 * 7)  # 7 frames a chunk
    c = _run(cfg, threads=2)
    for other in (b, c):
        assert np.array_equal(a.positions, other.positions)
        if regime == "underdamped":
            assert np.array_equal(a.velocities, other.velocities)
    d = _run({**cfg, "seed": 78})
    assert not np.array_equal(a.positions[1:], d.positions[1:])


def test_fresh_seed_is_recorded_and_reproduces():
    cfg = _cfg()
    del cfg["seed"]
    a = _run(cfg)
    seed = a.config["seed"]
    assert isinstance(seed, int) and 0 <= seed < 2**63
    b = _run({**cfg, "seed": seed})
    assert np.array_equal(a.positions, b.positions)


def test_resolved_config_has_defaults_and_derived_values():
    cfg = {"seed": 1, "particles": {"radius": 0.5e-6}, "medium": {"temperature": 298.15},
           "dynamics": {"dt": 1e-4, "duration": 0.01}}
    r = _run(cfg).config
    eta = langsim.units.water_viscosity(298.15)
    assert r["medium"]["viscosity"] == pytest.approx(eta)
    assert r["particles"]["friction"] == [pytest.approx(6 * math.pi * eta * 0.5e-6)]
    assert r["dynamics"]["steps"] == 100 and r["dynamics"]["scheme"] == "euler-maruyama"
    assert r["output"]["every"] == 1 and r["potential"] == []


# ---------------------------------------------------------- guard rails


def test_unstable_step_is_refused_with_ratio_and_suggestion():
    k = 1e-5
    cfg = {"seed": 1, "particles": {"friction": GAMMA},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"dt": 2.5 * GAMMA / k, "steps": 10}}
    with pytest.raises(ConfigError, match=r"unstable, stiffness\*dt/friction = 2\.5.*suggested"):
        langsim.run(cfg, progress=False)
    # a stable but inaccurate step on a linear axis: the fidelity warning, with the exact
    # Euler-Maruyama variance bias 1/(1 - 0.5/2) - 1 = +33.3 %
    with pytest.warns(LangsimWarning, match=r"not the continuous one.*variance \+33\.3%"):
        langsim.run({**cfg, "dynamics": {"dt": 0.5 * GAMMA / k, "steps": 10}}, progress=False)


def test_underdamped_unstable_step_is_refused():
    k, m = 0.1, 2.5e-11
    cfg = {"seed": 1, "particles": {"friction": 1e-7, "mass": m},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"regime": "underdamped", "dt": 2.1 / math.sqrt(k / m), "steps": 10}}
    with pytest.raises(ConfigError, match=r"omega\*dt = 2\.1"):
        langsim.run(cfg, progress=False)


def test_blow_up_ends_the_run_with_a_status_and_keeps_frames():
    k = 1e-5
    cfg = {"seed": 1, "particles": {"friction": GAMMA, "count": 100, "initial": [1e-7]},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"dt": 3.0 * GAMMA / k, "steps": 4000, "allow_unstable": True},
           "output": {"every": 10}}
    with pytest.warns(engine.RunWarning, match=r"non-finite position of particle \d+ at step \d+"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LangsimWarning)
            traj = langsim.run(cfg, progress=False)
    assert not traj.status.complete
    assert 0 < traj.n_frames < 401
    assert np.all(np.isfinite(traj.positions))
    # |x| grows by 2x per step: from 1e-7 m, float64 overflows after about 1000 steps
    assert 900 < traj.status.step < 1100


# ---------------------------------------------------------- user terms


@njit
def _quartic_trap(x, t, force):
    a = 2.0e12  # J/m^4
    force[0] = -4 * a * x[0] ** 3
    return a * x[0] ** 4


def _quartic_variance(a):
    # <x^2> of exp(-a x^4/kT): Gamma(3/4)/Gamma(1/4) sqrt(kT/a) (Gamma-function identity)
    return math.gamma(0.75) / math.gamma(0.25) * math.sqrt(kT / a)


def test_function_term_samples_its_boltzmann_density():
    """A user numba function: <x^2> of a quartic trap, exact by the Gamma-function
    integral. (Expression terms are checked against the built-in double well.)"""
    a = 2.0e12
    term = {"type": "function", "function": _quartic_trap}
    sigma = math.sqrt(_quartic_variance(a))
    cfg = {"seed": 3, "particles": {"count": 2000, "friction": GAMMA},
           "medium": {"temperature": T}, "potential": [term],
           "dynamics": {"scheme": "leimkuhler-matthews", "dt": 0.02 * GAMMA * sigma**2 / kT,
                        "steps": 2000}, "output": {"every": 10}}
    traj = _run(cfg)
    assert traj.config["particles"]["burn_in"] > 0   # non-separable: burn-in stated
    mean, err = per_particle_variance(traj.positions)
    assert abs(z_score(mean, err, _quartic_variance(a))[0]) < Z_MAX
    assert abs(z_score(mean, err, 1.15 * _quartic_variance(a))[0]) > Z_MAX


def test_expression_matches_builtin_and_takes_parameters_at_run_time(tmp_path, monkeypatch):
    """The built-in double well written as an expression gives the same
    trajectory to rounding (symbolic gradient vs hand-written force), for two
    sets of parameter values that share one specialised kernel module,
    compiled once and cached on disk."""
    from langsim.kernels import specialise
    monkeypatch.setenv("LANGSIM_CACHE_DIR", str(tmp_path))
    base = {"seed": 5, "particles": {"count": 64, "friction": GAMMA, "initial": [0.3e-6]},
            "dynamics": {"dt": 1e-5, "steps": 200}}
    for L, barrier in ((1e-6, 3 * kT), (0.8e-6, 5 * kT)):
        builtin = {"type": "double-well", "barrier": barrier, "separation": L}
        expr = {"type": "expression", "energy": "B*((2*x/L)**2 - 1)**2",
                "parameters": {"B": barrier, "L": L}}
        a = _run({**base, "potential": [builtin]})
        b = _run({**base, "potential": [expr]})
        np.testing.assert_allclose(a.positions, b.positions, rtol=1e-9, atol=1e-18)
    assert len(list(tmp_path.glob("modules/langsim_kernels_*.py"))) == 1
    from langsim import cache
    assert cache.cache_dir() == str(tmp_path)


def test_expression_injection_is_refused_without_running_it(tmp_path):
    marker = tmp_path / "ran"
    payload = f"__import__('os').system('touch {marker}')"
    cfg = {"seed": 1, "particles": {"friction": GAMMA},
           "potential": [{"type": "expression", "energy": payload}],
           "dynamics": {"dt": 1e-5, "steps": 10}}
    with pytest.raises(ConfigError, match="unknown name"):
        langsim.run(cfg, progress=False)
    for attack in ["x.__class__", "(lambda: 0)()", "[x for x in ()]", "exp.__globals__", "'a'*3"]:
        with pytest.raises(ConfigError, match=r"potential\[0\]\.energy"):
            langsim.run({**cfg, "potential": [{"type": "expression", "energy": attack}]},
                        progress=False)
    assert not marker.exists()


def test_expression_typo_points_at_it():
    cfg = {"seed": 1, "particles": {"friction": GAMMA},
           "potential": [{"type": "expression", "energy": "k*x**2 + sni(x)",
                          "parameters": {"k": 1.0}}],
           "dynamics": {"dt": 1e-5, "steps": 10}}
    with pytest.raises(ConfigError) as info:
        langsim.run(cfg, progress=False)
    text = str(info.value)
    assert "unknown name 'sni'" in text and "did you mean 'sin'" in text
    caret_line = text.splitlines()[-1]
    assert caret_line.index("^") == text.splitlines()[-2].index("sni")


# ---------------------------------------------------------- initial states


def _exact_cdf(energy, lo, hi):
    z = integrate.quad(lambda s: math.exp(-energy(s) / kT), lo, hi, limit=200)[0]
    return lambda x: integrate.quad(lambda s: math.exp(-energy(s) / kT), lo, x, limit=200)[0] / z


def test_equilibrium_start_matches_boltzmann_exactly():
    """Inverse-CDF sampling per axis: a KS test against the Boltzmann CDF
    computed independently by scipy quad, on a double well tilted by a
    constant force (axis 0) and a harmonic axis (axis 1)."""
    L, barrier, force, k = 1e-6, 4 * kT, 2 * kT / 1e-6, 2e-6
    cfg = {"seed": 12, "particles": {"count": 4000, "dimensions": 2, "friction": GAMMA},
           "medium": {"temperature": T},
           "potential": [{"type": "double-well", "barrier": barrier, "separation": L,
                          "stiffness": [0.0, k]},
                         {"type": "constant-force", "force": [force, 0.0]}],
           "dynamics": {"dt": 1e-6, "steps": 1}}
    traj = _run(cfg)
    assert traj.config["particles"]["burn_in"] == 0.0
    x0 = np.asarray(traj.positions[0])
    cdf = _exact_cdf(lambda s: barrier * ((2 * s / L) ** 2 - 1) ** 2 - force * s, -2 * L, 2 * L)
    assert stats.kstest(x0[:, 0], np.vectorize(cdf)).pvalue > 1e-3
    assert stats.kstest(x0[:, 1], stats.norm(scale=math.sqrt(kT / k)).cdf).pvalue > 1e-3
    # the same test rejects the untilted well
    cdf_flat = _exact_cdf(lambda s: barrier * ((2 * s / L) ** 2 - 1) ** 2, -2 * L, 2 * L)
    assert stats.kstest(x0[:, 0], np.vectorize(cdf_flat)).pvalue < 1e-6


def test_maxwell_boltzmann_velocities():
    m = 1e-15
    cfg = {"seed": 2, "particles": {"count": 20000, "friction": GAMMA, "mass": m},
           "dynamics": {"regime": "underdamped", "dt": 1e-8, "steps": 1}}
    v0 = np.asarray(_run(cfg).velocities[0, :, 0])
    assert stats.kstest(v0, stats.norm(scale=math.sqrt(kT / m)).cdf).pvalue > 1e-3
    assert stats.kstest(v0, stats.norm(scale=1.1 * math.sqrt(kT / m)).cdf).pvalue < 1e-6


def test_point_and_per_particle_initial_positions():
    start = np.arange(6, dtype=float).reshape(3, 2) * 1e-7
    cfg = {"seed": 2, "particles": {"count": 3, "dimensions": 2, "friction": GAMMA,
                                     "initial": start.tolist()},
           "dynamics": {"dt": 1e-6, "steps": 2}}
    assert np.array_equal(_run(cfg).positions[0], start)
    cfg["particles"]["initial"] = [1e-7, -1e-7]
    assert np.array_equal(_run(cfg).positions[0], np.tile([1e-7, -1e-7], (3, 1)))



@pytest.mark.parametrize("term, lo, hi, energy", [
    # a finite well: the Boltzmann density within its basin (two waists of the centre)
    ({"type": "gaussian-well", "depth_kT": 3.0, "waist": 1e-6, "center": 2e-7},
     2e-7 - 2e-6, 2e-7 + 2e-6, lambda s: -3 * kT * math.exp(-2 * (s - 2e-7) ** 2 / 1e-12)),
    # a periodic term alone: one period around its centre, corrugation only
    ({"type": "periodic", "barrier_kT": 4.0, "period": 1e-6, "tilt": 1e-15},
     -0.5e-6, 0.5e-6, lambda s: 2 * kT * (1 - math.cos(2 * math.pi * s / 1e-6)))])
def test_equilibrium_start_in_a_basin_or_a_period(term, lo, hi, energy):
    cfg = {"seed": 13, "particles": {"count": 3000, "friction": GAMMA}, "medium": {"temperature": T},
           "potential": [term], "dynamics": {"dt": 1e-6, "steps": 1}}
    x0 = np.asarray(_run(cfg).positions[0, :, 0])
    assert x0.min() >= lo and x0.max() <= hi
    cdf = _exact_cdf(energy, lo, hi)
    assert stats.kstest(x0, np.vectorize(cdf)).pvalue > 1e-3
    # rejected: the density at twice the temperature
    hot = _exact_cdf(lambda s: energy(s) / 2, lo, hi)
    assert stats.kstest(x0, np.vectorize(hot)).pvalue < 1e-6


def test_blow_up_during_burn_in_is_a_result_with_no_frames():
    """A step far too large for a user term: refused by the guard (numerical curvature);
    run anyway, it blows up in the burn-in and the run ends with a status and no frames."""
    cfg = {"seed": 2, "particles": {"friction": GAMMA, "count": 10},
           "potential": [{"type": "function", "function": _quartic_trap}],
           "dynamics": {"dt": 1e-3, "steps": 100}}
    with pytest.raises(ConfigError, match="unstable"):
        langsim.run(cfg, progress=False)
    cfg["dynamics"]["allow_unstable"] = True
    cfg["particles"]["burn_in"] = 0.05
    with pytest.warns(engine.RunWarning, match="of the burn-in; no frames recorded"):
        traj = langsim.run(cfg, progress=False)
    assert not traj.status.complete and traj.n_frames == 0
    assert traj.status.particle >= 0
