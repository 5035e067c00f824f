"""The measurement stage: recorder frames in, what the instrument reports out, chunk by chunk.

The engine's recorders hand over, for each camera frame, the exposure average
of every particle's path (a "sum" recorder with the shutter's tap weights) and,
for images, the path samples within the exposure (a "sequence" recorder). The
stage adds what the instrument does to them:

- stage drift: d(t) = drift_velocity t + a random walk of rms ``drift_jitter``
  per frame (evaluated at the middle of each exposure);
- blinking (on/off telegraph process with ``on_rate``, ``off_rate``) and
  bleaching (rate ``bleach_rate`` while on), simulated exactly in continuous
  time through each frame interval; an emitter's photons in a frame are
  proportional to the fraction of the exposure it was on;
- brightness heterogeneity: each emitter's brightness is Gamma distributed with
  mean 1 and coefficient of variation ``intensity_spread`` (fixed per emitter);
- a field of view: a localization is reported only while the emitter is in it;
- localization error: Gaussian, ``localization_error`` per axis, on ``positions``;
- images: see :mod:`langsim.measurement.render`.

Everything random is counter-based on the measurement stream, keyed by (frame,
particle or pixel, purpose), and the stage's carried state (blinking state,
bleached flags, the drift walk) is small and returned by :meth:`state` for the
checkpoint, so a resumed run reports the same bits.

Datasets (group ``measured``; per frame shapes) are declared by :meth:`datasets`.
"""
from dataclasses import dataclass

import numpy as np

from numba import njit

from . import render

#: Emitter states of the telegraph process.
OFF, ON, BLEACHED = 0, 1, 2


@dataclass(frozen=True)
class DatasetSpec:
    """A dataset the stage writes: per-frame shape, dtype, units and attributes."""
    name: str
    shape: tuple
    dtype: object
    units: str
    attrs: dict


class MeasurementStage:
    """Turns recorder frames into instrument output (camera side).

    Parameters
    ----------
    measurement : langsim.measurement.spec.Measurement
    n_particles, dims : int
    seed : int, the run's seed (the measurement stream is its child 2)
    spawn_key : tuple of int, the run's spawn key (a sweep child's)
    """

    def __init__(self, measurement, n_particles, dims, seed, spawn_key=()):
        self.m = measurement
        self.n = int(n_particles)
        self.d = int(dims)
        self.key = render.measurement_key(seed, spawn_key)
        self.k0, self.k1 = np.uint64(self.key[0]), np.uint64(self.key[1])
        self.brightness = self._brightness()
        self.reset()

    # --------------------------------------------------------------- state
    def reset(self):
        """State before frame 0: blinking states drawn from their stationary law."""
        m = self.m
        self.next_frame = 0
        self.walk = np.zeros(self.d)
        state = np.full(self.n, ON, dtype=np.int8)
        if m.on_rate is not None:
            p_on = m.on_rate / (m.on_rate + m.off_rate)
            u = np.array([render.uniform(self.k0, self.k1, 0, i, render.BLINK_START, 0) for i in range(self.n)])
            state = np.where(u < p_on, ON, OFF).astype(np.int8)
        self.emitter = state

    def state(self):
        """What a checkpoint must keep (arrays), for :meth:`restore`."""
        return {"next_frame": np.array(self.next_frame), "walk": self.walk.copy(),
                "emitter": self.emitter.copy()}

    def restore(self, state):
        self.next_frame = int(state["next_frame"])
        self.walk = np.array(state["walk"], dtype=float)
        self.emitter = np.array(state["emitter"], dtype=np.int8)

    # ----------------------------------------------------------- datasets
    def datasets(self):
        """The datasets of group ``measured`` (name, per-frame shape, dtype, units, attributes)."""
        m, n, d = self.m, self.n, self.d
        loc_note = ("Gaussian localization error of localization_error (m, per axis) added to the exposure "
                    "average" + ("; with images, a localizer's own error comes on top of it"
                                 if m.camera is not None else ""))
        out = [DatasetSpec("time", (), np.float64, "s", {"meaning": "start of each exposure"}),
               DatasetSpec("positions", (n, d), np.float64, "m",
                           {"meaning": "reported positions: exposure average + drift + localization error; "
                                       "NaN while an emitter is off or outside the field of view",
                            "localization_error": list(m.localization_error), "note": loc_note}),
               DatasetSpec("true_positions", (n, d), np.float64, "m",
                           {"meaning": "exposure average of the true path (no drift, no error)",
                            "blur_coefficient": m.blur}),
               DatasetSpec("drift", (d,), np.float64, "m", {"meaning": "stage drift added to positions"})]
        if m.photons > 0:
            out.append(DatasetSpec("photons", (n,), np.float64, "photons",
                                   {"meaning": "expected detected photons of each emitter in the frame "
                                               "(the image's Poisson noise realises them)"}))
        if m.blinking or m.field_of_view is not None:
            out.append(DatasetSpec("on", (n,), np.bool_, "", {"meaning": "emitting during the exposure"}))
            out.append(DatasetSpec("in_view", (n,), np.bool_, "",
                                   {"meaning": "drifted exposure average inside the field of view",
                                    "field_of_view": list(m.field_of_view) if m.field_of_view else None}))
        if m.camera is not None:
            c = m.camera
            out.append(DatasetSpec("images", tuple(c.image_shape), render.image_dtype(c), "counts",
                                   {"pixel_size": c.pixel_size, "origin": list(c.origin),
                                    "axes": "rows along y, columns along x; pixel (0, 0) has its corner at origin",
                                    "psf_sigma": c.psf_sigma, "background": c.background, "gain": c.gain,
                                    "read_noise": c.read_noise, "baseline": c.baseline,
                                    "bit_depth": c.bit_depth,
                                    "em_gain": c.em_gain if c.em_gain is not None else 0.0}))
        return out

    # -------------------------------------------------------------- frames
    def _brightness(self):
        cv = self.m.intensity_spread
        if cv <= 0:
            return np.ones(self.n)
        shape = 1.0 / (cv * cv)
        return np.array([render.gamma(shape, self.k0, self.k1, 0, i, render.BRIGHTNESS) / shape
                         for i in range(self.n)])

    def _blink(self, frame):
        """On-fraction of each emitter's exposure in ``frame``; advances the states to the next frame."""
        m = self.m
        if not m.blinking:
            return np.ones(self.n)
        frac = np.zeros(self.n)
        _blink_frame(self.emitter, frac, frame, m.frame_interval, m.exposure, m.on_rate or 0.0,
                     m.off_rate or 0.0, m.bleach_rate or 0.0, self.k0, self.k1)
        return frac

    def _drift(self, frame):
        m = self.m
        if frame > 0 and any(m.drift_jitter):
            for a in range(self.d):
                z, _ = render.normal_pair(self.k0, self.k1, frame, a, render.DRIFT, 0)
                self.walk[a] += m.drift_jitter[a] * z
        t_mid = frame * m.frame_interval + 0.5 * m.exposure
        return np.asarray(m.drift_velocity) * t_mid + self.walk

    def process(self, frame0, averages, path=None):
        """Instrument output of frames ``frame0 ..`` from recorder frames.

        Parameters
        ----------
        frame0 : int, index of the first frame (must follow the last one processed)
        averages : (k, n, d) exposure averages of the true path, m
        path : (k, n_taps, n, d) path samples of :meth:`Measurement.path_taps`, m (needed for images)

        Returns
        -------
        dict : dataset name -> array of k frames (see :meth:`datasets`)
        """
        if frame0 != self.next_frame:
            raise ValueError(f"frames must come in order: expected frame {self.next_frame}, got {frame0}")
        m = self.m
        averages = np.asarray(averages, dtype=np.float64)
        k = averages.shape[0]
        names = [s.name for s in self.datasets()]
        out = {s.name: np.empty((k,) + s.shape, dtype=s.dtype) for s in self.datasets()}
        weights, _ = m.path_taps()
        sig = np.asarray(m.localization_error)
        for j in range(k):
            f = frame0 + j
            drift = self._drift(f)
            frac = self._blink(f)
            x = averages[j] + drift
            noisy = x.copy()
            if np.any(sig > 0):
                _localization_noise(noisy, sig, f, self.k0, self.k1)
            on = frac > 0
            view = np.ones(self.n, bool)
            if m.field_of_view is not None:
                x0, x1, y0, y1 = m.field_of_view
                view = (x[:, 0] >= x0) & (x[:, 0] < x1)
                if self.d > 1:
                    view &= (x[:, 1] >= y0) & (x[:, 1] < y1)
            noisy[~(on & view)] = np.nan
            photons = m.photons * self.brightness * frac
            out["time"][j] = f * m.frame_interval
            out["positions"][j] = noisy
            out["true_positions"][j] = averages[j]
            out["drift"][j] = drift
            if "photons" in names:
                out["photons"][j] = photons
            if "on" in names:
                out["on"][j] = on
                out["in_view"][j] = view
            if "images" in names:
                if path is None:
                    raise ValueError("images need the path samples within each exposure (path=...)")
                taps = np.asarray(path[j], dtype=np.float64) + drift
                spots = render.spots_from_path(taps, weights, photons, m.camera)
                out["images"][j] = render.render_frame(spots, m.camera, f, self.key)
        self.next_frame = frame0 + k
        return out


@njit(cache=True)
def _blink_frame(state, frac, frame, T, tE, on_rate, off_rate, bleach, k0, k1):
    """Telegraph process with bleaching through one frame interval [0, T), exposure [0, tE)."""
    for i in range(state.shape[0]):
        s = state[i]
        if tE == 0.0:
            frac[i] = 1.0 if s == ON else 0.0
        t, draw, on_time = 0.0, 0, 0.0
        while t < T and s != BLEACHED:
            rate = off_rate + bleach if s == ON else on_rate
            if rate <= 0.0:
                step = T - t
            else:
                step = -np.log(render.uniform(k0, k1, frame, i, render.BLINKING, draw)) / rate
                draw += 1
            end = min(t + step, T)
            if s == ON and tE > 0.0:
                on_time += max(0.0, min(end, tE) - min(t, tE))
            if t + step >= T:
                break
            if s == ON:
                u = render.uniform(k0, k1, frame, i, render.BLINKING, draw)
                draw += 1
                s = BLEACHED if u * (off_rate + bleach) < bleach else OFF
            else:
                s = ON
            t += step
        if tE > 0.0:
            frac[i] = on_time / tE
        state[i] = s


@njit(cache=True)
def _localization_noise(x, sigma, frame, k0, k1):
    """x[i, a] += sigma[a] N(0, 1), the normals of (frame, particle, component pair)."""
    n, d = x.shape
    for i in range(n):
        for a in range(0, d, 2):
            z0, z1 = render.normal_pair(k0, k1, frame, i, render.LOCALIZATION, a // 2)
            x[i, a] += sigma[a] * z0
            if a + 1 < d:
                x[i, a + 1] += sigma[a + 1] * z1


def reference_frames(positions, measurement, frame0=0, n_frames=None):
    """Recorder frames computed from every-step positions (the reference for the in-kernel recorder).

    positions : (steps + 1, n, d) positions at every step (frame 0 of a run with ``[output] every = 1``)
    Returns ``(averages (k, n, d), path (k, n_taps, n, d))``.
    """
    m = measurement
    steps = positions.shape[0] - 1
    total = m.n_frames(steps)
    k = total - frame0 if n_frames is None else int(n_frames)
    w, o = m.exposure_taps()
    pw, po = m.path_taps()
    start = (frame0 + np.arange(k)) * m.frame_steps
    x = np.asarray(positions, dtype=np.float64)
    averages = np.einsum("t,ktnd->knd", w, x[start[:, None] + o[None, :]])
    path = x[start[:, None] + po[None, :]]
    return averages, path


def measure(positions, measurement, seed, chunk=64):
    """Run the stage over every frame of an every-step trajectory; dict of arrays (reference path)."""
    n, d = positions.shape[1], positions.shape[2]
    stage = MeasurementStage(measurement, n, d, seed)
    total = measurement.n_frames(positions.shape[0] - 1)
    parts = []
    for f0 in range(0, total, chunk):
        k = min(chunk, total - f0)
        avg, path = reference_frames(positions, measurement, f0, k)
        parts.append(stage.process(f0, avg, path if measurement.camera is not None else None))
    return {name: np.concatenate([p[name] for p in parts]) for name in parts[0]}


#: Bytes of images rendered before they are handed to the sink (bounds memory per write).
IMAGE_BATCH_BYTES = 16 * 2**20


class EngineAdapter:
    """Everything the engine needs to run a ``[measurement]``, in a few calls.

    ``recorders()`` lists the recorders to attach (keyword dicts for
    ``engine.Recorder``); ``layout(n_steps)`` the datasets to declare
    ({group: (n_frames, [(name, frame shape, units, dtype, attributes), ...])});
    ``write(sink, frames)`` turns one burst's recorder frames into the instrument's
    output and hands it to the sink (``frames(...)`` and ``detector(...)`` do
    the two halves); ``state()`` and ``restore(arrays)`` carry the stage's state
    through a checkpoint (named arrays of fixed shapes).

    The camera writes group ``measured``; a position detector writes
    ``measured/signal`` when there is no camera, else group ``detector`` (its
    samples have their own clock).
    """

    #: Names of the recorders whose frames go through the adapter (not straight to the sink).
    RECORDERS = ("true_positions", "path", "detector_positions")

    def __init__(self, spec):
        from . import spec as _spec
        self.m = spec.measurement
        p = spec.particles
        self.n, self.d = p.count, p.dimensions
        self.dt = spec.dynamics.dt
        self.specs = _spec.recorder_specs(self.m)
        spawn_key = tuple(getattr(spec, "spawn_key", ()) or ())
        self.camera = (MeasurementStage(self.m, self.n, self.d, spec.seed, spawn_key)
                       if self.m.frame_steps else None)
        self.detector_model = None
        if self.m.detector is not None:
            from .detector import DetectorModel
            self.detector_model = DetectorModel(self.m.detector, self.n, self.d, self.dt, spec.seed,
                                                spawn_key)
        self.detector_group = "measured" if self.camera is None else "detector"

    def recorders(self):
        return [dict(r) for r in self.specs]

    def layout(self, n_steps):
        out = {}
        if self.camera is not None:
            out["measured"] = (self.m.n_frames(n_steps),
                               [(s.name, s.shape, s.units, s.dtype, s.attrs)
                                for s in self.camera.datasets() if s.name != "time"])
        if self.detector_model is not None:
            det = self.m.detector
            out[self.detector_group] = (n_steps // det.sampling_steps + 1, [
                ("signal", (self.n, self.d), "V", np.float64,
                 {"meaning": "position detector output", "sampling_rate": 1.0 / (det.sampling_steps * self.dt),
                  "sensitivity": list(det.sensitivity)})])
        return out

    def attributes(self):
        """{dataset path: attributes} stored beside the data (also the 5th element of the layout)."""
        return {f"{group}/{e[0]}": e[4] for group, (_, sets) in self.layout(0).items() for e in sets}

    def frames(self, frames, first):
        """Arrays for group ``measured`` from recorder frames {"true_positions": ..., "path": ...}."""
        return self.camera.process(first, frames["true_positions"], frames.get("path"))

    def detector(self, step0, positions):
        """Detector samples (V) of the steps step0 .. step0 + len(positions) - 1."""
        return self.detector_model.process(step0, positions)

    def write(self, sink, frames):
        """Process one burst's frames and write them: ``frames`` = {recorder name: (first frame, array)}."""
        if self.camera is not None and "true_positions" in frames:
            first, avg = frames["true_positions"]
            path = None
            if "path" in frames:
                p_first, path = frames["path"]
                if p_first != first or len(path) != len(avg):
                    raise RuntimeError(f"measurement recorders out of step: exposure frames {first}+{len(avg)}, "
                                       f"path frames {p_first}+{len(path)}")
            per = max(1, len(avg))
            if self.m.camera is not None:
                rows, cols = self.m.camera.image_shape
                per = max(1, IMAGE_BATCH_BYTES // (rows * cols * 4))
            for j in range(0, len(avg), per):
                out = self.camera.process(first + j, avg[j:j + per], None if path is None else path[j:j + per])
                time = out.pop("time")
                sink.write("measured", first + j, time, out)
        if self.detector_model is not None and "detector_positions" in frames:
            step0, x = frames["detector_positions"]
            if len(x):
                v = self.detector_model.process(step0, x)
                if len(v):
                    k = self.m.detector.sampling_steps
                    s0 = -(-step0 // k)
                    sink.write(self.detector_group, s0, (s0 + np.arange(len(v))) * (k * self.dt), {"signal": v})

    def state(self):
        out = {}
        if self.camera is not None:
            out.update({f"measurement_{k}": v for k, v in self.camera.state().items()})
        if self.detector_model is not None:
            out.update({f"detector_{k}": v for k, v in self.detector_model.state().items()})
        return out

    def restore(self, arrays):
        if self.camera is not None:
            self.camera.restore({k[len("measurement_"):]: v for k, v in arrays.items()
                                 if k.startswith("measurement_")})
        if self.detector_model is not None:
            self.detector_model.restore({k[len("detector_"):]: v for k, v in arrays.items()
                                         if k.startswith("detector_")})
