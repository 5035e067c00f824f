"""The driver: chunks of steps, one compiled kernel call per chunk, frames to a sink.

The engine owns step count, time, chunking, checkpoints and status; a scheme
contributes only its compiled step (:mod:`langsim.kernels.schemes`).
"""
import os
import signal
import sys
import threading
import time as _time
import warnings

import numpy as np

from . import config as _config
from . import initial, seeding
from . import potentials as _pot
from .kernels import schemes as _schemes
from .trajectory import MemorySink, RunComplete, Status

#: Splittings of the underdamped schemes, as (letter, fraction of the step).
SPLITTINGS = {
    "baoab": (("B", 0.5), ("A", 0.5), ("O", 1.0), ("A", 0.5), ("B", 0.5)),
}
#: Overdamped schemes: whether the noise of consecutive steps is averaged.
OVERDAMPED = {"euler-maruyama": False, "leimkuhler-matthews": True}
_LETTER_CODES = {"A": _schemes.LETTER_A, "B": _schemes.LETTER_B, "O": _schemes.LETTER_O}
#: Chunk limits: output buffer bytes and particle-steps per kernel call.
CHUNK_BYTES = 32 * 2**20
CHUNK_PARTICLE_STEPS = 20_000_000
#: ``every`` of a kernel call that records nothing (burn-in): no step reaches it.
NO_RECORD = 2**62


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
    """Advances one :class:`~langsim.config.RunSpec` and feeds a sink.

    Parameters
    ----------
    spec : RunSpec
    sink : a sink (see :mod:`langsim.trajectory`)
    progress : bool or callable
        True for a tqdm bar; a callable ``f(step, n_steps)`` is called after
        each chunk instead.
    threads : int or None
        numba threads for this run (None: numba's default).
    """

    def __init__(self, spec, sink, progress=False, threads=None):
        self.spec = spec
        self.sink = sink
        self.progress = progress
        self.threads = threads
        d = spec.particles.dimensions
        self.codes, self.params = _pot.builtin_rows(spec.terms, d)
        user = _pot.user_terms(spec.terms, d)
        if user is None:
            self.kernel_od, self.kernel_ud = _schemes.advance_overdamped, _schemes.advance_underdamped
            self.extra_params = np.zeros(0)
        else:
            from .kernels.specialise import kernels_for
            self.kernel_od, self.kernel_ud = kernels_for(user)
            self.extra_params = user.parameters
        self.friction = np.array(spec.particles.friction, dtype=np.float64)
        # underdamped O step: total damping (friction + cold-damping feedback), noise from friction
        self.damping = np.ascontiguousarray(spec.damping(), dtype=np.float64)
        dyn = spec.dynamics
        if dyn.regime == "underdamped":
            split = SPLITTINGS[dyn.scheme]
            self.letters = np.array([_LETTER_CODES[c] for c, _ in split], dtype=np.int64)
            self.fractions = np.array([f for _, f in split], dtype=np.float64)
        self.stats = {}

    # ------------------------------------------------------------------ kernel
    def _advance(self, x, v, step0, n_steps, key, codes, params, every, out_x, out_v):
        spec = self.spec
        n_tiles = (spec.particles.count + _schemes.TILE - 1) // _schemes.TILE
        status = np.zeros((n_tiles, 3), dtype=np.int64)
        k0, k1 = np.uint64(key[0]), np.uint64(key[1])
        dt, kT = spec.dynamics.dt, spec.kT
        if spec.dynamics.regime == "overdamped":
            self.kernel_od(x, np.int64(step0), np.int64(n_steps), dt, kT, self.friction,
                           OVERDAMPED[spec.dynamics.scheme], k0, k1, codes, params,
                           self.extra_params, np.int64(every), out_x, status)
        else:
            self.kernel_ud(x, v, np.int64(step0), np.int64(n_steps), dt, kT,
                           float(spec.particles.mass), self.damping, self.friction, self.letters,
                           self.fractions, k0, k1, codes, params, self.extra_params,
                           np.int64(every), out_x, out_v,
                           out_v.shape[0] > 0 and spec.output.velocities, status)
        failed = status[status[:, 0] != 0]
        if failed.size:
            first = failed[np.argmin(failed[:, 2])]
            return int(first[1]), int(first[2])
        return None

    def _burn_in(self, x, v):
        """Run the dynamics for the burn-in without recording, static terms.

        Returns None, or the Status of a blow-up during the burn-in."""
        spec = self.spec
        n_steps = int(round(spec.particles.burn_in / spec.dynamics.dt))
        if n_steps <= 0:
            return None
        static = [t.static() for t in spec.terms]
        codes, params = _pot.builtin_rows(static, spec.particles.dimensions)
        empty = np.empty((0,) + x.shape)
        key = seeding.burn_in_key(spec.seed)
        done = 0
        chunk = max(1, CHUNK_PARTICLE_STEPS // spec.particles.count)
        while done < n_steps:
            k = min(chunk, n_steps - done)
            fail = self._advance(x, v, done, k, key, codes, params, NO_RECORD, empty, empty)
            if fail is not None:
                return Status(False, f"non-finite position of particle {fail[0]} at step "
                                     f"{fail[1]} of the burn-in; no frames recorded (reduce "
                                     "[dynamics] dt or check the potential)", fail[1], fail[0])
            done += k
        return None

    # --------------------------------------------------------------------- run
    def run(self):
        key = seeding.kernel_key(self.spec.seed)
        stop = []
        restore = _catch_signals(stop)
        try:
            return self._run(key, stop)
        except (RunInterrupted, RunComplete):
            raise
        except BaseException:
            abort = getattr(self.sink, "abort", None)
            if abort is not None:
                abort()
            raise
        finally:
            restore()

    def _run(self, key, stop):
        spec = self.spec
        p, dyn, out = spec.particles, spec.dynamics, spec.output
        resume = self.sink.start(spec)
        if resume is None:
            rng = seeding.initial_rng(spec.seed)
            # C order always: one compiled signature per kernel
            x = np.ascontiguousarray(initial.initial_positions(spec, rng), dtype=np.float64)
            v = np.ascontiguousarray(initial.initial_velocities(spec, rng)
                                     if dyn.regime == "underdamped"
                                     else np.zeros((p.count, p.dimensions)), dtype=np.float64)
            failed = self._burn_in(x, v)
            if failed is not None:
                warnings.warn(failed.message, RunWarning, stacklevel=4)
                self.stats = {"wall_time": 0.0, "steps": 0, "prepare_time": 0.0,
                              "ns_per_particle_step": float("nan")}
                traj = self.sink.finish(failed)
                traj.stats = self.stats
                return traj
            self.sink.write(0, np.array([0.0]), x[None], v[None] if out.velocities else None)
            step, frame = 0, 1
            self.sink.checkpoint(0, x, v if dyn.regime == "underdamped" else None)
        else:
            step, frame = resume.step, resume.n_frames
            x = np.array(resume.positions, dtype=np.float64, order="C")
            v = (np.array(resume.velocities, dtype=np.float64, order="C")
                 if resume.velocities is not None else np.zeros_like(x))
        # a call of no steps loads (or, the first time, compiles) the kernel,
        # so that compile time is neither in the timing nor in the progress bar
        prepare0 = _time.perf_counter()
        notice = None
        if self.progress is True:
            notice = threading.Timer(2.0, lambda: print(
                "compiling the kernels for this kind of run (once per machine; about a minute)",
                file=sys.stderr, flush=True))
            notice.start()
        nothing = np.empty((0, p.count, p.dimensions))
        try:
            self._advance(x, v, step, 0, key, self.codes, self.params, out.every, nothing, nothing)
        finally:
            if notice is not None:
                notice.cancel()
        if self.threads is not None:
            import numba
            previous = numba.get_num_threads()
            numba.set_num_threads(self.threads)
        bar = self._bar(step)
        per_frame = p.count * p.dimensions * 8 * (2 if out.velocities else 1)
        frames_per_chunk = max(1, min(CHUNK_BYTES // per_frame,
                                      CHUNK_PARTICLE_STEPS // (p.count * out.every)))
        status = Status(True)
        wall0 = _time.perf_counter()
        last_checkpoint, checkpointed = wall0, step
        steps0 = step
        try:
            while step < dyn.steps:
                n_frames = min(frames_per_chunk, (dyn.steps - step) // out.every)
                n_steps = n_frames * out.every
                out_x = np.empty((n_frames, p.count, p.dimensions))
                out_v = np.empty_like(out_x) if out.velocities else np.empty((0, 1, 1))
                fail = self._advance(x, v, step, n_steps, key, self.codes, self.params,
                                     out.every, out_x, out_v)
                if fail is not None:
                    particle, bad_step = fail
                    keep = (bad_step - step - 1) // out.every
                    if keep > 0:
                        self.sink.write(frame, self._times(frame, keep), out_x[:keep],
                                        out_v[:keep] if out.velocities else None)
                    status = Status(False, f"non-finite position of particle {particle} at step "
                                           f"{bad_step} (t = {bad_step * dyn.dt:.6g} s); frames "
                                           f"up to step {step + keep * out.every} kept",
                                    bad_step, particle, bad_step * dyn.dt)
                    warnings.warn(status.message, RunWarning, stacklevel=3)
                    break
                self.sink.write(frame, self._times(frame, n_frames), out_x,
                                out_v if out.velocities else None)
                frame += n_frames
                step += n_steps
                now = _time.perf_counter()
                if now - last_checkpoint >= out.checkpoint_every or step == dyn.steps or stop:
                    self.sink.checkpoint(step, x, v if dyn.regime == "underdamped" else None)
                    last_checkpoint, checkpointed = now, step
                self._tick(bar, step)
                if stop and step < dyn.steps:
                    if checkpointed != step:         # the signal came after the checkpoint test
                        self.sink.checkpoint(step, x, v if dyn.regime == "underdamped" else None)
                    name = signal.Signals(stop[0]).name
                    status = Status(False, f"interrupted by {name} at step {step} of {dyn.steps} "
                                           f"(t = {step * dyn.dt:.6g} s); checkpoint written",
                                    step, -1, step * dyn.dt)
                    break
        finally:
            if bar is not None and hasattr(bar, "close"):
                bar.close()
            if self.threads is not None:
                numba.set_num_threads(previous)
        wall = _time.perf_counter() - wall0
        done = step - steps0
        self.stats = {"wall_time": wall, "steps": done, "prepare_time": wall0 - prepare0,
                      "ns_per_particle_step": 1e9 * wall / max(1, done * p.count)}
        traj = self.sink.finish(status)
        traj.stats = self.stats
        if stop and not status.complete and status.particle < 0:
            raise RunInterrupted(stop[0], traj, status.message)
        return traj

    def _times(self, frame0, n):
        interval = self.spec.dynamics.dt * self.spec.output.every
        return (frame0 + np.arange(n)) * interval

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
        numba threads (default: all cores).
    overwrite : bool, default False
        Replace an existing ``out`` file.
    resume : bool, default False
        Continue an interrupted ``out`` file written with the same config.

    Returns
    -------
    Trajectory
        In memory, or backed by the file.

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
        traj = engine.run()
    except RunComplete:
        traj = trajectory.load(path)
        traj.already_complete = True
    traj.resumed = getattr(sink, "resumed", False)
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
