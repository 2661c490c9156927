"""Regenerate resources/screenshot.png and resources/report.png (the README's pictures of
the window and of the first page of its report), offscreen.

Usage::

    QT_QPA_PLATFORM=offscreen python resources/make_screenshot.py [out.png]

Opens sample set 02 (tracer decay), excludes the point far above the curve with a
reason, keeps the confidence band on, zooms the plot to the tail (at full scale the
band is narrower than the curve's line), scrolls the points table to that point and saves
a 1400 x 860 grab. Settings and recovery files go to a temporary folder.
"""
from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from PySide6.QtCore import QSettings  # noqa: E402
from PySide6.QtGui import QGuiApplication  # noqa: E402
from PySide6.QtTest import QTest  # noqa: E402
from PySide6.QtWidgets import QAbstractItemView, QApplication  # noqa: E402


def main(out: str) -> None:
    _app = QApplication.instance() or QApplication([])  # kept alive for the whole run
    from desktop import session_io
    from desktop.commands import MaskCommand
    from desktop.main_window import MainWindow

    session_io.ask_restore = lambda *a: False
    session_io.ask_unsaved = lambda *a: "discard"
    tmp = tempfile.mkdtemp(prefix="ballast-shot-")
    win = MainWindow(QSettings(str(Path(tmp) / "shot.ini"), QSettings.IniFormat),
                     recovery_dir=str(Path(tmp) / "recovery"))
    win.choose_columns = lambda table: tuple(table.numeric_columns()[:3])
    win.resize(1400, 860)
    win.show()
    QTest.qWaitForWindowExposed(win)
    assert win.open_path(str(ROOT / "sample_sets" / "02_tracer_decay.csv"))
    assert win.runner.wait()
    doc = win.document
    res = doc.result
    worst = int(np.nanargmax(np.asarray(res.std_residuals, float)))  # far above the curve
    win.push(MaskCommand(doc, doc.make_mask_change([worst], True, reason="counter glitch")))
    assert win.runner.wait()
    win.band_action.setChecked(True)
    # the band is narrower than the curve's line at full scale: show the tail, where the
    # excluded and the down-weighted points are, as an analyst checking them would zoom
    win.plot.data_plot.vb.setRange(xRange=(63, 186), yRange=(0, 2600), padding=0)
    for _ in range(5):  # let the table lay out its rows before scrolling
        QGuiApplication.processEvents()
    row = win.proxy.mapFromSource(win.points_model.index(worst, 0))
    win.table.scrollTo(row, QAbstractItemView.PositionAtCenter)
    for _ in range(5):
        QGuiApplication.processEvents()
    img = win.grab()
    assert img.save(out)
    print(f"{out}: {img.width()}x{img.height()}, {os.path.getsize(out) // 1024} KB, point {worst + 1} excluded")
    report_out = str(Path(out).with_name("report.png"))
    save_report_page(win, report_out)
    print(f"{report_out}: first page of the report (as the PDF lays it out)")
    win.sessions.dirty = False
    win.close()


def save_report_page(win, out: str, page: int = 0) -> None:
    """One page of the report as the PDF lays it out (desktop.report_export.print_paged),
    painted into an image: the README's picture of the filed record."""
    from PySide6.QtCore import QSizeF
    from PySide6.QtGui import QImage, QPainter

    from desktop.report_export import PDF_LAYOUT_WIDTH, paint_page

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
    main(sys.argv[1] if len(sys.argv) > 1 else str(ROOT / "resources" / "screenshot.png"))
