"""Walkers for the rate drivers: the stepping interface, the engine behind it,
and equilibrium starts in the start basin.

The drivers (:mod:`langsim.rates.methods`) need one operation only::

    status, steps = stepper.advance(positions, velocities, ids, branch, n_steps, below, above)

It advances a batch of walkers in place by up to ``n_steps`` steps; a walker
stops at the first step its (signed) coordinate is <= ``below`` or >=
``above`` (or, overdamped with the bridge test on, when the Brownian bridge
between two steps touched a level) and keeps that state. ``status`` is
RUNNING, BELOW, ABOVE or NONFINITE per walker and ``steps`` the steps each took.
With ``record=True`` it also returns the positions (and velocities) after
every step, shape (n_steps, n, d) (a stopped walker's frames repeat its state).
``ids`` (uint64) and ``branch`` are the walkers' noise identity: a new branch
per call, and a new id per walker lineage, give every path segment fresh,
reproducible noise.
"""
import math

import numpy as np

from .. import potentials as _pot
from .. import seeding
from ..validation import ConfigError

RUNNING, BELOW, ABOVE, NONFINITE = 0, 1, 2, 3
#: Grid points of the inverse-CDF sampling of the basin's Boltzmann density.
GRID_POINTS = 1 << 16


def rates_rng(seed, spawn_key=()):
    """numpy Generator of the rate drivers' own choices (starts, resampling): the "rates" stream."""
    return np.random.Generator(np.random.Philox(seeding.child(seed, spawn_key, "rates")))


class EngineStepper:
    """The stepping interface on the engine's ``Simulation.advance`` with a ``StopCondition``."""

    def __init__(self, simulation, coordinate, bridge):
        from .. import engine
        self.sim = simulation
        self.StopCondition, self.Recorder = engine.StopCondition, engine.Recorder
        self.coordinate = coordinate
        spec = simulation.spec
        self.underdamped = spec.dynamics.regime == "underdamped"
        # the bridge test needs the diffusion along the coordinate: axes and the radius only
        self.bridge = bool(bridge) and not self.underdamped and coordinate.kind != "formula"
        self.dt = spec.dynamics.dt
        # a formula coordinate is stopped on by the engine's compiled formula stage
        self.stop_coordinate = coordinate.formula if coordinate.kind == "formula" else coordinate.name

    def advance(self, positions, velocities, ids, branch, n_steps, below, above, record=False):
        c = self.coordinate
        lo, hi = (below, above) if c.sign > 0 else (-above, -below)
        state = self.sim.state(positions, velocities if self.underdamped else None, ids=ids, branch=branch)
        stop = self.StopCondition(self.stop_coordinate, below=lo, above=hi,
                                  center=tuple(c.center) + (0.0,) * 3, bridge=self.bridge)
        recorders = ()
        if record:
            recorders = (self.Recorder("positions", period=1),)
            if self.underdamped:
                recorders += (self.Recorder("velocities", source="velocities", period=1, units="m/s"),)
        burst = self.sim.advance(state, int(n_steps), stop=stop, record=recorders)
        positions[:] = state.positions
        if self.underdamped:
            velocities[:] = state.velocities
        status = np.asarray(state.status, dtype=np.int64).copy()
        if c.sign < 0:
            status = np.where(status == BELOW, ABOVE, np.where(status == ABOVE, BELOW, status))
        steps = np.where(status == RUNNING, int(n_steps), state.event_step).astype(np.int64)
        if not record:
            return status, steps
        return (status, steps, burst.frames["positions"],
                burst.frames["velocities"] if self.underdamped else None)


# ------------------------------------------------------------- basin sampling
def _cdf(grid, weight):
    cdf = np.concatenate(([0.0], np.cumsum(0.5 * (weight[1:] + weight[:-1]) * np.diff(grid))))
    if not cdf[-1] > 0:
        raise ConfigError("[escape] start: the start basin holds no Boltzmann weight")
    return cdf / cdf[-1]


class BasinSampler:
    """Positions from the Boltzmann density of the start basin {coordinate on the near side of start}.

    Exact (inverse CDF on a fine grid) when the coordinate is an axis and every
    term separates by axis, or when it is the radius and every term is
    isotropic about the centre; otherwise Metropolis chains confined to the
    basin (a burn-in of ``MCMC_BURN`` sweeps, then one sample per
    ``MCMC_THIN`` sweeps per chain).
    """

    MCMC_CHAINS = 256
    MCMC_BURN = 4000
    MCMC_THIN = 50

    def __init__(self, spec, escape, rng):
        self.spec, self.escape, self.rng = spec, escape, rng
        self.d = d = spec.particles.dimensions
        self.kT = spec.kT
        self.terms = [t.static() for t in spec.terms]
        c = escape.coordinate
        self.mode = "mcmc"
        if c.kind == "axis" and all(t.separable for t in self.terms):
            self.mode = "axis"
        elif c.kind == "radius":
            try:
                self.U_r = _pot.radial_profile(self.terms, c.center, d)
                self.mode = "radius"
            except ValueError:
                pass
        if self.mode == "axis":
            self._axis_setup()
        elif self.mode == "radius":
            r = np.linspace(0.0, escape.start, GRID_POINTS)
            u = self.U_r(r) / self.kT
            self.r_grid, self.r_cdf = r, _cdf(r, r ** (d - 1) * np.exp(-(u - u.min())))
        else:
            self._mcmc_setup()

    def _axis_setup(self):
        from ..initial import sample_axis
        esc, c = self.escape, self.escape.coordinate
        a = c.axis
        ranges = [r for r in (t.sampling_range(a, self.kT) for t in self.terms) if r is not None]
        side = 0 if c.sign > 0 else 1                  # the basin is below start (+) or above it (-)
        if not ranges:
            raise ConfigError(f"[escape] start = {esc.start!r}: no term confines axis {c.name} on the "
                              "far side of the start basin, so it has no equilibrium; add a confining "
                              "term or choose coordinate = 'radius'")
        far = min(r[0] for r in ranges) if side == 0 else max(r[1] for r in ranges)
        lo, hi = sorted((far, esc.start))
        if not hi > lo:
            raise ConfigError(f"[escape] start = {esc.start!r}: the start basin lies outside the region "
                              f"where the potential holds the particle ({far:.4g} m)")
        grid = np.linspace(lo, hi, GRID_POINTS)
        u = _pot.axis_profile(self.terms, a, self.d)(grid) / self.kT
        self.x_grid, self.x_cdf = grid, _cdf(grid, np.exp(-(u - u.min())))
        self.sample_axis = sample_axis

    def _mcmc_setup(self):
        esc, c = self.escape, self.escape.coordinate
        candidates = [np.array(t.center, dtype=float)[:self.d] for t in self.terms
                      if getattr(t, "center", None) is not None]
        init = self.spec.particles.initial
        if not isinstance(init, str) and np.ndim(init) == 1:
            candidates.insert(0, np.array(init, dtype=float))
        candidates.append(np.zeros(self.d))
        inside = [p for p in candidates if c(p[None])[0] < esc.start_signed]
        if not inside:
            raise ConfigError(f"[escape] start = {esc.start!r}: no term centre (nor [particles] initial) lies "
                              "inside the start basin; give [particles] initial as a point inside it")
        kappa = float(np.max(self.spec.curvature())) if self.spec.terms else 0.0
        self.step_size = 0.5 * math.sqrt(self.kT / kappa) if kappa > 0 else 0.1 * abs(
            esc.start_signed - c(inside[0][None])[0])
        self.chains = np.repeat(inside[0][None], self.MCMC_CHAINS, axis=0)
        self.chain_u = _pot.total_energy(self.terms, self.chains) / self.kT
        self._sweep(self.MCMC_BURN)

    def _sweep(self, n):
        c, edge = self.escape.coordinate, self.escape.start_signed
        accepted = 0
        for _ in range(n):
            prop = self.chains + self.step_size * self.rng.standard_normal(self.chains.shape)
            u = _pot.total_energy(self.terms, prop) / self.kT
            ok = (c(prop) < edge) & (np.log(self.rng.random(len(u))) < self.chain_u - u)
            self.chains[ok], self.chain_u[ok] = prop[ok], u[ok]
            accepted += int(ok.sum())
        return accepted / max(1, n * len(self.chain_u))

    def positions(self, n):
        """``n`` positions (n, d), m, from the basin's Boltzmann density."""
        d, c, rng = self.d, self.escape.coordinate, self.rng
        if self.mode == "axis":
            x = np.zeros((n, d))
            for a in range(d):
                if a == c.axis:
                    x[:, a] = np.interp(rng.random(n), self.x_cdf, self.x_grid)
                else:
                    values = self.sample_axis(self.terms, a, d, self.kT, rng.random(n))
                    if values is not None:
                        x[:, a] = values
            return x
        if self.mode == "radius":
            r = np.interp(rng.random(n), self.r_cdf, self.r_grid)
            if d == 1:
                direction = np.where(rng.random(n) < 0.5, -1.0, 1.0)[:, None]
            else:
                direction = rng.standard_normal((n, d))
                direction /= np.linalg.norm(direction, axis=1)[:, None]
            return np.asarray(c.center)[None, :] + r[:, None] * direction
        out = []
        while sum(len(o) for o in out) < n:
            self._sweep(self.MCMC_THIN)
            out.append(self.chains.copy())
        return np.concatenate(out)[:n]

    def velocities(self, n):
        """Maxwell-Boltzmann velocities (n, d), m/s (underdamped), else zeros."""
        if self.spec.dynamics.regime != "underdamped":
            return np.zeros((n, self.d))
        return self.rng.standard_normal((n, self.d)) * math.sqrt(self.kT / self.spec.particles.mass)
