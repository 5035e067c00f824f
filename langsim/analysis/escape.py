"""Transitions between two wells counted with core sets, dwell times and rates.

State A is x <= ``lower``, state B is x >= ``upper``; between them the
particle keeps the state it last visited, so recrossings of the barrier are
not counted (core-set or "milestoning" counting; common practice, cf. the
factor-of-two rules in Hanggi, Talkner & Borkovec 1990, Rev. Mod. Phys. 62,
251). A dwell in A runs from the first frame in A after leaving B to the
first frame in B; with ``lower`` and ``upper`` at the two minima its mean is
the mean first-passage time from one minimum to the other, which is what
:func:`langsim.theory.mfpt` computes exactly. The first (incomplete) dwell
of each particle is dropped.

Rates are events per time at risk (:func:`rate_from_events`), so dwells cut
off by the end of the record (right-censoring) do not bias the rate the way
averaging only completed dwells would; dwells are independent by the strong
Markov property for overdamped motion.
"""
import math

import numpy as np
from scipy import stats

from .stats import Estimator, single_axis

__all__ = ["dwell_times", "rate_from_events", "CoreSetCounter", "EscapeRate"]


def dwell_times(x, lower, upper):
    """Dwells in A (x <= lower) and B (x >= upper) of one series, in frames.

    Returns dict: ``dwell_a``, ``dwell_b`` (completed dwells ending in a
    transition to the other core), ``exposure_a``, ``exposure_b`` (frames
    spent assigned to each core from its first entry on, including the
    final, censored dwell).
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"x must be 1D, got shape {x.shape}")
    if not lower < upper:
        raise ValueError(f"lower must be < upper, got lower={lower!r}, upper={upper!r}")
    state = np.where(x <= lower, -1, np.where(x >= upper, 1, 0))
    nz = np.nonzero(state)[0]
    empty = {"dwell_a": np.zeros(0, int), "dwell_b": np.zeros(0, int), "exposure_a": 0, "exposure_b": 0}
    if nz.size == 0:
        return empty
    s = state[nz]
    change = np.nonzero(s[1:] != s[:-1])[0] + 1
    if change.size == 0:
        return empty
    entries = nz[change]  # frames where a new core is first entered
    states = s[change]
    spans = np.diff(np.concatenate([entries, [x.size]]))  # last one is censored
    dw, st = spans[:-1], states[:-1]
    return {"dwell_a": dw[st == -1], "dwell_b": dw[st == 1],
            "exposure_a": int(spans[states == -1].sum()), "exposure_b": int(spans[states == 1].sum())}


def rate_from_events(n_events, exposure, confidence=0.95):
    """Rate n/T of a Poisson process with error and exact confidence interval, 1/s.

    Maximum likelihood for exponential dwells with censoring (events over the
    total time at risk); by the renewal theorem it tends to 1/mean dwell for
    any dwell distribution. Error rate/sqrt(n); interval from chi^2 quantiles
    with 2n and 2n + 2 degrees of freedom (common practice).
    """
    n = int(n_events)
    if n < 1 or not exposure > 0:
        raise ValueError(f"need n_events >= 1 and exposure > 0, got {n_events!r}, {exposure!r}")
    rate = n / exposure
    a = 1.0 - confidence
    ci = (stats.chi2.ppf(a / 2, 2 * n) / (2 * exposure), stats.chi2.ppf(1 - a / 2, 2 * n + 2) / (2 * exposure))
    return {"rate": rate, "rate_err": rate / math.sqrt(n), "ci": ci, "n": n}


class CoreSetCounter:
    """Core-set transitions of many particles, fed frame chunks in order (one pass).

    Streaming form of :func:`dwell_times` for every particle at once: the
    result equals :func:`dwell_times` applied to each particle's whole series,
    while memory stays O(particles + chunk) and each frame is read once.
    """

    def __init__(self, n_particles, lower, upper):
        if not lower < upper:
            raise ValueError(f"lower must be < upper, got lower={lower!r}, upper={upper!r}")
        self.lower, self.upper = lower, upper
        self.core = np.zeros(n_particles, dtype=np.int8)       # last core visited (0: none yet)
        self.entry = np.full(n_particles, -1, dtype=np.int64)  # frame of the last entry after a change
        self.frames = 0
        self.dwells = {-1: [], 1: []}
        self.exposure = {-1: 0, 1: 0}

    def feed(self, block):
        """Next frames, shape (n, particles): the coordinate of each particle."""
        block = np.asarray(block, dtype=float)
        n = block.shape[0]
        state = np.where(block <= self.lower, -1, np.where(block >= self.upper, 1, 0)).astype(np.int8)
        # last core visited at each frame: forward fill of the nonzero states, seeded by the carry
        idx = np.where(state != 0, np.arange(n)[:, None], -1)
        np.maximum.accumulate(idx, axis=0, out=idx)
        filled = np.where(idx >= 0, np.take_along_axis(state, np.maximum(idx, 0), axis=0), self.core[None, :])
        before = np.concatenate([self.core[None, :], filled[:-1]])
        change = (filled != before) & (before != 0)
        # particle-major order of the change events: (particle, frame)
        part, frame = np.nonzero(change.T)
        if part.size:
            frames = frame + self.frames
            first = np.ones(part.size, bool)
            first[1:] = part[1:] != part[:-1]
            prev_entry = np.where(first, self.entry[part], np.concatenate([[0], frames[:-1]]))
            prev_core = before[frame, part]
            done = prev_entry >= 0
            span = frames - prev_entry
            for c in (-1, 1):
                sel = done & (prev_core == c)
                self.dwells[c].append(span[sel])
                self.exposure[c] += int(span[sel].sum())
            last = np.ones(part.size, bool)
            last[:-1] = part[1:] != part[:-1]
            self.entry[part[last]] = frames[last]
        self.core = filled[-1].copy()
        self.frames += n

    def result(self):
        """As :func:`dwell_times`, pooled over particles (dwells in frames)."""
        exposure = dict(self.exposure)
        open_ = self.entry >= 0
        for c in (-1, 1):
            sel = open_ & (self.core == c)
            exposure[c] += int((self.frames - self.entry[sel]).sum())
        cat = {c: (np.concatenate(v) if v else np.zeros(0, int)) for c, v in self.dwells.items()}
        return {"dwell_a": cat[-1], "dwell_b": cat[1], "exposure_a": exposure[-1], "exposure_b": exposure[1]}


class EscapeRate(Estimator):
    """Escape rates between two cores from positions along one axis.

    Parameters
    ----------
    lower, upper : float, m, core boundaries (A: x <= lower, B: x >= upper)
    dt : float, s, time between frames
    axis, start : as for FrameSource
    confidence : float, level of ``rate_ci_``

    Attributes (after fit)
    ----------------------
    dwell_a_, dwell_b_ (s, completed dwells; their mean is biased low by
    censoring when the record is short), exposure_ (s), rate_ab_, rate_ab_err_ (leaving A), rate_ba_,
    rate_ba_err_, rate_, rate_err_, rate_ci_ (pooled over both directions,
    for symmetric wells), n_events_, ks_pvalue_ (Kolmogorov-Smirnov of the
    pooled dwells against an exponential of the same mean; information only).
    Population relaxation (symmetric well) happens at rate_ab_ + rate_ba_.
    """

    def __init__(self, lower, upper, dt, axis=None, start=0, confidence=0.95):
        self.lower = lower
        self.upper = upper
        self.dt = dt
        self.axis = axis
        self.start = start
        self.confidence = confidence

    def fit(self, positions):
        if not (isinstance(self.dt, (int, float)) and self.dt > 0):
            raise ValueError(f"dt must be a positive number (s), got {self.dt!r}")
        src, start = single_axis(positions, self.axis, self.start)
        counter = CoreSetCounter(src.n_particles, self.lower, self.upper)
        for _, block in src.chunks(start):       # one pass over the frames
            counter.feed(block[:, :, 0])
        r = counter.result()
        ea, eb = r["exposure_a"], r["exposure_b"]
        self.dwell_a_ = r["dwell_a"] * self.dt
        self.dwell_b_ = r["dwell_b"] * self.dt
        allw = np.concatenate([self.dwell_a_, self.dwell_b_])
        self.n_events_ = allw.size
        if allw.size < 2:
            raise ValueError(f"found {allw.size} completed transitions between x <= {self.lower!r} "
                             f"and x >= {self.upper!r}; at least 2 are needed")
        self.exposure_ = (ea + eb) * self.dt
        r = rate_from_events(allw.size, self.exposure_, self.confidence)
        self.rate_, self.rate_err_, self.rate_ci_ = r["rate"], r["rate_err"], r["ci"]
        for name, w, e in (("ab", self.dwell_a_, ea), ("ba", self.dwell_b_, eb)):
            ok = w.size >= 1 and e > 0
            rr = rate_from_events(w.size, e * self.dt, self.confidence) if ok else None
            setattr(self, f"rate_{name}_", rr["rate"] if ok else math.nan)
            setattr(self, f"rate_{name}_err_", rr["rate_err"] if ok else math.nan)
        self.ks_pvalue_ = float(stats.kstest(allw, "expon", args=(0, allw.mean())).pvalue)
        return self
