"""The logic behind the window's speed work (no timings here: bench/bench_window.py times).

* the points item's paint cache and its one-fragment-per-pixel drawing above
  ``DEDUP_MIN`` points give the same picture as drawing every point;
* the paint order puts excluded and selected points on top;
* the fit runner answers the first change at once, folds a burst of changes into
  one trailing fit of the newest inputs, and restores the thread switch interval
  after worker fits;
* the grid item draws its lines at the axes' own tick values.

All data are invented for these checks.
"""
from __future__ import annotations

import sys

import numpy as np
import pyqtgraph as pg
import pytest
from PySide6.QtCore import QRectF, Qt
from PySide6.QtGui import QImage, QPainter
from PySide6.QtWidgets import QGraphicsScene

import fitcore
from desktop.document import Document, Measurements, Settings
from desktop.plot_view import EXCLUDED, N_LEVELS, USED, GridItem, PointsItem, weight_levels
from desktop.fit_runner import FitRunner

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


def render(item: PointsItem, w=240, h=160) -> np.ndarray:
    """Paint one points item (plot coordinates 0..1 mapped onto the image) to an RGB array."""
    scene = QGraphicsScene()
    scene.addItem(item)
    item.setTransform(pg.QtGui.QTransform.fromScale(w, h))
    img = QImage(w, h, QImage.Format_ARGB32_Premultiplied)
    img.fill(Qt.white)
    p = QPainter(img)
    scene.render(p, QRectF(0, 0, w, h), QRectF(0, 0, w, h))
    p.end()
    scene.removeItem(item)
    ptr = img.constBits()
    a = np.frombuffer(ptr, np.uint8, img.sizeInBytes()).reshape(h, img.bytesPerLine() // 4, 4)
    return a[:, :w, :3].astype(int).copy()


def dense_item(n=20000, seed=5):
    """Invented dense cloud: many points share a pixel; a few styles and sizes."""
    rng = np.random.default_rng(seed)
    item = PointsItem()
    x = np.clip(rng.normal(0.5, 0.15, n), 0, 1)
    y = np.clip(0.5 + 0.4 * (x - 0.5) + rng.normal(0, 0.05, n), 0, 1)
    # snap to the pixel grid so both drawing paths place each symbol identically
    x = (np.rint(x * 240) + 0.0) / 240
    y = (np.rint(y * 160) + 0.0) / 160
    item.set_points(x, y)
    w = np.where(rng.uniform(0, 1, n) < 0.8, 1.0, rng.uniform(0, 1, n))  # most count fully
    style = np.where(w < 0.5, 1, 0).astype(np.int8)
    style[rng.choice(n, 30, replace=False)] = EXCLUDED
    sel = np.zeros(n, bool)
    sel[:3] = True
    item.set_style(weight_levels(w), style, sel)
    return item


def test_one_fragment_per_pixel_draws_the_same_picture(qapp):
    item = dense_item()
    fast = render(item)
    n_fast = item._n_frags
    item.DEDUP_MIN = 10**9  # every point drawn
    every = render(item)
    n_every = item._n_frags
    assert n_every == 20000
    assert n_fast < n_every / 2  # many points shared a pixel and a symbol
    # same symbols at the same pixels: any difference comes from the order of
    # equal-class symbols and from antialiased rims counted once instead of many times
    diff = np.abs(fast - every).max(axis=2)
    assert (diff > 60).mean() < 0.02
    assert np.abs(fast - every).mean() < 3.0
    # and the picture is not blank
    assert (every.sum(axis=2) < 600).mean() > 0.05


def test_repaint_without_changes_reuses_the_fragment_list(qapp):
    item = dense_item(5000)
    render(item)
    key = item._frag_key
    render(item)
    assert item._frag_key is key  # nothing rebuilt
    style = item.style.copy()
    style[10] = EXCLUDED
    item.set_style(style=style)
    render(item)
    assert item._frag_key is not key
    # setting identical arrays is not a change
    key = item._frag_key
    item.set_style(level=item.level.copy(), style=item.style.copy(), selected=item.selected.copy())
    render(item)
    assert item._frag_key is key


@pytest.mark.parametrize("dedup", [True, False])
def test_excluded_and_selected_are_painted_last(qapp, dedup):
    item = PointsItem()
    if not dedup:
        item.DEDUP_MIN = 10**9
    else:
        item.DEDUP_MIN = 0
    n = 6
    # all on one device pixel (the spread only gives the item a non-empty extent)
    item.set_points(0.5 + 1e-4 * np.arange(n), 0.5 + 1e-4 * np.arange(n))
    item.set_style(np.array([N_LEVELS - 1, 2, N_LEVELS - 1, 5, 0, 7]),
                   np.array([EXCLUDED, USED, 1, USED, USED, USED], np.int8),
                   np.array([0, 0, 0, 0, 0, 1], bool))
    render(item)
    fr = item._frags.ndarray()[: item._n_frags]
    rows = (fr[:, 3] / (item._cell * 1.0)).round().astype(int)  # atlas row = style + 3 * selected
    cols = (fr[:, 2] / (item._cell * 1.0)).round().astype(int)  # atlas column = size level
    assert rows.tolist() == [0, 0, 0, 1, 2, 3]
    # within the used style, larger symbols first so the small ones stay visible
    assert cols[:3].tolist() == [5, 2, 0]


def test_nearest_and_inside_skip_points_not_drawn(qapp):
    item = PointsItem()
    item.set_points(np.array([0.1, np.nan, 0.3]), np.array([0.1, 0.2, 0.3]))
    assert item.inside(QRectF(0, 0, 1, 1)).tolist() == [0, 2]
    assert item.dataBounds(0) == pytest.approx((0.1, 0.3))


# ---------------------------------------------------------------------------- runner
def demo_doc(n=60, seed=2):
    """Invented line with two gross outliers."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, n)
    y = 1.0 + 2.0 * x + rng.normal(0, 0.1, n)
    y[[7, 30]] += 5.0
    return Document(Measurements(x, y), Settings(model="line", loss="huber"))


def test_first_change_fits_at_once_and_a_burst_fits_once_with_the_newest_inputs(qtbot):
    doc = demo_doc()
    runner = FitRunner(doc, debounce_ms=200, slow_fit_s=60.0)  # inline fits only
    runner.fit_now()
    assert doc.result_generation == doc.generation
    runner._last_request = -float("inf")  # a quiet spell
    runner._last_end = -float("inf")
    fits = []
    runner.finished.connect(lambda: fits.append(doc.result_generation))
    doc.apply_mask_change(doc.make_mask_change([3], True))
    assert fits == [doc.generation]  # answered inline, at once
    # a burst right after: nothing fitted until the gap has passed, then one fit
    for i in (4, 5, 6, 7):
        doc.apply_mask_change(doc.make_mask_change([i], True))
    assert len(fits) == 1 and doc.stale
    qtbot.waitUntil(lambda: len(fits) == 2, timeout=3000)
    assert fits[-1] == doc.generation and not doc.stale
    expected = fitcore.fit("line", doc.measurements.x, doc.measurements.y, loss="huber",
                           excluded=doc.excluded.copy())
    np.testing.assert_allclose(doc.result.values, expected.values, rtol=1e-12)


def test_worker_fits_restore_the_switch_interval(qtbot):
    doc = demo_doc()
    before = sys.getswitchinterval()
    runner = FitRunner(doc, thread_threshold=0)
    seen = []
    runner.busy_changed.connect(lambda b: seen.append((b, sys.getswitchinterval())))
    runner.fit_now()
    assert runner.wait()
    assert seen[0][0] is True and seen[0][1] <= FitRunner.SWITCH_INTERVAL_S + 1e-12
    assert seen[-1][0] is False
    assert sys.getswitchinterval() == pytest.approx(before)
    assert doc.result is not None and doc.result_generation == doc.generation


# ---------------------------------------------------------------------------- grid
@pytest.mark.parametrize("log_x", [False, True])
def test_grid_lines_sit_at_the_axis_ticks(qtbot, log_x):
    w = pg.GraphicsLayoutWidget()
    qtbot.addWidget(w)
    w.resize(400, 300)
    plot = w.addPlot()
    grid = GridItem(plot)
    plot.addItem(grid, ignoreBounds=True)
    plot.setLogMode(log_x, False)
    plot.setXRange(0, 2 if log_x else 100, padding=0)
    plot.setYRange(0, 10, padding=0)
    w.show()
    qtbot.waitExposed(w)
    img = QImage(400, 300, QImage.Format_ARGB32_Premultiplied)
    img.fill(Qt.white)
    tr = grid.sceneTransform() * w.viewportTransform()  # view coordinates -> pixels
    p = QPainter(img)
    p.setTransform(tr)
    grid.paint(p, None, None)
    p.end()
    arr = np.frombuffer(img.constBits(), np.uint8, img.sizeInBytes()).reshape(
        300, img.bytesPerLine() // 4, 4)[:, :400, :3]
    vb = plot.vb
    ticks_x = plot.getAxis("bottom").tickValues(*vb.viewRange()[0], 300)[0][1]
    drawn = []
    for v in ticks_x:
        px = tr.map(pg.QtCore.QPointF(v, 5.0))
        col = int(np.floor(px.x()))
        if 2 < col < 397:
            # a major grid line: darker than the white background at the tick
            assert arr[int(px.y()), col - 1:col + 2].min() < 250
            drawn.append(v)
    assert drawn


# ---------------------------------------------------------------------------- selection sync
@pytest.mark.parametrize("sort_column", [None, 2])
def test_plot_selection_selects_the_same_points_in_the_table(qtbot, settings_file, sort_column):
    from PySide6.QtCore import QSettings

    from desktop.main_window import MainWindow

    win = MainWindow(QSettings(settings_file, QSettings.IniFormat))
    qtbot.addWidget(win)
    doc = demo_doc(40)
    win.load_measurements(doc.measurements, doc.settings)
    assert win.runner.wait()
    if sort_column is not None:
        win.table.sortByColumn(sort_column, Qt.DescendingOrder)
    chosen = [0, 1, 2, 3, 10, 11, 25, 39]  # runs and single points
    win.document.set_selection(chosen, origin="plot")
    assert win.selected_points().tolist() == chosen
    win.document.set_selection([], origin="plot")
    assert win.selected_points().tolist() == []


# ---------------------------------------------------------------------------- band
@pytest.mark.parametrize("log_y", [False, True])
def test_confidence_band_is_drawn_from_the_result(qtbot, settings_file, log_y):
    """The band shown is FitResult.band on the curve's grid (log y: its log10)."""
    from PySide6.QtCore import QSettings

    from desktop.main_window import MainWindow

    win = MainWindow(QSettings(settings_file, QSettings.IniFormat))
    qtbot.addWidget(win)
    doc = demo_doc(40)
    win.load_measurements(doc.measurements, doc.settings)
    assert win.runner.wait()
    win.plot.set_log(log_y=log_y)
    band = win.plot.band
    bx, blo, bhi = band.x, band.lo, band.hi
    assert band.path().elementCount() == 2 * len(bx) + 1  # the polygon, closed
    assert bx is not None and len(bx) > 100
    lo, hi = win.document.result.band(bx)
    if log_y:
        lo, hi = np.log10(lo), np.log10(hi)
    np.testing.assert_allclose(blo, lo, rtol=1e-12)
    np.testing.assert_allclose(bhi, hi, rtol=1e-12)
    assert np.all(bhi > blo)
    win.band_action.setChecked(False)
    assert not win.plot.band.isVisible()


# ---------------------------------------------------------------------------- residual range
def test_residual_range_holds_still_until_residuals_leave_it(qtbot, settings_file):
    from PySide6.QtCore import QSettings

    from desktop.commands import MaskCommand
    from desktop.main_window import MainWindow

    win = MainWindow(QSettings(settings_file, QSettings.IniFormat))
    qtbot.addWidget(win)
    doc = demo_doc(40)
    win.load_measurements(doc.measurements, doc.settings)
    assert win.runner.wait()
    doc = win.document
    win.plot.set_residuals_standardised(False)  # the range logic on raw residuals
    vb = win.plot.vb_resid
    r = doc.result.residuals
    y0, y1 = vb.viewRange()[1]
    assert y0 < r.min() and r.max() < y1
    # excluding an ordinary point moves every residual a little: the range stays
    win.push(MaskCommand(doc, doc.make_mask_change([20], True)))
    assert win.runner.wait()
    assert doc.result_generation == doc.generation
    assert vb.viewRange()[1] == pytest.approx([y0, y1])
    # a range the residuals leave, or use under 60 % of, is renewed at the next refit
    r = doc.result.residuals
    for a, b in ((r.min() / 2, r.max() / 2), (r.min() - 10 * np.ptp(r), r.max() + 10 * np.ptp(r))):
        vb.setYRange(a, b, padding=0)
        win.undo_stack.undo() if doc.excluded.any() else win.undo_stack.redo()
        assert win.runner.wait()
        r = doc.result.residuals
        z0, z1 = vb.viewRange()[1]
        assert z0 < r.min() and r.max() < z1
        assert np.ptp(r) >= 0.6 * (z1 - z0)
    # once the analyst zooms the residual plot, refits leave the range alone
    vb.sigRangeChangedManually.emit([False, True])
    vb.setYRange(-1.0, 1.0, padding=0)
    win.undo_stack.undo()
    assert win.runner.wait()
    assert vb.viewRange()[1] == pytest.approx([-1.0, 1.0])
