"""Stepping schemes: one compiled call advances every particle by many steps.

The engine owns the loop over chunks, time, recording and sinks; a kernel here
only advances the state. Particles are processed in tiles (``prange`` over
tiles); within a tile the noise of a block of steps is generated into a small
buffer first, then the steps are applied to the whole tile, so every inner
loop runs over particles.

Underdamped schemes are splittings given as data: a sequence of letters
A (drift, x += h v), B (kick, v += h F/m) and O (exact Ornstein-Uhlenbeck
velocity update) with their fractions of the step; "BAOAB" is
B 1/2, A 1/2, O 1, A 1/2, B 1/2 [1]. Overdamped schemes are Euler-Maruyama
and the Leimkuhler-Matthews scheme, which averages the noise of consecutive
steps [1, 2].

Status of a tile: ``status[tile] = (0, -1, -1)`` when it finished, or
``(1, particle, step)`` for the first non-finite position (the step after which
it appeared); that tile stops there.

References
----------
.. [1] B. Leimkuhler, C. Matthews, "Rational construction of stochastic
       numerical methods for molecular sampling", Appl. Math. Res. Express
       2013(1), 34 (2013).
.. [2] B. Leimkuhler, C. Matthews, M. V. Tretyakov, Proc. R. Soc. A 470,
       20140120 (2014).
"""
import math

import numpy as np
from numba import njit, prange

from .forces import builtin_forces, no_extra
from .noise import fill_tile

LETTER_A = 0
LETTER_B = 1
LETTER_O = 2
#: Particles per tile.
TILE = 64
#: Steps of noise generated per block.
BLOCK = 64

#: The user term (see :mod:`langsim.kernels.specialise`, which compiles copies
#: of these kernels with its own ``extra_force``): none in this module.
extra_force = no_extra
HAS_EXTRA = False


@njit(inline="always", cache=True)
def _forces(codes, params, extra_params, X, t, F, Fx, energy):
    builtin_forces(codes, params, X, t, F, energy, False)
    if HAS_EXTRA:
        for i in range(X.shape[0]):
            extra_force(X[i], t, Fx, extra_params)
            for a in range(X.shape[1]):
                F[i, a] += Fx[a]


_EXP_MASK = np.uint64(0x7FF)
_S52 = np.uint64(52)
_S11 = np.uint64(11)
_ONE = np.uint64(1)


@njit(inline="always", cache=True)
def _any_nonfinite(bits):
    """True when a float64 whose raw bits are in ``bits`` is inf or NaN.

    Integer test of the exponent field (all ones), OR-reduced so that it
    vectorises; exact, unlike a floating-point checksum.
    """
    flag = np.uint64(0)
    for j in range(bits.shape[0]):
        flag |= (((bits[j] >> _S52) & _EXP_MASK) + _ONE) >> _S11
    return flag != 0


@njit(inline="always", cache=True)
def _first_nonfinite(X):
    for i in range(X.shape[0]):
        for a in range(X.shape[1]):
            if not math.isfinite(X[i, a]):
                return i
    return -1


@njit(inline="always", cache=True)
def _per_element(per_axis, n):
    """Repeat a per-axis coefficient for the n*d elements of a flat (n, d) tile."""
    d = per_axis.shape[0]
    out = np.empty(n * d)
    for i in range(n):
        for a in range(d):
            out[i * d + a] = per_axis[a]
    return out


@njit(parallel=True, cache=True)
def advance_overdamped(x, step0, n_steps, dt, kT, friction, averaged_noise,
                       k0, k1, codes, params, extra_params, every, out_x, status):
    """Advance overdamped particles by ``n_steps`` steps in place.

    x_{n+1} = x_n + (dt/gamma) F(x_n, t_n) + sqrt(2 kT dt/gamma) eta_n with
    eta_n = xi_n (Euler-Maruyama) or (xi_n + xi_{n+1})/2 (Leimkuhler-Matthews,
    ``averaged_noise``). Positions after steps that are multiples of
    ``every`` are written to ``out_x[frame]``, frame 0 being the first such
    step after ``step0`` (``step0`` itself a multiple of ``every``).
    """
    n_particles, d = x.shape
    n_tiles = (n_particles + TILE - 1) // TILE
    mobility_dt = np.empty(d)
    amp = np.empty(d)
    for a in range(d):
        mobility_dt[a] = dt / friction[a]
        amp[a] = math.sqrt(2.0 * kT * dt / friction[a])
        if averaged_noise:
            amp[a] *= 0.5
    extra = 1 if averaged_noise else 0
    for tile in prange(n_tiles):
        p0 = tile * TILE
        n = min(TILE, n_particles - p0)
        nd = n * d
        X = x[p0:p0 + n].copy()
        F = np.empty((n, d))
        Fx = np.empty(d)
        energy = np.empty(n)
        buf = np.empty((BLOCK + 1, n, d))
        xf = X.reshape(nd)
        ff = F.reshape(nd)
        bits = xf.view(np.uint64)
        noise = buf.reshape((BLOCK + 1, nd))
        mob = _per_element(mobility_dt, n)
        scale = _per_element(amp, n)
        status[tile, 0] = 0
        status[tile, 1] = -1
        status[tile, 2] = -1
        done = 0
        while done < n_steps:
            nb = min(BLOCK, n_steps - done)
            first = step0 + done
            fill_tile(k0, k1, p0, n, d, first, nb + extra, buf)
            failed = False
            for s in range(nb):
                step = first + s
                _forces(codes, params, extra_params, X, step * dt, F, Fx, energy)
                xi = noise[s]
                if averaged_noise:
                    xi1 = noise[s + 1]
                    for j in range(nd):
                        xf[j] += mob[j] * ff[j] + scale[j] * (xi[j] + xi1[j])
                else:
                    for j in range(nd):
                        xf[j] += mob[j] * ff[j] + scale[j] * xi[j]
                if _any_nonfinite(bits):
                    status[tile, 0] = 1
                    status[tile, 1] = p0 + _first_nonfinite(X)
                    status[tile, 2] = step + 1
                    failed = True
                    break
                if (step + 1) % every == 0:
                    frame = (step + 1 - step0) // every - 1
                    out_x[frame, p0:p0 + n, :] = X
            if failed:
                break
            done += nb
        x[p0:p0 + n] = X


@njit(parallel=True, cache=True)
def advance_underdamped(x, v, step0, n_steps, dt, kT, mass, friction, noise_friction,
                        letters, fractions, k0, k1, codes, params, extra_params, every,
                        out_x, out_v, record_v, status):
    """Advance underdamped particles by a splitting scheme, in place.

    ``letters`` (int64) and ``fractions`` (float64) spell the splitting, e.g.
    BAOAB = (B, A, O, A, B) with (0.5, 0.5, 1, 0.5, 0.5). The O letter is the
    exact update v <- c v + sqrt((1 - c^2) kT_noise/m) xi with c = exp(-gamma h/m),
    gamma = ``friction`` (per axis, total damping) and kT_noise = kT
    ``noise_friction``/``friction``: damping without noise (cold damping,
    friction > noise_friction) lowers the axis' temperature; equal arrays give
    the thermal O step. Each O letter of a step draws its own variates
    (components o*d .. o*d+d-1).
    Recorded velocities are those at the end of the full step.
    """
    n_particles, d = x.shape
    n_letters = letters.shape[0]
    n_o = 0
    for j in range(n_letters):
        if letters[j] == LETTER_O:
            n_o += 1
    n_comp = d * n_o
    ou_c = np.empty((n_letters, d))
    ou_amp = np.empty((n_letters, d))
    for j in range(n_letters):
        for a in range(d):
            c = math.exp(-friction[a] * fractions[j] * dt / mass)
            ou_c[j, a] = c
            ratio = noise_friction[a] / friction[a]      # exactly 1.0 without feedback
            ou_amp[j, a] = math.sqrt((1.0 - c * c) * kT * ratio / mass)
    n_tiles = (n_particles + TILE - 1) // TILE
    for tile in prange(n_tiles):
        p0 = tile * TILE
        n = min(TILE, n_particles - p0)
        nd = n * d
        X = x[p0:p0 + n].copy()
        V = v[p0:p0 + n].copy()
        F = np.empty((n, d))
        Fx = np.empty(d)
        energy = np.empty(n)
        buf = np.empty((BLOCK, n, max(n_comp, 1)))
        xf = X.reshape(nd)
        vf = V.reshape(nd)
        ff = F.reshape(nd)
        xbits = xf.view(np.uint64)
        vbits = vf.view(np.uint64)
        # per-element O coefficients, and where each element's variate sits in
        # a flat noise row (index i*n_comp + o*d + a)
        c_el = np.empty((n_letters, nd))
        amp_el = np.empty((n_letters, nd))
        where = np.empty((max(n_o, 1), nd), dtype=np.int64)
        for j in range(n_letters):
            c_el[j] = _per_element(ou_c[j], n)
            amp_el[j] = _per_element(ou_amp[j], n)
        for o in range(n_o):
            for i in range(n):
                for a in range(d):
                    where[o, i * d + a] = i * n_comp + o * d + a
        noise = buf.reshape((BLOCK, n * max(n_comp, 1)))
        status[tile, 0] = 0
        status[tile, 1] = -1
        status[tile, 2] = -1
        force_valid = False
        done = 0
        while done < n_steps:
            nb = min(BLOCK, n_steps - done)
            first = step0 + done
            fill_tile(k0, k1, p0, n, n_comp, first, nb, buf)
            failed = False
            for s in range(nb):
                step = first + s
                elapsed = 0.0
                o_index = 0
                xi = noise[s]
                for j in range(n_letters):
                    h = fractions[j] * dt
                    letter = letters[j]
                    if letter == LETTER_A:
                        for e in range(nd):
                            xf[e] += h * vf[e]
                        elapsed += fractions[j]
                        force_valid = False
                    elif letter == LETTER_B:
                        if not force_valid:
                            _forces(codes, params, extra_params, X, (step + elapsed) * dt, F, Fx,
                                    energy)
                            force_valid = True
                        kick = h / mass
                        for e in range(nd):
                            vf[e] += kick * ff[e]
                    else:
                        cj = c_el[j]
                        aj = amp_el[j]
                        if n_o == 1:
                            for e in range(nd):
                                vf[e] = cj[e] * vf[e] + aj[e] * xi[e]
                        else:
                            wo = where[o_index]
                            for e in range(nd):
                                vf[e] = cj[e] * vf[e] + aj[e] * xi[wo[e]]
                        o_index += 1
                if _any_nonfinite(xbits) or _any_nonfinite(vbits):
                    bad = _first_nonfinite(X)
                    status[tile, 0] = 1
                    status[tile, 1] = p0 + (bad if bad >= 0 else _first_nonfinite(V))
                    status[tile, 2] = step + 1
                    failed = True
                    break
                if (step + 1) % every == 0:
                    frame = (step + 1 - step0) // every - 1
                    out_x[frame, p0:p0 + n, :] = X
                    if record_v:
                        out_v[frame, p0:p0 + n, :] = V
            if failed:
                break
            done += nb
        x[p0:p0 + n] = X
        v[p0:p0 + n] = V
