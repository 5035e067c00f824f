"""The ``[measurement]`` table: what the instrument records, validated into SI dataclasses.

A camera (frames at ``frame_rate``, each the shutter-weighted average of the
path over its exposure; localization error, drift, blinking, field of view,
and optionally rendered images) and/or a position detector
(``[measurement.detector]``: volts through filters, noise and an ADC). The
recorder inside the kernel works in steps, so the frame interval, the exposure
and the detector's sampling interval must be whole numbers of steps of
``[dynamics] dt``. :func:`parse` reads the table through the project's
:class:`~langsim.validation.Table` (every problem named with key, value and
expectation) and returns a :class:`Measurement` or None.
"""
import math
from dataclasses import asdict, dataclass

import numpy as np

from ..validation import Table, boolean, choice, integer, number, per_axis
from . import formulas

_POS = number(low=0.0)
_NONNEG = number(low=0.0, low_open=False)
_FINITE = number()
#: Largest ADC / camera bit depth.
MAX_BITS = 32
#: Default number of path samples per exposure for rendering (fewer when the exposure has fewer steps).
PATH_SAMPLES = 16
#: Filters of the position detector.
DETECTOR_FILTERS = ("none", "first-order", "photodiode")


@dataclass(frozen=True)
class Camera:
    """Image formation (SI): pixel grid, PSF, photons and camera noise."""
    pixel_size: float           # m
    image_shape: tuple          # (rows, columns)
    origin: tuple               # m, (x, y) of the corner of pixel (0, 0)
    psf_sigma: float            # m, in focus
    defocus_depth: float        # m, defocus at which the PSF is sqrt(2) wider (3D only), or None
    focus: float                # m, z of the focal plane
    background: float           # photons per pixel per frame
    gain: float                 # counts per photoelectron
    read_noise: float           # electrons rms
    baseline: float             # counts
    bit_depth: int              # counts saturate at 2**bit_depth - 1
    em_gain: float              # electron-multiplication gain, or None (no EM register)

    @property
    def extent(self):
        """(x0, x1, y0, y1) of the image, m."""
        rows, cols = self.image_shape
        x0, y0 = self.origin
        return (x0, x0 + cols * self.pixel_size, y0, y0 + rows * self.pixel_size)


@dataclass(frozen=True)
class Detector:
    """A position detector: sensitivity, filters, noise, sampling and ADC (SI)."""
    sampling_steps: int         # steps between samples
    sensitivity: tuple          # V/m per axis
    cross_talk: tuple           # (dims x dims) V/V matrix off the diagonal, rows: output axis
    filter: str                 # "none" | "first-order" | "photodiode"
    cutoff: float               # Hz, first-order filter, or None
    diode_frequency: float      # Hz, photodiode relaxation (3 dB) frequency, or None
    diode_fraction: float       # instantaneous fraction alpha of the photodiode response
    noise: float                # V/sqrt(Hz), one-sided white electronic noise density
    anti_alias_cutoff: float    # Hz, or None
    anti_alias_order: int
    adc_bits: int               # or None (no quantization)
    adc_range: float            # V, full scale +- adc_range

    def matrix(self, dims):
        """Volts per metre: rows are output channels, columns position axes."""
        m = np.array(self.cross_talk, dtype=float).reshape(dims, dims)
        return np.diag(self.sensitivity) @ (np.eye(dims) + m)


@dataclass(frozen=True)
class Measurement:
    """The resolved ``[measurement]`` table (SI; times also in steps)."""
    dt: float                   # s, the dynamics step
    frame_steps: int            # steps between frames (0: no camera frames)
    exposure_steps: int         # steps of one exposure
    shutter: str
    pulses: int
    path_samples: int           # taps per exposure used for rendering (sequence recorder)
    localization_error: tuple   # m per axis
    drift_velocity: tuple       # m/s per axis
    drift_jitter: tuple         # m rms per frame per axis (random walk of the stage)
    on_rate: float              # 1/s, off -> on (None: no blinking)
    off_rate: float             # 1/s, on -> off
    bleach_rate: float          # 1/s while on (None: no bleaching)
    field_of_view: tuple        # (x0, x1, y0, y1) m, or None
    photons: float              # mean detected photons per emitter per frame (fully on)
    intensity_spread: float     # coefficient of variation of emitter brightness between particles
    camera: object              # Camera or None
    detector: object            # Detector or None
    resolved: dict

    @property
    def frame_interval(self):
        return self.frame_steps * self.dt

    @property
    def exposure(self):
        return self.exposure_steps * self.dt

    @property
    def frame_rate(self):
        return 1.0 / self.frame_interval

    @property
    def blinking(self):
        return self.off_rate is not None or self.bleach_rate is not None

    def n_frames(self, steps):
        """Frames whose exposure ends within a run of ``steps`` steps."""
        if not self.frame_steps or steps < self.exposure_steps:
            return 0
        return (steps - self.exposure_steps) // self.frame_steps + 1

    def exposure_taps(self):
        """(weights, offsets in steps) of the exposure average ("sum" recorder, every step)."""
        return shutter_taps(self.shutter, self.exposure_steps, self.pulses)

    def path_taps(self):
        """(weights, offsets) of the path samples used for rendering ("sequence" recorder)."""
        if self.shutter == "flat":
            return formulas.trapezoid_taps(self.exposure_steps, None if self.exposure_steps == 0
                                           else self.path_samples)
        return self.exposure_taps()

    @property
    def blur(self):
        """Exact blur coefficient of the recorded exposure average (taps at steps)."""
        w, o = self.exposure_taps()
        return formulas.tap_blur_coefficient(w, o, self.frame_steps)


def recorder_specs(m):
    """The engine recorders the measurement stage needs, as keyword dicts for ``engine.Recorder``.

    ``true_positions`` (group ``measured``): the exposure average ("sum" over the shutter's
    taps); ``path`` (images only): the path samples ("sequence"); ``detector_positions``: every
    step (a detector). Taps of frame k sit at offset + k period + i spacing steps.
    """
    out = []
    if m.frame_steps:
        w, o = m.exposure_taps()
        out.append(dict(name="true_positions", group="measured", period=m.frame_steps, offset=int(o[0]),
                        n_taps=len(w), spacing=int(o[1] - o[0]) if len(o) > 1 else 1,
                        weights=tuple(float(v) for v in w), mode="sum", units="m"))
        if m.camera is not None:
            w, o = m.path_taps()
            out.append(dict(name="path", group="measured", period=m.frame_steps, offset=int(o[0]),
                            n_taps=len(w), spacing=int(o[1] - o[0]) if len(o) > 1 else 1,
                            weights=tuple(float(v) for v in w), mode="sequence", units="m"))
    if m.detector is not None:
        out.append(dict(name="detector_positions", group="detector", period=1, offset=0, n_taps=1,
                        spacing=1, weights=(1.0,), mode="sum", units="m"))
    return out


def shutter_taps(shutter, exposure_steps, pulses=1):
    """Tap weights and step offsets of a shutter over ``exposure_steps`` steps.

    flat: trapezoid weights on every step (the exposure-average of the path);
    strobe: one tap at the exposure start; pulses: ``pulses`` equal taps at the
    midpoints of equal parts of the exposure (rounded to whole steps).
    """
    if shutter == "flat":
        return formulas.trapezoid_taps(exposure_steps)
    if shutter == "strobe":
        return np.array([1.0]), np.array([0], dtype=np.int64)
    n = int(pulses)
    gap = exposure_steps // n                    # validation makes n divide the exposure
    offsets = gap // 2 + gap * np.arange(n, dtype=np.int64)
    return np.full(n, 1.0 / n), offsets


def _steps(t, key, value, dt, what):
    """A time that must be a whole number of steps of dt; returns the steps or None."""
    steps = round(value / dt)
    if steps >= 1 and abs(steps * dt - value) <= 1e-9 * value:
        return steps
    near = max(1, steps)
    t.errors.add(t.where(key), t.mapping.get(key),
                 f"{what} that is a whole number of steps of [dynamics] dt = {dt!r} s (the recorder "
                 f"works in steps): {value!r} s is {value / dt:.6g} steps; nearest {near} steps = "
                 f"{near * dt:.6g} s", None)
    return None


def _pair(element, what):
    def check(value):
        if not isinstance(value, (list, tuple)) or len(value) != 2:
            from ..validation import Invalid
            raise Invalid(what)
        return [element(v) for v in value]
    check.expected = what
    return check


def parse(mapping, errors, dims, dt, steps):
    """Validate ``[measurement]`` (a mapping or None) into a :class:`Measurement` (or None)."""
    if mapping is None:
        return None
    t = Table(errors, "[measurement]", mapping, "[measurement] {key}")
    det_map = t.raw("detector")
    rate = t.get("frame_rate", _POS, units="Hz")
    camera_keys = ("exposure", "shutter", "pulses", "path_samples", "localization_error", "photons",
                   "pixel_size", "image_shape")
    if rate is None and det_map is None and not t.has("frame_rate"):
        errors.note("[measurement] frame_rate is missing: expected a number > 0 (Hz), or a "
                    "[measurement.detector] table")
    if rate is None and any(t.has(k) for k in camera_keys) and not t.has("frame_rate"):
        errors.note("[measurement] frame_rate is missing: camera keys need it (Hz)")
    frame_steps = exposure_steps = 0
    if rate is not None:
        frame_steps = _steps(t, "frame_rate", 1.0 / rate, dt, "a frame interval 1/frame_rate")
        if frame_steps is None:
            rate, frame_steps = None, 1     # reported; the exposure is not compared with it
    exposure = t.get("exposure", _NONNEG, units="s")
    if rate is None:
        exposure_steps = frame_steps
    else:
        interval = frame_steps * dt
        if exposure is None:
            exposure_steps = frame_steps
        elif exposure > interval * (1 + 1e-9):
            t.bad("exposure", f"a number <= the frame interval 1/frame_rate = {interval:.6g} s", "s")
        elif exposure == 0:
            exposure_steps = 0
        else:
            exposure_steps = _steps(t, "exposure", exposure, dt, "an exposure") or frame_steps
        if frame_steps and steps < exposure_steps:
            errors.note(f"[measurement] exposure: the run has {steps} steps, fewer than one exposure "
                        f"({exposure_steps} steps); expected a longer [dynamics] duration")
    shutter = t.get("shutter", choice(*formulas.SHUTTERS), default="flat")
    pulses = t.get("pulses", integer(1, 10**6), default=1 if shutter != "pulses" else None)
    if shutter == "pulses":
        if pulses is None:
            errors.note("[measurement] pulses is missing: shutter = 'pulses' needs the number of "
                        "flashes per exposure (an integer >= 1)")
            pulses = 1
        elif exposure_steps and exposure_steps % pulses:
            t.bad("pulses", f"a divisor of the exposure's {exposure_steps} steps (flashes evenly spaced in "
                            "whole steps)")
    elif t.has("pulses") and shutter != "pulses":
        t.bad("pulses", "no value: pulses applies to shutter = 'pulses'")
    samples = t.get("path_samples", integer(1, 10**6))
    if samples is None:
        samples = _default_samples(exposure_steps)
    elif exposure_steps and (samples < 2 or exposure_steps % (samples - 1)):
        t.bad("path_samples", f"an integer >= 2 with path_samples - 1 dividing the exposure of "
                              f"{exposure_steps} steps")
        samples = _default_samples(exposure_steps)
    loc = t.get("localization_error", per_axis(_NONNEG, dims), default=[0.0] * dims, units="m")
    vel = t.get("drift_velocity", per_axis(_FINITE, dims), default=[0.0] * dims, units="m/s")
    jit = t.get("drift_jitter", per_axis(_NONNEG, dims), default=[0.0] * dims, units="m rms per frame")
    on_rate = t.get("on_rate", _POS, units="1/s")
    off_rate = t.get("off_rate", _POS, units="1/s")
    if (on_rate is None) != (off_rate is None):
        errors.note("[measurement] on_rate and off_rate go together (blinking between on and off, "
                    "1/s): expected both or neither")
    bleach = t.get("bleach_rate", _POS, units="1/s")
    fov = t.get("field_of_view", _box, units="m")
    photons = t.get("photons", _POS, units="photons per emitter per frame")
    spread = t.get("intensity_spread", _NONNEG, default=0.0, units="relative standard deviation")
    camera = _camera(t, dims, photons, errors)
    if fov is None and camera is not None:
        fov = camera.extent
    detector = None
    if det_map is not None:
        detector = _detector(Table(errors, "[measurement.detector]", det_map,
                                   "[measurement.detector] {key}"), dims, dt)
    t.finish()
    m = Measurement(dt, frame_steps, exposure_steps, shutter, pulses or 1, samples, tuple(loc), tuple(vel),
                    tuple(jit), on_rate, off_rate, bleach, None if fov is None else tuple(fov),
                    photons if photons is not None else 0.0, spread, camera, detector, {})
    resolved = {k: v for k, v in asdict(m).items() if k not in ("resolved", "camera", "detector", "dt",
                                                                 "frame_steps", "exposure_steps")}
    for key in ("localization_error", "drift_velocity", "drift_jitter", "field_of_view"):
        resolved[key] = None if resolved[key] is None else list(resolved[key])
    if frame_steps:
        resolved["frame_rate"] = 1.0 / (frame_steps * dt)
        resolved["exposure"] = exposure_steps * dt
    if camera is not None:
        c = asdict(camera)
        c["image_shape"], c["origin"] = list(c["image_shape"]), list(c["origin"])
        resolved.update(c)
    if detector is not None:
        d = asdict(detector)
        d["sampling_rate"] = 1.0 / (d.pop("sampling_steps") * dt)
        d["sensitivity"], d["cross_talk"] = list(d["sensitivity"]), [list(r) for r in np.reshape(
            d["cross_talk"], (dims, dims))]
        resolved["detector"] = d
    object.__setattr__(m, "resolved", resolved)
    return m


def _default_samples(exposure_steps):
    """Largest n <= PATH_SAMPLES with n - 1 dividing the exposure (every step for short ones)."""
    if exposure_steps == 0:
        return 1
    if exposure_steps + 1 <= PATH_SAMPLES:
        return exposure_steps + 1
    for n in range(PATH_SAMPLES, 1, -1):
        if exposure_steps % (n - 1) == 0:
            return n
    return 2


def _box(value):
    from ..validation import Invalid
    what = "[x0, x1, y0, y1] with x0 < x1 and y0 < y1 (m)"
    if not isinstance(value, (list, tuple)) or len(value) != 4:
        raise Invalid(what)
    v = [_FINITE(u) for u in value]
    if not (v[0] < v[1] and v[2] < v[3]):
        raise Invalid(what)
    return v


def _camera(t, dims, photons, errors):
    image_keys = ("pixel_size", "image_shape", "psf_sigma", "wavelength", "numerical_aperture",
                  "background", "gain", "read_noise", "baseline", "bit_depth", "em_gain", "origin",
                  "defocus_depth", "focus")
    if not any(t.has(k) for k in image_keys):
        for k in image_keys:
            t.known.append(k)
        return None
    pixel = t.get("pixel_size", _POS, required=True, units="m")
    shape = t.get("image_shape", _pair(integer(1, 1 << 16), "[rows, columns], integers >= 1"),
                  required=True)
    sigma = t.get("psf_sigma", _POS, units="m")
    wavelength = t.get("wavelength", _POS, units="m")
    na = t.get("numerical_aperture", number(low=0.0, high=2.0), units="")
    if sigma is None:
        if wavelength is not None and na is not None:
            sigma = formulas.psf_sigma_from_optics(wavelength, na)
        elif not t.has("psf_sigma"):
            errors.note("[measurement] psf_sigma is missing: expected a number > 0 (m; about 0.21 "
                        "wavelength/numerical_aperture), or wavelength (m) and numerical_aperture")
    elif wavelength is not None or na is not None:
        errors.note("[measurement] psf_sigma and wavelength/numerical_aperture are both given: "
                    "expected one way of setting the PSF width")
    if photons is None and not t.has("photons"):
        errors.note("[measurement] photons is missing: images need the mean detected photons per "
                    "emitter per frame (a number > 0)")
    depth = t.get("defocus_depth", _POS, units="m")
    if dims == 3 and depth is None and sigma is not None:
        depth = None   # no widening unless asked for
    focus = t.get("focus", _FINITE, default=0.0, units="m")
    background = t.get("background", _NONNEG, default=0.0, units="photons per pixel per frame")
    gain = t.get("gain", _POS, default=1.0, units="counts per photoelectron")
    read_noise = t.get("read_noise", _NONNEG, default=0.0, units="electrons rms")
    baseline = t.get("baseline", _NONNEG, default=100.0, units="counts")
    bits = t.get("bit_depth", integer(1, MAX_BITS), default=16)
    em = t.get("em_gain", number(low=1.0, low_open=False), units="electrons per electron")
    rows, cols = shape or (1, 1)
    pixel = pixel or 1.0
    origin = t.get("origin", _pair(_FINITE, "[x, y] (m)"), units="m")
    if origin is None:
        origin = [-cols * pixel / 2.0, -rows * pixel / 2.0]
    return Camera(pixel, (rows, cols), tuple(origin), sigma or 1.0, depth, focus, background, gain,
                  read_noise, baseline, bits, em)


def _detector(t, dims, dt):
    rate = t.get("sampling_rate", _POS, required=True, units="Hz")
    steps = 1
    if rate is not None:
        steps = _steps(t, "sampling_rate", 1.0 / rate, dt, "a sampling interval 1/sampling_rate") or 1
    sens = t.get("sensitivity", per_axis(_POS, dims), required=True, units="V/m")
    cross = t.raw("cross_talk", 0.0)
    matrix = _cross_talk(t, cross, dims)
    kind = t.get("filter", choice(*DETECTOR_FILTERS), default="none")
    cutoff = t.get("cutoff", _POS, units="Hz")
    f3 = t.get("diode_frequency", _POS, units="Hz")
    alpha = t.get("diode_fraction", number(low=0.0, high=1.0, low_open=False), units="")
    nyquist_step = 0.5 / dt
    if kind == "first-order" and cutoff is None:
        t.errors.note("[measurement.detector] cutoff is missing: filter = 'first-order' needs the "
                      "3 dB frequency (Hz)")
    if kind == "photodiode" and (f3 is None or alpha is None):
        t.errors.note("[measurement.detector] filter = 'photodiode' needs diode_frequency (Hz, the "
                      "relaxation frequency f_3dB) and diode_fraction (alpha, 0..1) [Berg-Sorensen et "
                      "al. 2003]")
    for key, v in (("cutoff", cutoff), ("diode_frequency", f3)):
        if v is not None and v >= 0.5 * nyquist_step:
            t.bad(key, f"a frequency below a quarter of the step rate 1/dt ({0.5 * nyquist_step:.6g} Hz), "
                       "so that the step-rate filter is accurate", "Hz")
    noise = t.get("noise", _NONNEG, default=0.0, units="V/sqrt(Hz), one-sided")
    aa = t.get("anti_alias_cutoff", _POS, units="Hz")
    if aa is not None and aa >= 0.5 * nyquist_step:
        t.bad("anti_alias_cutoff", f"a frequency below {0.5 * nyquist_step:.6g} Hz (a quarter of 1/dt)", "Hz")
    order = t.get("anti_alias_order", integer(1, 8), default=4)
    bits = t.get("adc_bits", integer(1, MAX_BITS))
    rng = t.get("adc_range", _POS, units="V")
    if (bits is None) != (rng is None):
        t.errors.note("[measurement.detector] adc_bits and adc_range go together: expected both "
                      "(an ADC of adc_bits over +- adc_range V) or neither (no quantization)")
    t.finish()
    return Detector(steps, tuple(sens or [1.0] * dims), tuple(matrix), kind, cutoff, f3,
                    1.0 if alpha is None else alpha, noise, aa, order, bits, rng)


def _cross_talk(t, value, dims):
    """Off-diagonal couplings (V/V): a scalar for all pairs or a dims x dims matrix (diagonal ignored)."""
    from ..validation import _is_number
    if _is_number(value) and math.isfinite(value):
        m = np.full((dims, dims), float(value))
    else:
        try:
            m = np.array(value, dtype=float)
        except (TypeError, ValueError):
            m = None
        if m is None or m.shape != (dims, dims) or not np.all(np.isfinite(m)):
            t.bad("cross_talk", f"a number or a {dims} x {dims} array of finite numbers (V/V; row: "
                                "output channel, column: position axis; the diagonal is ignored)")
            m = np.zeros((dims, dims))
    np.fill_diagonal(m, 0.0)
    return m.ravel().tolist()
