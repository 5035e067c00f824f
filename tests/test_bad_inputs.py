"""The corpus of concrete bad inputs (tests/data/bad-inputs/, listed in cases.json).

Every config, TOML text and damaged trajectory file found by the adversarial test of
issue 8 goes through the command line (``langsim.cli.main``, in this process; one
case also as a real ``langsim`` process) and must end with exit code 2, a
one-paragraph message on stderr naming the key or item, no traceback, no file left
behind by a run that could not start, and a damaged file left byte-for-byte as it was.
Expectations are the project's contract (exit codes and message template in README);
the concrete inputs are those of the issue.
"""
import json
import os
import shutil
import signal
import subprocess
import sys
import warnings
from contextlib import contextmanager
from pathlib import Path

import h5py
import numpy as np
import pytest

import langsim
from langsim import cli
from langsim.validation import ConfigError

CORPUS = Path(__file__).parent / "data" / "bad-inputs"
CASES = json.loads((CORPUS / "cases.json").read_text())
#: Seconds any one bad input may take before the test calls it a hang.
TIMEOUT = 60
#: A message is one paragraph: no blank line, and short enough to read.
MAX_MESSAGE_CHARS = 2000


class Hang(Exception):
    pass


@contextmanager
def time_limit(seconds=TIMEOUT):
    """Raise Hang in this (main) thread after ``seconds`` of wall time."""
    def alarm(signum, frame):
        raise Hang(f"no answer within {seconds} s")
    previous = signal.signal(signal.SIGALRM, alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def run_cli(args, capsys):
    """(exit code, stderr) of ``langsim ARGS`` run in this process within TIMEOUT."""
    capsys.readouterr()
    with time_limit():
        code = cli.main([str(a) for a in args])
    return code, capsys.readouterr().err


def assert_usage_message(code, err, expect):
    """Exit 2 and one paragraph naming every string of ``expect``."""
    assert code == 2, err
    text = err.strip()
    assert text.startswith("error: "), err
    assert "Traceback" not in text and "\n\n" not in text, err
    assert len(text) <= MAX_MESSAGE_CHARS, err
    assert "expected" in text, err                  # the template: key = value: expected ...
    for word in expect:
        assert word in text, (word, err)


def _generated(case, folder):
    """Write a generated corpus file (kept as parts in cases.json: too large to store)."""
    out = []
    for part in case["parts"]:
        out.append(part[1] * part[2] if part[0] == "repeat" else part[1])
    path = folder / case["name"]
    path.write_text("".join(out))
    return path


#: How a case is run unless it says otherwise: with -o OUT.h5 and no other flag.
DEFAULT_VARIANTS = [{"output_option": True, "flags": []}]


def _config_cases():
    for case in CASES["configs"] + CASES["generated"]:
        for v in case.get("variants", DEFAULT_VARIANTS):
            name = case.get("file") or case["name"]
            tag = ("-o" if v["output_option"] else "") + "".join(v["flags"])
            yield pytest.param(case, v, id=f"{name}{tag}")


@pytest.mark.parametrize("case, variant", list(_config_cases()))
def test_bad_config_exits_2_with_a_message_and_creates_nothing(case, variant, tmp_path, capsys):
    if "parts" in case:
        config = _generated(case, tmp_path)
    else:
        config = tmp_path / case["file"]
        shutil.copyfile(CORPUS / case["file"], config)
    before = config.read_bytes()
    args = ["run", config, "--quiet", *variant["flags"]]
    if variant["output_option"]:
        args += ["-o", tmp_path / "out.h5"]
    code, err = run_cli(args, capsys)
    assert_usage_message(code, err, case["expect"])
    assert sorted(os.listdir(tmp_path)) == [config.name], "a run that could not start left files"
    assert config.read_bytes() == before


def test_the_corpus_is_complete():
    """Every stored file is a listed case (and every listed case exists)."""
    listed = {c["file"] for c in CASES["configs"]}
    stored = {p.name for p in CORPUS.iterdir()} - {"cases.json", "base.toml"}
    assert listed == stored


# ------------------------------------------------------------------ damaged files

@pytest.fixture(scope="module")
def good_file(tmp_path_factory):
    """A complete small trajectory written by ``langsim run`` from the corpus' base config."""
    folder = tmp_path_factory.mktemp("damaged")
    config = folder / "base.toml"
    shutil.copyfile(CORPUS / "base.toml", config)
    out = folder / "good.h5"
    assert cli.main(["run", str(config), "-o", str(out), "--quiet"]) == 0
    return config, out


def damage(path, mutations):
    """Apply the mutations of a corpus case to the file at ``path``."""
    for kind, *args in mutations:
        if kind == "truncate":
            size = os.path.getsize(path)
            with open(path, "r+b") as fh:
                fh.truncate(int(size * args[0]))
            continue
        with h5py.File(path, "r+") as f:
            if kind == "set_attr":
                node, name, value = args
                f[node].attrs[name] = value
            elif kind == "del_attr":
                del f[args[0]].attrs[args[1]]
            elif kind == "del":
                del f[args[0]]
            elif kind == "resize":
                f[args[0]].resize(args[1], axis=0)
            else:
                raise ValueError(kind)


def verb_args(verb, config, path):
    """Command line of ``verb`` ("info", "check", "resume") on the file at ``path``."""
    return {"info": ["info", path], "check": ["check", path],
            "resume": ["run", config, "-o", path, "--resume", "--quiet"]}[verb]


def _damaged_cases():
    for case in CASES["damaged"]:
        for verb in ("info", "check", "resume"):
            yield pytest.param(case, verb, id=f"{case['name']}-{verb}")


@pytest.mark.parametrize("case, verb", list(_damaged_cases()))
def test_damaged_file_exits_2_naming_the_item_and_stays_as_it_was(case, verb, good_file,
                                                                  tmp_path, capsys):
    config, good = good_file
    path = tmp_path / "damaged.h5"
    shutil.copyfile(good, path)
    damage(path, case["mutate"])
    before = path.read_bytes()
    code, err = run_cli(verb_args(verb, config, path), capsys)
    assert_usage_message(code, err, case["expect"])
    assert str(path) in err                         # the message names the file
    assert path.read_bytes() == before, "a damaged file was changed"
    assert sorted(os.listdir(tmp_path)) == ["damaged.h5"]


def test_the_undamaged_file_passes_every_verb(good_file, capsys):
    """The wrong-input side of the corpus: the same file before damage is accepted."""
    config, good = good_file
    assert run_cli(["info", good], capsys)[0] == 0
    assert run_cli(["check", good], capsys)[0] in (0, 1)
    code, err = run_cli(["run", config, "-o", good, "--resume", "--quiet"], capsys)
    assert code == 0, err
    with h5py.File(good, "r") as f:
        assert f.attrs["state"] == "complete" and int(f.attrs["n_frames"]) == 101
        assert np.all(np.isfinite(f["positions"][:]))


def test_the_installed_command_exits_2_without_a_traceback(tmp_path):
    """One corpus case through a real ``langsim`` process (exit status and stderr as a shell sees them)."""
    case = CASES["configs"][0]
    config = tmp_path / case["file"]
    shutil.copyfile(CORPUS / case["file"], config)
    proc = subprocess.run([sys.executable, "-m", "langsim.cli", "run", str(config), "-o",
                           str(tmp_path / "out.h5"), "--quiet"], capture_output=True, text=True,
                          timeout=300)
    assert_usage_message(proc.returncode, proc.stderr, case["expect"])
    assert not (tmp_path / "out.h5").exists()


# --------------------------------------------------------- through the Python API

SMALL = {"seed": 1, "particles": {"friction": 1e-8, "count": 2, "dimensions": 1, "initial": [0.0]},
         "dynamics": {"dt": 1e-5, "steps": 20}}


def test_a_function_term_numba_cannot_compile_is_refused_before_a_file_exists(tmp_path):
    def energy(x, t, force):
        return {}.get(1)                    # numba cannot type an empty dict
    out = tmp_path / "out.h5"
    with pytest.raises(ConfigError, match=r"potential\[0\]\.function.*numba"):
        with time_limit():
            langsim.run({**SMALL, "potential": [{"type": "function", "function": energy}]},
                        out=out, progress=False)
    assert os.listdir(tmp_path) == []


def test_a_pole_at_the_start_point_ends_with_the_blow_up_status():
    """1/x at x = 0: the run ends with status blow-up naming particle and step (README
    "Guard rails"), not an exception; the wrong-input side is a start away from the pole."""
    cfg = {**SMALL, "potential": [{"type": "expression", "energy": "1e-30/x"}]}
    with warnings.catch_warnings(), time_limit(300):
        warnings.simplefilter("ignore")
        traj = langsim.run(cfg, progress=False)
        assert traj.status.reason == "blow-up" and traj.status.step == 1
        assert traj.status.particle in (0, 1)
        away = langsim.run({**cfg, "particles": {**cfg["particles"], "initial": [1e-3]}},
                           progress=False)
    assert away.status.reason == "complete" and np.all(np.isfinite(away.positions))


def test_a_huge_every_does_not_make_one_kernel_call_cover_a_frame():
    """every = 10^7 steps per frame: kernel calls stay within CHUNK_PARTICLE_STEPS, so
    checkpoints and Ctrl-C come between calls inside one frame."""
    from langsim.engine import CHUNK_PARTICLE_STEPS
    count, every = 4, 10**7
    calls = []
    cfg = {**SMALL, "particles": {**SMALL["particles"], "count": count},
           "potential": [{"type": "harmonic", "stiffness": 1e-7}],
           "dynamics": {"dt": 1e-5, "steps": every}, "output": {"every": every}}
    with time_limit(300):
        traj = langsim.run(cfg, progress=lambda step, n: calls.append(step))
    assert traj.n_frames == 2 and calls[-1] == every
    chunks = np.diff([0] + calls)
    assert chunks.max() <= CHUNK_PARTICLE_STEPS // count
    assert len(calls) >= every * count // CHUNK_PARTICLE_STEPS


def test_check_reads_a_file_in_bounded_slices(tmp_path, monkeypatch):
    """langsim check never reads the whole positions dataset at once: with slices of
    32 KiB (streamed estimators) and 4096 values per periodogram pass, no read exceeds a
    quarter of the dataset, and none goes through numpy.asarray of the whole view."""
    from langsim import checks, trajectory
    from langsim.analysis import spectra, stats
    n_particles, steps = 8, 20000
    cfg = {"seed": 5, "particles": {"friction": 1e-8, "count": n_particles, "dimensions": 1},
           "potential": [{"type": "harmonic", "stiffness": 1e-6}],
           "dynamics": {"dt": 1e-3, "steps": steps, "scheme": "exact"}}
    path = tmp_path / "long.h5"
    with time_limit(300):
        langsim.run(cfg, out=path, progress=False).close()
    reads = []
    original = trajectory.FrameView.__getitem__

    def recording(self, key):
        out = original(self, key)
        reads.append(np.asarray(out).nbytes)
        return out
    monkeypatch.setattr(trajectory.FrameView, "__getitem__", recording)
    monkeypatch.setattr(trajectory.FrameView, "__array__", None)   # whole-array reads fail
    monkeypatch.setattr(stats, "CHUNK_BYTES", 32 * 2**10)
    monkeypatch.setattr(spectra, "PERIODOGRAM_VALUES", 4096)
    with langsim.load(path) as traj, time_limit(300):
        report = checks.check(traj)
    whole = (steps + 1) * n_particles * 8
    assert any(r.key.startswith("variance") for r in report.rows)
    assert reads and max(reads) <= whole // 4, (max(reads), whole)
