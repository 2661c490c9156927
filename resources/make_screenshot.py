"""Regenerate the README's pictures, offscreen:

* ``resources/window-1000x650.png`` and ``resources/window-1400x900.png``: the main window
  at the smallest supported size and at the default size;
* ``resources/report.png``: the first page of the report written from that window, as
  the PDF lays it out.

Usage::

    QT_QPA_PLATFORM=offscreen python resources/make_screenshot.py [output folder]

Each window opens sample set 02 (tracer decay, Huber loss; by its path relative to the
project, so the report names it the same everywhere) with settings and recovery files in
a temporary folder, excludes the point farthest above the curve with the reason
"counter glitch", zooms the plot to the tail (at full scale the band is narrower than
the curve's line), scrolls the points table to that point and grabs the window. Nothing
depends on timing (the fit is waited for, no analysis with a stopwatch runs, the status
bar is cleared, the report's time of writing is fixed) and the same inputs give the same
pictures; the whole run takes a few seconds.
"""
from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from PySide6.QtCore import QSettings  # noqa: E402
from PySide6.QtGui import QGuiApplication  # noqa: E402
from PySide6.QtTest import QTest  # noqa: E402
from PySide6.QtWidgets import QAbstractItemView, QApplication  # noqa: E402

#: opened by its path relative to the project (the report prints the path it was given:
#: the same on every machine)
SAMPLE = Path("sample_sets") / "02_tracer_decay.csv"
#: the time of writing the report prints (a fixed one: the same picture on every run)
WRITTEN = "2026-01-15T10:00:00+01:00"
SIZES = ((1000, 650), (1400, 900))
REASON = "counter glitch"
#: the tail of the decay, where the excluded and the down-weighted points are
TAIL = dict(xRange=(63, 186), yRange=(0, 2600))


def settle(win, timeout: float = 60.0) -> None:
    """Process events until the data are read and their fit is on screen (whether the
    window reads and fits in the background or not)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        QGuiApplication.processEvents()
        doc = win.document
        if doc.has_data and doc.result is not None and not doc.stale and win.runner.wait():
            break
        time.sleep(0.01)
    else:
        raise RuntimeError("the fit did not arrive")
    for _ in range(6):  # let the tables and the plot lay out
        QGuiApplication.processEvents()


def make_window(size, tmp: str):
    from desktop import dialogs, session_io
    from desktop.commands import MaskCommand
    from desktop.main_window import MainWindow

    session_io.ask_restore = lambda *a: False
    session_io.ask_unsaved = lambda *a: "discard"
    dialogs.ask_text = lambda *a: REASON  # the reason the exclusion asks for
    name = f"{size[0]}x{size[1]}"
    win = MainWindow(QSettings(str(Path(tmp) / f"{name}.ini"), QSettings.IniFormat),
                     recovery_dir=str(Path(tmp) / f"recovery-{name}"))
    win.choose_columns = lambda table: tuple(table.numeric_columns()[:3])
    win.resize(*size)
    win.show()
    QTest.qWaitForWindowExposed(win)
    win.open_path(str(SAMPLE))
    settle(win)
    doc = win.document
    worst = int(np.nanargmax(np.asarray(doc.result.std_residuals, float)))  # far above the curve
    win.push(MaskCommand(doc, doc.make_mask_change([worst], True, reason=REASON)))
    settle(win)
    win.band_action.setChecked(True)
    win.plot.data_plot.vb.setRange(padding=0, **TAIL)
    win.statusBar().clearMessage()  # (its text depends on the order of events)
    row = win.proxy.mapFromSource(win.points_model.index(worst, 0))
    win.table.selectionModel().clearSelection()
    win.table.scrollTo(row, QAbstractItemView.PositionAtCenter)
    for _ in range(6):
        QGuiApplication.processEvents()
    return win, worst


def main(folder: str) -> None:
    _app = QApplication.instance() or QApplication([])  # kept alive for the whole run
    out = Path(folder).resolve()
    os.chdir(ROOT)
    tmp = tempfile.mkdtemp(prefix="ballast-shot-")
    win = None
    for size in SIZES:
        if win is not None:
            win.sessions.dirty = False
            win.close()
        win, worst = make_window(size, tmp)
        path = out / f"window-{size[0]}x{size[1]}.png"
        img = win.grab()
        assert img.save(str(path))
        print(f"{path}: {img.width()}x{img.height()}, {path.stat().st_size // 1024} KB, "
              f"point {worst + 1} excluded")
    report = out / "report.png"
    save_report_page(win, str(report))
    print(f"{report}: first page of the report (as the PDF lays it out)")
    win.sessions.dirty = False
    win.close()


def save_report_page(win, out: str, page: int = 0) -> None:
    """One page of the report as the PDF lays it out (desktop.report_export.print_paged),
    painted into an image: the README's picture of the filed record."""
    from PySide6.QtCore import QSizeF
    from PySide6.QtGui import QImage, QPainter

    import fitcore.report_html
    from desktop.report_export import PDF_LAYOUT_WIDTH, paint_page

    fitcore.report_html.written_now = lambda: WRITTEN
    win.reports.set_signoff(analyst="A. Analyst", reviewer="", review_date="")
    tdoc = win.reports.text_document()
    h = PDF_LAYOUT_WIDTH * 297 / 210
    tdoc.setPageSize(QSizeF(PDF_LAYOUT_WIDTH, h))
    img = QImage(PDF_LAYOUT_WIDTH, int(h), QImage.Format_RGB32)
    img.fill(0xFFFFFF)
    p = QPainter(img)
    p.setRenderHint(QPainter.Antialiasing, True)
    paint_page(p, tdoc, page, h)
    p.end()
    assert img.save(out)


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else str(ROOT / "resources"))
