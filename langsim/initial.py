"""Initial states: a point, given positions, or the Boltzmann distribution.

Where every term separates by axis, equilibrium positions are drawn exactly
(up to the grid) by inverse transform sampling of each axis' Boltzmann density
on a fine grid; wells of finite depth (Gaussian) are sampled within their own
basin; a periodic term without a confining term on its axis is sampled within
one period around its centre (corrugation only; a tilt has no equilibrium). An
axis on which no term acts starts at 0. Non-separable potentials are brought to
equilibrium by a burn-in run of the dynamics (see ``[particles] burn_in``).
Velocities are drawn from the Maxwell-Boltzmann distribution.
"""
import math
import threading

import numpy as np

from . import potentials as _pot
from .kernels.forces import builtin_forces
from .validation import ConfigError

#: Grid points per axis for inverse transform sampling.
GRID_POINTS = 1 << 16


def axis_energy(terms, axis, dimensions, grid, time=0.0):
    """Energy (J) of the built-in ``terms`` along ``axis`` on ``grid`` (m), the
    other coordinates held at 0 (for separable terms only an additive constant
    depends on them)."""
    codes, params = _pot.builtin_rows(terms, dimensions)
    return _rows_energy(codes, params, axis, dimensions, grid, time)


def _rows_energy(codes, params, axis, dimensions, grid, time=0.0):
    X = np.zeros((grid.size, dimensions))
    X[:, axis] = grid
    energy = np.empty(grid.size)
    builtin_forces(codes, params, X, time, np.empty_like(X), energy, True)
    return energy


def _axis_range(terms, axis, kT):
    ranges = [r for r in (t.sampling_range(axis, kT) for t in terms) if r is not None]
    bounded = [r for r in ranges if np.all(np.isfinite(r))]
    if bounded:
        lo, hi = min(r[0] for r in bounded), max(r[1] for r in bounded)
    elif ranges:
        # only one-sided terms (a wall): the constant force toward it bounds the other side
        force = sum(t.force[axis] for t in terms if isinstance(t, _pot.ConstantForce))
        lo, hi = max(r[0] for r in ranges), min(r[1] for r in ranges)
        reach = _pot.SAMPLING_CUTOFF_KT * kT / abs(force) if force else math.inf
        if math.isinf(hi) and force < 0:
            hi = lo + reach
        elif math.isinf(lo) and force > 0:
            lo = hi - reach
        else:
            raise ConfigError(f"[particles] initial = 'equilibrium': on axis {axis} a wall confines "
                              "one side only and no constant force (gravity) pushes toward it, so "
                              "there is no equilibrium; give an initial point or add a force")
    if ranges:
        for r in ranges:   # one-sided terms cut the range
            lo, hi = max(lo, r[0]), min(hi, r[1])
        return lo, hi, True
    periodic = [t for t in terms if isinstance(t, _pot.Periodic) and t.axis == axis]
    if periodic:
        lo, hi = periodic[0].period_range()
        return lo, hi, False
    return None


def sample_axis(terms, axis, dimensions, kT, uniforms):
    """Positions on ``axis`` from the Boltzmann density, by inverse CDF.

    Returns None for an axis no term acts on.
    """
    found = _axis_range(terms, axis, kT)
    if found is None:
        forces = [t for t in terms if isinstance(t, _pot.ConstantForce) and t.force[axis] != 0]
        if forces:
            raise ConfigError(f"[particles] initial = 'equilibrium': axis {axis} has a constant "
                              "force and no confining term, so it has no equilibrium; give an "
                              "initial point or add a confining term")
        return None
    lo, hi, confined = found
    use = terms if confined else [t for t in terms if not isinstance(t, _pot.ConstantForce)]
    if not confined:
        use = [_pot.Periodic(t.barrier, t.period, 0.0, t.axis, t.center) if isinstance(t, _pot.Periodic)
               else t for t in use]
    codes, params = _pot.builtin_rows([t.static() for t in use], dimensions)
    key = (codes.tobytes(), params.tobytes(), axis, dimensions, float(lo), float(hi), float(kT))
    with _CDF_LOCK:
        table = _CDF_CACHE.pop(key, None)
    if table is None:
        table = _axis_cdf(codes, params, axis, dimensions, lo, hi, kT)
    with _CDF_LOCK:
        _CDF_CACHE[key] = table                  # most recently used last
        while len(_CDF_CACHE) > CDF_CACHE_SIZE:
            del _CDF_CACHE[next(iter(_CDF_CACHE))]
    cdf, grid = table
    return np.interp(uniforms, cdf, grid)


#: Inverse-CDF tables kept per (potential rows, axis, range, kT): runs that differ only in
#: their seed (replicates of a sweep point) share them. Each is 1 MiB.
CDF_CACHE_SIZE = 16
_CDF_CACHE = {}
_CDF_LOCK = threading.Lock()


def _axis_cdf(codes, params, axis, dimensions, lo, hi, kT):
    """(cdf, grid) of the Boltzmann density on ``axis`` over [lo, hi], read-only arrays."""
    grid = np.linspace(lo, hi, GRID_POINTS)
    energy = _rows_energy(codes, params, axis, dimensions, grid)
    weight = np.exp(-(energy - energy.min()) / kT)
    cdf = np.concatenate(([0.0], np.cumsum(0.5 * (weight[1:] + weight[:-1]) * np.diff(grid))))
    cdf /= cdf[-1]
    cdf.flags.writeable = grid.flags.writeable = False
    return cdf, grid


def initial_positions(spec, rng):
    """Positions (count, dimensions) in m at t = 0, before any burn-in."""
    p = spec.particles
    n, d = p.count, p.dimensions
    if hasattr(p.initial, "draw"):          # a box or disc (langsim.measurement.placement)
        return p.initial.draw(n, d, rng)
    if not isinstance(p.initial, str):
        return np.array(np.broadcast_to(p.initial, (n, d)), dtype=np.float64)
    x = np.zeros((n, d))
    if not spec.terms:
        return x
    if all(t.separable for t in spec.terms):
        kT = spec.noise_kT()   # kT per axis (lower under cold damping)
        for a in range(d):
            values = sample_axis(spec.terms, a, d, kT[a], rng.random(n))
            if values is not None:
                x[:, a] = values
        return x
    # burn-in start: the first centred term's centre
    for t in spec.terms:
        center = getattr(t, "center", None)
        if center is not None:
            x[:] = t.static().center
            break
    return x


def initial_velocities(spec, rng):
    """Maxwell-Boltzmann velocities (count, dimensions) in m/s (at each axis' noise temperature)."""
    p = spec.particles
    return rng.standard_normal((p.count, p.dimensions)) * np.sqrt(spec.noise_kT() / p.mass)
