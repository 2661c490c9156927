"""Python's cyclic garbage collector, in the window's process, runs on the GUI thread
only: from a timer between events, never started by a worker thread's allocations.

Why. Widgets and plot items of closed windows, replaced views and finished jobs are often
kept alive by reference cycles, so they are freed by the cyclic collector, whenever it
happens to run. Left automatic, it runs in whichever thread allocates at that moment:

* in a job's worker thread (parsing a large JSON answer, a fit), a Qt object's
  destructor then ran in that thread and waited for the interpreter lock while the GUI
  thread, deleting another widget, waited for Qt's object lock: the window hung (gdb
  stacks in the team's startup note);
* in the GUI thread in the middle of Python code (``MainWindow.run_job``) while a job
  thread imported a module: a segmentation fault (faulthandler: the GUI thread
  "Garbage-collecting", the team's segv note).

So :func:`install` switches automatic collection off and a GUI-thread timer collects
instead, with Python's own thresholds (so memory stays bounded as before): every
``INTERVAL_MS`` it looks at :func:`gc.get_count` and collects the generations Python
would have collected by now. While a worker thread runs Python code (marked with
:func:`worker`: the job threads, the fitting modules' import) the collection waits,
at most ``MAX_DEFER_S``, so a Qt destructor never lets another Python thread run in
the middle of a collection; a longer job gets its collections anyway (memory first).

It is process-wide and installed once (by every :class:`~desktop.main_window.MainWindow`,
so the tests' windows have it too). Code that runs without an event loop in a process
that has it (e.g. a test suite running library tests after window tests) can put the
automatic collector back with :func:`uninstall`.
"""
from __future__ import annotations

import gc
import threading
import time
from contextlib import contextmanager

from PySide6.QtCore import QCoreApplication, QObject, QThread, QTimer, Slot

#: how often the GUI thread looks at the allocation counts (ms)
INTERVAL_MS = 200
#: the longest a collection waits for the worker threads to finish their Python work (s)
MAX_DEFER_S = 5.0

_lock = threading.Lock()
_workers = 0
_installed: dict = {"collector": None}


@contextmanager
def worker():
    """Mark the calling (non-GUI) thread as running Python code: the GUI thread's
    collection waits until no such thread runs (at most ``MAX_DEFER_S``)."""
    global _workers
    with _lock:
        _workers += 1
    try:
        yield
    finally:
        with _lock:
            _workers -= 1


def workers_running() -> int:
    return _workers


class GuiCollector(QObject):
    """The timer that collects on the GUI thread (see the module)."""

    def __init__(self, app):
        super().__init__(app)
        self.thresholds = gc.get_threshold()
        self.collections = [0, 0, 0]  # by generation, for tests and curiosity
        self.deferred = 0  # ticks a due collection waited for worker threads
        self._waiting_since: float | None = None
        self.timer = QTimer(self)
        self.timer.timeout.connect(self.check)
        self.timer.start(INTERVAL_MS)

    def due(self) -> int:
        """The oldest generation Python would have collected by now, or -1."""
        c0, c1, c2 = gc.get_count()
        t0, t1, t2 = self.thresholds
        if t0 <= 0 or c0 <= t0:  # as CPython: nothing until generation 0 passes its threshold,
            return -1
        if c2 > t2:  # then the oldest generation whose count passed its own
            return 2
        return 1 if c1 > t1 else 0

    @Slot()
    def check(self) -> int:
        """Collect what is due (GUI thread, between events); returns the generation or -1."""
        if gc.isenabled():  # turned back on by someone: automatic collection is not safe here
            gc.disable()
        gen = self.due()
        if gen < 0:
            return -1
        if _workers > 0:
            now = time.monotonic()
            if self._waiting_since is None:
                self._waiting_since = now
            if now - self._waiting_since < MAX_DEFER_S:
                self.deferred += 1
                return -1
        self._waiting_since = None
        gc.collect(gen)
        self.collections[gen] += 1
        return gen


def install(app=None) -> GuiCollector:
    """Collect on the GUI thread from now on (idempotent; call it on the GUI thread).
    Automatic collection is switched off for the whole process."""
    app = app or QCoreApplication.instance()
    if app is None:
        raise RuntimeError("gui_gc.install needs a QApplication")
    if QThread.currentThread() is not app.thread():
        raise RuntimeError("gui_gc.install must be called on the GUI thread")
    col = _installed["collector"]
    if col is None:
        col = _installed["collector"] = GuiCollector(app)
        col.destroyed.connect(_forget)
    elif not col.timer.isActive():
        col.timer.start(INTERVAL_MS)
    gc.disable()
    return col


def _forget(*_):
    _installed["collector"] = None
    gc.enable()  # the application is gone: nobody collects for us any more


def installed() -> GuiCollector | None:
    return _installed["collector"]


def uninstall() -> None:
    """Automatic collection back on, the timer stopped (until the next :func:`install`)."""
    col = _installed["collector"]
    if col is not None:
        col.timer.stop()
    gc.enable()
