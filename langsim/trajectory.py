"""Trajectories and the sinks the engine writes them to.

The engine hands frames to a sink and never touches storage itself. Frames
come in groups: the root group ("": ``time``, ``positions``, ``velocities``)
and optional others (``measured``), each with its own time base. A sink has
four calls:

``start(spec, layout) -> ResumeState | None``
    prepare storage for ``layout`` = {group: (n_frames, [(name, frame shape,
    units), ...])}; a state to continue from when resuming.
``write(group, frame0, time, arrays)``
    frames ``frame0 .. frame0 + len(time) - 1`` of ``group``; ``arrays`` maps
    dataset names to arrays (frames, ...).
``checkpoint(step, arrays)``
    everything an exact resume needs: named state arrays (positions,
    velocities, recorder accumulators); the counter-based noise needs only
    the step.
``finish(status, run_stats=None) -> Trajectory``

:class:`MemorySink` keeps everything in arrays. Only this module imports h5py.
"""
import math
from dataclasses import dataclass

import numpy as np
from numpy.lib.mixins import NDArrayOperatorsMixin


@dataclass
class ResumeState:
    """Where an interrupted run continues: after ``step``, with ``n_frames[group]`` written."""

    step: int
    n_frames: dict
    arrays: dict


#: Reasons a run ends.
REASONS = ("complete", "interrupted", "blow-up", "stopped")


@dataclass
class Status:
    """How a run ended.

    ``reason`` is one of ``REASONS``: "complete"; "interrupted" (SIGINT or
    SIGTERM, resumable); "blow-up" (a non-finite position: ``step``, ``particle``
    and ``time`` say where; the frames before it are kept); "stopped" (a stop
    condition ended it).
    """

    reason: str = "complete"
    message: str = "complete"
    step: int = None
    particle: int = None
    time: float = None

    def __post_init__(self):
        if self.reason not in REASONS:
            raise ValueError(f"status reason = {self.reason!r}: expected one of {REASONS}")

    @property
    def complete(self):
        return self.reason == "complete"

    def to_dict(self):
        return {"complete": self.complete, "reason": self.reason, "message": self.message,
                "step": self.step, "particle": self.particle,
                "time": None if self.time is None or not math.isfinite(self.time) else self.time}

    @classmethod
    def from_dict(cls, d):
        """From :meth:`to_dict`, or the status of a langsim 0.1 file (no ``reason``)."""
        reason = d.get("reason")
        if reason not in REASONS:
            particle = d.get("particle")
            reason = ("complete" if d.get("complete") else
                      "blow-up" if isinstance(particle, int) and particle >= 0 else "interrupted")
        step, particle = d.get("step"), d.get("particle")
        return cls(reason, str(d.get("message", reason)),
                   step if isinstance(step, int) and step >= 0 else None,
                   particle if isinstance(particle, int) and particle >= 0 else None,
                   d.get("time") if isinstance(d.get("time"), (int, float)) else None)


class Trajectory:
    """A recorded run.

    Attributes
    ----------
    time : ndarray (n_frames,), s
    positions : ndarray or FrameView (n_frames, n_particles, dimensions), m
        (rad or C for oscillators: see ``units``)
    velocities : same shape, m/s, or None
        Full-step velocities (after BAOAB's last B), when recorded.
    config : dict
        The resolved configuration (SI values, defaults filled in).
    status : Status
    groups : dict
        Other groups of datasets with their own ``time``, e.g.
        ``groups["measured"]["positions"]``.
    units : dict
        Units of each dataset by path ("positions", "velocities", "measured/positions", ...):
        "m", "m/s", or an oscillator's own ("rad", "rad/s"; "C", "A").
    path : str or None
        The backing file, None for an in-memory trajectory.
    file_state : str
        "complete", "interrupted", "failed" or "running" (files; memory: from the status).
    metadata : dict
        Root attributes of the file (format, version, creator, creation time,
        compression); empty in memory.
    run_stats : RunStats or None
        What the session that produced it cost (None when loaded from a file).
    """

    def __init__(self, time, positions, velocities, config, status, path=None, file=None,
                 groups=None, units=None, file_state=None, metadata=None, run_stats=None):
        self.time = time
        self.positions = positions
        self.velocities = velocities
        self.config = config
        self.status = status
        self.groups = groups or {}
        self.units = units or {}
        self.path = path
        self.file_state = file_state or ("complete" if status.complete else
                                         "failed" if status.reason == "blow-up" else "interrupted")
        self.metadata = metadata or {}
        self.run_stats = run_stats
        self._file = file

    @property
    def measured(self):
        """The ``measured`` group (what an instrument reports), or None."""
        return self.groups.get("measured")

    @measured.setter
    def measured(self, value):
        self.groups["measured"] = value

    @property
    def n_frames(self):
        return self.positions.shape[0]

    @property
    def n_particles(self):
        return self.positions.shape[1]

    @property
    def dimensions(self):
        return self.positions.shape[2]

    @property
    def seed(self):
        return self.config["seed"]

    @property
    def frame_interval(self):
        """Time between frames of the root group, s."""
        return self.config["dynamics"]["dt"] * self.config["output"]["every"]

    def close(self):
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __repr__(self):
        where = f", file {self.path!r}" if self.path else ", in memory"
        state = "complete" if self.status.complete else f"incomplete: {self.status.message}"
        return (f"<Trajectory {self.n_frames} frames x {self.n_particles} particles x "
                f"{self.dimensions}D{where}; {state}>")


def _dtype(spec):
    return np.float32 if spec.output.precision == "single" else np.float64


class MemorySink:
    """Keeps the trajectory in arrays of the configured precision."""

    def start(self, spec, layout):
        self.spec = spec
        dtype = _dtype(spec)
        self.groups, self.n_written, self.units = {}, {}, {}
        for group, (n_frames, datasets) in layout.items():
            arrays = {"time": np.empty(n_frames)}
            for name, shape, units, *extra in datasets:
                arrays[name] = np.empty((n_frames,) + tuple(shape), dtype=extra[0] if extra else dtype)
                self.units[f"{group}/{name}" if group else name] = units
            self.groups[group] = arrays
            self.n_written[group] = 0
        return None

    def write(self, group, frame0, time, arrays):
        g = self.groups[group]
        k = len(time)
        g["time"][frame0:frame0 + k] = time
        for name, data in arrays.items():
            g[name][frame0:frame0 + k] = data
        self.n_written[group] = frame0 + k

    def checkpoint(self, step, arrays):
        """Nothing to do: memory does not survive the process."""

    def finish(self, status, run_stats=None):
        trimmed = {g: {name: a[:self.n_written[g]] for name, a in arrays.items()}
                   for g, arrays in self.groups.items()}
        root = trimmed.pop("")
        return Trajectory(root["time"], root["positions"], root.get("velocities"),
                          self.spec.resolved, status, groups=trimmed, units=self.units,
                          run_stats=run_stats)


# --------------------------------------------------------------------- HDF5

#: Value of the root attribute ``format`` and the layout version this module writes.
FORMAT = "langsim-trajectory"
FORMAT_VERSION = 1
#: Target bytes of one stored chunk (frames x particles x dims).
CHUNK_TARGET_BYTES = 2**20
#: Largest chunk along the particle axis when one frame is bigger than this.
CHUNK_MAX_BYTES = 64 * 2**20
#: Resolved-config keys that do not change the simulated numbers; a resume may differ in them.
RESUME_IGNORED = (("output", "path"), ("output", "checkpoint_every"), ("output", "compression"),
                  ("dynamics", "allow_unstable"), ("truth",))
#: Values of the root attribute ``state``.
STATE_RUNNING = "running"          # being written, or the writer was killed
STATE_INTERRUPTED = "interrupted"  # stopped on request at a checkpoint; resumable
STATE_COMPLETE = "complete"
STATE_FAILED = "failed"            # ended early with a numerical blow-up
UNITS = {"time": "s", "positions": "m", "velocities": "m/s"}


class RunComplete(Exception):
    """Raised by :meth:`HDF5Sink.start` on resume when the file already holds a finished run."""

    def __init__(self, path):
        super().__init__(f"{path}: the run is already complete; nothing to do")
        self.path = path


def stored_seed(path):
    """The seed recorded in a trajectory file, or None when it cannot be read."""
    import h5py
    from .filecheck import validate
    from .validation import ConfigError
    try:
        with h5py.File(path, "r", locking=False) as f:
            return validate(f, path).seed
    except (OSError, ConfigError):
        return None


def _config_error(message):
    from .validation import ConfigError
    return ConfigError(message)


def check_output_path(path, overwrite=False, resume=False, protect=()):
    """Refuse an output path that would lose data or cannot be written.

    Every way a path reaches a sink (``out=``, ``[output] path``, ``-o``, the
    config's name with .h5) passes here. ``protect`` lists files that must
    never be the output (the config file), whatever the flags.

    Returns the path as a str. Raises :class:`~langsim.validation.ConfigError`
    naming the path and what was expected; nothing is created or changed.
    """
    import os
    from .safeio import exists_error, path_text
    path = path_text(path)
    if overwrite and resume:
        raise _config_error(f"output {path!r}: overwrite and resume both requested; expected one "
                            "of them (overwrite replaces the file, resume continues it)")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise _config_error(f"output {path!r}: folder {folder!r} does not exist; expected an "
                            "existing folder (create it first)")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise _config_error(f"output {path!r}: folder {folder!r} is not writable; expected a "
                            "folder you can write to")
    if os.path.isdir(path):
        raise _config_error(f"output {path!r}: is a folder; expected a file name such as run.h5")
    if os.path.exists(path):
        for other in protect:
            if other is not None and os.path.exists(other) and os.path.samefile(path, other):
                raise _config_error(f"output {path!r}: is the config file itself; expected "
                                    "another file name (-o OUT.h5 or [output] path)")
        if not os.access(path, os.W_OK):
            raise _config_error(f"output {path!r}: file exists and is read-only")
        if not (overwrite or resume):
            raise exists_error(path)
    return path


def _json_default(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (np.floating, np.integer, np.bool_)):
        return value.item()
    return repr(value)


def config_json(resolved):
    """The resolved config as JSON (the root attribute ``config``)."""
    import json
    return json.dumps(resolved, default=_json_default, sort_keys=True)


def config_differences(stored, current, ignore=RESUME_IGNORED):
    """Dotted keys whose values differ between two resolved configs (JSON-normalised)."""
    import json
    a = json.loads(config_json(stored)) if not isinstance(stored, str) else json.loads(stored)
    b = json.loads(config_json(current))
    skip = {".".join(k) for k in ignore}
    out = []

    def walk(x, y, prefix):
        if prefix in skip:
            return
        if isinstance(x, dict) and isinstance(y, dict):
            for key in sorted(set(x) | set(y)):
                walk(x.get(key), y.get(key), f"{prefix}.{key}" if prefix else key)
        elif isinstance(x, list) and isinstance(y, list) and len(x) == len(y) and any(
                isinstance(v, dict) for v in x + y):
            for i, (u, v) in enumerate(zip(x, y)):
                walk(u, v, f"{prefix}[{i}]")
        elif x != y:
            out.append((prefix, x, y))
    walk(a, b, "")
    return out


def _short(value):
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _chunks(frame_shape, itemsize, n_frames):
    """Chunks of a dataset of frames of ``frame_shape``: about CHUNK_TARGET_BYTES of whole
    frames, or for a frame above CHUNK_MAX_BYTES one frame split along its first axis."""
    frame_shape = tuple(int(k) for k in frame_shape)
    row = int(np.prod(frame_shape[1:])) * itemsize
    frame = frame_shape[0] * row
    if frame > CHUNK_MAX_BYTES:
        return (1, max(1, CHUNK_MAX_BYTES // row)) + frame_shape[1:]
    return (max(1, min(n_frames, CHUNK_TARGET_BYTES // frame)),) + frame_shape


class FrameView(NDArrayOperatorsMixin):
    """A stored dataset seen through its first ``n_frames`` frames (read lazily).

    Supports ``shape``, ``dtype``, ``len``, slicing and ``numpy.asarray``;
    each slice reads only the frames it asks for. Arithmetic and numpy functions
    (``traj.time * 1e3``, ``np.mean(traj.positions, axis=0)``) read the whole
    dataset and give plain arrays.
    """

    def __init__(self, dataset, n_frames):
        self.dataset = dataset
        self.n_frames = int(n_frames)

    @property
    def shape(self):
        return (self.n_frames,) + tuple(self.dataset.shape[1:])

    @property
    def dtype(self):
        return self.dataset.dtype

    @property
    def ndim(self):
        return self.dataset.ndim

    @property
    def units(self):
        return self.dataset.attrs.get("units")

    def __len__(self):
        return self.n_frames

    def _frames(self, key):
        """A range (for slices), an int, or a sorted-or-not index array of frames."""
        if key is Ellipsis:
            key = slice(None)
        if isinstance(key, slice):
            return range(self.n_frames)[key]
        if isinstance(key, (int, np.integer)):
            k = int(key)
            if not -self.n_frames <= k < self.n_frames:
                raise IndexError(f"frame {k} out of range for {self.n_frames} frames")
            return k % self.n_frames
        arr = np.asarray(key)
        if arr.dtype == bool:
            if arr.shape != (self.n_frames,):
                raise IndexError(f"boolean index of shape {arr.shape}, expected ({self.n_frames},)")
            return np.flatnonzero(arr)
        arr = np.where(arr < 0, arr + self.n_frames, arr).astype(np.int64)
        if np.any((arr < 0) | (arr >= self.n_frames)):
            raise IndexError(f"frame index out of range for {self.n_frames} frames")
        return arr

    def __getitem__(self, key):
        rest = ()
        if isinstance(key, tuple):
            key, rest = (key[0], key[1:]) if key else (Ellipsis, ())
        frames = self._frames(key)
        ds = self.dataset
        simple = all(isinstance(k, (int, np.integer, slice)) for k in rest)
        if isinstance(frames, int):
            if simple:
                return ds[(frames,) + rest]
            return ds[frames][rest] if rest else ds[frames]
        if isinstance(frames, range):
            if len(frames) and frames.step > 0 and simple:   # read only what is asked for
                return ds[(slice(frames.start, frames[-1] + 1, frames.step),) + rest]
            if len(frames) == 0:
                data = ds[0:0]
            elif frames.step > 0:
                data = ds[frames.start:frames[-1] + 1:frames.step]
            else:
                data = ds[frames[-1]:frames[0] + 1:-frames.step][::-1]
        else:
            unique, inverse = np.unique(frames, return_inverse=True)
            block = ds[unique] if unique.size else ds[0:0]
            data = block[inverse.ravel()]
        return data[(slice(None),) + rest] if rest else data

    def __array__(self, dtype=None, copy=None):
        data = self.dataset[:self.n_frames]
        return data if dtype is None else data.astype(dtype)

    def __array_ufunc__(self, ufunc, method, *inputs, **kwargs):
        inputs = tuple(np.asarray(x) if isinstance(x, FrameView) else x for x in inputs)
        return getattr(ufunc, method)(*inputs, **kwargs)

    def __repr__(self):
        return f"<FrameView {self.shape} {self.dtype} of {self.dataset.name!r}>"


class HDF5Sink:
    """Streams frames to an HDF5 file with checkpoints for an exact resume.

    Parameters
    ----------
    path : str or path
    overwrite : bool, default False
        Replace an existing file.
    resume : bool, default False
        Continue the interrupted run in ``path`` (the config must give the same
        numbers); with no file yet, start it. ``resumed`` says which happened.

    The layout is described in ``docs/file-layout.md``. Frames are written as
    they come (memory does not grow with the run); every checkpoint flushes the
    file, so a crash leaves every frame up to the last checkpoint readable.
    """

    def __init__(self, path, overwrite=False, resume=False, protect=()):
        self.path = check_output_path(path, overwrite, resume, protect)
        self.overwrite = overwrite
        self.resume = resume
        self.resumed = False
        self.already_complete = False
        self.file = None
        self._created = None       # (st_dev, st_ino) of the file this sink created
        self._lock_fd = None       # our own lock when HDF5 does not lock

    # ---------------------------------------------------------------- start
    def start(self, spec, layout):
        """Create the file for ``layout`` ({group: (n_frames, [(name, shape, units[, dtype])])}),
        or reopen it to resume (a :class:`ResumeState`)."""
        import os
        self.spec = spec
        self.layout_spec = layout
        if self.resume and os.path.exists(self.path):
            return self._reopen(spec)
        self._create(spec)
        return None

    def _open(self, mode):
        """(file, layout): the layout validated read-only first, so a damaged file is refused
        before it is opened for writing."""
        import h5py
        from .filecheck import validate
        try:
            with h5py.File(self.path, "r", locking=False) as f:
                layout = validate(f, self.path)
                ds = f["positions"]
                cache = _cache_bytes(ds.chunks, ds.dtype)
        except OSError as exc:
            raise _unreadable(self.path, exc) from None
        try:
            return h5py.File(self.path, mode, rdcc_w0=1.0, rdcc_nbytes=cache), layout
        except (OSError, ValueError) as exc:
            text = str(exc)
            if "already open" in text:
                raise _config_error(f"output {self.path!r}: the file is open in this process "
                                    "(a Trajectory from load or run); expected it closed first "
                                    "(traj.close())") from None
            if "unable to lock" in text.lower():
                from .safeio import in_use_error
                raise in_use_error(self.path) from None
            raise _config_error(f"output {self.path!r}: cannot be opened as HDF5 ({text}); "
                                "expected a langsim trajectory file") from None

    def _create(self, spec, replace=None):
        """A new file: laid out at a temporary name, then put in place by
        :func:`langsim.safeio.install` (never truncating a file, never one in use)."""
        import os
        from . import safeio
        temp = safeio.temp_path(self.path)
        try:
            self._layout(spec, temp)
            self._lock_fd = safeio.hold_lock(temp)
            safeio.install(temp, self.path, self.overwrite if replace is None else replace)
            st = os.stat(self.path)
            self._created = (st.st_dev, st.st_ino)
        except BaseException:
            self._close_quietly()
            safeio.remove(temp)
            raise

    def _close_quietly(self):
        import os
        f, self.file = self.file, None
        if f is not None:
            try:
                f.close()
            except Exception:   # the disk may be full: the checkpointed state is already on disk
                pass
        fd, self._lock_fd = self._lock_fd, None
        if fd is not None:
            os.close(fd)

    def _layout(self, spec, path):
        import datetime
        import h5py
        from . import __version__
        p, out = spec.particles, spec.output
        dtype = _dtype(spec)
        chunks = _chunks((p.count, p.dimensions), np.dtype(dtype).itemsize, self.layout_spec[""][0])
        try:
            f = h5py.File(path, "x", fs_strategy="none", rdcc_w0=1.0,
                          rdcc_nbytes=_cache_bytes(chunks, dtype))
        except OSError as exc:
            raise _config_error(f"output {self.path!r}: cannot be created ({exc})") from None
        _metadata_on_flush_only(f)
        self.file = f
        a = f.attrs
        a["format"] = FORMAT
        a["format_version"] = FORMAT_VERSION
        a["langsim_version"] = __version__
        a["created"] = datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")
        a["config"] = config_json(spec.resolved)
        a["seed"] = np.int64(spec.seed)
        a["state"] = STATE_RUNNING
        a["complete"] = False
        a["status"] = _status_json(Status("interrupted", "running"))
        a["n_frames"] = 0
        kw = {}
        if out.compression == "gzip":
            kw = {"compression": "gzip", "compression_opts": 4, "shuffle": True}
        elif out.compression == "lzf":
            kw = {"compression": "lzf", "shuffle": True}
        cp = f.create_group("checkpoint")
        cp.attrs["step"] = -1
        cp.attrs["slot"] = -1
        cp.attrs["wall_time"] = 0.0
        for group, (n_frames, datasets) in self.layout_spec.items():
            g = f if group == "" else f.create_group(group)
            g.attrs["n_frames"] = 0
            types = [np.dtype(e[3]) if len(e) > 3 else np.dtype(dtype) for e in datasets]
            chunks = [_chunks(e[1], t.itemsize, n_frames) for e, t in zip(datasets, types)]
            per = min(c[0] for c in chunks)          # one frame clock: one frame chunk per group
            time = g.create_dataset("time", shape=(0,), maxshape=(None,), dtype=np.float64,
                                    chunks=(max(1024, per),))
            time.attrs["units"] = UNITS["time"]
            for (name, shape, units, *extra), ds_type, c in zip(datasets, types, chunks):
                ds = g.create_dataset(name, shape=(0,) + tuple(shape),
                                      maxshape=(None,) + tuple(shape), dtype=ds_type,
                                      chunks=(per,) + c[1:], **kw)
                ds.attrs["units"] = units
                for key, value in (extra[1] if len(extra) > 1 else {}).items():
                    if value is not None:          # HDF5 attributes have no null
                        ds.attrs[key] = value
                if kw:      # frames of an unfinished compressed chunk wait here (see _FrameGroup)
                    cp.create_dataset(_tail_name(group, name), shape=(2, per) + c[1:],
                                      dtype=ds_type)
            for key, value in _group_counters(group, 0, 0, 0).items():
                cp.attrs[key] = value
        f.flush()
        self._setup(f)
        self.slot = -1

    def _setup(self, f):
        self.groups = {}
        for group, (n_frames, datasets) in self.layout_spec.items():
            names = [e[0] for e in datasets]
            self.groups[group] = _FrameGroup(f if group == "" else f[group], group, names)
        self.headroom = _headroom([ds for g in self.groups.values() for ds in g.datasets], f)

    def _reopen(self, spec):
        f, layout = self._open("r+")
        self.file = f
        try:
            _metadata_on_flush_only(f)
            diff = config_differences(layout.config, spec.resolved)
            if diff:
                lines = [f"  {k}: file has {_short(a)}, config gives {_short(b)}"
                         for k, a, b in diff]
                raise _config_error(
                    [f"resume {self.path!r}: the config differs from the run in the file in "
                     f"{len(diff)} key(s) that change the results; expected the same config "
                     "(or a new output file, or --overwrite):"] + lines)
            state = layout.state
            if state == STATE_COMPLETE:
                self.already_complete = True
                raise RunComplete(self.path)
            if state == STATE_FAILED:
                status = layout.status
                raise _config_error(
                    f"resume {self.path!r}: the run ended with a numerical blow-up "
                    f"({status.get('message')}); resuming would repeat it; expected a smaller "
                    "[dynamics] dt and a fresh run (--overwrite)")
            cp = f["checkpoint"]
            slot = layout.checkpoint_slot
            if slot < 0:                    # stopped before frame 0: nothing to keep
                f.close()
                self.file = None
                self._create(spec, replace=True)
                return None
            step = layout.checkpoint_step
            self._setup(f)
            n_frames = {}
            for name, g in self.groups.items():
                n_frames[name] = g.restore(cp, slot)
            arrays = {name: cp[name][slot] for name in cp if not name.startswith("tail_")}
            f.attrs["n_frames"] = self.groups[""].n_stored
            f.attrs["state"] = STATE_RUNNING
            f.attrs["complete"] = False
            f.attrs["status"] = _status_json(Status("interrupted", "running"))
            f.flush()
        except BaseException:
            f.close()
            self.file = None
            raise
        self.slot = slot
        self.resumed = True
        return ResumeState(step, n_frames, arrays)

    # ---------------------------------------------------------------- write
    def write(self, group, frame0, time, arrays):
        try:
            self.groups[group].write(frame0, time, arrays)
        except (OSError, RuntimeError) as exc:
            raise self._failed(exc) from None

    def checkpoint(self, step, arrays):
        """Store the state after ``step`` in the spare slot, flush, then point at it."""
        f = self.file
        try:
            self._ensure_room()
            cp = f["checkpoint"]
            new = 1 - self.slot if self.slot >= 0 else 0
            for name, value in arrays.items():
                if name not in cp:
                    cp.create_dataset(name, shape=(2,) + value.shape, dtype=np.float64)
                cp[name][new] = value
            for g in self.groups.values():
                g.save_tail(cp, new)
            f.flush()                          # frames and the new slot are on disk ...
            cp.attrs["step"] = int(step)
            for g in self.groups.values():
                for key, value in _group_counters(g.name, g.n_written, g.n_stored,
                                                  g.tail_n).items():
                    cp.attrs[key] = value
            cp.attrs["slot"] = new             # ... before anything points at them
            for g in self.groups.values():
                g.node.attrs["n_frames"] = int(g.n_stored)
            f.flush()
        except (OSError, RuntimeError) as exc:
            raise self._failed(exc) from None
        self.slot = new

    def _ensure_room(self):
        """Refuse to flush when the flush might not fit: a half-written flush can break the file."""
        import errno as _errno
        import os
        import resource
        size = self.file.id.get_filesize()
        limit = resource.getrlimit(resource.RLIMIT_FSIZE)[0]
        if limit != resource.RLIM_INFINITY and size + self.headroom > limit:
            raise OSError(_errno.EFBIG, f"{os.strerror(_errno.EFBIG)} (a checkpoint needs room for "
                          f"the file to reach {(size + self.headroom) / 1e6:.3g} MB; the file size "
                          f"limit of this process is {limit / 1e6:.3g} MB)")
        st = os.statvfs(os.path.dirname(os.path.abspath(self.path)))
        if st.f_bavail * st.f_frsize < self.headroom:
            raise OSError(_errno.ENOSPC, f"{os.strerror(_errno.ENOSPC)} (a checkpoint needs "
                          f"{self.headroom / 1e6:.3g} MB free)")

    def _failed(self, exc):
        """Freeze the file as it is on disk (valid to the last checkpoint); an OSError to raise.

        After a failed write the HDF5 library would write its cached metadata on
        close, half of which may not fit either. The descriptor is pointed at a
        read-only /dev/null instead, so nothing more reaches the file.
        """
        import errno as _errno
        import os
        import re
        text = str(exc)
        match = re.search(r"errno = (\d+)", text)
        code = int(match.group(1)) if match else getattr(exc, "errno", None) or _errno.EIO
        f, self.file = self.file, None
        if f is not None:
            try:
                fd = f.id.get_vfd_handle()
                null = os.open(os.devnull, os.O_RDWR)
                os.dup2(null, fd)
                os.close(null)
            except (OSError, RuntimeError, ValueError, TypeError):
                pass
            _FROZEN.append(f)          # never closed by us: closing would write again
        if match or not isinstance(exc, OSError) or not exc.strerror:   # HDF5's long text
            return OSError(code, os.strerror(code), self.path)
        return OSError(code, exc.strerror, self.path)

    def finish(self, status, run_stats=None):
        f = self.file
        if f is not None:
            state = {"complete": STATE_COMPLETE, "blow-up": STATE_FAILED}.get(status.reason,
                                                                               STATE_INTERRUPTED)
            if state != STATE_INTERRUPTED:      # nothing will follow these frames
                for g in self.groups.values():
                    if g.tail_n:
                        g.store_tail()
            for g in self.groups.values():
                g.node.attrs["n_frames"] = int(g.n_stored)
            f.attrs["status"] = _status_json(status)
            f.attrs["complete"] = bool(status.complete)
            f.attrs["state"] = state
            f.flush()
            self._close_quietly()
        traj = load(self.path)
        traj.run_stats = run_stats
        return traj

    def abort(self):
        """Close after an error without marking the file; frames to the last checkpoint stay
        valid. A file this sink created for a run that never reached its first checkpoint is
        removed: a run that could not start leaves nothing behind."""
        from . import safeio
        if self._created is not None and getattr(self, "slot", -1) < 0 and self.file is not None:
            safeio.remove_if_same(self.path, self._created)   # still locked: still ours
        self._close_quietly()


def _metadata_on_flush_only(f):
    """Keep HDF5 metadata in memory between flushes, so the file on disk changes its
    structure only at a checkpoint (together with no reuse of freed space, set at creation)."""
    try:
        c = f.id.get_mdc_config()
        c.evictions_enabled = False
        c.incr_mode, c.decr_mode, c.flash_incr_mode = 0, 0, 0
        f.id.set_mdc_config(c)
    except (AttributeError, RuntimeError, ValueError):   # an h5py without it: defaults
        pass


def _cache_bytes(chunks, dtype):
    """Chunk-cache size per dataset: two stored chunks, at least 1 MiB."""
    if chunks is None:
        return 2**20
    return max(2**20, 2 * int(np.prod(chunks)) * np.dtype(dtype).itemsize)


def _headroom(datasets, f):
    """Bytes a checkpoint's flush may add: every dataset's chunk cache, full of data not yet
    on disk, plus metadata."""
    cache = f.id.get_access_plist().get_cache()[2]
    return 2**19 + len(datasets) * int(cache)


def _put(ds, start, data):
    """Write ``data`` at frame ``start`` of ``ds``, growing it as needed."""
    stop = start + len(data)
    if ds.shape[0] < stop:
        ds.resize(stop, axis=0)
    ds[start:stop] = data


def _tail_name(group, name):
    return f"tail_{group}.{name}" if group else f"tail_{name}"


def _group_counters(group, n_written, n_stored, tail_n):
    """Checkpoint attributes of a frame group (the root keeps the names of langsim 0.1)."""
    prefix = f"{group}." if group else ""
    return {prefix + "n_frames": int(n_written), prefix + "stored_frames": int(n_stored),
            prefix + "tail_frames": int(tail_n)}


class _FrameGroup:
    """The datasets of one frame clock in a file: ``time`` and the data written with it.

    Frames of compressed data reach the file in whole chunks only: a compressed
    chunk rewritten after a checkpoint (to add frames) may land on the very
    bytes the checkpointed index points at, so a crash then would spoil frames
    already promised valid. Frames of the unfinished last chunk wait in
    ``tail`` and are stored with each checkpoint in ``checkpoint/tail_*``.
    """

    def __init__(self, node, name, data_names):
        self.node = node
        self.name = name
        self.time = node["time"]
        self.data = [node[n] for n in data_names]
        self.datasets = [self.time] + self.data
        first = self.data[0]
        self.buffered = first.compression is not None
        self.frame_chunk = first.chunks[0]
        self.tail = [np.empty((self.frame_chunk,) + ds.shape[1:], dtype=ds.dtype)
                     for ds in self.data] if self.buffered else []
        self.tail_n = 0
        self.n_written = 0
        self.n_stored = 0

    def write(self, frame0, time, arrays):
        data = [arrays[ds.name.rsplit("/", 1)[-1]] for ds in self.data]
        _put(self.time, frame0, time)
        if self.buffered:
            self._buffer(data)
        else:
            for ds, values in zip(self.data, data):
                _put(ds, frame0, values)
            self.n_stored = frame0 + len(time)
        self.n_written = frame0 + len(time)

    def _buffer(self, arrays):
        cf, k, i = self.frame_chunk, len(arrays[0]), 0
        while i < k:
            if self.tail_n == 0 and k - i >= cf:
                m = (k - i) // cf * cf
                for ds, data in zip(self.data, arrays):
                    _put(ds, self.n_stored, data[i:i + m])
                self.n_stored += m
            else:
                m = min(cf - self.tail_n, k - i)
                for t, data in zip(self.tail, arrays):
                    t[self.tail_n:self.tail_n + m] = data[i:i + m]
                self.tail_n += m
                if self.tail_n == cf:
                    self.store_tail()
            i += m

    def store_tail(self):
        for ds, t in zip(self.data, self.tail):
            _put(ds, self.n_stored, t[:self.tail_n])
        self.n_stored += self.tail_n
        self.tail_n = 0

    def save_tail(self, cp, slot):
        for ds, t in zip(self.data, self.tail):
            cp[_tail_name(self.name, ds.name.rsplit("/", 1)[-1])][slot, :self.tail_n] = \
                t[:self.tail_n]

    def restore(self, cp, slot):
        """Back to the checkpoint in ``slot``: frames after it dropped, the tail reloaded."""
        prefix = f"{self.name}." if self.name else ""
        n_written = int(cp.attrs[prefix + "n_frames"])
        stored = int(cp.attrs.get(prefix + "stored_frames", n_written))
        for ds, n in zip(self.datasets, [n_written] + [stored] * len(self.data)):
            if ds.shape[0] != n:
                ds.resize(n, axis=0)
        if self.buffered:
            self.tail_n = int(cp.attrs.get(prefix + "tail_frames", 0))
            for t, ds in zip(self.tail, self.data):
                t[:self.tail_n] = cp[_tail_name(self.name, ds.name.rsplit("/", 1)[-1])][
                    slot, :self.tail_n]
        self.node.attrs["n_frames"] = stored
        self.n_written, self.n_stored = n_written, stored
        return n_written


#: Files frozen after a write error (kept referenced so that nothing flushes them).
_FROZEN = []


def _status_json(status):
    import json
    return json.dumps(status.to_dict(), default=_json_default)


def _attr_str(value):
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def _unreadable(path, exc):
    """The ConfigError for a file HDF5 cannot open (a truncated file is damaged, not busy)."""
    import re
    from .filecheck import DamagedFile
    text = str(exc)
    cut = re.search(r"truncated file: eof = (\d+).*stored_eof = (\d+)", text)
    if cut:
        return DamagedFile(path, "file size", f"{cut.group(1)} bytes",
                           f"{cut.group(2)} bytes, the size its HDF5 superblock records (the "
                           "file was cut short, e.g. by an incomplete copy)")
    return _config_error(f"{path}: not readable as HDF5 ({text}); expected a trajectory file "
                         "written by langsim run")


def _open_layout(path):
    """(open read-only h5py File, validated Layout) of a trajectory file."""
    import os
    import h5py
    from .filecheck import validate
    from .safeio import path_text
    path = path_text(path, "trajectory")
    if not os.path.exists(path):
        raise _config_error(f"{path}: no such file; expected a trajectory file written by "
                            "langsim run")
    if os.path.isdir(path):
        raise _config_error(f"{path}: is a folder; expected a trajectory file (.h5)")
    try:
        f = h5py.File(path, "r", locking=False)
    except OSError as exc:
        raise _unreadable(path, exc) from None
    try:
        return f, validate(f, path)
    except BaseException:
        f.close()
        raise


def read_state(path):
    """Root attributes of a trajectory file as a dict, without loading frames."""
    f, layout = _open_layout(path)
    with f:
        return {"state": layout.state, "n_frames": layout.n_frames, "config": layout.config,
                "status": layout.status, "created": layout.created,
                "langsim_version": layout.langsim_version,
                "checkpoint_step": layout.checkpoint_step,
                "checkpoint_frames": layout.checkpoint_frames}


def load(path):
    """Open a trajectory file read-only.

    Returns
    -------
    Trajectory
        ``time``, ``positions`` and ``velocities`` as :class:`FrameView` objects
        that read frames lazily (``numpy.asarray`` reads them all), trimmed to the
        frames known to be valid. Close it (or use ``with``) when done.

    Raises
    ------
    ConfigError
        When the file is missing, not HDF5, or not a langsim trajectory;
        :class:`~langsim.filecheck.DamagedFile` (a ConfigError) when its layout
        is damaged, naming the item and what was expected.
    """
    from .safeio import path_text
    path = path_text(path, "trajectory")
    f, layout = _open_layout(path)
    try:
        n, state = layout.valid_frames, layout.state
        s = layout.status
        if state == STATE_RUNNING:      # killed writer: trust only the last checkpoint
            s = {"reason": "interrupted", "message": "not finished: the writer is still running "
                 "or was killed; frames up to the last checkpoint are valid"}
        status = Status.from_dict(s)
        time = FrameView(f["time"], n)
        pos = FrameView(f["positions"], n)
        vel = FrameView(f["velocities"], n) if layout.velocities else None
        groups, units = {}, {"positions": pos.units}
        if vel is not None:
            units["velocities"] = vel.units
        for name, m in layout.groups.items():
            node = f[name]
            groups[name] = {"time": FrameView(node["time"], m)}
            for key, ds in node.items():
                if key != "time":
                    groups[name][key] = FrameView(ds, m)
                    units[f"{name}/{key}"] = _attr_str(ds.attrs.get("units", ""))
        metadata = {"format": FORMAT, "format_version": layout.format_version,
                    "langsim_version": layout.langsim_version, "created": layout.created,
                    "compression": f["positions"].compression or "none"}
    except BaseException:
        f.close()
        raise
    traj = Trajectory(time, pos, vel, layout.config, status, path=path, file=f, groups=groups,
                      units=units, file_state=state, metadata=metadata)
    traj.layout = layout
    return traj
