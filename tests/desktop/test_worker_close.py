"""Closing the window during a long worker fit (issue 16): the job that finishes after the
window (and its channel's signal object) is gone drops its answer quietly; it printed
"Signal source has been deleted" from the worker thread before."""
from __future__ import annotations

import threading

import shiboken6

from desktop import job_kinds, jobs


def test_fit_finishing_after_its_receiver_is_gone(monkeypatch, qtbot):
    monkeypatch.setattr(job_kinds, "run_fit", lambda request: (None, "done"))
    channel = jobs.Channel()
    job = jobs.Job(channel, 1, "fit", {"generation": 3}, "thread", None)
    bridge = jobs._Bridge()
    task = jobs._Task(job, bridge, threading.Event(), 50.0)
    shiboken6.delete(bridge)  # what closing the window does to the channel's children
    task.run()  # raised RuntimeError: Signal source has been deleted
