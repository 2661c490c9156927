"""Closing the window during a long worker fit (issue 16): the fit that finishes after
the window (and the runner's signal object) is gone drops its result quietly; it printed
"Signal source has been deleted" from the worker thread before."""
from __future__ import annotations

import shiboken6

from desktop import worker


def test_fit_finishing_after_its_receiver_is_gone(monkeypatch, qtbot):
    monkeypatch.setattr(worker, "run_fit", lambda request: (None, "done"))
    signals = worker._Signals()
    task = worker._FitTask({"generation": 3}, signals)
    shiboken6.delete(signals)  # what closing the window does to the runner's children
    task.run()  # raised RuntimeError: Signal source has been deleted
