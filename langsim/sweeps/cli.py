"""``langsim sweep SWEEP.toml``: the command line of a sweep (hooked into langsim.cli).

Light to import: the sweep machinery loads only when the command runs.
"""
import os
import signal
import sys

SWEEP_HELP = """\
Run a parameter sweep described by a sweep file (TOML):

  base = "trap.toml"            # a config file (relative to this file), or an inline [base] table
  replicates = 4                # runs per point, each with its own seed (default 1)
  combine = "grid"              # every combination (default), or "zip": the axes walked together
  [axes]
  potential.0.stiffness = [1e-6, 2e-6, 4e-6]                 # dotted config key = values
  medium.temperature = {start = 280, stop = 320, count = 3}  # or start, stop, count, spacing

Every run gets its own seed, spawned from the base config's seed (or fresh
entropy, recorded). The output folder (-o DIR, default: the sweep file's name
without .toml) holds one HDF5 file per run, runs.csv and checks.csv (rewritten
as runs finish) and sweep.json (the record). Every problem of the sweep file is
reported before anything runs; a point whose config validation refuses (an
unstable step, say) is a failed run with its message, the others go on. At the
end a one-line verdict says whether the error bars of all checks are
calibrated.

After a crash, Ctrl-C or kill, "langsim sweep SWEEP.toml --resume" continues:
finished runs are kept, interrupted run files continue exactly, and the tables
equal those of an uninterrupted sweep.

Exit codes: 0 every run completed, 1 a run failed, 2 bad sweep file or usage,
130 / 143 stopped by SIGINT / SIGTERM (resumable).
"""


def add_parser(sub, formatter):
    p = sub.add_parser("sweep", help="run a parameter sweep from a sweep file",
                       description=SWEEP_HELP, formatter_class=formatter)
    p.add_argument("sweep_file", metavar="SWEEP.toml", help="sweep file (TOML)")
    p.add_argument("-o", "--output", metavar="DIR",
                   help="output folder (default: the sweep file's name without .toml, beside it)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, metavar="N",
                       help="local worker processes (default: the number of cores; 1 runs in "
                            "this process)")
    where.add_argument("--dask", metavar="ADDRESS",
                       help="run on a Dask cluster: a scheduler address (tcp://host:8786), or "
                            "'local' to start a LocalCluster here; the output folder must be "
                            "reachable by every worker")
    p.add_argument("--resume", action="store_true",
                   help="continue the sweep in the output folder (starts it when there is none)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the sweep in the output folder (and figures in --plots DIR)")
    p.add_argument("--plots", metavar="DIR",
                   help="also write figures: each check quantity against the swept key, and "
                        "the z-scores against the standard normal (needs matplotlib)")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bar and no summary (the verdict line is still printed)")
    p.set_defaults(func=cmd_sweep)


def _executor(args):
    """(executor, closer) for --dask, or (None, None)."""
    from ..validation import ConfigError
    if args.dask is None:
        return None, None
    try:
        import distributed
    except ImportError:
        raise ConfigError("--dask needs dask's distributed: pip install distributed") from None
    import logging
    logging.getLogger("distributed").setLevel(logging.ERROR)
    if args.dask == "local":
        cluster = distributed.LocalCluster(n_workers=os.cpu_count() or 1, threads_per_worker=1,
                                           dashboard_address=None)
        client = distributed.Client(cluster)

        def close():
            client.close()
            cluster.close()
        return client, close
    try:
        client = distributed.Client(args.dask, timeout="10s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(f"--dask {args.dask!r}: cannot connect to a Dask scheduler ({exc}); "
                          "expected the address of a running scheduler (tcp://host:8786) or "
                          "'local'") from None
    return client, client.close


def cmd_sweep(args):
    from ..validation import ConfigError
    from . import core, plan as _plan
    if args.workers is not None and args.workers < 1:
        raise ConfigError(f"--workers {args.workers}: expected an integer >= 1")
    if args.resume and args.overwrite:
        raise ConfigError("--resume and --overwrite are both given: expected one of them")
    plan = _plan.read_sweep_file(args.sweep_file)
    out = args.output if args.output is not None else os.path.splitext(args.sweep_file)[0]
    if os.path.abspath(out) == os.path.abspath(args.sweep_file):
        raise ConfigError(f"-o {out!r}: is the sweep file itself; expected a folder name")
    if args.plots is not None:
        from .report import check_plots_folder
        check_plots_folder(args.plots, args.overwrite, "--plots")
    executor, close = _executor(args)
    previous = signal.signal(signal.SIGTERM, _terminate)
    notes = (lambda text: None) if args.quiet else (lambda text: print(text, file=sys.stderr))
    try:
        result = core.run_plan(plan, out=out, workers=args.workers, executor=executor,
                               resume=args.resume, overwrite=args.overwrite, progress=not args.quiet,
                               notify=notes, verdict=False)
    except core.SweepInterrupted as exc:
        signum = _SIGNAL[0] if _SIGNAL else exc.signum
        print(f"\n{exc.message}: langsim sweep {args.sweep_file} -o {out} --resume", file=sys.stderr)
        return 128 + signum
    finally:
        signal.signal(signal.SIGTERM, previous)
        if close is not None:
            close()
    runs = result.runs
    failed = runs[runs["status"] != "complete"]
    if not args.quiet:
        print(f"{len(runs)} runs in {out}: {len(runs) - len(failed)} complete, {len(failed)} failed "
              f"(tables {os.path.join(out, core.RUNS_CSV)}, {os.path.join(out, core.CHECKS_CSV)})")
        for i, row in failed.head(5).iterrows():
            print(f"  run {i} failed: {str(row['message']).splitlines()[0] if row['message'] else ''}")
        if len(failed) > 5:
            print(f"  ... and {len(failed) - 5} more (see runs.csv)")
        print(result.cost_summary())
    print(result.calibration().verdict)
    if args.plots is not None:
        try:
            paths = result.plot(args.plots, overwrite=True)
        except ImportError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 2
        if not args.quiet:
            print(f"wrote {len(paths)} figure(s) to {args.plots}", file=sys.stderr)
    return 0 if failed.empty else 1


_SIGNAL = []


def _terminate(signum, frame):
    _SIGNAL.append(signum)
    raise KeyboardInterrupt
