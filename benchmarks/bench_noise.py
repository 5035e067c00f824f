"""Cost of the dynamics noise, in ns per variate, and of whole 1D steps.

Rows (one thread, best of ``--repeat`` timings in process CPU time, so that other
processes on a shared machine do not count):

* ``numpy floor``: ``Generator.standard_normal(out=buf)`` into 100,000 doubles;
* ``legacy fill_tile``: the first implementation (scalar Philox and libm
  Box-Muller), loaded from git commit ``LEGACY_COMMIT`` when available;
* ``fill_tile``: the current kernel, 64 particles x 64 steps per call;
* ``fill_tile, 1 particle``: the same for a tile of one particle (variates
  vectorised over blocks of steps);
* ``philox words``: Philox4x64-10 alone, one word per variate;
* ``box_muller``: the polynomial transform alone, on stored words;
* ``libm box_muller``: the same transform with math.log/sqrt/cos/sin;
* ``BAOAB`` / ``Euler-Maruyama``: :meth:`langsim.engine.Simulation.advance` with
  one harmonic term, ``--particles`` particles in 1D, in ns per particle-step.

Usage: ``python benchmarks/bench_noise.py [--repeat 5] [--steps 1000]``. The
table is printed and written to ``benchmarks/results/noise.json``.
"""
import argparse
import importlib.util
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time

import numba
import numpy as np
from numba import njit

from langsim.kernels import noise, schemes

LEGACY_COMMIT = "78f9ce6"
HERE = os.path.dirname(os.path.abspath(__file__))
KEY = (np.uint64(0x1234567), np.uint64(0x89ABCDEF))


def best(fn, repeat):
    fn()
    times = []
    for _ in range(repeat):
        t = time.process_time()
        fn()
        times.append(time.process_time() - t)
    return min(times)


def legacy_module():
    """The first noise.py, from git, as a module (None if git is unavailable)."""
    try:
        src = subprocess.run(["git", "show", f"{LEGACY_COMMIT}:langsim/kernels/noise.py"],
                             cwd=HERE, capture_output=True, text=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    path = os.path.join(tempfile.mkdtemp(), "legacy_noise.py")
    with open(path, "w") as f:
        f.write(src)
    spec = importlib.util.spec_from_file_location("legacy_noise", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def legacy_runner(fill):
    """Calls of the legacy ``fill_tile(k0, k1, p0, n, n_comp, step0, nb, buf)``."""
    @njit
    def run(k0, k1, n_tiles, buf):
        nb, n, n_comp = buf.shape
        for t in range(n_tiles):
            fill(k0, k1, t * n, n, n_comp, 0, nb, buf)
    return run


@njit
def _tile_runner(k0, k1, n_tiles, buf, ids):
    """Calls of the current ``fill_tile`` (particle ids, dynamics stream)."""
    nb, n, n_comp = buf.shape
    for t in range(n_tiles):
        noise.fill_tile(k0, k1, ids, t * n, n, n_comp, 0, nb, buf, np.uint64(0))


@njit(error_model="numpy")
def _philox_words(k0, k1, n_rep, out):
    n = out.shape[1]
    for r in range(n_rep):
        q = np.uint64(r)
        for i in range(n):
            w0, w1, w2, w3 = noise.philox4x64(q, np.uint64(i), np.uint64(0), np.uint64(0), k0, k1)
            out[0, i] = w0
            out[1, i] = w1
            out[2, i] = w2
            out[3, i] = w3


@njit(error_model="numpy")
def _transform(n_rep, words, z):
    n = words.shape[1]
    for r in range(n_rep):
        for i in range(n):
            z[0, i], z[1, i] = noise.box_muller(words[0, i], words[1, i])


@njit(error_model="numpy")
def _transform_libm(n_rep, words, z):
    n = words.shape[1]
    for r in range(n_rep):
        for i in range(n):
            u = noise.uniform_open(words[0, i])
            a = 2.0 * math.pi * noise.uniform_open(words[1, i])
            rad = math.sqrt(-2.0 * math.log(u))
            z[0, i] = rad * math.cos(a)
            z[1, i] = rad * math.sin(a)


def step_costs(n_particles, n_steps, repeat):
    """ns per particle-step of BAOAB and Euler-Maruyama, 1D harmonic trap, one thread."""
    from langsim import engine
    costs = []
    for regime in ("underdamped", "overdamped"):
        cfg = {"seed": 1, "particles": {"count": n_particles, "friction": 1.0, "mass": 1.0},
               "potential": [{"type": "harmonic", "stiffness": 1.0}],
               "dynamics": {"regime": regime, "dt": 0.1, "steps": n_steps}}
        sim = engine.Simulation(cfg, threads=1)
        state = sim.initial_state()
        costs.append(best(lambda: sim.advance(state, n_steps), repeat)
                     * 1e9 / (n_particles * n_steps))
    return tuple(costs)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--steps", type=int, default=1000)
    ap.add_argument("--particles", type=int, default=100_000)
    args = ap.parse_args(argv)
    k0, k1 = KEY
    rows = {}

    n_floor = 100_000
    gen = np.random.default_rng(1)
    fbuf = np.empty(n_floor)
    rows["numpy floor"] = best(lambda: [gen.standard_normal(out=fbuf) for _ in range(50)],
                               args.repeat) / (50 * n_floor) * 1e9

    buf = np.empty((schemes.BLOCK, schemes.TILE, 1))
    n_tiles = 400
    per_tile = 1e9 / (n_tiles * buf.size)
    legacy = legacy_module()
    if legacy is not None:
        run = legacy_runner(legacy.fill_tile)
        rows["legacy fill_tile"] = best(lambda: run(k0, k1, n_tiles, buf), args.repeat) * per_tile
    ids = np.arange(4 * n_tiles * schemes.TILE, dtype=np.uint64)
    rows["fill_tile"] = best(lambda: _tile_runner(k0, k1, n_tiles * 4, buf, ids),
                             args.repeat) * per_tile / 4
    one = np.empty((schemes.BLOCK, 1, 1))
    rows["fill_tile, 1 particle"] = best(lambda: _tile_runner(k0, k1, 100_000, one, ids),
                                         args.repeat) * 1e9 / (100_000 * one.size)

    n_rep = 20_000
    words = np.empty((4, 64), dtype=np.uint64)
    rows["philox words"] = best(lambda: _philox_words(k0, k1, n_rep, words),
                                args.repeat) / (n_rep * words.size) * 1e9
    z = np.empty((2, 64))
    rows["box_muller"] = best(lambda: _transform(n_rep, words, z),
                              args.repeat) / (n_rep * z.size) * 1e9
    rows["libm box_muller"] = best(lambda: _transform_libm(n_rep, words, z),
                                   args.repeat) / (n_rep * z.size) * 1e9

    baoab, em = step_costs(args.particles, args.steps, max(2, args.repeat // 2))
    floor = rows["numpy floor"]
    print(f"{'row':<22}{'ns':>9}{'x floor':>9}")
    for name, ns in rows.items():
        print(f"{name:<22}{ns:>9.2f}{ns / floor:>9.2f}   per variate")
    for name, ns in (("BAOAB step", baoab), ("Euler-Maruyama step", em)):
        print(f"{name:<22}{ns:>9.2f}{ns / floor:>9.2f}   per 1D particle-step")
    result = {
        "ns_per_variate": rows,
        "ns_per_particle_step": {"BAOAB": baoab, "Euler-Maruyama": em},
        "particles": args.particles, "steps": args.steps, "threads": 1, "clock": "process CPU time",
        "loadavg": list(os.getloadavg()),
        "tile": schemes.TILE, "block": schemes.BLOCK,
        "machine": platform.processor() or platform.machine(),
        "numba": numba.__version__, "numpy": np.__version__,
        "python": sys.version.split()[0],
    }
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", "noise.json"), "w") as f:
        json.dump(result, f, indent=2)


if __name__ == "__main__":
    main()
