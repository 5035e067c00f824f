"""The tile loop: one compiled kernel advances a block of particles by many steps.

Every scheme, recorder and stop condition runs in the same loop; they are
stages given as data (the engine builds the arrays, :mod:`langsim.schemes`
holds what each scheme means):

* **scheme step** (``scheme``, ``coef``, ``letters``):
  ``RULE``, overdamped x <- x + (dt/gamma) F + amp (xi_n + w1 xi_{n+1}) with
  (w1 = 0: Euler-Maruyama; w1 = 1 and amp halved: Leimkuhler-Matthews [1, 2]);
  ``SPLITTING``, underdamped letters A (x += h v), B (v += (h/m) F) and O
  (v <- c v + a xi, exact Ornstein-Uhlenbeck) with per-letter, per-axis
  coefficients, e.g. BAOAB [1]; ``EXACT_OD`` / ``EXACT_UD``, the exact
  transition of the linear (Ornstein-Uhlenbeck) process,
  z <- M z + g(t) + L xi with g(t) = a + b t + sum_o p_o sin(w_o t + phi_o)
  + q_o cos(w_o t + phi_o), per axis.
* **friction stage** (kind ``RULE_WALL``): the overdamped Euler-Maruyama rule
  with the mobility of a sphere near a plane wall at the current height h
  (:func:`langsim.kernels.walls.wall_mobility`): per particle and step,
  x_a <- x_a + mu_a(h) dt F_a + sqrt(2 kT mu_a(h) dt) xi_a, plus along the
  wall normal the Ito drift kT (d mu_perp/dz) dt [3, 4], without which the
  stationary density is exp(-U/kT)/D instead of Boltzmann's. Row 1 of
  ``coef`` holds the wall (``W_AXIS``, ...); the other kinds never read it and
  their kernels do not contain the stage.
* **recorders** (``rec_int``, ``rec_w``, ``rec_acc``, ``rec_out``): frame k of
  recorder r has taps at step counts offset + k period + i spacing,
  i < n_taps; mode ``SUM`` keeps sum_i w_i x(tap i) (a snapshot is one tap
  of weight 1, an exposure average the trapezoid weights over every step of
  the window), mode ``SEQUENCE`` keeps every tap (samples along the path).
  Partial frames live in ``rec_acc``, which persists across calls (and
  checkpoints); completed frames go to ``rec_out``.
* **stop condition** (``stop_int``, ``stop_real``): a particle stops, keeping
  its state, when its coordinate (an axis, the distance from a centre, or a
  user coordinate) reaches ``below`` or ``above``; optionally the
  Brownian-bridge test also stops it when the path may have crossed between
  two steps.
* **status per particle**: ``RUNNING``, ``BELOW``, ``ABOVE`` or ``NONFINITE``
  with the step count at which it changed in ``event_step``. Stopped and
  failed particles no longer move; the other particles of their tile run on.

Particles are processed in tiles of ``TILE``: the noise of a block of
``BLOCK`` steps is generated for the whole tile into a small buffer, then the
steps are applied element by element over the tile, so that the inner loops
vectorise. Stopped particles are masked with exact arithmetic (x + 0 * dx,
or the blend 1 * new + 0 * old), so a running particle's numbers are the same
bits whether or not its neighbours stopped.

The kernel is serial and releases the GIL: the engine runs blocks of tiles in
threads, and small batches call it directly, with no thread pool.

References
----------
.. [1] B. Leimkuhler, C. Matthews, "Rational construction of stochastic
       numerical methods for molecular sampling", Appl. Math. Res. Express
       2013(1), 34 (2013).
.. [2] B. Leimkuhler, C. Matthews, M. V. Tretyakov, Proc. R. Soc. A 470,
       20140120 (2014).
.. [3] D. L. Ermak, J. A. McCammon, "Brownian dynamics with hydrodynamic
       interactions", J. Chem. Phys. 69, 1352 (1978).
.. [4] A. W. C. Lau, T. C. Lubensky, "State-dependent diffusion: thermodynamic
       consistency and its path integral formulation", Phys. Rev. E 76, 011123
       (2007).
"""
import math

import numpy as np
from numba import njit

from .forces import builtin_forces, no_coordinate, no_extra
from .noise import BRIDGE_COMPONENT, fill_tile, philox4x64, uniform_open
from .walls import wall_mobility

#: Scheme kinds.
RULE = 0
SPLITTING = 1
EXACT_OD = 2
EXACT_UD = 3
RULE_WALL = 4
#: Slots of ``coef[1, :, 0]`` of kind ``RULE_WALL``: the wall normal, the wall
#: plane's coordinate (m), side (+1 beads above it, -1 below), bead radius (m),
#: and kT dt/gamma0 (m^2, the drift's factor; 0 switches the drift off).
W_AXIS, W_POSITION, W_SIDE, W_RADIUS, W_DRIFT = range(5)
#: Splitting letters.
LETTER_A = 0
LETTER_B = 1
LETTER_O = 2
#: Per-particle status.
RUNNING = 0
BELOW = 1
ABOVE = 2
NONFINITE = 3
#: Recorder modes and sources.
SUM = 0
SEQUENCE = 1
SOURCE_POSITIONS = 0
SOURCE_VELOCITIES = 1
#: Columns of a recorder row (``rec_int``).
R_MODE, R_SOURCE, R_PERIOD, R_OFFSET, R_TAPS, R_SPACING, R_FIRST, R_COUNT, R_BASE = range(9)
N_REC_COLUMNS = 9
#: Stop kinds and the layout of ``stop_int`` (kind, axis, bridge) and
#: ``stop_real`` (below, above, centre x, y, z, diffusion coefficient for the bridge).
STOP_NONE = 0
STOP_AXIS = 1
STOP_RADIUS = 2
STOP_USER = 3
#: Particles per tile.
TILE = 64
#: Steps of noise generated per block.
BLOCK = 64

#: Template globals. ``_forces``, ``_coordinate`` and ``advance`` below are the
#: template of the kernel: :mod:`langsim.kernels.specialise` compiles a copy of
#: them per scheme kind (``KIND``, so that numba prunes the other kinds' code)
#: and per set of user terms (``extra_force``, ``extra_coordinate``, ``HAS_EXTRA``).
KIND = RULE
extra_force = no_extra
extra_coordinate = no_coordinate
HAS_EXTRA = False
STOPS = True


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
def _first_tap(rec_int, r, c):
    """(frame, tap, step count) of the first tap of recorder r at or after step count c.

    When a frame's taps span a whole period (an exposure of the whole frame interval), its
    last tap and the next frame's first share a step count; the earlier frame's comes first.
    """
    period, offset = rec_int[r, R_PERIOD], rec_int[r, R_OFFSET]
    n_taps, spacing = rec_int[r, R_TAPS], rec_int[r, R_SPACING]
    if c <= offset:
        return 0, 0, offset
    rel = c - offset
    k = rel // period
    j = rel - k * period
    if j == 0 and k > 0 and (n_taps - 1) * spacing == period:
        return k - 1, n_taps - 1, c
    i = (j + spacing - 1) // spacing
    if i < n_taps:
        return k, i, offset + k * period + i * spacing
    return k + 1, 0, offset + (k + 1) * period


@njit(inline="always", cache=True)
def _next_tap(rec_int, r, k, i, c):
    """(frame, tap, step count) of recorder r's tap after tap i of frame k (at step count c)."""
    if i + 1 < rec_int[r, R_TAPS]:
        return k, i + 1, c + rec_int[r, R_SPACING]
    return k + 1, 0, rec_int[r, R_OFFSET] + (k + 1) * rec_int[r, R_PERIOD]


@njit(cache=True, nogil=True, _nrt=False)
def _tap(r, k, i, rec_int, rec_w, rec_acc, rec_out, X, V, p0, n_total):
    """Apply tap i of frame k of recorder r to the tile's X or V (n, d); store a completed frame.

    Called, not inlined (the tile loop stays smaller and compiles faster), and compiled
    without reference counting (``_nrt=False``: it allocates nothing and its caller holds
    every array), which makes a call cost about 25 ns instead of 70 ns, what recording
    every step of a single particle pays per frame.
    """
    n, d = X.shape
    velocities = rec_int[r, R_SOURCE] == SOURCE_VELOCITIES
    if rec_int[r, R_MODE] == SUM:
        w = rec_w[r, i]
        for p in range(n):
            for a in range(d):
                value = V[p, a] if velocities else X[p, a]
                if i == 0:
                    rec_acc[r, 0, p0 + p, a] = w * value
                else:
                    rec_acc[r, 0, p0 + p, a] += w * value
        kept = 1
    else:
        for p in range(n):
            for a in range(d):
                rec_acc[r, i, p0 + p, a] = V[p, a] if velocities else X[p, a]
        kept = rec_int[r, R_TAPS]
    if i == rec_int[r, R_TAPS] - 1:
        f = k - rec_int[r, R_FIRST]
        if 0 <= f < rec_int[r, R_COUNT]:
            for j in range(kept):
                base = rec_int[r, R_BASE] + (f * kept + j) * n_total * d
                for p in range(n):
                    for a in range(d):
                        rec_out[base + (p0 + p) * d + a] = rec_acc[r, j, p0 + p, a]


@njit(cache=True, nogil=True)
def _mark_nonfinite(X, V, live, dead, status, event_step, p0, count):
    """Mark the tile's particles with a non-finite coordinate as ``NONFINITE`` at step count
    ``count``, zero their state and mask them; returns how many were running.

    A cold path, compiled once and called (not inlined) from the tile loop.
    """
    n, d = X.shape
    newly = 0
    for i in range(n):
        bad = False
        for a in range(d):
            if not (math.isfinite(X[i, a]) and math.isfinite(V[i, a])):
                bad = True
        if bad and status[p0 + i] == RUNNING:
            status[p0 + i] = NONFINITE
            event_step[p0 + i] = count
            newly += 1
        if bad:
            for a in range(d):
                live[i * d + a] = 0.0
                dead[i * d + a] = 1.0
                X[i, a] = 0.0
                V[i, a] = 0.0
    return newly


def _coordinate(stop_int, stop_real, extra_params, X, i):
    """The stop coordinate of particle i of the tile."""
    kind = stop_int[0]
    if kind == STOP_AXIS:
        return X[i, stop_int[1]]
    if kind == STOP_RADIUS:
        r2 = 0.0
        for a in range(X.shape[1]):
            s = X[i, a] - stop_real[2 + a]
            r2 += s * s
        return math.sqrt(r2)
    return extra_coordinate(X[i], extra_params)


@njit(cache=True)
def _bridge_hit(k0, k1, stream, pid, count, q_prev, q, below, above, diffusion, dt):
    """Brownian-bridge test between two steps that reached neither level: BELOW, ABOVE or RUNNING.

    For Brownian motion with diffusion coefficient D pinned at q_prev and q
    over dt, both on the inner side of a level L, the probability that the
    path touched L in between is exp(-(L - q_prev)(L - q) / (D dt)) (the
    distribution of the maximum of a Brownian bridge; common practice in
    first-passage simulation). The two uniforms come from their own Philox
    counter (component word ``BRIDGE_COMPONENT``).
    """
    scale = diffusion * dt
    arg_hi = (above - q_prev) * (above - q) / scale if above < math.inf else math.inf
    arg_lo = (q_prev - below) * (q - below) / scale if below > -math.inf else math.inf
    if arg_hi > 40.0 and arg_lo > 40.0:
        return RUNNING
    w0, w1, w2, w3 = philox4x64(np.uint64(count), pid, BRIDGE_COMPONENT, stream, k0, k1)
    if arg_hi <= 40.0 and uniform_open(w0) < math.exp(-arg_hi):
        return ABOVE
    if arg_lo <= 40.0 and uniform_open(w1) < math.exp(-arg_lo):
        return BELOW
    return RUNNING


def advance(x, v, ids, status, event_step, p_begin, p_end, step0, n_steps, dt,
            k0, k1, stream, coef, letters, codes, params, extra_params,
            rec_int, rec_w, rec_acc, rec_out, include_start, stop_int, stop_real):
    """Advance particles ``p_begin .. p_end - 1`` from step count ``step0`` by ``n_steps``, in place.

    Parameters
    ----------
    x, v : float64 (n, d), C order
        Positions and velocities (v unused but present for overdamped kinds).
    ids : uint64 (n,)
        Noise identity of each particle (counter word 1).
    status, event_step : int64 (n,)
        Per-particle status and the step count at which it was set.
    step0, n_steps : int
        The state is at step count ``step0``; afterwards at ``step0 + n_steps``.
    dt : float
        Step, s (time of step count c is c dt).
    k0, k1 : uint64
        Philox key. ``stream`` (uint64) is counter word 3.
    coef, letters
        The scheme's data (rows, 8, d) (see the module notes) and the splitting
        (int64) of the scheme ``KIND`` this copy of the kernel was made for.
    codes, params, extra_params
        Built-in force rows and the user terms' parameter vector.
    rec_int, rec_w, rec_acc, rec_out
        Recorders (rows of ``N_REC_COLUMNS`` ints, tap weights, partial frames
        (R, taps, n, d), flat output of completed frames).
    include_start : bool
        Apply taps at step count ``step0`` itself (the first call of a run).
    stop_int, stop_real
        Stop condition.
    """
    n_total, d = x.shape
    n_rec = rec_int.shape[0]
    n_letters = letters.shape[0]
    if KIND == RULE:
        n_comp = d
        extra = 1 if coef[0, 2, 0] != 0.0 else 0
    elif KIND == RULE_WALL:
        n_comp = d
        extra = 0
    elif KIND == SPLITTING:
        n_o = 0
        for j in range(n_letters):
            if letters[j] == LETTER_O:
                n_o += 1
        n_comp = d * n_o
        extra = 0
    elif KIND == EXACT_OD:
        n_comp = d
        extra = 0
    else:
        n_comp = 2 * d
        extra = 0
    n_osc = coef.shape[0] - 2 if KIND == EXACT_OD or KIND == EXACT_UD else 0
    w_axis, w_position, w_side, w_radius, w_drift = 0, 0.0, 1.0, 0.0, 0.0
    if KIND == RULE_WALL:
        w_axis = int(coef[1, W_AXIS, 0])
        w_position = coef[1, W_POSITION, 0]
        w_side = coef[1, W_SIDE, 0]
        w_radius = coef[1, W_RADIUS, 0]
        w_drift = coef[1, W_DRIFT, 0] * w_side
    stop_kind = stop_int[0]
    bridge = stop_int[2] != 0
    below = stop_real[0]
    above = stop_real[1]
    bridge_d = stop_real[5]
    p0 = p_begin
    while p0 < p_end:
        n = min(TILE, p_end - p0)
        nd = n * d
        X = x[p0:p0 + n].copy()
        V = v[p0:p0 + n].copy()
        F = np.zeros((n, d))
        Fx = np.empty(d)
        energy = np.empty(n)
        buf = np.empty((BLOCK + 1, n, max(n_comp, 1)))
        noise = buf.reshape((BLOCK + 1, n * max(n_comp, 1)))
        xf = X.reshape(nd)
        vf = V.reshape(nd)
        ff = F.reshape(nd)
        xbits = xf.view(np.uint64)
        vbits = vf.view(np.uint64)
        # per-element coefficients: element e = i d + a
        live = np.ones(nd)
        dead = np.zeros(nd)
        c1 = np.empty((max(n_letters, 2), nd))
        c2 = np.empty((max(n_letters, 2), nd))
        where = np.empty((max(n_letters, 1), nd), dtype=np.int64)
        if KIND == RULE or KIND == RULE_WALL:
            for e in range(nd):
                c1[0, e] = coef[0, 0, e % d]
                c2[0, e] = coef[0, 1, e % d]
        elif KIND == SPLITTING:
            o_index = 0
            for j in range(n_letters):
                for e in range(nd):
                    c1[j, e] = coef[j, 0, e % d]
                    c2[j, e] = coef[j, 1, e % d]
                if letters[j] == LETTER_O:
                    for i in range(n):
                        for a in range(d):
                            where[j, i * d + a] = i * n_comp + o_index * d + a
                    o_index += 1
        n_live = 0
        for i in range(n):
            if status[p0 + i] != RUNNING:
                for a in range(d):
                    live[i * d + a] = 0.0
                    dead[i * d + a] = 1.0
                    if status[p0 + i] == NONFINITE:
                        X[i, a] = 0.0
                        V[i, a] = 0.0
            else:
                n_live += 1
        q_prev = np.zeros(n)
        if STOPS and stop_kind != STOP_NONE:
            for i in range(n):
                q_prev[i] = _coordinate(stop_int, stop_real, extra_params, X, i)
        gx = np.zeros(d)
        gv = np.zeros(d)
        # recorders: the next tap of each
        tap_k = np.zeros(max(n_rec, 1), dtype=np.int64)
        tap_i = np.zeros(max(n_rec, 1), dtype=np.int64)
        tap_c = np.zeros(max(n_rec, 1), dtype=np.int64)
        for r in range(n_rec):
            k, i, c = _first_tap(rec_int, r, step0 if include_start else step0 + 1)
            tap_k[r], tap_i[r], tap_c[r] = k, i, c
            while include_start and tap_c[r] == step0:     # (two taps when frames share a step)
                k, i = tap_k[r], tap_i[r]
                _tap(r, k, i, rec_int, rec_w, rec_acc, rec_out, X, V, p0, n_total)
                tap_k[r], tap_i[r], tap_c[r] = _next_tap(rec_int, r, k, i, step0)
        force_valid = False
        done = 0
        while done < n_steps:
            if n_live == 0 and n_rec == 0:
                break
            nb = min(BLOCK, n_steps - done)
            first = step0 + done
            fill_tile(k0, k1, ids, p0, n, n_comp, first, nb + extra, buf, stream)
            for s in range(nb):
                step = first + s
                # ---------------------------------------------------- scheme step
                # (2D indexing, no row views: a view per letter and step costs more
                # than the arithmetic of a one-particle tile)
                if KIND == RULE:
                    _forces(codes, params, extra_params, X, step * dt, F, Fx, energy)
                    if extra:
                        for e in range(nd):
                            xf[e] += live[e] * (c1[0, e] * ff[e]
                                                + c2[0, e] * (noise[s, e] + noise[s + 1, e]))
                    else:
                        for e in range(nd):
                            xf[e] += live[e] * (c1[0, e] * ff[e] + c2[0, e] * noise[s, e])
                elif KIND == RULE_WALL:
                    # friction stage: mobility factors at the current height, noise
                    # sqrt(2 kT mu dt), Ito drift kT dmu/dz dt along the normal
                    _forces(codes, params, extra_params, X, step * dt, F, Fx, energy)
                    for i in range(n):
                        par, perp, slope = wall_mobility(w_side * (X[i, w_axis] - w_position),
                                                         w_radius)
                        root_par = math.sqrt(par)
                        root_perp = math.sqrt(perp)
                        for a in range(d):
                            e = i * d + a
                            if a == w_axis:
                                xf[e] += live[e] * (perp * c1[0, e] * ff[e]
                                                    + root_perp * c2[0, e] * noise[s, e]
                                                    + w_drift * slope)
                            else:
                                xf[e] += live[e] * (par * c1[0, e] * ff[e]
                                                    + root_par * c2[0, e] * noise[s, e])
                elif KIND == SPLITTING:
                    elapsed = 0.0
                    for j in range(n_letters):
                        letter = letters[j]
                        if letter == LETTER_A:
                            for e in range(nd):
                                xf[e] += live[e] * (c1[j, e] * vf[e])
                            elapsed += coef[j, 2, 0]
                            force_valid = False
                        elif letter == LETTER_B:
                            if not force_valid:
                                _forces(codes, params, extra_params, X, (step + elapsed) * dt, F,
                                        Fx, energy)
                                force_valid = True
                            for e in range(nd):
                                vf[e] += live[e] * (c1[j, e] * ff[e])
                        else:
                            for e in range(nd):
                                new = c1[j, e] * vf[e] + c2[j, e] * noise[s, where[j, e]]
                                vf[e] = live[e] * new + dead[e] * vf[e]
                else:
                    t = step * dt
                    for a in range(d):
                        gx[a] = coef[1, 0, a] + coef[1, 1, a] * t
                        gv[a] = coef[1, 2, a] + coef[1, 3, a] * t
                    for o in range(n_osc):
                        ph = coef[2 + o, 4, 0] * t + coef[2 + o, 5, 0]
                        sn = math.sin(ph)
                        cs = math.cos(ph)
                        for a in range(d):
                            gx[a] += coef[2 + o, 0, a] * sn + coef[2 + o, 1, a] * cs
                            gv[a] += coef[2 + o, 2, a] * sn + coef[2 + o, 3, a] * cs
                    if KIND == EXACT_OD:
                        for i in range(n):
                            for a in range(d):
                                e = i * d + a
                                new = coef[0, 0, a] * xf[e] + gx[a] + coef[0, 4, a] * noise[s, e]
                                xf[e] = live[e] * new + dead[e] * xf[e]
                    else:
                        for i in range(n):
                            for a in range(d):
                                e = i * d + a
                                z0 = noise[s, i * n_comp + a]
                                z1 = noise[s, i * n_comp + d + a]
                                nx = (coef[0, 0, a] * xf[e] + coef[0, 1, a] * vf[e] + gx[a]
                                      + coef[0, 4, a] * z0)
                                nv = (coef[0, 2, a] * xf[e] + coef[0, 3, a] * vf[e] + gv[a]
                                      + coef[0, 5, a] * z0 + coef[0, 6, a] * z1)
                                xf[e] = live[e] * nx + dead[e] * xf[e]
                                vf[e] = live[e] * nv + dead[e] * vf[e]
                count = step + 1
                # ---------------------------------------------------- status
                if _any_nonfinite(xbits) or _any_nonfinite(vbits):
                    n_live -= _mark_nonfinite(X, V, live, dead, status, event_step, p0, count)
                    force_valid = False
                if STOPS and stop_kind != STOP_NONE:
                    for i in range(n):
                        if status[p0 + i] != RUNNING:
                            continue
                        q = _coordinate(stop_int, stop_real, extra_params, X, i)
                        hit = RUNNING
                        if q <= below:
                            hit = BELOW
                        elif q >= above:
                            hit = ABOVE
                        elif bridge:
                            hit = _bridge_hit(k0, k1, stream, ids[p0 + i], count, q_prev[i], q,
                                              below, above, bridge_d, dt)
                        q_prev[i] = q
                        if hit != RUNNING:
                            status[p0 + i] = hit
                            event_step[p0 + i] = count
                            n_live -= 1
                            for a in range(d):
                                live[i * d + a] = 0.0
                                dead[i * d + a] = 1.0
                # ---------------------------------------------------- recorders
                for r in range(n_rec):
                    while count == tap_c[r]:     # (two taps when frames share a step)
                        k, i = tap_k[r], tap_i[r]
                        _tap(r, k, i, rec_int, rec_w, rec_acc, rec_out, X, V, p0, n_total)
                        tap_k[r], tap_i[r], tap_c[r] = _next_tap(rec_int, r, k, i, count)
            done += nb
        for i in range(n):
            if status[p0 + i] == NONFINITE:
                for a in range(d):
                    X[i, a] = math.nan
                    V[i, a] = math.nan
        for i in range(n):      # element loops: a slice assignment compiles a shape-error message
            for a in range(d):
                x[p0 + i, a] = X[i, a]
                v[p0 + i, a] = V[i, a]
        p0 += n
