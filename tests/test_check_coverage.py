"""Coverage of the error bars `langsim check` prints.

A printed error is calibrated when, over independent experiments, the z-score
(measured - predicted) / error of each quantity is distributed as N(0, 1): the
mean of z^2 is 1 (variance of z^2 is 2, so its standard error over R experiments
is sqrt(2/R)), and a fraction 0.6827 of the |z| is below 1 (binomial standard
error sqrt(p(1 - p)/R)). Both are tested per quantity at 4.5 standard errors;
an error bar 1.5x too small (or too large) falls outside the bounds, which is
asserted too. [the N(0, 1) criterion is common practice for checking error bars]

Overdamped data are Euler-Maruyama sampled exactly as its AR(1) form (see
test_analysis.harmonic_trajectory); underdamped ones are langsim's BAOAB runs of
the cantilever scenario, shortened, one seed per experiment.

Short runs: at 0.05 s (500 energy relaxation times) the blocking error of the
variance has no plateau yet (its level errors still rise by 20 % per level at
the chosen level, 18 blocks), and over 200 seeds the mean z^2 of the variance
rows is 1.45: the printed error is about 10 % low and has Student-t tails.
At 0.25 s it is calibrated, which is what is tested here.
"""
import math

import numpy as np
import pytest

import langsim
from langsim.checks import check
from test_analysis import Traj, harmonic_trajectory

P_WITHIN_1 = math.erf(1 / math.sqrt(2))  # 0.6827
N_SE = 4.5


def z_by_quantity(reports):
    """{quantity: array of z over experiments} for the rows that pass or fail (not "info")."""
    out = {}
    for rep in reports:
        for row in rep.rows:
            if row.status in ("pass", "fail") and row.z is not None:
                out.setdefault(row.quantity, []).append(row.z)
    return {q: np.asarray(z) for q, z in out.items()}


def calibrated(z):
    """True when the z-scores look N(0, 1) in mean square and in the fraction within 1."""
    r = len(z)
    ms_ok = abs(np.mean(z**2) - 1) < N_SE * math.sqrt(2 / r)
    within = np.mean(np.abs(z) < 1)
    frac_ok = abs(within - P_WITHIN_1) < N_SE * math.sqrt(P_WITHIN_1 * (1 - P_WITHIN_1) / r)
    return ms_ok and frac_ok


def assert_coverage(zs, expected):
    assert expected <= set(zs), sorted(zs)
    for q in expected:
        z = zs[q]
        assert calibrated(z), (q, len(z), np.mean(z**2), np.mean(np.abs(z) < 1))
        # the same test rejects error bars 1.5x too small or too large
        assert not calibrated(1.5 * z) and not calibrated(z / 1.5), q


@pytest.fixture(scope="module")
def overdamped_reports():
    reps = []
    for i in range(200):
        pos, cfg = harmonic_trajectory(10_000 + 10 * i, frames=2**14, particles=1)
        reps.append(check(Traj(pos, cfg)))
    return reps


def test_overdamped_harmonic_error_bars_cover(overdamped_reports):
    zs = z_by_quantity(overdamped_reports)
    assert_coverage(zs, {"variance x", "variance y", "mean x", "mean y", "corner frequency x",
                         "corner frequency y", "diffusion coefficient x (PSD)",
                         "diffusion coefficient y (PSD)"})


def cantilever(seed, duration):
    """configs/cantilever.toml (k = 0.1 N/m, f0 = 10 kHz, Q = 10), shortened to ``duration`` s."""
    return {"seed": seed,
            "particles": {"count": 1, "dimensions": 1, "mass": 2.53303e-11, "friction": 1.59155e-7},
            "medium": {"temperature": 295.15},
            "potential": [{"type": "harmonic", "stiffness": 0.1}],
            "dynamics": {"regime": "underdamped", "scheme": "baoab", "dt": 1e-6, "duration": duration},
            "output": {"every": 5, "velocities": True}}


@pytest.fixture(scope="module")
def underdamped_reports():
    # 0.25 s: 2500 energy relaxation times 2m/gamma (see the note on short runs above)
    return [check(langsim.run(cantilever(500 + i, 0.25), progress=False)) for i in range(200)]


def test_underdamped_oscillator_error_bars_cover(underdamped_reports):
    zs = z_by_quantity(underdamped_reports)
    names = set(zs)
    expected = {q for q in names if q.startswith(("variance", "velocity variance", "resonance frequency",
                                                 "quality factor"))}
    assert len(expected) >= 4, sorted(names)
    assert_coverage(zs, expected)


def test_short_runs_are_told_their_error_bars_may_be_low(underdamped_reports):
    # the 0.25 s runs are long enough: (g / 2n)^(1/3) < 10 % (g ~ 50 frames, n ~ 5e4 frames)
    assert not any("may be low" in n for n in underdamped_reports[0].notes)
    cfg = cantilever(3, 0.05)
    notes = check(langsim.run(cfg, progress=False)).notes
    assert any("position error bars may be low" in n for n in notes), notes
    assert any("velocity error bars may be low" in n for n in notes), notes
