"""Runs with a ``[measurement]`` table: the engine's recorders feed the measurement stage.

The exposure average is computed inside the kernel (a "sum" recorder over every
step of the window); the reference is the same average taken from an every-step
trajectory with numpy (``numpy.einsum`` over the trapezoid tap weights, in
:func:`langsim.measurement.stage.reference_frames`), and the stage's noise is
counter-based, so the two must agree bit for bit, in memory and in a file, and
after a kill -9 and a resume.
"""
import signal
import warnings

import h5py
import numpy as np
import pytest

import langsim
from langsim import config as _config
from langsim.engine import Engine
from langsim.measurement.detector import DetectorModel
from langsim.measurement.stage import measure
from langsim.trajectory import MemorySink

from test_cli import langsim_cli
from test_resume import start_cli, wait_for_checkpoint

pytestmark = pytest.mark.filterwarnings("ignore::langsim.config.LangsimWarning")

#: 12 beads in weak 2D traps; frames of 30 steps with 25-step exposures (so exposures straddle
#: the engine's chunks), images with blinking, drift, localization error, and a detector.
CONFIG = """\
seed = 31
[particles]
count = 12
dimensions = 2
friction = 1e-8
[[potential]]
type = "harmonic"
stiffness = 1e-7
[dynamics]
dt = 1e-4
steps = {steps}
[output]
every = {every}
checkpoint_every = 0.02
[measurement]
frame_rate = {rate!r}
exposure = {exposure!r}
localization_error = [4e-9, 6e-9]
drift_velocity = [2e-7, 0.0]
drift_jitter = 1e-9
on_rate = 40.0
off_rate = 20.0
photons = 400.0
pixel_size = 100e-9
image_shape = [20, 24]
psf_sigma = 120e-9
background = 3.0
read_noise = 1.5
[measurement.detector]
sampling_rate = 2000.0
sensitivity = 1e6
filter = "first-order"
cutoff = 1500.0
noise = 1e-6
"""


def _config_text(steps, every, exposure=0.0025):
    return CONFIG.format(steps=steps, every=every, rate=1.0 / (30 * 1e-4), exposure=exposure)


def _spec(text):
    import tomllib
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return _config.load(tomllib.loads(text))


@pytest.mark.parametrize("sink, exposure", [("memory", 0.0025), ("hdf5", 0.0025), ("memory", 0.003)],
                         ids=["memory", "hdf5", "whole-frame-exposure"])
def test_measured_group_equals_the_stage_on_every_step_positions(tmp_path, monkeypatch, sink, exposure):
    # chunks of 77 steps: exposures straddle them, and with the whole-frame exposure (a frame's
    # last tap is the next one's first) chunks also begin on a shared step (77 * 7 + 1 = 30 * 18)
    monkeypatch.setattr("langsim.engine.CHUNK_PARTICLE_STEPS", 12 * 77)
    text = _config_text(3000, 1, exposure)
    spec = _spec(text)
    if sink == "memory":
        traj = Engine(spec, MemorySink()).run()
    else:
        import tomllib
        traj = langsim.run(tomllib.loads(text), tmp_path / "m.h5", progress=False)
    steps = spec.measurement.exposure_steps
    x = np.asarray(traj.positions)
    ref = measure(x, spec.measurement, spec.seed)
    got = traj.measured
    assert set(got) == set(ref)
    assert len(got["time"]) == spec.measurement.n_frames(3000) == (3000 - steps) // 30 + 1
    for name in ref:
        np.testing.assert_array_equal(np.asarray(got[name]), ref[name], err_msg=name)
    # numpy's own trapezoid average of each exposure (frame k: steps 30 k .. 30 k + steps)
    w = np.ones(steps + 1)
    w[[0, -1]] = 0.5
    starts = 30 * np.arange(len(got["time"]))
    direct = np.einsum("t,ktnd->knd", w / w.sum(), x[starts[:, None] + np.arange(steps + 1)])
    np.testing.assert_allclose(np.asarray(got["true_positions"]), direct, rtol=1e-12, atol=1e-20)
    # the detector sees every step: the model run over the whole path in one pass
    model = DetectorModel(spec.measurement.detector, 12, 2, spec.dynamics.dt, spec.seed)
    det = traj.groups["detector"]
    np.testing.assert_array_equal(np.asarray(det["signal"]), model.process(0, x))
    np.testing.assert_allclose(np.asarray(det["time"]), np.arange(len(det["time"])) * 5e-4)
    # a wrong input fails: the stage on positions shifted by one step differs
    shifted = measure(x[1:], spec.measurement, spec.seed)
    assert not np.array_equal(shifted["true_positions"][:10], np.asarray(got["true_positions"][:10]))
    if sink == "hdf5":
        assert traj.units["measured/images"] == "counts" and traj.units["detector/signal"] == "V"
        f = traj._file                            # the file the trajectory holds open
        assert f["measured/images"].attrs["pixel_size"] == 100e-9
        assert f["measured/true_positions"].attrs["blur_coefficient"] == spec.measurement.blur
        traj.close()


def test_measurement_noise_follows_the_spawn_key():
    # the measurement stream is a child of (seed, spawn_key): another spawn key, other noise
    base = _spec(_config_text(400, 10))
    other = _spec("spawn_key = [3]\n" + _config_text(400, 10))
    a = Engine(base, MemorySink()).run().measured
    b = Engine(other, MemorySink()).run().measured
    assert not np.array_equal(a["positions"] - a["true_positions"], b["positions"] - b["true_positions"])


def test_kill_then_resume_with_images_is_bit_identical(tmp_path):
    text = _config_text(120_000, 40)     # chunks of 16 640 steps: exposures straddle them
    config = tmp_path / "movie.toml"
    config.write_text(text)
    out = tmp_path / "movie.h5"
    ref = Engine(_spec(text), MemorySink()).run()
    rng = np.random.default_rng(9)                 # a fixed moment to kill at
    target = int(rng.integers(30_000, 60_000))
    proc = start_cli(["run", config, "-o", out, "--quiet"])
    wait_for_checkpoint(proc, out, target, rng, timeout=180)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    with h5py.File(out, "r") as f:                  # killed mid-run: a partial measured group
        cp = f["checkpoint"].attrs
        assert 0 < int(cp["measured.n_frames"]) < len(ref.measured["time"])
        assert 0 < int(cp["step"]) < 120_000
    done = langsim_cli("run", config, "-o", out, "--resume")
    assert done.returncode == 0, done.stderr
    with h5py.File(out, "r") as f:
        assert f.attrs["state"] == "complete"
        np.testing.assert_array_equal(f["positions"][:], ref.positions)
        for group in ("measured", "detector"):
            mine = ref.groups[group]
            assert set(f[group]) == set(mine)
            for name in mine:
                np.testing.assert_array_equal(f[group][name][:], mine[name], err_msg=f"{group}/{name}")


def test_check_rows_of_a_trapped_bead_with_localization_error():
    # 16 beads in traps (tau = 10 ms) filmed at 100 frames/s with 5 ms exposures and 5 nm
    # localization error; check-values sections 8 and 13: the exposure averages' variance is
    # (kT/k) S(W/tau) (exact form for the taps on the Euler-Maruyama chain), the reported
    # positions add sigma^2 to it and 2 sigma^2 to the MSD (Berglund 2010; Wong & Halvorsen 2006)
    cfg = {"seed": 41, "particles": {"count": 16, "dimensions": 2, "friction": 1e-8},
           "potential": [{"type": "harmonic", "stiffness": 1e-6}],
           "dynamics": {"dt": 1e-4, "duration": 20.0}, "output": {"every": 100},
           "measurement": {"frame_rate": 100.0, "exposure": 0.005, "localization_error": 5e-9}}
    traj = langsim.run(cfg, progress=False)
    rows = {r.quantity: r for r in langsim.check(traj).rows}
    for a in "xy":
        for q in (f"blurred variance {a}", f"measured variance {a}", f"localization MSD offset {a}",
                  f"stiffness {a} (blurred trap)"):
            assert rows[q].status == "pass", rows[q]
        assert rows[f"localization MSD offset {a}"].predicted == 2 * 5e-9 ** 2
        assert rows[f"localization MSD offset {a}"].error < 0.02 * 2 * 5e-9 ** 2    # resolves sigma
    # 10 % more noise variance than configured in the file is caught
    m = traj.measured
    extra = np.sqrt(0.1) * 5e-9 * np.random.default_rng(2).standard_normal(m["positions"].shape)
    traj.measured = dict(m, positions=m["positions"] + extra)
    bad = {r.quantity: r for r in langsim.check(traj).rows}
    assert bad["localization MSD offset x"].status == "fail" and bad["localization MSD offset y"].status == "fail"
    # the blurred variance row fails on exposure averages of the wrong exposure (instantaneous positions)
    traj.measured = dict(m, true_positions=np.asarray(traj.positions)[:len(m["time"])])
    assert {r.quantity: r for r in langsim.check(traj).rows}["blurred variance x"].status == "fail"
