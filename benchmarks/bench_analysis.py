"""Benchmark of the analysis layer: FFT MSD and segment-averaged PSD of a 10^7-frame series.

Beside them, the direct O(N * lags) MSD on a shorter series in the same run, and
the agreement of the two MSD algorithms. Prints a table and writes
benchmarks/results/analysis.json. Synthetic data: an AR(1) (exactly sampled
Ornstein-Uhlenbeck) series from numpy Generator(PCG64(0)). Not a timed test.
"""
import json
import math
import os
import platform
import time

import numpy as np
from scipy.signal import lfilter

from langsim.analysis import LorentzianFit, msd_direct, msd_fft


def series(n, c=0.98, seed=0):
    g = np.random.Generator(np.random.PCG64(seed))
    return lfilter([1.0], [1.0, -c], g.standard_normal(n) * math.sqrt(1 - c * c))


def timed(fn, *a, **k):
    t0 = time.perf_counter()
    out = fn(*a, **k)
    return out, time.perf_counter() - t0


def main(n_long=10**7, n_short=2 * 10**4):
    x = series(n_long)
    rows = []
    m_fft, t = timed(msd_fft, x, 10**5)
    rows.append(("MSD by FFT, lags <= 1e5", n_long, t))
    fit, t = timed(lambda: LorentzianFit(1e-4, segment_length=1 << 14).fit(x))
    rows.append(("segment-averaged PSD + aliased Lorentzian ML fit", n_long, t))
    xs = x[:n_short]
    d, t_direct = timed(msd_direct, xs, n_short // 2)
    f, t_fft = timed(msd_fft, xs, n_short // 2)
    rows.append(("MSD direct O(N*lags), lags <= N/2", n_short, t_direct))
    rows.append(("MSD by FFT, same series", n_short, t_fft))
    agree = float(np.max(np.abs(d - f)) / np.max(d))
    print(f"{'task':<44} {'frames':>10} {'seconds':>9}")
    for name, n, t in rows:
        print(f"{name:<44} {n:>10d} {t:>9.3f}")
    print(f"max relative difference direct vs FFT MSD: {agree:.2e}")
    print(f"fitted corner frequency {fit.corner_frequency_:.4f} +- {fit.corner_frequency_err_:.2g} Hz "
          f"(true {-math.log(0.98) / (2 * math.pi * 1e-4):.4f})")
    out = {"machine": platform.platform(), "cpus": os.cpu_count(), "numpy": np.__version__,
           "rows": [{"task": r[0], "frames": r[1], "seconds": r[2]} for r in rows],
           "msd_direct_vs_fft_max_rel_diff": agree}
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "results", "analysis.json")
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "w") as fh:
        json.dump(out, fh, indent=2)
    print("wrote", path)


if __name__ == "__main__":
    main()
