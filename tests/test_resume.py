"""Interruption and exact resume: SIGINT, SIGTERM, kill -9, a full disk.

The noise is a pure function of (seed, particle, step, component), so a run
resumed from a checkpoint must give the same bits as one that never stopped.
Runs here use small engine chunks (patched in the child process) so that
checkpoints come every few milliseconds.
"""
import json
import os
import resource
import signal
import subprocess
import sys
import textwrap
import time
import warnings

import h5py
import numpy as np
import pytest

import langsim
from langsim import config as _config
from langsim.engine import Engine, RunInterrupted
from langsim.trajectory import HDF5Sink

from test_cli import assert_usage_error, langsim_cli

pytestmark = pytest.mark.filterwarnings("ignore::langsim.config.LangsimWarning")

OVERDAMPED = """\
seed = 21
[particles]
friction = 1e-8
count = 1000
[[potential]]
type = "harmonic"
stiffness = 1e-7
[dynamics]
dt = 1e-3
steps = 40000
[output]
every = 100
checkpoint_every = 0.02
"""
#: The same beads with inertia (m/friction = 1 ms, omega dt = 0.1), velocities recorded.
UNDERDAMPED = OVERDAMPED.replace("friction = 1e-8", "friction = 1e-8\nmass = 1e-11").replace(
    "[dynamics]", '[dynamics]\nregime = "underdamped"').replace(
    "checkpoint_every = 0.02", "checkpoint_every = 0.02\nvelocities = true")

#: The CLI with engine chunks of 200 000 particle-steps (2 frames here) instead of 2e7.
SMALL_CHUNKS = ("import sys, langsim.engine as e; e.CHUNK_PARTICLE_STEPS = 200_000; "
                "from langsim.cli import main; sys.exit(main(sys.argv[1:]))")


def reference(config):
    """The uninterrupted run, in memory."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Engine(_config.load(str(config)), langsim.trajectory.MemorySink()).run()


def checkpoint_step(path):
    try:
        with h5py.File(path, "r", locking=False) as f:
            return int(f["checkpoint"].attrs["step"])
    except (OSError, KeyError):
        return -1


def start_cli(args, preexec_fn=None):
    return subprocess.Popen([sys.executable, "-c", SMALL_CHUNKS, *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=preexec_fn)


def wait_for_checkpoint(proc, out, target, rng, timeout=120):
    """Return once the run ``proc`` writing ``out`` has a checkpoint at step >= ``target``,
    plus a random delay of up to 20 ms (so the signal may land anywhere in a chunk)."""
    deadline = time.monotonic() + timeout
    while proc.poll() is None and checkpoint_step(out) < target and time.monotonic() < deadline:
        time.sleep(0.005)
    time.sleep(float(rng.uniform(0, 0.02)))
    assert proc.poll() is None, "the run ended before it could be stopped"


def assert_same_run(path, ref):
    with h5py.File(path, "r") as f:
        assert f.attrs["state"] == "complete" and bool(f.attrs["complete"])
        assert np.array_equal(f["positions"][:], ref.positions)
        assert np.array_equal(f["time"][:], ref.time)
        if ref.velocities is not None:
            assert np.array_equal(f["velocities"][:], ref.velocities)
        else:
            assert "velocities" not in f


@pytest.mark.parametrize("sig, text", [(signal.SIGINT, OVERDAMPED), (signal.SIGTERM, OVERDAMPED),
                                       (signal.SIGKILL, UNDERDAMPED)],
                         ids=["sigint", "sigterm", "kill-9-underdamped"])
def test_stop_then_resume_is_bit_identical(tmp_path, sig, text):
    config = tmp_path / "run.toml"
    config.write_text(text)
    out = tmp_path / "run.h5"
    ref = reference(config)
    rng = np.random.default_rng(int(sig))          # fixed moment per signal
    target = int(rng.integers(4000, 20000))
    proc = start_cli(["run", config, "-o", out, "--quiet"])
    wait_for_checkpoint(proc, out, target, rng)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    if sig == signal.SIGKILL:
        assert proc.returncode == -signal.SIGKILL
    else:
        assert proc.returncode == 128 + sig, err
        assert f"interrupted by {signal.Signals(sig).name}" in err and "--resume" in err
        assert "Traceback" not in err
    with h5py.File(out, "r") as f:                  # valid, and exact up to the checkpoint
        n = int(f["checkpoint"].attrs["n_frames"])
        assert 0 < n < ref.n_frames
        assert np.array_equal(f["positions"][:n], ref.positions[:n])
        assert f.attrs["state"] == ("running" if sig == signal.SIGKILL else "interrupted")
    info = langsim_cli("info", out)
    assert info.returncode == 0 and "resume       langsim run CONFIG" in info.stdout
    proc = langsim_cli("run", config, "-o", out, "--resume")
    assert proc.returncode == 0, proc.stderr
    assert f"resuming {out}: {n} frames valid" in proc.stderr
    assert "(resumed)" in proc.stdout
    assert_same_run(out, ref)


def interrupt_in_process(cfg, path, at_step):
    """Run cfg into path and raise SIGINT in this process once ``at_step`` is passed."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spec = _config.load(cfg)
    sent = []

    def progress(step, n_steps):
        if step >= at_step and not sent:
            sent.append(step)
            os.kill(os.getpid(), signal.SIGINT)
    with pytest.raises(RunInterrupted) as info:
        Engine(spec, HDF5Sink(path), progress=progress).run()
    info.value.trajectory.close()
    return info.value


@pytest.mark.parametrize("compression", ["none", "gzip"])
def test_interrupted_in_process_resumes_without_seed_in_config(tmp_path, monkeypatch,
                                                               compression):
    """A config without a seed resumes with the seed recorded in the file.

    With compression, frames of the unfinished last chunk wait in the checkpoint and
    are not yet in the datasets; the resumed file is still bit-identical.
    """
    monkeypatch.setattr("langsim.engine.CHUNK_PARTICLE_STEPS", 200_000)
    cfg = _config.read(str(_write(tmp_path, UNDERDAMPED)))[0]
    del cfg["seed"]
    cfg["output"]["compression"] = compression
    out = tmp_path / "noseed.h5"
    exc = interrupt_in_process(cfg, out, 10000)
    assert exc.signum == signal.SIGINT and "interrupted by SIGINT" in exc.message
    with h5py.File(out, "r") as f:
        seed = int(f.attrs["seed"])
        assert f.attrs["state"] == "interrupted"
        assert json.loads(f.attrs["status"])["complete"] is False
        cp = f["checkpoint"].attrs
        assert cp["stored_frames"] + cp["tail_frames"] == cp["n_frames"] > cp["stored_frames"] \
            if compression == "gzip" else cp["stored_frames"] == cp["n_frames"]
        assert f.attrs["n_frames"] == cp["stored_frames"]
    # Settings that do not change the numbers may differ on resume.
    cfg["output"] = dict(cfg["output"], checkpoint_every=5.0, compression="lzf")
    traj = langsim.run(cfg, out, progress=False, resume=True)
    assert traj.run_stats.resumed and traj.status.complete
    traj.close()
    ref = Engine(_config.load({**cfg, "seed": seed}), langsim.trajectory.MemorySink()).run()
    assert_same_run(out, ref)


def _write(tmp_path, text, name="c.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_resume_refusals_and_no_file_and_complete(tmp_path, monkeypatch):
    monkeypatch.setattr("langsim.engine.CHUNK_PARTICLE_STEPS", 200_000)
    config = _write(tmp_path, OVERDAMPED)
    out = tmp_path / "r.h5"
    interrupt_in_process(str(config), out, 8000)
    before = out.read_bytes()
    other = _write(tmp_path, OVERDAMPED.replace("seed = 21", "seed = 22").replace(
        "stiffness = 1e-7", "stiffness = 2e-7"), "other.toml")
    proc = langsim_cli("run", other, "-o", out, "--resume")
    assert_usage_error(proc, "differs", "seed: file has 21, config gives 22",
                       "potential[0].stiffness")
    assert out.read_bytes() == before
    # No file yet: --resume starts the run and says so.
    fresh = tmp_path / "fresh.h5"
    proc = langsim_cli("run", config, "-o", fresh, "--resume")
    assert proc.returncode == 0 and "does not exist yet: starting a new run" in proc.stderr
    # A finished run: says so and changes nothing.
    done = fresh.read_bytes()
    proc = langsim_cli("run", config, "-o", fresh, "--resume")
    assert proc.returncode == 0 and "already holds the complete run" in proc.stderr
    assert fresh.read_bytes() == done


DISK_LIMIT = 6 * 2**20


def _limit_file_size():
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)     # so that write() fails with EFBIG
    resource.setrlimit(resource.RLIMIT_FSIZE, (DISK_LIMIT, DISK_LIMIT))


def test_disk_full_leaves_valid_file_and_resumes(tmp_path):
    # 1000 beads x 1001 frames x 8 bytes = 8 MB of positions: the 6 MiB limit is hit mid-run.
    config = _write(tmp_path, OVERDAMPED.replace("steps = 40000", "steps = 10000").replace(
        "every = 100", "every = 10").replace("checkpoint_every = 0.02", "checkpoint_every = 1e-6"))
    out = tmp_path / "full.h5"
    ref = reference(config)
    proc = start_cli(["run", config, "-o", out, "--quiet"], preexec_fn=_limit_file_size)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 2, err
    assert "Traceback" not in err
    assert f"writing {out} failed: File too large" in err and "--resume" in err
    with h5py.File(out, "r") as f:
        n = int(f["checkpoint"].attrs["n_frames"])
        assert 0 < n < ref.n_frames
        assert np.array_equal(f["positions"][:n], ref.positions[:n])
    with langsim.load(out) as traj:
        assert traj.n_frames == n and not traj.status.complete
    proc = langsim_cli("run", config, "-o", out, "--resume", "--quiet")
    assert proc.returncode == 0, proc.stderr
    assert_same_run(out, ref)
