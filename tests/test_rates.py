"""Escape rates (langsim.escape_rate): direct counting and adaptive multilevel splitting against
the exact mean first-passage times (reference notes section 12.3; Hanggi, Talkner & Borkovec 1990,
Rev. Mod. Phys. 62, 251), interval coverage, first passage between steps, reproducibility.

Every rate is compared on the log scale in units of its own reported error (the 95 % interval is
+- 1.96 of them); |z| <= Z_MAX, and each check also fails on a wrong input.
"""
import math

import numpy as np
import pytest
from scipy import stats

from langsim import escape_rate, theory
from langsim.units import k_B
from langsim.validation import ConfigError

from conftest import Z_MAX

T = 295.15
KT = k_B * T
W = 1e-6            # waist, m
GAMMA = 1e-8        # friction, kg/s


def double_well(barrier, dt, **escape):
    # U = B (x^2 - 1)^2 with minima at +-1 m, friction kT: D = 1 m^2/s (reduced units in SI)
    return {"seed": escape.pop("seed", 1), "particles": {"dimensions": 1, "friction": KT},
            "medium": {"temperature": T},
            "potential": [{"type": "double-well", "barrier_kT": barrier, "separation": 2.0}],
            "dynamics": {"dt": dt},
            "escape": {"coordinate": "x", "start": 0.0, "target": 1.0, **escape}}


def gaussian_well(depth, d=3, step=0.05, **escape):
    # U = -depth exp(-2 r^2/w^2); dt a fraction `step` of the well's relaxation time gamma/kappa
    kappa = 4 * depth * KT / W**2
    return {"seed": escape.pop("seed", 1), "particles": {"dimensions": d, "friction": GAMMA},
            "medium": {"temperature": T},
            "potential": [{"type": "gaussian-well", "depth_kT": depth, "waist": W}],
            "dynamics": {"dt": step * GAMMA / kappa},
            "escape": {"coordinate": "radius", "start": W, "target": 2 * W, **escape}}


def log_z(result, predicted_rate):
    """ln(measured/predicted) in units of the result's log-scale error."""
    sigma = (math.log(result.rate_high) - math.log(result.rate_low)) / (2 * 1.959963984540054)
    return math.log(result.rate / predicted_rate) / sigma


def exact_1d(barrier, start=0.0, target=1.0):
    U = theory.quartic_double_well(barrier * KT, 2.0)
    return 1.0 / theory.mfpt_equilibrium(U, start, target, KT, KT)


def exact_radial(depth, d=3):
    U = lambda r: -depth * KT * np.exp(-2 * np.asarray(r) ** 2 / W**2)  # noqa: E731
    return 1.0 / theory.mfpt_radial_equilibrium(U, W, 2 * W, KT, GAMMA, d)


def test_double_well_5kT_direct_and_splitting_agree_with_each_other_and_the_exact_mfpt():
    cfg = double_well(5.0, 2e-3, precision=0.15)
    k = exact_1d(5.0)
    direct = escape_rate(cfg, method="direct")
    split = escape_rate(cfg, method="ams")
    assert direct.method == "direct" and split.method == "ams"
    for r in (direct, split):
        assert abs(log_z(r, k)) <= Z_MAX, r.format_table()
        assert abs(log_z(r, exact_1d(6.0))) > Z_MAX          # the check sees a wrong barrier
        row = r.theory[0]
        assert row["exact"] and row["rate"] == pytest.approx(k, rel=1e-9) and abs(row["z"]) <= Z_MAX
        assert r.mfpt == pytest.approx(1 / r.rate) and r.mfpt_low < r.mfpt < r.mfpt_high
    s1 = (math.log(direct.rate_high) - math.log(direct.rate_low)) / 3.92
    s2 = (math.log(split.rate_high) - math.log(split.rate_low)) / 3.92
    assert abs(math.log(direct.rate / split.rate)) <= Z_MAX * math.hypot(s1, s2)
    assert split.audit["runs"] >= 10 and len(split.audit["interfaces"]) >= 1
    assert all(0 < i["probability"] <= 1 for i in split.audit["interfaces"])


@pytest.mark.parametrize("case", ["double-well 18 kT", "gaussian 3D 15 kT", "gaussian 3D 25 kT"])
def test_splitting_at_high_barriers_against_the_exact_mfpt(case):
    if case.startswith("double"):
        cfg, k, wrong = double_well(18.0, 5e-4, precision=0.25, method="ams"), exact_1d(18.0), exact_1d(19.0)
    else:
        depth = float(case.split()[2])
        # the 15 kT case leaves the choice to the pilot run ("auto"): splitting must win there
        cfg, k, wrong = gaussian_well(depth, precision=0.25, method="auto" if depth == 15 else "ams"), \
            exact_radial(depth), exact_radial(depth + 1.0)
    r = escape_rate(cfg)
    assert r.converged and r.method == "ams"
    assert abs(log_z(r, k)) <= Z_MAX, r.format_table()
    assert abs(log_z(r, wrong)) > Z_MAX, r.format_table()


def test_interval_coverage_over_40_seeds():
    # 95 % intervals at a cheap barrier (4 kT, small runs: 20 replicas, 16 walkers) must hold the exact
    # value in 95 % of the seeds within binomial error: misses ~ Binomial(40, 0.05); fail if P(>= misses) < 1e-3
    k = exact_1d(4.0)
    results = [escape_rate(double_well(4.0, 2e-3, precision=0.4, method="ams", walkers=16, replicas=20,
                                       seed=100 + s)) for s in range(40)]
    assert all(r.method == "ams" and r.audit["runs"] >= 10 for r in results)
    misses = sum(not (r.rate_low <= k <= r.rate_high) for r in results)
    assert stats.binom.sf(misses - 1, 40, 0.05) >= 1e-3, misses
    # the same test rejects intervals a third as wide (an error estimate that is too small)
    shrunk = sum(abs(math.log(r.rate / k)) > (math.log(r.rate_high) - math.log(r.rate_low)) / 6 for r in results)
    assert stats.binom.sf(shrunk - 1, 40, 0.05) < 1e-3, shrunk


def test_direct_interval_coverage_over_40_seeds():
    # the direct method's exact Poisson interval (events per time at risk; Garwood 1936 chi-square limits,
    # common practice) at 4 kT, 16 walkers, must hold the exact value in 95 % of 40 seeds within binomial
    # error (Binomial(40, 0.05): fail if P(>= misses) < 1e-3), and intervals a third as wide must fail
    k = exact_1d(4.0)
    results = [escape_rate(double_well(4.0, 2e-3, precision=0.4, method="direct", walkers=16, seed=300 + s))
               for s in range(40)]
    assert all(r.method == "direct" and r.converged for r in results)
    misses = sum(not (r.rate_low <= k <= r.rate_high) for r in results)
    assert stats.binom.sf(misses - 1, 40, 0.05) >= 1e-3, misses
    shrunk = sum(abs(math.log(r.rate / k)) > (math.log(r.rate_high) - math.log(r.rate_low)) / 6 for r in results)
    assert stats.binom.sf(shrunk - 1, 40, 0.05) < 1e-3, shrunk


def test_first_passage_between_steps_bridge_and_two_step_sizes():
    # target at the barrier top of a 5 kT double well, where paths cross and come back between steps:
    # with the Brownian-bridge test the rate is the same at dt = 4e-3 and 1e-3 (and exact); without it
    # the coarse step misses crossings and the rate is low
    k = exact_1d(5.0, start=-0.3, target=0.0)
    runs = {(dt, bridge): escape_rate(double_well(5.0, dt, start=-0.3, target=0.0, precision=0.05,
                                                  method="direct", bridge=bridge))
            for dt, bridge in ((4e-3, True), (1e-3, True), (4e-3, False))}
    coarse, fine, plain = runs[(4e-3, True)], runs[(1e-3, True)], runs[(4e-3, False)]
    assert coarse.bridge and not plain.bridge
    assert abs(log_z(coarse, k)) <= Z_MAX and abs(log_z(fine, k)) <= Z_MAX
    s = [(math.log(r.rate_high) - math.log(r.rate_low)) / 3.92 for r in (coarse, fine)]
    assert abs(math.log(coarse.rate / fine.rate)) <= Z_MAX * math.hypot(*s)
    assert log_z(plain, k) < -Z_MAX


def test_splitting_run_is_bit_reproducible_from_its_seed():
    cfg = double_well(4.0, 2e-3, precision=0.5, method="ams", walkers=16, replicas=20, seed=7)
    a, b = escape_rate(cfg), escape_rate(cfg)
    assert a.rate == b.rate and a.steps == b.steps and a.rate_low == b.rate_low
    np.testing.assert_array_equal(a.audit["run_probabilities"], b.audit["run_probabilities"])
    c = escape_rate(cfg, seed=8)
    assert c.rate != a.rate


def test_underdamped_direct_and_splitting_agree():
    # BAOAB at moderate friction (Gamma = 1/s, barrier 5 kT, m = kT in SI units so that kT/m = 1):
    # no exact time exists; the two methods must agree, Mel'nikov-Meshkov is shown for information
    cfg = double_well(5.0, 0.01, precision=0.15)
    cfg["dynamics"]["regime"] = "underdamped"
    cfg["particles"]["mass"] = KT
    direct, split = escape_rate(cfg, method="direct"), escape_rate(cfg, method="ams")
    s = [(math.log(r.rate_high) - math.log(r.rate_low)) / 3.92 for r in (direct, split)]
    assert abs(math.log(direct.rate / split.rate)) <= Z_MAX * math.hypot(*s)
    info = [r for r in split.theory if not r["exact"]]
    assert info and "Mel'nikov" in info[0]["name"] and abs(math.log(split.rate / info[0]["rate"])) < 0.3
    assert not any(r["exact"] for r in split.theory)
    assert abs(math.log(direct.rate / (2 * split.rate))) > Z_MAX * math.hypot(*s)   # would see a factor 2


def test_auto_chooses_by_cost_and_formula_coordinates_work():
    low = escape_rate(double_well(3.0, 2e-3, precision=0.3))
    assert low.method == "direct" and low.audit["auto"]["direct_cost"] <= low.audit["auto"]["splitting_cost"]
    # a formula coordinate (through the potentials' parser), tested at the steps only
    cfg = gaussian_well(8.0, precision=0.2, method="ams")
    cfg["escape"]["coordinate"] = "sqrt(x**2 + y**2 + z**2)"
    r = escape_rate(cfg)
    assert r.method == "ams" and not any(row["exact"] for row in r.theory)
    assert abs(log_z(r, exact_radial(8.0))) <= Z_MAX
    assert abs(log_z(r, exact_radial(9.0))) > Z_MAX


BAD = [({"coordinate": "w"}, "coordinate"), ({"coordinate": "z"}, "coordinate"), ({"start": -1.0}, "start"),
       ({"precision": 1.5}, "precision"), ({"method": "ffs"}, "method"), ({"max_steps": 0}, "max_steps"),
       ({"max_wall_time": -1}, "max_wall_time"), ({"bridge": "yes"}, "bridge"), ({"walkers": 1}, "walkers"),
       ({"replicas": 5}, "replicas"), ({"target": 1e-6}, "target"), ({"precison": 0.1}, "did you mean")]


@pytest.mark.parametrize("bad, key", BAD, ids=[b[1] for b in BAD])
def test_bad_escape_keys_are_named(bad, key):
    from langsim import config
    cfg = gaussian_well(5.0, d=2)
    cfg["escape"].update(bad)
    with pytest.raises(ConfigError, match=rf"\[escape\].*{key}"):
        config.load(cfg | {"dynamics": {**cfg["dynamics"], "steps": 1}})
    missing = gaussian_well(5.0, d=2)
    del missing["escape"]["start"]
    with pytest.raises(ConfigError, match=r"\[escape\] start is missing"):
        config.load(missing | {"dynamics": {**missing["dynamics"], "steps": 1}})


def test_cli_rate(tmp_path, capsys):
    import json

    from langsim import cli
    path = tmp_path / "well.toml"
    path.write_text(f"""seed = 3
[particles]
dimensions = 1
friction = {KT!r}
[medium]
temperature = {T!r}
[[potential]]
type = "double-well"
barrier_kT = 3.0
separation = 2.0
[dynamics]
dt = 2e-3
[escape]
coordinate = "x"
start = 0.0
target = 1.0
precision = 0.3
""")
    assert cli.main(["rate", str(path), "--json", "--quiet"]) == 0
    out = json.loads(capsys.readouterr().out)
    for key in ("rate", "rate_low", "rate_high", "mfpt", "mfpt_low", "mfpt_high", "method", "steps", "theory",
                "audit"):
        assert key in out
    path.write_text(path.read_text().replace("precision = 0.3", "precision = 3.0"))
    assert cli.main(["rate", str(path), "--quiet"]) == 2
    assert "[escape] precision = 3.0" in capsys.readouterr().err
