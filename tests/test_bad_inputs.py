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
from contextlib import contextmanager
from pathlib import Path

import h5py
import numpy as np
import pytest

from langsim import cli

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
    args = {"info": ["info", path], "check": ["check", path],
            "resume": ["run", config, "-o", path, "--resume", "--quiet"]}[verb]
    code, err = run_cli(args, capsys)
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
