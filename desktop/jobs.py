"""The window's one background-job mechanism: fits, analyses, file reading, formula checks.

Everything slow that the window does off its GUI thread goes through here::

    channel = Channel(parent)                   # one line of work
    channel.finished.connect(show)              # (result)
    channel.failed.connect(tell)                # (message)
    job = channel.submit("bootstrap", payload)  # -> Job
    job.cancel()                                # or channel.cancel()

A **kind** names the work (a row of :data:`desktop.job_kinds.KINDS`: "fit", "compare",
"diagnostics", "bootstrap", "model_check", "read", "paste", "session", "formula",
"batch"); the payload is a dict of plain values. The kind decides **where** the job runs, hidden from the caller: in
a worker thread (short fits, large analyses whose numpy calls leave the GIL free), or
in a child process driven from that thread (many short fits, file reading and
formula checks, which would otherwise hold the GIL away from the window, and which
a Cancel or a time limit can end at once). ``where="inline"`` runs a job in the
calling thread, signals included, before :meth:`Channel.submit` returns.

A **channel** is newest-wins: submitting while a job runs cancels that job (its
answer is dropped) and the new one runs next. Each job reports exactly one of
``finished(result)``, ``failed(message)`` or ``cancelled(partial)``, on the GUI
thread, through its own signals and through the channel's. ``progress(done, total)``
is throttled to one signal per ``progress_ms``; a thread job that calls
``progress(done, total, items)`` also hands ``items`` over at once, unthrottled and in
order, through ``partial(items)`` (the batch window's rows, as they are fitted). Cancel does not wait for the worker:
``cancelled`` is emitted at once; a child process is ended within
:data:`desktop.job_kinds.POLL_S`, a thread job at its next cancel check.
"""
from __future__ import annotations

import logging
import threading
import time
from typing import Any

from PySide6.QtCore import QCoreApplication, QDeadlineTimer, QObject, QRunnable, QThreadPool, Signal, Slot

from . import gui_gc, job_kinds
from .job_kinds import Cancelled, TimeLimit, internal_error

log = logging.getLogger(__name__)

__all__ = ["Cancelled", "Channel", "Job", "TimeLimit"]


class _Bridge(QObject):
    progress = Signal(int, int, int)  # token, done, total
    partial = Signal(int, object)  # token, items handed over while the job runs
    done = Signal(int, object, object, bool, float)  # token, result, error message, cancelled, seconds


def _emit(signal, *args) -> None:
    try:
        signal.emit(*args)
    except RuntimeError:  # the window closed during a long job: nobody is left to take the answer
        pass


def _outcome(token, kind, payload, where, time_limit, stop: threading.Event, progress):
    """``(token, result, message, cancelled, seconds)`` of one job, run in this thread."""
    t0 = time.perf_counter()
    if stop.is_set():
        return token, None, None, True, 0.0
    try:
        res = job_kinds.run_here(kind, payload, progress, stop.is_set, where=where, time_limit=time_limit)
        cancelled = stop.is_set() or bool(getattr(res, "cancelled", False))
        return token, res, None, cancelled, time.perf_counter() - t0
    except Cancelled:
        return token, None, None, True, time.perf_counter() - t0
    except (ValueError, OSError) as err:  # the project's errors (and TimeLimit) say what went wrong
        if stop.is_set():
            return token, None, None, True, time.perf_counter() - t0
        return token, None, str(err) or type(err).__name__, False, time.perf_counter() - t0
    except Exception as err:  # a job must never take the window down: reported through 'failed', logged
        log.warning("%s job stopped with an internal error", kind, exc_info=True)
        if stop.is_set():
            return token, None, None, True, time.perf_counter() - t0
        return token, None, internal_error(err), False, time.perf_counter() - t0


class _Task(QRunnable):
    def __init__(self, job: "Job", bridge: _Bridge, stop: threading.Event, progress_ms: float):
        super().__init__()
        self.args = (job.token, job.kind, job.payload, job.where, job.time_limit)
        self.bridge = bridge
        self.stop = stop
        self.progress_ms = progress_ms
        self._last = 0.0
        self.setAutoDelete(True)

    def _progress(self, done, total=None, items=None):
        if items is not None:  # never throttled: each batch of items is part of the answer
            _emit(self.bridge.partial, self.args[0], items)
        now = time.perf_counter()
        last = total is not None and int(done) >= int(total)
        if last or (now - self._last) * 1000.0 >= self.progress_ms:
            self._last = now
            _emit(self.bridge.progress, self.args[0], int(done), int(total if total is not None else 0))

    def run(self):
        with gui_gc.worker():  # the GUI thread's garbage collection waits for this Python work
            try:
                out = _outcome(*self.args, self.stop, self._progress)
            except BaseException as err:  # noqa: BLE001 - nothing may escape into Qt's thread pool: the job would never end
                out = (self.args[0], None, internal_error(err), False, 0.0)
        _emit(self.bridge.done, *out)


class Job(QObject):
    """One submitted job (see the module). Its signals fire once, on the GUI thread.

    Attributes
    ----------
    kind, payload, where
        What runs, on what, and where ("thread", "process" or "inline").
    state
        "running", "finished", "failed" or "cancelled".
    result, message, seconds
        The answer, the failure message, and how long the work ran.
    """

    progress = Signal(int, int)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal(object)

    def __init__(self, channel: "Channel", token: int, kind: str, payload: Any, where: str,
                 time_limit: float | None):
        super().__init__()
        self.channel = channel
        self.token = token
        self.kind = kind
        self.payload = payload
        self.where = where
        self.time_limit = time_limit
        self.state = "running"
        self.result = None
        self.message = ""
        self.seconds = 0.0
        self.stop = threading.Event()

    @property
    def running(self) -> bool:
        return self.state == "running"

    def cancel(self) -> None:
        """Stop this job (a no-op once it has ended); see :meth:`Channel.cancel`."""
        if self.running and self.channel.current is self:
            self.channel.cancel()

    def wait(self, timeout_ms: int = 60000) -> bool:
        """Process events until this job has ended (tests and scripts). True if it has."""
        deadline = QDeadlineTimer(timeout_ms)
        while self.running:
            self.channel.idle_worker(10)
            QCoreApplication.processEvents()
            if deadline.hasExpired():
                return False
        return True


class Channel(QObject):
    """One line of background work: the newest submitted job wins.

    Signals (each job's own signals fire too)
    -------
    progress(done, total)
        Throttled progress of the current job.
    partial(items)
        Items the current job handed over while it runs (in order, none dropped).
    finished(result)
        The current job returned (a result marked ``cancelled=True`` is reported
        through ``cancelled`` instead).
    failed(message)
        The current job raised, or ran past its time limit; ``message`` is plain language.
    cancelled(partial)
        Cancel was asked (``partial`` is None), or the job returned a result marked
        ``cancelled``.
    busy_changed(bool)
    """

    progress = Signal(int, int)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal(object)  # partial result or None
    busy_changed = Signal(bool)

    def __init__(self, parent=None, progress_ms: float = 50.0):
        super().__init__(parent)
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(1)
        self._bridge = _Bridge()
        self._bridge.progress.connect(self._on_progress)
        self._bridge.partial.connect(self._on_partial)
        self._bridge.done.connect(self._on_done)
        self._token = 0
        self.current: Job | None = None
        self.last: Job | None = None  # the job that ended last (its answer was reported)
        self.progress_ms = float(progress_ms)
        self.seconds = 0.0  # wall time of the last job, from submit to its answer
        self._t0 = 0.0

    @property
    def running(self) -> bool:
        return self.current is not None

    def submit(self, kind: str, payload: Any, where: str | None = None,
               time_limit: float | None = None) -> Job:
        """Start a job of ``kind`` on ``payload``; a running job of this channel is cancelled.

        ``where``: "thread", "process" or "inline"; default the kind's own choice.
        ``time_limit``: seconds (child-process jobs), default the kind's.
        """
        k = job_kinds.KINDS[kind]  # KeyError for an unknown kind, before anything starts
        if where is None:
            where = k.where(payload)
        old = self.current
        if old is not None:  # superseded: its answer is dropped, the channel stays busy
            old.stop.set()
            old.state = "cancelled"
            old.cancelled.emit(None)
        self._token += 1
        job = Job(self, self._token, kind, payload, where, time_limit)
        self._t0 = time.perf_counter()
        was_idle = self.current is None
        self.current = job
        if was_idle:
            self.busy_changed.emit(True)
        if where == "inline":
            self._on_done(*_outcome(job.token, kind, payload, where, time_limit, job.stop, None))
        else:
            self._pool.start(_Task(job, self._bridge, job.stop, self.progress_ms))
        return job

    def cancel(self) -> None:
        """Stop the running job.

        The worker is asked to stop (a child process is ended); the window does not
        wait for that: ``cancelled`` is emitted at once and whatever the worker still
        returns is dropped (a new submit queues behind it).
        """
        job = self.current
        if job is None:
            return
        job.stop.set()
        self._token += 1  # drop the abandoned run's answer
        self.current, self.last = None, job
        self.seconds = time.perf_counter() - self._t0
        job.state = "cancelled"
        job.seconds = self.seconds
        self.busy_changed.emit(False)
        job.cancelled.emit(None)
        self.cancelled.emit(None)

    @Slot(int, int, int)
    def _on_progress(self, token, done, total):
        job = self.current
        if job is not None and token == job.token:
            job.progress.emit(done, total)
            self.progress.emit(done, total)

    @Slot(int, object)
    def _on_partial(self, token, items):
        job = self.current
        if job is not None and token == job.token:
            job.partial.emit(items)
            self.partial.emit(items)

    @Slot(int, object, object, bool, float)
    def _on_done(self, token, res, msg, cancelled, seconds):
        job = self.current
        if job is None or token != job.token:
            return  # superseded or cancelled
        self.current, self.last = None, job
        self.seconds = time.perf_counter() - self._t0
        job.seconds = seconds
        job.result, job.message = res, msg or ""
        self.busy_changed.emit(False)
        if cancelled:
            job.state = "cancelled"
            job.cancelled.emit(res)
            self.cancelled.emit(res)
        elif msg is not None:
            job.state = "failed"
            job.failed.emit(msg)
            self.failed.emit(msg)
        else:
            job.state = "finished"
            job.finished.emit(res)
            self.finished.emit(res)

    def wait(self, timeout_ms: int = 60000) -> bool:
        """Process events until the channel is idle (tests and scripts). True if idle."""
        deadline = QDeadlineTimer(timeout_ms)
        while self.current is not None:
            self._pool.waitForDone(10)
            QCoreApplication.processEvents()
            if deadline.hasExpired():
                return False
        return True

    def shutdown(self, timeout_ms: int = 5000) -> None:
        """Cancel and wait for the worker (window closing)."""
        self.cancel()
        self._pool.waitForDone(timeout_ms)

    def idle_worker(self, timeout_ms: int = 30000) -> bool:
        """Wait until the worker thread itself is idle (also after a cancel)."""
        return self._pool.waitForDone(timeout_ms)


def warm_up() -> None:
    """Start an idle child process now, so the next child job starts at once."""
    job_kinds.warm_up()


def shutdown() -> None:
    """End the idle child processes (the last window closing)."""
    job_kinds.shutdown()
