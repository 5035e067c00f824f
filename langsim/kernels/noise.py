"""Counter-based Gaussian noise: Philox4x64-10 feeding Box-Muller.

The normal variate for (key, particle, step, component) is a pure function of
those integers, so results do not depend on thread count, chunking or resume
point. The variate of ``step`` n is lane ``n % 4`` of the Philox block with
counter ``(n // 4, particle, component, stream)``; lanes (0, 1) and (2, 3) are
two Box-Muller pairs [2]: the even lane gives the radius, the odd lane the
angle, and the pair is (r cos a, r sin a).

Everything below is branch-free integer and floating-point arithmetic without
library calls, so that LLVM vectorises the loop over particles in
:func:`fill_tile` (this llvmlite has no vector math library):

* the 128-bit products of Philox are built from 32-bit halves, which x86
  AVX2 multiplies four at a time (``vpmuludq``);
* the uniform of a radius word ``w`` is ``u = (floor(w / 2**12) + 1/2) / 2**52``,
  a midpoint of a 2**52 grid in (0, 1), made exactly by putting the top 52 bits
  of ``w`` into the mantissa of a double in [1, 2);
* ``log(u)`` uses the usual reduction ``u = z 2**k`` with z in [sqrt(1/2),
  sqrt(2)), then ``log z = 2 atanh(s)``, ``s = (z - 1)/(z + 1)``, summed as
  the Taylor series of atanh to s**21 (truncation below 2**-55 relative for
  ``|s| <= 3 - 2 sqrt 2``) [3];
* the angle of a word ``w`` is ``(floor(w / 2**11) + 1/2) / 2**53`` turns; its
  top two bits (rounded) pick the quadrant and the rest is a reduced argument
  ``|t| <= pi/4``, so there is no argument-reduction error at all; sin t and
  cos t are their Taylor polynomials to t**17 and t**18 (truncation below
  1e-16 relative), and the quadrant is applied by swapping and flipping sign
  bits.

The relative error of each variate against the same formula in exact
arithmetic is a few units in the last place (tests/test_noise.py bounds it
against numpy's libm-based log, sin and cos). No ``fastmath``: every operation
is a correctly rounded IEEE operation, so vector and scalar code paths agree
bit for bit.

References
----------
.. [1] J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, "Parallel random
       numbers: as easy as 1, 2, 3", Proc. SC'11 (2011): Philox4x64-10.
.. [2] G. E. P. Box, M. E. Muller, Ann. Math. Stat. 29, 610 (1958).
.. [3] J.-M. Muller, "Elementary Functions: Algorithms and Implementation",
       3rd ed., Birkhauser (2016): range reduction of log, exp and the
       trigonometric functions, and their polynomial approximations.
"""
import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

_M0 = np.uint64(0xD2E7470EE14C6C93)
_M1 = np.uint64(0xCA5A826395121157)
_W0 = np.uint64(0x9E3779B97F4A7C15)
_W1 = np.uint64(0xBB67AE8584CAA73B)
_LO32 = np.uint64(0xFFFFFFFF)
_U0 = np.uint64(0)
_U1 = np.uint64(1)
_S11 = np.uint64(11)
_S12 = np.uint64(12)
_S32 = np.uint64(32)
_S62 = np.uint64(62)
_S63 = np.uint64(63)
#: Bits of 1.0: or-ing 52 random bits into them gives a double in [1, 2).
_ONE_BITS = np.uint64(0x3FF0000000000000)
#: w + 2**61 rounds w to the nearest quarter turn when shifted by 62.
_EIGHTH_TURN = np.uint64(1 << 61)
#: Bits of 1.5 * 2**52: adding a signed integer |j| < 2**51 to them and
#: reading the result as a double gives 1.5 * 2**52 + j exactly.
_MAGIC_BITS = np.int64(0x4338000000000000)
_MAGIC = 6755399441055744.0
#: Bits of (just below) sqrt(1/2): the lower end of the reduced log argument.
_SQRT_HALF_BITS = np.int64(0x3FE6A09E667F3BCD)
_EXP_MASK = np.int64(-(1 << 52))  # 0xFFF0000000000000: sign and exponent
_S52 = np.int64(52)
_S11I = np.int64(11)
_LN2 = math.log(2.0)
#: 1 - 2**-53: x - this maps x = 1 + j 2**-52 to (j + 1/2) 2**-52, exactly.
_ONE_MINUS_HALF_ULP = 1.0 - 2.0 ** -53
#: One turn in radians over 2**53.
_TURN_UNIT = 2.0 * math.pi * 2.0 ** -53

# Taylor coefficients, correctly rounded (int / int true division).
_A3, _A5, _A7, _A9, _A11, _A13, _A15, _A17, _A19, _A21 = (
    1 / n for n in (3, 5, 7, 9, 11, 13, 15, 17, 19, 21))
_S3, _S5, _S7, _S9, _S11C, _S13, _S15, _S17 = (
    (-1) ** j / math.factorial(2 * j + 1) for j in range(1, 9))
_C2, _C4, _C6, _C8, _C10, _C12, _C14, _C16, _C18 = (
    (-1) ** j / math.factorial(2 * j) for j in range(1, 10))

#: Counter word 3 of the dynamics noise is ``STREAM_DYNAMICS + BRANCH_STRIDE * branch``
#: (branch 0 for a plain run: the bits of langsim 0.1). Counter word 2 is the
#: component, below 2**32; the Brownian-bridge test draws its uniforms with
#: word 2 = ``BRIDGE_COMPONENT``, so they never coincide with a dynamics variate.
STREAM_DYNAMICS = 0
BRANCH_STRIDE = 1 << 8
BRIDGE_COMPONENT = np.uint64(1 << 40)
#: Below this many particles a tile's noise is vectorised over steps.
SMALL_TILE = 4


@intrinsic
def _as_double(typingctx, bits):
    """Reinterpret the 64 bits of an integer as a double (no conversion)."""
    if bits not in (types.uint64, types.int64):
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())
    return types.float64(bits), codegen


@intrinsic
def _as_bits(typingctx, x):
    """Reinterpret the 64 bits of a double as a uint64 (no conversion)."""
    if x != types.float64:
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.IntType(64))
    return types.uint64(x), codegen


@njit(inline="always", cache=True)
def _mulhilo(a, b):
    """High and low 64-bit words of the 128-bit product a*b, from 32-bit halves."""
    a_lo = a & _LO32
    a_hi = a >> _S32
    b_lo = b & _LO32
    b_hi = b >> _S32
    t = a_lo * b_lo
    u = a_hi * b_lo + (t >> _S32)
    w1 = (u & _LO32) + a_lo * b_hi
    hi = a_hi * b_hi + (u >> _S32) + (w1 >> _S32)
    return hi, (w1 << _S32) | (t & _LO32)


@njit(inline="always", cache=True)
def _round(c0, c1, c2, c3, k0, k1):
    hi0, lo0 = _mulhilo(_M0, c0)
    hi1, lo1 = _mulhilo(_M1, c2)
    return hi1 ^ c1 ^ k0, lo1, hi0 ^ c3 ^ k1, lo0


@njit(inline="always", cache=True)
def philox4x64(c0, c1, c2, c3, k0, k1):
    """One Philox4x64-10 block: four uint64 words from a counter and a key."""
    # Written out so that no loop is left inside the caller's particle loop.
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0, k1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + _W0, k1 + _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(2) * _W0, k1 + np.uint64(2) * _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(3) * _W0, k1 + np.uint64(3) * _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(4) * _W0, k1 + np.uint64(4) * _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(5) * _W0, k1 + np.uint64(5) * _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(6) * _W0, k1 + np.uint64(6) * _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(7) * _W0, k1 + np.uint64(7) * _W1)
    c0, c1, c2, c3 = _round(c0, c1, c2, c3, k0 + np.uint64(8) * _W0, k1 + np.uint64(8) * _W1)
    return _round(c0, c1, c2, c3, k0 + np.uint64(9) * _W0, k1 + np.uint64(9) * _W1)


@njit(inline="always", cache=True)
def uniform_open(w):
    """(floor(w / 2**12) + 1/2) / 2**52: a double in (0, 1), exact."""
    return _as_double((w >> _S12) | _ONE_BITS) - _ONE_MINUS_HALF_ULP


@njit(inline="always", cache=True)
def log_unit(u):
    """Natural log of a positive normal double, branch-free (see module notes)."""
    ix = np.int64(_as_bits(u))
    tmp = ix - _SQRT_HALF_BITS
    k = tmp >> _S52
    z = _as_double(ix - (tmp & _EXP_MASK))
    kf = _as_double(k + _MAGIC_BITS) - _MAGIC
    f = z - 1.0
    s = f / (2.0 + f)
    s2 = s * s
    s4 = s2 * s2
    s8 = s4 * s4
    # Estrin's scheme: short dependency chains keep the FP pipes busy.
    p = ((_A3 + s2 * _A5) + s4 * (_A7 + s2 * _A9)
         + s8 * ((_A11 + s2 * _A13) + s4 * (_A15 + s2 * _A17))
         + (s8 * s8) * (_A19 + s2 * _A21))
    return kf * _LN2 + (2.0 * s + 2.0 * s * s2 * p)


@njit(inline="always", cache=True)
def _sin_cos_reduced(t):
    """sin t and cos t for |t| <= pi/4 (Taylor polynomials)."""
    z = t * t
    z2 = z * z
    z4 = z2 * z2
    # Estrin's scheme, as in log_unit.
    ps = ((_S3 + z * _S5) + z2 * (_S7 + z * _S9)
          + z4 * ((_S11C + z * _S13) + z2 * (_S15 + z * _S17)))
    pc = ((_C2 + z * _C4) + z2 * (_C6 + z * _C8)
          + z4 * ((_C10 + z * _C12) + z2 * (_C14 + z * _C16)) + (z4 * z4) * _C18)
    return t + t * z * ps, 1.0 + z * pc


@njit(inline="always", cache=True)
def cos_sin_turn(w):
    """cos and sin of the angle (floor(w / 2**11) + 1/2) 2**-53 turns."""
    q = (w + _EIGHTH_TURN) >> _S62
    rest = np.int64(w - (q << _S62)) >> _S11I
    t = (_as_double(rest + _MAGIC_BITS) - _MAGIC + 0.5) * _TURN_UNIT
    sn, cs = _sin_cos_reduced(t)
    sb = _as_bits(sn)
    cb = _as_bits(cs)
    swap = _U0 - (q & _U1)
    keep = ~swap
    cos_bits = ((cb & keep) | (sb & swap)) ^ ((((q + _U1) >> _U1) & _U1) << _S63)
    sin_bits = ((sb & keep) | (cb & swap)) ^ ((q >> _U1) << _S63)
    return _as_double(cos_bits), _as_double(sin_bits)


@njit(inline="always", cache=True)
def box_muller(w_radius, w_angle):
    """Two independent N(0, 1) variates from two uint64 words."""
    r = math.sqrt(-2.0 * log_unit(uniform_open(w_radius)))
    c, s = cos_sin_turn(w_angle)
    return r * c, r * s


@njit(inline="always", cache=True)
def normals4(k0, k1, c0, c1, c2, c3):
    """Four independent N(0, 1) variates from one Philox block."""
    w0, w1, w2, w3 = philox4x64(c0, c1, c2, c3, k0, k1)
    z0, z1 = box_muller(w0, w1)
    z2, z3 = box_muller(w2, w3)
    return z0, z1, z2, z3


@njit(cache=True, nogil=True, error_model="numpy")
def fill_tile(k0, k1, ids, p0, n, n_comp, step0, nb, buf, stream):
    """Noise of steps step0 .. step0+nb-1 for particles p0 .. p0+n-1.

    ``buf[s, i, c]`` is the variate of (particle ``ids[p0+i]``, step step0+s,
    component c) in the given ``stream`` (counter word 3). ``ids`` (uint64)
    are the particles' noise identities: ``arange`` for a plain run, walker
    ids for a rare-event driver, so that a particle's noise does not depend on
    where it sits in a batch.

    The four variates of one Philox block are made for all ``n`` particles in
    one branch-free loop (which LLVM vectorises), into a scratch row per lane,
    then copied to the steps of the block that lie in the requested range.
    Tiles of fewer than ``SMALL_TILE`` particles (a single long trajectory)
    vectorise over the blocks of steps instead; both orders evaluate the same
    IEEE operations, so the variates are the same bits.
    Not inlined: it keeps its own ``error_model="numpy"`` (no zero-division
    branch in the log), whatever the caller's options.
    """
    q_first = step0 >> 2
    q_end = (step0 + nb + 3) >> 2
    n_q = q_end - q_first
    small = n < SMALL_TILE
    # one row of Philox counters at a time: blocks of steps of one particle (small tiles),
    # or one block of steps of every particle; one loop (inlined once) makes the variates
    n_rows, m = (n, n_q) if small else (n_q, n)
    ctr = np.empty((2, m), dtype=np.uint64)
    lanes = np.empty((4, m))
    offset = step0 - 4 * q_first
    for c in range(n_comp):
        cu = np.uint64(c)
        for row in range(n_rows):
            if small:
                for j in range(m):
                    ctr[0, j] = np.uint64(q_first + j)
                    ctr[1, j] = ids[p0 + row]
            else:
                for j in range(m):
                    ctr[0, j] = np.uint64(q_first + row)
                    ctr[1, j] = ids[p0 + j]
            for j in range(m):
                z0, z1, z2, z3 = normals4(k0, k1, ctr[0, j], ctr[1, j], cu, stream)
                lanes[0, j] = z0
                lanes[1, j] = z1
                lanes[2, j] = z2
                lanes[3, j] = z3
            if small:
                for s in range(nb):
                    j = offset + s
                    buf[s, row, c] = lanes[j & 3, j >> 2]
            else:
                first = 4 * row - offset
                for lane in range(max(0, -first), min(4, nb - first)):
                    s = first + lane
                    for i in range(n):
                        buf[s, i, c] = lanes[lane, i]


@njit(cache=True)
def _tile(k0, k1, ids, n_comp, step0, nb, stream):
    buf = np.empty((nb, ids.shape[0], n_comp))
    fill_tile(k0, k1, ids, 0, ids.shape[0], n_comp, step0, nb, buf, stream)
    return buf


def normals(key, particle, component, step0, n, stream=0):
    """Python helper: the ``n`` variates of one particle component (dynamics stream by default).

    Parameters
    ----------
    key : tuple of two int
        Philox key words (uint64).
    particle, component, step0, n : int
    stream : int, default 0
        Counter word 3 (see :data:`STREAM_DYNAMICS`).

    Returns
    -------
    ndarray of float64, shape (n,)
        Variates of steps ``step0 .. step0 + n - 1``.
    """
    ids = np.array([particle], dtype=np.uint64)
    buf = _tile(np.uint64(key[0]), np.uint64(key[1]), ids, component + 1, step0, n,
                np.uint64(stream))
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
