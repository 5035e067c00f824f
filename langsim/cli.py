"""Command line: ``langsim run | info | check``.

Thin on purpose: argument parsing, exit codes, progress and messages. The work
is done by :func:`langsim.engine.run`, :func:`langsim.trajectory.load` and
:func:`langsim.checks.check`.

Exit codes: 0 success; 1 a check failed, or the run ended early with a
numerical blow-up; 2 bad input or usage; 130 / 143 stopped by SIGINT / SIGTERM
(the file is valid up to its final checkpoint and can be resumed).
"""
import argparse
import os
import sys
import warnings

from . import __version__

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2
EXIT_SIGNAL_BASE = 128

MAIN_HELP = """\
Simulate Langevin dynamics of colloidal particles and mechanical oscillators,
with known ground truth, and check the result against exact predictions.

A run is described by a TOML config file in SI units ("langsim scenarios"
lists the examples, "langsim scenarios NAME" writes one out). Typical session:

  langsim run configs/silica-trap.toml         # writes configs/silica-trap.h5
  langsim info configs/silica-trap.h5          # what is in the file
  langsim check configs/silica-trap.h5         # measured vs predicted

Use "langsim COMMAND --help" for the options of each command.
"""

RUN_HELP = """\
Run the simulation a config file describes and stream it to an HDF5 file.

The output file is, in this order: -o OUT, or [output] path of the config
(relative to the config's folder), or the config's name with .h5 next to it.
An existing file is never replaced unless you pass --overwrite.

The file is checkpointed every [output] checkpoint_every seconds of wall time
(default 30). If the run is stopped (Ctrl-C, SIGTERM, a crash, a full disk),
the frames up to the last checkpoint stay valid, and

  langsim run CONFIG --resume

continues it; the finished file is bit-identical to an uninterrupted run.
"""

INFO_HELP = """\
Describe a trajectory file: scheme, time step, particles, frames, duration,
temperature, potential terms, seed, and whether the run is complete (or how to
resume it).
"""

CHECK_HELP = """\
Compare a trajectory with the exact predictions for its own configuration
(equipartition, diffusion, spectra, Boltzmann histogram, escape rates, as they
apply) and print a table of measured +- error, predicted, z and pass/fail.
Exit code 0 when every check passes, 1 when one fails or when nothing could be
checked (no exact prediction applies to the run: the report says so).
"""


RATE_HELP = """\
Thermal escape rate of the question a config's [escape] table asks: the rate
(1/s) and the mean first-passage time (s) from the start basin's equilibrium to
the target, with 95 % intervals, the method used (direct counting or adaptive
multilevel splitting, chosen from a short pilot run), the particle-steps spent,
and the exact theory where it applies (with z). Exit code 0 with a result
(also when a step or time limit stopped it: the output says NOT CONVERGED), 1
when the computation failed, 2 for a bad config.
"""


def _warning_line(message, category, filename, lineno, file=None, line=None):
    print(f"warning: {str(message).splitlines()[0] if str(message) else category.__name__}"
          + ("" if "\n" not in str(message) else " ..."), file=sys.stderr)


def _out(text):
    """Print ``text`` on stdout; a reader that went away (``| head``) ends it quietly."""
    try:
        print(text, flush=True)
    except BrokenPipeError:
        # stdout is gone: point it at /dev/null so that the interpreter's last flush stays quiet
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())


def _error(lines):
    if isinstance(lines, str):
        lines = [lines]
    for i, line in enumerate(lines):
        print(("error: " if i == 0 or not line.startswith(" ") else "") + line, file=sys.stderr)
    return EXIT_USAGE


def build_parser():
    parser = argparse.ArgumentParser(
        prog="langsim", description=MAIN_HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"langsim {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("run", help="run a config file, write an HDF5 trajectory",
                       description=RUN_HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("config", metavar="CONFIG", help="TOML config file (SI units)")
    p.add_argument("-o", "--output", metavar="OUT.h5",
                   help="output file (default: [output] path, else CONFIG with .h5)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the output file if it exists")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run in the output file (same config); "
                        "starts it when the file does not exist yet")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bar and no summary (errors and warnings still shown)")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("info", help="describe a trajectory file",
                       description=INFO_HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", metavar="FILE", help="trajectory file written by langsim run")
    p.set_defaults(func=cmd_info)

    p = sub.add_parser("check", help="check a trajectory against exact predictions",
                       description=CHECK_HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", metavar="FILE", help="trajectory file written by langsim run")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--plots", metavar="DIR",
                   help="also write figures (PNG) into DIR (needs matplotlib)")
    p.add_argument("--overwrite", action="store_true",
                   help="with --plots: replace figures already in DIR")
    p.set_defaults(func=cmd_check)
    from .measurement.commands import add_commands   # score, export (runs with a [measurement] table)
    add_commands(sub)

    p = sub.add_parser("rate", help="thermal escape rate of a config's [escape] question",
                       description=RATE_HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("config", metavar="CONFIG", help="TOML config file with an [escape] table")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_rate)
    from .sweeps.cli import add_parser as add_sweep
    add_sweep(sub, argparse.RawDescriptionHelpFormatter)
    from .scenarios import add_parser as add_scenarios
    add_scenarios(sub)
    return parser


def main(argv=None):
    """Entry point of the ``langsim`` console script; returns the exit code."""
    from .validation import ConfigError
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    previous = warnings.showwarning
    warnings.showwarning = _warning_line
    try:
        return args.func(args)
    except ConfigError as exc:
        return _error(exc.messages)
    finally:
        warnings.showwarning = previous


# ------------------------------------------------------------------- run

def _output_path(args):
    """-o, else None when the config names [output] path, else CONFIG-stem.h5 beside it."""
    from . import config as _config
    if args.output is not None:
        return args.output
    mapping, _ = _config.read(args.config)
    output = mapping.get("output")
    if isinstance(output, dict) and "path" in output:
        return None
    stem = os.path.splitext(args.config)[0]
    return stem + ".h5"


def _describe(path):
    try:
        from .trajectory import read_state
        return read_state(path)
    except Exception:  # not ours or unreadable: HDF5Sink reports it properly
        return None


def cmd_run(args):
    from . import engine
    from .trajectory import check_output_path
    out = _output_path(args)
    shown = out
    if out is None:
        from . import config as _config
        mapping, _ = _config.read(args.config)
        shown = os.path.join(os.path.dirname(args.config), mapping["output"]["path"]) \
            if isinstance(mapping["output"].get("path"), str) else None
    if shown is not None:      # refused before anything is read from it (the sink checks again)
        shown = check_output_path(shown, args.overwrite, args.resume, protect=(args.config,))
    resume_hint = (f"langsim run {args.config}" + (f" -o {args.output}" if args.output else "")
                   + " --resume")
    if args.resume and shown is not None:
        if os.path.exists(shown):
            state = _describe(shown)
            if state is not None and state["state"] != "complete" and not args.quiet:
                print(f"resuming {shown}: {state['checkpoint_frames']} frames valid, "
                      f"continuing after step {state['checkpoint_step']}", file=sys.stderr)
        elif not args.quiet:
            print(f"{shown} does not exist yet: starting a new run", file=sys.stderr)
    warnings.filterwarnings("ignore", category=engine.RunWarning)   # reported below instead
    try:
        traj = engine.run(args.config, out, progress=not args.quiet,
                          overwrite=args.overwrite, resume=args.resume)
    except engine.RunInterrupted as exc:
        t = exc.trajectory
        print(f"\n{exc.message}.\n{t.path} is valid up to frame {t.n_frames - 1} and is marked "
              f"interrupted; continue it with:\n  {resume_hint}", file=sys.stderr)
        t.close()
        return EXIT_SIGNAL_BASE + exc.signum
    except KeyboardInterrupt:
        print(f"\nstopped at once: {shown} is valid up to its last checkpoint; continue it "
              f"with:\n  {resume_hint}", file=sys.stderr)
        return EXIT_SIGNAL_BASE + 2
    except OSError as exc:
        if shown is None:
            raise
        return _error([f"writing {shown} failed: {exc.strerror or exc}",
                       f"  the file is valid up to its last checkpoint; free space (or fix the "
                       f"cause) and continue with: {resume_hint}"])
    try:
        return _report_run(args, traj)
    finally:
        traj.close()


def _report_run(args, traj):
    stats = traj.run_stats
    if stats is not None and stats.already_complete:
        print(f"{traj.path} already holds the complete run ({traj.n_frames} frames); "
              "nothing to do", file=sys.stderr)
        return EXIT_OK
    if not traj.status.complete:
        print(f"error: the run ended early: {traj.status.message}. "
              f"{traj.path or 'The trajectory'} keeps the {traj.n_frames} frames before it; "
              "reduce [dynamics] dt, or check the potential, and run again with --overwrite",
              file=sys.stderr)
        return EXIT_FAILED
    if not args.quiet:
        cfg = traj.config
        resumed = " (resumed)" if stats.resumed else ""
        compiled = (f" Compiling the kernels took {stats.compile_time:.3g} s (once per machine)."
                    if stats.compile_time > 1.0 else "")
        print(f"Wrote {traj.path}{resumed}: {traj.n_frames} frames of {traj.n_particles} "
              f"particle(s) in {traj.dimensions}D, {cfg['dynamics']['duration']:.6g} s simulated "
              f"with {cfg['dynamics']['scheme']} at dt = {cfg['dynamics']['dt']:.6g} s. "
              f"This session took {stats.wall_time:.3g} s of wall time for "
              f"{stats.steps} steps, {stats.ns_per_particle_step:.3g} ns "
              f"per particle-step.{compiled} Inspect it with 'langsim info {traj.path}', compare it with "
              f"theory with 'langsim check {traj.path}'.")
    return EXIT_OK


# ------------------------------------------------------------------ info

def _fmt(value):
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, list) and value and all(v == value[0] for v in value):
        return _fmt(value[0])
    if isinstance(value, list):
        return "[" + ", ".join(_fmt(v) for v in value[:6]) + (", ..." if len(value) > 6 else "") + "]"
    return str(value)


def _term_line(term):
    keys = [f"{k} = {_fmt(v)}" for k, v in term.items() if k != "type"
            and not (isinstance(v, (int, float)) and not isinstance(v, bool) and v == 0
                     and k in ("frequency", "phase", "tilt"))
            and not (isinstance(v, list) and v and all(x == 0 for x in v)
                     and k in ("velocity", "amplitude"))]
    return f"{term['type']}: " + ", ".join(keys)


def _own_terms(cfg, lines):
    """An oscillator's own quantities in place of particle and potential lines; a gas medium."""
    from . import gas, oscillators, theory
    own = oscillators.describe(cfg)
    if own is not None:
        lines = [ln for ln in lines if not ln.startswith(("particles ", "potential "))]
        lines[3:3] = own
    medium = gas.describe(cfg)
    if medium is not None:
        lines = [ln + ", " + medium if ln.startswith("medium ") else ln for ln in lines]
    feedback = cfg["particles"].get("feedback")
    if own is None and feedback and any(feedback):
        T = [theory.cold_damping_temperature(cfg["medium"]["temperature"], g, fb)
             for g, fb in zip(cfg["particles"]["friction"], feedback)]
        lines.append(f"feedback     cold damping {_fmt(feedback)} kg/s, effective temperature {_fmt(T)} K")
    return lines


def cmd_info(args):
    from .trajectory import load
    with load(args.file) as traj:
        cfg = traj.config
        dyn, par, med, out = cfg["dynamics"], cfg["particles"], cfg["medium"], cfg["output"]
        meta = traj.metadata
        expected = dyn["steps"] // out["every"] + 1
        comp = meta["compression"]
        lines = [
            f"file         {traj.path}",
            f"format       {meta['format']} version {meta['format_version']}, "
            f"written by langsim {meta['langsim_version']} on {meta['created']}",
            f"dynamics     {dyn['regime']}, {dyn['scheme']}, dt = {dyn['dt']:.6g} s, "
            f"{dyn['steps']} steps = {dyn['duration']:.6g} s",
            f"particles    {par['count']} in {par['dimensions']}D, friction "
            f"{_fmt(par['friction'])} kg/s" + (f", radius {_fmt(par['radius'])} m"
                                              if par.get("radius") is not None else "")
            + (f", mass {_fmt(par['mass'])} kg" if par.get("mass") is not None else ""),
            f"medium       temperature {med['temperature']:.6g} K"
            + (f", viscosity {med['viscosity']:.6g} Pa s"
               if med.get("viscosity") is not None and par.get("radius") is not None else "")
            + (f", wall {med['wall_distance'] * 1e6:.4g} um from the bead's centre (normal axis "
               f"{med['wall_axis']}; bulk friction {par['bulk_friction']:.6g} kg/s)"
               if med.get("wall_distance") is not None else ""),
        ]
        terms = cfg.get("potential") or []
        if not terms:
            lines.append("potential    none (free diffusion)")
        for i, term in enumerate(terms):
            lines.append(("potential    " if i == 0 else "             ") + _term_line(term))
        lines = _own_terms(cfg, lines)
        if cfg.get("truth"):
            from .truth import describe
            lines.append("truth        " + describe(cfg["truth"], traj.units.get("positions", "m")))
        interval = dyn["dt"] * out["every"]
        lines += [
            f"seed         {cfg['seed']}",
            f"frames       {traj.n_frames} of {expected} (every {out['every']} step(s), "
            f"{interval:.6g} s apart), recorded {max(0, traj.n_frames - 1) * interval:.6g} s",
            f"stored       positions {traj.positions.dtype}"
            + (f", velocities {traj.velocities.dtype}" if traj.velocities is not None else "")
            + f", compression {comp}",
        ]
        from .measurement.commands import info_lines    # groups of a [measurement] table
        lines += info_lines(traj)
        state = traj.file_state
        if state == "complete":
            lines.append("status       complete")
        elif state == "failed":
            lines.append(f"status       ended early: {traj.status.message}")
        else:
            why = ("interrupted: " + traj.status.message if state == "interrupted" else
                   "not finished (the writer is still running, or was killed); frames up to the "
                   "last checkpoint are valid")
            lines.append(f"status       {why}")
            lines.append(f"resume       langsim run CONFIG -o {traj.path} --resume   "
                         "(CONFIG: the config this run was started from)")
        _out("\n".join(lines))
    return EXIT_OK


# ----------------------------------------------------------------- check

def cmd_check(args):
    from .trajectory import load
    from .validation import ConfigError
    if args.plots is not None and os.path.exists(args.plots):
        if not os.path.isdir(args.plots):
            raise ConfigError(f"--plots {args.plots!r}: is a file; expected a folder")
        old = [n for n in os.listdir(args.plots) if n.endswith(".png")]
        if old and not args.overwrite:
            raise ConfigError(f"--plots {args.plots!r}: already holds figures ({', '.join(old[:3])}"
                              f"{', ...' if len(old) > 3 else ''}); expected a new or empty "
                              "folder, or --overwrite to replace them")
    elif args.plots is not None:
        parent = os.path.dirname(os.path.abspath(args.plots))
        if not os.path.isdir(parent):
            raise ConfigError(f"--plots {args.plots!r}: folder {parent!r} does not exist; "
                              "expected an existing parent folder")
    from . import checks as _check
    with load(args.file) as traj:
        if not traj.status.complete:
            print(f"warning: {traj.path} is not complete; checking its {traj.n_frames} valid "
                  "frames", file=sys.stderr)
        try:
            report = _check.check(traj)
        except ValueError as exc:   # too little data for an estimate, and the like
            return _error(f"{traj.path}: cannot be checked: {exc}")
        except KeyError as exc:     # the stored config lacks a key a check needs
            return _error(f"{traj.path}: cannot be checked: {exc.args[0] if exc.args else exc}; "
                          "expected the resolved config langsim stores (the file is damaged?)")
        _out(report.to_json() if args.json else report.format_table())
        if args.plots is not None:
            try:
                paths = _check.write_plots(traj, report, args.plots)
            except ImportError as exc:
                return _error(str(exc))
            print(f"wrote {len(paths)} figure(s) to {args.plots}", file=sys.stderr)
    return EXIT_OK if report.passed else EXIT_FAILED


# ------------------------------------------------------------------ rate

def cmd_rate(args):
    from .rates import RateError, escape_rate
    try:
        result = escape_rate(args.config, progress=not args.quiet)
    except RateError as exc:
        print(f"error: {args.config}: {exc}", file=sys.stderr)
        return EXIT_FAILED
    print(result.to_json() if args.json else result.format_table())
    if not result.converged:
        print(f"warning: the wanted precision was not reached ({result.message})", file=sys.stderr)
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
