"""Property tests of the sweep-file loader: whatever a sweep file holds, reading it
gives a plan or a ConfigError naming what is wrong, never another exception; a bad
grid is exit 2 from ``langsim sweep`` with the message on stderr and nothing written.
(Property-based testing of input validation: common practice.)
"""
import contextlib
import io
import json
import math
import os

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from langsim import cli, config
from langsim.sweeps import read_sweep_file
from langsim.validation import ConfigError

SETTINGS = dict(max_examples=60, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

BASE = {"seed": 5, "particles": {"count": 1, "dimensions": 1, "radius": 5e-7},
        "potential": [{"type": "harmonic", "stiffness": 1e-6}],
        "dynamics": {"dt": 1e-4, "steps": 20}}
PATHS = ["potential.0.stiffness", "medium.temperature", "dynamics.dt", "output.every",
         "particles.radius", "potential.0.center", "potential.3.stiffness", "potential.x",
         "seed", "output.path", "medium", "medium.temperature.kelvin", "", "..", "dynamics.",
         "particles.count"]
WORDS = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_.0123456789", min_size=0, max_size=12)
NUMBERS = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=64),
                    st.integers(-10, 10**6), st.sampled_from([1e-6, 2e-6, 300.0, 1e-4, 0.0, -1.0]))
SCALARS = st.one_of(NUMBERS, WORDS, st.booleans())
VALUES = st.recursive(SCALARS, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(WORDS, inner, max_size=3)), max_leaves=8)
RANGES = st.fixed_dictionaries(
    {}, optional={"start": SCALARS, "stop": SCALARS, "count": st.one_of(st.integers(-2, 4), SCALARS),
                  "spacing": st.one_of(st.sampled_from(["linear", "log", "geometric"]), SCALARS),
                  "step": NUMBERS})
AXIS = st.one_of(st.lists(NUMBERS, max_size=4), st.lists(st.lists(NUMBERS, max_size=3), max_size=3),
                 RANGES, SCALARS, VALUES)
GOOD_VALUES = {"potential.0.stiffness": st.sampled_from([1e-6, 2e-6, 5e-7]),
               "medium.temperature": st.sampled_from([280.0, 300.0, 320]),
               "dynamics.dt": st.sampled_from([1e-5, 1e-4, 30.0]),       # 30 s: refused (unstable)
               "output.every": st.sampled_from([1, 2, 5])}
NEAR_GOOD = st.fixed_dictionaries(
    {"base": st.just(BASE),
     "axes": st.dictionaries(st.sampled_from(sorted(GOOD_VALUES)), st.just(None), min_size=1,
                             max_size=3)},
    optional={"replicates": st.integers(1, 3), "combine": st.sampled_from(["grid", "zip"])})


@st.composite
def near_good(draw):
    """A sweep around a valid one: real paths with good values (sometimes a range)."""
    sweep = draw(NEAR_GOOD)
    for path in sweep["axes"]:
        if draw(st.booleans()):
            sweep["axes"][path] = draw(st.lists(GOOD_VALUES[path], min_size=1, max_size=3))
        else:
            lo = draw(GOOD_VALUES[path])
            sweep["axes"][path] = {"start": lo, "stop": lo * 2, "count": draw(st.integers(1, 3)),
                                   "spacing": draw(st.sampled_from(["linear", "log"]))}
    return sweep


JUNK = st.fixed_dictionaries(
    {"axes": st.one_of(st.dictionaries(st.sampled_from(PATHS), AXIS, max_size=3), VALUES)},
    optional={"base": st.one_of(st.just(BASE), st.just("missing.toml"), VALUES),
              "replicates": st.one_of(st.integers(-2, 3), SCALARS),
              "combine": st.one_of(st.sampled_from(["grid", "zip", "product"]), SCALARS),
              "repeat": SCALARS})
SWEEPS = st.one_of(near_good(), JUNK)


def toml(value):
    """A value as TOML text (inline tables and arrays; enough for these files)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml(v) for v in value) + "]"
    return "{" + ", ".join(f"{json.dumps(k)} = {toml(v)}" for k, v in value.items()) + "}"


def write(folder, sweep):
    lines = [f"{json.dumps(k)} = {toml(v)}" for k, v in sweep.items()]
    path = os.path.join(folder, "sweep.toml")
    with open(path, "w") as fh:
        fh.write("\n".join(lines) + "\n")
    return path


@settings(**SETTINGS)
@given(sweep=SWEEPS)
def test_any_sweep_file_gives_a_plan_or_a_config_error(sweep, tmp_path):
    path = write(tmp_path, sweep)
    try:
        plan = read_sweep_file(path)
    except ConfigError as exc:
        assert exc.messages and all(isinstance(m, str) and m for m in exc.messages)
        return
    # accepted: then it is a well-formed plan, and every run's config validates or is refused
    # with a ConfigError (a failed run of the sweep), nothing else
    assert isinstance(sweep.get("base"), dict) and plan.n_runs >= 1
    sizes = [len(v) for v in plan.axes.values()]
    assert plan.n_runs == (math.prod(sizes) if plan.combine == "grid" else sizes[0]) * plan.replicates
    for _, _, _, _, cfg in plan.configs():
        try:
            config.load(cfg)
        except ConfigError:
            pass


BAD_AXES = st.one_of(
    st.just([]),                                                          # no value
    st.just({"start": 1.0, "stop": 2.0}),                                 # count missing
    st.builds(lambda c: {"start": 1.0, "stop": 2.0, "count": c}, st.integers(-3, 0)),
    st.builds(lambda a: {"start": a, "stop": 1.0, "count": 3, "spacing": "log"},
              st.floats(-1e3, 0.0)),                                      # log through zero
    st.builds(lambda s: {"start": s, "stop": 1.0, "count": 2}, st.sampled_from(["hot", True, [1]])),
    st.just("1e-6, 2e-6"))                                                # a string, not an array


@settings(**{**SETTINGS, "max_examples": 25})
@given(bad=BAD_AXES, path=st.sampled_from(PATHS[:4]))
def test_a_bad_grid_is_exit_2_naming_the_axis_and_nothing_runs(bad, path, tmp_path):
    sweep = {"base": BASE, "axes": {path: bad}}
    file = write(tmp_path, sweep)
    out = tmp_path / "out"
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        code = cli.main(["sweep", file, "-o", str(out), "--quiet"])
    assert code == 2, err.getvalue()
    assert f"axes.{path}" in err.getvalue() and "expected" in err.getvalue(), err.getvalue()
    assert "Traceback" not in err.getvalue()
    assert not out.exists()


def test_the_loader_accepts_a_good_grid():
    """The failing-input counterpart: a good file with the same shape is a plan of 2 x 3 runs."""
    import tempfile
    with tempfile.TemporaryDirectory() as folder:
        plan = read_sweep_file(write(folder, {"base": BASE, "replicates": 3, "axes": {
            "potential.0.stiffness": {"start": 1e-6, "stop": 2e-6, "count": 2, "spacing": "log"}}}))
    assert plan.n_runs == 6 and plan.axes["potential.0.stiffness"] == pytest.approx([1e-6, 2e-6])
