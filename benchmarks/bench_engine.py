"""Engine speed and start-up, beside the noise floor and a numpy loop measured in the same run.

Run: ``python benchmarks/bench_engine.py [--quick] [--repeat N]``. Prints tables and
writes benchmarks/results/engine.json. Every baseline is measured in this same run,
so that figures from a loaded, shared machine stay comparable (the load is
recorded):

* floor: numpy ``Generator.standard_normal(out=buf)`` into 100,000 doubles, ns per
  variate (PCG64 + ziggurat in C): the cost of the one Gaussian variate a 1D step
  needs. Rows are also given as a ratio to it;
* numpy loop: the same scheme as a plain vectorised numpy loop over steps, which
  is what a user would otherwise write;
* langsim: :meth:`langsim.engine.Simulation.advance` bursts, compiled code warm.

Rows: (i) 1D harmonic BAOAB, 100,000 particles, and (iii) 3D double-well
Euler-Maruyama, 10,000 particles, at 1 and 2 threads; (ii) one particle, 1D
harmonic BAOAB (the serial path); the cost of one 100-step burst for 1, 16 and
1024 particles (Python overhead included); the first run from an empty cache in a
fresh process (import, equilibrium sampler, kernel compile, run, check; with the
functions numba compiled and how long each took) and a second process's start-up
from that cache.

Timing: the best of ``--repeat`` repeats (the least disturbed one). Single-thread
rows use process CPU time (immune to other processes on the machine); rows with
2 threads use wall time, which is what a second thread buys, and are only as good
as the machine is idle: see ``load`` in the JSON.
"""
import argparse
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
#: k_B T at 295.15 K (J), for the scenarios' energy scale (k_B from scipy.constants).
KT = 1.380649e-23 * 295.15
#: Steps of a burst in the burst-cost rows (the issue's figure).
BURST_STEPS = 100
BURST_PARTICLES = (1, 16, 1024)


# ------------------------------------------------------------------ timing
def best(fn, repeat, clock):
    """Smallest ``clock()`` difference over ``repeat`` calls of fn (after one warm call)."""
    fn()
    times = []
    for _ in range(repeat):
        t = clock()
        fn()
        times.append(clock() - t)
    return min(times)


def machine_load():
    """Load averages (1, 5, 15 min) and the ``uptime`` line."""
    try:
        line = subprocess.run(["uptime"], capture_output=True, text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        line = ""
    try:
        avg = list(os.getloadavg())
    except OSError:
        avg = None
    return {"loadavg": avg, "uptime": line}


def floor_ns(repeat, n=100_000, calls=20):
    rng = np.random.Generator(np.random.PCG64(1))
    buf = np.empty(n)

    def draw():
        for _ in range(calls):
            rng.standard_normal(out=buf)
    return best(draw, repeat, time.process_time) / (calls * n) * 1e9


# ------------------------------------------------------------- numpy loops
def baoab_numpy_ns(n_particles, n_steps, repeat, k=1e-6, m=1e-14, gamma=1e-8, dt=1e-6):
    rng = np.random.Generator(np.random.PCG64(2))
    c = math.exp(-gamma * dt / m)
    s = math.sqrt((1 - c * c) * KT / m)

    def loop():
        x = np.zeros(n_particles)
        v = np.zeros(n_particles)
        xi = np.empty(n_particles)
        f = -k * x
        for _ in range(n_steps):
            v += 0.5 * dt * f / m
            x += 0.5 * dt * v
            rng.standard_normal(out=xi)
            v *= c
            v += s * xi
            x += 0.5 * dt * v
            f = -k * x
            v += 0.5 * dt * f / m
    return best(loop, repeat, time.process_time) / (n_particles * n_steps) * 1e9


def em_double_well_numpy_ns(n_particles, n_steps, repeat, barrier, L, k, gamma=1e-8, dt=1e-5):
    rng = np.random.Generator(np.random.PCG64(3))
    half = L / 2
    amp = math.sqrt(2 * KT * dt / gamma)

    def loop():
        x = np.zeros((n_particles, 3))
        xi = np.empty_like(x)
        for _ in range(n_steps):
            q = x[:, 0] / half
            f = -k * x
            f[:, 0] = -4 * barrier * (q * q - 1) * q / half
            rng.standard_normal(out=xi)
            x += dt / gamma * f + amp * xi
    return best(loop, repeat, time.process_time) / (n_particles * n_steps) * 1e9


# ------------------------------------------------------------------ configs
def baoab_config(n):
    """1D harmonic trap, underdamped BAOAB (mass 1e-14 kg, friction 1e-8 kg/s)."""
    return {"seed": 1, "particles": {"count": n, "friction": 1e-8, "mass": 1e-14},
            "potential": [{"type": "harmonic", "stiffness": 1e-6}],
            "dynamics": {"regime": "underdamped", "dt": 1e-6, "steps": 1000}}


DW = {"barrier": 5 * KT, "separation": 1e-6, "stiffness": 1e-6}


def double_well_config(n):
    """3D double well (barrier 5 kT, minima 1 um apart), overdamped Euler-Maruyama."""
    return {"seed": 1, "particles": {"count": n, "dimensions": 3, "friction": 1e-8},
            "potential": [{"type": "double-well", **DW}],
            "dynamics": {"dt": 1e-5, "steps": 1000}}


def startup_config():
    """configs/silica-trap.toml (the README demo: overdamped, built-in terms), 1000 steps."""
    import tomllib
    with open(os.path.join(ROOT, "configs", "silica-trap.toml"), "rb") as fh:
        cfg = tomllib.load(fh)
    cfg["dynamics"].pop("duration", None)
    cfg["dynamics"]["steps"] = 1000
    return cfg


# ------------------------------------------------------------------ langsim
def langsim_ns(cfg, threads, n_steps, repeat, clock):
    from langsim import engine
    sim = engine.Simulation(cfg, threads=threads)
    state = sim.initial_state()
    return best(lambda: sim.advance(state, n_steps), repeat, clock) / (
        n_steps * state.n_particles) * 1e9


def burst_us(n, repeat):
    """(wall us, CPU us) of one 100-step burst of n particles (default threads)."""
    from langsim import engine
    sim = engine.Simulation(baoab_config(n))
    state = sim.initial_state()
    wall = best(lambda: sim.advance(state, BURST_STEPS), repeat, time.perf_counter)
    cpu = best(lambda: sim.advance(state, BURST_STEPS), repeat, time.process_time)
    return wall * 1e6, cpu * 1e6


# ---------------------------------------------------------------- start-up
_CHILD = r'''
import json, sys, time
t_wall, t_cpu = time.perf_counter(), time.process_time()
phases = []
def mark(name):
    global t_wall, t_cpu
    w, c = time.perf_counter(), time.process_time()
    phases.append({"phase": name, "wall_s": w - t_wall, "cpu_s": c - t_cpu})
    t_wall, t_cpu = w, c
from numba.core import event
compiled, stack, llvm = [], [], [0.0, None]
class Compiles(event.Listener):
    def on_start(self, ev):
        d = ev.data.get("dispatcher") if isinstance(ev.data, dict) else None
        stack.append((getattr(getattr(d, "py_func", None), "__qualname__", "?"), time.perf_counter()))
    def on_end(self, ev):
        name, t0 = stack.pop()
        compiled.append({"function": name, "depth": len(stack), "s": time.perf_counter() - t0})
class Llvm(event.Listener):
    def on_start(self, ev):
        llvm[1] = time.perf_counter()
    def on_end(self, ev):
        llvm[0] += time.perf_counter() - llvm[1]
event.register("numba:compile", Compiles())
event.register("numba:llvm_lock", Llvm())
mark("import numba")
import langsim
from langsim import config, engine
mark("import langsim (config, engine)")
cfg = json.loads(sys.argv[1])
spec = config.load(cfg)
sim = engine.Simulation(spec)
mark("config + Simulation")
sim.initial_state()
mark("equilibrium sampler")
sim.compile()
mark("kernel")
if sys.argv[2] == "full":
    traj = langsim.run(cfg, progress=False)
    mark("run (1000 steps)")
    langsim.check(traj)
    mark("check (imports analysis)")
json.dump({"phases": phases, "compiled": compiled, "llvm_lock_s": llvm[0]}, sys.stdout)
'''


def startup(cache_dir, cfg=None, full=True):
    """The child's phases in a fresh process using ``cache_dir`` (NUMBA_CACHE_DIR unset).

    ``cfg``: the config (default: :func:`startup_config`); ``full``: also run it and check
    the result (else stop after compiling the kernel)."""
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["LANGSIM_CACHE_DIR"] = cache_dir
    t0 = time.perf_counter()
    cfg = startup_config() if cfg is None else cfg
    out = subprocess.run([sys.executable, "-c", _CHILD, json.dumps(cfg), "full" if full else "kernel"],
                         capture_output=True, text=True, env=env, cwd=tempfile.gettempdir())
    wall = time.perf_counter() - t0
    if out.returncode != 0:
        raise RuntimeError(f"start-up child failed:\n{out.stderr}")
    result = json.loads(out.stdout)
    result["process_wall_s"] = wall
    result["total_cpu_s"] = sum(p["cpu_s"] for p in result["phases"])
    result["total_wall_s"] = sum(p["wall_s"] for p in result["phases"])
    return result


def compile_summary(compiled, min_s=0.05):
    """Top-level compiles and the functions compiled inside them (depth 1), slowest first."""
    rows = [c for c in compiled if c["depth"] <= 1 and c["s"] >= min_s]
    return sorted(rows, key=lambda c: (c["depth"], -c["s"]))


def write_results(name, load_before, load_after, **fields):
    """benchmarks/results/``name``: the date, the machine load, versions, then ``fields``."""
    import numba

    import langsim
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", name), "w") as fh:
        json.dump({"date": time.strftime("%Y-%m-%d %H:%M:%S %z"),
                   "load_before": load_before, "load_after": load_after,
                   "cpu_count": os.cpu_count(), "machine": platform.platform(),
                   "python": sys.version.split()[0], "numpy": np.__version__,
                   "numba": numba.__version__, "langsim": langsim.__version__, **fields},
                  fh, indent=2)


# -------------------------------------------------------------------- main
def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer steps and repeats (a smoke run)")
    ap.add_argument("--repeat", type=int, default=5, help="repeats per timing (best is kept)")
    ap.add_argument("--no-startup", action="store_true", help="skip the fresh-process start-up rows")
    args = ap.parse_args(argv)
    scale = 10 if args.quick else 1
    repeat = 2 if args.quick else args.repeat
    load_before = machine_load()
    floor = floor_ns(repeat)

    cases = [
        ("(i) 1D harmonic BAOAB, 100,000 particles", baoab_config(100_000), 200 // scale, 1,
         lambda: baoab_numpy_ns(100_000, 100 // scale, repeat), True),
        ("(ii) 1D harmonic BAOAB, 1 particle", baoab_config(1), 1_000_000 // scale, 1,
         lambda: baoab_numpy_ns(1, 20_000 // scale, repeat), False),
        ("(iii) 3D double-well Euler-Maruyama, 10,000 particles", double_well_config(10_000),
         200 // scale, 3,
         lambda: em_double_well_numpy_ns(10_000, 100 // scale, repeat, DW["barrier"],
                                         DW["separation"], DW["stiffness"]), True),
    ]
    rows = []
    for name, cfg, n_steps, variates, numpy_loop, threaded in cases:
        cpu1 = langsim_ns(cfg, 1, n_steps, repeat, time.process_time)
        wall1 = langsim_ns(cfg, 1, n_steps, repeat, time.perf_counter)
        wall2 = langsim_ns(cfg, 2, n_steps, repeat, time.perf_counter) if threaded else None
        ref = numpy_loop()
        f = floor * variates
        rows.append({"case": name, "steps_per_burst": n_steps, "variates_per_particle_step": variates,
                     "floor_ns": f, "numpy_loop_cpu_ns": ref,
                     "langsim_1thread_cpu_ns": cpu1, "langsim_1thread_wall_ns": wall1,
                     "langsim_2threads_wall_ns": wall2,
                     "x_floor_1thread": cpu1 / f, "x_floor_2threads": None if wall2 is None else wall2 / f,
                     "faster_than_numpy": ref / cpu1,
                     "thread_scaling": None if wall2 is None else wall1 / wall2})

    bursts = []
    for n in BURST_PARTICLES:
        wall, cpu = burst_us(n, max(3, (200 if n <= 16 else 20) // scale))
        f_us = floor * n * BURST_STEPS * 1e-3
        bursts.append({"particles": n, "steps": BURST_STEPS, "wall_us": wall, "cpu_us": cpu,
                       "floor_us": f_us, "x_floor_wall": wall / f_us})

    start = None
    if not args.no_startup:
        cache = tempfile.mkdtemp(prefix="langsim-bench-cache-")
        try:
            first = startup(cache)
            second = startup(cache)
        finally:
            shutil.rmtree(cache, ignore_errors=True)
        start = {"config": "configs/silica-trap.toml, 1000 steps", "first": first, "second": second}
    load_after = machine_load()

    # ------------------------------------------------------------- print
    print(f"load: {load_before['uptime'] or load_before['loadavg']}")
    print(f"noise floor: numpy standard_normal {floor:.2f} ns per variate (CPU time); "
          "'floor' below = floor x variates per particle-step")
    print(f"{'case':<54} {'floor':>6} {'numpy':>8} {'1 thr':>6} {'2 thr':>6} {'x floor':>7} "
          f"{'x numpy':>7} {'2/1':>5}")
    for r in rows:
        two = "" if r["langsim_2threads_wall_ns"] is None else f"{r['langsim_2threads_wall_ns']:.1f}"
        sc = "" if r["thread_scaling"] is None else f"{r['thread_scaling']:.2f}"
        print(f"{r['case']:<54} {r['floor_ns']:6.1f} {r['numpy_loop_cpu_ns']:8.1f} "
              f"{r['langsim_1thread_cpu_ns']:6.1f} {two:>6} {r['x_floor_1thread']:7.2f} "
              f"{r['faster_than_numpy']:7.1f} {sc:>5}")
    print("  (ns per particle-step; 1 thr: CPU time, 2 thr: wall time, 2/1: wall 1 thr / wall 2 thr)")
    print(f"burst of {BURST_STEPS} steps, 1D BAOAB (default threads):")
    for b in bursts:
        print(f"  {b['particles']:>5} particles: {b['wall_us']:9.1f} us wall, {b['cpu_us']:9.1f} us CPU,"
              f" floor {b['floor_us']:8.1f} us ({b['x_floor_wall']:.1f} x floor)")
    if start is not None:
        for which in ("first", "second"):
            s = start[which]
            label = "first run, empty cache" if which == "first" else "second run, from the cache"
            print(f"{label} (fresh process; {start['config']}): {s['total_wall_s']:.2f} s wall, "
                  f"{s['total_cpu_s']:.2f} s CPU")
            for p in s["phases"]:
                print(f"    {p['phase']:<34} {p['wall_s']:7.2f} s wall {p['cpu_s']:7.2f} s CPU")
        print("  numba compiles of the first run (s; nested under the function above them):")
        for c in compile_summary(start["first"]["compiled"]):
            print(f"    {'  ' * c['depth']}{c['function']:<36} {c['s']:6.2f}")
        print(f"    LLVM (numba:llvm_lock) {start['first']['llvm_lock_s']:.2f} s in all")
    print(f"load after: {load_after['uptime'] or load_after['loadavg']}")

    write_results("engine.json", load_before, load_after, quick=args.quick, repeat=repeat,
                  floor_ns_per_variate=floor, rows=rows, bursts=bursts, startup=start)

if __name__ == "__main__":
    main()
