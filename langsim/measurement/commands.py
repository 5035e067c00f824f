"""The ``langsim score`` and ``langsim export`` commands (hooked into langsim.cli)."""
import os
import sys

SCORE_HELP = """\
Score a localization (or tracking) pipeline against the ground truth of a run with a
[measurement] table. LOCALIZATIONS is a CSV table with a header line and the columns
frame, x, y (and optionally z, and track for linked tracks), in --units (default m).

Per frame, localizations are matched one-to-one to the emitters that were on and in
the field of view (scipy's linear_sum_assignment, no match beyond --max-distance).
Printed: recall, precision, Jaccard index, bias and RMSE per axis, RMSE by photons
beside the ML precision bound, and for tracks the D they give beside the true D.
"""

EXPORT_HELP = """\
Export the ground truth of a run with a [measurement] table as a table (CSV, or
Parquet for a .parquet name: frame, particle, time, x, y, z, photons, on, in_view;
positions in metres in the image frame) and its images as a multi-page TIFF.
"""


def info_lines(traj):
    """Lines of ``langsim info`` for the groups a [measurement] table wrote (none without one)."""
    m = traj.config.get("measurement")
    lines = []
    for name in ("measured", "detector"):
        group = traj.groups.get(name)
        if not group or m is None:
            continue
        n = len(group["time"])
        sets = ", ".join(k for k in group if k != "time")
        if "signal" in group:                 # a detector's samples (its own clock)
            what = f"{n} samples at {m['detector']['sampling_rate']:.6g} Hz"
        else:
            what = f"{n} frames at {m['frame_rate']:.6g} Hz, exposure {m['exposure'] * 1e3:.4g} ms"
            if "images" in group:
                rows, cols = group["images"].shape[1:]
                what += f", images {rows} x {cols} {group['images'].dtype}"
        lines.append(f"{name:<12} {what}: {sets}")
    return lines


def add_commands(sub, cmd_wrapper=None):
    from argparse import RawDescriptionHelpFormatter as Raw
    p = sub.add_parser("score", help="score your localizations or tracks against the ground truth",
                       description=SCORE_HELP, formatter_class=Raw)
    p.add_argument("file", metavar="FILE", help="trajectory file of a run with a [measurement] table")
    p.add_argument("table", metavar="LOCALIZATIONS", help="CSV: frame,x,y[,z][,track]")
    p.add_argument("--units", default="m", choices=["m", "um", "nm", "px"],
                   help="units of x, y, z in the table (px: camera pixels from the image corner)")
    p.add_argument("--max-distance", type=float, metavar="M",
                   help="largest distance of a match, m (default 2 PSF sigmas, else 200 nm)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--plots", metavar="DIR", help="also write error_vs_photons.png into DIR")
    p.add_argument("--overwrite", action="store_true", help="with --plots: replace the figure")
    p.set_defaults(func=cmd_score)
    p = sub.add_parser("export", help="export ground truth (CSV/Parquet) and images (TIFF)",
                       description=EXPORT_HELP, formatter_class=Raw)
    p.add_argument("file", metavar="FILE", help="trajectory file of a run with a [measurement] table")
    p.add_argument("--table", metavar="OUT.csv", help="ground-truth table (.csv or .parquet)")
    p.add_argument("--tiff", metavar="OUT.tif", help="images as a multi-page TIFF")
    p.add_argument("--overwrite", action="store_true", help="replace output files that exist")
    p.set_defaults(func=cmd_export)


def _truth_d(config):
    from ..units import k_B
    if config.get("potential"):
        return None
    T = config["medium"]["temperature"]
    return k_B * T / float(config["particles"]["friction"][0])


def cmd_score(args):
    import numpy as np
    from ..trajectory import load
    from ..validation import ConfigError
    from . import formulas
    from .export import measured
    from .score import plot_errors, read_table, score
    if args.max_distance is not None and not args.max_distance > 0:
        raise ConfigError(f"--max-distance = {args.max_distance!r}: expected a number > 0 (m)")
    if args.plots is not None:
        target = os.path.join(args.plots, "error_vs_photons.png")
        if os.path.exists(target) and not args.overwrite:
            raise ConfigError(f"--plots {args.plots!r}: already holds error_vs_photons.png; expected a new "
                              "folder, or --overwrite to replace it")
    with load(args.file) as traj:
        data = measured(traj)
        m = traj.config.get("measurement", {})
        pixel = m.get("pixel_size")
        found = read_table(args.table, args.units, pixel, m.get("origin", (0.0, 0.0)))
        true = np.asarray(data["true_positions"], dtype=float)
        if "drift" in data:
            true = true + np.asarray(data["drift"], dtype=float)[:, None, :]
        visible = np.ones(true.shape[:2], bool)
        for name in ("on", "in_view"):
            if name in data:
                visible &= np.asarray(data[name], dtype=bool)
        photons = np.asarray(data["photons"], dtype=float) if "photons" in data else None
        sigma = m.get("psf_sigma")
        max_d = args.max_distance or (2.0 * sigma if sigma else 200e-9)
        bound = None
        if pixel and sigma:
            F = 2.0 if m.get("em_gain") else 1.0
            b = m.get("background", 0.0)
            bound = lambda n: np.sqrt(formulas.mortensen_mle_variance(sigma, pixel, n, b, F))  # noqa: E731
        res = score(true, visible, found, max_d, photons, bound)
        if found["track"] is not None and m.get("frame_rate"):
            from ..analysis import CovarianceDiffusion
            tracks = [found["xyz"][found["track"] == t][np.argsort(found["frame"][found["track"] == t])]
                      for t in np.unique(found["track"])]
            frames = [np.sort(found["frame"][found["track"] == t]) for t in np.unique(found["track"])]
            padded = []
            for tr, fr in zip(tracks, frames):
                full = np.full((fr[-1] - fr[0] + 1, tr.shape[1]), np.nan)
                full[fr - fr[0]] = tr
                padded.append(full)
            blur = traj._file["measured/true_positions"].attrs.get("blur_coefficient", 1 / 6) \
                if getattr(traj, "_file", None) is not None else 1 / 6
            est = CovarianceDiffusion(1.0 / m["frame_rate"], blur=float(blur)).fit(padded)
            res.diffusion = {"measured": est.diffusion_, "error": est.diffusion_err_,
                             "true": _truth_d(traj.config), "localization_variance": est.localization_variance_}
    print(res.to_json() if args.json else res.format_table())
    if args.plots is not None:
        try:
            os.makedirs(args.plots, exist_ok=True)
            plot_errors(res, os.path.join(args.plots, "error_vs_photons.png"))
        except ImportError:
            print("error: --plots needs matplotlib: pip install langsim[plot]", file=sys.stderr)
            return 2
    return 0


def cmd_export(args):
    from ..trajectory import load
    from ..validation import ConfigError
    from .export import export_table, export_tiff, measured
    if args.table is None and args.tiff is None:
        raise ConfigError("export: nothing to do; expected --table OUT.csv and/or --tiff OUT.tif")
    with load(args.file) as traj:
        data = measured(traj)
        if args.table is not None:
            n = export_table(data, args.table, overwrite=args.overwrite)
            print(f"wrote {args.table}: {n} rows (frame, particle, time, x, y, z, photons, on, in_view; m)",
                  file=sys.stderr)
        if args.tiff is not None:
            attrs = dict(traj._file["measured/images"].attrs) if getattr(traj, "_file", None) is not None \
                and "measured/images" in traj._file else {}
            n = export_tiff(data, args.tiff, attrs, overwrite=args.overwrite)
            print(f"wrote {args.tiff}: {n} pages", file=sys.stderr)
    return 0
