"""One run of a sweep, wherever it executes: this process, a local worker
process, a thread of an Executor or a Dask worker.

A task is a small dict of plain data (the run's config, never arrays of
results): ``index``, ``config``, ``file`` (HDF5 path or None), ``checks``
(bool), ``analyze`` (the user function pickled with cloudpickle, or None).
:func:`execute` returns a result dict of plain data: ``index``, ``status``
("complete" | "failed"), ``message``, ``wall_time``, ``checks`` (rows),
``analyze`` (numbers), and ``retry`` (True when the failure came from outside
the run: resuming the sweep tries it again) or ``interrupted``.

Run as ``python -m langsim.sweeps.worker IN_FD OUT_FD``, it serves tasks from
a local pool (:mod:`langsim.sweeps.pool`) over two pipes until the pipe closes,
single-threaded, keeping its compiled kernels across runs, and ends when its
parent process ends.
"""
import math
import numbers
import os
import sys
import threading
import time
import traceback

#: Columns of a check row kept in the sweep's checks table (besides run and axes).
CHECK_FIELDS = ("key", "quantity", "measured", "error", "predicted", "z", "status", "unit")


def execute(task):
    """Run one task; never raises for a failure of the run (it is the result)."""
    t0 = time.perf_counter()
    result = {"index": task["index"], "status": "failed", "message": "", "checks": [],
              "analyze": {}, "retry": False}
    import warnings
    from ..config import LangsimWarning
    try:
        with warnings.catch_warnings():        # config warnings: the sweep recorded them already
            warnings.simplefilter("ignore", LangsimWarning)
            _execute(task, result)
    except KeyboardInterrupt:
        raise
    except BaseException as exc:              # a bug or an outside cause: recorded, never fatal
        result.update(status="failed", retry=isinstance(exc, (OSError, MemoryError)),
                      message=f"{type(exc).__name__}: {exc}")
    result["wall_time"] = time.perf_counter() - t0
    return result


def _execute(task, result):
    from .. import engine, trajectory
    from ..validation import ConfigError
    path = task.get("file")
    if path is not None and os.path.exists(path):
        state = _file_state(path)
        if state is not None and state["state"] == trajectory.STATE_FAILED:
            result["message"] = state["status"].get("message", "ended early")
            return                              # a blow-up recorded before: it would repeat
    t0 = time.perf_counter()
    try:
        traj = engine.run(task["config"], path, progress=False, threads=1, resume=path is not None)
    except ConfigError as exc:
        result["message"] = "\n".join(exc.messages)
        return
    except engine.RunInterrupted as exc:
        exc.trajectory.close()
        result.update(interrupted=True, message=exc.message, signum=exc.signum)
        return
    result["cost"] = _cost(traj, time.perf_counter() - t0)
    try:
        if not traj.status.complete:
            result["message"] = traj.status.message
            return
        if task.get("checks", True):
            t1 = time.perf_counter()
            try:
                from ..checks import check
                report = check(traj)
            except Exception as exc:
                result["message"] = f"check: {type(exc).__name__}: {exc}"
                return
            result["cost"]["checks"] = time.perf_counter() - t1
            rows = report.to_dict()["rows"]
            result["checks"] = [{k: row[k] for k in CHECK_FIELDS} for row in rows]
            if not rows:
                why = [n for n in report.notes if not n.startswith("transient:")]
                result["message"] = "no check applies" + (": " + "; ".join(why) if why else "")
        analyze = task.get("analyze")
        if analyze is not None:
            import cloudpickle
            fn = cloudpickle.loads(analyze)
            t1 = time.perf_counter()
            try:
                values = fn(traj)
                result["cost"]["analyze"] = time.perf_counter() - t1
            except Exception as exc:
                last = traceback.extract_tb(exc.__traceback__)[-1]
                result["message"] = (f"analyze raised {type(exc).__name__}: {exc} "
                                     f"({os.path.basename(last.filename)}, line {last.lineno})")
                return
            problem = _numbers(values, result, task.get("columns", ()))
            if problem:
                result["message"] = problem
                return
        result["status"] = "complete"
    finally:
        traj.close()


def _cost(traj, seconds):
    """Where the time of a run went (s), from the run's own statistics."""
    stats = getattr(traj, "run_stats", None)
    cost = {"run": seconds, "checks": 0.0, "analyze": 0.0, "steps": 0, "compile": 0.0,
            "particle_steps": 0, "stepping": math.nan}
    if stats is not None:
        n = int(traj.config["particles"]["count"])
        cost.update(steps=int(stats.steps), compile=float(stats.compile_time),
                    particle_steps=int(stats.steps) * n, stepping=float(stats.wall_time))
    return cost


def _file_state(path):
    from ..trajectory import read_state
    try:
        return read_state(path)
    except Exception:       # not readable yet: the run itself reports it
        return None


def _numbers(values, result, reserved):
    """Put analyze's numbers in ``result``; a message when they are not a dict of numbers."""
    if not isinstance(values, dict):
        return f"analyze returned {type(values).__name__}; expected a dict of numbers"
    out = {}
    for key, value in values.items():
        if not isinstance(key, str) or key in reserved:
            return (f"analyze returned the key {key!r}; expected string keys other than the "
                    f"runs table's own columns ({', '.join(reserved)})")
        if hasattr(value, "item") and getattr(value, "size", 1) == 1:
            value = value.item()
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            return f"analyze returned {key} = {value!r}; expected a number"
        out[key] = value if isinstance(value, int) else float(value)
    result["analyze"] = out
    return None


# ------------------------------------------------------------------ local worker process

def _die_with_parent(parent):
    """End this process when the sweep that started it ends (kill -9 included)."""
    try:
        import ctypes
        import signal
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL)           # PR_SET_PDEATHSIG (Linux)
    except (OSError, AttributeError):
        pass

    def watch():
        while True:
            time.sleep(0.5)
            if os.getppid() != parent:
                os._exit(1)
    threading.Thread(target=watch, daemon=True).start()
    if os.getppid() != parent:
        os._exit(1)


def serve(in_fd, out_fd, parent):
    """Answer tasks from the pool until the pipe closes."""
    import warnings
    from multiprocessing.connection import Connection
    _die_with_parent(parent)
    warnings.simplefilter("ignore")            # config warnings are recorded by the sweep
    inbox, outbox = Connection(in_fd, writable=False), Connection(out_fd, readable=False)
    from .. import checks, engine                # noqa: F401  (imported while the sweep prepares)
    outbox.send({"ready": os.getpid()})
    while True:
        try:
            task = inbox.recv()
        except (EOFError, KeyboardInterrupt):
            return
        try:
            result = execute(task)
        except KeyboardInterrupt:               # asked to stop between two chunks
            result = {"index": task["index"], "interrupted": True}
        outbox.send(result)
        if result.get("interrupted"):
            return


if __name__ == "__main__":
    serve(int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]))
