"""Window start: ``ballast FILE`` to a fitted window, against a bare PySide6 window.

Usage::

    python bench/bench_start.py [--repeat 7] [--file sample_sets/02_tracer_decay.csv]

Fresh processes, alternating (bare, ballast, bare, ballast, ...), offscreen unless
QT_QPA_PLATFORM says otherwise, each with its own empty settings and recovery folders:

* bare: a QApplication, a QMainWindow holding one pyqtgraph PlotWidget with a few
  points, resized to 1000 x 650, shown, one processEvents round;
* ballast: ``python -m desktop FILE`` with ``BALLAST_EXIT_AFTER_FIRST_FIT=1`` (see
  desktop/app.py): the window prints a line once its first fit result is on screen.

Bytecode: all kinds use one private ``.pyc`` cache (``PYTHONPYCACHEPREFIX``), filled by an
untimed warm-up round, as an installed program has its compiled files.

Each time runs from just before the process is started to the moment its line arrives
on stdout (interpreter start and all imports included; closing is not timed). Printed:
the medians, their ratio and the goal (issue 12: <= 2x). ``--phases`` adds one
in-process run split into imports, window built, file opened and fitted, repaint.
``--also DIR`` times ``python -m desktop FILE`` from another checkout too, in the same
alternation (before/after comparisons; that checkout needs the same exit hook).
Never a pass/fail exit code: read the ratio over a few runs on a quiet machine.
"""
from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

BARE_CODE = r"""
import sys
from PySide6.QtWidgets import QApplication, QMainWindow
import pyqtgraph as pg
app = QApplication(sys.argv[:1])
w = QMainWindow()
pw = pg.PlotWidget()
pw.plot([1, 2, 3], [1, 3, 2], pen=None, symbol="o")
w.setCentralWidget(pw)
w.resize(1000, 650)
w.show()
app.processEvents()
print("bare: on screen", flush=True)
"""

PHASES_CODE = r"""
import os, sys, time
t0 = time.perf_counter()
from desktop import app as A
A.one_blas_thread()
from PySide6.QtWidgets import QApplication
qapp = QApplication(sys.argv[:1])
from desktop.main_window import MainWindow
import fitcore.io  # noqa: F401  (what the first read needs)
t1 = time.perf_counter()
from PySide6.QtCore import QSettings
tmp = sys.argv[2]
win = MainWindow(QSettings(os.path.join(tmp, "s.ini"), QSettings.IniFormat), recovery_dir=tmp)
from desktop.dialogs import ColumnDialog
win.choose_columns = lambda table: ColumnDialog(table, win).choice()  # the dialog's own choice
win.show()
qapp.processEvents()
t2 = time.perf_counter()
win.open_path(sys.argv[1])
t3 = time.perf_counter()
qapp.processEvents()
t4 = time.perf_counter()
print(f"imports + QApplication {t1 - t0:.3f} s, window built and shown {t2 - t1:.3f} s, "
      f"file opened and fitted {t3 - t2:.3f} s, repaint {t4 - t3:.3f} s "
      f"(result: {win.document.result is not None})", flush=True)
os._exit(0)
"""


def _env(tmp: str, root: Path = ROOT, pycache: str = "") -> dict:
    env = dict(os.environ)
    env.setdefault("QT_QPA_PLATFORM", "offscreen")
    env["PYTHONPATH"] = str(root)
    if pycache:
        # compiled bytecode, as an installed program has it (pip writes the .pyc files):
        # without it (PYTHONDONTWRITEBYTECODE set, or a read-only checkout) every start
        # compiles our ~150 modules again, 0.3-0.4 s that the bare window (its packages
        # installed with their .pyc) never pays; one private cache for every kind, filled
        # by the untimed warm-up round
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        env["PYTHONPYCACHEPREFIX"] = pycache
    # a fresh user: no settings, no recovery files, no recent files
    for var, sub in (("HOME", "home"), ("XDG_CONFIG_HOME", "cfg"), ("XDG_DATA_HOME", "data"),
                     ("XDG_CACHE_HOME", "cache"), ("XDG_RUNTIME_DIR", "run")):
        path = os.path.join(tmp, sub)
        os.makedirs(path, mode=0o700, exist_ok=True)
        env[var] = path
    return env


def time_to_line(args: list[str], env: dict, expect: str, timeout: float = 120.0, cwd: Path = ROOT) -> float:
    """Seconds from starting the process to its line starting with ``expect``."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(args, cwd=cwd, env=env, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                            text=True)
    try:
        for line in proc.stdout:
            if line.startswith(expect):
                t = time.perf_counter() - t0
                if "failed" in line:
                    raise RuntimeError(f"{args}: {line.strip()}")
                return t
        raise RuntimeError(f"{args} ended without {expect!r}")
    finally:
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        proc.stdout.close()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7, help="fresh processes of each kind")
    ap.add_argument("--file", default=str(ROOT / "sample_sets" / "02_tracer_decay.csv"))
    ap.add_argument("--phases", action="store_true", help="also one run split into phases")
    ap.add_argument("--also", default="", help="another checkout whose ballast is timed too")
    a = ap.parse_args(argv)
    other = Path(a.also).resolve() if a.also else None
    try:
        load = os.getloadavg()[0]
    except OSError:
        load = float("nan")
    print(f"load average before: {load:.2f}")
    bare, ours, theirs = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        pyc = os.path.join(tmp, "pycache")
        print("bytecode: one private .pyc cache for all kinds, filled by an untimed warm-up round")
        for i in range(-1, a.repeat):  # round -1: the warm-up
            run_dir = os.path.join(tmp, str(i))
            env = _env(run_dir, pycache=pyc)
            t = time_to_line([sys.executable, "-c", BARE_CODE], env, "bare:")
            if i >= 0:
                bare.append(t)
            env = dict(_env(run_dir + "b", pycache=pyc), BALLAST_EXIT_AFTER_FIRST_FIT="1")
            t = time_to_line([sys.executable, "-m", "desktop", a.file], env, "ballast: first fit")
            if i >= 0:
                ours.append(t)
            if other is not None:
                env = dict(_env(run_dir + "c", other, pycache=pyc), BALLAST_EXIT_AFTER_FIRST_FIT="1")
                t = time_to_line([sys.executable, "-m", "desktop", a.file], env, "ballast: first fit", cwd=other)
                if i >= 0:
                    theirs.append(t)
        if a.phases:
            run_dir = os.path.join(tmp, "phases")
            env = _env(run_dir, pycache=pyc)
            out = subprocess.run([sys.executable, "-c", PHASES_CODE, a.file, run_dir], cwd=ROOT, env=env,
                                 capture_output=True, text=True, timeout=60)
            print("phases (one run): " + (out.stdout.strip() or out.stderr.strip()[-500:]))
    try:
        load = os.getloadavg()[0]
    except OSError:
        load = float("nan")
    tb, to = statistics.median(bare), statistics.median(ours)
    print(f"load average after: {load:.2f}")
    print("bare window + plot  " + " ".join(f"{t:.2f}" for t in bare) + f"  median {tb:.2f} s")
    print(f"ballast {Path(a.file).name}  " + " ".join(f"{t:.2f}" for t in ours) + f"  median {to:.2f} s")
    if other is not None:
        tt = statistics.median(theirs)
        print(f"ballast from {other}  " + " ".join(f"{t:.2f}" for t in theirs) + f"  median {tt:.2f} s")
        print(f"window start of {other}: {tt:.2f} s / bare {tb:.2f} s = {tt / tb:.2f}x")
    print(f"window start: ballast {to:.2f} s / bare {tb:.2f} s = {to / tb:.2f}x (goal <= 2x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
