"""Parameter sweeps: tables, seeds, bit-identical files whichever executor runs them,
failures recorded, resume after kill -9, and the calibration verdict.

Reference for the seeds: numpy's own SeedSequence.spawn (outside the project).
Reference for the verdict: the standard normal (scipy.stats.norm) and the exact
binomial interval of scipy.stats.binomtest (Clopper & Pearson 1934).
"""
import json
import math
import os
import signal
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pandas as pd
import pytest
from scipy import stats

import langsim
from langsim.sweeps import make_plan, read_sweep_file
from langsim.sweeps.report import EXPECTED, calibration, clopper_pearson
from langsim.validation import ConfigError

#: 1D trap, 4 beads, 2^14 steps: variance, mean, corner frequency and D rows at k >= 2e-6 N/m
#: (relaxation time gamma/k <= 4.7 ms = 47 steps).
BASE = {"seed": 20261202, "particles": {"count": 4, "radius": 0.5e-6},
        "potential": [{"type": "harmonic", "stiffness": 2e-6}],
        "dynamics": {"dt": 1e-4, "steps": 2**14}}
AXES = {"potential.0.stiffness": [2e-6, 4e-6]}
RUN_COLUMNS = ["potential.0.stiffness", "replicate", "seed", "status", "message", "file", "wall_time"]
CHECK_COLUMNS = ["run", "potential.0.stiffness", "replicate", "key", "quantity", "measured", "error",
                 "predicted", "z", "status", "unit"]


def datasets(path):
    """Every dataset of a trajectory file as bytes, and its config attribute."""
    out = {}
    with h5py.File(path, "r") as f:
        f.visititems(lambda name, obj: out.__setitem__(name, obj[()].tobytes())
                     if isinstance(obj, h5py.Dataset) else None)
        return out, json.loads(f.attrs["config"])


def comparable(runs):
    """A runs table without what differs between sessions (wall time; the folder in file)."""
    t = runs.drop(columns="wall_time").copy()
    t["file"] = [None if f is None else os.path.basename(f) for f in t["file"]]
    return t


def max_z(values):
    return float(np.max(np.abs(values)))


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "grid"
    result = langsim.sweep(BASE, AXES, replicates=3, out=out, workers=1, progress=False,
                           analyze=lambda t: {"x_var": float(np.var(np.asarray(t.positions)))})
    return result, out


def test_tables_shape_columns_and_seeds(grid):
    result, out = grid
    runs, checks = result.runs, result.checks
    assert list(runs.columns) == RUN_COLUMNS + ["x_var"]
    assert runs.index.name == "run" and list(runs.index) == list(range(6))
    assert list(runs["potential.0.stiffness"]) == [2e-6] * 3 + [4e-6] * 3
    assert list(runs["replicate"]) == [0, 1, 2] * 2
    assert (runs["status"] == "complete").all(), runs["message"]
    assert list(checks.columns) == CHECK_COLUMNS
    assert set(checks["run"]) == set(range(6))
    assert {"variance.x", "mean.x", "corner_frequency.x", "diffusion_coefficient_psd.x"} <= set(checks["key"])
    # seeds: child i of numpy's SeedSequence(base seed).spawn(n), its first word reduced to 63 bits
    children = np.random.SeedSequence(BASE["seed"]).spawn(6)
    want = [int(c.generate_state(1, dtype=np.uint64)[0]) & (2**63 - 1) for c in children]
    assert list(runs["seed"]) == want and len(set(want)) == 6
    # the out folder: files, tables and record
    names = sorted(os.listdir(out))
    assert names == ["checks.csv", "results.jsonl"] + [f"run-{i:04d}.h5" for i in range(6)] + [
        "runs.csv", "sweep.json"]
    record = json.load(open(out / "sweep.json"))
    assert record["definition"]["axes"] == AXES and record["run_seeds"] == want
    assert record["versions"]["langsim"] == langsim.__version__
    csv = pd.read_csv(out / "runs.csv", index_col="run")
    assert list(csv["seed"]) == want and list(csv["status"]) == ["complete"] * 6
    assert len(pd.read_csv(out / "checks.csv")) == len(checks)


def test_every_run_file_equals_a_standalone_run(grid, tmp_path):
    result, out = grid
    for i in (0, 4):
        config = result.config(i)
        assert config["seed"] == result.runs["seed"][i]
        alone = tmp_path / f"alone-{i}.h5"
        langsim.run(config, alone, progress=False).close()
        assert datasets(result.runs["file"][i]) == datasets(alone)
        memory = langsim.run(config, progress=False)
        with langsim.load(result.runs["file"][i]) as traj:
            assert np.asarray(traj.positions).tobytes() == memory.positions.tobytes()
    # a wrong seed gives other bits (the comparison can fail)
    other = {**result.config(0), "seed": int(result.runs["seed"][1])}
    assert langsim.run(other, progress=False).positions.tobytes() != memory.positions.tobytes()


def test_sweep_checks_pass_on_honest_runs(grid):
    checks = grid[0].checks
    judged = checks[checks["status"].isin(["pass", "fail"])]
    assert (judged["status"] == "pass").all() and max_z(judged["z"]) < 4.5


def test_executors_give_identical_tables_and_files(grid, tmp_path):
    """Two local worker processes and a Dask LocalCluster of two workers: the same tables and
    the same bits as the in-process sweep of the fixture."""
    import distributed        # a dependency (and in the test extra): never skipped
    reference, ref_out = grid
    analyze = lambda t: {"x_var": float(np.var(np.asarray(t.positions)))}   # noqa: E731
    local = langsim.sweep(BASE, AXES, replicates=3, out=tmp_path / "local", workers=2,
                          progress=False, analyze=analyze)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        dask = langsim.sweep(BASE, AXES, replicates=3, out=tmp_path / "dask", executor=client,
                             progress=False, analyze=analyze)
    for result in (local, dask):
        pd.testing.assert_frame_equal(comparable(result.runs), comparable(reference.runs))
        pd.testing.assert_frame_equal(result.checks, reference.checks)
        for i in range(6):
            assert datasets(result.runs["file"][i]) == datasets(reference.runs["file"][i])


def test_failures_are_recorded_and_the_others_complete():
    """An unstable step at one point (refused by validation), and analyze raising at another."""
    def analyze(traj):
        if traj.config["potential"][0]["stiffness"][0] > 3e-6:
            raise ValueError("this point's analysis breaks")
        return {"n": traj.n_frames}
    result = langsim.sweep(BASE, {"potential.0.stiffness": [2e-6, 4e-6], "dynamics.dt": [1e-4, 1e-2]},
                           workers=1, progress=False, analyze=analyze)
    runs = result.runs.set_index(["potential.0.stiffness", "dynamics.dt"])
    ok = runs.loc[(2e-6, 1e-4)]
    assert ok["status"] == "complete" and ok["n"] == 2**14 + 1 and ok["file"] is None
    for k in (2e-6, 4e-6):
        bad = runs.loc[(k, 1e-2)]
        assert bad["status"] == "failed" and "[dynamics] dt = 0.01: unstable" in bad["message"]
        assert np.isnan(bad["wall_time"]) or bad["wall_time"] == 0.0
    broken = runs.loc[(4e-6, 1e-4)]
    assert broken["status"] == "failed" and "analyze raised ValueError: this point's analysis breaks" \
        in broken["message"] and np.isnan(broken["n"])
    # a failed analyze still leaves the run's checks in the table; refused runs have none
    assert set(result.checks["run"]) == {0, 2}


def test_every_run_refused_is_a_bad_sweep(tmp_path):
    with pytest.raises(ConfigError, match="every run of the sweep is refused"):
        langsim.sweep(BASE, {"dynamics.dt": [1e-2, 2e-2]}, out=tmp_path / "never", progress=False)
    assert not (tmp_path / "never").exists()


def test_definition_problems_named_together():
    with pytest.raises(ConfigError) as err:
        make_plan(BASE, {"potential.0.stiffnes": [1e-6], "potential.3.stiffness": [1e-6],
                         "seed": [1, 2], "medium.temperature": {"start": 280, "stop": 300, "cont": 3}},
                  combine="zipped", replicates=0)
    text = str(err.value)
    for needle in ("combine = 'zipped'", "(did you mean 'zip'?)", "replicates = 0", "axes.seed: cannot be swept",
                   "potential is an array of 1 tables; expected an index 0 to 0 after it, got 3",
                   "axes.medium.temperature.cont: unknown key (did you mean 'count'?)",
                   "axes.medium.temperature.count is missing"):
        assert needle in text, (needle, text)
    with pytest.raises(ConfigError, match="equal length, got potential.0.stiffness: 2, medium.temperature: 3"):
        make_plan(BASE, {"potential.0.stiffness": [1e-6, 2e-6], "medium.temperature": [280, 290, 300]},
                  combine="zip")


def test_axes_from_numpy_ranges_and_per_axis_values():
    plan = make_plan({**BASE, "particles": {**BASE["particles"], "dimensions": 2}},
                     {"potential.0.stiffness": np.array([[1e-6, 2e-6], [3e-6, 4e-6]]),
                      "medium.temperature": {"start": 280, "stop": 320, "count": 3},
                      "dynamics.dt": {"start": 1e-5, "stop": 1e-4, "count": 3, "spacing": "log"},
                      "output.every": [np.int64(1), np.int64(2)]})
    assert plan.axes["potential.0.stiffness"] == [[1e-6, 2e-6], [3e-6, 4e-6]]
    assert plan.axes["medium.temperature"] == np.linspace(280, 320, 3).tolist()
    assert plan.axes["dynamics.dt"] == np.geomspace(1e-5, 1e-4, 3).tolist()
    assert all(type(v) is int for v in plan.axes["output.every"])
    assert plan.n_runs == 2 * 3 * 3 * 2
    i, values, replicate, seed, config = next(plan.configs())
    assert config["potential"][0]["stiffness"] == [1e-6, 2e-6] and config["seed"] == seed
    json.dumps(config)                        # tasks carry plain data


SWEEP_FILE = """\
base = "trap.toml"
replicates = 2
[axes]
potential.0.stiffness = [2e-6, 4e-6, 8e-6]
"""
TRAP = """\
seed = 99
[particles]
radius = 0.5e-6
count = 2
[[potential]]
type = "harmonic"
stiffness = 2e-6
[dynamics]
dt = 1e-5
steps = 3000000
[output]
every = 100
checkpoint_every = 0.05
"""


def cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "langsim.cli", *map(str, args)], capture_output=True,
                          text=True, timeout=300, **kw)


def test_sweep_file_problems_exit_2_before_anything_runs(tmp_path):
    (tmp_path / "bad.toml").write_text(textwrap.dedent("""\
        base = "missing.toml"
        replicate = 3
        combine = "grid"
        [axes]
        medium.temperature = {start = 280, stop = "hot", count = 2}
        """))
    proc = cli("sweep", tmp_path / "bad.toml", "--quiet")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    for needle in ("replicate: unknown key (did you mean 'replicates'?)", "missing.toml: no such config file",
                   "axes.medium.temperature.stop = 'hot': expected a finite number"):
        assert needle in proc.stderr, (needle, proc.stderr)
    assert not (tmp_path / "bad").exists()


def test_kill_9_then_resume_equals_an_uninterrupted_sweep(tmp_path):
    (tmp_path / "trap.toml").write_text(TRAP)
    sweep_file = tmp_path / "stiff.toml"
    sweep_file.write_text(SWEEP_FILE)
    out = tmp_path / "stiff"
    proc = subprocess.Popen([sys.executable, "-m", "langsim.cli", "sweep", str(sweep_file), "--workers", "2",
                             "--quiet"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    log = out / "results.jsonl"
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and not (log.exists() and log.read_text().count("\n") >= 1):
        time.sleep(0.01)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    finished = log.read_text().count("\n")
    assert 1 <= finished < 6, "the sweep was not killed mid-way"
    time.sleep(1.0)                               # workers end with their parent
    from langsim.trajectory import read_state
    partial = [n for n in os.listdir(out) if n.endswith(".h5") and read_state(out / n)["state"] != "complete"]
    resumed = cli("sweep", sweep_file, "--workers", "2", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    assert "resuming the sweep" in resumed.stderr
    whole = langsim.sweeps.run_plan(read_sweep_file(sweep_file), out=tmp_path / "whole", workers=1,
                                    progress=False)
    runs = pd.read_csv(out / "runs.csv", index_col="run")
    pd.testing.assert_frame_equal(comparable(runs), comparable(pd.read_csv(tmp_path / "whole" / "runs.csv",
                                                                           index_col="run")))
    pd.testing.assert_frame_equal(pd.read_csv(out / "checks.csv"), whole.checks)
    for i in range(6):
        assert datasets(out / f"run-{i:04d}.h5") == datasets(whole.runs["file"][i])
    print(f"killed after {finished} runs; {len(partial)} run file(s) left unfinished and resumed")


def test_calibration_verdict_on_standard_normal_scores():
    """Scores drawn from the standard normal pass; the same scores with error bars claimed twice
    too small (z x 2) or too large (z / 2) fail. Interval: scipy's exact binomial interval."""
    z = np.random.Generator(np.random.Philox(4)).standard_normal(400)
    table = lambda z: pd.DataFrame({"z": z, "status": "pass"})   # noqa: E731
    honest = calibration(table(z))
    assert honest.passed, honest.verdict
    assert "error bars honest" in honest.verdict and "of 400 check rows" in honest.verdict
    k = honest.within[1]
    ci = stats.binomtest(k, 400).proportion_ci(confidence_level=0.99, method="exact")
    assert honest.intervals[1] == pytest.approx((ci.low, ci.high), rel=1e-9)
    assert EXPECTED[1] == pytest.approx(stats.norm.cdf(1) - stats.norm.cdf(-1), rel=1e-12)
    small, large = calibration(table(2 * z)), calibration(table(z / 2))
    assert small.passed is False and "too small" in small.verdict
    assert large.passed is False and "too large" in large.verdict
    assert clopper_pearson(0, 10)[0] == 0.0 and clopper_pearson(10, 10)[1] == 1.0
    assert calibration(pd.DataFrame({"z": [1.0], "status": ["info"]})).passed is None


def test_calibration_verdict_on_a_sweep(grid):
    """The sweep of honest runs passes; the same check rows with errors scaled by 1/2 or 2 fail."""
    result, _ = grid
    cal = result.calibration()
    assert cal.passed, cal.verdict
    for factor, word in ((0.5, "too small"), (2.0, "too large")):
        scaled = result.checks.copy()
        scaled["error"] *= factor
        scaled["z"] = (scaled["measured"] - scaled["predicted"]) / scaled["error"]
        bad = calibration(scaled)
        assert bad.passed is False and word in bad.verdict, (factor, bad.verdict)


def test_cost_table_says_where_each_runs_time_went(grid):
    result, _ = grid
    costs = result.costs
    assert list(costs.columns[:3]) == ["potential.0.stiffness", "replicate", "status"]
    assert len(costs) == 6 and (costs["steps"] >= 2**14).all()
    parts = costs[["setup", "compile", "stepping", "checks", "analyze"]].to_numpy(float)
    assert (parts >= 0).all()
    # the parts are measured inside the task: together at most its wall time
    assert (parts.sum(axis=1) <= costs["wall_time"].to_numpy(float) * (1 + 1e-9)).all()
    text = result.cost_summary()
    lines = text.splitlines()
    assert "stiffness=2e-06" in text and "stiffness=4e-06" in text
    assert lines[-1].startswith("this call: 6 runs") and lines[-2].startswith("all runs")


def test_fitted_ratio_error_bar_covers_68_percent():
    """The legend's measured/theory ratio: inverse-variance weighted mean and its standard
    error 1/sqrt(sum w) (Bevington & Robinson, Data Reduction and Error Analysis, 3rd ed.,
    eq. 4.17-4.19, from memory). Coverage over 2000 experiments of 5 points with Gaussian
    errors must be P(|Z| < 1) = 0.6827 within 4.5 binomial standard errors; error bars
    claimed half as large fail the same bound."""
    from langsim.sweeps.report import fitted_ratio
    rng = np.random.default_rng(9)
    n = 2000
    predicted = np.array([1.0, 2.0, 5.0, 10.0, 20.0])
    sigma = np.array([0.05, 0.1, 0.2, 0.3, 1.0])
    r, w = [], []
    for _ in range(n):
        measured = predicted + sigma * rng.standard_normal(5)
        ratio, err = fitted_ratio(measured, sigma, predicted)
        r.append(ratio)
        w.append(err)
    r, w = np.array(r), np.array(w)
    p = math.erf(1 / math.sqrt(2))
    bound = 4.5 * math.sqrt(p * (1 - p) / n)
    assert abs(np.mean(np.abs(r - 1) < w) - p) < bound
    assert abs(np.mean(np.abs(r - 1) < 0.5 * w) - p) > bound
    assert all(math.isnan(v) for v in fitted_ratio([1.0], [0.0], [1.0]))     # no usable row


def test_figures_of_a_sweep(grid, tmp_path):
    result, _ = grid
    paths = result.plot(tmp_path / "figs")
    names = {os.path.basename(p) for p in paths}
    assert "z_scores.png" in names and "variance.x.png" in names
    with pytest.raises(ConfigError, match="already holds figures"):
        result.plot(tmp_path / "figs")
