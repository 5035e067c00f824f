"""The open engine: states, bursts, stop conditions, recorders, per-particle status, threads.

Reference values come from outside the engine: the stored outputs of langsim
0.1.0 (regression data, tests/data/regression), plain numpy averages of
every-step positions, closed-form drift of a constant force, and the exact
Ornstein-Uhlenbeck transition density (Uhlenbeck & Ornstein 1930, Phys. Rev.
36, 823; Gardiner, Handbook of Stochastic Methods, sec. 3.8.4) via scipy.stats.
"""
import importlib.util
import math
import os

import numpy as np
import pytest
from scipy import stats

import langsim
from langsim import config as _config
from langsim import engine, seeding
from langsim.kernels import noise
from langsim.trajectory import MemorySink
from langsim.units import k_B

from conftest import Z_MAX

HERE = os.path.dirname(os.path.abspath(__file__))
REGRESSION = os.path.join(HERE, "data", "regression")
_spec = importlib.util.spec_from_file_location("regression_configs",
                                               os.path.join(REGRESSION, "configs.py"))
_mod = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_mod)
REGRESSION_CONFIGS = _mod.CONFIGS

kT = k_B * 295.15
GAMMA = 1e-8


@pytest.mark.parametrize("name", sorted(REGRESSION_CONFIGS))
def test_todays_configs_reproduce_langsim_0_1(name):
    """Trajectories of langsim 0.1.0's engine, stored before the rewrite, come back bit for bit."""
    ref = np.load(os.path.join(REGRESSION, name + ".npz"))
    traj = engine.Engine(_config.load(REGRESSION_CONFIGS[name]), MemorySink()).run()
    assert np.array_equal(np.asarray(traj.positions), ref["positions"])
    assert np.array_equal(traj.time, ref["time"])
    if "velocities" in ref:
        assert np.array_equal(np.asarray(traj.velocities), ref["velocities"])


def test_noise_streams_of_an_integer_seed_are_unchanged():
    ref = np.load(os.path.join(REGRESSION, "noise-seed-11.npy"))
    key = seeding.kernel_key(11)
    rows = [noise.normals(key, p, c, s0, 10) for p in range(3) for c in range(2) for s0 in (0, 1001)]
    assert np.array_equal(np.array(rows), ref)
    # the initial-state and burn-in streams are the first two children of the seed's SeedSequence
    ss = np.random.SeedSequence(11)
    a = np.random.Generator(np.random.Philox(ss.spawn(1)[0])).random(3)
    assert np.array_equal(seeding.initial_rng(11).random(3), a)
    assert seeding.burn_in_key(11) == tuple(int(w) for w in
                                            np.random.SeedSequence(11).spawn(2)[1].generate_state(
                                                2, dtype=np.uint64))
    # a spawned child is another stream
    assert seeding.kernel_key(11, (3,)) != key


def _sim(n=8, d=1, potential=None, regime="overdamped", threads=None, **dyn):
    cfg = {"seed": 3, "particles": {"count": n, "dimensions": d, "friction": GAMMA},
           "potential": potential or [{"type": "harmonic", "stiffness": 1e-6}],
           "dynamics": {"regime": regime, "dt": 1e-4, "steps": 1000, **dyn}}
    if regime == "underdamped":
        cfg["particles"]["mass"] = 1e-12
        cfg["dynamics"]["dt"] = 1e-6
    return engine.Simulation(cfg, threads=threads)


@pytest.mark.parametrize("regime", ["overdamped", "underdamped"])
def test_n_then_m_steps_equal_n_plus_m(regime):
    sim = _sim(70, 2, regime=regime)
    a, b = sim.initial_state(), sim.initial_state()
    sim.advance(a, 37)
    sim.advance(a, 100)
    sim.advance(b, 137)
    assert a.step == b.step == 137
    assert np.array_equal(a.positions, b.positions) and np.array_equal(a.velocities, b.velocities)
    # wrong input: another branch draws other noise
    c = sim.initial_state()
    c.branch = 1
    sim.advance(c, 137)
    assert not np.array_equal(c.positions, b.positions)


def test_serial_and_threaded_paths_give_the_same_bits():
    one, two = _sim(300, 3, threads=1), _sim(300, 3, threads=2)
    a, b = one.initial_state(), two.initial_state()
    one.advance(a, 200)
    two.advance(b, 200)
    assert len(two._blocks(300)) == 2 and len(one._blocks(300)) == 1
    assert np.array_equal(a.positions, b.positions)


def test_walker_noise_does_not_depend_on_its_place_in_a_batch():
    sim = _sim(5)
    batch = sim.state(np.zeros((5, 1)), ids=np.array([10, 11, 12, 13, 14]))
    alone = sim.state(np.zeros((1, 1)), ids=np.array([12]))
    sim.advance(batch, 300)
    sim.advance(alone, 300)
    assert np.array_equal(batch.positions[2], alone.positions[0])


def test_stop_at_a_level_on_a_known_path():
    """A constant force F with vanishing noise: x(t) = F t/gamma, so the level L is first
    reached at step ceil(L gamma/(F dt)) (closed form of the drift)."""
    F, dt = 1e-12, 1e-4
    cfg = {"seed": 1, "particles": {"count": 3, "friction": GAMMA, "initial": [0.0]},
           "medium": {"temperature": 1e-12, "viscosity": 1e-3},
           "potential": [{"type": "constant-force", "force": F}],
           "dynamics": {"dt": dt, "steps": 10}}
    sim = engine.Simulation(cfg)
    st = sim.state(np.array([[0.0], [-1e-7], [2e-7]]))
    level = 1.005e-6          # half a step between grid points: no rounding ambiguity
    burst = sim.advance(st, 5000, stop=engine.StopCondition("x", above=level))
    v = F / GAMMA
    expected = [math.ceil((level - x0) / (v * dt) - 1e-9) for x0 in (0.0, -1e-7, 2e-7)]
    assert list(st.event_step) == expected
    assert set(burst.stopped) == {0, 1, 2} and np.all(st.status == engine.State.ABOVE)
    # each stopped particle keeps its state at the crossing step
    for i, x0 in enumerate((0.0, -1e-7, 2e-7)):
        assert st.positions[i, 0] == pytest.approx(x0 + v * dt * expected[i], rel=1e-9)
    assert st.step == 5000
    # wrong input: a level not reached stops nothing
    st2 = sim.state(np.zeros((1, 1)))
    sim.advance(st2, 100, stop=engine.StopCondition("x", above=level))
    assert st2.status[0] == engine.State.RUNNING


def test_other_particles_of_a_tile_run_on_and_match_an_unstopped_run():
    sim = _sim(20)
    a, b = sim.initial_state(), sim.initial_state()
    a.positions[3] = 5e-7     # starts beyond the level: stops at its first step
    b.positions[3] = 5e-7
    sim.advance(a, 400, stop=engine.StopCondition("x", above=4e-7))
    sim.advance(b, 400)
    keep = np.arange(20) != 3
    # particles that never reached the level are unaffected by the stop stage
    never = keep & (a.status == engine.State.RUNNING)
    assert never.sum() >= 10
    assert np.array_equal(a.positions[never], b.positions[never])
    assert a.status[3] == engine.State.ABOVE and a.event_step[3] == 1


def test_per_particle_blow_up_status():
    sim = _sim(6, potential=[{"type": "harmonic", "stiffness": 1e-6}])
    st = sim.state(np.zeros((6, 1)))
    st.positions[4] = np.inf
    burst = sim.advance(st, 50)
    assert list(burst.failed) == [4] and st.status[4] == engine.State.NONFINITE
    assert st.event_step[4] == 1
    assert np.all(np.isfinite(np.delete(st.positions, 4)))
    ref = sim.state(np.zeros((6, 1)))
    sim.advance(ref, 50)
    assert np.array_equal(np.delete(st.positions, 4), np.delete(ref.positions, 4))


def test_snapshot_recorder_reproduces_the_run_frames():
    sim = _sim(5, 2)
    traj = engine.Engine(sim.spec, MemorySink()).run()
    st = sim.initial_state()
    rec = engine.Recorder("positions", period=1)
    burst = sim._advance(st, 0, record=(rec,), include_start=True)
    frames = [burst.frames["positions"]]
    for n in (333, 1, 666):
        frames.append(sim.advance(st, n, record=(rec,)).frames["positions"])
    assert np.array_equal(np.concatenate(frames), traj.positions)


@pytest.mark.parametrize("n_taps,spacing", [(11, 1), (5, 3), (1, 1)])
def test_exposure_average_against_a_direct_average_of_every_step(n_taps, spacing):
    """Frames of 25 steps, an exposure of (n_taps - 1) spacing steps averaged with trapezoid
    weights; bursts cut frames in the middle, so partial sums cross calls."""
    sim = _sim(3, 2)
    every = sim.initial_state()
    steps = [every.positions.copy()]
    for _ in range(200):
        sim.advance(every, 1)
        steps.append(every.positions.copy())
    path = np.array(steps)                           # (201, n, d), step counts 0..200
    span = (n_taps - 1) * spacing
    w = np.ones(n_taps) if n_taps > 1 else np.ones(1)
    if n_taps > 1:
        w[0] = w[-1] = 0.5
    w /= w.sum()
    rec = engine.Recorder("avg", period=25, offset=2, n_taps=n_taps, spacing=spacing,
                          weights=tuple(w))
    st = sim.initial_state()
    got = [sim._advance(st, 0, record=(rec,), include_start=True).frames["avg"]]
    for n in (7, 30, 1, 62, 100):
        got.append(sim.advance(st, n, record=(rec,)).frames["avg"])
    got = np.concatenate(got)
    k = np.arange(len(got))
    taps = 2 + 25 * k[:, None] + spacing * np.arange(n_taps)[None, :]
    want = np.einsum("t,ktnd->knd", w, path[taps])
    assert len(got) == rec.n_frames(200) == 8
    np.testing.assert_allclose(got, want, rtol=1e-13, atol=1e-22)
    # wrong input: a window one step late is another average
    if n_taps > 1:
        assert not np.allclose(got, np.einsum("t,ktnd->knd", w, path[taps + 1]), rtol=1e-6, atol=0)


def test_sequence_recorder_keeps_every_tap():
    sim = _sim(2)
    rec = engine.Recorder("path", period=10, n_taps=4, spacing=2, mode="sequence")
    st = sim.initial_state()
    every = sim.initial_state()
    path = [every.positions.copy()]
    for _ in range(40):
        sim.advance(every, 1)
        path.append(every.positions.copy())
    got = np.concatenate([sim._advance(st, 0, record=(rec,), include_start=True).frames["path"],
                          sim.advance(st, 17, record=(rec,)).frames["path"],
                          sim.advance(st, 23, record=(rec,)).frames["path"]])
    path = np.array(path)
    assert got.shape == (4, 4, 2, 1)
    for k in range(4):
        assert np.array_equal(got[k], path[10 * k + np.array([0, 2, 4, 6])])


@pytest.mark.parametrize("regime", ["overdamped", "underdamped"])
def test_exact_scheme_matches_the_ou_transition_density(regime):
    """From a fixed start x0, after a few large steps of the exact scheme the positions of
    many particles are Gaussian with the Ornstein-Uhlenbeck mean x0 e^{-t/tau} and variance
    (kT/k)(1 - e^{-2t/tau}) (overdamped); underdamped, with Maxwell start velocities, mean
    M00(t) x0 and variance (kT/k)(1 - M00(t)^2), M(t) = expm(A t) the mean propagator of
    (x, v) (closed-form transition of the linear SDE). KS test against scipy."""
    from scipy.linalg import expm
    k, x0, n = 1e-6, 2e-7, 4000
    cfg = {"seed": 8, "particles": {"count": n, "friction": GAMMA, "initial": [x0]},
           "potential": [{"type": "harmonic", "stiffness": k}],
           "dynamics": {"regime": regime, "scheme": "exact", "dt": 3e-3, "steps": 3}}
    if regime == "underdamped":
        m, g = 2e-12, 2e-9                  # omega0 = 707/s, Q = 0.71
        cfg["particles"].update(mass=m, friction=g)
        cfg["dynamics"].update(dt=1e-3, steps=2)
    traj = langsim.run(cfg, progress=False)
    t = float(traj.time[-1])
    x = np.asarray(traj.positions[-1, :, 0])
    if regime == "overdamped":
        decay = math.exp(-t * k / GAMMA)
        mean, var = x0 * decay, kT / k * (1 - decay ** 2)
        wrong = x0 * (1 - k * 3e-3 / GAMMA) ** 3     # the Euler-Maruyama mean at this step
    else:
        M = expm(np.array([[0.0, 1.0], [-k / m, -g / m]]) * t)
        mean, var = M[0, 0] * x0, kT / k * (1 - M[0, 0] ** 2)
        wrong = x0 * math.exp(-t * k / g)              # the overdamped mean
    assert stats.kstest((x - mean) / math.sqrt(var), "norm").pvalue > 1e-4
    # wrong input: the same test refuses another process's mean
    assert stats.kstest((x - wrong) / math.sqrt(var), "norm").pvalue < 1e-4


@pytest.mark.parametrize("regime", ["overdamped", "underdamped"])
def test_exact_scheme_runs_pass_their_checks(regime):
    """langsim check predicts the continuous process for scheme 'exact' (variance kT/k,
    velocity variance kT/m, the frame-sampled spectrum) and the rows pass; the same data
    checked as if Euler-Maruyama / BAOAB had made them fail (wrong input)."""
    if regime == "overdamped":
        k = 1e-6
        cfg = {"seed": 21, "particles": {"count": 16, "friction": GAMMA},
               "potential": [{"type": "harmonic", "stiffness": k}],
               "dynamics": {"scheme": "exact", "dt": 0.5 * GAMMA / k, "steps": 20000}}
    else:
        k, m = 0.1, 2.5e-11                    # f0 = 10 kHz, Q = 10
        g = math.sqrt(k * m) / 10
        cfg = {"seed": 22, "particles": {"count": 16, "friction": g, "mass": m},
               "potential": [{"type": "harmonic", "stiffness": k}],
               "dynamics": {"regime": "underdamped", "scheme": "exact", "dt": 1.5 / math.sqrt(k / m),
                            "steps": 16384}}
    traj = langsim.run(cfg, progress=False)
    report = langsim.check(traj)
    keys = {r.key for r in report.rows if r.status != "info"}
    assert report.passed, report.format_table()
    assert "variance.x" in keys and any(k.startswith(("corner_frequency", "resonance")) for k in keys), keys
    wrong = dict(traj.config, dynamics=dict(traj.config["dynamics"],
                                            scheme="euler-maruyama" if regime == "overdamped" else "baoab"))
    traj.config = wrong
    assert not langsim.check(traj).passed


def test_stop_coordinate_given_as_a_formula():
    """'sqrt(x**2 + y**2)' stops the same particles at the same steps as 'radius' about the
    origin in a 2D run (the same coordinate written two ways)."""
    sim = _sim(40, 2)
    a, b = sim.initial_state(), sim.initial_state()
    sim.advance(a, 300, stop=engine.StopCondition("radius", above=1.2e-7))
    sim.advance(b, 300, stop=engine.StopCondition("sqrt(x**2 + y**2)", above=1.2e-7))
    assert np.any(a.status == engine.State.ABOVE)
    assert np.array_equal(a.status, b.status) and np.array_equal(a.event_step, b.event_step)
    np.testing.assert_allclose(a.positions, b.positions, rtol=1e-12)
    # wrong input: another formula stops others
    c = sim.initial_state()
    sim.advance(c, 300, stop=engine.StopCondition("Abs(x)", above=1.2e-7))
    assert not np.array_equal(a.event_step, c.event_step)
    with pytest.raises(langsim.validation.ConfigError, match="unknown name"):
        sim.advance(sim.initial_state(), 1, stop=engine.StopCondition("sqrt(q)", above=1.0))
