"""The equilibrium sampler's inverse-CDF tables are cached per potential; the
draws stay bit-identical to the uncached computation."""
import numpy as np
import pytest

from langsim import config, initial, seeding
from langsim.units import k_B

KT = k_B * 295.15


def reference_draws(terms, axis, d, kT, uniforms):
    """The sampler's algorithm written out without any cache (inverse transform sampling on the
    grid, trapezoid CDF; common practice)."""
    lo, hi, _ = initial._axis_range(terms, axis, kT)
    grid = np.linspace(lo, hi, initial.GRID_POINTS)
    energy = initial.axis_energy([t.static() for t in terms], axis, d, grid)
    weight = np.exp(-(energy - energy.min()) / kT)
    cdf = np.concatenate(([0.0], np.cumsum(0.5 * (weight[1:] + weight[:-1]) * np.diff(grid))))
    cdf /= cdf[-1]
    return np.interp(uniforms, cdf, grid)


def spec(stiffness, temperature=295.15, barrier_kT=None):
    terms = [{"type": "harmonic", "stiffness": stiffness}]
    if barrier_kT is not None:
        terms = [{"type": "double-well", "barrier_kT": barrier_kT, "separation": 5e-7,
                  "stiffness": stiffness}]
    return config.load({"seed": 1, "particles": {"radius": 5e-7, "count": 50, "dimensions": 2},
                        "medium": {"temperature": temperature}, "potential": terms,
                        "dynamics": {"dt": 1e-5, "steps": 10}})


@pytest.mark.parametrize("barrier_kT", [None, 4.0])
def test_cached_draws_are_bit_identical(barrier_kT, monkeypatch):
    s = spec([1e-6, 3e-6], barrier_kT=barrier_kT)
    initial._CDF_CACHE.clear()
    computed = []
    real = initial._axis_cdf
    monkeypatch.setattr(initial, "_axis_cdf", lambda *a: computed.append(a[2]) or real(*a))
    u = np.random.Generator(np.random.Philox(7)).random(50)
    for axis in (0, 1):
        want = reference_draws(s.terms, axis, 2, s.kT, u)
        first = initial.sample_axis(s.terms, axis, 2, s.kT, u)
        again = initial.sample_axis(s.terms, axis, 2, s.kT, u)
        assert first.tobytes() == want.tobytes() == again.tobytes()
    assert computed == [0, 1]                     # the second draw of each axis used the table
    # whole initial states too: a run's positions do not depend on what ran before it
    x_warm = initial.initial_positions(s, seeding.initial_rng(s.seed))
    initial._CDF_CACHE.clear()
    x_cold = initial.initial_positions(s, seeding.initial_rng(s.seed))
    assert x_warm.tobytes() == x_cold.tobytes()


def test_tables_are_told_apart_and_bounded():
    initial._CDF_CACHE.clear()
    u = np.linspace(0.01, 0.99, 9)
    base = spec(1e-6)
    draws = initial.sample_axis(base.terms, 0, 2, base.kT, u)
    for other in (spec(2e-6), spec(1e-6, temperature=350.0)):
        x = initial.sample_axis(other.terms, 0, 2, other.kT, u)
        assert x.tobytes() == reference_draws(other.terms, 0, 2, other.kT, u).tobytes()
        assert not np.array_equal(x, draws)        # a stiffer trap / hotter medium: other table
    for k in np.linspace(1e-6, 2e-6, 2 * initial.CDF_CACHE_SIZE):
        s = spec(float(k))
        initial.sample_axis(s.terms, 0, 2, s.kT, u)
    assert len(initial._CDF_CACHE) == initial.CDF_CACHE_SIZE
