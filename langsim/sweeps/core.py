"""The sweep coordinator: plan -> validated runs -> executor -> tables and files.

Out folder (when ``out`` is given):

``sweep.json``     the record: base config, axes, combine, replicates, base seed and how
                   the run seeds derive from it, versions, the runs' seeds and files
``run-NNNN.h5``    one trajectory file per run (``N`` = the run's row index)
``runs.csv``       the runs table, ``checks.csv`` the checks table: rewritten as runs finish
``results.jsonl``  one line per finished run, appended and flushed as it finishes: what
                   ``resume`` reads back (exact numbers), so a crash loses no finished row
"""
import datetime
import json
import math
import os
import sys
import time
import warnings

from .. import __version__
from ..validation import ConfigError
from .plan import Plan, make_plan

FORMAT = "langsim-sweep"
FORMAT_VERSION = 1
RECORD, RUNS_CSV, CHECKS_CSV, RESULTS = "sweep.json", "runs.csv", "checks.csv", "results.jsonl"
#: Columns of the runs table besides the swept keys (analyze may not use these names).
RESERVED_COLUMNS = ("run", "replicate", "seed", "status", "message", "file", "wall_time")
#: Rewriting the CSV tables may take at most this fraction of the sweep's time.
CSV_SHARE = 0.1


class SweepInterrupted(KeyboardInterrupt):
    """The sweep was stopped (Ctrl-C, SIGTERM); ``result`` holds the runs finished so far,
    ``message`` says how to continue."""

    def __init__(self, result, message, signum=2):
        super().__init__(message)
        self.result = result
        self.message = message
        self.signum = signum


class _Stopped(KeyboardInterrupt):
    """A run in this process was stopped by a signal at a checkpoint."""

    def __init__(self, signum):
        super().__init__(signum)
        self.signum = signum


def sweep(base, axes, *, combine="grid", replicates=1, out=None, workers=None, executor=None,
          checks=True, analyze=None, resume=False, overwrite=False, progress=True):
    """Run ``base`` at every point of ``axes``, ``replicates`` times each.

    Parameters
    ----------
    base : mapping or str or path
        A config (mapping, numpy values allowed) or the path of a TOML config.
    axes : mapping
        Dotted config keys (``"potential.0.stiffness"``, ``"medium.temperature"``,
        ``"dynamics.dt"``, ``"output.every"``) to sequences of values (a value may be a
        per-axis list; numpy arrays are fine), or to a table ``{"start", "stop", "count",
        "spacing": "linear" | "log"}``.
    combine : {"grid", "zip"}, default "grid"
        Every combination of the axes, or the axes walked together (equal lengths).
    replicates : int, default 1
        Runs per point, each with its own seed.
    out : str or path, optional
        Folder for the run files and tables (see :mod:`langsim.sweeps.core`); without
        it everything stays in memory and trajectories are not kept (re-run any row with
        :meth:`SweepResult.trajectory`). With Dask, every worker must reach it.
    workers : int, optional
        Local worker processes (default: the number of cores); 1 runs in this process.
    executor : concurrent.futures.Executor or distributed.Client, optional
        Runs the tasks instead of local workers.
    checks : bool, default True
        Apply :func:`langsim.check` to every complete run (the ``checks`` table).
    analyze : callable, optional
        ``f(trajectory) -> dict of numbers``, applied to every complete run where it ran;
        the numbers become columns of the runs table.
    resume : bool, default False
        Continue the sweep in ``out``: complete runs are kept, interrupted run files
        continue exactly, runs never started are run.
    overwrite : bool, default False
        Replace the sweep in ``out``.
    progress : bool, default True
        A progress bar over runs, and the calibration verdict at the end (stderr).

    Returns
    -------
    SweepResult
        ``.runs`` and ``.checks`` (pandas DataFrames), ``.calibration()``, ``.plot(dir)``.

    Raises
    ------
    ConfigError
        A bad sweep definition, an out folder that would lose data, or a sweep every run
        of which is refused; nothing has run then.
    SweepInterrupted
        Stopped by Ctrl-C or SIGTERM, after the finished runs were written down.
    """
    plan = make_plan(base, axes, combine, replicates)
    return run_plan(plan, out=out, workers=workers, executor=executor, checks=checks, analyze=analyze,
                    resume=resume, overwrite=overwrite, progress=progress)


def run_plan(plan, *, out=None, workers=None, executor=None, checks=True, analyze=None, resume=False,
             overwrite=False, progress=True, notify=None, verdict=True):
    """:func:`sweep` for a :class:`~langsim.sweeps.plan.Plan` (e.g. from a sweep file).

    ``notify(text)`` receives one-line notes (resuming, starting); default: stderr when
    ``progress``. ``verdict``: print the calibration verdict at the end when ``progress``.
    """
    if notify is None:
        notify = (lambda text: print(text, file=sys.stderr)) if progress else (lambda text: None)
    _check_options(out, workers, executor, analyze, resume, overwrite)
    folder = Folder(out, plan, resume, overwrite, notify) if out is not None else None
    n_local = 1 if executor is not None else min(workers or os.cpu_count() or 1, plan.n_runs)
    if n_local > 1:
        from .pool import shared_pool
        shared_pool(n_local)                 # workers start while the runs are validated
    runs = _validate_runs(plan)              # a resumed sweep has its recorded seed by now
    if folder:
        folder.prepare()
    done = folder.finished() if folder else {}
    for i, run in enumerate(runs):
        if run["refused"] is not None and i not in done:
            done[i] = _refused(i, run)
            if folder:
                folder.log(done[i])
    columns = list(RESERVED_COLUMNS) + plan.keys
    payload = None
    if analyze is not None:
        import cloudpickle
        payload = cloudpickle.dumps(analyze)
    tasks = [{"index": i, "config": run["config"], "checks": bool(checks), "analyze": payload,
              "columns": columns, "file": folder.task_file(i) if folder else None}
             for i, run in enumerate(runs) if i not in done]
    result = SweepResult(plan, runs, done, folder)
    if folder:
        folder.write_tables(result)
    bar = _bar(progress, plan.n_runs, done)
    started = time.perf_counter()
    try:
        for r in _execute(tasks, n_local, executor, result, folder, bar):
            pass
    except KeyboardInterrupt as exc:
        if folder:
            folder.write_tables(result, force=True)
        hint = ("continue it with resume=True (langsim sweep ... --resume)" if folder else
                "without out nothing was kept on disk")
        raise SweepInterrupted(result, f"sweep stopped after {len(result.results)} of "
                                       f"{plan.n_runs} runs; {hint}",
                               getattr(exc, "signum", 2)) from None
    finally:
        if bar is not None:
            bar.close()
    result.elapsed = time.perf_counter() - started
    if folder:
        folder.write_tables(result, force=True)
    if progress and verdict:
        print(result.calibration().verdict, file=sys.stderr)
    return result


def _check_options(out, workers, executor, analyze, resume, overwrite):
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ConfigError(f"workers = {workers!r}: expected an integer >= 1 (or None: the number "
                          "of cores)")
    if executor is not None and workers is not None:
        raise ConfigError(f"workers = {workers!r} and an executor are both given: expected one "
                          "(the executor decides how many run at once)")
    if executor is not None:
        import concurrent.futures
        from .pool import is_dask_client
        if not (isinstance(executor, concurrent.futures.Executor) or is_dask_client(executor)):
            raise ConfigError(f"executor = {executor!r}: expected a concurrent.futures.Executor or "
                              "a dask distributed.Client")
    if analyze is not None and not callable(analyze):
        raise ConfigError(f"analyze = {analyze!r}: expected a function f(trajectory) -> dict of "
                          "numbers")
    if resume and overwrite:
        raise ConfigError("resume and overwrite are both requested: expected one of them "
                          "(overwrite replaces the sweep in out, resume continues it)")
    if out is None and (resume or overwrite):
        raise ConfigError(f"{'resume' if resume else 'overwrite'} = True without out: expected "
                          "out, the folder of the sweep to continue or replace")


def _validate_runs(plan):
    """Validate every run's config before anything runs. A config that validation refuses is
    a failed run (its message kept); when every run is refused the sweep itself is."""
    from .. import config as _config
    runs = []
    for i, values, replicate, seed, cfg in plan.configs():
        refused, notes = None, []
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                _config.load(cfg)
            except ConfigError as exc:
                refused = "\n".join(exc.messages)
        notes = list(dict.fromkeys(f"warning: {w.message}" for w in caught))
        runs.append({"values": values, "replicate": replicate, "seed": seed, "config": cfg,
                     "refused": refused, "notes": notes})
    refused = [r["refused"] for r in runs if r["refused"] is not None]
    if refused and len(refused) == len(runs):
        distinct = list(dict.fromkeys(refused))
        raise ConfigError([f"every run of the sweep is refused ({len(runs)} of {len(runs)}); "
                           f"{len(distinct)} distinct problem(s):"]
                          + ["  " + m.replace("\n", "\n  ") for m in distinct[:10]])
    return runs


def _refused(i, run):
    return {"index": i, "status": "failed", "message": run["refused"], "checks": [], "analyze": {},
            "retry": False, "wall_time": 0.0}


def _bar(progress, total, done):
    if not progress:
        return None
    from tqdm import tqdm
    failed = sum(r["status"] == "failed" for r in done.values())
    return tqdm(total=total, initial=len(done), unit="run", desc="sweep", dynamic_ncols=True,
                postfix={"failed": failed})


def _execute(tasks, n_local, executor, result, folder, bar):
    from . import pool
    if not tasks:
        return
    local = None
    if executor is not None:
        source = pool.on_executor(executor, tasks)
    elif n_local > 1:
        local = pool.shared_pool(n_local)
        source = local.run(tasks)
    else:
        source = pool.in_process(tasks)
    try:
        for r in source:
            _finished(r, result, folder, bar)
            yield r
    except KeyboardInterrupt:
        if local is not None:
            local.interrupt()
            try:
                for r in local.drain():
                    _finished(r, result, folder, bar)
            finally:
                pool.discard_shared()
        raise
    except BaseException:
        if local is not None:
            pool.discard_shared()
        raise


def _finished(r, result, folder, bar):
    if r.get("interrupted"):                     # in-process run stopped at a checkpoint
        raise _Stopped(r.get("signum", 2))
    result.add(r)
    if folder:
        folder.log(r)
        folder.write_tables(result)
    if bar is not None:
        bar.set_postfix({"failed": sum(x["status"] == "failed" for x in result.results.values())},
                        refresh=False)
        bar.update(1)


# ------------------------------------------------------------------ the out folder

class Folder:
    """The out folder of a sweep: refuses to lose data, records, logs, writes tables."""

    def __init__(self, out, plan, resume, overwrite, notify):
        from ..safeio import path_text
        self.out = path_text(out, "out")
        self.plan = plan
        self.width = max(4, len(str(plan.n_runs - 1)))
        self.last_write, self.write_cost = 0.0, 0.0
        self.t0 = time.perf_counter()
        path = self.out
        if os.path.exists(path) and not os.path.isdir(path):
            raise ConfigError(f"out {path!r}: is a file; expected a folder for the sweep")
        record = self._record_path()
        has_record = os.path.isfile(record)
        if os.path.isdir(path) and os.listdir(path) and not has_record:
            raise ConfigError(f"out {path!r}: holds files that are not a langsim sweep; expected a "
                              "new or empty folder")
        self.previous = self.replaced = None
        if has_record:
            previous = self._read_record(record)
            if resume:
                self._same_definition(previous)
                notify(f"resuming the sweep in {path}")
                self.previous = previous
            elif overwrite:
                self.replaced = previous
            else:
                raise ConfigError(f"out {path!r}: holds a sweep already; expected a new folder, or "
                                  "resume (--resume) to continue it, or overwrite (--overwrite) to "
                                  "replace it")
        elif resume:
            notify(f"{path} holds no sweep yet: starting a new one")
        if not os.path.isdir(path):
            parent = os.path.dirname(os.path.abspath(path))
            if not os.path.isdir(parent):
                raise ConfigError(f"out {path!r}: folder {parent!r} does not exist; expected an "
                                  "existing parent folder")

    def prepare(self):
        """Make the folder ready (after the runs were validated): the replaced sweep's files
        removed, the folder created, the record written."""
        path = self.out
        if self.replaced is not None:
            self._clear(self.replaced)
        if not os.path.isdir(path):
            try:
                os.mkdir(path)
            except OSError as exc:
                raise ConfigError(f"out {path!r}: cannot be created ({exc.strerror})") from None
        if not os.access(path, os.W_OK | os.X_OK):
            raise ConfigError(f"out {path!r}: is not writable; expected a folder you can write to")
        self._write_record()

    # names
    def name(self, i):
        return f"run-{i:0{self.width}d}.h5"

    def file(self, i):
        return os.path.join(self.out, self.name(i))

    def task_file(self, i):
        return os.path.abspath(self.file(i))      # the same file for every worker

    def _record_path(self):
        return os.path.join(self.out, RECORD)

    # the record
    def _read_record(self, path):
        try:
            with open(path) as fh:
                record = json.load(fh)
        except (OSError, ValueError) as exc:
            raise ConfigError(f"{path}: not a readable sweep record ({exc}); expected the "
                              "sweep.json written by langsim sweep") from None
        if record.get("format") != FORMAT or not isinstance(record.get("definition"), dict):
            raise ConfigError(f"{path}: not a langsim sweep record (format = "
                              f"{record.get('format')!r}); expected {FORMAT!r}")
        if record.get("format_version", 0) > FORMAT_VERSION:
            raise ConfigError(f"{path}: format_version = {record.get('format_version')!r}; expected "
                              f"at most {FORMAT_VERSION} (written by a newer langsim? upgrade langsim)")
        return record

    def _same_definition(self, record):
        stored = record["definition"]
        if "seed" not in self.plan.base:            # fresh entropy then: the recorded one
            self.plan.seed = stored.get("seed", self.plan.seed)
        current = json.loads(json.dumps(self.plan.definition()))
        diff = [k for k in ("base", "axes", "combine", "replicates", "seed")
                if stored.get(k) != current.get(k)]
        if diff:
            lines = [f"  {k}: the folder has {_short(stored.get(k))}, now {_short(current.get(k))}"
                     for k in diff]
            raise ConfigError([f"resume {self.out!r}: the sweep differs from the one in the folder in "
                               f"{', '.join(diff)}; expected the same sweep (or a new folder, or "
                               "overwrite)"] + lines)

    def _clear(self, record):
        """Remove what the previous sweep in the folder wrote (and nothing else)."""
        from ..trajectory import check_output_path
        names = [RECORD, RUNS_CSV, CHECKS_CSV, RESULTS] + list(record.get("files", []))
        for name in names:
            path = os.path.join(self.out, os.path.basename(name))
            if os.path.isfile(path):
                if name.endswith(".h5"):
                    check_output_path(path, overwrite=True)     # refuses a file in use
                os.remove(path)

    def _write_record(self):
        import numpy
        plan = self.plan
        versions = {"langsim": __version__, "python": sys.version.split()[0], "numpy": numpy.__version__}
        for name in ("numba", "scipy", "h5py", "pandas"):
            try:
                versions[name] = __import__(name).__version__
            except ImportError:
                pass
        seeds = plan.seeds()
        record = {
            "format": FORMAT, "format_version": FORMAT_VERSION,
            "created": (self.previous or {}).get("created") or
            datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
            "versions": versions, "definition": plan.definition(),
            "base_path": plan.base_path, "sweep_file": plan.sweep_file,
            "seeds": "run i: numpy.random.SeedSequence(seed).spawn(n_runs)[i].generate_state(1, "
                     "uint64)[0] & (2**63 - 1); the integer langsim.run accepts",
            "n_runs": plan.n_runs, "run_seeds": seeds, "files": [self.name(i) for i in range(plan.n_runs)],
        }
        _atomic_write(self._record_path(), json.dumps(record, indent=1))

    # results
    def finished(self):
        """Results of finished runs from ``results.jsonl`` (resume); a run whose failure came
        from outside it (worker lost, disk full) is left to run again."""
        if self.previous is None:
            return {}
        done = {}
        path = os.path.join(self.out, RESULTS)
        try:
            with open(path) as fh:
                lines = fh.readlines()
        except FileNotFoundError:
            return {}
        for line in lines:
            try:
                r = json.loads(line)
            except ValueError:              # the line being written when the sweep died
                continue
            if isinstance(r, dict) and 0 <= r.get("index", -1) < self.plan.n_runs:
                done[r["index"]] = r
        return {i: r for i, r in done.items() if not r.get("retry")}

    def log(self, r):
        """Append a finished run (flushed: it survives the sweep's process being killed)."""
        with open(os.path.join(self.out, RESULTS), "a") as fh:
            fh.write(json.dumps(r) + "\n")

    def write_tables(self, result, force=False):
        """Rewrite runs.csv and checks.csv; between forced writes at most ``CSV_SHARE`` of the
        time goes to it (large sweeps write less often; results.jsonl has every run)."""
        now = time.perf_counter()
        if not force and self.write_cost > CSV_SHARE * (now - self.last_write):
            return
        runs, checks = result.tables(finished_only=True)
        _atomic_write(os.path.join(self.out, RUNS_CSV), runs.to_csv())
        _atomic_write(os.path.join(self.out, CHECKS_CSV), checks.to_csv(index=False))
        self.last_write = time.perf_counter()
        self.write_cost = self.last_write - now


def _atomic_write(path, text):
    temp = path + ".tmp"
    with open(temp, "w") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(temp, path)


def _short(value):
    text = json.dumps(value)
    return text if len(text) <= 70 else text[:67] + "..."


# ------------------------------------------------------------------ the result

class SweepResult:
    """What a sweep produced.

    Attributes
    ----------
    runs : pandas.DataFrame
        One row per run (index: the run's row index): a column per swept key (its dotted
        path), ``replicate``, ``seed``, ``status`` ("complete" | "failed"), ``message``,
        ``file`` (None in memory), ``wall_time`` (s: run, checks and analyze), then the
        columns ``analyze`` returned.
    checks : pandas.DataFrame
        One row per run and check quantity: ``run`` (the row index), the swept keys,
        ``replicate``, ``key``, ``quantity``, ``measured``, ``error``, ``predicted``, ``z``,
        ``status``, ``unit`` (SI).
    out : str or None
    seed : int
        The base seed the run seeds derive from.
    """

    def __init__(self, plan, runs, done, folder):
        self.plan = plan
        self._runs = runs
        self.results = dict(done)
        self.folder = folder
        self.out = folder.out if folder else None
        self.seed = plan.seed
        self.elapsed = None          # s, wall time of the sweep call (set when it ends)
        self.ran = []                # indices of the runs this call ran, in finishing order

    def add(self, r):
        self.ran.append(r["index"])
        self.results[r["index"]] = r
        self._cache = None

    @property
    def runs(self):
        return self._tables()[0]

    @property
    def checks(self):
        return self._tables()[1]

    def _tables(self):
        if getattr(self, "_cache", None) is None:
            self._cache = self.tables()
        return self._cache

    def tables(self, finished_only=False):
        """(runs, checks) DataFrames; ``finished_only`` leaves out runs not finished yet."""
        import pandas as pd
        keys = self.plan.keys
        rows, check_rows, extra = [], [], {}
        for i, run in enumerate(self._runs):
            r = self.results.get(i)
            if r is None and finished_only:
                continue
            message = "; ".join([m for m in ([r["message"]] if r else []) if m] + run["notes"])
            row = {**run["values"], "replicate": run["replicate"], "seed": run["seed"],
                   "status": r["status"] if r else "not run", "message": message,
                   "file": self.folder.file(i) if self.folder and run["refused"] is None else None,
                   "wall_time": r["wall_time"] if r else math.nan}
            if r:
                for k, v in r["analyze"].items():
                    extra.setdefault(k, None)
                    row[k] = v
                for c in r["checks"]:
                    check_rows.append({"run": i, **run["values"], "replicate": run["replicate"], **c})
            rows.append((i, row))
        columns = keys + ["replicate", "seed", "status", "message", "file", "wall_time"] + list(extra)
        runs = pd.DataFrame([row for _, row in rows], index=pd.Index([i for i, _ in rows], name="run"),
                            columns=columns)
        from .worker import CHECK_FIELDS
        checks = pd.DataFrame(check_rows, columns=["run"] + keys + ["replicate"] + list(CHECK_FIELDS))
        for name in ("measured", "error", "predicted", "z"):
            checks[name] = checks[name].astype(float)
        return runs, checks

    def config(self, index):
        """The config of run ``index`` (seed included): ``langsim.run`` of it alone gives the
        run's trajectory bit for bit."""
        import copy
        return copy.deepcopy(self._runs[index]["config"])

    def trajectory(self, index):
        """The trajectory of run ``index``: its file, or (in memory) the run done again."""
        if self.folder is not None:
            from ..trajectory import load
            return load(self.folder.file(index))
        from ..engine import run
        return run(self.config(index), progress=False)

    def calibration(self):
        """The calibration verdict of the checks' error bars (see :mod:`langsim.sweeps.report`)."""
        from .report import calibration
        return calibration(self.checks)

    @property
    def costs(self):
        """Where each run's time went (pandas; see :func:`langsim.sweeps.report.cost_table`)."""
        from .report import cost_table
        return cost_table(self)

    def cost_summary(self):
        """Mean cost per run at each point, as a text table."""
        from .report import cost_summary
        return cost_summary(self, self.elapsed)

    def plot(self, directory, overwrite=False):
        """Figures per check quantity and of the z-scores into ``directory``; returns the paths."""
        from .report import plot_sweep
        return plot_sweep(self, directory, overwrite=overwrite)

    def __repr__(self):
        runs = self.runs
        failed = int((runs["status"] == "failed").sum())
        where = f" in {self.out!r}" if self.out else " in memory"
        return f"<SweepResult {len(runs)} runs ({failed} failed) over {', '.join(self.plan.keys)}{where}>"
