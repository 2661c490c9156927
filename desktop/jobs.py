"""Long analysis jobs off the GUI thread: loss comparison, point diagnostics, bootstrap.

A :class:`Job` runs one function in a ``QThreadPool`` worker. The function gets two
callables, ``progress(done, total)`` and ``cancel() -> bool``, which it passes on to
the fitcore routine (they are called from the worker thread; progress reaches the
window through a queued signal, at most every ``progress_ms``). The job reports
exactly one of ``finished(result)``, ``failed(message)`` or ``cancelled()`` back on
the GUI thread.

Each job has its own one-thread pool, so a comparison never waits behind a bootstrap
and the fit runner's own pool is never blocked.
"""
from __future__ import annotations

import threading
import time
import traceback
from typing import Callable

from PySide6.QtCore import QObject, QRunnable, QThreadPool, Signal, Slot


class Cancelled(Exception):
    """Raised inside a job function (by its ``cancel`` check) to stop it early."""


class _Bridge(QObject):
    progress = Signal(int, int)
    done = Signal(int, object, object, bool)  # token, result, error message, cancelled


class _Task(QRunnable):
    def __init__(self, fn, token, bridge, stop: threading.Event, progress_ms: float):
        super().__init__()
        self.fn = fn
        self.token = token
        self.bridge = bridge
        self.stop = stop
        self.progress_ms = progress_ms
        self._last = 0.0
        self.setAutoDelete(True)

    def _progress(self, done, total=None):
        now = time.perf_counter()
        last = total is not None and int(done) >= int(total)
        if last or (now - self._last) * 1000.0 >= self.progress_ms:
            self._last = now
            self.bridge.progress.emit(int(done), int(total if total is not None else 0))

    def _cancel(self) -> bool:
        return self.stop.is_set()

    def run(self):
        try:
            res = self.fn(self._progress, self._cancel)
            cancelled = self.stop.is_set() or bool(getattr(res, "cancelled", False))
            self.bridge.done.emit(self.token, res, None, cancelled)
        except Cancelled:
            self.bridge.done.emit(self.token, None, None, True)
        except Exception as err:  # noqa: BLE001 - a job must never take the window down
            if self.stop.is_set():
                self.bridge.done.emit(self.token, None, None, True)
                return
            msg = str(err) if isinstance(err, ValueError) else \
                traceback.format_exception_only(type(err), err)[-1].strip()
            self.bridge.done.emit(self.token, None, msg or type(err).__name__, False)


class Job(QObject):
    """One kind of background job (a newer start supersedes a running one).

    Signals
    -------
    progress(done, total)
        Throttled progress from the worker.
    finished(result)
        The function returned (``result`` may carry ``cancelled=True`` when it stopped
        early with a partial answer; then ``cancelled`` is emitted instead).
    failed(message)
        The function raised; ``message`` is plain language.
    cancelled(partial)
        Cancel was asked (``partial`` is None), or the function returned a result
        marked ``cancelled``.
    busy_changed(bool)
    """

    progress = Signal(int, int)
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
        self._bridge.done.connect(self._on_done)
        self._token = 0
        self._stop: threading.Event | None = None
        self._running = False
        self.progress_ms = float(progress_ms)
        self.seconds = 0.0
        self._t0 = 0.0

    @property
    def running(self) -> bool:
        return self._running

    def start(self, fn: Callable) -> None:
        """Run ``fn(progress, cancel)`` in the worker; an older run is cancelled."""
        if self._stop is not None:
            self._stop.set()
        self._token += 1
        self._stop = threading.Event()
        self._t0 = time.perf_counter()
        if not self._running:
            self._running = True
            self.busy_changed.emit(True)
        self._pool.start(_Task(fn, self._token, self._bridge, self._stop, self.progress_ms))

    def cancel(self) -> None:
        """Stop the running job.

        The worker is asked to stop at its next cancel check; the window does not wait
        for that: ``cancelled`` is emitted at once and whatever the worker still
        returns is dropped (a new start queues behind it).
        """
        if self._stop is not None:
            self._stop.set()
        if self._running:
            self._token += 1  # drop the abandoned run's answer
            self._running = False
            self._stop = None
            self.seconds = time.perf_counter() - self._t0
            self.busy_changed.emit(False)
            self.cancelled.emit(None)

    @Slot(int, int)
    def _on_progress(self, done, total):
        if self._running:
            self.progress.emit(done, total)

    @Slot(int, object, object, bool)
    def _on_done(self, token, res, msg, cancelled):
        if token != self._token:
            return  # superseded
        self._running = False
        self._stop = None
        self.seconds = time.perf_counter() - self._t0
        self.busy_changed.emit(False)
        if cancelled:
            self.cancelled.emit(res)
        elif msg is not None:
            self.failed.emit(msg)
        else:
            self.finished.emit(res)

    def wait(self, timeout_ms: int = 60000) -> bool:
        """Process events until the job is idle (tests and scripts). True if idle."""
        from PySide6.QtCore import QCoreApplication, QDeadlineTimer

        deadline = QDeadlineTimer(timeout_ms)
        while self._running:
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
