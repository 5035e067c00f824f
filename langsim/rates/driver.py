"""``langsim.escape_rate``: choose a method, run it to the wanted precision, report with theory."""
import json
import math
import time as _time
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import stats

from .. import config as _config
from ..validation import ConfigError
from . import methods as _m
from . import predict
from .walkers import BasinSampler, EngineStepper, rates_rng

#: Basin samples used to place the return level a (median) and the first interface lambda_0.
PLACEMENT_SAMPLES = 20000
#: Quantiles of the coordinate over the basin's Boltzmann density for a and lambda_0.
RETURN_QUANTILE, INTERFACE_QUANTILE = 0.5, 0.99
#: Levels of the splitting grid between lambda_0 and the target.
N_LEVELS = 64
#: Independent splitting runs per batch, and the fewest the interval is built on.
RUNS_PER_BATCH, MIN_RUNS = 8, 10
#: Fraction of replicas killed per splitting iteration.
KILL_FRACTION = 0.1
#: The pilot's cost model of splitting (excursion steps x (-ln p)(1 - ln p)/variance + flux) times
#: this factor is the particle-steps splitting took in the 1D double well at 3-8 kT (measured);
#: a splitting particle-step costs about this many times the wall time of a direct one (measured).
SPLITTING_COST_FACTOR, SPLITTING_WALL_FACTOR = 4.0, 3.0
#: Events below which the direct interval is not trusted to stop on.
MIN_EVENTS = 10
Z95 = stats.norm.ppf(0.975)


@dataclass
class EscapeResult:
    """Result of :func:`escape_rate` (SI units: 1/s, s, particle-steps).

    ``rate`` with its 95 % interval ``rate_low`` .. ``rate_high``; ``mfpt`` =
    1/rate with ``mfpt_low`` .. ``mfpt_high``; ``method`` used; ``steps``
    spent; ``theory``: rows (name, rate, mfpt, exact, z, formula, source,
    expected_error) with z = ln(rate/predicted) in units of the measured
    log-scale error; ``audit``: what the method needs to be checked (flux,
    per-run and per-level splitting probabilities with errors, events,
    exposure); ``converged``: the precision was reached (else ``message`` says
    which limit stopped it).
    """

    rate: float
    rate_low: float
    rate_high: float
    mfpt: float
    mfpt_low: float
    mfpt_high: float
    method: str
    steps: int
    precision: float
    converged: bool
    message: str
    wall_time: float
    dt: float
    bridge: bool
    seed: int
    theory: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    audit: dict = field(default_factory=dict)

    def to_dict(self):
        def clean(v):
            if isinstance(v, dict):
                return {k: clean(x) for k, x in v.items()}
            if isinstance(v, (list, tuple)):
                return [clean(x) for x in v]
            if isinstance(v, np.ndarray):
                return clean(v.tolist())
            if isinstance(v, (np.floating, np.integer, np.bool_)):
                v = v.item()
            if isinstance(v, float) and not math.isfinite(v):
                return None
            return v
        return clean(asdict(self))

    def to_json(self, indent=2):
        return json.dumps(self.to_dict(), indent=indent)

    def format_table(self):
        """Plain text: the rate, the hold time, theory beside them."""
        def s(v):
            return "" if v is None or not math.isfinite(v) else f"{v:.4g}"
        lines = [f"escape rate   {s(self.rate)} 1/s   95 % interval {s(self.rate_low)} .. {s(self.rate_high)} 1/s",
                 f"mean time     {s(self.mfpt)} s   95 % interval {s(self.mfpt_low)} .. {s(self.mfpt_high)} s",
                 f"method        {self.method}, {self.steps:,} particle-steps, {self.wall_time:.3g} s wall, "
                 f"dt = {self.dt:.4g} s{', bridge test' if self.bridge else ''}",
                 f"precision     {s(self.precision)} (relative half-width reached)"
                 + ("" if self.converged else f"; NOT CONVERGED: {self.message}")]
        if self.theory:
            lines.append(f"{'theory':<58} {'rate (1/s)':>11} {'mean time (s)':>13} {'z':>7}")
            for r in self.theory:
                z = "" if r["z"] is None else f"{r['z']:+.2f}"
                lines.append(f"{r['name']:<58} {s(r['rate']):>11} {s(r['mfpt']):>13} {z:>7}")
                if r.get("expected_error"):
                    lines.append(f"    expected error: {r['expected_error']}")
        lines.extend("note: " + n for n in self.notes)
        return "\n".join(lines)


def _mapping(config, overrides):
    mapping, path = _config.read(config)
    if mapping.get("escape") is None and not overrides.keys() - {"seed"}:
        raise ConfigError(f"{path + ': ' if path else ''}[escape]: the config has no [escape] table; expected "
                          "one with coordinate, start and target (m) (README: Escape rates)")
    esc = dict(mapping.get("escape") or {})
    seed = overrides.pop("seed", None)
    esc.update(overrides)
    mapping["escape"] = esc
    if seed is not None:
        mapping["seed"] = seed
    dyn = dict(mapping.get("dynamics") or {})
    if "steps" not in dyn and "duration" not in dyn:
        dyn["steps"] = 1                       # a rate needs no run length
    mapping["dynamics"] = dyn
    return mapping, path


def _check_static(spec):
    for t in spec.terms:
        if getattr(t, "moving", False):
            raise ConfigError("[escape]: a moving or oscillating trap has no equilibrium start basin; "
                              "expected static potential terms")


def escape_rate(config, progress=False, **overrides):
    """Thermal escape rate of a configuration's ``[escape]`` question, with a 95 % interval.

    Parameters
    ----------
    config : str, path or mapping
        A config (TOML path or mapping) with an ``[escape]`` table.
    progress : bool or callable
        True for a progress bar; a callable ``f(phase, steps, half_width)``.
    **overrides
        ``[escape]`` keys (``precision``, ``method``, ``max_steps``,
        ``max_wall_time``, ...) and ``seed``, replacing the config's.

    Returns
    -------
    EscapeResult
    """
    mapping, path = _mapping(config, dict(overrides))
    try:
        spec = _config.load(mapping)
    except ConfigError as exc:
        raise ConfigError([f"{path}: {m}" if path else m for m in exc.messages]) from None
    escape = spec.escape
    _check_static(spec)
    from .. import engine
    stepper = EngineStepper(engine.Simulation(spec), escape.coordinate, escape.bridge)
    return compute(spec, escape, stepper, progress=progress)


def _bar(progress, precision):
    if callable(progress):
        return progress, None
    if not progress:
        return None, None
    from tqdm import tqdm
    bar = tqdm(total=None, unit=" particle-steps", unit_scale=True, desc="escape rate", dynamic_ncols=True)

    def tick(phase, steps, half_width):
        bar.update(steps - bar.n)
        post = {"phase": phase}
        if half_width is not None and math.isfinite(half_width):
            post["half-width"] = f"{half_width:.3g} (want {precision:g})"
        bar.set_postfix(post, refresh=False)
    return tick, bar


def compute(spec, escape, stepper, progress=False, rng=None):
    """Run the escape computation with a given stepper (see :mod:`langsim.rates.walkers`)."""
    tick, bar = _bar(progress, escape.precision)
    try:
        return _compute(spec, escape, stepper, tick, rng)
    finally:
        if bar is not None:
            bar.close()


def _compute(spec, escape, stepper, tick, rng):
    t0 = _time.perf_counter()
    rng = rates_rng(spec.seed, spec.spawn_key) if rng is None else rng
    budget = _m.Budget(escape.max_steps, escape.max_wall_time, tick)
    sampler = BasinSampler(spec, escape, rng)
    coord = escape.coordinate
    ctx = _m.Context(stepper, sampler, coord, rng, budget)
    dt = spec.dynamics.dt
    start, target = escape.start_signed, escape.target_signed
    q = coord(sampler.positions(PLACEMENT_SAMPLES))
    a = float(np.quantile(q, RETURN_QUANTILE))
    lam0 = float(min(np.quantile(q, INTERFACE_QUANTILE), start))
    if not a < lam0 < target:
        raise ConfigError(f"[escape] start = {escape.start!r}: the start basin's Boltzmann density is too "
                          "narrow to place a first interface inside it; expected a wider basin")
    levels = np.linspace(lam0, target, N_LEVELS + 1)
    N = escape.replicas
    basin = _m.BasinRun(ctx, escape.walkers, lam0, a, target, keep_states=RUNS_PER_BATCH * N)
    n_needed = (Z95 / escape.precision) ** 2
    # --------------------------------------------------------------- pilot
    pilot_steps = escape.walkers * 2000
    while True:
        basin.round()
        budget.report("pilot")
        if basin.escapes.sum() >= n_needed or budget.exhausted():
            break
        if basin.steps.sum() >= pilot_steps and basin.crossings.sum() >= 2 * escape.walkers:
            break
    method, auto = _choose(escape, basin, dt, n_needed, levels, a)
    audit = {"return_level": a * coord.sign, "first_interface": lam0 * coord.sign, "auto": auto}
    if method == "direct":
        out = _direct(ctx, basin, escape, dt, n_needed)
    else:
        out = _splitting(ctx, basin, escape, dt, levels, a)
    out["audit"] = {**audit, **out.get("audit", {})}
    rows, notes = predict.predictions(spec, escape)
    predict.score(rows, out["rate"], out["rate_low"], out["rate_high"])
    bridged = bool(escape.bridge and spec.dynamics.regime == "overdamped" and coord.kind != "formula")
    if bridged:
        notes.append("first passage between steps: Brownian-bridge crossing test (locally constant "
                     "diffusion along the coordinate)")
    elif spec.dynamics.regime == "underdamped":
        notes.append("underdamped: crossings tested at the steps (paths are smooth; check the rate at a "
                     "smaller dt); the splitting is exact for any Markov dynamics, its variance grows when "
                     "the coordinate is far from the committor (weak friction: energy diffusion)")
    notes.extend(out.pop("notes", []))
    rate = out["rate"]
    return EscapeResult(
        rate=rate, rate_low=out["rate_low"], rate_high=out["rate_high"],
        mfpt=1.0 / rate if rate > 0 else math.inf,
        mfpt_low=1.0 / out["rate_high"] if out["rate_high"] > 0 else math.inf,
        mfpt_high=1.0 / out["rate_low"] if out["rate_low"] > 0 else math.inf,
        method=method, steps=budget.steps, precision=out["precision"], converged=out["converged"],
        message=out["message"], wall_time=_time.perf_counter() - t0, dt=dt,
        bridge=bridged, seed=spec.seed,
        theory=rows, notes=notes, audit=out["audit"])


def _choose(escape, basin, dt, n_needed, levels, a):
    """Method and the pilot's cost estimates (particle-steps to the wanted precision)."""
    steps = float(basin.steps.sum())
    events = int(basin.escapes.sum())
    crossings = int(basin.crossings.sum())
    direct_cost = steps * n_needed / max(events, 1) if events else steps * n_needed
    if crossings:
        phi = crossings / (steps * dt)
        k = events / (steps * dt) if events else 1.0 / (steps * dt)
        p = min(0.5, k / phi)
        excursion = basin.excursion_steps / crossings
        s2 = (escape.precision / Z95) ** 2 * 0.75
        ams_cost = SPLITTING_COST_FACTOR * (excursion * (-math.log(p)) * (1.0 - math.log(p)) / s2 + 16.0 / (
            escape.precision ** 2) * (steps / crossings))
    else:
        p, ams_cost = None, math.inf
    info = {"pilot_steps": int(steps), "pilot_escapes": events, "pilot_crossings": crossings,
            "direct_cost": direct_cost, "splitting_cost": ams_cost, "p_estimate": p}
    if escape.method != "auto":
        return escape.method, info
    if crossings == 0:
        return "direct", info
    return ("direct" if direct_cost <= SPLITTING_WALL_FACTOR * ams_cost else "ams"), info


def _direct(ctx, basin, escape, dt, n_needed):
    while True:
        n = int(basin.escapes.sum())
        if n >= MIN_EVENTS and Z95 / math.sqrt(n) <= 1.2 * escape.precision:
            d = basin.direct(dt)                       # the exact interval only near the goal
            hw = _half(d["rate"], d["rate_low"], d["rate_high"])
            if hw <= escape.precision:
                stop = None
                break
        ctx.budget.report("direct", Z95 / math.sqrt(n) if n else math.inf)
        stop = ctx.budget.exhausted()
        if stop:
            break
        basin.round()
    d = basin.direct(dt)
    hw = _half(d["rate"], d["rate_low"], d["rate_high"])
    return {"rate": d["rate"], "rate_low": d["rate_low"], "rate_high": d["rate_high"], "precision": hw,
            "converged": stop is None, "message": "" if stop is None else f"stopped by {stop}",
            "audit": {"events": d["events"], "exposure": d["exposure"], "walkers": basin.n_walkers,
                      "interval": "exact Poisson (chi-square) interval on the event count"}}


def _half(rate, low, high):
    return (high - low) / (2 * rate) if rate > 0 else math.inf


def _combine(flux, p_runs):
    """Rate Phi p_bar with a log-scale t interval (Welch-Satterthwaite degrees of freedom)."""
    M = len(p_runs)
    p = float(np.mean(p_runs))
    rp = float(np.std(p_runs, ddof=1) / math.sqrt(M) / p) if (M > 1 and p > 0) else math.inf
    rf = flux["flux_err"] / flux["flux"]
    var = rp * rp + rf * rf
    nu = var * var / (rp ** 4 / max(M - 1, 1) + rf ** 4 / max(flux["dof"], 1)) if var > 0 else math.inf
    t = stats.t.ppf(0.975, nu) if math.isfinite(nu) else Z95
    rate = flux["flux"] * p
    half = t * math.sqrt(var)
    return rate, rate * math.exp(-half), rate * math.exp(half), p, rp, rf, nu


def _bridge_scale(ctx, escape, dt):
    """D dt along the coordinate for the bridge maximum between recorded steps, or None."""
    spec = ctx.sampler.spec
    if not escape.bridge or spec.dynamics.regime != "overdamped" or escape.coordinate.kind == "formula":
        return None
    D = spec.kT / np.array(spec.particles.friction, dtype=float)
    c = escape.coordinate
    return float(D[c.axis] if c.kind == "axis" else np.mean(D)) * dt


def _splitting(ctx, basin, escape, dt, levels, a):
    N = escape.replicas
    kill = max(1, int(round(KILL_FRACTION * N)))
    target_rf = escape.precision / (2 * Z95)       # the flux may use a quarter of the variance
    runs, stop, rp = [], None, math.inf
    bridge_scale = _bridge_scale(ctx, escape, dt)
    while True:
        flux = basin.flux(dt)
        rf = flux["flux_err"] / flux["flux"] if flux["crossings"] else math.inf
        need_flux = rf > target_rf and (not runs or rf >= rp)
        need_states = basin.kept < RUNS_PER_BATCH * N
        if need_flux or need_states:
            stop = ctx.budget.exhausted()
            if stop:
                break
            basin.keep_states = max(basin.keep_states, RUNS_PER_BATCH * N)
            basin.round()
            ctx.budget.report("basin run")
            continue
        x, v = basin.take_states(RUNS_PER_BATCH * N, ctx.rng)
        d = x.shape[1]
        batch = _m.SplittingBatch(levels, x.reshape(RUNS_PER_BATCH, N, d), v.reshape(RUNS_PER_BATCH, N, d),
                                  ctx.ids(RUNS_PER_BATCH * N), kill, bridge_scale)
        batch.run(ctx, a)
        runs.append(batch)
        p_runs = np.concatenate([b.estimate for b in runs])
        rate, low, high, p, rp, rf, nu = _combine(flux, p_runs)
        hw = _half(rate, low, high)
        ctx.budget.report("splitting", hw)
        if len(p_runs) >= MIN_RUNS and hw <= escape.precision:
            break
        stop = ctx.budget.exhausted()
        if stop:
            break
    if not runs:
        raise _m.RateError(f"stopped by [escape] {stop} before the first splitting runs were done; raise it")
    flux = basin.flux(dt)
    p_runs = np.concatenate([b.estimate for b in runs])
    rate, low, high, p, rp, rf, nu = _combine(flux, p_runs)
    per = np.concatenate([b.level_profile() for b in runs])
    mean, se = per.mean(axis=0), per.std(axis=0, ddof=1) / math.sqrt(len(per))
    sign = ctx.coordinate.sign
    # interfaces for the audit: levels where the mean probability has dropped by successive factors e^-2
    picks, last = [0], 1.0
    for i, m in enumerate(mean):
        if m > 0 and m <= last * math.exp(-2.0) and i not in picks:
            picks.append(i)
            last = m
    if picks[-1] != len(levels) - 1:
        picks.append(len(levels) - 1)
    interfaces = []
    for i0, i1 in zip(picks[:-1], picks[1:]):
        cond = mean[i1] / mean[i0] if mean[i0] > 0 else math.nan
        rel = math.sqrt((se[i1] / mean[i1]) ** 2 + (se[i0] / mean[i0]) ** 2) if mean[i1] > 0 and mean[i0] > 0 \
            else math.nan
        interfaces.append({"from": levels[i0] * sign, "to": levels[i1] * sign, "probability": cond,
                           "error": cond * rel if math.isfinite(rel) else math.nan})
    hw = _half(rate, low, high)
    converged = stop is None and hw <= escape.precision
    return {"rate": rate, "rate_low": low, "rate_high": high, "precision": hw, "converged": converged,
            "message": "" if converged else f"stopped by {stop}",
            "audit": {"flux": flux["flux"], "flux_err": flux["flux_err"], "crossings": flux["crossings"],
                      "escapes_in_basin_run": int(basin.escapes.sum()), "exposure": basin.exposure(dt),
                      "probability": p, "probability_rel_err": rp, "flux_rel_err": rf, "dof": nu,
                      "runs": len(p_runs), "replicas": N, "kill": kill, "levels": len(levels),
                      "run_probabilities": p_runs, "iterations": np.concatenate([b.iterations for b in runs]),
                      "interfaces": interfaces,
                      "interval": "log-scale t interval: flux from the walkers as replicas, probability "
                                  "from independent splitting runs (Welch-Satterthwaite dof)"}}
