"""Nothing a user wrote is lost: second writers, odd paths, the config file, parameter names.

The two-writer tests run real ``langsim run`` processes. A writer is held just after
its first checkpoint (``HOLD``: the CLI with ``HDF5Sink.checkpoint`` wrapped) until the
test lets it go, so the second writer is certain to arrive while the first one writes.
"""
import fcntl
import math
import os
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import langsim
from langsim import potentials, safeio
from langsim.validation import ConfigError

CONFIG = """\
seed = {seed}
[particles]
friction = 1e-8
count = 3
[[potential]]
type = "harmonic"
stiffness = 1e-7
[dynamics]
dt = 1e-3
steps = 400
[output]
every = 2
"""

HOLD = textwrap.dedent("""
    import os, sys, time
    from langsim import cli, trajectory
    ready, go = sys.argv[1], sys.argv[2]
    original = trajectory.HDF5Sink.checkpoint

    def held(self, *args):
        original(self, *args)
        if not os.path.exists(ready):
            open(ready, "w").close()
            deadline = time.monotonic() + 120
            while not os.path.exists(go) and time.monotonic() < deadline:
                time.sleep(0.02)

    trajectory.HDF5Sink.checkpoint = held
    sys.exit(cli.main(sys.argv[3:]))
""")
TIMEOUT = 180


def _start(folder, tag, *args):
    """A held ``langsim run ARGS`` process; it writes ``ready-TAG`` when held."""
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(folder / f"ready-{tag}"),
                             str(folder / "go"), "run", *map(str, args), "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc.ready = folder / f"ready-{tag}"
    return proc


def _settle(procs):
    """Wait until every process has exited or is held."""
    deadline = time.monotonic() + TIMEOUT
    while not all(p.poll() is not None or p.ready.exists() for p in procs):
        assert time.monotonic() < deadline, "writers neither held nor finished"
        time.sleep(0.05)


def _finish(folder, procs):
    (folder / "go").touch()
    return [(p.wait(timeout=TIMEOUT),) + p.communicate() for p in procs]


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "langsim.cli", *map(str, args), "--quiet"],
                          capture_output=True, text=True, timeout=TIMEOUT)


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    folder = tmp_path_factory.mktemp("writers")
    config = folder / "run.toml"
    config.write_text(CONFIG.format(seed=11))
    reference = langsim.run(config, progress=False)          # the same run, in memory
    return folder, config, reference


def _assert_intact(path, reference):
    """The file holds the whole run, bit-identical to the in-memory reference."""
    with langsim.load(path) as traj:
        assert traj.status.complete and traj.file_state == "complete"
        assert traj.n_frames == reference.n_frames == 201
        np.testing.assert_array_equal(np.asarray(traj.positions), reference.positions)
    leftovers = [n for n in os.listdir(os.path.dirname(path)) if n.endswith(".part")]
    assert not leftovers, leftovers


def test_second_writer_arriving_later_is_refused_and_touches_nothing(setup):
    folder, config, reference = setup
    out = folder / "staggered.h5"
    first = _start(folder, "a", config, "-o", out)
    _settle([first])
    assert first.poll() is None, first.communicate()
    before = out.read_bytes()
    for flags, needle in (((), "file exists"), (("--overwrite",), "open for writing in another"),
                          (("--resume",), "open for writing in another")):
        proc = _cli("run", config, "-o", out, *flags)
        assert proc.returncode == 2, (flags, proc.stderr)
        assert needle in proc.stderr and "Traceback" not in proc.stderr, proc.stderr
        assert out.read_bytes() == before, flags             # not one byte changed
    (code, _, err), = _finish(folder, [first])
    assert code == 0, err
    _assert_intact(out, reference)


@pytest.mark.parametrize("flags", [(), ("--overwrite",)], ids=["plain", "overwrite"])
def test_two_writers_started_together_one_wins_intact(setup, flags):
    folder, config, reference = setup
    sub = folder / ("together-" + "-".join(flags or ("plain",)))
    sub.mkdir()
    out = sub / "run.h5"
    if flags:                                  # both may replace: an older run is there
        other = sub / "old.toml"
        other.write_text(CONFIG.format(seed=99))
        assert _cli("run", other, "-o", out).returncode == 0
    procs = [_start(sub, tag, config, "-o", out, *flags) for tag in "ab"]
    _settle(procs)
    results = _finish(sub, procs)
    codes = sorted(code for code, _, _ in results)
    assert codes == [0, 2], results
    loser = [err for code, _, err in results if code == 2][0]
    assert ("file exists" in loser or "open for writing in another" in loser), loser
    assert "Traceback" not in loser
    _assert_intact(out, reference)


def test_replacing_a_locked_file_is_refused(tmp_path):
    """safeio.install under a lock held by this test (as HDF5 holds it for a writer)."""
    target = tmp_path / "busy.h5"
    target.write_bytes(b"frames someone is writing")
    temp = tmp_path / "new.part"
    temp.write_bytes(b"new")
    fd = os.open(target, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        with pytest.raises(ConfigError, match="open for writing in another process"):
            safeio.install(str(temp), str(target), replace=True)
    finally:
        os.close(fd)
    assert target.read_bytes() == b"frames someone is writing" and not temp.exists()
    temp.write_bytes(b"new")
    with pytest.raises(ConfigError, match="file exists"):
        safeio.install(str(temp), str(target), replace=False)
    assert target.read_bytes() == b"frames someone is writing" and not temp.exists()
    temp.write_bytes(b"new")
    safeio.install(str(temp), str(target), replace=True)          # unlocked, asked: replaced
    assert target.read_bytes() == b"new" and not temp.exists()


SMALL = {"seed": 1, "particles": {"friction": 1e-8, "count": 2},
         "potential": [{"type": "harmonic", "stiffness": 1e-7}],
         "dynamics": {"dt": 1e-3, "steps": 20}}


@pytest.mark.parametrize("char", ["\x00", "\n", "\x1b", "\x7f", "\x85"])
def test_control_characters_in_output_paths_are_refused(tmp_path, char):
    victim = tmp_path / "a.h5"
    victim.write_bytes(b"unrelated")
    name = str(victim) + char + "b"
    for kwargs in ({"out": name}, {"out": name, "overwrite": True}):
        with pytest.raises(ConfigError, match="control character"):
            langsim.run(SMALL, progress=False, **kwargs)
    with pytest.raises(ConfigError, match="control character"):
        langsim.run({**SMALL, "output": {"path": name}}, progress=False, overwrite=True)
    assert victim.read_bytes() == b"unrelated"
    assert sorted(os.listdir(tmp_path)) == ["a.h5"]


def test_output_path_naming_the_config_itself_is_refused_every_way(tmp_path):
    config = tmp_path / "run.toml"
    text = CONFIG.format(seed=1) + 'path = "run.toml"\n'
    config.write_text(text)
    for flags in ((), ("--overwrite",), ("--resume",)):
        proc = _cli("run", config, *flags)
        assert proc.returncode == 2 and "config file itself" in proc.stderr, proc.stderr
        proc = _cli("run", config, "-o", config, *flags)
        assert proc.returncode == 2 and "config file itself" in proc.stderr, proc.stderr
    for kwargs in ({"overwrite": True}, {"out": config, "overwrite": True},
                   {"out": str(config), "resume": True}):
        with pytest.raises(ConfigError, match="config file itself"):
            langsim.run(config, progress=False, **kwargs)
    assert config.read_text() == text
    # the config's default output name is the config itself (a TOML file called run.h5)
    odd = tmp_path / "odd.h5"
    odd.write_text(CONFIG.format(seed=1))
    proc = _cli("run", odd, "--overwrite")
    assert proc.returncode == 2 and "config file itself" in proc.stderr, proc.stderr
    assert odd.read_text() == CONFIG.format(seed=1)


# ------------------------------------------------------------ expression parameter names

def _extra_force(term, d=1):
    """The generated user-term function, executed as plain Python (no compiling)."""
    user = potentials.user_terms([term], d)
    namespace = {"math": math, "np": np}
    exec(user.source, namespace)
    return namespace["extra_force"], user.parameters


NAMES = st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,6}", fullmatch=True).filter(
    potentials._parameter_name)


@settings(max_examples=60, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(names=st.lists(NAMES, min_size=3, max_size=3, unique=True)
       | st.permutations(["_p0", "_p1", "A"]) | st.permutations(["_p2", "_p0", "_p1"]))
def test_any_parameter_names_give_the_energy_written_with_numbers(names):
    """Renaming parameters to the generated _pK names is simultaneous: the force and
    energy equal those of the same expression with the numbers written in."""
    values = [2.0e-7, 3.0e-7, 0.7e-6]
    template = "{0}/2*(x - {1})**2 + {2}*1e-7*x"
    term = potentials.Expression(template.format(*names), dict(zip(names, values)))
    written = potentials.Expression(template.format(*(f"({v!r})" for v in values)), {})
    f, P = _extra_force(term)
    g, Q = _extra_force(written)
    for x in (-1e-6, 0.0, 0.4e-6, 2e-6):
        fa, fb = np.zeros(1), np.zeros(1)
        ua, ub = f(np.array([x]), 0.0, fa, P), g(np.array([x]), 0.0, fb, Q)
        assert ua == pytest.approx(ub, rel=1e-12, abs=1e-30)
        assert fa[0] == pytest.approx(fb[0], rel=1e-12, abs=1e-30)


def test_parameter_named_like_a_generated_name_gives_the_right_trajectory(tmp_path, monkeypatch):
    """A = k and _p0 = centre (sorted, A becomes _p0 and _p0 becomes _p1; a renaming in
    sequence gave both the value of one). Same source, one compile, as (k, m); and the
    trajectory of the built-in harmonic term to rounding."""
    monkeypatch.setenv("LANGSIM_CACHE_DIR", str(tmp_path))
    k, centre = 1e-7, 2e-7
    base = {"seed": 4, "particles": {"friction": 1e-8, "count": 8, "initial": [0.0]},
            "dynamics": {"dt": 1e-3, "steps": 200}}
    tricky = langsim.run({**base, "potential": [{"type": "expression",
                          "energy": "A/2*(x - _p0)**2", "parameters": {"A": k, "_p0": centre}}]},
                         progress=False)
    plain = langsim.run({**base, "potential": [{"type": "expression",
                         "energy": "k/2*(x - m)**2", "parameters": {"k": k, "m": centre}}]},
                        progress=False)
    builtin = langsim.run({**base, "potential": [{"type": "harmonic", "stiffness": k,
                                                  "center": centre}]}, progress=False)
    np.testing.assert_array_equal(tricky.positions, plain.positions)
    np.testing.assert_allclose(tricky.positions, builtin.positions, rtol=1e-9, atol=1e-18)
    # wrong input: the swapped values give another trajectory
    swapped = langsim.run({**base, "potential": [{"type": "expression",
                           "energy": "k/2*(x - m)**2", "parameters": {"k": centre, "m": k}}]},
                          progress=False)
    assert not np.allclose(swapped.positions, builtin.positions, rtol=1e-3)


@pytest.mark.parametrize("key", [3, "if", "x", "exp", "ﬁ", "a-b", ""])
def test_unusable_parameter_names_are_refused(key):
    cfg = {**SMALL, "potential": [{"type": "expression", "energy": "1e-7*x**2",
                                   "parameters": {key: 1.0}}]}
    with pytest.raises(ConfigError, match="parameter name"):
        langsim.run(cfg, progress=False)
