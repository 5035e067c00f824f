"""Built-in potential terms, compiled once for every configuration.

Each term is a row of ``params`` (float64) with a type code in ``codes``; the
layout of a row is fixed per code (see :mod:`langsim.potentials`, which writes
the rows). One compiled function serves any sum of built-in terms, so a new
configuration never triggers a recompile.

Row layouts (d = 3 slots per axis, unused axes zero):

========== ==== ============================================================
code       name slots
========== ==== ============================================================
0          harmonic: stiffness[0:3], center[3:6], velocity[6:9],
                amplitude[9:12], frequency[12], phase[13]
1          double-well: barrier[0], separation[1], axis[2], center[3:6],
                transverse stiffness[6:9]
2          periodic: barrier[0], period[1], tilt[2], axis[3], center[4:7]
3          gaussian-well: depth[0], waist[1:4], center[4:7]
4          constant-force: force[0:3] (also gravity, whose row is its force)
5          wall: strength[0], range[1], position[2], axis[3], side[4] (+1 or
                -1), radius[5]
========== ==== ============================================================
"""
import math

import numpy as np
from numba import njit

HARMONIC = 0
DOUBLE_WELL = 1
PERIODIC = 2
GAUSSIAN_WELL = 3
CONSTANT_FORCE = 4
WALL = 5
#: Number of float64 slots in one parameter row.
N_SLOTS = 16

_TWO_PI = 2.0 * math.pi


@njit(inline="always", cache=True)
def _moving_center(params, k, axis, t):
    """Trap centre of term k on ``axis`` at time t: c + v t + A sin(2 pi f t + phase)."""
    return (params[k, 3 + axis] + params[k, 6 + axis] * t
            + params[k, 9 + axis] * math.sin(_TWO_PI * params[k, 12] * t + params[k, 13]))


@njit(cache=True, inline="always")
def builtin_forces(codes, params, X, t, F, energy, with_energy):
    """Forces (and optionally energies) of the built-in terms.

    Parameters
    ----------
    codes : int64 array (n_terms,)
    params : float64 array (n_terms, N_SLOTS)
    X : float64 array (n, d), m
    t : float, s
    F : float64 array (n, d), N; overwritten with -grad U.
    energy : float64 array (n,), J; overwritten when ``with_energy``.
    with_energy : bool

    Written with 2D indexing only (no row views or slice assignments, whose
    reference counting would cost more than the arithmetic for one particle).
    """
    n, d = X.shape
    for i in range(n):
        for a in range(d):
            F[i, a] = 0.0
        if with_energy:
            energy[i] = 0.0
    for k in range(codes.shape[0]):
        code = codes[k]
        if code == HARMONIC:
            for a in range(d):
                kap = params[k, a]
                c = _moving_center(params, k, a, t)
                for i in range(n):
                    s = X[i, a] - c
                    F[i, a] -= kap * s
                    if with_energy:
                        energy[i] += 0.5 * kap * s * s
        elif code == DOUBLE_WELL:
            barrier = params[k, 0]
            half = 0.5 * params[k, 1]
            ax = int(params[k, 2])
            for a in range(d):
                c = params[k, 3 + a]
                if a == ax:
                    for i in range(n):
                        q = (X[i, a] - c) / half
                        w = q * q - 1.0
                        F[i, a] -= 4.0 * barrier * w * q / half
                        if with_energy:
                            energy[i] += barrier * w * w
                else:
                    kap = params[k, 6 + a]
                    for i in range(n):
                        s = X[i, a] - c
                        F[i, a] -= kap * s
                        if with_energy:
                            energy[i] += 0.5 * kap * s * s
        elif code == PERIODIC:
            barrier = params[k, 0]
            wave = _TWO_PI / params[k, 1]
            tilt = params[k, 2]
            ax = int(params[k, 3])
            c = params[k, 4 + ax]
            for i in range(n):
                s = X[i, ax] - c
                F[i, ax] += tilt - 0.5 * barrier * wave * math.sin(wave * s)
                if with_energy:
                    energy[i] += 0.5 * barrier * (1.0 - math.cos(wave * s)) - tilt * s
        elif code == GAUSSIAN_WELL:
            depth = params[k, 0]
            for i in range(n):
                r2 = 0.0
                for a in range(d):
                    s = X[i, a] - params[k, 4 + a]
                    r2 += s * s / (params[k, 1 + a] * params[k, 1 + a])
                g = depth * math.exp(-2.0 * r2)
                for a in range(d):
                    s = X[i, a] - params[k, 4 + a]
                    F[i, a] -= 4.0 * g * s / (params[k, 1 + a] * params[k, 1 + a])
                if with_energy:
                    energy[i] -= g
        elif code == CONSTANT_FORCE:
            for a in range(d):
                fa = params[k, a]
                for i in range(n):
                    F[i, a] += fa
                    if with_energy:
                        energy[i] -= fa * X[i, a]
        elif code == WALL:
            # U = strength exp(-gap/range), gap = side (x_axis - position) - radius
            strength = params[k, 0]
            decay = params[k, 1]
            position = params[k, 2]
            ax = int(params[k, 3])
            side = params[k, 4]
            radius = params[k, 5]
            for i in range(n):
                u = strength * math.exp(-(side * (X[i, ax] - position) - radius) / decay)
                F[i, ax] += side * u / decay
                if with_energy:
                    energy[i] += u


@njit(cache=True)
def no_extra(x, t, force, p):
    """User term of runs with built-in terms only: zero energy, zero force."""
    for a in range(x.shape[0]):
        force[a] = 0.0
    return 0.0


@njit(cache=True)
def no_coordinate(x, p):
    """Stop coordinate of runs without a user coordinate (never called)."""
    return 0.0
