"""Trajectories and the sinks the engine writes them to.

The engine hands frames to a sink and never touches storage itself. A sink has
four calls:

``start(spec) -> ResumeState | None``
    prepare storage; a state to continue from when resuming.
``write(frame0, time, positions, velocities)``
    frames ``frame0 .. frame0 + len(time) - 1``; velocities may be None.
``checkpoint(step, positions, velocities)``
    everything an exact resume needs (the counter-based noise needs only the step).
``finish(status) -> Trajectory``

:class:`MemorySink` keeps everything in arrays. Only this module imports h5py.
"""
from dataclasses import dataclass

import numpy as np


@dataclass
class ResumeState:
    """Where an interrupted run continues: after ``step``, with ``n_frames`` written."""

    step: int
    n_frames: int
    positions: np.ndarray
    velocities: object


@dataclass
class Status:
    """How a run ended. ``complete`` is False when it stopped early."""

    complete: bool
    message: str = "complete"
    step: int = -1
    particle: int = -1
    time: float = float("nan")

    def to_dict(self):
        return dict(self.__dict__)


class Trajectory:
    """A recorded run.

    Attributes
    ----------
    time : ndarray (n_frames,), s
    positions : ndarray or h5py Dataset (n_frames, n_particles, dimensions), m
    velocities : same shape, m/s, or None
        Full-step velocities (after BAOAB's last B), when recorded.
    config : dict
        The resolved configuration (SI values, defaults filled in).
    status : Status
    path : str or None
        The backing file, None for an in-memory trajectory.
    """

    def __init__(self, time, positions, velocities, config, status, path=None, file=None):
        self.time = time
        self.positions = positions
        self.velocities = velocities
        self.config = config
        self.status = status
        self.path = path
        self._file = file

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
        """Time between frames, s."""
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


class MemorySink:
    """Keeps the trajectory in arrays of the configured precision."""

    def start(self, spec):
        self.spec = spec
        p = spec.particles
        dtype = np.float32 if spec.output.precision == "single" else np.float64
        shape = (spec.n_frames, p.count, p.dimensions)
        self.time = spec.dynamics.dt * spec.output.every * np.arange(spec.n_frames)
        self.positions = np.empty(shape, dtype=dtype)
        self.velocities = np.empty(shape, dtype=dtype) if spec.output.velocities else None
        self.n_written = 0
        return None

    def write(self, frame0, time, positions, velocities):
        k = len(time)
        self.time[frame0:frame0 + k] = time
        self.positions[frame0:frame0 + k] = positions
        if self.velocities is not None:
            self.velocities[frame0:frame0 + k] = velocities
        self.n_written = frame0 + k

    def checkpoint(self, step, positions, velocities):
        """Nothing to do: memory does not survive the process."""

    def finish(self, status):
        n = self.n_written
        vel = None if self.velocities is None else self.velocities[:n]
        return Trajectory(self.time[:n], self.positions[:n], vel, self.spec.resolved, status)
