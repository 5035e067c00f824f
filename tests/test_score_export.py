"""Scoring a pipeline and exporting ground truth: known noise, dropped and spurious points.

The expected recall, precision and RMSE follow from how the table was made (binomial
counts, Gaussian errors: common practice); matching uses scipy's linear_sum_assignment.
The engine writes group 'measured'; the test checks it against the measurement stage run
on every-step positions (the layout README documents).
"""
import csv
import json
import math

import h5py
import numpy as np
import pytest
import tifffile

import langsim
from langsim import cli, config
from langsim.measurement.score import score
from langsim.measurement.stage import measure

Z = 4.5


def _table(path, rows, header="frame,x,y"):
    with open(path, "w") as fh:
        fh.write(header + "\n")
        for r in rows:
            fh.write(",".join(repr(float(v)) if i else str(int(v)) for i, v in enumerate(r)) + "\n")


def test_score_recovers_known_noise_drops_and_spurious_points(tmp_path):
    rng = np.random.default_rng(4)
    frames, n, sig, q_drop, n_spur = 200, 50, 15e-9, 0.2, 3
    truth = rng.uniform(-10e-6, 10e-6, (frames, n, 2))
    visible = np.ones((frames, n), bool)
    visible[:, :5] = False                       # 5 emitters off: their (noisy) points are spurious
    truth[:, :5, 0] += 40e-6                     # ... and far from the others, so none is matched by chance
    rows, spurious = [], 0
    for f in range(frames):
        keep = rng.random(n) >= q_drop
        for i in np.flatnonzero(keep):
            rows.append([f, *(truth[f, i] + sig * rng.standard_normal(2))])
        spurious += keep[:5].sum()
        for _ in range(n_spur):                  # spurious points farther than max_distance from all emitters
            while True:
                p = rng.uniform(-10e-6, 10e-6, 2)
                if np.min(np.hypot(*(truth[f] - p).T)) > 300e-9:
                    break
            rows.append([f, *p])
            spurious += 1
    path = tmp_path / "loc.csv"
    _table(path, rows)
    from langsim.measurement.score import read_table
    found = read_table(str(path))
    res = score(truth, visible, found, 150e-9, photons=np.full((frames, n), 1000.0), bound=lambda N: 5e-9)
    n_true = visible.sum()
    # recall ~ Binomial(n_true, 1 - q) / n_true; precision = matched / all points
    assert abs(res.recall - (1 - q_drop)) <= Z * math.sqrt(q_drop * (1 - q_drop) / n_true)
    assert res.precision == pytest.approx(res.n_matched / (res.n_matched + spurious), abs=1e-12)
    assert res.jaccard == pytest.approx(res.n_matched / (n_true + len(rows) - res.n_matched))
    for a in range(2):
        # RMSE of Gaussian errors: sigma within its standard error sigma / sqrt(2 m)
        assert abs(res.rmse[a] - sig) <= Z * sig / math.sqrt(2 * res.n_matched)
        assert abs(res.bias[a]) <= Z * res.bias_err[a]
        assert abs(res.rmse[a] - 1.3 * sig) > Z * sig / math.sqrt(2 * res.n_matched)   # a wrong sigma fails
    assert json.loads(res.to_json())["n_true"] == n_true and "Jaccard" in res.format_table()


def _run_with_measurement(tmp_path, extra=None):
    m = {"frame_rate": 50.0, "exposure": 0.01, "localization_error": 0.0, "photons": 2000.0,
         "pixel_size": 100e-9, "image_shape": [48, 64], "psf_sigma": 130e-9, "background": 3.0,
         "drift_velocity": [2e-7, 0.0]}
    m.update(extra or {})
    cfg = {"seed": 8, "particles": {"count": 12, "dimensions": 2, "friction": 4e-8,
                                    "initial": {"box": [[-2.5e-6, 2.5e-6], [-1.8e-6, 1.8e-6]]}},
           "dynamics": {"dt": 1e-3, "steps": 400}, "measurement": m}
    spec = config.load(cfg)
    path = tmp_path / "movie.h5"
    traj = langsim.run(cfg, out=str(path), progress=False)
    out = measure(np.asarray(traj.positions), spec.measurement, spec.seed)
    for name, arr in out.items():                  # the engine wrote the same group
        np.testing.assert_array_equal(np.asarray(traj.measured[name]), arr, err_msg=name)
    traj.close()
    return path, out, spec


def test_export_and_score_commands(tmp_path, capsys):
    path, out, spec = _run_with_measurement(tmp_path)
    csv_path, tif_path = tmp_path / "truth.csv", tmp_path / "movie.tif"
    assert cli.main(["export", str(path), "--table", str(csv_path), "--tiff", str(tif_path)]) == 0
    with open(csv_path) as fh:
        rows = list(csv.DictReader(fh))
    k, n = out["true_positions"].shape[:2]
    assert len(rows) == k * n and list(rows[0]) == ["frame", "particle", "time", "x", "y", "z", "photons", "on",
                                                    "in_view"]
    r = rows[5 * n + 3]
    assert float(r["x"]) == out["true_positions"][5, 3, 0] + out["drift"][5, 0]
    assert float(r["photons"]) == out["photons"][5, 3]
    pages = tifffile.imread(tif_path)
    np.testing.assert_array_equal(pages, out["images"])
    # existing outputs are refused without --overwrite (exit 2, no traceback)
    assert cli.main(["export", str(path), "--table", str(csv_path)]) == 2
    assert "exists" in capsys.readouterr().err
    # a perfect localizer (the truth in the image frame) scores recall = precision = 1, RMSE 0
    loc = tmp_path / "loc.csv"
    true = out["true_positions"] + out["drift"][:, None, :]
    _table(loc, [[f, *(true[f, i] * 1e9)] for f in range(k) for i in range(n)])
    assert cli.main(["score", str(path), str(loc), "--units", "nm", "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res["recall"] == 1.0 and res["precision"] == 1.0 and max(res["rmse"]) < 1e-15
    # the same table in pixels from the image corner
    x0, y0 = spec.measurement.camera.origin
    _table(loc, [[f, (true[f, i, 0] - x0) / 100e-9, (true[f, i, 1] - y0) / 100e-9] for f in range(k) for i in range(n)])
    assert cli.main(["score", str(path), str(loc), "--units", "px"]) == 0
    assert "recall" in capsys.readouterr().out
    assert cli.main(["score", str(path), str(tmp_path / "missing.csv")]) == 2
    _table(loc, [[0, 1.0]], header="frame,x")
    assert cli.main(["score", str(path), str(loc)]) == 2
    assert "lacks y" in capsys.readouterr().err


class _FailingFrames:
    """Frames that read fine up to ``good`` and then fail, as a disk or a kill would."""

    def __init__(self, array, good):
        self.array, self.good = array, good
        self.shape, self.dtype = array.shape, array.dtype

    def __len__(self):
        return len(self.array)

    def __getitem__(self, key):
        if isinstance(key, slice) and (key.stop or len(self.array)) > self.good:
            raise OSError("read failed")
        return self.array[key]


@pytest.mark.parametrize("existing", [False, True])
def test_export_that_fails_midway_leaves_no_half_file(tmp_path, monkeypatch, existing):
    # the table is written at a temporary name and renamed when whole (langsim.safeio)
    from langsim.measurement import export
    monkeypatch.setattr(export, "EXPORT_CHUNK", 2)
    k, n = 6, 3
    data = {"time": np.arange(k) * 0.1, "true_positions": np.zeros((k, n, 2)), "drift": np.zeros((k, 2))}
    target = tmp_path / "truth.csv"
    if existing:
        target.write_text("the user's own table\n")
    assert export.export_table(data, str(tmp_path / "whole.csv")) == k * n      # a good export works
    bad = dict(data, true_positions=_FailingFrames(data["true_positions"], good=4))
    with pytest.raises(OSError):
        export.export_table(bad, str(target), overwrite=existing)
    if existing:
        assert target.read_text() == "the user's own table\n"     # untouched
    else:
        assert not target.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["whole.csv"] + (["truth.csv"] if existing else []))
    # replacing an existing file when asked gives the whole new table
    if existing:
        assert export.export_table(data, str(target), overwrite=True) == k * n
        assert len(target.read_text().splitlines()) == k * n + 1
