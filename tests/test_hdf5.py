"""The HDF5 sink and reader: same numbers as in memory, the documented layout, streaming."""
import datetime
import json
import os
import subprocess
import sys
import textwrap

import h5py
import numpy as np
import pytest

import langsim
from langsim import config as _config
from langsim.engine import Engine
from langsim.trajectory import HDF5Sink, MemorySink, config_json, load
from langsim.units import k_B
from langsim.validation import ConfigError

from conftest import Z_MAX

pytestmark = pytest.mark.filterwarnings("ignore::langsim.config.LangsimWarning")

KT = k_B * 295.15

#: 4000 independent beads in a 1D trap, started in the continuous equilibrium (variance
#: kT/k) and run with Euler-Maruyama at k dt / gamma = 0.5, whose exact stationary
#: variance is (kT/k) / (1 - k dt / (2 gamma)) = 4/3 kT/k (shared reference values, sec. 6).
EM_TRAP = {"seed": 5, "particles": {"friction": 1e-8, "count": 4000},
           "potential": [{"type": "harmonic", "stiffness": 1e-6}],
           "dynamics": {"dt": 5e-3, "steps": 200, "allow_unstable": True},
           "output": {"every": 4}}
#: Underdamped BAOAB oscillator with velocities, omega dt = 0.1 (see cantilever.toml for
#: where such numbers come from).
BAOAB = {"seed": 9, "particles": {"mass": 1e-12, "friction": 1e-7, "count": 3, "dimensions": 2},
         "potential": [{"type": "harmonic", "stiffness": [1e-2, 2e-2]}],
         "dynamics": {"regime": "underdamped", "dt": 1e-6, "steps": 3000},
         "output": {"every": 3, "velocities": True}}
FREE_SINGLE = {"seed": 2, "particles": {"radius": 1e-7, "count": 50, "dimensions": 3},
               "dynamics": {"dt": 1e-3, "steps": 500},
               "output": {"precision": "single", "compression": "gzip"}}


def run_with(sink_kind, cfg, tmp_path, name="t.h5"):
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spec = _config.load(cfg)
    sink = MemorySink() if sink_kind == "memory" else HDF5Sink(tmp_path / name)
    return Engine(spec, sink).run()


@pytest.fixture(params=["memory", "hdf5"])
def sink_kind(request):
    return request.param


def test_em_variance_exact_finite_step(sink_kind, tmp_path):
    traj = run_with(sink_kind, EM_TRAP, tmp_path)
    try:
        ratio, a = 0.5, 1 - 0.5
        v0 = KT / 1e-6
        n = 200
        predicted = a ** (2 * n) * v0 + (1 - a ** (2 * n)) * v0 / (1 - ratio / 2)
        x = np.asarray(traj.positions[-1], dtype=float)[:, 0]
        var = np.mean(x * x)
        se = var * np.sqrt(2.0 / len(x))           # Gaussian sample variance, known mean 0
        assert abs(var - predicted) < Z_MAX * se
        assert abs(var - v0) > Z_MAX * se              # and distinguishable from kT/k
    finally:
        traj.close()


@pytest.mark.parametrize("cfg", [EM_TRAP, BAOAB, FREE_SINGLE], ids=["em", "baoab", "single-gzip"])
def test_memory_and_hdf5_sinks_identical(cfg, tmp_path):
    mem = run_with("memory", cfg, tmp_path)
    with run_with("hdf5", cfg, tmp_path) as disk:
        assert disk.n_frames == mem.n_frames == cfg["dynamics"]["steps"] // cfg["output"].get(
            "every", 1) + 1
        assert np.array_equal(np.asarray(disk.time), mem.time)
        assert disk.positions.dtype == mem.positions.dtype
        assert np.array_equal(np.asarray(disk.positions), mem.positions)
        if mem.velocities is None:
            assert disk.velocities is None
        else:
            assert np.array_equal(np.asarray(disk.velocities), mem.velocities)
        assert json.loads(config_json(disk.config)) == json.loads(config_json(mem.config))
        assert disk.status.complete and mem.status.complete


def test_layout_with_plain_h5py(tmp_path):
    cfg = dict(BAOAB, output={"every": 3, "velocities": True, "compression": "lzf",
                              "precision": "single"})
    run_with("hdf5", cfg, tmp_path).close()
    spec = _config.load(cfg)
    n_frames = 3000 // 3 + 1
    with h5py.File(tmp_path / "t.h5", "r") as f:
        a = f.attrs
        assert a["format"] == "langsim-trajectory" and a["format_version"] == 1
        assert a["langsim_version"] == langsim.__version__
        created = datetime.datetime.fromisoformat(a["created"])
        assert created.tzinfo is not None and created.utcoffset().total_seconds() == 0
        assert json.loads(a["config"]) == json.loads(config_json(spec.resolved))
        assert json.loads(a["config"])["dynamics"]["dt"] == 1e-6
        assert a["seed"] == 9 and bool(a["complete"]) and a["state"] == "complete"
        assert a["n_frames"] == n_frames
        assert json.loads(a["status"])["complete"] is True
        for name, units in (("time", "s"), ("positions", "m"), ("velocities", "m/s")):
            ds = f[name]
            assert ds.attrs["units"] == units
            assert ds.shape[0] == n_frames and ds.maxshape[0] is None
            assert ds.chunks is not None
            assert ds.compression == (None if name == "time" else "lzf")
        assert f["positions"].dtype == np.float32 and f["time"].dtype == np.float64
        assert f["positions"].shape == (n_frames, 3, 2)
        np.testing.assert_allclose(f["time"][:], 3e-6 * np.arange(n_frames), rtol=1e-12)
        cp = f["checkpoint"]
        assert cp.attrs["step"] == 3000 and cp.attrs["n_frames"] == n_frames
        slot = cp.attrs["slot"]
        # the checkpoint is the full-precision state at the last frame
        np.testing.assert_array_equal(cp["positions"][slot].astype(np.float32),
                                      f["positions"][-1])
        assert cp["velocities"][slot].dtype == np.float64
    cfg_gzip = dict(FREE_SINGLE)
    run_with("hdf5", cfg_gzip, tmp_path, "g.h5").close()
    with h5py.File(tmp_path / "g.h5", "r") as f:
        assert f["positions"].compression == "gzip" and f["positions"].shuffle
        assert "velocities" not in f and "velocities" not in f["checkpoint"]
        assert f["checkpoint"]["tail_positions"].shape == (2,) + f["positions"].chunks


def test_load_reads_lazily_and_slices_like_numpy(tmp_path):
    mem = run_with("memory", BAOAB, tmp_path)
    run_with("hdf5", BAOAB, tmp_path).close()
    traj = load(tmp_path / "t.h5")
    with traj:
        assert isinstance(traj.positions, langsim.trajectory.FrameView)
        assert traj.positions.shape == mem.positions.shape and len(traj.positions) == 1001
        for key in (5, -1, slice(None), slice(10, 20), slice(3, None, 7), slice(None, None, -4),
                    slice(900, 2000), slice(50, 10), (slice(2, 9), 1), (7, slice(None), 0),
                    [4, 2, 4, -1], np.arange(1001) % 3 == 0, (Ellipsis,)):
            np.testing.assert_array_equal(traj.positions[key], mem.positions[key], err_msg=str(key))
        with pytest.raises(IndexError):
            traj.positions[1001]
        # arithmetic and numpy functions act as on the arrays (numpy is the reference)
        np.testing.assert_array_equal(traj.time * 1e3, np.asarray(mem.time) * 1e3)
        np.testing.assert_array_equal(1e9 * traj.positions - mem.positions, 1e9 * mem.positions - mem.positions)
        np.testing.assert_array_equal(np.mean(traj.positions, axis=0), np.mean(mem.positions, axis=0))
        assert traj.config["seed"] == 9 and traj.status.complete
    assert traj._file is None


def test_valid_frames_only_after_unfinished_write(tmp_path):
    """Frames written after the last checkpoint are not shown for a file left 'running'."""
    spec = _config.load(dict(EM_TRAP, dynamics={"dt": 5e-4, "steps": 200}))
    sink = HDF5Sink(tmp_path / "u.h5")
    sink.start(spec, Engine(spec, sink).layout())
    x = np.zeros((4000, 1))
    sink.write("", 0, np.array([0.0]), {"positions": x[None]})
    sink.checkpoint(0, {"positions": x})
    sink.write("", 1, np.array([1.0, 2.0]), {"positions": np.ones((2, 4000, 1))})   # no checkpoint
    sink.abort()                      # closed without finishing, as a killed writer leaves it
    with h5py.File(tmp_path / "u.h5", "r") as f:
        assert f["positions"].shape[0] == 3 and f.attrs["state"] == "running"
    with load(tmp_path / "u.h5") as traj:
        assert traj.n_frames == 1 and not traj.status.complete
        assert "killed" in traj.status.message


def test_output_path_refusals(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        HDF5Sink(tmp_path / "missing" / "x.h5")
    existing = tmp_path / "keep.h5"
    existing.write_bytes(b"precious")
    with pytest.raises(ConfigError, match="file exists.*overwrite"):
        HDF5Sink(existing)
    assert existing.read_bytes() == b"precious"
    with pytest.raises(ConfigError, match="is a folder"):
        HDF5Sink(tmp_path)
    with pytest.raises(ConfigError, match="overwrite and resume both"):
        HDF5Sink(existing, overwrite=True, resume=True)
    other = tmp_path / "other.h5"
    langsim.run(EM_TRAP, other, progress=False).close()
    with h5py.File(other, "r+") as f:
        f.attrs["format"] = "someone-else"
    with pytest.raises(ConfigError, match="not a langsim trajectory"):
        langsim.run(EM_TRAP, other, progress=False, resume=True)
    traj = langsim.run(EM_TRAP, existing, progress=False, overwrite=True)   # asked: replaced
    assert traj.n_frames == 51
    traj.close()
    if os.geteuid() != 0:
        locked = tmp_path / "ro"
        locked.mkdir()
        locked.chmod(0o500)
        with pytest.raises(ConfigError, match="not writable"):
            HDF5Sink(locked / "x.h5")


MEMORY_SCRIPT = textwrap.dedent("""
    import sys
    import langsim

    def status_kb(field):
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1])

    steps, out = int(sys.argv[1]), sys.argv[2]
    cfg = {"seed": 1, "particles": {"friction": 1e-8, "count": 1000},
           "potential": [{"type": "harmonic", "stiffness": 1e-7}],
           "dynamics": {"dt": 1e-3, "steps": steps}}
    langsim.run(dict(cfg, dynamics={"dt": 1e-3, "steps": 10}), progress=False)   # warm up
    with open("/proc/self/clear_refs", "w") as fh:   # reset the peak to the current RSS
        fh.write("5")
    base = status_kb("VmHWM")
    traj = langsim.run(cfg, None if out == "-" else out, progress=False)
    print((status_kb("VmHWM") - base) / 1024.0)
""")


def _growth_mb(steps, out):
    proc = subprocess.run([sys.executable, "-c", MEMORY_SCRIPT, str(steps), str(out)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return float(proc.stdout.split()[-1])


def test_memory_stays_flat_when_streaming(tmp_path):
    """Peak RSS of a run 10x longer grows by far less than its data (200 MB at 10x)."""
    short = _growth_mb(2500, tmp_path / "short.h5")      # 20 MB of frames
    long = _growth_mb(25000, tmp_path / "long.h5")       # 200 MB of frames
    in_memory = _growth_mb(25000, "-")                   # the same run kept in memory
    assert in_memory > 150, (short, long, in_memory)     # the measurement can see 200 MB
    assert long - short < 50, (short, long, in_memory)
    assert os.path.getsize(tmp_path / "long.h5") > 200e6
