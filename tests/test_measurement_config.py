"""The [measurement] table and the [particles] initial placements: validation and draws."""
import math

import numpy as np
import pytest
from scipy import stats

from langsim import config, initial, seeding
from langsim.measurement import formulas
from langsim.validation import ConfigError

BASE = {"seed": 3, "particles": {"count": 10, "dimensions": 2, "radius": 1e-7},
        "dynamics": {"dt": 1e-3, "duration": 1.0}}
CAMERA = {"frame_rate": 100.0, "exposure": 0.004, "localization_error": 20e-9, "pixel_size": 100e-9,
          "image_shape": [32, 48], "psf_sigma": 120e-9, "photons": 1000.0, "background": 10.0,
          "gain": 2.0, "read_noise": 1.5, "baseline": 100.0, "bit_depth": 12, "em_gain": 50.0}
DETECTOR = {"sampling_rate": 500.0, "sensitivity": [2e5, 3e5], "cross_talk": 0.02, "filter": "photodiode",
            "diode_frequency": 8e3 / 100, "diode_fraction": 0.3, "noise": 1e-6, "anti_alias_cutoff": 200.0,
            "adc_bits": 16, "adc_range": 10.0}


def load(**measurement):
    return config.load({**BASE, "measurement": measurement})


def test_camera_table_resolves_to_steps_and_si():
    m = load(**CAMERA).measurement
    assert (m.frame_steps, m.exposure_steps) == (10, 4)
    assert m.frame_interval == pytest.approx(0.01) and m.exposure == pytest.approx(0.004)
    # trapezoid taps on every step: R = (E^2/6 + 1/12)/(E P) (derived; module notes)
    assert m.blur == pytest.approx((16 / 6 + 1 / 12) / 40)
    assert m.blur - formulas.blur_coefficient("flat", 0.004, 0.01) == pytest.approx(1 / (12 * 4 * 10))
    c = m.camera
    assert c.origin == pytest.approx((-48 * 50e-9, -32 * 50e-9))      # centred on x = y = 0
    assert m.field_of_view == pytest.approx(c.extent)
    assert m.n_frames(1000) == 100 and m.n_frames(3) == 0
    r = load(**CAMERA).resolved["measurement"]
    assert r["frame_rate"] == pytest.approx(100.0) and r["image_shape"] == [32, 48]
    # the PSF width from optics: 0.21 lambda/NA (Zhang et al. 2007; check-values section 14)
    o = load(**{**{k: v for k, v in CAMERA.items() if k != "psf_sigma"}, "wavelength": 600e-9,
                "numerical_aperture": 1.2}).measurement.camera
    assert o.psf_sigma == pytest.approx(0.210285 * 600e-9 / 1.2)


def test_recorder_specs_reproduce_the_reference_frames():
    # the taps the engine's recorders take (offset + k period + i spacing) give the reference averages
    from langsim.measurement.spec import recorder_specs
    from langsim.measurement.stage import reference_frames
    for extra in ({}, {"shutter": "pulses", "pulses": 2}, {"shutter": "strobe"}):
        m = load(**{**CAMERA, **extra}).measurement
        x = np.random.default_rng(1).standard_normal((1001, 3, 2))
        avg, path = reference_frames(x, m)
        specs = {r["name"]: r for r in recorder_specs(m)}
        for name, ref in (("true_positions", avg), ("path", path)):
            r = specs[name]
            k = np.arange(ref.shape[0])[:, None] * r["period"] + r["offset"] + r["spacing"] * np.arange(r["n_taps"])
            taps = x[k]
            got = np.einsum("t,ktnd->knd", np.array(r["weights"]), taps) if r["mode"] == "sum" else taps
            np.testing.assert_allclose(got, ref, rtol=1e-13, atol=1e-15)


def test_detector_table():
    m = load(detector=DETECTOR).measurement
    d = m.detector
    assert m.frame_steps == 0 and d.sampling_steps == 2
    np.testing.assert_allclose(d.matrix(2), [[2e5, 2e5 * 0.02], [3e5 * 0.02, 3e5]])
    assert load(detector=DETECTOR).resolved["measurement"]["detector"]["sampling_rate"] == pytest.approx(500.0)


def test_shutters_and_path_samples():
    m = load(frame_rate=50.0, exposure=0.02, shutter="pulses", pulses=4).measurement
    w, o = m.exposure_taps()
    assert list(o) == [2, 7, 12, 17] and np.allclose(w, 0.25)
    # pulse train blur: (t_E/Dt)(n^2 - 1)/(6 n^2) for midpoint flashes (module notes; exact here)
    assert m.blur == pytest.approx(formulas.blur_coefficient("pulses", 0.02, 0.02, pulses=4))
    with pytest.raises(ConfigError, match="divisor"):
        load(frame_rate=50.0, exposure=0.02, shutter="pulses", pulses=3)
    m = load(frame_rate=10.0, exposure=0.1, path_samples=11).measurement
    w, o = m.path_taps()
    assert list(o) == list(range(0, 101, 10)) and w.sum() == pytest.approx(1.0)
    assert load(frame_rate=10.0).measurement.path_samples == 11     # 100 steps: 16 would not divide
    assert load(frame_rate=10.0, shutter="strobe").measurement.blur == 0.0


INVALID = {
    "frame_rate": [-1.0, "fast", 300.0],        # 300 Hz is 3.33 steps of 1 ms
    "exposure": [-0.001, 0.02, 0.0045],          # longer than a frame; not whole steps
    "shutter": ["round"], "pulses": [0, 100, 3], "path_samples": [4, 0],
    "localization_error": [-1e-9, [1e-9, 2e-9, 3e-9]], "drift_velocity": ["north"],
    "drift_jitter": [-1.0], "on_rate": [0.0], "off_rate": [-2.0], "bleach_rate": ["x"],
    "field_of_view": [[1, 0, 0, 1], [0, 1]], "photons": [0.0], "intensity_spread": [-0.1],
    "pixel_size": [0.0], "image_shape": [[0, 10], [10]], "psf_sigma": [-1.0], "background": [-1.0],
    "gain": [0.0], "read_noise": [-1.0], "baseline": [-5.0], "bit_depth": [0, 40], "em_gain": [0.5],
    "origin": [[0.0]], "defocus_depth": [0.0], "focus": ["up"], "numerical_aperture": [3.0],
}
DET_INVALID = {
    "sampling_rate": [0.0, 300.0], "sensitivity": [-1.0], "cross_talk": ["a", [[0, 1]]],
    "filter": ["bessel"], "cutoff": [-1.0, 400.0], "diode_frequency": [0.0], "diode_fraction": [1.5],
    "noise": [-1.0], "anti_alias_cutoff": [1e6], "anti_alias_order": [0, 9], "adc_bits": [0],
    "adc_range": [-1.0],
}


@pytest.mark.parametrize("key,value", [(k, v) for k, vs in INVALID.items() for v in vs])
def test_invalid_camera_values_are_reported_with_key(key, value):
    table = {**CAMERA, key: value}
    if key == "pulses":
        table["shutter"] = "pulses"
    if key == "numerical_aperture":
        table = {**{k: v for k, v in table.items() if k != "psf_sigma"}, "wavelength": 6e-7}
    with pytest.raises(ConfigError) as e:
        load(**table)
    assert f"[measurement] {key}" in str(e.value)
    if key in ("frame_rate", "exposure") and isinstance(value, float) and value > 0 and key != "exposure" \
            or value == 0.0045:
        assert "whole number of steps" in str(e.value)


@pytest.mark.parametrize("key,value", [(k, v) for k, vs in DET_INVALID.items() for v in vs])
def test_invalid_detector_values_are_reported_with_key(key, value):
    with pytest.raises(ConfigError) as e:
        load(detector={**DETECTOR, "filter": "first-order", "cutoff": 100.0, key: value})
    assert f"[measurement.detector] {key}" in str(e.value) or (
        key == "adc_range" and "adc_range" in str(e.value))


def test_missing_and_conflicting_keys():
    for table, text in (({}, "frame_rate is missing"), ({"frame_rate": 10.0, "on_rate": 1.0}, "go together"),
                        ({"frame_rate": 10.0, "pixel_size": 1e-7}, "image_shape is missing"),
                        ({"frame_rate": 10.0, "colour": 1}, "unknown key"),
                        ({"detector": {"sensitivity": 1.0}}, "sampling_rate is missing")):
        with pytest.raises(ConfigError, match=text):
            load(**table)


def test_uniform_placements():
    # uniform in a box: each axis uniform (KS against scipy.stats.uniform); in a disc: r^2/R^2 and the
    # angle uniform (common practice); p-values above 1e-4 with fixed seeds, and a shifted box fails
    cfg = {**BASE, "particles": {**BASE["particles"], "count": 4000,
                                 "initial": {"box": [[-2e-5, 1e-5], [0.0, 3e-5]]}}}
    spec = config.load(cfg)
    x = initial.initial_positions(spec, seeding.initial_rng(spec.seed))
    assert stats.kstest((x[:, 0] + 2e-5) / 3e-5, "uniform").pvalue > 1e-4
    assert stats.kstest(x[:, 1] / 3e-5, "uniform").pvalue > 1e-4
    assert stats.kstest((x[:, 1] + 0.2e-5) / 3e-5, "uniform").pvalue < 1e-4
    assert spec.resolved["particles"]["initial"] == {"box": [[-2e-5, 1e-5], [0.0, 3e-5]]}
    cfg["particles"] = {**cfg["particles"], "dimensions": 3,
                        "initial": {"disc": 1e-5, "center": [1e-6, 0.0], "z": [-1e-6, 1e-6]}}
    spec = config.load(cfg)
    x = initial.initial_positions(spec, seeding.initial_rng(spec.seed))
    r2 = ((x[:, 0] - 1e-6) ** 2 + x[:, 1] ** 2) / 1e-10
    assert stats.kstest(r2, "uniform").pvalue > 1e-4
    assert stats.kstest((np.arctan2(x[:, 1], x[:, 0] - 1e-6) + math.pi) / (2 * math.pi), "uniform").pvalue > 1e-4
    assert stats.kstest((x[:, 2] + 1e-6) / 2e-6, "uniform").pvalue > 1e-4
    # a density gives the count: 1e11 per m^2 over 20 um x 20 um = 40 emitters
    d = {**BASE["particles"], "initial": {"box": [[0, 2e-5], [0, 2e-5]], "density": 1e11}}
    d.pop("count")
    assert config.load({**BASE, "particles": d}).particles.count == 40
    for bad, text in (({"box": [[1, 0]]}, "ranges"), ({"disc": -1.0}, "radius"),
                      ({"box": [[0, 1]], "density": 1.0}, "count is given too"),
                      ({"circle": 1.0}, "a table"), ({"disc": 1.0, "size": 2}, "unknown key")):
        with pytest.raises(ConfigError, match=text):
            config.load({**BASE, "particles": {**BASE["particles"], "initial": bad}})
