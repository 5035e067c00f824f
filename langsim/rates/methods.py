"""Escape-rate estimators: the basin run (direct counting and the flux through a
first interface) and adaptive multilevel splitting.

Everything is in the signed coordinate q (see :class:`~langsim.rates.spec.Coordinate`):
the start basin S is q < start, escape is reaching q >= target. The quantity
estimated is the rate k = 1/T, T the mean first-passage time to the target
from the Boltzmann density of S.

**Basin run.** Walkers start from the Boltzmann density of S; a walker that
reaches the target is counted and replaced by a fresh one from that density
(so each walker is a renewal process whose inter-escape times are first-passage
times from the basin's equilibrium, and events per time at risk tend to 1/T
whatever their distribution; the last interval is censored). The same run counts
the crossings of a first interface lambda_0 by walkers that have visited
A = {q <= a} (a < lambda_0) since their last counted crossing, or that are
fresh: the flux Phi = crossings / time, and the states at the crossings.

**Rate from the flux.** Each counted crossing either reaches the target
before A or returns to A and is followed by another counted crossing; one
success per escape. So k = Phi p exactly, p = P(target before A | a crossing
state drawn from the run's flux distribution) (forward flux sampling's
identity, Allen, Valeriani & ten Wolde 2009; reference notes section 12.1).
It holds for any a < lambda_0 < target and any dynamics that is Markov in the
walker's state (positions, and velocities for underdamped dynamics); a and
lambda_0 only decide the cost.

**Adaptive multilevel splitting** (Cerou & Guyader 2007; the generalised form
of Brehier, Gazeau, Goudenege, Lelievre & Rousset 2016, Ann. Appl. Probab. 26,
3559) estimates p: N replicas start at crossing states and run until A or the
target; a replica's score is the highest level of a fixed fine grid
lambda_0 = g_0 < ... < g_K = target it reached. Each iteration kills every
replica whose score is at most the k-th smallest (K_j >= k of them, ties
included) and restarts each from a copy of a uniformly chosen survivor at the
survivor's first state beyond that score, with fresh noise. When the k-th
smallest score reaches the target, p_hat = prod_j (1 - K_j/N) x (replicas at
the target)/N. The estimator is unbiased for any N, k and score function, in
discrete time too (Brehier et al. 2016); the score only changes the variance
(it is smallest when the score is a function of the committor, as the radius
is in an isotropic overdamped well). Its spread is measured, not assumed:
M independent runs from disjoint crossing states give p_bar +- t s/sqrt(M).
"""
import math
import time as _time

import numpy as np
from scipy import stats

from .walkers import ABOVE, BELOW, NONFINITE, RUNNING

#: Limits of the adaptive burst length (steps), and the memory of its running average per call.
MIN_BURST, MAX_BURST, BURST_MEMORY = 16, 4096, 0.9


class RateError(RuntimeError):
    """A rate computation could not go on (a walker blew up, no crossing found, ...)."""


class Budget:
    """Particle-steps and wall time spent, against optional limits; progress reporting."""

    def __init__(self, max_steps=None, max_wall_time=None, progress=None):
        self.max_steps, self.max_wall_time = max_steps, max_wall_time
        self.steps = 0
        self.t0 = _time.perf_counter()
        self.progress = progress
        self.calls = 0

    def spend(self, steps):
        self.steps += int(steps)
        self.calls += 1

    @property
    def wall(self):
        return _time.perf_counter() - self.t0

    def exhausted(self):
        if self.max_steps is not None and self.steps >= self.max_steps:
            return "max_steps"
        if self.max_wall_time is not None and self.wall >= self.max_wall_time:
            return "max_wall_time"
        return None

    def report(self, phase, half_width=None):
        if self.progress is not None:
            self.progress(phase, self.steps, half_width)


class Context:
    """What every method shares: the stepper, the basin sampler, noise ids and the budget."""

    def __init__(self, stepper, sampler, coordinate, rng, budget, burst=256):
        self.stepper, self.sampler, self.coordinate = stepper, sampler, coordinate
        self.rng, self.budget, self.burst = rng, budget, burst
        self.next_id = 0
        self.next_branch = 1        # branch 0 is the plain run's own noise
        self._stops = {}

    def ids(self, n):
        out = np.arange(self.next_id, self.next_id + n, dtype=np.uint64)
        self.next_id += n
        return out

    def advance(self, x, v, ids, n_steps, below, above, kind=None, record=False):
        """One call of the stepper with a fresh branch; returns (status, steps[, frames]).

        With ``kind``, ``n_steps`` is a cap and the burst is sized from the
        calls of that kind so far (see :meth:`burst_for`).
        """
        if kind is not None:
            n_steps = min(int(n_steps), self.burst_for(kind))
        branch = self.next_branch
        self.next_branch += 1
        out = self.stepper.advance(x, v, ids, branch, n_steps, below, above, record=record)
        status, steps = out[0], out[1]
        self.budget.spend(steps.sum())
        if np.any(status == NONFINITE):
            raise RateError("a walker's position became non-finite: reduce [dynamics] dt or check the potential")
        if kind is not None:
            s, e = self._stops.get(kind, (0.0, 0.0))
            self._stops[kind] = (BURST_MEMORY * s + float(steps.sum()),
                                 BURST_MEMORY * e + float(np.count_nonzero(status != RUNNING)))
        return out

    def burst_for(self, kind):
        """Burst length for a kind of call: half the mean steps to a stop seen so far.

        Stopped walkers wait for the rest of a burst, so bursts much longer than
        the typical time to a stop waste work, and much shorter ones cost calls.
        """
        s, e = self._stops.get(kind, (0.0, 0.0))
        if e < 1.0:
            return self.burst
        return int(min(MAX_BURST, max(MIN_BURST, 0.5 * s / e)))


# ------------------------------------------------------------------ basin run
class BasinRun:
    """Walkers in the start basin: escapes (direct counting) and lambda_0 crossings (flux).

    Parameters
    ----------
    ctx : Context
    n_walkers : int
    lam0, a : float
        First interface and the return level (signed coordinate), a < lam0 < target.
    target : float
    keep_states : int
        Crossing states to keep (positions and velocities at the crossing).
    """

    def __init__(self, ctx, n_walkers, lam0, a, target, keep_states=0):
        self.ctx = ctx
        self.lam0, self.a, self.target = lam0, a, target
        self.x = ctx.sampler.positions(n_walkers)
        self.v = ctx.sampler.velocities(n_walkers)
        self.idv = ctx.ids(n_walkers)
        self.armed = np.ones(n_walkers, bool)
        self.steps = np.zeros(n_walkers, np.int64)         # time at risk per walker slot, in steps
        self.crossings = np.zeros(n_walkers, np.int64)
        self.escapes = np.zeros(n_walkers, np.int64)
        self.excursion_steps = 0                           # steps spent disarmed (lambda_0 -> A or target)
        self.keep_states = keep_states
        self.states_x, self.states_v, self.states_walker = [], [], []

    @property
    def n_walkers(self):
        return self.x.shape[0]

    def round(self, n_steps=None):
        """One stepper call per group (armed, disarmed), bursts sized by :meth:`Context.burst_for`.

        A walker that meets an event stops there until the next round; its own
        clock (``steps``) counts only the steps it made, so nothing is lost.
        """
        ctx = self.ctx
        for armed in (True, False):
            sel = np.flatnonzero(self.armed == armed)
            if sel.size == 0:
                continue
            x, v, ids = self.x[sel], self.v[sel], self.idv[sel]
            below, above = (-math.inf, self.lam0) if armed else (self.a, self.target)
            status, steps = ctx.advance(x, v, ids, MAX_BURST, below, above,
                                        kind="armed" if armed else "disarmed")
            self.x[sel], self.v[sel] = x, v
            self.steps[sel] += steps
            hit = sel[status == ABOVE]
            if armed:
                self._crossed(hit)
                q = ctx.coordinate(self.x[hit])
                self._escaped(hit[q >= self.target])
            else:
                self.excursion_steps += int(steps.sum())
                self.armed[sel[status == BELOW]] = True
                self._escaped(hit)

    def _crossed(self, idx):
        self.crossings[idx] += 1
        self.armed[idx] = False
        room = self.keep_states - sum(len(s) for s in self.states_x)
        if room > 0 and idx.size:
            take = idx[:room]
            self.states_x.append(self.x[take].copy())
            self.states_v.append(self.v[take].copy())
            self.states_walker.append(take.copy())

    def _escaped(self, idx):
        if idx.size == 0:
            return
        self.escapes[idx] += 1
        n = idx.size
        self.x[idx] = self.ctx.sampler.positions(n)
        self.v[idx] = self.ctx.sampler.velocities(n)
        self.idv[idx] = self.ctx.ids(n)
        self.armed[idx] = True

    # ---------------------------------------------------------------- results
    def exposure(self, dt):
        return float(self.steps.sum()) * dt

    def direct(self, dt, confidence=0.95):
        """Escape rate from events per time at risk with its exact Poisson interval (1/s)."""
        n, T = int(self.escapes.sum()), self.exposure(dt)
        alpha = 1.0 - confidence
        low = stats.chi2.ppf(alpha / 2, 2 * n) / (2 * T) if n > 0 else 0.0
        high = stats.chi2.ppf(1 - alpha / 2, 2 * n + 2) / (2 * T)
        return {"rate": n / T, "rate_low": low, "rate_high": high, "events": n, "exposure": T}

    def flux(self, dt):
        """Phi = counted crossings / time with its standard error from the walkers as replicas (1/s)."""
        c, t = self.crossings.astype(float), self.steps.astype(float) * dt
        W = len(c)
        phi = c.sum() / t.sum()
        resid = c - phi * t
        err = math.sqrt(np.sum(resid ** 2) / (W * (W - 1))) / t.mean() if W > 1 else math.inf
        return {"flux": phi, "flux_err": err, "crossings": int(c.sum()), "dof": W - 1}

    def take_states(self, n, rng):
        """``n`` kept crossing states (positions, velocities), drawn without replacement."""
        X = np.concatenate(self.states_x) if self.states_x else np.zeros((0, self.x.shape[1]))
        V = np.concatenate(self.states_v) if self.states_v else np.zeros((0, self.x.shape[1]))
        if len(X) < n:
            raise RateError(f"{len(X)} crossing states kept, {n} needed")
        pick = rng.choice(len(X), size=n, replace=False)
        rest = np.setdiff1d(np.arange(len(X)), pick)
        self.states_x, self.states_v = [X[rest]], [V[rest]]
        self.states_walker = [np.concatenate(self.states_walker)[rest]] if self.states_walker else []
        self.keep_states -= n
        return X[pick], V[pick]

    @property
    def kept(self):
        return sum(len(s) for s in self.states_x)


# -------------------------------------------------- adaptive multilevel splitting
class SplittingBatch:
    """M independent AMS runs of N replicas each on one level grid (see the module docstring).

    Arrays are (M, N, ...): ``x``, ``v`` the replicas' current states,
    ``store_x``, ``store_v`` (M, N, K + 1, d) the state at each replica's first
    crossing of each level and ``store_t`` the replica's own step count then,
    ``score`` the highest level index reached. Replicas of all runs advance
    together: the stepper stops each at A or at the target, and the levels in
    between are read from the recorded path (with the Brownian-bridge maximum
    between steps, sampled exactly, when the bridge test is on), so every
    replica has its own levels in one call.
    """

    def __init__(self, levels, x, v, ids, kill, bridge_scale=None):
        M, N, d = x.shape
        self.levels = np.asarray(levels, dtype=float)
        self.top = len(levels) - 1
        self.M, self.N, self.kill = M, N, kill
        self.bridge_scale = bridge_scale          # D dt along the coordinate, or None (no bridge)
        self.x, self.v, self.ids = x.copy(), v.copy(), ids.reshape(M, N).copy()
        self.store_x = np.zeros((M, N, self.top + 1, d))
        self.store_v = np.zeros_like(self.store_x)
        self.store_t = np.zeros((M, N, self.top + 1), np.int64)
        self.store_x[:, :, 0], self.store_v[:, :, 0] = x, v
        self.age = np.zeros((M, N), np.int64)
        self.score = np.zeros((M, N), np.int64)
        self.running = np.ones((M, N), bool)
        self.log_factor = np.zeros(M)
        self.iterations = np.zeros(M, np.int64)
        self.killed = [[] for _ in range(M)]      # (level index, K_j) per iteration
        self.estimate = np.full(M, np.nan)
        self.done = np.zeros(M, bool)

    def _record(self, m, i, level_lo, level_hi, t, x, v):
        if level_hi >= level_lo:
            self.store_x[m, i, level_lo:level_hi + 1] = x
            self.store_v[m, i, level_lo:level_hi + 1] = v
            self.store_t[m, i, level_lo:level_hi + 1] = t
            self.score[m, i] = level_hi

    def finish(self, ctx, a):
        """Advance every running replica until it reaches A (q <= a) or the target."""
        coord, levels, top = ctx.coordinate, self.levels, self.top
        m, i = np.nonzero(self.running)
        q0 = coord(self.x[m, i])
        for j in range(m.size):                     # levels the start state is already beyond
            hi = min(int(np.searchsorted(levels, q0[j], side="right")) - 1, top - 1)
            self._record(m[j], i[j], self.score[m[j], i[j]] + 1, hi, self.age[m[j], i[j]],
                         self.x[m[j], i[j]], self.v[m[j], i[j]])
        q_prev = dict(zip(zip(m.tolist(), i.tolist()), q0.tolist()))
        while np.any(self.running):
            m, i = np.nonzero(self.running)
            x, v = self.x[m, i], self.v[m, i]
            status, steps, fx, fv = ctx.advance(x, v, self.ids[m, i], MAX_BURST, a, levels[top],
                                                kind="splitting", record=True)
            n = fx.shape[0]
            q = coord(fx)                                          # (n, J)
            qp = np.vstack([np.array([q_prev[(mm, ii)] for mm, ii in zip(m.tolist(), i.tolist())])[None], q[:-1]])
            if self.bridge_scale is not None:
                u = ctx.rng.random(q.shape)
                peak = 0.5 * (qp + q + np.sqrt((q - qp) ** 2 - 4.0 * self.bridge_scale * np.log(u)))
            else:
                peak = q
            valid = np.arange(n)[:, None] < steps[None, :]
            peak = np.maximum.accumulate(np.where(valid, peak, -np.inf), axis=0)
            for j in range(m.size):
                mj, ij = m[j], i[j]
                lo = self.score[mj, ij] + 1
                if status[j] == ABOVE:
                    hi = top
                else:
                    hi = min(int(np.searchsorted(levels, peak[-1, j], side="right")) - 1, top - 1)
                for level in range(lo, hi + 1):
                    k = int(np.searchsorted(peak[:, j], levels[level], side="left")) if level < top or \
                        status[j] != ABOVE else steps[j] - 1
                    k = min(k, steps[j] - 1)
                    self._record(mj, ij, level, level, self.age[mj, ij] + k + 1, fx[k, j],
                                 fv[k, j] if fv is not None else self.v[mj, ij])
                self.age[mj, ij] += steps[j]
                q_prev[(mj, ij)] = q[min(steps[j], n) - 1, j]
            self.x[m, i], self.v[m, i] = x, v
            self.running[m[status != RUNNING], i[status != RUNNING]] = False

    def iterate(self, ctx, a):
        """One iteration of every unfinished run: kill the k lowest (ties included), branch, finish."""
        z_all = np.sort(self.score, axis=1)[:, self.kill - 1]
        for m in np.flatnonzero(~self.done):
            z = int(z_all[m])
            if z >= self.top:
                self.estimate[m] = math.exp(self.log_factor[m]) * np.mean(self.score[m] >= self.top)
                self.done[m] = True
                continue
            dead = np.flatnonzero(self.score[m] <= z)
            K = dead.size
            self.killed[m].append((z, K))
            self.iterations[m] += 1
            if K == self.N:                          # extinction: every replica at the same score
                self.estimate[m], self.done[m] = 0.0, True
                continue
            self.log_factor[m] += math.log1p(-K / self.N)
            alive = np.flatnonzero(self.score[m] > z)
            parents = alive[ctx.rng.integers(0, alive.size, size=K)]
            for i, p in zip(dead.tolist(), parents.tolist()):
                # the copy runs up to the parent's first step beyond z: every level it held by then
                t = self.store_t[m, p, z + 1]
                upto = z + 1
                while upto + 1 <= self.score[m, p] and self.store_t[m, p, upto + 1] == t:
                    upto += 1
                self.store_x[m, i, :upto + 1] = self.store_x[m, p, :upto + 1]
                self.store_v[m, i, :upto + 1] = self.store_v[m, p, :upto + 1]
                self.store_t[m, i, :upto + 1] = self.store_t[m, p, :upto + 1]
                self.x[m, i], self.v[m, i] = self.store_x[m, p, z + 1], self.store_v[m, p, z + 1]
                self.age[m, i] = t
                self.score[m, i] = upto
                self.running[m, i] = upto < self.top
            self.ids[m, dead] = ctx.ids(K)
        self.finish(ctx, a)

    def run(self, ctx, a):
        """Run every AMS run to its end; returns the estimates of p (M,)."""
        self.finish(ctx, a)
        while not np.all(self.done):
            self.iterate(ctx, a)
        return self.estimate.copy()

    def level_profile(self):
        """Per run, the AMS estimate of P(reach level g_l) at each grid level (M, K + 1).

        Within a run, P(score > z_j) is estimated by prod_{i <= j} (1 - K_i/N)
        (the same unbiased estimator for the lower target g_{z_j + 1}); levels
        between kill levels take the value of the next kill level above.
        """
        per = np.ones((self.M, self.top + 1))
        for r in range(self.M):
            f, prev = 1.0, 0
            for z, K in self.killed[r]:
                per[r, prev:z + 1] = f
                f *= 1.0 - K / self.N
                prev = z + 1
            per[r, prev:] = f
            per[r, -1] = self.estimate[r]
        return per
