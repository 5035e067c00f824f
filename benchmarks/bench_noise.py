"""Cost of the dynamics noise, in ns per variate, and of whole 1D steps.

Rows (one thread, best of ``--repeat`` timings):

* ``numpy floor``: ``Generator.standard_normal(out=buf)`` into 100,000 doubles;
* ``legacy fill_tile``: the first implementation (scalar Philox and libm
  Box-Muller), loaded from git commit ``LEGACY_COMMIT`` when available;
* ``fill_tile``: the current kernel, 64 particles x 64 steps per call;
* ``philox words``: Philox4x64-10 alone, one word per variate;
* ``box_muller``: the polynomial transform alone, on stored words;
* ``libm box_muller``: the same transform with math.log/sqrt/cos/sin;
* ``BAOAB`` / ``Euler-Maruyama``: ``advance_underdamped`` / ``advance_overdamped``
  with one harmonic term, 100,000 particles in 1D, in ns per particle-step.

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
from langsim.kernels.forces import N_SLOTS

LEGACY_COMMIT = "78f9ce6"
HERE = os.path.dirname(os.path.abspath(__file__))
KEY = (np.uint64(0x1234567), np.uint64(0x89ABCDEF))


def best(fn, repeat):
    fn()
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
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


def tile_runner(fill):
    @njit
    def run(k0, k1, n_tiles, buf):
        nb, n, n_comp = buf.shape
        for t in range(n_tiles):
            fill(k0, k1, t * n, n, n_comp, 0, nb, buf)
    return run


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


def harmonic(d=1):
    codes = np.array([0], dtype=np.int64)
    params = np.zeros((1, N_SLOTS))
    params[0, :d] = 1.0
    return codes, params


def step_costs(n_particles, n_steps, repeat):
    """ns per particle-step of BAOAB and Euler-Maruyama, 1D harmonic trap."""
    d = 1
    codes, params = harmonic(d)
    friction = np.ones(d)
    letters = np.array([1, 0, 2, 0, 1], dtype=np.int64)
    fractions = np.array([0.5, 0.5, 1.0, 0.5, 0.5])
    n_tiles = (n_particles + schemes.TILE - 1) // schemes.TILE
    status = np.zeros((n_tiles, 3), dtype=np.int64)
    every = n_steps
    x = np.zeros((n_particles, d))
    v = np.zeros((n_particles, d))
    out_x = np.empty((1, n_particles, d))
    out_v = np.empty_like(out_x)
    k0, k1 = KEY
    no_user_params = np.zeros(0)

    def under():
        schemes.advance_underdamped(x, v, 0, n_steps, 0.1, 1.0, 1.0, friction, friction, letters,
                                    fractions, k0, k1, codes, params, no_user_params, every,
                                    out_x, out_v, True, status)

    def over():
        schemes.advance_overdamped(x, 0, n_steps, 0.1, 1.0, friction, False, k0, k1,
                                   codes, params, no_user_params, every, out_x, status)

    scale = 1e9 / (n_particles * n_steps)
    return best(under, repeat) * scale, best(over, repeat) * scale


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--steps", type=int, default=1000)
    ap.add_argument("--particles", type=int, default=100_000)
    args = ap.parse_args(argv)
    numba.set_num_threads(1)
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
        run = tile_runner(legacy.fill_tile)
        rows["legacy fill_tile"] = best(lambda: run(k0, k1, n_tiles, buf), args.repeat) * per_tile
    run = tile_runner(noise.fill_tile)
    rows["fill_tile"] = best(lambda: run(k0, k1, n_tiles * 4, buf), args.repeat) * per_tile / 4

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
        "particles": args.particles, "steps": args.steps, "threads": 1,
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
