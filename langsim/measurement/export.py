"""Reading group ``measured`` of a run, and exporting its ground truth and images.

:func:`measured` gives the datasets of a trajectory's ``measured`` group (from
a file, read lazily frame by frame, or from an in-memory trajectory's
``measured`` dict). :func:`export_table` writes the ground truth as one row
per (frame, particle): frame, particle, time, x, y, z, photons, on, in_view, with
positions in metres in the image frame (the exposure average of the true path
plus the stage drift, i.e. what a perfect localizer would report). CSV, or
Parquet when the path ends in ``.parquet`` and pandas with a Parquet engine is
installed. :func:`export_tiff` writes ``images`` as a multi-page TIFF, one
page per frame, streamed (tifffile).
"""
import json
import os

import numpy as np

from ..validation import ConfigError

#: Frames read at a time when exporting.
EXPORT_CHUNK = 256


def measured(traj):
    """Dataset name -> array-like (frames first) of the run's ``measured`` group."""
    data = getattr(traj, "measured", None)
    if data is not None:
        return data
    f = getattr(traj, "_file", None)
    where = getattr(traj, "path", None) or "the trajectory"
    if f is None or "measured" not in f:
        raise ConfigError(f"{where}: has no group 'measured'; expected a run whose config has a "
                          "[measurement] table")
    from ..trajectory import FrameView
    g = f["measured"]
    n = int(g.attrs["n_frames"]) if "n_frames" in g.attrs else int(g["time"].shape[0])
    return {name: FrameView(g[name], n) for name in g.keys() if hasattr(g[name], "shape")}


def _frames(data):
    return int(len(data["time"]))


def _refuse_existing(path, overwrite):
    if os.path.exists(path) and not overwrite:
        raise ConfigError(f"{path!r}: file exists; expected a new file name, or --overwrite to replace it")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise ConfigError(f"{path!r}: folder {folder!r} does not exist; expected an existing folder")


def _write_new(path, overwrite, write):
    """``write(temp)`` at a temporary name in the folder of ``path``, then the file is put in
    place under ``path`` (:func:`langsim.safeio.install`): a crash never leaves a half file
    under the user's name, and an existing file is replaced only when asked, and whole."""
    from .. import safeio
    temp = safeio.temp_path(path)
    try:
        result = write(temp)
        safeio.install(temp, path, replace=overwrite)
    except BaseException:
        safeio.remove(temp)
        raise
    return result


def truth_rows(data, f0, f1):
    """Columns of the ground-truth table for frames f0 .. f1-1 (dict of 1D arrays)."""
    true = np.asarray(data["true_positions"][f0:f1], dtype=float)
    k, n, d = true.shape
    drift = np.asarray(data["drift"][f0:f1], dtype=float) if "drift" in data else np.zeros((k, d))
    x = true + drift[:, None, :]
    cols = {"frame": np.repeat(np.arange(f0, f1), n), "particle": np.tile(np.arange(n), k),
            "time": np.repeat(np.asarray(data["time"][f0:f1], dtype=float), n)}
    for a, name in enumerate("xyz"):
        cols[name] = x[:, :, a].ravel() if a < d else np.zeros(k * n)
    cols["photons"] = (np.asarray(data["photons"][f0:f1], dtype=float).ravel() if "photons" in data
                       else np.full(k * n, np.nan))
    cols["on"] = (np.asarray(data["on"][f0:f1]).ravel().astype(bool) if "on" in data else np.ones(k * n, bool))
    cols["in_view"] = (np.asarray(data["in_view"][f0:f1]).ravel().astype(bool) if "in_view" in data
                       else np.ones(k * n, bool))
    return cols


def export_table(data, path, overwrite=False):
    """Write the ground truth as CSV (or Parquet for ``.parquet``); returns the rows written.

    The table is written at a temporary name and renamed into place when complete."""
    path = os.fspath(path)
    _refuse_existing(path, overwrite)
    n_frames = _frames(data)
    if path.endswith(".parquet"):
        try:
            import pandas as pd
        except ImportError as exc:
            raise ConfigError(f"{path!r}: Parquet needs pandas with pyarrow (pip install pandas pyarrow); "
                              f"expected a .csv name otherwise ({exc})") from None

        def parquet(temp):
            frames = [pd.DataFrame(truth_rows(data, a, min(n_frames, a + EXPORT_CHUNK)))
                      for a in range(0, n_frames, EXPORT_CHUNK)]
            table = pd.concat(frames, ignore_index=True)
            try:
                table.to_parquet(temp, index=False)
            except ImportError as exc:
                raise ConfigError(f"{path!r}: Parquet needs pandas with pyarrow (pip install pandas "
                                  f"pyarrow); expected a .csv name otherwise ({exc})") from None
            return len(table)
        return _write_new(path, overwrite, parquet)

    def csv(temp):
        rows = 0
        with open(temp, "w") as fh:
            fh.write("frame,particle,time,x,y,z,photons,on,in_view\n")
            for a in range(0, n_frames, EXPORT_CHUNK):
                c = truth_rows(data, a, min(n_frames, a + EXPORT_CHUNK))
                cols = [c[k].tolist() for k in ("frame", "particle", "time", "x", "y", "z", "photons")]
                flags = [c["on"].astype(int).tolist(), c["in_view"].astype(int).tolist()]
                for i, row in enumerate(zip(*cols)):
                    fh.write(",".join(map(repr, row)) + f",{flags[0][i]},{flags[1][i]}\n")
                rows += len(cols[0])
        return rows
    return _write_new(path, overwrite, csv)


def export_tiff(data, path, attrs=None, overwrite=False):
    """Write ``images`` as a multi-page TIFF (one page per frame, streamed); returns the pages."""
    if "images" not in data:
        raise ConfigError("the run has no images; expected a [measurement] table with pixel_size and "
                          "image_shape")
    _refuse_existing(path, overwrite)
    try:
        import tifffile
    except ImportError:
        raise ConfigError("writing TIFF needs the tifffile package; expected it installed "
                          "(pip install \"langsim[tiff]\")") from None
    images = data["images"]
    n = len(images)
    meta = {"axes": "rows along y, columns along x", "frames": n}
    if attrs:
        meta.update({k: (v.tolist() if hasattr(v, "tolist") else v) for k, v in attrs.items()})
    big = images.shape[1] * images.shape[2] * np.dtype(images.dtype).itemsize * n > 2**31

    def tiff(temp):
        with tifffile.TiffWriter(temp, bigtiff=big) as tif:
            for a in range(0, n, EXPORT_CHUNK):
                block = np.asarray(images[a:min(n, a + EXPORT_CHUNK)])
                for j in range(block.shape[0]):
                    tif.write(block[j], contiguous=True, photometric="minisblack",
                              description=json.dumps(meta) if a == 0 and j == 0 else None)
        return n
    return _write_new(os.fspath(path), overwrite, tiff)
