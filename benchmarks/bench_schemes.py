"""Cost of one particle-step of every registered scheme, beside noise floors measured in the same run.

Run: ``python benchmarks/bench_schemes.py [--quick] [--repeat N] [--no-compile]``. Prints
a table and writes benchmarks/results/schemes.json with the machine load
(``os.getloadavg``) before and after.

Floors (ns per Gaussian variate, one thread, process CPU time):

* ``numpy``: ``Generator.standard_normal(out=buf)`` into 100,000 doubles (PCG64 +
  ziggurat in C);
* ``numba``: langsim's own counter-based generator (``kernels.noise.fill_tile``,
  64 particles x 64 steps per call), i.e. the same variates the kernels draw.

A row's floor is the numpy floor times the variates one particle-step needs
(one for every scheme in 1D, two for the exact underdamped step: position and
velocity).

Rows: each scheme of ``langsim.schemes.SCHEMES`` in each of its regimes, a 1D
harmonic trap (the one force every scheme accepts), for 1 particle (the serial
path, 1 thread) and for ``--particles`` particles at 1 and 2 threads, timed as
:meth:`langsim.engine.Simulation.advance` bursts with compiled code warm (best of
``--repeat``; 1 thread: CPU time, 2 threads: wall time, which is what a second
thread buys and is only as good as the machine is idle).

Compile rows (skip with ``--no-compile``): for each scheme kind, a fresh process
with an empty temporary cache folder (``LANGSIM_CACHE_DIR``; ``NUMBA_CACHE_DIR``
unset so numba caches there too) builds the Simulation and compiles its kernel;
then a second fresh process on the now warm cache does the same (the start-up a
second ``langsim run`` pays).
"""
import argparse
import os
import shutil
import sys
import tempfile
import time
import warnings

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from bench_engine import best, floor_ns, machine_load, startup, write_results  # noqa: E402

#: Scenario of every row: a 1D harmonic trap (SI; k = 1e-6 N/m, gamma = 1e-8 kg/s,
#: m = 1e-14 kg: corner 16 Hz, dt well inside every scheme's stable range).
TRAP = {"friction": 1e-8, "mass": 1e-14}
STIFFNESS = 1e-6
#: Variates per 1D particle-step of (scheme, regime); all others need one.
VARIATES = {("exact", "underdamped"): 2}


def scheme_config(scheme, regime, n):
    dt = 1e-6 if regime == "underdamped" else 1e-5
    return {"seed": 1, "particles": {"count": n, **TRAP},
            "potential": [{"type": "harmonic", "stiffness": STIFFNESS}],
            "dynamics": {"regime": regime, "scheme": scheme, "dt": dt, "steps": 1000}}


def cases():
    from langsim import schemes
    return [(s.name, regime, s.kind) for s in schemes.SCHEMES.values() for regime in s.regimes]


def numba_floor_ns(repeat, n_tiles=1600):
    """ns per variate of langsim's fill_tile (numba), tiles of 64 x 64, one thread."""
    from numba import njit

    from langsim.kernels import noise, schemes

    @njit
    def tiles(k0, k1, n_tiles, buf, ids):
        nb, n, n_comp = buf.shape
        for t in range(n_tiles):
            noise.fill_tile(k0, k1, ids, t * n, n, n_comp, 0, nb, buf, np.uint64(0))

    buf = np.empty((schemes.BLOCK, schemes.TILE, 1))
    ids = np.arange(n_tiles * schemes.TILE, dtype=np.uint64)
    k0, k1 = np.uint64(0x1234567), np.uint64(0x89ABCDEF)
    return best(lambda: tiles(k0, k1, n_tiles, buf, ids), repeat, time.process_time) \
        / (n_tiles * buf.size) * 1e9


def step_ns(cfg, threads, n_steps, repeat, clock):
    from langsim import engine
    sim = engine.Simulation(cfg, threads=threads)
    state = sim.initial_state()
    return best(lambda: sim.advance(state, n_steps), repeat, clock) / (
        n_steps * state.n_particles) * 1e9


def compile_rows():
    """Cold and warm-cache kernel start-up of one scheme of each kind, in fresh processes."""
    seen, rows = set(), []
    for name, regime, kind in cases():
        if kind in seen:
            continue
        seen.add(kind)
        cfg = scheme_config(name, regime, 1)
        cache = tempfile.mkdtemp(prefix="langsim-bench-cache-")
        try:
            cold = startup(cache, cfg, full=False)
            warm = startup(cache, cfg, full=False)
        finally:
            shutil.rmtree(cache, ignore_errors=True)
        kernel_cold = {p["phase"]: p for p in cold["phases"]}["kernel"]
        kernel_warm = {p["phase"]: p for p in warm["phases"]}["kernel"]
        rows.append({"kind": kind, "scheme": name, "regime": regime,
                     "cold_kernel_s": kernel_cold["wall_s"], "cold_kernel_cpu_s": kernel_cold["cpu_s"],
                     "cold_total_s": cold["total_wall_s"], "cold_total_cpu_s": cold["total_cpu_s"],
                     "cold_process_s": cold["process_wall_s"],
                     "warm_kernel_s": kernel_warm["wall_s"], "warm_kernel_cpu_s": kernel_warm["cpu_s"],
                     "warm_total_s": warm["total_wall_s"], "warm_total_cpu_s": warm["total_cpu_s"],
                     "warm_process_s": warm["process_wall_s"],
                     "cold_phases": cold["phases"], "warm_phases": warm["phases"]})
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer steps and repeats (a smoke run)")
    ap.add_argument("--repeat", type=int, default=5, help="repeats per timing (best is kept)")
    ap.add_argument("--particles", type=int, default=100_000, help="particles of the many-particle rows")
    ap.add_argument("--no-compile", action="store_true", help="skip the fresh-process compile rows")
    args = ap.parse_args(argv)
    scale = 10 if args.quick else 1
    repeat = 2 if args.quick else args.repeat
    # every step is a frame here, so the fidelity warning would fire for every scheme but exact
    from langsim.config import LangsimWarning
    warnings.simplefilter("ignore", LangsimWarning)
    load_before = machine_load()
    floor = floor_ns(repeat)
    floor_numba = numba_floor_ns(repeat)
    many = args.particles
    steps_many = max(10, 20_000_000 // many // scale)
    steps_one = 200_000 // scale

    rows = []
    for name, regime, kind in cases():
        variates = VARIATES.get((name, regime), 1)
        one = step_ns(scheme_config(name, regime, 1), 1, steps_one, repeat, time.process_time)
        cpu1 = step_ns(scheme_config(name, regime, many), 1, steps_many, repeat, time.process_time)
        wall1 = step_ns(scheme_config(name, regime, many), 1, steps_many, repeat, time.perf_counter)
        wall2 = step_ns(scheme_config(name, regime, many), 2, steps_many, repeat, time.perf_counter)
        f = floor * variates
        rows.append({"scheme": name, "regime": regime, "kind": kind,
                     "variates_per_particle_step": variates, "floor_ns": f,
                     "one_particle_cpu_ns": one, "many_particles": many,
                     "many_1thread_cpu_ns": cpu1, "many_1thread_wall_ns": wall1,
                     "many_2threads_wall_ns": wall2,
                     "x_floor_one": one / f, "x_floor_many_1thread": cpu1 / f,
                     "thread_scaling": wall1 / wall2})
    compiles = None if args.no_compile else compile_rows()
    load_after = machine_load()

    print(f"load: {load_before['uptime'] or load_before['loadavg']}")
    print(f"noise floor per variate (1 thread, CPU time): numpy {floor:.2f} ns, "
          f"numba fill_tile {floor_numba:.2f} ns")
    print(f"{'scheme':<20} {'regime':<12} {'floor':>6} {'1 p':>7} {'x fl':>5} "
          f"{f'{many:,} p 1 thr':>14} {'x fl':>5} {'2 thr':>7} {'2/1':>5}")
    for r in rows:
        print(f"{r['scheme']:<20} {r['regime']:<12} {r['floor_ns']:6.1f} "
              f"{r['one_particle_cpu_ns']:7.1f} {r['x_floor_one']:5.1f} "
              f"{r['many_1thread_cpu_ns']:14.1f} {r['x_floor_many_1thread']:5.2f} "
              f"{r['many_2threads_wall_ns']:7.1f} {r['thread_scaling']:5.2f}")
    print("  (ns per 1D particle-step, harmonic trap; floor = numpy floor x variates per step;"
          " 1 p and 1 thr: CPU time; 2 thr: wall time; 2/1: wall 1 thr / wall 2 thr)")
    if compiles:
        print("kernel start-up in a fresh process, s wall (s CPU): cold = empty cache, warm = its cache")
        print(f"  {'kind':<10} {'scheme':<20} {'cold kernel':>15} {'cold total':>15} "
              f"{'warm kernel':>13} {'warm total':>13}")
        for c in compiles:
            print(f"  {c['kind']:<10} {c['scheme'] + ' ' + c['regime'][:5]:<20} "
                  f"{c['cold_kernel_s']:6.2f} ({c['cold_kernel_cpu_s']:6.2f}) "
                  f"{c['cold_total_s']:6.2f} ({c['cold_total_cpu_s']:6.2f}) "
                  f"{c['warm_kernel_s']:5.2f} ({c['warm_kernel_cpu_s']:5.2f}) "
                  f"{c['warm_total_s']:5.2f} ({c['warm_total_cpu_s']:5.2f})")
        print("  (total: import numba, import langsim, Simulation, equilibrium sampler, kernel)")
    print(f"load after: {load_after['uptime'] or load_after['loadavg']}")

    write_results("schemes.json", load_before, load_after, quick=args.quick, repeat=repeat,
                  floor_ns_per_variate={"numpy": floor, "numba_fill_tile": floor_numba},
                  steps={"one_particle": steps_one, "many_particles": steps_many},
                  rows=rows, compile=compiles)

if __name__ == "__main__":
    main()
