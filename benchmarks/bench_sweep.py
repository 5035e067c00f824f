"""Sweeps: the set-up cost of one tiny run, and how sweeps scale over workers.

Run: ``python benchmarks/bench_sweep.py [--quick]``. Prints tables and writes
benchmarks/results/sweep.json. Measured in this same run:

* per-run cost: 200 tiny runs (1 particle, 100 steps, equilibrium start in a
  harmonic trap) one after the other in this process, beside the baseline of
  numpy drawing 1e5 normal variates (``Generator.standard_normal(out=buf)``);
  and where the time of one tiny run goes: config parsing, the equilibrium
  sampler (its inverse-CDF table built, and taken from the cache), one kernel
  dispatch (a call of no steps), the rest;
* loop vs sweep: a plain Python loop of langsim.run and langsim.check over the same
  configs, beside langsim.sweep with 1 and 2 workers;
* scaling: a sweep of 16 equal points of about 1 s each (one particle, 1D,
  Euler-Maruyama, in memory, no checks), with 1 worker (this process), 2 local
  worker processes (the first sweep of the session, which starts the workers,
  and a second one on the kept workers), and a Dask LocalCluster of 2
  single-threaded workers (cluster start-up reported apart; first and second
  sweep on it).
"""
import argparse
import json
import os
import sys
import time

import numpy as np

import langsim
from langsim import config as _config, initial, seeding

HERE = os.path.dirname(os.path.abspath(__file__))
TINY = {"seed": 1, "particles": {"count": 1, "radius": 0.5e-6},
        "potential": [{"type": "harmonic", "stiffness": 1e-6}], "dynamics": {"dt": 1e-4, "steps": 100}}


def numpy_normals_ms(n=100_000, reps=200):
    rng = np.random.Generator(np.random.PCG64(1))
    buf = np.empty(n)
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        for _ in range(reps):
            rng.standard_normal(out=buf)
        best = min(best, (time.perf_counter() - t) / reps * 1e3)
    return best


def per_call_ms(fn, n):
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        for _ in range(n):
            fn()
        best = min(best, (time.perf_counter() - t) / n * 1e3)
    return best


def per_run_cost(n_runs):
    from langsim.engine import Simulation
    langsim.run(TINY, progress=False, threads=1)              # kernels loaded
    run_ms = per_call_ms(lambda: langsim.run(TINY, progress=False, threads=1), n_runs)
    parse_ms = per_call_ms(lambda: _config.load(TINY), n_runs)
    spec = _config.load(TINY)

    def cold():
        initial._CDF_CACHE.clear()
        initial.initial_positions(spec, seeding.initial_rng(spec.seed))
    sampler_cold = per_call_ms(cold, 50)
    sampler_warm = per_call_ms(lambda: initial.initial_positions(spec, seeding.initial_rng(spec.seed)), n_runs)
    sim = Simulation(spec, threads=1)
    state = sim.state(np.zeros((1, 1)))
    dispatch = per_call_ms(lambda: sim.advance(state, 0), n_runs)
    return {"run_ms": run_ms, "config_ms": parse_ms, "sampler_cold_ms": sampler_cold,
            "sampler_cached_ms": sampler_warm, "dispatch_ms": dispatch}


def scaling(n_points, steps):
    base = {"seed": 3, "particles": {"count": 1, "radius": 0.5e-6},
            "potential": [{"type": "harmonic", "stiffness": 1e-6}],
            "dynamics": {"dt": 1e-4, "steps": steps}, "output": {"every": 1000}}
    axes = {"potential.0.stiffness": np.linspace(1e-6, 2e-6, n_points)}

    def timed(**kw):
        t = time.perf_counter()
        result = langsim.sweep(base, axes, checks=False, progress=False, **kw)
        assert (result.runs["status"] == "complete").all(), result.runs["message"]
        return time.perf_counter() - t, result.runs
    langsim.sweep(base, {"potential.0.stiffness": [1e-6]}, workers=1, checks=False, progress=False)
    out = {}
    out["one"], runs_one = timed(workers=1)
    out["local_first"], runs_local = timed(workers=2)
    out["local_kept"], _ = timed(workers=2)
    from langsim.sweeps.pool import discard_shared
    discard_shared()
    import distributed
    t = time.perf_counter()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        out["dask_start"] = time.perf_counter() - t
        out["dask_first"], runs_dask = timed(executor=client)
        out["dask_second"], _ = timed(executor=client)
    same = all(r["seed"].tolist() == runs_one["seed"].tolist() for r in (runs_local, runs_dask))
    out["run_s"] = float(runs_one["wall_time"].mean())
    out["tables_equal"] = bool(same)
    return out


def loop_vs_sweep(n_runs, steps):
    """What a user would write (a loop of langsim.run and langsim.check over configs built
    by hand) beside langsim.sweep of the same runs, with 1 and 2 workers, in memory."""
    base = {"seed": 11, "particles": {"count": 1, "dimensions": 1, "radius": 0.5e-6},
            "potential": [{"type": "harmonic", "stiffness": 1e-6}],
            "dynamics": {"dt": 1e-4, "steps": steps}, "output": {"every": 4}}
    stiffness = np.linspace(1e-6, 4e-6, n_runs)
    langsim.check(langsim.run(base, progress=False, threads=1))       # imports and kernels loaded
    langsim.sweep(base, {"potential.0.stiffness": stiffness[:1]}, workers=1, progress=False)
    t = time.perf_counter()
    for k in stiffness:
        cfg = {**base, "potential": [{"type": "harmonic", "stiffness": float(k)}]}
        langsim.check(langsim.run(cfg, progress=False, threads=1))
    out = {"loop": time.perf_counter() - t}
    for workers in (1, 2):
        t = time.perf_counter()
        langsim.sweep(base, {"potential.0.stiffness": stiffness}, workers=workers, progress=False)
        out[f"sweep_{workers}"] = time.perf_counter() - t
    from langsim.sweeps.pool import discard_shared
    discard_shared()
    return out


def main():
    import warnings
    warnings.simplefilter("ignore")          # config warnings of the benchmark's own runs
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="fewer and shorter runs")
    args = ap.parse_args()
    n_runs = 50 if args.quick else 200
    floor = numpy_normals_ms()
    cost = per_run_cost(n_runs)
    rest = cost["run_ms"] - cost["config_ms"] - cost["sampler_cached_ms"] - cost["dispatch_ms"]
    print(f"per-run cost, {n_runs} tiny runs (1 particle, 100 steps) in one process")
    print(f"  numpy: 1e5 normal variates                 {floor:8.2f} ms   (baseline)")
    print(f"  langsim.run of a tiny config               {cost['run_ms']:8.2f} ms   "
          f"= {cost['run_ms'] / floor:.2f} x baseline (target <= 3)")
    print(f"    config parsing and validation            {cost['config_ms']:8.2f} ms")
    print(f"    equilibrium sampler, table built          {cost['sampler_cold_ms']:8.2f} ms")
    print(f"    equilibrium sampler, table cached         {cost['sampler_cached_ms']:8.2f} ms")
    print(f"    one burst of no steps (kernel dispatch)   {cost['dispatch_ms']:8.2f} ms")
    print(f"    the rest (engine, sink, seeds)            {rest:8.2f} ms")
    n_loop = 8 if args.quick else 24
    lv = loop_vs_sweep(n_loop, 20_000)
    print(f"\nloop vs sweep: {n_loop} runs (1 particle, 20,000 steps, checked), in memory")
    print(f"  plain loop of langsim.run + langsim.check {lv['loop']:8.2f} s   (baseline)")
    print(f"  langsim.sweep, workers=1                  {lv['sweep_1']:8.2f} s   "
          f"{lv['loop'] / lv['sweep_1']:.2f} x")
    print(f"  langsim.sweep, workers=2 (starts them)    {lv['sweep_2']:8.2f} s   "
          f"{lv['loop'] / lv['sweep_2']:.2f} x")
    n_points = 4 if args.quick else 16
    steps = 600_000 if args.quick else 6_000_000
    sc = scaling(n_points, steps)
    print(f"\nscaling: {n_points} points of {sc['run_s']:.2f} s each (mean run wall time, 1 worker)")
    print(f"  1 worker (this process)                    {sc['one']:8.2f} s")
    print(f"  2 local workers, first sweep (start-up)    {sc['local_first']:8.2f} s   "
          f"{sc['one'] / sc['local_first']:.2f} x")
    print(f"  2 local workers, kept from the first sweep {sc['local_kept']:8.2f} s   "
          f"{sc['one'] / sc['local_kept']:.2f} x (target >= 1.8)")
    print(f"  Dask LocalCluster start (2 workers)        {sc['dask_start']:8.2f} s")
    print(f"  Dask, first sweep on the cluster           {sc['dask_first']:8.2f} s   "
          f"{sc['dask_first'] / sc['local_first'] - 1:+.0%} vs local first")
    print(f"  Dask, second sweep                         {sc['dask_second']:8.2f} s   "
          f"{sc['dask_second'] / sc['local_kept'] - 1:+.0%} vs local kept (target within 15 %)")
    print(f"  same seeds on every executor: {sc['tables_equal']}")
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    path = os.path.join(HERE, "results", "sweep.json")
    with open(path, "w") as fh:
        json.dump({"numpy_1e5_normals_ms": floor, "per_run": cost, "loop_vs_sweep": lv, "scaling": sc,
                   "quick": args.quick, "cpu_count": os.cpu_count(),
                   "load_average": os.getloadavg(), "python": sys.version.split()[0]}, fh, indent=1)
    print(f"\nwrote {path}")


if __name__ == "__main__":
    main()
