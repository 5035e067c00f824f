"""Counter-based Gaussian noise: Philox4x64-10 feeding Box-Muller.

The normal variate for (key, particle, step, component) is a pure function of
those integers, so results do not depend on thread count, chunking or resume
point. The variate of ``step`` n is lane ``n % 4`` of the Philox block with
counter ``(n // 4, particle, component, stream)``; lanes (0, 1) and (2, 3) are
two Box-Muller pairs built from 53-bit uniforms in (0, 1).

References
----------
.. [1] J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, "Parallel random
       numbers: as easy as 1, 2, 3", Proc. SC'11 (2011): Philox4x64-10.
.. [2] G. E. P. Box, M. E. Muller, Ann. Math. Stat. 29, 610 (1958).
"""
import math

import numpy as np
from numba import njit

_M0 = np.uint64(0xD2E7470EE14C6C93)
_M1 = np.uint64(0xCA5A826395121157)
_W0 = np.uint64(0x9E3779B97F4A7C15)
_W1 = np.uint64(0xBB67AE8584CAA73B)
_LO32 = np.uint64(0xFFFFFFFF)
_S32 = np.uint64(32)
_S11 = np.uint64(11)
_TWO_M53 = 2.0 ** -53
_TWO_PI = 2.0 * math.pi

#: Counter word 3 of the dynamics noise. Other streams are reserved.
STREAM_DYNAMICS = 0


@njit(inline="always", cache=True)
def _mulhilo(a, b):
    """High and low 64-bit words of the 128-bit product a*b."""
    a_lo = a & _LO32
    a_hi = a >> _S32
    b_lo = b & _LO32
    b_hi = b >> _S32
    t = a_lo * b_lo
    u = a_hi * b_lo + (t >> _S32)
    w1 = (u & _LO32) + a_lo * b_hi
    hi = a_hi * b_hi + (u >> _S32) + (w1 >> _S32)
    return hi, a * b


@njit(inline="always", cache=True)
def philox4x64(c0, c1, c2, c3, k0, k1):
    """One Philox4x64-10 block: four uint64 words from a counter and a key."""
    for r in range(10):
        if r > 0:
            k0 = k0 + _W0
            k1 = k1 + _W1
        hi0, lo0 = _mulhilo(_M0, c0)
        hi1, lo1 = _mulhilo(_M1, c2)
        c0, c1, c2, c3 = hi1 ^ c1 ^ k0, lo1, hi0 ^ c3 ^ k1, lo0
    return c0, c1, c2, c3


@njit(inline="always", cache=True)
def _uniform(w):
    """A uint64 word to a double in the open interval (0, 1), 53 bits."""
    return (np.float64(w >> _S11) + 0.5) * _TWO_M53


@njit(inline="always", cache=True)
def normals4(k0, k1, c0, c1, c2, c3):
    """Four independent N(0, 1) variates from one Philox block."""
    w0, w1, w2, w3 = philox4x64(c0, c1, c2, c3, k0, k1)
    r0 = math.sqrt(-2.0 * math.log(_uniform(w0)))
    a0 = _TWO_PI * _uniform(w1)
    r1 = math.sqrt(-2.0 * math.log(_uniform(w2)))
    a1 = _TWO_PI * _uniform(w3)
    return r0 * math.cos(a0), r0 * math.sin(a0), r1 * math.cos(a1), r1 * math.sin(a1)


@njit(inline="always", cache=True)
def fill_tile(k0, k1, p0, n, n_comp, step0, nb, buf):
    """Noise of steps step0 .. step0+nb-1 for particles p0 .. p0+n-1.

    ``buf[s, i, c]`` is the variate of (particle p0+i, step step0+s, component c).
    """
    stream = np.uint64(STREAM_DYNAMICS)
    for i in range(n):
        pu = np.uint64(p0 + i)
        for c in range(n_comp):
            cu = np.uint64(c)
            s = 0
            step = step0
            while s < nb:
                lane = step & 3
                z0, z1, z2, z3 = normals4(k0, k1, np.uint64(step >> 2), pu, cu, stream)
                while lane < 4 and s < nb:
                    if lane == 0:
                        buf[s, i, c] = z0
                    elif lane == 1:
                        buf[s, i, c] = z1
                    elif lane == 2:
                        buf[s, i, c] = z2
                    else:
                        buf[s, i, c] = z3
                    lane += 1
                    s += 1
                    step += 1


@njit(cache=True)
def _tile(k0, k1, p0, n, n_comp, step0, nb):
    buf = np.empty((nb, n, n_comp))
    fill_tile(k0, k1, p0, n, n_comp, step0, nb, buf)
    return buf


def normals(key, particle, component, step0, n):
    """Python helper: the ``n`` dynamics variates of one particle component.

    Parameters
    ----------
    key : tuple of two int
        Philox key words (uint64).
    particle, component, step0, n : int

    Returns
    -------
    ndarray of float64, shape (n,)
        Variates of steps ``step0 .. step0 + n - 1``.
    """
    buf = _tile(np.uint64(key[0]), np.uint64(key[1]), particle, 1, component + 1, step0, n)
    return buf[:, 0, component].copy()


@njit(cache=True)
def _philox_block(k0, k1, c0, c1, c2, c3):
    w0, w1, w2, w3 = philox4x64(c0, c1, c2, c3, k0, k1)
    out = np.empty(4, dtype=np.uint64)
    out[0] = w0
    out[1] = w1
    out[2] = w2
    out[3] = w3
    return out


def philox_block(key, counter):
    """Python helper: the four raw uint64 words of one Philox4x64-10 block."""
    k = [np.uint64(v) for v in key]
    c = [np.uint64(v) for v in counter]
    return _philox_block(k[0], k[1], c[0], c[1], c[2], c[3])
