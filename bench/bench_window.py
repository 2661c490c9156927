"""Time click-to-exclude -> refit -> redraw in the real window, offscreen.

Usage::

    QT_QPA_PLATFORM=offscreen python bench/bench_window.py [--sizes 1000 10000 100000] [--reps 15]

For each size an invented straight line with 5 % gross outliers is loaded with the
Huber loss (a robust line). Each repetition clicks one point through the plot's
viewport (a real mouse event), waits for the fit result to reach the document and
repaints the plot and the points table synchronously. Printed per size: the median
and the maximum of that time, the median time of fitcore.fit alone ("fit ms"), the
median of the rest ("window ms": event handling, table, plot and estimates update,
repaint), and the longest gap between two ticks of a 5 ms timer
while it ran (how long the window went without processing events).
Targets (issue 4): median <= 30 ms at 1e3, <= 100 ms at 1e4, <= 300 ms at 1e5, and
events processed at least every 100 ms.

A second table (``--drag``, on by default) times a box drag in box mode: the mouse
moves in 24 steps 16 ms apart (about 60 Hz) across a band of points and is
released; printed are the fits made during the drag, the time from the release to
the final result being on screen, and the longest event gap from the press to then.
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np
from PySide6.QtCore import QEventLoop, QPoint, QSettings, Qt, QTimer
from PySide6.QtTest import QTest
from PySide6.QtWidgets import QApplication


def demo_line(n: int, seed: int = 7):
    """Invented demo data: y = 2 + 0.5 x + noise, 5 % of the points shifted far off."""
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(0, 100, n))
    y = 2.0 + 0.5 * x + rng.normal(0, 1.0, n)
    bad = rng.choice(n, n // 20, replace=False)
    y[bad] += rng.choice([-1, 1], bad.size) * rng.uniform(8, 30, bad.size)
    return x, y


class GapMeter:
    """Longest interval between ticks of a fast timer (event-loop responsiveness)."""

    def __init__(self, interval_ms: int = 5):
        self.timer = QTimer()
        self.timer.setInterval(interval_ms)
        self.timer.timeout.connect(self._tick)
        self.last = None
        self.max_gap = 0.0

    def _tick(self):
        now = time.perf_counter()
        if self.last is not None:
            self.max_gap = max(self.max_gap, now - self.last)
        self.last = now

    def start(self):
        self.last = time.perf_counter()
        self.timer.start()

    def stop(self):
        self._tick()
        self.timer.stop()


TARGETS_MS = {1000: 30.0, 10000: 100.0, 100000: 300.0}  # issue 4, by size
MAX_GAP_MS = 100.0


def target_for(n: int) -> float:
    """The issue's median target for ``n`` points (the next size up for sizes between)."""
    for size in sorted(TARGETS_MS):
        if n <= size:
            return TARGETS_MS[size]
    return TARGETS_MS[max(TARGETS_MS)]


def drag(win, app, n, steps: int = 24, step_ms: int = 16):
    """One box drag across the middle of the plot; returns (fits, release->result s, max gap s)."""
    doc, runner, plot = win.document, win.runner, win.plot
    vp = plot.viewport()
    vb = plot.vb_data
    (x0, x1), (y0, y1) = vb.viewRange()
    a = plot.mapFromScene(vb.mapViewToScene(pg_point(x0 + 0.35 * (x1 - x0), y0 + 0.95 * (y1 - y0))))
    b = plot.mapFromScene(vb.mapViewToScene(pg_point(x0 + 0.45 * (x1 - x0), y0 + 0.05 * (y1 - y0))))
    win.box_action.setChecked(True)
    fits = []

    def count():
        fits.append(1)

    runner.finished.connect(count)
    meter = GapMeter()
    meter.start()
    QTest.mousePress(vp, Qt.LeftButton, Qt.NoModifier, QPoint(int(a.x()), int(a.y())))
    for k in range(1, steps + 1):
        f = k / steps
        QTest.mouseMove(vp, QPoint(int(a.x() + f * (b.x() - a.x())), int(a.y() + f * (b.y() - a.y()))))
        QTest.qWait(step_ms)
    QTest.mouseMove(vp, QPoint(int(b.x()), int(b.y())))
    t0 = time.perf_counter()
    QTest.mouseRelease(vp, Qt.LeftButton, Qt.NoModifier, QPoint(int(b.x()), int(b.y())))
    loop = QEventLoop()
    runner.finished.connect(loop.quit)
    while (doc.result_generation != doc.generation or runner.busy) and not doc.fit_failed:
        QTimer.singleShot(5, loop.quit)
        loop.exec()
    plot.viewport().repaint()
    win.table.viewport().repaint()
    win.estimates.repaint()
    settle = time.perf_counter() - t0
    meter.stop()
    runner.finished.disconnect(count)
    runner.finished.disconnect(loop.quit)
    win.box_action.setChecked(False)
    excluded = int(doc.excluded.sum())
    win.undo_stack.undo()
    runner.wait()
    return len(fits), settle, meter.max_gap, excluded


def pg_point(x, y):
    from PySide6.QtCore import QPointF

    return QPointF(x, y)


def run(sizes, reps: int, with_drag: bool = True):
    app = QApplication.instance() or QApplication([])
    from desktop.document import Measurements, Settings
    from desktop.main_window import MainWindow

    settings = QSettings(str(Path(os.environ.get("TMPDIR", "/tmp")) / "ballast-bench.ini"), QSettings.IniFormat)
    win = MainWindow(settings)
    win.resize(1480, 900)
    win.show()
    QTest.qWaitForWindowExposed(win)
    doc, runner, plot = win.document, win.runner, win.plot
    print(f"{'n':>8} {'median ms':>10} {'max ms':>8} {'fit ms':>8} {'window ms':>10} "
          f"{'max event gap ms':>17} {'fit path':>9} {'target':>7}")
    rows = []
    drags = []
    for n in sizes:
        x, y = demo_line(n)
        win.load_measurements(Measurements(x, y, x_name="Load", x_unit="N", y_name="Extension", y_unit="um"),
                              Settings(model="line", loss="huber"))
        runner.wait()
        plot.data_plot.vb.autoRange(padding=0.02)
        for _ in range(3):
            app.processEvents()
        rng = np.random.default_rng(n)
        times, fits = [], []
        meter = GapMeter()
        meter.start()
        for _ in range(reps):
            i = int(rng.integers(n))
            vp = plot.mapFromScene(plot.point_scene_pos(i))
            loop = QEventLoop()
            runner.finished.connect(loop.quit)
            t0 = time.perf_counter()
            QTest.mouseClick(plot.viewport(), Qt.LeftButton, Qt.NoModifier, QPoint(vp.x(), vp.y()))
            while doc.result_generation != doc.generation and not doc.fit_failed:
                loop.exec()
            plot.viewport().repaint()
            win.table.viewport().repaint()
            win.estimates.repaint()
            times.append(time.perf_counter() - t0)
            fits.append(runner.last_seconds)
            runner.finished.disconnect(loop.quit)
            app.processEvents()
        meter.stop()
        threaded = n > runner.thread_threshold or runner.last_seconds > runner.slow_fit_s
        med = statistics.median(times) * 1e3
        rows.append((n, med, max(times) * 1e3, meter.max_gap * 1e3))
        fit_med = statistics.median(fits) * 1e3
        own = statistics.median(np.subtract(times, fits)) * 1e3
        print(f"{n:>8} {med:>10.1f} {max(times) * 1e3:>8.1f} {fit_med:>8.1f} {own:>10.1f} "
              f"{meter.max_gap * 1e3:>17.1f} "
              f"{'worker' if threaded else 'inline':>9} "
              f"{'met' if med <= target_for(n) and meter.max_gap * 1e3 <= MAX_GAP_MS else 'MISSED':>7}"
              f"   ({int(doc.excluded.sum())} excluded, last fit {runner.last_seconds * 1e3:.1f} ms)")
        if with_drag:
            drags.append((n,) + drag(win, app, n))
    if drags:
        print(f"\n{'n':>8} {'drag fits':>10} {'release->result ms':>19} {'max event gap ms':>17} "
              f"{'excluded':>9} {'target':>7}")
        for n, nfits, settle, gap, excl in drags:
            print(f"{n:>8} {nfits:>10} {settle * 1e3:>19.1f} {gap * 1e3:>17.1f} {excl:>9} "
                  f"{'met' if gap * 1e3 <= MAX_GAP_MS else 'MISSED':>7}")
    win.close()
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[1000, 10000, 100000])
    ap.add_argument("--reps", type=int, default=15)
    ap.add_argument("--no-drag", action="store_true", help="skip the box-drag table")
    args = ap.parse_args(argv)
    run(args.sizes, args.reps, with_drag=not args.no_drag)


if __name__ == "__main__":
    main()
