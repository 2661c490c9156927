"""The child process that runs the window's background jobs (started by
:mod:`desktop.job_kinds`, which owns the pool), kept light: ``ballast`` starts the first
child with :func:`start_early` before it imports numpy, fitcore or Qt, so the child's
own imports (about a second) run beside the window's on the second core and the first
file's jobs find it ready (issue 12, window start).
"""
from __future__ import annotations

import os
import queue
import subprocess
import sys
import threading

_early: list = []


class Child:
    """One child process and the thread that reads its answers."""

    def __init__(self):
        env = dict(os.environ)
        env.setdefault("OPENBLAS_NUM_THREADS", "1")
        env.pop("QT_QPA_PLATFORM", None)
        root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
        env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        self.proc = subprocess.Popen([sys.executable, "-m", "desktop.job_kinds"], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, env=env, cwd=root,
                                     text=True, encoding="utf-8", bufsize=1)
        self.lines: queue.Queue = queue.Queue()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self):
        try:
            for line in self.proc.stdout:
                self.lines.put(line)
        except (OSError, ValueError):
            pass  # the pipe closed under us: the child was ended
        self.lines.put(None)

    def alive(self) -> bool:
        return self.proc.poll() is None

    def end(self):
        if self.proc.poll() is None:
            self.proc.kill()
        try:
            self.proc.wait(5)
        except subprocess.TimeoutExpired:
            pass  # a zombie the OS reaps with this process
        self.reader.join(1.0)
        for f in (self.proc.stdin, self.proc.stdout):
            try:
                f.close()
            except OSError:
                pass


def start_early() -> None:
    """Start one child now; :mod:`desktop.job_kinds` takes it into its idle pool."""
    if _early:
        return
    try:
        _early.append(Child())
    except OSError:
        pass  # jobs start their own child (or run in a thread) later


def take_early() -> list:
    """The child :func:`start_early` started (at most one), handed over once."""
    out = [c for c in _early if c.alive()]
    for c in _early:
        if not c.alive():
            c.end()
    _early.clear()
    return out
