"""What scripts and people read from a check report: stable row keys, a table
that fits a terminal (units column, formula and source as numbered notes), JSON
in SI units, and a command line that ends quietly when its reader goes away.
"""
import json
import re
import subprocess
import sys

import numpy as np
import pytest

import langsim
from langsim.checks import DISPLAY_UNITS, Row, row_key

#: A 2D overdamped trap long enough for variance, mean and PSD rows on both axes
#: (relaxation time gamma/kappa = 9.4 ms = 94 steps; 2^17 frames).
TRAP = {"seed": 11, "particles": {"count": 8, "dimensions": 2, "radius": 0.5e-6},
        "potential": [{"type": "harmonic", "stiffness": [1e-6, 2e-6]}],
        "dynamics": {"dt": 1e-4, "steps": 2**17}}


@pytest.fixture(scope="module")
def report():
    return langsim.check(langsim.run(TRAP, progress=False))


def test_rows_carry_stable_keys(report):
    keys = [r.key for r in report.rows]
    assert len(set(keys)) == len(keys), keys
    for key in keys:
        assert re.fullmatch(r"[a-z0-9_]+(\.[a-z]+)?", key), key
    for axis in "xy":
        for name in ("variance", "mean", "corner_frequency", "diffusion_coefficient_psd", "stiffness_psd"):
            assert f"{name}.{axis}" in keys, (name, keys)
    assert json.loads(report.to_json())["rows"][0]["key"] == keys[0]


def test_key_derived_from_the_name_when_none_is_given():
    assert row_key("velocity variance y") == "velocity_variance.y"
    assert row_key("Boltzmann histogram z") == "boltzmann_histogram.z"
    assert Row("frame interval").key == "frame_interval"
    assert Row("variance x", key="own.key").key == "own.key"


def test_table_fits_a_terminal_with_units_and_numbered_notes(report):
    text = report.format_table()
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= 80, text
    head = lines[0].split()
    assert head[:6] == ["quantity", "measured", "±", "error", "predicted", "unit"], lines[0]
    row = next(line for line in lines if line.startswith("variance x"))
    assert " nm^2 " in row and row.rstrip().endswith("]"), row
    refs = {int(n) for n in re.findall(r"\[(\d+)\]$", "\n".join(
        line.rstrip() for line in lines if not line.startswith("[")), flags=re.M)}
    notes = [int(m) for m in re.findall(r"^\[(\d+)\] ", text, flags=re.M)]
    assert notes == list(range(1, len(notes) + 1)) and refs == set(notes), text
    # each formula with its source is given once, in the notes, not on every row that uses it
    assert len(notes) == len({(r.formula, r.source) for r in report.rows}) < len(report.rows)


def test_table_numbers_are_practical_units_of_the_si_values(report):
    """The variance row shows the SI value times the factor of its display unit (nm^2 = 1e-18 m^2)."""
    r = next(r for r in report.rows if r.key == "variance.x")
    unit, scale = DISPLAY_UNITS[r.unit]
    assert (r.unit, unit, scale) == ("m^2", "nm^2", 1e18)
    row = next(line for line in report.format_table().splitlines() if line.startswith("variance x"))
    shown = float(row.split()[2])
    assert shown == pytest.approx(r.measured * scale, rel=1e-3)
    assert float(row.split()[5]) == pytest.approx(r.predicted * scale, rel=1e-5)


def test_check_json_into_a_closed_pipe_ends_quietly(tmp_path):
    out = tmp_path / "trap.h5"
    langsim.run({**TRAP, "dynamics": {"dt": 1e-4, "steps": 4000}}, out, progress=False)
    proc = subprocess.Popen([sys.executable, "-m", "langsim.cli", "check", str(out), "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()            # the reader is gone before the command writes (as with | head)
    err = proc.stderr.read().decode()
    proc.wait(timeout=120)
    assert "Traceback" not in err and "BrokenPipe" not in err, err
    assert proc.returncode in (0, 1), (proc.returncode, err)
