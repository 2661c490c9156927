"""When the window fits: throttled, superseding, off the GUI thread when large.

:class:`FitRunner` watches the document. After a change to the fit inputs it fits
at once when it is the first change for a while (``QUIET_S``) or when the last
inline fit ended at least a short gap ago (``debounce_ms``, or as long as that fit
took, whichever is longer), so a single click is answered without delay; changes that
come faster than that (a box drag) are collected and
the newest inputs are fitted when the gap has passed, so a drag gives a live fit a
few times a second, never one fit per mouse move, and the window keeps time to
process events between fits. Small fits run inline; fits over ``thread_threshold``
points, or any fit once one took longer than ``slow_fit_s``, run as "fit" jobs in a
worker thread (the window's job mechanism, :mod:`desktop.jobs`) so the window keeps
processing events. While a worker fit runs, the interpreter's thread switch interval
is shortened so the GUI thread gets the interpreter lock back within about 0.1 ms
(the default 5 ms wait, paid on each of the many calls a repaint makes into Python,
made the window stutter). Each request carries the document's generation number; a
result for older inputs is dropped, and while one fit runs only the newest waiting
request is kept (the running fit is not cancelled: its result is shown on the way, so
a drag over a large data set still gives a live fit).
"""
from __future__ import annotations

import sys
import time

import numpy as np
from PySide6.QtCore import QCoreApplication, QDeadlineTimer, QObject, QTimer, Signal

from .document import Document
from .jobs import Channel


class FitRunner(QObject):
    """Keeps the document's result up to date.

    Parameters
    ----------
    document
        The document to fit.
    debounce_ms
        Shortest gap between the end of one inline fit and the start of the next
        while changes keep coming (the gap is also at least as long as the last
        fit took, up to ``slow_fit_s``).
    thread_threshold
        Fits with more points than this run in the worker thread.
    """

    #: a fit started (True) or all fits finished (False)
    busy_changed = Signal(bool)
    #: a result or failure was delivered to the document
    finished = Signal()

    #: a change this long after the previous one starts a new burst: it fits at once
    QUIET_S = 0.1
    #: thread switch interval (s) while a worker fit runs
    SWITCH_INTERVAL_S = 0.0001

    def __init__(self, document: Document, debounce_ms: int = 10, thread_threshold: int = 20000,
                 slow_fit_s: float = 0.06, parent=None):
        super().__init__(parent)
        self.document = document
        self.debounce_ms = int(debounce_ms)
        self.thread_threshold = int(thread_threshold)
        self.slow_fit_s = float(slow_fit_s)
        self.enabled = True
        self.last_seconds = 0.0
        self.channel = Channel(self)
        self.channel.finished.connect(self._on_done)
        # a job that could not even run (an error outside the engine) is a failed fit
        self.channel.failed.connect(lambda message: self._on_done((None, message)))
        self.channel.cancelled.connect(lambda _partial: self._on_done((None, "the fit was stopped")))
        self._request = None  # the request of the running worker fit
        self._running = False
        self._pending = None
        self._cooldown = QTimer(self)
        self._cooldown.setSingleShot(True)
        self._cooldown.timeout.connect(self._on_cooldown)
        self._dirty = False
        self._last_end = -float("inf")  # perf_counter() when the last fit was delivered
        self._last_request = -float("inf")  # perf_counter() of the last change
        self._saved_switch = None
        self._last_threaded = False
        document.subscribe(self._on_document)

    # ------------------------------------------------------------------ triggers
    def _on_document(self, event, **info):
        if event in ("data", "mask", "settings") and self.enabled:
            self.schedule()

    def schedule(self):
        """Ask for a fit of the current inputs (at once, or after the gap; see the class)."""
        if not self.document.has_data:
            return
        now = time.perf_counter()
        quiet = now - self._last_request >= self.QUIET_S
        self._last_request = now
        if self._cooldown.isActive():
            self._dirty = True  # the timer fits the newest inputs when the gap has passed
            return
        wait = self.gap_seconds() - (now - self._last_end)
        if quiet or wait <= 0:
            self._dirty = False
            self.fit_now()
            return
        self._dirty = True
        self._cooldown.start(max(1, int(np.ceil(wait * 1000))))

    def gap_seconds(self) -> float:
        """Least time between the end of a fit and the start of the next in a burst.

        Only inline fits (which hold the window while they run) need a gap; a
        worker fit runs beside the window, and the newest request waits for it.
        """
        if self._last_threaded:
            return 0.0
        return max(self.debounce_ms / 1000.0, min(self.last_seconds, self.slow_fit_s))

    def _on_cooldown(self):
        if self._dirty:
            self._dirty = False
            self.fit_now()

    @property
    def busy(self) -> bool:
        return self._running or self._pending is not None

    def fit_now(self):
        """Fit the current inputs now (inline or in the worker)."""
        doc = self.document
        if not doc.has_data:
            return
        request = doc.fit_request()
        n_used = int((~request["excluded"]).sum())
        threaded = n_used > self.thread_threshold or self.last_seconds > self.slow_fit_s
        if self._running:
            self._pending = request  # supersedes any older waiting request
            return
        self._last_threaded = threaded
        if not threaded:
            job = self.channel.submit("fit", request, where="inline")
            res, msg = job.result
            self._deliver(res, msg, request["generation"], job.seconds)
            return
        self._start(request)

    def _start(self, request):
        if not self._running and self._saved_switch is None:
            self._saved_switch = sys.getswitchinterval()
            sys.setswitchinterval(min(self._saved_switch, self.SWITCH_INTERVAL_S))
        self._running = True
        self._request = request
        self.busy_changed.emit(True)
        self.channel.submit("fit", request, where="thread")

    def _restore_switch(self):
        if self._saved_switch is not None:
            sys.setswitchinterval(self._saved_switch)
            self._saved_switch = None

    def _on_done(self, outcome):
        if not self._running:
            return  # an inline fit: delivered by fit_now
        res, msg = outcome
        generation, seconds = self._request["generation"], self.channel.last.seconds
        self._request = None
        self._running = False
        pending, self._pending = self._pending, None
        self._deliver(res, msg, generation, seconds)
        if pending is not None and pending["generation"] == self.document.generation:
            self._start(pending)
        elif pending is not None:
            self._start(self.document.fit_request())
        else:
            self._restore_switch()
            self.busy_changed.emit(False)

    def deliver(self, result, seconds: float) -> None:
        """Show ``result``, a fit of the document's current inputs made elsewhere (the
        trial fit of a file just opened, see ``MainWindow.method_for``), as if this runner
        had fitted them in ``seconds``."""
        self._deliver(result, None, self.document.generation, seconds)

    def _deliver(self, res, msg, generation, seconds):
        self.last_seconds = seconds
        self._last_end = time.perf_counter()
        doc = self.document
        if res is None:
            doc.reject_fit(msg, generation)
        else:
            doc.accept_result(res, generation)
        self.finished.emit()

    def wait(self, timeout_ms: int = 30000) -> bool:
        """Block until no fit runs or waits (for tests and scripts). True if idle."""
        deadline = QDeadlineTimer(timeout_ms)
        while self.busy or self._dirty:
            if self._dirty and not self._running:
                self._cooldown.stop()
                self._dirty = False
                self.fit_now()
            self.channel.idle_worker(10)
            QCoreApplication.processEvents()
            if deadline.hasExpired():
                return False
        return True
