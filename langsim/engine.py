"""The driver: states, bursts of steps, and whole runs.

Three layers, each thin over the one below:

* :class:`Simulation` holds one validated configuration and its compiled
  kernel. ``advance(state, n_steps, stop=None, record=())`` runs a burst of
  steps from any :class:`State` (positions, velocities, step, per-particle
  status, noise identity, recorder accumulators) and returns a
  :class:`Burst` (which particles stopped or failed, and when; frames of the
  recorders). Batches of up to one tile (64 particles) run serially in the
  calling thread; larger ones in blocks of tiles on a thread pool.
* :class:`Engine` runs a whole configuration into a sink (memory or HDF5):
  initial state, burn-in, chunks of steps bounded in particle-steps and
  buffer bytes (never by frames), checkpoints, signals, progress and status.
* :func:`run` builds the sink from the arguments and runs the engine.

The kernel (:func:`langsim.kernels.schemes.advance`) is one tile loop whose
stages are data built here: the scheme's step (:mod:`langsim.schemes`), the
recorders (:class:`Recorder`), the stop condition (:class:`StopCondition`).
"""
import math
import os
import signal
import sys
import threading
import time as _time
import warnings
from dataclasses import dataclass, field

import numpy as np

from . import config as _config
from . import initial, seeding
from . import potentials as _pot
from . import schemes as _registry
from .kernels import noise as _noise
from .kernels import schemes as _k
from .trajectory import MemorySink, RunComplete, Status

#: Chunk limits of a run: output buffer bytes and particle-steps per kernel call.
CHUNK_BYTES = 32 * 2**20
CHUNK_PARTICLE_STEPS = 20_000_000
#: Batches up to this many particles run in the calling thread (no thread pool).
SERIAL_PARTICLES = _k.TILE
#: Relative difference between a run's recorded statistics and the continuous
#: process above which a run warns (variance or one-frame correlation).
FIDELITY_WARN = 0.01

_LETTERS = {"A": _k.LETTER_A, "B": _k.LETTER_B, "O": _k.LETTER_O}
_KIND = {"rule": _k.RULE, "splitting": _k.SPLITTING}


class RunWarning(UserWarning):
    """A run ended early (numerical blow-up); its frames so far are kept."""


class RunInterrupted(KeyboardInterrupt):
    """SIGINT or SIGTERM stopped a run at a chunk boundary, after a final checkpoint.

    ``trajectory`` holds the frames so far (the sink was finished as incomplete).
    """

    def __init__(self, signum, trajectory, message):
        super().__init__(message)
        self.signum = signum
        self.trajectory = trajectory
        self.message = message


# ----------------------------------------------------------------- recorders
@dataclass(frozen=True)
class Recorder:
    """A frame clock and what it keeps: one dataset of a run.

    Frame k has taps at the step counts ``offset + k period + i spacing``,
    i = 0 .. n_taps - 1. Mode "sum" keeps sum_i weights[i] x(tap i) (a snapshot
    is one tap of weight 1; an exposure average the trapezoid weights over
    every step of the window); mode "sequence" keeps every tap.

    Parameters
    ----------
    name : str
        Dataset name within its group ("positions", "velocities", ...).
    group : str
        "" for the root, or a group such as "measured"; frames of one group
        share one time base (the same clock).
    source : {"positions", "velocities"}
    period, offset, n_taps, spacing : int
        In steps.
    weights : tuple of float
        One per tap (mode "sum").
    mode : {"sum", "sequence"}
    units : str
    """

    name: str
    group: str = ""
    source: str = "positions"
    period: int = 1
    offset: int = 0
    n_taps: int = 1
    spacing: int = 1
    weights: tuple = (1.0,)
    mode: str = "sum"
    units: str = "m"

    def __post_init__(self):
        if self.period < 1 or self.offset < 0 or self.n_taps < 1 or self.spacing < 1:
            raise ValueError(f"recorder {self.name!r}: period, n_taps, spacing must be >= 1 and "
                             f"offset >= 0, got {self.period}, {self.n_taps}, {self.spacing}, "
                             f"{self.offset}")
        if (self.n_taps - 1) * self.spacing > self.period:
            raise ValueError(f"recorder {self.name!r}: taps span {(self.n_taps - 1) * self.spacing} "
                             f"steps, more than the period of {self.period} steps")
        if self.mode == "sum" and len(self.weights) != self.n_taps:
            raise ValueError(f"recorder {self.name!r}: {len(self.weights)} weights for "
                             f"{self.n_taps} taps")
        if self.mode not in ("sum", "sequence") or self.source not in ("positions", "velocities"):
            raise ValueError(f"recorder {self.name!r}: mode {self.mode!r} / source {self.source!r}")

    @property
    def kept(self):
        """Taps stored per frame: 1 (sum) or n_taps (sequence)."""
        return 1 if self.mode == "sum" else self.n_taps

    @property
    def span(self):
        """Steps from a frame's first tap to its last."""
        return (self.n_taps - 1) * self.spacing

    def frames_between(self, c0, c1, include_start=False):
        """(first frame, count) of the frames whose last tap lies in (c0, c1] ([c0, c1] with include_start)."""
        lo = c0 if include_start else c0 + 1
        base = self.offset + self.span
        k_min = max(0, -(-(lo - base) // self.period))
        k_max = (c1 - base) // self.period if c1 >= base else -1
        return k_min, max(0, k_max - k_min + 1)

    def n_frames(self, n_steps):
        """Frames completed by step count ``n_steps`` (from step 0, frame 0 included)."""
        return self.frames_between(0, n_steps, include_start=True)[1]

    def times(self, first, count, dt):
        """Start time of each frame's window, s."""
        return self.offset * dt + (first + np.arange(count)) * (self.period * dt)

    def frame_shape(self, n_particles, dimensions):
        return ((n_particles, dimensions) if self.mode == "sum"
                else (self.n_taps, n_particles, dimensions))


def snapshot_recorders(spec):
    """The recorders of ``[output]``: positions (and velocities) every ``every`` steps."""
    out = spec.output
    units = spec.units
    recs = [Recorder("positions", period=out.every, units=units["positions"])]
    if out.velocities:
        recs.append(Recorder("velocities", source="velocities", period=out.every,
                             units=units["velocities"]))
    return tuple(recs)


@dataclass(frozen=True)
class StopCondition:
    """Stop a particle (it keeps its state) when its coordinate reaches a level.

    Parameters
    ----------
    coordinate : {"x", "y", "z", "radius"} or str
        An axis, the distance from ``center``, or a formula in x, y, z (the
        whitelist parser of energy expressions, e.g. ``"sqrt(x**2 + y**2)"``; it is
        compiled into a kernel of its own, once per formula and machine).
    below, above : float
        Levels (m); a particle stops when its coordinate is <= ``below`` or
        >= ``above``. Either may be infinite.
    center : sequence of float, optional
        For "radius" (m); default the origin.
    bridge : bool, default False
        Also stop when the path may have touched a level between two steps
        (Brownian-bridge test with the coordinate's diffusion coefficient;
        overdamped dynamics).
    """

    coordinate: str = "x"
    below: float = -math.inf
    above: float = math.inf
    center: tuple = (0.0, 0.0, 0.0)
    bridge: bool = False

    def arrays(self, dimensions, diffusion):
        axes = "xyz"[:dimensions]
        if self.coordinate in axes:
            kind, axis = _k.STOP_AXIS, axes.index(self.coordinate)
            d_coord = float(diffusion[axis])
        elif self.coordinate == "radius":
            kind, axis = _k.STOP_RADIUS, 0
            d_coord = float(np.mean(diffusion))
        elif self.is_formula(dimensions):
            # the bridge test of a formula uses the mean diffusion coefficient (an isotropic
            # coordinate of unit gradient; approximate otherwise)
            kind, axis = _k.STOP_USER, 0
            d_coord = float(np.mean(diffusion))
        else:
            raise ValueError(f"stop coordinate = {self.coordinate!r}: expected one of "
                             f"{', '.join(map(repr, tuple(axes) + ('radius',)))} or a formula "
                             "in x, y, z")
        if not self.below < self.above:
            raise ValueError(f"stop levels below = {self.below!r}, above = {self.above!r}: "
                             "expected below < above")
        c = list(self.center) + [0.0] * 3
        ints = np.array([kind, axis, int(bool(self.bridge)), 0], dtype=np.int64)
        reals = np.array([self.below, self.above, c[0], c[1], c[2], d_coord, 0.0, 0.0])
        return ints, reals


    def is_formula(self, dimensions):
        return isinstance(self.coordinate, str) and self.coordinate not in (
            tuple("xyz"[:dimensions]) + ("radius",))


_NO_STOP = (np.zeros(4, dtype=np.int64), np.zeros(8))


# --------------------------------------------------------------------- state
class State:
    """The state of a batch of particles between bursts.

    Attributes
    ----------
    positions : ndarray (n, d), m
    velocities : ndarray (n, d), m/s (zeros and unused for overdamped runs)
    step : int
        Steps done; the time is ``step * dt``.
    status : ndarray (n,) int64
        ``RUNNING``, ``BELOW``, ``ABOVE`` or ``NONFINITE`` (see :mod:`langsim.kernels.schemes`).
    event_step : ndarray (n,) int64
        Step count at which a particle's status changed (-1: never).
    ids : ndarray (n,) uint64
        Noise identity of each particle (walker ids).
    key : (int, int)
        Philox key of the noise stream.
    branch : int
        Folded into the noise counter: another branch draws other noise.
    """

    RUNNING, BELOW, ABOVE, NONFINITE = _k.RUNNING, _k.BELOW, _k.ABOVE, _k.NONFINITE

    def __init__(self, positions, velocities, dt, *, step=0, ids=None, key=(0, 0), branch=0):
        self.positions = np.ascontiguousarray(positions, dtype=np.float64)
        n, d = self.positions.shape
        self.velocities = (np.zeros((n, d)) if velocities is None
                           else np.ascontiguousarray(velocities, dtype=np.float64))
        if self.velocities.shape != (n, d):
            raise ValueError(f"velocities of shape {self.velocities.shape}, expected {(n, d)}")
        self.dt = dt
        self.step = int(step)
        self.ids = (np.arange(n, dtype=np.uint64) if ids is None
                    else np.ascontiguousarray(ids, dtype=np.uint64))
        if self.ids.shape != (n,):
            raise ValueError(f"ids of shape {self.ids.shape}, expected ({n},)")
        self.status = np.zeros(n, dtype=np.int64)
        self.event_step = np.full(n, -1, dtype=np.int64)
        self.key = (int(key[0]), int(key[1]))
        self.branch = int(branch)
        self.recorders = ()
        self.accumulators = np.zeros((0, 1, n, d))

    @property
    def time(self):
        return self.step * self.dt

    @property
    def n_particles(self):
        return self.positions.shape[0]

    @property
    def active(self):
        """Particles still moving."""
        return self.status == _k.RUNNING

    def copy(self):
        new = State(self.positions.copy(), self.velocities.copy(), self.dt, step=self.step,
                    ids=self.ids.copy(), key=self.key, branch=self.branch)
        new.status[:] = self.status
        new.event_step[:] = self.event_step
        new.recorders = self.recorders
        new.accumulators = self.accumulators.copy()
        return new

    def _attach(self, recorders):
        """Accumulators for ``recorders`` (kept when the same recorders continue)."""
        if recorders != self.recorders:
            n, d = self.positions.shape
            kept = max([r.kept for r in recorders] + [1])
            self.recorders = tuple(recorders)
            self.accumulators = np.zeros((len(recorders), kept, n, d))


@dataclass
class Burst:
    """What one :meth:`Simulation.advance` call did.

    ``stopped`` / ``failed``: indices of particles that stopped at a level /
    went non-finite during this burst; ``frames``: {recorder name: array
    (frames, ...)} of the frames completed, with ``first_frame`` {name: index}.
    """

    stopped: np.ndarray
    failed: np.ndarray
    frames: dict = field(default_factory=dict)
    first_frame: dict = field(default_factory=dict)


@dataclass
class RunStats:
    """Cost of one run session (declared result of :func:`run`)."""

    wall_time: float = 0.0
    steps: int = 0
    compile_time: float = 0.0
    ns_per_particle_step: float = float("nan")
    resumed: bool = False
    already_complete: bool = False


# ---------------------------------------------------------------- simulation
def _split_tables(spec, scheme):
    """(kind, coef, letters) of a rule or splitting scheme."""
    d = spec.particles.dimensions
    dt, kT = spec.dynamics.dt, spec.kT
    friction = np.array(spec.particles.friction, dtype=np.float64)
    if scheme.kind == "rule":
        coef = np.zeros((1, 8, d))
        for a in range(d):
            coef[0, 0, a] = dt / friction[a]
            amp = math.sqrt(2.0 * kT * dt / friction[a])
            coef[0, 1, a] = amp * 0.5 if scheme.averaged_noise else amp
        coef[0, 2, :] = 1.0 if scheme.averaged_noise else 0.0
        wall = spec.particles.wall_friction
        if wall is None:
            return _k.RULE, coef, np.zeros(0, dtype=np.int64)
        # the friction stage: row 0 holds the bulk coefficients, row 1 the wall
        coef = np.concatenate([coef, np.zeros((1, 8, d))])
        coef[1, _k.W_AXIS:_k.W_DRIFT + 1, 0] = (
            wall.axis, wall.position, wall.side, wall.radius,
            kT * dt / wall.bulk if wall.drift else 0.0)
        return _k.RULE_WALL, coef, np.zeros(0, dtype=np.int64)
    mass = float(spec.particles.mass)
    feedback = np.array(spec.particles.feedback or (0.0,) * d, dtype=np.float64)
    coef = np.zeros((len(scheme.splitting), 8, d))
    for j, (letter, fraction) in enumerate(scheme.splitting):
        h = fraction * dt
        for a in range(d):
            if letter == "A":
                coef[j, 0, a] = h
            elif letter == "B":
                coef[j, 0, a] = h / mass
            else:
                if feedback[a] == 0.0:
                    c = math.exp(-friction[a] * fraction * dt / mass)
                    coef[j, 1, a] = math.sqrt((1.0 - c * c) * kT / mass)
                else:
                    # velocity feedback damps without noise: the O step relaxes to the
                    # effective temperature T gamma/(gamma + gamma_fb) at rate (gamma + gamma_fb)/m
                    total = friction[a] + feedback[a]
                    c = math.exp(-total * fraction * dt / mass)
                    coef[j, 1, a] = math.sqrt((1.0 - c * c) * kT * friction[a] / total / mass)
                coef[j, 0, a] = c
        coef[j, 2, :] = fraction
    letters = np.array([_LETTERS[c] for c, _ in scheme.splitting], dtype=np.int64)
    return _k.SPLITTING, coef, letters


def _tables(spec, terms):
    scheme = _registry.get(spec.dynamics.scheme)
    if scheme.kind == "exact":
        return _registry.exact_tables(spec, terms)
    return _split_tables(spec, scheme)


class Simulation:
    """One configuration, ready to advance states.

    Parameters
    ----------
    config : RunSpec, mapping or TOML path
    threads : int, optional
        Threads for batches larger than one tile (default: the cores this
        process may use).

    Examples
    --------
    >>> import langsim
    >>> sim = langsim.Simulation({"seed": 1, "particles": {"count": 8, "radius": 0.5e-6},
    ...                           "potential": [{"type": "harmonic", "stiffness": 1e-6}],
    ...                           "dynamics": {"dt": 1e-4, "steps": 1000}})
    >>> state = sim.initial_state()
    >>> burst = sim.advance(state, 100, stop=langsim.StopCondition("x", above=1e-7))
    >>> state.step
    100
    """

    def __init__(self, config, *, threads=None):
        spec = config if isinstance(config, _config.RunSpec) else _config.load(config)
        self.spec = spec
        self.threads = threads
        d = spec.particles.dimensions
        self.dt = spec.dynamics.dt
        self.kT = spec.kT
        self.codes, self.params = _pot.builtin_rows(spec.terms, d)
        static = [t.static() for t in spec.terms]
        self.codes_static, self.params_static = _pot.builtin_rows(static, d)
        self.tables = _tables(spec, spec.terms)
        self.tables_static = _tables(spec, static)
        self._user = _pot.user_terms(spec.terms, d)
        self.extra_params = np.zeros(0) if self._user is None else self._user.parameters
        from .kernels.specialise import kernel_for
        self.kernel = kernel_for(self.tables[0], self._user)    # no stop stage: what run() needs
        self._stop_kernels = {}
        self.key = seeding.kernel_key(spec.seed, spec.spawn_key)
        self.diffusion = spec.kT / np.array(spec.particles.friction, dtype=np.float64)

    # ------------------------------------------------------------ states
    def initial_state(self):
        """The run's state at step 0: equilibrium or given positions, Maxwell velocities.

        The burn-in (if any) is not applied; :meth:`burn_in` does that.
        """
        spec = self.spec
        p = spec.particles
        rng = seeding.initial_rng(spec.seed, spec.spawn_key)
        x = initial.initial_positions(spec, rng)
        v = (initial.initial_velocities(spec, rng) if spec.dynamics.regime == "underdamped"
             else None)
        return State(x, v, self.dt, key=self.key)

    def state(self, positions, velocities=None, *, step=0, ids=None, branch=0):
        """A state from given positions (n, d) m and velocities (n, d) m/s."""
        x = np.asarray(positions, dtype=np.float64)
        d = self.spec.particles.dimensions
        if x.ndim != 2 or x.shape[1] != d:
            raise ValueError(f"positions of shape {x.shape}, expected (n, {d})")
        return State(x, velocities, self.dt, step=step, ids=ids, key=self.key, branch=branch)

    # ------------------------------------------------------------ bursts
    def advance(self, state, n_steps, stop=None, record=()):
        """Advance ``state`` in place by ``n_steps`` steps.

        Parameters
        ----------
        state : State
        n_steps : int
        stop : StopCondition, optional
        record : sequence of Recorder
            Frames completed during the burst are returned; partial frames
            stay in the state and continue in the next burst.

        Returns
        -------
        Burst
        """
        return self._advance(state, int(n_steps), stop=stop, record=tuple(record))

    def _advance(self, state, n_steps, stop=None, record=(), static=False, include_start=False):
        spec = self.spec
        n, d = state.positions.shape
        state._attach(record)
        rec_int = np.zeros((len(record), _k.N_REC_COLUMNS), dtype=np.int64)
        rec_w = np.zeros((len(record), max([r.n_taps for r in record] + [1])))
        base = 0
        first = {}
        for j, r in enumerate(record):
            k0, count = r.frames_between(state.step, state.step + n_steps, include_start)
            rec_int[j] = (_k.SUM if r.mode == "sum" else _k.SEQUENCE,
                          _k.SOURCE_POSITIONS if r.source == "positions" else _k.SOURCE_VELOCITIES,
                          r.period, r.offset, r.n_taps, r.spacing, k0, count, base)
            rec_w[j, :len(r.weights)] = r.weights
            first[r.name] = (k0, count, base)
            base += count * r.kept * n * d
        rec_out = np.empty(base)
        stop_int, stop_real = (_NO_STOP if stop is None else stop.arrays(d, self.diffusion))
        before = state.status.copy()
        kind, coef, letters = self.tables_static if static else self.tables
        codes, params = (self.codes_static, self.params_static) if static else (self.codes, self.params)
        stream = np.uint64(_noise.STREAM_DYNAMICS + _noise.BRANCH_STRIDE * state.branch)
        args = (state.positions, state.velocities, state.ids, state.status, state.event_step)
        rest = (np.int64(state.step), np.int64(n_steps), self.dt,
                np.uint64(state.key[0]), np.uint64(state.key[1]), stream,
                coef, letters, codes, params, self.extra_params,
                rec_int, rec_w, state.accumulators, rec_out, include_start, stop_int, stop_real)
        kernel = self.kernel if stop is None else \
            self._stop_kernel(stop.coordinate if stop.is_formula(d) else None)
        blocks = self._blocks(n)
        if len(blocks) == 1:
            kernel(*args, np.int64(0), np.int64(n), *rest)
        else:
            pool = _pool(len(blocks))
            futures = [pool.submit(kernel, *args, np.int64(b0), np.int64(b1), *rest)
                       for b0, b1 in blocks]
            for f in futures:
                f.result()
        state.step += n_steps
        changed = np.flatnonzero(state.status != before)
        frames = {}
        for r in record:
            k0, count, b = first[r.name]
            frames[r.name] = rec_out[b:b + count * r.kept * n * d].reshape(
                (count,) + r.frame_shape(n, d))
        return Burst(changed[state.status[changed] != _k.NONFINITE],
                     changed[state.status[changed] == _k.NONFINITE],
                     frames, {name: v[0] for name, v in first.items()})

    def _stop_kernel(self, formula=None):
        """The kernel with the stop stage (and a stop coordinate given as a formula), compiled
        (or loaded) on first use, once per formula."""
        if formula not in self._stop_kernels:
            from .kernels.specialise import kernel_for
            source = None
            if formula is not None:
                from .validation import ConfigError, Invalid
                try:
                    source = _pot.coordinate_source(formula, self.spec.particles.dimensions)
                except Invalid as exc:
                    raise ConfigError(f"stop coordinate = {formula!r}: expected {exc.expected}") from None
            self._stop_kernels[formula] = kernel_for(self.tables[0], self._user, True, source)
        return self._stop_kernels[formula]

    def _blocks(self, n):
        threads = self.threads or _cores()
        if n <= SERIAL_PARTICLES or threads <= 1:
            return [(0, n)]
        n_tiles = -(-n // _k.TILE)
        per = -(-n_tiles // min(threads, n_tiles))
        return [(b * per * _k.TILE, min(n, (b + 1) * per * _k.TILE))
                for b in range(-(-n_tiles // per))]

    def burn_in(self, state):
        """Run the configured burn-in on ``state`` (its own noise stream, static terms, nothing
        recorded); the step count is reset to 0 afterwards. Returns the Status of a blow-up, or None."""
        spec = self.spec
        n_steps = int(round(spec.particles.burn_in / self.dt))
        if n_steps <= 0:
            return None
        burn = State(state.positions, state.velocities, self.dt, ids=state.ids,
                     key=seeding.burn_in_key(spec.seed, spec.spawn_key))
        chunk = max(1, CHUNK_PARTICLE_STEPS // state.n_particles)
        while burn.step < n_steps:
            self._advance(burn, min(chunk, n_steps - burn.step), static=True)
            bad = np.flatnonzero(burn.status == _k.NONFINITE)
            if bad.size:
                first = bad[np.argmin(burn.event_step[bad])]
                step = int(burn.event_step[first])
                return Status("blow-up", f"non-finite position of particle {first} at step {step} of "
                              "the burn-in; no frames recorded (reduce [dynamics] dt or check the "
                              "potential)", step, int(first), step * self.dt)
        state.positions[:] = burn.positions
        state.velocities[:] = burn.velocities
        return None

    def compile(self):
        """Load (or, the first time on this machine, compile) the kernel; returns seconds taken."""
        t0 = _time.perf_counter()
        st = State(np.zeros((1, self.spec.particles.dimensions)), None, self.dt, key=self.key)
        self._advance(st, 0, record=(Recorder("warm-up"),))
        return _time.perf_counter() - t0


_POOLS = {}


def _pool(n):
    from concurrent.futures import ThreadPoolExecutor
    if n not in _POOLS:
        _POOLS[n] = ThreadPoolExecutor(n, thread_name_prefix="langsim")
    return _POOLS[n]


def _cores():
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


# ------------------------------------------------------------------- the run
def _catch_signals(stop):
    """Turn SIGINT/SIGTERM into a stop request (a second one stops at once); returns a restorer."""
    if threading.current_thread() is not threading.main_thread():
        return lambda: None

    def request(signum, frame):
        if stop:
            raise KeyboardInterrupt
        stop.append(signum)
    previous = {s: signal.signal(s, request) for s in (signal.SIGINT, signal.SIGTERM)}

    def restore():
        for s, h in previous.items():
            signal.signal(s, h)
    return restore


class Engine:
    """Runs one configuration into a sink.

    Parameters
    ----------
    spec : RunSpec
    sink : a sink (see :mod:`langsim.trajectory`)
    progress : bool or callable
        True for a tqdm bar; a callable ``f(step, n_steps)`` is called after
        each chunk instead.
    threads : int or None
        Threads for this run (None: all cores this process may use).
    """

    def __init__(self, spec, sink, progress=False, threads=None):
        self.sim = Simulation(spec, threads=threads)
        self.spec = spec
        self.sink = sink
        self.progress = progress
        self.recorders = snapshot_recorders(spec)
        self.measurement = None
        if getattr(spec, "measurement", None) is not None:     # camera / detector recorders
            from .measurement.stage import EngineAdapter
            self.measurement = EngineAdapter(spec)
            self.recorders += tuple(Recorder(**r) for r in self.measurement.recorders())
        self.stats = RunStats()

    def _measured(self, r):
        """True for a recorder whose frames go through the measurement stage."""
        return self.measurement is not None and r.name in self.measurement.RECORDERS

    def layout(self):
        """{group: (n_frames, [(name, frame shape, units[, dtype, attributes]), ...])} of the run."""
        p, steps = self.spec.particles, self.spec.dynamics.steps
        groups = {}
        for r in self.recorders:
            if self._measured(r):
                continue
            n_frames, sets = groups.setdefault(r.group, (r.n_frames(steps), []))
            sets.append((r.name, r.frame_shape(p.count, p.dimensions), r.units))
        if self.measurement is not None:
            groups.update(self.measurement.layout(steps))
        return groups

    def run(self):
        stop = []
        restore = _catch_signals(stop)
        try:
            return self._run(stop)
        except (RunInterrupted, RunComplete):
            raise
        except BaseException:
            abort = getattr(self.sink, "abort", None)
            if abort is not None:
                abort()
            raise
        finally:
            restore()

    def _start(self):
        """The state to run from: fresh (initial + burn-in, frame 0 recorded) or resumed."""
        resume = self.sink.start(self.spec, self.layout())
        sim = self.sim
        if resume is None:
            state = sim.initial_state()
            failed = sim.burn_in(state)
            if failed is not None:
                return None, failed
            return state, None
        state = State(resume.arrays["positions"], resume.arrays.get("velocities"), sim.dt,
                      step=resume.step, key=sim.key)
        state._attach(self.recorders)
        acc = resume.arrays.get("accumulators")
        if acc is not None and acc.shape == state.accumulators.shape:
            state.accumulators[:] = acc
        if self.measurement is not None:
            self.measurement.restore(resume.arrays)
        return state, None

    def _checkpoint(self, state):
        arrays = {"positions": state.positions}
        if self.spec.dynamics.regime == "underdamped":
            arrays["velocities"] = state.velocities
        if any(r.span > 0 for r in self.recorders):
            arrays["accumulators"] = state.accumulators
        if self.measurement is not None:
            arrays.update(self.measurement.state())
        self.sink.checkpoint(state.step, arrays)

    def _chunk_steps(self, state):
        """Steps of the next kernel call: bounded in particle-steps and output bytes, not by frames."""
        p, out = self.spec.particles, self.spec.output
        left = self.spec.dynamics.steps - state.step
        by_work = max(1, CHUNK_PARTICLE_STEPS // p.count)
        frame_bytes = sum(r.kept * p.count * p.dimensions * 8 for r in self.recorders)
        per_step = frame_bytes / min(r.period for r in self.recorders)
        by_bytes = max(1, int(CHUNK_BYTES / per_step)) if per_step > 0 else left
        n = min(left, by_work, by_bytes)
        # end chunks on a frame of the snapshot clock when that is cheap, so frames arrive in order
        every = out.every
        if n > every and n < left:
            n -= (state.step + n) % every
        return n

    def _write(self, burst, keep_before=None):
        """Hand a burst's frames to the sink, group by group (frames before ``keep_before`` only)."""
        groups, measured = {}, {}
        for r in self.recorders:
            frames = burst.frames[r.name]
            first = burst.first_frame[r.name]
            if keep_before is not None:
                last_tap = r.offset + (first + np.arange(len(frames))) * r.period + r.span
                frames = frames[:int(np.count_nonzero(last_tap < keep_before))]
            if self._measured(r):
                measured[r.name] = (first, frames)
                continue
            groups.setdefault(r.group, (first, r, {}))[2][r.name] = frames
        for group, (first, r, arrays) in groups.items():
            count = len(next(iter(arrays.values())))
            if count:
                self.sink.write(group, first, r.times(first, count, self.sim.dt), arrays)
        if measured:
            self.measurement.write(self.sink, measured)

    def _run(self, stop):
        spec, sim = self.spec, self.sim
        steps_total = spec.dynamics.steps
        t_compile = self._compile()
        state, failed = self._start()
        if failed is not None:
            warnings.warn(failed.message, RunWarning, stacklevel=4)
            self.stats = RunStats(compile_time=t_compile)
            return self.sink.finish(failed, self.stats)
        first_call = state.step == 0 and not getattr(self.sink, "resumed", False)
        if first_call:
            burst = sim._advance(state, 0, record=self.recorders, include_start=True)
            self._write(burst)
            self._checkpoint(state)
        bar = self._bar(state.step)
        status = Status("complete")
        wall0 = _time.perf_counter()
        last_checkpoint, checkpointed = wall0, state.step
        steps0 = state.step
        try:
            while state.step < steps_total:
                step_before = state.step
                burst = sim._advance(state, self._chunk_steps(state), record=self.recorders)
                if burst.failed.size:
                    bad = burst.failed[np.argmin(state.event_step[burst.failed])]
                    bad_step = int(state.event_step[bad])
                    self._write(burst, keep_before=bad_step)
                    kept = self.recorders[0].n_frames(bad_step - 1) - 1
                    status = Status("blow-up", f"non-finite position of particle {bad} at step "
                                    f"{bad_step} (t = {bad_step * sim.dt:.6g} s); frames up to step "
                                    f"{kept * spec.output.every} kept", bad_step, int(bad),
                                    bad_step * sim.dt)
                    warnings.warn(status.message, RunWarning, stacklevel=3)
                    state.step = step_before
                    break
                self._write(burst)
                now = _time.perf_counter()
                if (now - last_checkpoint >= spec.output.checkpoint_every
                        or state.step == steps_total or stop):
                    self._checkpoint(state)
                    last_checkpoint, checkpointed = now, state.step
                self._tick(bar, state.step)
                if stop and state.step < steps_total:
                    if checkpointed != state.step:    # the signal came after the checkpoint test
                        self._checkpoint(state)
                    name = signal.Signals(stop[0]).name
                    status = Status("interrupted", f"interrupted by {name} at step {state.step} of "
                                    f"{steps_total} (t = {state.step * sim.dt:.6g} s); checkpoint "
                                    "written", state.step, None, state.step * sim.dt)
                    break
        finally:
            if bar is not None and hasattr(bar, "close"):
                bar.close()
        wall = _time.perf_counter() - wall0
        done = state.step - steps0
        self.stats = RunStats(wall, done, t_compile, 1e9 * wall / max(1, done * spec.particles.count),
                              resumed=bool(getattr(self.sink, "resumed", False)))
        traj = self.sink.finish(status, self.stats)
        if stop and status.reason == "interrupted":
            raise RunInterrupted(stop[0], traj, status.message)
        return traj

    def _compile(self):
        """Load or compile the kernel before the timing and the progress bar start."""
        notice = None
        if self.progress is True:
            notice = threading.Timer(2.0, lambda: print(
                "compiling the kernels for this kind of run (once per machine)",
                file=sys.stderr, flush=True))
            notice.start()
        try:
            return self.sim.compile()
        finally:
            if notice is not None:
                notice.cancel()

    def _bar(self, step):
        if callable(self.progress):
            return self.progress
        if not self.progress:
            return None
        from tqdm import tqdm
        dyn = self.spec.dynamics
        return tqdm(total=dyn.steps, initial=step, unit="step", unit_scale=True,
                    desc="simulating", dynamic_ncols=True,
                    postfix={"t": f"{step * dyn.dt:.4g} s"})

    def _tick(self, bar, step):
        if bar is None:
            return
        if callable(bar) and not hasattr(bar, "update"):
            bar(step, self.spec.dynamics.steps)
            return
        bar.set_postfix({"t": f"{step * self.spec.dynamics.dt:.4g} s"}, refresh=False)
        bar.update(step - bar.n)


def run(config, out=None, *, progress=True, threads=None, overwrite=False, resume=False):
    """Run a simulation.

    Parameters
    ----------
    config : str, path or mapping
        A TOML file or a mapping of the same shape (SI units).
    out : str or path, optional
        HDF5 file to stream to; default ``[output] path`` of the config, and
        in memory when neither is given.
    progress : bool, default True
        Show a progress bar.
    threads : int, optional
        Threads (default: all cores this process may use).
    overwrite : bool, default False
        Replace an existing ``out`` file.
    resume : bool, default False
        Continue an interrupted ``out`` file written with the same config.

    Returns
    -------
    Trajectory
        In memory, or backed by the file; ``run_stats`` says what the session cost.

    Examples
    --------
    >>> import langsim
    >>> traj = langsim.run({"seed": 1, "particles": {"radius": 0.5e-6},
    ...                     "potential": [{"type": "harmonic", "stiffness": 1e-6}],
    ...                     "dynamics": {"dt": 1e-4, "steps": 1000}}, progress=False)
    >>> traj.positions.shape
    (1001, 1, 1)
    """
    spec = _config.load(config)
    path = out if out is not None else spec.output.path
    if out is None and path is not None and isinstance(config, (str, os.PathLike)):
        path = os.path.join(os.path.dirname(os.fspath(config)), path)   # next to the config
    from .guards import require_memory
    require_memory(spec, keep_frames=path is None)    # refused before anything is created
    if path is None:
        sink = MemorySink()
    else:
        from . import trajectory
        config_file = config if isinstance(config, (str, bytes, os.PathLike)) else None
        sink = trajectory.HDF5Sink(path, overwrite=overwrite, resume=resume,
                                   protect=(config_file,))
        spec = _resume_seed(config, spec, sink)
    engine = Engine(spec, sink, progress=progress, threads=threads)
    try:
        return engine.run()
    except RunComplete:
        traj = trajectory.load(path)
        traj.run_stats = RunStats(already_complete=True)
        return traj


def _resume_seed(config, spec, sink):
    """On resume, a config without a seed takes the seed recorded in the file."""
    from . import trajectory
    if not (sink.resume and os.path.exists(sink.path)):
        return spec
    mapping, _ = _config.read(config)
    if "seed" in mapping:
        return spec
    seed = trajectory.stored_seed(sink.path)
    if seed is None:
        return spec
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")          # already warned about this config
        return _config.load({**mapping, "seed": seed})
