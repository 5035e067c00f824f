"""Every shipped scenario in configs/ runs as written and passes its own checks.

The checks compare against exact predictions for each run (check.py names the
sources); this test makes sure the examples a new user copies are consistent.
"""
import pathlib
import tomllib

import pytest

import langsim

CONFIGS = sorted((pathlib.Path(__file__).parent.parent / "configs").glob("*.toml"))


def test_there_are_scenarios():
    names = {p.stem for p in CONFIGS}
    assert {"silica-trap", "two-beam-double-well", "cantilever", "tracking-bead"} <= names


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.stem)
def test_scenario_runs_and_passes_its_checks(path, tmp_path):
    with open(path, "rb") as fh:
        cfg = tomllib.load(fh)
    traj = langsim.run(cfg, tmp_path / f"{path.stem}.h5", progress=False)
    assert traj.status.complete
    report = langsim.check(traj)
    judged = [r for r in report.rows if r.status in ("pass", "fail")]
    assert judged, report.format_table()
    assert report.passed, report.format_table()
    traj.close()
