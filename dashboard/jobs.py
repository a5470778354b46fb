"""Slow work for the board (a long run replayed), done away from the request threads.

A callback that needs something slow asks :class:`Jobs` for it by a key and gets
at once either the answer, or how far the work has got, or why it failed; it asks
again on its next poll. So no callback holds a request for longer than a lookup,
however long the work takes. A :class:`Jobs` lives in the app factory's closure,
like the board's :class:`~dashboard.app.Memo`, not in module state.

Work asked for with ``separate=True`` runs in a child process of its own (started
fresh, "spawn"), watched by a daemon thread that relays its progress: a week-long
replay is pure Python and, on a thread, would hold the interpreter lock and slow
every live callback about threefold; in a child it uses another core, and the
memory it needs (the whole log, read) goes back when it ends.
"""

from __future__ import annotations

import logging
import multiprocessing
import threading
from collections import OrderedDict
from collections.abc import Callable
from concurrent.futures import Future
from dataclasses import dataclass
from multiprocessing.connection import Connection

_log = logging.getLogger(__name__)


@dataclass(frozen=True)
class JobState:
    """Where a job is: ``status`` is "running", "done" or "failed"."""

    status: str
    #: The answer when done, else None.
    answer: object = None
    #: How far the work has got, 0-1, when it says (None before it does).
    progress: float | None = None
    #: What went wrong, when failed.
    error: str = ""


class _Job:
    def __init__(self) -> None:
        self.progress: float | None = None
        self.future: Future = Future()

    def report(self, fraction: float) -> None:
        self.progress = min(max(float(fraction), 0.0), 1.0)


class Jobs:
    """Work run ``workers`` at a time, keyed; the last ``keep`` jobs' answers are kept.

    ``ask(key, fn, *args)`` starts ``fn(*args, progress=report)`` the first time a
    key is asked for (``report(fraction)`` tells how far it has got) and returns the
    job's :class:`JobState`. A failed job is forgotten once its failure has been
    returned, so the next ask tries again.

    Each job is watched by a daemon thread, so stopping the board does not wait for
    a replay to finish (its child process, a daemon too, goes with it).
    """

    def __init__(self, workers: int = 1, keep: int = 8) -> None:
        self.keep = keep
        self._slots = threading.BoundedSemaphore(workers)
        self._jobs: OrderedDict[tuple, _Job] = OrderedDict()
        self._lock = threading.Lock()
        self._closed = False

    def ask(
        self, key: tuple, fn: Callable[..., object], *args: object, separate: bool = False
    ) -> JobState:
        """Return the state of the job ``key``, starting ``fn(*args, progress=...)`` if new.

        ``separate``: run ``fn`` in a child process (``fn``, its arguments and its
        answer must pickle; ``fn`` a module-level function).
        """
        with self._lock:
            job = self._jobs.get(key)
            if job is None:
                if self._closed:
                    return JobState("failed", error="the board is stopping")
                job = _Job()
                threading.Thread(target=self._work, args=(job, fn, args, separate),
                                 name="board-job", daemon=True).start()  # fmt: skip
                self._jobs[key] = job
                self._forget_oldest()
            else:
                self._jobs.move_to_end(key)
        future = job.future
        if not future.done():
            return JobState("running", progress=job.progress)
        exc = RuntimeError("the board is stopping") if future.cancelled() else future.exception()
        if exc is None:
            return JobState("done", answer=future.result(), progress=1.0)
        with self._lock:
            self._jobs.pop(key, None)
        _log.warning("board job %s failed: %s", key, exc)
        return JobState("failed", error=str(exc) or type(exc).__name__)

    def _forget_oldest(self) -> None:
        # finished jobs beyond ``keep`` go first; running ones are never dropped
        while len(self._jobs) > self.keep:
            done = next((k for k, j in self._jobs.items() if j.future.done()), None)
            if done is None:
                return
            del self._jobs[done]

    def _work(self, job: _Job, fn: Callable[..., object], args: tuple, separate: bool) -> None:
        future = job.future
        with self._slots:  # at most ``workers`` at once; the rest wait their turn
            if not future.set_running_or_notify_cancel():
                return
            try:
                if separate:
                    answer = _in_child(fn, args, job.report)
                else:
                    answer = fn(*args, progress=job.report)
            except Exception as exc:  # handed to the asker as a failure
                future.set_exception(exc)
            else:
                future.set_result(answer)

    def close(self) -> None:
        """Take no more work; jobs not yet started are dropped, running ones go on."""
        with self._lock:
            self._closed = True
            for job in self._jobs.values():
                job.future.cancel()  # only those still waiting for a slot


def _in_child(fn: Callable[..., object], args: tuple, report: Callable[[float], None]) -> object:
    """Run ``fn(*args, progress=...)`` in a fresh child process; relay progress; return."""
    ctx = multiprocessing.get_context("spawn")
    receive, send = ctx.Pipe(duplex=False)
    child = ctx.Process(target=_child_main, args=(fn, args, send), daemon=True)
    child.start()
    send.close()  # the child holds the sending end now
    try:
        while True:
            try:
                kind, value = receive.recv()
            except EOFError:
                child.join(5.0)
                raise RuntimeError(
                    f"the worker process ended without an answer (exit code {child.exitcode})"
                ) from None
            if kind == "progress":
                report(value)
            elif kind == "done":
                return value
            else:
                raise RuntimeError(value)
    finally:
        receive.close()
        child.join(5.0)
        if child.is_alive():
            child.terminate()


def _child_main(fn: Callable[..., object], args: tuple, send: Connection) -> None:
    def progress(fraction: float) -> None:
        send.send(("progress", float(fraction)))

    try:
        answer = fn(*args, progress=progress)
    except Exception as exc:  # reported to the board, which says so on the page
        send.send(("failed", f"{type(exc).__name__}: {exc}"))
    else:
        send.send(("done", answer))
    finally:
        send.close()
