"""Window layout and view defaults: the points table fits beside the plot, a sample set
opens with the axes it is meant to be seen on, a log axis says which points it cannot
draw, and the estimates view rebuilds its cells once per new result.

The width requirement (all columns from x to reason visible without scrolling at
1400-1500 px) is the project's own; the log-axis rule (values <= 0 have no logarithm)
is common practice.
"""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtGui import QGuiApplication

from desktop import dialogs
from desktop.commands import MaskCommand
from desktop.document import Measurements, Settings
from desktop.points_model import COL, COLUMNS

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


def settle(win):
    assert win.runner.wait()
    for _ in range(3):
        QGuiApplication.processEvents()


@pytest.mark.parametrize("width", [1400, 1480])
def test_points_table_shows_every_column_without_scrolling(make_win, width):
    win = make_win(width)
    assert win.open_path(str(dialogs.SAMPLE_DIR / "02_tracer_decay.csv"))
    settle(win)
    header = win.table.horizontalHeader()
    assert header.length() <= win.table.viewport().width()
    assert not win.table.horizontalScrollBar().isVisible()
    # every column keeps room for its header text (none squeezed to nothing)
    fm = header.fontMetrics()
    for c in range(win.proxy.columnCount()):
        text = str(win.proxy.headerData(c, Qt.Horizontal))
        assert header.sectionSize(c) >= min(fm.horizontalAdvance(text), 60), text
    # the plot keeps most of the height and more width than the table needs to fit
    assert win.centre.sizes()[0] > win.centre.sizes()[1]


def test_dose_response_sample_opens_on_a_log_x_axis_and_the_next_sample_does_not(make_win):
    win = make_win()
    assert win.open_path(str(dialogs.SAMPLE_DIR / "05_dose_response.ods"))
    settle(win)
    assert win.logx_action.isChecked() and win.plot.log_x
    m = win.document.measurements
    assert np.all(m.x > 0)  # every dose can be drawn: nothing to warn about
    assert win.log_axis_note() == ""
    assert win.open_path(str(dialogs.SAMPLE_DIR / "02_tracer_decay.csv"))
    settle(win)
    assert not win.logx_action.isChecked() and not win.plot.log_x


def test_log_axis_names_the_points_it_cannot_draw(make_win):
    win = make_win()
    # invented demo data: a blank (dose 0) and a negative reading
    x = np.array([0.0, 0.0, 1.0, 3.0, 10.0, 30.0, 100.0])
    y = np.array([-0.2, 0.1, 1.0, 2.9, 9.8, 30.5, 99.0])
    win.load_measurements(Measurements(x, y, x_name="Dose", y_name="Signal"), Settings(model="line"))
    settle(win)
    win.logx_action.setChecked(True)
    note = win.log_axis_note()
    # no file rows (measurements not read from a file): named by their place in the data
    assert "2 points with x <= 0" in note and "point 1, point 2" in note and "still fitted" in note
    assert note in win.statusBar().currentMessage()
    win.logy_action.setChecked(True)
    assert "1 point with y <= 0" in win.log_axis_note() and "(point 1)" in win.log_axis_note()
    win.logx_action.setChecked(False)
    win.logy_action.setChecked(False)
    assert win.log_axis_note() == ""


def test_estimates_cells_rebuilt_once_per_result_and_only_greyed_on_exclusion(make_win):
    win = make_win()
    assert win.open_path(str(dialogs.SAMPLE_DIR / "02_tracer_decay.csv"))
    settle(win)
    view, doc = win.estimates, win.document
    first = view.table.item(0, 1)
    text = first.text()
    win.runner.enabled = False  # hold the refit back so the stale state can be seen
    win.push(MaskCommand(doc, doc.make_mask_change([3], True)))
    QGuiApplication.processEvents()
    # the exclusion kept the same cell objects, greyed, with the banner set
    assert doc.stale and view.table.item(0, 1) is first
    assert view.banner.text().startswith("Stale")
    assert first.foreground().color().name() != view.table.palette().text().color().name()
    win.runner.enabled = True
    win.runner.fit_now()
    settle(win)
    # the new result replaced the cells once, in the normal colour
    assert view.table.item(0, 1) is not first
    assert not doc.stale and view.banner.text() == ""
    assert doc.result.values[0] == pytest.approx(float(view.table.item(0, 1).text().split("(")[0]), rel=1e-3)
    assert text  # the first result was shown too


# ------------------------------------------------------------------ issue 17 item 11
# Geometry at the smallest supported window (1000 x 650) and the default size. The
# thresholds are the project's own (a table that shows its columns without scrolling, a
# plot that keeps most of its height when an analysis opens).
SIZES = [(1000, 650), (1400, 900)]
#: rows of the points table that must show (about a third of a sample set)
MIN_ROWS = {(1000, 650): 8, (1400, 900): 12}
#: width of the reason column (px)
MIN_REASON = {(1000, 650): 100, (1400, 900): 120}


def laid_out(win, rounds=6):
    for _ in range(rounds):
        QGuiApplication.processEvents()


def columns_inside(view) -> list[str]:
    """The shown columns that end beyond the view's right edge (should be none)."""
    header = view.horizontalHeader()
    model = view.model()
    out = []
    for c in range(header.count()):
        if header.isSectionHidden(c):
            continue
        left = header.sectionViewportPosition(c)
        if left < 0 or left + header.sectionSize(c) > view.viewport().width() + 1:
            out.append(str(model.headerData(c, Qt.Horizontal)))
    return out


def cells_cut(view):
    """Texts of the shown cells wider than their column (drawn elided, "cm-1..."); should
    be none."""
    header = view.horizontalHeader()
    fm = view.fontMetrics()
    pad = 2 * (view.style().pixelMetric(view.style().PixelMetric.PM_FocusFrameHMargin) + 1)
    return [view.item(r, c).text() for r in range(view.rowCount())
            for c in range(view.columnCount())
            if not header.isSectionHidden(c) and view.item(r, c) is not None
            and fm.horizontalAdvance(view.item(r, c).text()) + pad > header.sectionSize(c)]


def open_dose_response(make_win, size):
    """Sample set 05: a four-parameter model with two derived values (the most rows and
    columns among the sample sets)."""
    win = make_win(*size)
    assert win.open_path(str(dialogs.SAMPLE_DIR / "05_dose_response.ods"))
    settle(win)
    laid_out(win)
    return win


@pytest.mark.parametrize("size", SIZES)
def test_every_estimate_column_and_enough_points_rows_show(make_win, size):
    win = make_win(*size)
    # the widest estimates (long intervals and units: tracer decay) and the most rows
    # (four parameters and two derived values: dose-response), the last one stays open
    # (two-trends: the longest intervals and units; photometric: long column names,
    # no sigma column)
    # (Raman peak: the longest unit, counts/cm for the area, was cut at 1000 x 650)
    for sample in ("07_two_trends.csv", "01_photometric_calibration.csv",
                   "02_tracer_decay.csv", "06_raman_peak.txt", "05_dose_response.ods"):
        assert win.open_path(str(dialogs.SAMPLE_DIR / sample))
        settle(win)
        laid_out(win)
        est = win.estimates.table
        # the layout is a fixed point: fitting the panes again changes nothing (the std.
        # unc. column was hidden and shown on alternate calls: the hidden column's title
        # counted 0 px, so the Raman unit was cut or not by the number of calls)
        hidden = est.isColumnHidden(2)
        for _ in range(3):
            win.pane_sizer.fit()
            laid_out(win)
            assert est.isColumnHidden(2) == hidden, sample
        assert columns_inside(est) == [], sample
        assert cells_cut(est) == [], sample
        # the standard-uncertainty column (also in the estimate's parentheses) gives way
        # only when the pane is too narrow, never at the default size
        assert not (size[0] >= 1400 and est.isColumnHidden(2)), sample
        assert not est.horizontalScrollBar().isVisible(), sample
        last = est.rowCount() - 1  # every parameter and derived value without scrolling
        assert est.rowViewportPosition(last) + est.rowHeight(last) <= est.viewport().height(), sample
        table = win.table
        assert columns_inside(table) == [], sample
        reason = table.horizontalHeader().sectionSize(COL["reason"])
        # a reason can be read (was 56 px at 1400 x 900, 51 px at 1000 x 650)
        assert reason >= MIN_REASON[size], (sample, reason)
        # the sigma column only when the data have one
        assert table.isColumnHidden(COL["sigma_y"]) == (win.document.measurements.sigma is None)
    rows = table.viewport().height() / table.verticalHeader().defaultSectionSize()
    assert rows >= MIN_ROWS[size], rows


@pytest.mark.parametrize("size", SIZES)
def test_points_headers_are_not_cut_with_a_row_selected(make_win, size):
    # with Qt's highlighted sections a selected row drew every column's title in bold,
    # wider than the widths were measured for ('std. residual' was clipped to 'std.
    # residua' at 1000 x 650 once a point was clicked): the titles must fit as drawn
    from PySide6.QtCore import Qt
    from PySide6.QtGui import QFont, QFontMetrics

    win = make_win(*size)
    for sample in ("05_dose_response.ods", "06_raman_peak.txt", "02_tracer_decay.csv"):
        assert win.open_path(str(dialogs.SAMPLE_DIR / sample))
        settle(win)
        win.table.selectRow(3)
        laid_out(win)
        header = win.table.horizontalHeader()
        assert header.selectionModel().hasSelection()
        font = QFont(header.font())
        font.setBold(header.highlightSections())
        fm = QFontMetrics(font)
        margin = 2 * header.style().pixelMetric(header.style().PixelMetric.PM_HeaderMargin, None, header)
        for c in range(win.proxy.columnCount() - 1):  # (the last column takes the rest)
            if header.isSectionHidden(c):
                continue
            text = str(win.proxy.headerData(c, Qt.Horizontal))
            need = max(fm.horizontalAdvance(line) for line in text.split("\n")) + margin
            assert header.sectionSize(c) >= need, (sample, text, header.sectionSize(c), need)


@pytest.mark.parametrize("size", SIZES)
def test_comparison_opens_as_a_tab_and_keeps_the_plot(make_win, size):
    import pyqtgraph as pg

    win = open_dose_response(make_win, size)
    vb = win.plot.data_plot.vb
    before = vb.sceneBoundingRect().height()
    win.show_comparison()
    assert win.compare_view.job.wait(120000)
    settle(win)
    laid_out(win)
    # a tab under the plot (not a dock across the window)
    assert win.lower_tabs.currentWidget() is win.compare_pane and win.compare_pane.is_open
    assert not any(isinstance(d, pg.QtWidgets.QDockWidget) and d.isVisible()
                   for d in win.findChildren(pg.QtWidgets.QDockWidget))
    after = vb.sceneBoundingRect().height()
    # was squeezed to a 61 px strip by a dock; the key's two lines of curves (drawn
    # whole above the points, below) cost ~30 px of a 135 px plot at 1000 x 650
    assert after >= 0.75 * before, (before, after)
    # the curves are named in the key above the plot, not in a legend over the points
    assert not [it for it in vb.childItems() if isinstance(it, pg.LegendItem)]
    key = win.plot.data_plot.titleLabel.sceneBoundingRect()
    assert not key.intersects(vb.sceneBoundingRect())
    # the key's text as drawn (its lines, not only the label's box, which pyqtgraph fixes
    # at 30 px): inside the scene and above the points (its first line was cut at the
    # top and its last ran into the plot at 1000 x 650 with five losses)
    text = win.plot.data_plot.titleLabel.item
    drawn = text.mapRectToScene(text.boundingRect())
    assert drawn.top() >= -1, drawn
    assert drawn.bottom() <= vb.sceneBoundingRect().top() + 1, (drawn, vb.sceneBoundingRect())
    assert "least squares" in win.plot.key_text()
    # the plot's scene is not wider than its view (nothing cut at the right)
    assert win.plot.ci.geometry().width() <= win.plot.viewport().width() + 1
    # the comparison table shows every loss's column
    assert columns_inside(win.compare_view.table) == []
    # the losses button holds its text and its menu arrow ('Losses: 5 of 10' had the
    # arrow drawn over its last digit)
    btn = win.compare_view.losses_button
    style = btn.style()
    arrow = style.pixelMetric(style.PixelMetric.PM_MenuButtonIndicator, None, btn)
    assert btn.width() >= btn.fontMetrics().horizontalAdvance(btn.text()) + arrow + 8, (btn.width(), btn.text())
    # and it can go into a window of its own, and back
    own = win.compare_pane.detach()
    assert own.isVisible() and win.lower_tabs.indexOf(win.compare_pane) < 0
    win.compare_pane.attach()
    assert win.lower_tabs.currentWidget() is win.compare_pane


@pytest.mark.parametrize("size", SIZES)
def test_diagnostics_open_as_a_tab_with_every_column_in_view(make_win, size):
    win = open_dose_response(make_win, size)
    vb = win.plot.data_plot.vb
    before = vb.sceneBoundingRect().height()
    win.diag_action.setChecked(True)
    assert win.diagnostics.wait()
    settle(win)
    laid_out(win)
    assert win.lower_tabs.currentWidget() is win.diag_pane
    assert vb.sceneBoundingRect().height() >= 0.9 * before  # the plot keeps its height
    n_extra = win.proxy.columnCount() - len(COLUMNS)
    assert n_extra >= 7  # leverage, studentised residual, largest and 4 per-parameter influences
    # the diagnostics tab: row, x, y and every diagnostic column, none beyond the edge
    diag = win.diag_table
    shown = [c for c in range(win.proxy.columnCount()) if not diag.isColumnHidden(c)]
    assert shown == [COL["#"], COL["x"], COL["y"]] + list(range(len(COLUMNS), win.proxy.columnCount()))
    assert columns_inside(diag) == []
    # the points table keeps its own columns, all in view
    assert all(win.table.isColumnHidden(c) for c in range(len(COLUMNS), win.proxy.columnCount()))
    assert columns_inside(win.table) == []
    # one selection for both views
    assert diag.selectionModel() is win.table.selectionModel()
    # unticking removes the tab
    win.diag_action.setChecked(False)
    assert not win.diag_pane.is_open and win.proxy.columnCount() == len(COLUMNS)


@pytest.mark.parametrize("mode", ["leverage", "influence"])
def test_colour_bar_and_its_ticks_lie_inside_the_plot(make_win, mode):
    win = open_dose_response(make_win, (1000, 650))
    win.set_colour_mode(mode)
    assert win.diagnostics.wait()
    settle(win)
    laid_out(win)
    bar = win.diagnostics._colour_bar
    assert bar is not None
    view = win.plot.viewport().rect()
    for item in (bar, bar.axis):
        r = item.sceneBoundingRect()
        assert r.left() >= 0 and r.right() <= view.width() + 1, (mode, r, view)
        assert r.bottom() <= view.height() + 1, (mode, r, view)
    assert win.plot.ci.geometry().width() <= win.plot.viewport().width() + 1
    # plain tick numbers (no "x0.001" factor in a label)
    assert not bar.axis.autoSIPrefix
