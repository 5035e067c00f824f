"""Where the runs of a sweep execute.

- :func:`in_process`: one after the other in the calling process (``workers=1``).
- :class:`LocalPool`: worker processes started fresh (``python -m
  langsim.sweeps.worker``), each single-threaded, each keeping its compiled
  kernels for all the runs it is given; nothing of the calling script is
  imported in them, so a script needs no ``if __name__ == "__main__"`` guard.
  A worker that dies takes only its run with it: the run is given to a new
  worker once (its file resumes from its last checkpoint), then recorded as
  failed.
- :func:`on_executor`: any ``concurrent.futures.Executor``, or a Dask
  ``distributed.Client`` (through its executor interface).

Each is a generator of result dicts (see :mod:`langsim.sweeps.worker`) in the
order runs finish. ``stop`` (a list) is set by the caller on an interrupt.
"""
import atexit
import collections
import concurrent.futures
import os
import signal
import subprocess
import sys
import time
from multiprocessing.connection import Connection, wait

from .worker import execute

#: Attempts at a run whose worker process died.
ATTEMPTS = 2
#: Seconds a stopped worker gets to checkpoint its run and answer.
STOP_GRACE = 60.0
#: Seconds idle workers get to end after their pipe closes (then they are killed).
CLOSE_GRACE = 5.0


_SHARED = []


def shared_pool(n):
    """The local pool of ``n`` workers this process keeps between sweeps (so a second sweep
    starts at once, its workers' kernels loaded); a new one when the count differs."""
    if _SHARED and (len(_SHARED[0].workers) != n or not _SHARED[0].healthy()):
        discard_shared()
    if not _SHARED:
        _SHARED.append(LocalPool(n))
    return _SHARED[0]


def discard_shared():
    """End the kept workers (also done at exit)."""
    while _SHARED:
        _SHARED.pop().close()


atexit.register(discard_shared)


def failed(task, message, retry=True):
    return {"index": task["index"], "status": "failed", "message": message, "checks": [],
            "analyze": {}, "retry": retry, "wall_time": 0.0}


def in_process(tasks):
    for task in tasks:
        yield execute(task)


def is_dask_client(executor):
    return type(executor).__name__ == "Client" and hasattr(executor, "get_executor")


def on_executor(executor, tasks):
    """Submit every task; results as they complete. A task whose future fails (a worker lost
    for good, a cancelled task) is a failed run that resuming the sweep tries again."""
    if is_dask_client(executor):
        executor = executor.get_executor(pure=False)
    futures = {executor.submit(execute, task): task for task in tasks}
    try:
        for future in concurrent.futures.as_completed(futures):
            task = futures[future]
            try:
                yield future.result()
            except concurrent.futures.CancelledError:
                yield failed(task, "cancelled by the executor")
            except Exception as exc:
                yield failed(task, f"the executor lost this run: {type(exc).__name__}: {exc}")
    finally:
        for future in futures:
            future.cancel()


class _Worker:
    def __init__(self, env):
        to_r, to_w = os.pipe()
        from_r, from_w = os.pipe()
        try:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "langsim.sweeps.worker", str(to_r), str(from_w), str(os.getpid())],
                pass_fds=(to_r, from_w), env=env, start_new_session=True, stdin=subprocess.DEVNULL)
        finally:
            os.close(to_r)
            os.close(from_w)
        self.inbox = Connection(to_w, readable=False)
        self.outbox = Connection(from_r, writable=False)
        self.ready = False
        self.task = None

    def close(self):
        for conn in (self.inbox, self.outbox):
            try:
                conn.close()
            except OSError:
                pass


class LocalPool:
    """``n`` worker processes; :meth:`run` yields results of the tasks given to it."""

    def __init__(self, n):
        env = dict(os.environ)
        env["NUMBA_NUM_THREADS"] = "1"
        paths = [os.getcwd() if p == "" else p for p in sys.path]
        env["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))     # the caller's modules
        self.env = env
        self.workers = [_Worker(env) for _ in range(n)]

    def run(self, tasks):
        """Results of ``tasks`` as they finish. On an interrupt, call :meth:`interrupt` and
        :meth:`drain`, then :meth:`close`."""
        pending = collections.deque(tasks)
        attempts = collections.Counter()
        while pending or self._busy():
            for w in self.workers:
                if w.ready and w.task is None and pending:
                    w.task = pending.popleft()
                    w.inbox.send(w.task)
            yield from self._answers(attempts, pending, timeout=0.5)

    def _busy(self):
        return any(w.task is not None for w in self.workers)

    def healthy(self):
        return bool(self.workers) and not self._busy() and all(w.proc.poll() is None for w in self.workers)

    def _answers(self, attempts, pending, timeout):
        for conn in wait([w.outbox for w in self.workers], timeout=timeout):
            w = next(w for w in self.workers if w.outbox is conn)
            try:
                message = conn.recv()
            except (EOFError, OSError):
                result = self._died(w, attempts, pending)
                if result is not None:
                    yield result
                continue
            if "ready" in message:
                w.ready = True
                continue
            w.task = None
            if not message.get("interrupted"):   # an interrupted run resumes from its checkpoint
                yield message

    def drain(self):
        """After :meth:`interrupt`: the answers of the busy workers (finished runs), for at
        most ``STOP_GRACE`` seconds."""
        deadline = time.monotonic() + STOP_GRACE
        while self._busy() and time.monotonic() < deadline:
            yield from self._answers(None, None, 0.5)

    def _died(self, w, attempts, pending):
        """A worker ended without answering: replace it; give its run to a new one once."""
        code = w.proc.wait()
        w.close()
        task, w.task = w.task, None
        if pending is None:                      # stopping: no replacement, no retry
            self.workers.remove(w)
            return None
        self.workers[self.workers.index(w)] = _Worker(self.env)
        if task is None:
            return None
        attempts[task["index"]] += 1
        if attempts[task["index"]] < ATTEMPTS:
            pending.appendleft(task)
            return None
        return failed(task, f"the worker process running this run died (exit code {code}) "
                            f"{attempts[task['index']]} times")

    def interrupt(self):
        """Ask busy workers to stop at their next chunk (they checkpoint their file)."""
        for w in self.workers:
            if w.task is not None and w.proc.poll() is None:
                try:
                    w.proc.send_signal(signal.SIGINT)
                except OSError:
                    pass

    def close(self):
        for w in self.workers:
            w.close()                            # EOF: an idle worker ends
        deadline = time.monotonic() + CLOSE_GRACE
        for w in self.workers:
            try:
                w.proc.wait(timeout=max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                w.proc.kill()
                w.proc.wait()
        self.workers = []
