"""Cost of streaming to HDF5: the same run in memory and to a file, and raw h5py speed.

Run: ``python benchmarks/bench_io.py [--quick]``. Prints a table and writes
benchmarks/results/io.json. Every row is measured in this same run (best of a
few repeats in wall time, compiled code warm; the machine's load is recorded):

* memory: 10,000 particles in a 3D harmonic trap (Euler-Maruyama), every step
  recorded, kept in a :class:`~langsim.trajectory.MemorySink`;
* hdf5: the same run streamed by :class:`~langsim.trajectory.HDF5Sink`
  (uncompressed, and with lzf), with the default checkpoint interval and one
  final checkpoint. The time inside the sink's calls is measured separately,
  so its write throughput can be set beside
* plain h5py: one ``create_dataset(data=...)`` of the same array, then close
  (the fastest a Python program writes these bytes with h5py).

Target: the uncompressed file run takes at most 20 % longer than the memory run.
The files go to a temporary folder beside the results (``benchmarks/results/tmp``,
removed afterwards) or to ``--dir``.
"""
import argparse
import json
import os
import platform
import shutil
import time

import h5py
import numpy as np

import langsim
from langsim import config as _config
from langsim.engine import Engine
from langsim.trajectory import HDF5Sink, MemorySink

HERE = os.path.dirname(os.path.abspath(__file__))
TARGET_OVERHEAD = 0.20


def scenario(n_steps, compression="none"):
    """10,000 silica-like beads (radius 0.5 um in water at 22 C) in a 3D trap of 1e-6 N/m."""
    return {"seed": 1, "particles": {"count": 10_000, "dimensions": 3, "radius": 0.5e-6},
            "potential": [{"type": "harmonic", "stiffness": 1e-6}],
            "dynamics": {"dt": 1e-4, "steps": n_steps},
            "output": {"every": 1, "compression": compression}}


class TimedSink:
    """Wraps a sink and adds up the wall time spent in its calls."""

    def __init__(self, sink):
        self.sink = sink
        self.seconds = 0.0

    def _timed(self, name, *args):
        t0 = time.perf_counter()
        try:
            return getattr(self.sink, name)(*args)
        finally:
            self.seconds += time.perf_counter() - t0

    def start(self, spec, layout):
        return self._timed("start", spec, layout)

    def write(self, *args):
        return self._timed("write", *args)

    def checkpoint(self, *args):
        return self._timed("checkpoint", *args)

    def finish(self, *args):
        return self._timed("finish", *args)

    def __getattr__(self, name):          # resumed, abort, ...: the wrapped sink's
        return getattr(self.sink, name)


def run_once(cfg, path=None):
    spec = _config.load(cfg)
    sink = TimedSink(MemorySink() if path is None else HDF5Sink(path, overwrite=True))
    t0 = time.perf_counter()
    traj = Engine(spec, sink).run()
    total = time.perf_counter() - t0
    if path is not None:
        traj.close()
        size = os.path.getsize(path)
    else:
        size = traj.positions.nbytes + traj.time.nbytes
    return total, sink.seconds, size, traj


def plain_h5py(array, path):
    t0 = time.perf_counter()
    with h5py.File(path, "w") as f:
        f.create_dataset("positions", data=array)
    return time.perf_counter() - t0


def best(fn, repeats):
    results = [fn() for _ in range(repeats)]
    return min(results, key=lambda r: r[0])


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer steps and repeats")
    parser.add_argument("--dir", help="folder for the temporary files")
    args = parser.parse_args(argv)
    n_steps = 200 if args.quick else 1000
    repeats = 2 if args.quick else 3
    tmp = args.dir or os.path.join(HERE, "results", "tmp-io")
    os.makedirs(tmp, exist_ok=True)
    try:
        run_once(scenario(10))                              # compile, warm caches
        run_once(scenario(10), os.path.join(tmp, "warm.h5"))
        mem = best(lambda: run_once(scenario(n_steps)), repeats)
        positions = np.asarray(mem[3].positions)
        rows = [("memory", mem[0], mem[1], mem[2])]
        for comp in ("none", "lzf"):
            path = os.path.join(tmp, f"run-{comp}.h5")
            r = best(lambda: run_once(scenario(n_steps, comp), path), repeats)
            rows.append((f"hdf5 ({comp})", r[0], r[1], r[2]))
            if comp == "none":
                with h5py.File(path, "r") as f:
                    identical = bool(np.array_equal(f["positions"][:], positions))
        raw_path = os.path.join(tmp, "plain.h5")
        raw = min(plain_h5py(positions, raw_path) for _ in range(repeats))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    n_frames, n_bytes = positions.shape[0], positions.nbytes
    base = rows[0][1]
    print(f"{n_steps} steps of 10,000 particles in 3D, every step recorded: {n_frames} frames, "
          f"{n_bytes / 1e6:.0f} MB of positions")
    print(f"{'run':<14} {'total s':>9} {'vs memory':>10} {'in sink s':>10} {'sink MB/s':>10} "
          f"{'file MB':>8}")
    table = []
    for name, total, in_sink, size in rows:
        rate = n_bytes / in_sink / 1e6 if name != "memory" and in_sink > 0 else None
        overhead = total / base - 1
        print(f"{name:<14} {total:>9.3f} {overhead:>+10.1%} {in_sink:>10.3f} "
              f"{'' if rate is None else f'{rate:.0f}':>10} {size / 1e6:>8.0f}")
        table.append({"run": name, "seconds": total, "overhead_vs_memory": overhead,
                      "seconds_in_sink": in_sink, "sink_MB_per_s": rate, "bytes": size})
    raw_rate = n_bytes / raw / 1e6
    print(f"{'plain h5py':<14} {raw:>9.3f} {'':>10} {raw:>10.3f} {raw_rate:>10.0f} "
          f"{n_bytes / 1e6:>8.0f}")
    overhead = rows[1][1] / base - 1
    verdict = "meets" if overhead <= TARGET_OVERHEAD else "misses"
    print(f"uncompressed HDF5 overhead {overhead:+.1%}: {verdict} the target of "
          f"+{TARGET_OVERHEAD:.0%}; file identical to memory: {identical}")
    result = {"date": time.strftime("%Y-%m-%d %H:%M:%S %z"), "loadavg": list(os.getloadavg()),
              "clock": "wall time (the run writes files)",
              "machine": platform.platform(), "cpus": os.cpu_count(), "h5py": h5py.__version__,
              "hdf5": h5py.version.hdf5_version, "langsim": langsim.__version__,
              "n_steps": n_steps, "n_particles": 10_000, "dimensions": 3, "n_frames": n_frames,
              "bytes_positions": n_bytes, "rows": table,
              "plain_h5py": {"seconds": raw, "MB_per_s": raw_rate},
              "overhead_uncompressed": overhead, "target": TARGET_OVERHEAD,
              "meets_target": overhead <= TARGET_OVERHEAD, "identical_to_memory": identical}
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", "io.json"), "w") as fh:
        json.dump(result, fh, indent=2)
    return result


if __name__ == "__main__":
    main()
