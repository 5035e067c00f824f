"""Cost of the exposure-averaging recorder: ns per particle-step with and without it.

Rows (best of ``--repeat`` runs, compiled code warm, one thread, in memory), all measured
in this same run:

* ``snapshots only``: the run's ``[output]`` frames (every 100 steps), the baseline;
* ``+ exposure average``: the same run with a ``[measurement]`` camera whose flat exposure
  spans the whole frame interval, so the recorder adds one weighted tap per particle at
  every step (the worst case of the "sum" recorder); localization error on, no images;
* ``+ exposure average, 4 ms of 10``: a partial exposure (taps on 40 % of the steps);
* ``kernel only``: ``Simulation.advance`` with the snapshot recorder alone and with the
  whole-frame "sum" recorder beside it (no measurement stage, no sink): the recorder's
  own share of the cost.

The overhead column is relative to the baseline of the same case. Target (issue 10): at
most 20 %.

Usage: ``python benchmarks/bench_exposure.py [--repeat 3] [--particles 10000]``. The table
is printed and written to ``benchmarks/results/exposure.json``.
"""
import argparse
import json
import os
import platform
import time

import langsim
from langsim import config as _config
from langsim.engine import Engine, Recorder, Simulation
from langsim.measurement import formulas
from langsim.trajectory import MemorySink

HERE = os.path.dirname(os.path.abspath(__file__))


def _config_for(n, dims, steps, exposure):
    cfg = {"seed": 3, "particles": {"count": n, "dimensions": dims, "friction": 1e-8},
           "potential": [{"type": "harmonic", "stiffness": 1e-7}],
           "dynamics": {"dt": 1e-4, "steps": steps}, "output": {"every": 100}}
    if exposure is not None:
        cfg["measurement"] = {"frame_rate": 100.0, "exposure": exposure, "localization_error": 5e-9}
    return cfg


def ns_per_particle_step(cfg, repeat):
    spec = _config.load(cfg)
    best = float("inf")
    for i in range(repeat + 1):                  # the first run loads the compiled kernels
        engine = Engine(spec, MemorySink(), threads=1)
        t = time.perf_counter()
        engine.run()
        if i:
            best = min(best, time.perf_counter() - t)
    return 1e9 * best / (spec.dynamics.steps * spec.particles.count)


def kernel_ns(n, dims, steps, repeat, with_exposure):
    sim = Simulation(_config_for(n, dims, steps, None), threads=1)
    w, _ = formulas.trapezoid_taps(100)
    record = [Recorder("positions", period=100)]
    if with_exposure:
        record.append(Recorder("true_positions", group="measured", period=100, n_taps=len(w),
                               weights=tuple(float(v) for v in w)))
    best = float("inf")
    for i in range(repeat + 1):
        state = sim.initial_state()
        t = time.perf_counter()
        sim.advance(state, steps, record=record)
        if i:
            best = min(best, time.perf_counter() - t)
    return 1e9 * best / (steps * n)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--particles", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=2_000)
    args = ap.parse_args()
    rows = []
    for dims in (1, 2):
        base = ns_per_particle_step(_config_for(args.particles, dims, args.steps, None), args.repeat)
        rows.append((f"{dims}D, snapshots only (baseline)", base, 0.0))
        for label, exposure in (("+ exposure average, whole frame", 0.01),
                                ("+ exposure average, 4 ms of 10", 0.004)):
            t = ns_per_particle_step(_config_for(args.particles, dims, args.steps, exposure), args.repeat)
            rows.append((f"{dims}D, {label}", t, 100.0 * (t / base - 1.0)))
        k0 = kernel_ns(args.particles, dims, args.steps, args.repeat, False)
        k1 = kernel_ns(args.particles, dims, args.steps, args.repeat, True)
        rows.append((f"{dims}D, kernel only, snapshots", k0, 0.0))
        rows.append((f"{dims}D, kernel only, + sum recorder (whole frame)", k1, 100.0 * (k1 / k0 - 1.0)))
    width = max(len(r[0]) for r in rows)
    print(f"{'case':<{width}}  ns/particle-step  overhead")
    for name, t, over in rows:
        print(f"{name:<{width}}  {t:16.3g}  {over:+7.1f} %")
    load = os.getloadavg()[0]
    print(f"load average during the run: {load:.2f} (2 cores)")
    out = {"particles": args.particles, "steps": args.steps, "repeat": args.repeat,
           "machine": platform.processor() or platform.machine(), "python": platform.python_version(),
           "langsim": langsim.__version__, "load_average": os.getloadavg()[0],
           "rows": [{"case": n, "ns_per_particle_step": t, "overhead_percent": o} for n, t, o in rows]}
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", "exposure.json"), "w") as fh:
        json.dump(out, fh, indent=2)


if __name__ == "__main__":
    main()
