"""Engine speed: ns per particle-step beside the noise floor and a numpy loop.

Run: ``python benchmarks/bench_engine.py [--quick]``. Prints a table and writes
benchmarks/results/engine.json. Every row is measured in this same run:

* floor: numpy ``Generator.standard_normal(out=buf)``, ns per variate (PCG64 +
  ziggurat in C), the cost of the one Gaussian variate a 1D step needs;
* numpy loop: the same scheme written as a plain vectorised numpy loop over
  steps, which is what a user would otherwise write;
* langsim at 1 and 2 threads (best of a few repeats, compiled code warm).

Cases: (i) 1D harmonic BAOAB, 100,000 particles; (ii) the same, one particle
over 10^7 steps; (iii) 3D double-well Euler-Maruyama, 10,000 particles.
"""
import argparse
import json
import math
import os
import subprocess
import sys
import time

import numpy as np

import langsim
from langsim.units import k_B

HERE = os.path.dirname(os.path.abspath(__file__))
kT = k_B * 295.15


def floor_ns(n=100_000, reps=200):
    rng = np.random.Generator(np.random.PCG64(1))
    buf = np.empty(n)
    best = math.inf
    for _ in range(3):
        t = time.perf_counter()
        for _ in range(reps):
            rng.standard_normal(out=buf)
        best = min(best, (time.perf_counter() - t) / (reps * n) * 1e9)
    return best


def baoab_numpy_ns(n_particles, n_steps, k=1e-6, m=1e-14, gamma=1e-8, dt=1e-6):
    rng = np.random.Generator(np.random.PCG64(2))
    x = np.zeros(n_particles)
    v = np.zeros(n_particles)
    c = math.exp(-gamma * dt / m)
    s = math.sqrt((1 - c * c) * kT / m)
    f = -k * x
    xi = np.empty(n_particles)
    t = time.perf_counter()
    for _ in range(n_steps):
        v += 0.5 * dt * f / m
        x += 0.5 * dt * v
        rng.standard_normal(out=xi)
        v *= c
        v += s * xi
        x += 0.5 * dt * v
        f = -k * x
        v += 0.5 * dt * f / m
    return (time.perf_counter() - t) / (n_particles * n_steps) * 1e9


def em_double_well_numpy_ns(n_particles, n_steps, barrier, L, k, gamma=1e-8, dt=1e-5):
    rng = np.random.Generator(np.random.PCG64(3))
    x = np.zeros((n_particles, 3))
    half = L / 2
    amp = math.sqrt(2 * kT * dt / gamma)
    xi = np.empty_like(x)
    t = time.perf_counter()
    for _ in range(n_steps):
        q = x[:, 0] / half
        f = -k * x
        f[:, 0] = -4 * barrier * (q * q - 1) * q / half
        rng.standard_normal(out=xi)
        x += dt / gamma * f + amp * xi
    return (time.perf_counter() - t) / (n_particles * n_steps) * 1e9


def langsim_ns(cfg, threads, reps=3):
    best = math.inf
    for _ in range(reps):
        traj = langsim.run(cfg, progress=False, threads=threads)
        best = min(best, traj.stats["ns_per_particle_step"])
    return best


def startup_seconds():
    """Wall time of a fresh process importing langsim and running a tiny config
    (compiled code from the on-disk cache)."""
    code = ("import time; t = time.perf_counter(); import langsim; "
            "langsim.run({'seed': 1, 'particles': {'friction': 1e-8}, "
            "'potential': [{'type': 'harmonic', 'stiffness': 1e-6}], "
            "'dynamics': {'dt': 1e-5, 'steps': 10}}, progress=False); "
            "print(time.perf_counter() - t)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer steps (a smoke run)")
    args = ap.parse_args()
    scale = 10 if args.quick else 1
    floor = floor_ns()
    L, barrier, ktrans = 1e-6, 5 * kT, 1e-6
    cases = {
        "(i) 1D harmonic BAOAB, 100,000 particles": (
            {"seed": 1, "particles": {"count": 100_000, "friction": 1e-8, "mass": 1e-14},
             "potential": [{"type": "harmonic", "stiffness": 1e-6}],
             "dynamics": {"regime": "underdamped", "dt": 1e-6, "steps": 1000 // scale},
             "output": {"every": 1000 // scale}},
            lambda: baoab_numpy_ns(100_000, 200 // scale), 1),
        "(ii) 1D harmonic BAOAB, 1 particle, 10^7 steps": (
            {"seed": 1, "particles": {"count": 1, "friction": 1e-8, "mass": 1e-14},
             "potential": [{"type": "harmonic", "stiffness": 1e-6}],
             "dynamics": {"regime": "underdamped", "dt": 1e-6, "steps": 10_000_000 // scale},
             "output": {"every": 10_000_000 // scale}},
            lambda: baoab_numpy_ns(1, 100_000 // scale), 1),
        "(iii) 3D double-well Euler-Maruyama, 10,000 particles": (
            {"seed": 1, "particles": {"count": 10_000, "dimensions": 3, "friction": 1e-8},
             "potential": [{"type": "double-well", "barrier": barrier, "separation": L,
                            "stiffness": ktrans}],
             "dynamics": {"dt": 1e-5, "steps": 2000 // scale}, "output": {"every": 2000 // scale}},
            lambda: em_double_well_numpy_ns(10_000, 200 // scale, barrier, L, ktrans), 3),
    }
    rows = []
    for name, (cfg, numpy_loop, variates) in cases.items():
        langsim.run({**cfg, "dynamics": {**cfg["dynamics"], "steps": cfg["output"]["every"]}},
                    progress=False)  # warm (load compiled code)
        one = langsim_ns(cfg, 1)
        two = langsim_ns(cfg, 2)
        ref = numpy_loop()
        rows.append({"case": name, "variates_per_particle_step": variates,
                     "floor_ns": floor * variates, "numpy_loop_ns": ref,
                     "langsim_1thread_ns": one, "langsim_2threads_ns": two,
                     "vs_floor_1thread": one / (floor * variates),
                     "speedup_vs_numpy": ref / one, "thread_scaling": one / two})
    start = startup_seconds()
    header = (f"{'case':<54} {'floor':>7} {'numpy':>8} {'1 thr':>7} {'2 thr':>7} "
              f"{'x floor':>7} {'x numpy':>8} {'2/1 thr':>7}")
    print(f"noise floor: numpy standard_normal {floor:.2f} ns per variate (x variates per step)")
    print(header)
    for r in rows:
        print(f"{r['case']:<54} {r['floor_ns']:7.1f} {r['numpy_loop_ns']:8.1f} "
              f"{r['langsim_1thread_ns']:7.1f} {r['langsim_2threads_ns']:7.1f} "
              f"{r['vs_floor_1thread']:7.2f} {r['speedup_vs_numpy']:8.1f} {r['thread_scaling']:7.2f}")
    print(f"fresh process, import + tiny run from the compile cache: {start:.2f} s")
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", "engine.json"), "w") as fh:
        json.dump({"floor_ns_per_variate": floor, "rows": rows, "startup_s": start,
                   "quick": args.quick, "cpu_count": os.cpu_count()}, fh, indent=2)


if __name__ == "__main__":
    main()
