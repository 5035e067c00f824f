"""Benchmark of langsim.escape_rate: particle-steps and wall time to a 10 % interval.

Escape from a 3D Gaussian well (U = -depth exp(-2 r^2/w^2)) from the Boltzmann
density within one waist to two waists, at 10, 15, 20 and 25 kT (30 kT with
--moonshot), method "auto" (the pilot picks splitting from 10 kT on), dt = 0.05
of the well's relaxation time. Beside it, in the same run, direct counting: it
is run for real at 10 kT to the same precision, which measures its wall time
per particle-step; at every depth its expected cost is the (1.96/0.1)^2 = 384
escapes a 10 % Poisson interval needs, times the exact mean first-passage time
over dt, and its wall time that cost at the measured speed. Each rate is
compared with the exact radial MFPT (z in units of its own log-scale error).
Prints a table and writes benchmarks/results/rates.json. Not a timed test.
"""
import json
import math
import os
import platform
import sys
import time

import numpy as np

import langsim
from langsim import theory
from langsim.units import k_B

T, W, GAMMA, PRECISION = 295.15, 1e-6, 1e-8, 0.1
KT = k_B * T


def config(depth, **escape):
    kappa = 4 * depth * KT / W**2
    return {"seed": 11, "particles": {"dimensions": 3, "friction": GAMMA}, "medium": {"temperature": T},
            "potential": [{"type": "gaussian-well", "depth_kT": depth, "waist": W}],
            "dynamics": {"dt": 0.05 * GAMMA / kappa},
            "escape": {"coordinate": "radius", "start": W, "target": 2 * W, "precision": PRECISION, **escape}}


def exact_mfpt(depth):
    U = lambda r: -depth * KT * np.exp(-2 * np.asarray(r) ** 2 / W**2)  # noqa: E731
    return theory.mfpt_radial_equilibrium(U, W, 2 * W, KT, GAMMA, 3)


def main(depths=(10.0, 15.0, 20.0, 25.0)):
    langsim.escape_rate(config(5.0, precision=0.5))       # compile / load the kernels first
    load = os.getloadavg()[0]                             # the VM is shared: say how busy it was
    t0 = time.perf_counter()
    base = langsim.escape_rate(config(10.0, method="direct"))
    direct_ns = 1e9 * (time.perf_counter() - t0) / base.steps
    n_events = (1.959963984540054 / PRECISION) ** 2
    rows = []
    for depth in depths:
        t0 = time.perf_counter()
        r = langsim.escape_rate(config(depth))
        wall = time.perf_counter() - t0
        mfpt = exact_mfpt(depth)
        dt = config(depth)["dynamics"]["dt"]
        direct_steps = n_events * mfpt / dt
        sigma = (math.log(r.rate_high) - math.log(r.rate_low)) / 3.92
        rows.append({"depth_kT": depth, "method": r.method, "steps": r.steps, "wall_s": wall,
                     "precision": r.precision, "rate": r.rate, "exact_rate": 1 / mfpt,
                     "z": math.log(r.rate * mfpt) / sigma, "direct_steps": direct_steps,
                     "direct_wall_s": direct_steps * direct_ns * 1e-9,
                     "speedup_steps": direct_steps / r.steps})
    print(f"direct counting measured at 10 kT: {base.steps:,} particle-steps to a {base.precision:.3f} "
          f"half-width, {direct_ns:.0f} ns per particle-step (wall, 2 cores shared; load {load:.1f} at start)")
    print(f"{'depth':>6} {'method':>7} {'particle-steps':>15} {'wall (s)':>9} {'half-width':>10} {'z':>6} "
          f"{'direct steps':>13} {'direct wall':>12} {'steps saved':>11}")
    for x in rows:
        print(f"{x['depth_kT']:>4.0f}kT {x['method']:>7} {x['steps']:>15,} {x['wall_s']:>9.1f} "
              f"{x['precision']:>10.3f} {x['z']:>+6.2f} {x['direct_steps']:>13.3g} "
              f"{x['direct_wall_s']:>10.3g} s {x['speedup_steps']:>11.3g}")
    out = {"machine": platform.platform(), "cpus": os.cpu_count(), "numpy": np.__version__,
           "load_average_1min": load, "precision": PRECISION, "direct_ns_per_particle_step": direct_ns,
           "direct_baseline": {"depth_kT": 10.0, "steps": base.steps, "precision": base.precision}, "rows": rows}
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "results", "rates.json")
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "w") as fh:
        json.dump(out, fh, indent=2)
    print("wrote", path)


if __name__ == "__main__":
    main((10.0, 15.0, 20.0, 25.0, 30.0) if "--moonshot" in sys.argv else (10.0, 15.0, 20.0, 25.0))
