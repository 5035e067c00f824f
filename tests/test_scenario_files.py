"""The shipped scenarios: listed and written out by ``langsim scenarios``; the sweep files in
configs/sweeps/ read as plans whose every run validates, and one point of each runs and
passes its own checks (the checks name their sources)."""
import contextlib
import io
import os
import pathlib

import pytest

import langsim
from langsim import cli, config, scenarios
from langsim.sweeps import read_sweep_file
from langsim.validation import ConfigError

ROOT = pathlib.Path(__file__).parent.parent / "configs"
SWEEPS = sorted((ROOT / "sweeps").glob("*.toml"))


def run_cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = cli.main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


def test_listing_names_every_file():
    code, out, _ = run_cli("scenarios")
    assert code == 0
    listed = {line.split()[0] for line in out.splitlines() if line.strip()}
    on_disk = {p.stem for p in ROOT.glob("*.toml")} | {f"sweeps/{p.stem}" for p in SWEEPS}
    assert listed == on_disk and len(SWEEPS) >= 2
    # each is listed with the command that runs it: an [escape] table is a rate, not a run
    commands = {line.split()[0]: line.split()[1] for line in out.splitlines() if line.strip()}
    assert commands["trap-hold-time"] == "rate" and commands["silica-trap"] == "run"
    assert commands["sweeps/time-step"] == "sweep"


def test_writing_one_out_and_never_over_a_file(tmp_path):
    code, _, err = run_cli("scenarios", "stiffness-temperature", "-o", tmp_path)
    target = tmp_path / "stiffness-temperature.toml"
    assert code == 0 and target.read_bytes() == (ROOT / "sweeps" / target.name).read_bytes()
    target.write_text("# mine\n")
    code, _, err = run_cli("scenarios", "sweeps/stiffness-temperature", "-o", target)
    assert code == 2 and "exists already" in err and target.read_text() == "# mine\n"
    code, _, err = run_cli("scenarios", "silca-trap")
    assert code == 2 and "did you mean 'silica-trap'" in err
    assert scenarios.write("silica-trap", target, overwrite=True) == str(target)
    assert config.load(str(target)).seed == config.load(str(ROOT / "silica-trap.toml")).seed


@pytest.mark.parametrize("path", SWEEPS, ids=lambda p: p.stem)
def test_sweep_scenario_plans_and_its_first_point_passes(path, tmp_path):
    plan = read_sweep_file(path)
    assert plan.n_runs >= 4
    configs = [cfg for *_, cfg in plan.configs()]
    for cfg in configs:
        config.load(cfg)                              # every point validates (no refused run)
    traj = langsim.run(configs[0], progress=False)
    report = langsim.check(traj)
    assert [r for r in report.rows if r.status in ("pass", "fail")], report.format_table()
    assert report.passed, report.format_table()


def test_a_wrong_sweep_scenario_would_be_told(tmp_path):
    """The failing counterpart: the same file with a misspelled axis is refused."""
    text = (ROOT / "sweeps" / "stiffness-temperature.toml").read_text()
    bad = tmp_path / "bad.toml"
    bad.write_text(text.replace("medium.temperature =", "medium.temprature ="))
    with pytest.raises(ConfigError):
        plan = read_sweep_file(bad)
        for *_, cfg in plan.configs():
            config.load(cfg)
