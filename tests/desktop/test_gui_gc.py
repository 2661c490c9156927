"""desktop.gui_gc: in the window's process Python's cyclic garbage collector runs on the
GUI thread only (from a timer, with Python's own thresholds), never in a job's worker
thread, and not while a worker runs Python code. A collection in a worker ran a Qt
destructor there and deadlocked the window (gdb stacks, the team's startup note); one in
the GUI thread while a job thread imported crashed it (faulthandler, the segv note).
Common practice for Qt programs in Python (a GUI-thread timer calling gc.collect with
automatic collection off); CPython's gc module documentation for counts and thresholds.
"""
from __future__ import annotations

import gc
import threading

import pytest

from desktop import gui_gc, job_kinds
from desktop.jobs import Channel


def _cycles(n):
    for _ in range(n):
        a = []
        a.append(a)  # garbage only the cyclic collector frees


@pytest.fixture
def collections_seen():
    seen = []

    def note(phase, info):
        if phase == "start":
            seen.append((threading.get_ident(), info["generation"]))

    gc.callbacks.append(note)
    yield seen
    gc.callbacks.remove(note)


def test_a_job_allocating_cycles_on_its_worker_is_collected_on_the_gui_thread(
        qtbot, open_window, monkeypatch, collections_seen):
    w = open_window()
    assert not gc.isenabled() and gui_gc.installed() is not None

    def make_cycles(payload, progress, cancel):
        _cycles(200_000)  # ~285 times the generation-0 threshold of 700
        return threading.get_ident()

    monkeypatch.setitem(job_kinds.KINDS, "relia_cycles", job_kinds.Kind(run=make_cycles))
    channel = Channel(w)
    job = channel.submit("relia_cycles", {}, where="thread")
    assert job.wait(120_000) and job.state == "finished", job.message
    worker = job.result
    gui = threading.get_ident()
    assert worker != gui
    assert not [g for t, g in collections_seen if t == worker], "a collection ran on the worker thread"
    # the garbage is collected by the window's timer, on this thread (memory stays bounded)
    qtbot.waitUntil(lambda: gc.get_count()[0] <= gc.get_threshold()[0], timeout=60_000)
    assert collections_seen and {t for t, _ in collections_seen} == {gui}, collections_seen


def test_the_collection_waits_while_a_worker_runs_python(qtbot, open_window, monkeypatch, collections_seen):
    open_window()
    monkeypatch.setattr(gui_gc, "MAX_DEFER_S", 1e9)  # no wall-clock bound in this test
    col = gui_gc.installed()
    release, started = threading.Event(), threading.Event()

    def work():
        with gui_gc.worker():
            _cycles(5_000)
            started.set()
            release.wait(120)

    t = threading.Thread(target=work, daemon=True)
    t.start()
    assert started.wait(60)
    deferred = col.deferred
    qtbot.waitUntil(lambda: col.deferred >= deferred + 3, timeout=60_000)  # three ticks found it due
    assert collections_seen == [] and gc.get_count()[0] > gc.get_threshold()[0]
    release.set()
    t.join(60)
    qtbot.waitUntil(lambda: bool(collections_seen), timeout=60_000)
    assert {tid for tid, _ in collections_seen} == {threading.get_ident()}


def test_generations_as_cpython_would_collect_them(qtbot, open_window, monkeypatch):
    # CPython (Modules/gcmodule.c, collect_generations): once generation 0 passes its
    # threshold, the oldest generation whose count passed its own is collected
    open_window()
    col = gui_gc.installed()
    counts = {"c": (0, 0, 0)}
    monkeypatch.setattr(gui_gc.gc, "get_count", lambda: counts["c"])
    monkeypatch.setattr(col, "thresholds", (700, 10, 10))
    for c, gen in [((700, 10, 10), -1), ((701, 0, 0), 0), ((701, 10, 3), 0), ((701, 11, 3), 1),
                   ((701, 11, 11), 2), ((701, 0, 11), 2)]:
        counts["c"] = c
        assert col.due() == gen, c
