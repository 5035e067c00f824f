"""Tests of the dynamics noise (langsim.kernels.noise).

Outside references, named at each check:

* Philox4x64-10 words: numpy's ``np.random.Philox`` bit generator and the
  Random123 known-answer vectors stored in ``tests/data/philox4x64_10_kat.txt``;
* the transform: the documented Box-Muller formula evaluated with numpy's
  (libm) log/sqrt/cos/sin, and with 80-bit ``np.longdouble`` for sin/cos;
* the distribution: scipy.stats (normal sf, Kolmogorov-Smirnov).

Statistical checks use fixed keys and a bound of Z_MAX standard errors; each
is run once on the kernel's variates (must pass) and once on a deliberately
wrong sample (must fail), so none of them can pass vacuously.
"""
import os

import numpy as np
import pytest
from numba import njit
from scipy import stats

from langsim.kernels import noise

Z_MAX = 4.5
DATA = os.path.join(os.path.dirname(__file__), "data", "philox4x64_10_kat.txt")
KEY = (0x3C6EF372FE94F82B, 0xA54FF53A5F1D36F1)
U64 = 2 ** 64


def tile(key, p0, n, n_comp, step0, nb, stream=0):
    ids = np.arange(p0, p0 + n, dtype=np.uint64)
    return noise._tile(np.uint64(key[0]), np.uint64(key[1]), ids, n_comp, step0, nb,
                       np.uint64(stream))


# --------------------------------------------------------------------------- Philox


def kat_rows():
    rows = []
    with open(DATA) as f:
        for line in f:
            parts = line.split()
            if not parts or parts[0].startswith("#"):
                continue
            assert parts[:2] == ["philox4x64", "10"]
            words = [int(w, 16) for w in parts[2:]]
            rows.append((words[0:4], words[4:6], words[6:10]))
    return rows


def test_philox_known_answers():
    """Random123 kat_vectors (tests/data/philox4x64_10_kat.txt)."""
    rows = kat_rows()
    assert len(rows) == 2
    for counter, key, expected in rows:
        got = [int(w) for w in noise.philox_block(key, counter)]
        assert got == expected
        # Wrong input: the next counter does not reproduce the vector.
        wrong = [int(w) for w in noise.philox_block(key, [counter[0] + 1] + counter[1:])]
        assert wrong != expected


def numpy_block(key, counter):
    """Block ``counter`` from numpy's Philox, which increments before it generates."""
    c = sum(int(w) << (64 * j) for j, w in enumerate(counter))
    c = (c - 1) % 2 ** 256
    start = np.array([(c >> (64 * j)) & (U64 - 1) for j in range(4)], dtype=np.uint64)
    bg = np.random.Philox(key=np.array(key, dtype=np.uint64), counter=start)
    return [int(w) for w in bg.random_raw(4)]


def test_philox_matches_numpy():
    """numpy.random.Philox (Philox4x64-10) on random and edge counters and keys."""
    rng = np.random.default_rng(20240611)
    cases = [([0, 0, 0, 0], [0, 0]), ([0, 5, 0, 0], [1, 2]),          # borrow in numpy's c - 1
             ([U64 - 1] * 4, [U64 - 1] * 2), ([0, 0, 0, 1], [7, 0])]
    for _ in range(200):
        counter = [int(w) for w in rng.integers(0, U64, 4, dtype=np.uint64, endpoint=False)]
        key = [int(w) for w in rng.integers(0, U64, 2, dtype=np.uint64, endpoint=False)]
        cases.append((counter, key))
    for counter, key in cases:
        assert [int(w) for w in noise.philox_block(key, counter)] == numpy_block(key, counter)
    # Wrong input: numpy started at the counter itself yields the next block.
    counter, key = [3, 1, 4, 1], [5, 9]
    bg = np.random.Philox(key=np.array(key, dtype=np.uint64),
                          counter=np.array(counter, dtype=np.uint64))
    assert [int(w) for w in noise.philox_block(key, counter)] != [int(w) for w in bg.random_raw(4)]


# ---------------------------------------------------------------- the transform


def reference_normals(key, particle, component, step0, n, radius_lane=0):
    """The module's documented formula, from numpy Philox words and numpy libm.

    Variate of step s: lane s % 4 of block (s // 4, particle, component, 0);
    pair (r cos a, r sin a) with r = sqrt(-2 log u), u = (floor(w/2**12) + 1/2)
    2**-52 from the radius word, a = 2 pi (floor(w'/2**11) + 1/2) 2**-53 from
    the angle word. ``radius_lane=1`` swaps the words (a wrong formula).
    """
    out = np.empty(n)
    for j, step in enumerate(range(step0, step0 + n)):
        w = numpy_block(key, [step // 4, particle, component, noise.STREAM_DYNAMICS])
        lane = step % 4
        pair = w[2 * (lane // 2): 2 * (lane // 2) + 2]
        if radius_lane:
            pair = pair[::-1]
        u = ((pair[0] >> 12) + 0.5) * 2.0 ** -52
        a = 2.0 * np.pi * ((pair[1] >> 11) + 0.5) * 2.0 ** -53
        r = np.sqrt(-2.0 * np.log(u))
        out[j] = r * (np.cos(a) if lane % 2 == 0 else np.sin(a))
    return out


def test_transform_matches_reference_formula():
    """fill_tile against numpy's Philox words pushed through numpy's libm."""
    for particle, component, step0 in ((0, 0, 0), (12345, 2, 1001), (2 ** 40 + 3, 1, 7)):
        got = noise.normals(KEY, particle, component, step0, 64)
        ref = reference_normals(KEY, particle, component, step0, 64)
        assert np.all(np.abs(got - ref) <= 1e-14 * np.maximum(1.0, np.abs(ref)))
        wrong = reference_normals(KEY, particle, component, step0, 64, radius_lane=1)
        assert not np.all(np.abs(got - wrong) <= 1e-14 * np.maximum(1.0, np.abs(ref)))


@njit(cache=True)
def _log_unit_array(u):
    out = np.empty_like(u)
    for i in range(u.size):
        out[i] = noise.log_unit(u[i])
    return out


@njit(cache=True)
def _cos_sin_array(w):
    c = np.empty(w.size)
    s = np.empty(w.size)
    for i in range(w.size):
        c[i], s[i] = noise.cos_sin_turn(w[i])
    return c, s


def max_ulp_error(approx, exact):
    """Largest |approx - exact| in units of the last place of exact (float64)."""
    return float(np.max(np.abs(approx - exact) / np.spacing(np.abs(exact))))


def test_log_accuracy():
    """log_unit against numpy's log: at most 4 ulp over a dense grid of (0, 1)."""
    rng = np.random.default_rng(1)
    j = rng.integers(0, 2 ** 52, 2_000_000, dtype=np.uint64)
    u = np.concatenate([
        (j.astype(np.float64) + 0.5) * 2.0 ** -52,          # the kernel's own grid
        2.0 ** -np.linspace(0.0, 53.0, 200_001),             # every binade
        1.0 - 2.0 ** -np.linspace(1.0, 52.0, 20_001),        # next to 1, log ~ 0
        np.array([2.0 ** -53, np.sqrt(0.5), np.nextafter(np.sqrt(0.5), 1.0)]),
    ])
    u = u[u < 1.0]
    got = _log_unit_array(u)
    exact = np.log(u)
    assert max_ulp_error(got, exact) <= 4.0
    assert np.all(_log_unit_array(np.array([1.0])) == 0.0)
    # Wrong input: a 1e-14 relative error is caught.
    assert max_ulp_error(got * (1.0 + 1e-14), exact) > 4.0


def test_sin_cos_accuracy():
    """cos_sin_turn against 80-bit long double cos/sin of the exact angle."""
    if np.finfo(np.longdouble).nmant < 63:
        pytest.skip("needs x87 80-bit long double for the reference")
    rng = np.random.default_rng(2)
    w = rng.integers(0, U64, 2_000_000, dtype=np.uint64, endpoint=False)
    edges = np.array([0, 1 << 61, (1 << 61) - 2048, 1 << 62, 3 << 62, U64 - 1,
                      (1 << 63) + (1 << 61)], dtype=np.uint64)
    w = np.concatenate([w, edges, edges + np.uint64(2048)])
    c, s = _cos_sin_array(w)
    two_pi = np.longdouble("6.28318530717958647692528676655900577")
    turns = ((w >> np.uint64(11)).astype(np.longdouble) + np.longdouble(0.5)) * np.longdouble(2.0) ** -53
    angle = turns * two_pi
    err = max(np.max(np.abs(c - np.cos(angle))), np.max(np.abs(s - np.sin(angle))))
    assert err <= 4e-16
    # Wrong input: a quarter-turn offset in the quadrant is caught.
    assert np.max(np.abs(s - np.cos(angle))) > 4e-16


# --------------------------------------------------------------------- purity


def test_pure_function_of_indices():
    """Same variate whatever the tile split, step0, block length or n_comp."""
    p0, n, n_comp, step0, nb = 1000, 67, 3, 13, 70
    whole = tile(KEY, p0, n, n_comp, step0, nb)
    # Split the particles (vector body and scalar remainder differ) and the steps.
    pieces = np.empty_like(whole)
    for a, b in ((0, 1), (1, 8), (8, 40), (40, 67)):
        for s, e in ((0, 3), (3, 4), (4, 33), (33, 70)):
            pieces[s:e, a:b] = tile(KEY, p0 + a, b - a, n_comp, step0 + s, e - s)
    assert np.array_equal(whole, pieces)
    # Fewer components: the same leading components.
    assert np.array_equal(whole[:, :, :2], tile(KEY, p0, n, 2, step0, nb))
    # The Python helper.
    assert np.array_equal(whole[:, 5, 2], noise.normals(KEY, p0 + 5, 2, step0, nb))
    # Wrong input: a one-step offset gives other numbers.
    assert not np.array_equal(whole[1:], tile(KEY, p0, n, n_comp, step0, nb - 1))


def test_fill_tile_writes_only_its_window():
    buf = np.full((10, 4, 2), np.nan)
    noise.fill_tile(np.uint64(1), np.uint64(2), np.arange(3, dtype=np.uint64), 0, 3, 1, 5, 6, buf,
                    np.uint64(0))
    assert np.all(np.isfinite(buf[:6, :3, 0]))
    assert np.all(np.isnan(buf[6:])) and np.all(np.isnan(buf[:, 3])) and np.all(np.isnan(buf[:, :, 1]))


# ---------------------------------------------------------------- statistics


@pytest.fixture(scope="module")
def sample():
    """2**21 variates: 4096 steps x 256 particles x 2 components."""
    return tile(KEY, 77, 256, 2, 9, 4096)


def moment_z(z):
    """z-scores of mean, variance, skewness, excess kurtosis against N(0, 1)."""
    z = np.ravel(z)
    n = z.size
    m2 = np.mean(z * z)
    return {"mean": np.mean(z) / np.sqrt(1.0 / n),
            "variance": (np.var(z) - 1.0) / np.sqrt(2.0 / n),
            "skewness": stats.skew(z) / np.sqrt(6.0 / n),
            "kurtosis": stats.kurtosis(z) / np.sqrt(24.0 / n),
            "m2": m2}


def test_moments(sample):
    """Sample moments within Z_MAX SE of N(0,1) (SE of normal samples)."""
    good = moment_z(sample)
    for name in ("mean", "variance", "skewness", "kurtosis"):
        assert abs(good[name]) < Z_MAX, (name, good[name])
    rng = np.random.default_rng(3)
    z = sample.ravel()
    wrong = {"mean": z + 0.01,
             "variance": 1.01 * z,
             "skewness": z + 0.05 * (z * z - 1.0),
             "kurtosis": z * np.where(rng.random(z.size) < 0.5, 0.9, 1.1)}
    for name, bad in wrong.items():
        assert abs(moment_z(bad)[name]) > Z_MAX, name


def test_kolmogorov_smirnov(sample):
    """scipy.stats.kstest against scipy.stats.norm."""
    z = sample.ravel()
    assert stats.kstest(z, stats.norm.cdf).pvalue > 1e-4
    assert stats.kstest(1.01 * z, stats.norm.cdf).pvalue < 1e-6


def tail_z(z, k):
    """z-score of the count beyond k sigma, expected 2 sf(k) (scipy.stats.norm)."""
    z = np.ravel(z)
    p = 2.0 * stats.norm.sf(k)
    return (np.count_nonzero(np.abs(z) > k) - z.size * p) / np.sqrt(z.size * p * (1.0 - p))


@pytest.mark.parametrize("k", [3.0, 4.0])
def test_tails(sample, k):
    assert abs(tail_z(sample, k)) < Z_MAX
    assert abs(tail_z(1.03 * sample, k)) > Z_MAX


def corr_z(a, b):
    """Pearson correlation of two samples times sqrt(size): N(0, 1) if independent."""
    a = np.ravel(a)
    b = np.ravel(b)
    return np.corrcoef(a, b)[0, 1] * np.sqrt(a.size)


@pytest.mark.parametrize("lag", [1, 2, 3, 4])
def test_step_correlations(sample, lag):
    """No correlation of z or of z**2 between steps s and s + lag."""
    a, b = sample[:-lag], sample[lag:]
    assert abs(corr_z(a, b)) < Z_MAX
    assert abs(corr_z(a * a, b * b)) < Z_MAX
    mixed = sample[lag:] + 0.02 * sample[:-lag]            # wrong: an AR-like series
    assert abs(corr_z(mixed[:-lag], mixed[lag:])) > Z_MAX
    paired = sample[:-lag] * np.abs(sample[lag:])           # wrong: shared magnitude
    assert abs(corr_z(paired * paired, np.abs(sample[lag:]) ** 2)) > Z_MAX


def test_particle_component_and_key_correlations(sample):
    """Neighbouring particles, components and keys (seeds) are uncorrelated."""
    pairs = {"particle": (sample[:, :-1], sample[:, 1:]),
             "component": (sample[:, :, 0], sample[:, :, 1])}
    other_keys = [(KEY[0] + 1, KEY[1]), (KEY[0], KEY[1] + 1), (KEY[1], KEY[0])]
    for j, key in enumerate(other_keys):
        pairs[f"key{j}"] = (sample, tile(key, 77, 256, 2, 9, 4096))
    for name, (a, b) in pairs.items():
        assert abs(corr_z(a, b)) < Z_MAX, name
        assert abs(corr_z(a * a, b * b)) < Z_MAX, name
        assert abs(corr_z(a, b + 0.01 * a)) > Z_MAX, name         # wrong: leaked noise
