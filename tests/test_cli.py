"""The ``langsim`` command line, end to end in subprocesses.

Every bad input gives exit code 2, a message on stderr that names the key or
file, the value and what was expected, and never a traceback.
"""
import json
import os
import subprocess
import sys
import textwrap

import h5py
import numpy as np
import pytest

import langsim

#: A short overdamped run: 4 beads in a 2D harmonic trap (values as in configs/silica-trap.toml,
#: with a softer trap so that 20 000 steps cover many relaxation times).
SMALL = """\
seed = 3
[particles]
radius = 0.5e-6
count = 4
dimensions = 2
[[potential]]
type = "harmonic"
stiffness = 1e-6
[dynamics]
dt = 1e-4
steps = 20000
"""


def langsim_cli(*args, cwd=None, timeout=120, env=None):
    """Run ``python -m langsim.cli ARGS``; returns the CompletedProcess (text)."""
    return subprocess.run([sys.executable, "-m", "langsim.cli", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=timeout, env=env)


def write(path, text):
    path.write_text(textwrap.dedent(text))
    return path


def assert_usage_error(proc, *needles):
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr, proc.stderr
    for needle in needles:
        assert needle in proc.stderr, (needle, proc.stderr)


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    """SMALL run once through the CLI with the default output path."""
    folder = tmp_path_factory.mktemp("cli")
    config = write(folder / "small.toml", SMALL)
    proc = langsim_cli("run", config)
    return config, folder / "small.h5", proc


def test_run_writes_next_to_config_and_summarises(small_run):
    config, out, proc = small_run
    assert proc.returncode == 0, proc.stderr
    assert out.exists()
    assert f"Wrote {out}" in proc.stdout
    assert "20001 frames" in proc.stdout and "ns per particle-step" in proc.stdout
    with h5py.File(out, "r") as f:
        assert f["positions"].shape == (20001, 4, 2)
        assert bool(f.attrs["complete"])


def test_run_again_refuses_to_overwrite_then_overwrites(small_run):
    config, out, _ = small_run
    before = out.read_bytes()
    proc = langsim_cli("run", config, "--quiet")
    assert_usage_error(proc, str(out), "file exists", "--overwrite")
    assert out.read_bytes() == before
    proc = langsim_cli("run", config, "--quiet", "--overwrite")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""                      # --quiet: no summary
    with h5py.File(out, "r") as f:
        assert f["positions"].shape == (20001, 4, 2)


def test_info_describes_the_run(small_run):
    _, out, _ = small_run
    proc = langsim_cli("info", out)
    assert proc.returncode == 0, proc.stderr
    text = proc.stdout
    for needle in ("overdamped", "euler-maruyama", "dt = 0.0001 s", "4 in 2D", "20001 of 20001",
                   "temperature 295.15 K", "harmonic: ", "stiffness = 1e-06", "seed         3",
                   "status       complete"):
        assert needle in text, (needle, text)


def test_check_passes_fails_and_keeps_figures(small_run, tmp_path):
    pytest.importorskip("matplotlib")
    _, out, _ = small_run
    plots = tmp_path / "figs"
    proc = langsim_cli("check", out, "--json", "--plots", plots)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    report = json.loads(proc.stdout)
    assert report["passed"] and report["rows"]
    assert list(plots.glob("*.png"))
    proc = langsim_cli("check", out, "--plots", plots)
    assert_usage_error(proc, "--plots", "already holds figures", "--overwrite")
    # The same frames claimed to come from a trap 3x stiffer must fail the check.
    wrong = tmp_path / "wrong.h5"
    wrong.write_bytes(out.read_bytes())
    with h5py.File(wrong, "r+") as f:
        cfg = json.loads(f.attrs["config"])
        cfg["potential"][0]["stiffness"] = [3e-6, 3e-6]
        f.attrs["config"] = json.dumps(cfg)
    proc = langsim_cli("check", wrong)
    assert proc.returncode == 1, proc.stdout + proc.stderr
    assert "FAILED" in proc.stdout


def test_help_and_version():
    proc = langsim_cli("--help")
    assert proc.returncode == 0
    for needle in ("run", "info", "check", "langsim run configs/silica-trap.toml"):
        assert needle in proc.stdout
    proc = langsim_cli("run", "--help")
    assert proc.returncode == 0
    for needle in ("--resume", "--overwrite", "--quiet", "-o OUT.h5", "checkpoint_every"):
        assert needle in proc.stdout
    for command in ("info", "check"):
        proc = langsim_cli(command, "--help")
        assert proc.returncode == 0 and "FILE" in proc.stdout
    proc = langsim_cli("--version")
    assert proc.returncode == 0 and proc.stdout.strip() == f"langsim {langsim.__version__}"


@pytest.mark.parametrize("case", ["missing", "toml", "unknown-key", "wrong-value", "out-dir",
                                  "config-as-output"])
def test_run_bad_input(tmp_path, case):
    config = tmp_path / "c.toml"
    if case == "missing":
        proc = langsim_cli("run", tmp_path / "nope.toml")
        assert_usage_error(proc, "nope.toml", "no such config file")
    elif case == "toml":
        write(config, "seed = 1\n[particles\nradius = 1e-6\n")
        proc = langsim_cli("run", config)
        assert_usage_error(proc, "c.toml", "not valid TOML")
    elif case == "unknown-key":
        write(config, SMALL.replace("radius =", "raduis ="))
        proc = langsim_cli("run", config)
        assert_usage_error(proc, "[particles] raduis", "unknown key", "did you mean 'radius'?")
    elif case == "wrong-value":
        write(config, SMALL + "[medium]\ntemperature = -5.0\n")
        proc = langsim_cli("run", config)
        assert_usage_error(proc, "[medium] temperature = -5.0", "expected a number > 0 (K)")
    elif case == "out-dir":
        write(config, SMALL)
        proc = langsim_cli("run", config, "-o", tmp_path / "no" / "such" / "out.h5")
        assert_usage_error(proc, "out.h5", "does not exist", "expected an existing folder")
    elif case == "config-as-output":
        write(config, SMALL)
        proc = langsim_cli("run", config, "-o", config, "--overwrite")
        assert_usage_error(proc, "is the config file itself")
        assert config.read_text() == SMALL
    assert not any(p.suffix == ".h5" for p in tmp_path.rglob("*"))


def test_info_and_check_bad_files(tmp_path):
    proc = langsim_cli("info", tmp_path / "missing.h5")
    assert_usage_error(proc, "missing.h5", "no such file")
    text = tmp_path / "notes.h5"
    text.write_text("not HDF5 at all\n")
    proc = langsim_cli("check", text)
    assert_usage_error(proc, "notes.h5", "not readable as HDF5")
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f["x"] = np.arange(3)
    proc = langsim_cli("info", other)
    assert_usage_error(proc, "other.h5", "not a langsim trajectory", "format")


def test_usage_errors():
    proc = langsim_cli()
    assert proc.returncode == 2 and "usage" in proc.stderr
    proc = langsim_cli("run")
    assert proc.returncode == 2 and "CONFIG" in proc.stderr and "Traceback" not in proc.stderr
    proc = langsim_cli("fly")
    assert proc.returncode == 2 and "invalid choice" in proc.stderr


def test_warning_is_one_line_and_output_path_from_config(tmp_path):
    # stiffness 1e-4 N/m, friction 9.0e-9 kg/s, dt 2e-5 s: k dt / gamma = 0.22 > 0.2 warns.
    sub = tmp_path / "runs"
    sub.mkdir()
    config = write(tmp_path / "warn.toml", SMALL.replace("stiffness = 1e-6", "stiffness = 1e-4")
                   .replace("dt = 1e-4", "dt = 2e-5").replace("steps = 20000", "steps = 200")
                   + '[output]\npath = "runs/out.h5"\n')
    proc = langsim_cli("run", config, "--quiet")
    assert proc.returncode == 0, proc.stderr
    lines = [line for line in proc.stderr.splitlines() if line.startswith("warning: ")]
    assert len(lines) == 1 and "[dynamics] dt = 2e-05" in lines[0], proc.stderr
    assert (sub / "out.h5").exists()         # [output] path is relative to the config's folder


def test_blow_up_exits_1_keeps_frames_and_cannot_resume(tmp_path):
    # Euler-Maruyama is unstable for stiffness*dt/friction > 2; here it is 3 (allowed on purpose).
    config = write(tmp_path / "blow.toml", SMALL.replace("dt = 1e-4", "dt = 1e-4\nallow_unstable = true")
                   .replace("stiffness = 1e-6", "stiffness = 2.7e-4"))
    out = tmp_path / "blow.h5"
    proc = langsim_cli("run", config, "-o", out, "--quiet")
    assert proc.returncode == 1, proc.stderr
    assert "ended early" in proc.stderr and "non-finite position of particle" in proc.stderr
    assert "Traceback" not in proc.stderr
    with h5py.File(out, "r") as f:
        assert f.attrs["state"] == "failed" and not f.attrs["complete"]
        n = int(f.attrs["n_frames"])
        assert 1 <= n < 20001 and np.all(np.isfinite(f["positions"][:n]))
    proc = langsim_cli("run", config, "-o", out, "--resume")
    assert_usage_error(proc, "numerical blow-up", "dt")
    info = langsim_cli("info", out)
    assert info.returncode == 0 and "ended early" in info.stdout
