"""The plot: points sized by their robust weight, the fitted curve and band, residuals.

Layout: the data plot on top and the residual plot underneath, sharing the x axis.
The points are drawn by :class:`PointsItem`, our own graphics item that paints from
numpy arrays with one ``drawPixmapFragments`` call per paint, so a refit at 1e5
points only swaps two small integer arrays (size level and style) instead of
rebuilding per-point pens and brushes.

Interaction (the plot only *requests* changes; the document owns the state):

* click a point: exclude it, click again: restore it (the point becomes the selection);
* Shift+drag a rectangle (or plain drag in box mode): exclude the points inside;
  Ctrl+Shift+drag (Ctrl+drag in box mode): restore them; one drag = one undo step;
* Alt+click / Alt+drag: select points without changing them.
"""
from __future__ import annotations

import logging
import math
from typing import Callable

import numpy as np
import pyqtgraph as pg
from pyqtgraph import functions as fn
from pyqtgraph.Qt import internals as pg_internals
from PySide6.QtCore import QLineF, QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QBrush, QColor, QPainter, QPen, QPixmap

from fitcore.work import curve_grid

from .commands import MaskCommand
from .document import Document, MaskChange

log = logging.getLogger(__name__)

#: number of size levels the weights are quantised to
N_LEVELS = 8
MIN_SIZE = 4.5   # px, weight 0 (still easy to see: low weights are the points to look at)
MAX_SIZE = 10.0  # px, weight 1
#: styles (rows of the symbol atlas)
USED, DOWN, EXCLUDED = 0, 1, 2
COLOURS = {
    USED: (QColor(31, 92, 170), QColor(12, 45, 95)),
    DOWN: (QColor(232, 150, 30), QColor(140, 80, 0)),
    EXCLUDED: (None, QColor(90, 90, 110)),  # slate-grey crossed ring: our own look
}
SELECT_COLOUR = QColor(255, 200, 0)


def _hex(c: QColor) -> str:
    return c.name()


#: the key above the plot: (html symbol, words) per entry (see :meth:`PlotView.key_entries`)
SIZE_WORDS = "size grows with weight"
KEY_ENTRIES = (
    (f"<span style='color:{_hex(COLOURS[USED][0])}'>&#9679;</span>", f"used ({SIZE_WORDS})"),
    (f"<span style='color:{_hex(COLOURS[DOWN][0])}'>&#9679;</span>", "down-weighted (w &lt; 0.5)"),
    (f"<span style='color:{_hex(COLOURS[EXCLUDED][1])}'>&#8855;</span>", "excluded"),
)
SYMBOL_KEY = "&nbsp;&nbsp;".join(f"{a} {b}" for a, b in KEY_ENTRIES)
HIT_RADIUS = 8.0  # px


def weight_levels(weights: np.ndarray, n_levels: int = N_LEVELS) -> np.ndarray:
    """Quantise weights in [0, 1] to integer size levels ``0 .. n_levels-1``.

    Level ``n_levels-1`` is full size (weight 1). The level grows with the square root
    of the weight and the diameter linearly with the level from :data:`MIN_SIZE` to
    :data:`MAX_SIZE`: the size grows with the weight, but the area is not proportional
    to it (a weight-0 point keeps a visible fifth of the full area). NaN counts as full
    weight.
    """
    w = np.asarray(weights, float)
    w = np.where(np.isfinite(w), np.clip(w, 0.0, 1.0), 1.0)
    return np.rint(np.sqrt(w) * (n_levels - 1)).astype(np.int8)


def level_size(level: int, n_levels: int = N_LEVELS) -> float:
    """Diameter in pixels of the symbol for one size level."""
    return MIN_SIZE + (MAX_SIZE - MIN_SIZE) * level / (n_levels - 1)


class PointsItem(pg.GraphicsObject):
    """Scatter item that paints numpy arrays through a small symbol atlas.

    Per point it keeps the position (plot coordinates), a size level, a style
    (used / down-weighted / excluded) and a selected flag. Symbols for every
    (style, selected, level) are rendered once into one pixmap; a paint maps the
    points to device pixels with numpy and draws them with ``drawPixmapFragments``.

    The work is cached: setters only store arrays and mark what changed; a paint
    maps positions to device pixels only when the view or the positions changed, and
    rebuilds the fragment list only when that or a style changed. With more than
    :attr:`DEDUP_MIN` visible points, points that land on the same device pixel with
    the same symbol are drawn once (same picture, a fraction of the work at 1e5).
    Paint order: used, down-weighted, excluded, then the selected; within a style the
    larger symbols first, so a smaller one on top of a larger one stays visible.
    """

    #: above this many visible points, identical symbols on one pixel are drawn once
    DEDUP_MIN = 3000

    def __init__(self, scale: float = 1.0):
        super().__init__()
        #: symbol size factor (the residual plot uses smaller symbols)
        self.symbol_scale = float(scale)
        self.x = np.zeros(0)
        self.y = np.zeros(0)
        self.level = np.zeros(0, np.int8)
        self.style = np.zeros(0, np.int8)
        self.selected = np.zeros(0, bool)
        self._finite = np.zeros(0, bool)
        self._any_finite = False
        self._bounds = QRectF()
        self._frags = pg_internals.PrimitiveArray(QPainter.PixmapFragment, 10)
        self._atlas = None
        self._atlas_dpr = None
        self._cell = int(np.ceil(MAX_SIZE * self.symbol_scale)) + 6
        self._pos_version = 0
        self._style_version = 0
        self._dev_key = None   # (transform, position version) of the cached device coordinates
        self._dev = None       # (2, n) device coordinates of every point
        self._frag_key = None  # what the cached fragment list was built from
        self._n_frags = 0

    # ------------------------------------------------------------- data
    @property
    def finite(self) -> np.ndarray:
        """Mask of the points drawn (finite x and y); do not modify it."""
        return self._finite

    def set_points(self, x, y):
        """New positions (plot coordinates; NaN = not drawn)."""
        self.prepareGeometryChange()
        self.x = np.asarray(x, float)
        self.y = np.asarray(y, float)
        n = self.x.size
        if self.level.size != n:
            self.level = np.full(n, N_LEVELS - 1, np.int8)
            self.style = np.zeros(n, np.int8)
            self.selected = np.zeros(n, bool)
            self._style_version += 1
        self._finite = np.isfinite(self.x) & np.isfinite(self.y)
        self._any_finite = bool(self._finite.any())
        if self._any_finite:
            xs, ys = self.x[self._finite], self.y[self._finite]
            x0, x1, y0, y1 = xs.min(), xs.max(), ys.min(), ys.max()
            self._bounds = QRectF(x0, y0, max(x1 - x0, 1e-300), max(y1 - y0, 1e-300))
        else:
            self._bounds = QRectF()
        self._pos_version += 1
        self.informViewBoundsChanged()
        self.update()

    def set_style(self, level=None, style=None, selected=None):
        """New size levels, styles and/or selection flags (arrays of length n).

        Arrays equal to the current ones change nothing (no repaint).
        """
        changed = False
        for name, value, dtype in (("level", level, np.int8), ("style", style, np.int8),
                                   ("selected", selected, bool)):
            if value is None:
                continue
            value = np.asarray(value, dtype)
            old = getattr(self, name)
            if value.shape != old.shape or not np.array_equal(value, old):
                setattr(self, name, value)
                changed = True
        if changed:
            self._style_version += 1
            self.update()

    # ------------------------------------------------------------- geometry
    def dataBounds(self, ax, frac=1.0, orthoRange=None):
        if not self._any_finite:
            return (None, None)
        b = self._bounds
        return (b.left(), b.right()) if ax == 0 else (b.top(), b.bottom())

    def pixelPadding(self):
        return self._cell / 2.0

    def boundingRect(self):
        if self._bounds.isNull():
            return QRectF()
        px, py = self.pixelWidth(), self.pixelHeight()
        pad = self._cell / 2.0
        if not np.isfinite(px) or not np.isfinite(py):
            px = py = 0.0
        return self._bounds.adjusted(-pad * px, -pad * py, pad * px, pad * py)

    def viewTransformChanged(self):
        self.prepareGeometryChange()

    # ------------------------------------------------------------- symbols
    def _make_atlas(self, dpr: float):
        cell = self._cell
        pm = QPixmap(int(np.ceil(cell * N_LEVELS * dpr)), int(np.ceil(cell * 6 * dpr)))
        pm.setDevicePixelRatio(dpr)
        pm.fill(Qt.transparent)
        p = QPainter(pm)
        p.setRenderHint(QPainter.Antialiasing, True)
        for sel in (0, 1):
            for st in (USED, DOWN, EXCLUDED):
                row = st + 3 * sel
                fill, edge = COLOURS[st]
                for lev in range(N_LEVELS):
                    d = level_size(N_LEVELS - 1 if st == EXCLUDED else lev) * self.symbol_scale
                    cx, cy = (lev + 0.5) * cell, (row + 0.5) * cell
                    if sel:
                        p.setPen(QPen(SELECT_COLOUR, 3.0))
                        p.setBrush(Qt.NoBrush)
                        p.drawEllipse(QPointF(cx, cy), d / 2 + 2.0, d / 2 + 2.0)
                    if st == EXCLUDED:
                        p.setPen(QPen(edge, 1.6))
                        p.setBrush(Qt.NoBrush)
                        p.drawEllipse(QPointF(cx, cy), d / 2, d / 2)
                        r = d * 0.22
                        p.drawLine(QPointF(cx - r, cy - r), QPointF(cx + r, cy + r))
                        p.drawLine(QPointF(cx - r, cy + r), QPointF(cx + r, cy - r))
                    else:
                        p.setPen(QPen(edge, 1.0))
                        p.setBrush(QBrush(fill))
                        p.drawEllipse(QPointF(cx, cy), d / 2, d / 2)
        p.end()
        self._atlas = pm
        self._atlas_dpr = dpr
        self._frag_key = None

    # ------------------------------------------------------------- painting
    def _device_coords(self, tr):
        """(2, n) device coordinates of all points for painter transform ``tr`` (cached)."""
        tkey = (tr.m11(), tr.m12(), tr.m21(), tr.m22(), tr.dx(), tr.dy(), tr.m13(), tr.m23())
        key = (tkey, self._pos_version)
        if key != self._dev_key:
            if tr.isAffine():
                with np.errstate(invalid="ignore"):
                    self._dev = np.vstack([tkey[0] * self.x + tkey[2] * self.y + tkey[4],
                                           tkey[1] * self.x + tkey[3] * self.y + tkey[5]])
            else:
                self._dev = fn.transformCoordinates(tr, np.vstack([self.x, self.y]))
            self._dev_key = key
        return self._dev

    def _build_fragments(self, tr, w: float, h: float, dpr: float) -> int:
        """Fill the fragment array for the current state; returns the fragment count."""
        dev = self._device_coords(tr)
        key = (self._dev_key, w, h, dpr, self._style_version, self.DEDUP_MIN)
        if key == self._frag_key:
            return self._n_frags
        pad = self._cell
        px, py = dev[0], dev[1]
        with np.errstate(invalid="ignore"):
            vis = self._finite & (px > -pad) & (px < w + pad) & (py > -pad) & (py < h + pad)
        idx = np.flatnonzero(vis)
        if idx.size == 0:
            self._frag_key, self._n_frags = key, 0
            return 0
        # paint class: order key (style, selected) then larger symbols first
        top = N_LEVELS - 1
        cls = ((self.style[idx].astype(np.int64) + 4 * self.selected[idx]) * N_LEVELS
               + (top - self.level[idx]))
        if idx.size > self.DEDUP_MIN:
            # one fragment per (class, device pixel); the sorted keys give the paint order
            ix = np.rint((px[idx] + pad) * dpr).astype(np.int64)
            iy = np.rint((py[idx] + pad) * dpr).astype(np.int64)
            k = np.sort((cls << 40) | (iy << 20) | ix)
            keep = np.empty(k.size, bool)
            keep[0] = True
            np.not_equal(k[1:], k[:-1], out=keep[1:])
            k = k[keep]
            cls = k >> 40
            fx = (k & 0xFFFFF) / dpr - pad
            fy = ((k >> 20) & 0xFFFFF) / dpr - pad
        else:
            order = np.argsort(cls, kind="stable")
            cls = cls[order]
            fx, fy = px[idx[order]], py[idx[order]]
        ok = cls // N_LEVELS                 # style + 4 * selected
        row = (ok & 3) + 3 * (ok >> 2)       # atlas row: style + 3 * selected
        lev = top - (cls % N_LEVELS)
        cell = self._cell * dpr
        m = int(cls.size)
        self._frags.resize(m)
        fr = self._frags.ndarray()
        fr[:, 0] = fx
        fr[:, 1] = fy
        fr[:, 2] = lev * cell
        fr[:, 3] = row * cell
        fr[:, 4] = cell
        fr[:, 5] = cell
        fr[:, 6:10] = [1.0 / dpr, 1.0 / dpr, 0.0, 1.0]
        self._frag_key, self._n_frags = key, m
        return m

    def paint(self, p, option, widget=None):
        if not self._any_finite:
            return
        dpr = widget.devicePixelRatioF() if widget is not None else p.device().devicePixelRatioF()
        if self._atlas is None or self._atlas_dpr != dpr:
            self._make_atlas(dpr)
        dev = p.device()
        w, h = (dev.width(), dev.height()) if dev is not None else (1e6, 1e6)
        w, h = min(float(w), 60000.0), min(float(h), 60000.0)
        tr = p.transform()
        if self._build_fragments(tr, w, h, dpr) == 0:
            return
        p.resetTransform()
        p.drawPixmapFragments(*self._frags.drawargs(), self._atlas)
        p.setTransform(tr)

    # ------------------------------------------------------------- hit tests
    def nearest(self, pos: QPointF, radius_px: float = HIT_RADIUS) -> int | None:
        """Index of the drawn point nearest to ``pos`` (item coordinates) within a radius."""
        if not self._any_finite:
            return None
        px, py = self.pixelWidth(), self.pixelHeight()
        if not (px > 0 and py > 0):
            return None
        with np.errstate(invalid="ignore"):
            d2 = ((self.x - pos.x()) / px) ** 2 + ((self.y - pos.y()) / py) ** 2
        d2[~self._finite] = np.inf
        k = int(np.argmin(d2))
        return k if d2[k] <= radius_px**2 else None

    def inside(self, rect: QRectF) -> np.ndarray:
        """Indices of the points inside ``rect`` (item coordinates)."""
        r = rect.normalized()
        with np.errstate(invalid="ignore"):
            m = self._finite & (self.x >= r.left()) & (self.x <= r.right()) \
                & (self.y >= r.top()) & (self.y <= r.bottom())
        return np.flatnonzero(m)


class GridItem(pg.GraphicsObject):
    """Light grid lines at the axis ticks of one plot, drawn in one call per level.

    Replaces pyqtgraph's axis grid (which costs several ms per axis on every
    repaint); the lines follow the axes' own tick values, so they also fit log axes.
    """

    MAJOR = QColor(226, 229, 234)
    MINOR = QColor(242, 243, 246)

    def __init__(self, plot_item):
        super().__init__()
        self._plot = plot_item
        self.setZValue(-1e6)
        self._tick_key, self._ticks = None, [[], []]
        self._pens = []
        for c in (self.MAJOR, self.MINOR):
            pen = QPen(c)
            pen.setCosmetic(True)
            pen.setWidth(1)
            self._pens.append(pen)

    def boundingRect(self):
        vb = self._plot.vb
        return vb.viewRect() if vb is not None else QRectF()

    def viewRangeChanged(self):
        self.prepareGeometryChange()
        self.update()

    def dataBounds(self, ax, frac=1.0, orthoRange=None):
        return (None, None)

    def paint(self, p, option, widget=None):
        vb = self._plot.vb
        (x0, x1), (y0, y1) = vb.viewRange()
        tr = p.transform()
        a = tr.map(QPointF(x0, y0))
        b = tr.map(QPointF(x1, y1))
        left, right = sorted((a.x(), b.x()))
        top, bottom = sorted((a.y(), b.y()))
        if right - left < 2 or bottom - top < 2:
            return
        sx = (b.x() - a.x()) / (x1 - x0) if x1 != x0 else 0.0
        sy = (b.y() - a.y()) / (y1 - y0) if y1 != y0 else 0.0
        axes = [self._plot.getAxis(name) for name in ("bottom", "left")]
        key = (x0, x1, y0, y1, round(right - left), round(bottom - top),
               axes[0].logMode, axes[1].logMode)
        if key != self._tick_key:
            levels = []
            for ax, lo, hi, size in ((axes[0], x0, x1, right - left), (axes[1], y0, y1, bottom - top)):
                try:
                    levels.append(ax.tickValues(lo, hi, size)[:2])
                except Exception:  # an axis that cannot tick: no grid lines, logged
                    log.debug("no grid lines for an axis", exc_info=True)
                    levels.append([])
            self._tick_key, self._ticks = key, levels
        levels = self._ticks
        p.resetTransform()
        p.setRenderHint(QPainter.Antialiasing, False)
        for lev in (1, 0):  # minor lines first, major on top
            lines = []
            for (_, vals) in (levels[0][lev:lev + 1] or [(0, [])]):
                for v in vals:
                    X = round(a.x() + (v - x0) * sx) + 0.5
                    lines.append(QLineF(X, top, X, bottom))
            for (_, vals) in (levels[1][lev:lev + 1] or [(0, [])]):
                for v in vals:
                    Y = round(a.y() + (v - y0) * sy) + 0.5
                    lines.append(QLineF(left, Y, right, Y))
            if lines:
                p.setPen(self._pens[lev])
                p.drawLines(lines)
        p.setTransform(tr)


class BandItem(pg.QtWidgets.QGraphicsPathItem):
    """The confidence band: one filled polygon, built once per result.

    (pyqtgraph's fill-between item rebuilds its path in Python once per bounding
    curve on every change, and paints through Python; this one paints in C++.)
    """

    BRUSH = QColor(31, 92, 170, 72)  # light enough for the points, dark enough for a narrow band

    def __init__(self):
        super().__init__()
        self.setPen(QPen(Qt.NoPen))
        self.setBrush(QBrush(self.BRUSH))
        self.x = self.lo = self.hi = np.zeros(0)

    def set_band(self, x, lo, hi):
        """Fill between ``lo`` and ``hi`` over ``x`` (plot coordinates; empty = no band)."""
        self.x, self.lo, self.hi = (np.asarray(a, float) for a in (x, lo, hi))
        if self.x.size < 2:
            self.setPath(pg.QtGui.QPainterPath())
            return
        path = fn.arrayToQPath(np.r_[self.x, self.x[::-1]], np.r_[self.hi, self.lo[::-1]], connect="all")
        path.closeSubpath()
        self.setPath(path)

    def dataBounds(self, ax, frac=1.0, orthoRange=None):
        return (None, None)


class PickViewBox(pg.ViewBox):
    """A view box that reports clicks and rectangle drags to a handler.

    ``handler.on_click(viewbox, pos, modifiers) -> bool`` and
    ``handler.on_box(viewbox, rect, modifiers, finished)``; plain drags pan as usual
    unless box mode is on.
    """

    def __init__(self, handler, **kw):
        super().__init__(**kw)
        self.handler = handler
        self.box_mode = False
        self._rect_item = None

    def mouseClickEvent(self, ev):
        if ev.button() == Qt.LeftButton:
            pos = self.mapSceneToView(ev.scenePos())
            if self.handler.on_click(self, pos, ev.modifiers()):
                ev.accept()
                return
        super().mouseClickEvent(ev)

    def _is_box_drag(self, ev) -> bool:
        mods = ev.modifiers()
        return ev.button() == Qt.LeftButton and (
            self.box_mode or bool(mods & (Qt.ShiftModifier | Qt.AltModifier)))

    def mouseDragEvent(self, ev, axis=None):
        if axis is None and self._is_box_drag(ev):
            ev.accept()
            p0 = self.mapSceneToView(ev.buttonDownScenePos())
            p1 = self.mapSceneToView(ev.scenePos())
            rect = QRectF(p0, p1).normalized()
            if self._rect_item is None:
                self._rect_item = pg.QtWidgets.QGraphicsRectItem()
                self._rect_item.setPen(pg.mkPen((200, 30, 45), width=1, style=Qt.DashLine, cosmetic=True))
                self._rect_item.setBrush(pg.mkBrush(200, 30, 45, 30))
                self._rect_item.setZValue(1e9)
                self.addItem(self._rect_item, ignoreBounds=True)
            self._rect_item.setRect(rect)
            finished = ev.isFinish()
            self.handler.on_box(self, rect, ev.modifiers(), finished)
            if finished:
                self.removeItem(self._rect_item)
                self._rect_item = None
            return
        super().mouseDragEvent(ev, axis)


#: standardised residuals beyond this many scales are drawn at the plot's edge
RESID_CLIP = 6.0


class PlotView(pg.GraphicsLayoutWidget):
    """Data plot over residual plot, observing a :class:`Document`.

    Parameters
    ----------
    document
        The document shown.
    push
        Callable taking a ``QUndoCommand`` (normally ``QUndoStack.push``).
    ask_reason
        Optional callable ``ask_reason(n_points) -> str | None`` asked before an
        exclusion from the plot (None cancels it).
    """

    #: emitted after the plot was redrawn from a new result
    redrawn = Signal()
    #: emitted after a change of log axes (overlays drawn by others redraw on it)
    axes_changed = Signal()

    def __init__(self, document: Document, push: Callable, ask_reason: Callable | None = None, parent=None):
        super().__init__(parent)
        self.document = document
        self.push = push
        self.ask_reason = ask_reason
        self.setBackground("w")
        self.log_x = False
        self.log_y = False
        self.show_band = True
        self.single_fit_visible = True  # off while a loss comparison overlays its curves
        self._drag = None  # (token, initial excluded mask) while a box drag runs

        self.vb_data = PickViewBox(self)
        self.vb_resid = PickViewBox(self)
        self.data_plot = self.addPlot(row=0, col=0, viewBox=self.vb_data)
        self.resid_plot = self.addPlot(row=1, col=0, viewBox=self.vb_resid)
        self.ci.layout.setRowStretchFactor(0, 3)
        self.ci.layout.setRowStretchFactor(1, 1)
        self.resid_plot.setXLink(self.data_plot)
        self.grids = []
        for plot in (self.data_plot, self.resid_plot):
            grid = GridItem(plot)  # own grid: pyqtgraph's axis grid costs ms per repaint
            plot.addItem(grid, ignoreBounds=True)
            self.grids.append(grid)
            plot.hideButtons()
            for ax in ("left", "bottom"):
                plot.getAxis(ax).setPen(pg.mkPen(60, 60, 60))
                plot.getAxis(ax).setTextPen(pg.mkPen(30, 30, 30))
        self.data_plot.getAxis("left").setWidth(70)
        self.resid_plot.getAxis("left").setWidth(70)
        for plot in (self.data_plot, self.resid_plot):
            for ax in ("left", "bottom"):
                # units come from the file; a "(x0.001)" scale factor after them misleads
                plot.getAxis(ax).enableAutoSIPrefix(False)
        # the residual plot underneath carries the shared x label
        self.data_plot.getAxis("bottom").showLabel(False)
        # the key above the data (never over it); it wraps to more lines when narrow
        self._key_colour = ""     # "" or what the used points' colour shows
        self._key_extra = []      # further (symbol, words) entries (high leverage)
        self._key_curves = []     # (symbol, words) of overlaid curves (a loss comparison)
        self._key_html = None
        self.data_plot.setTitle(SYMBOL_KEY, size="9pt", color="#333333")

        self.band = BandItem()
        self._curve_pen = pg.mkPen(20, 20, 20, width=2)
        self._stale_pen = pg.mkPen(120, 120, 120, width=2, style=Qt.DashLine)
        self.curve = pg.PlotCurveItem(pen=self._curve_pen, antialias=True)
        self.points = PointsItem()
        self.data_plot.addItem(self.band, ignoreBounds=True)
        self.data_plot.addItem(self.curve, ignoreBounds=True)
        self.data_plot.addItem(self.points)
        self.zero = pg.InfiniteLine(pos=0, angle=0, pen=pg.mkPen(90, 90, 90, width=1))
        self.resid_plot.addItem(self.zero, ignoreBounds=True)
        self.resid_points = PointsItem(scale=0.8)
        self._resid_manual = False  # the analyst zoomed or panned the residual plot
        self.vb_resid.sigRangeChangedManually.connect(self._resid_range_changed_by_hand)
        self.resid_plot.addItem(self.resid_points)
        # Residuals beyond +-RESID_CLIP scales are drawn at the edge with an arrow, so one
        # gross outlier does not squash all the others onto a line.
        self.resid_standardised = True
        self._resid_shown_standardised = True
        self.resid_arrows = pg.ScatterPlotItem(size=9, useCache=False, pen=pg.mkPen(60, 60, 60),
                                               brush=pg.mkBrush(60, 60, 60))
        self.resid_plot.addItem(self.resid_arrows)
        self.resid_plot.setLabel("left", "residual")
        self.stale_text = pg.TextItem("", color=(200, 30, 45), anchor=(0, 0))
        self.data_plot.addItem(self.stale_text, ignoreBounds=True)

        document.subscribe(self._on_document)
        self._on_document("data")

    # ---------------------------------------------------------------- key
    def set_key(self, colour: str | None = None, extra=None, curves=None):
        """What the key above the plot explains.

        ``colour``: "" (points coloured used / down-weighted) or the words for what
        the colour of the used points shows now (e.g. "leverage"); ``extra``: a list
        of further ``(html symbol, words)`` entries; ``curves``: the overlaid curves'
        entries (a loss comparison names its curves here, not in a legend over the
        points). None leaves a part as it is.
        """
        if curves is not None:
            self._key_curves = list(curves)
        if colour is not None:
            self._key_colour = str(colour)
        if extra is not None:
            self._key_extra = list(extra)
        self._update_key()

    def key_entries(self) -> list[tuple[str, str]]:
        """The key's entries as ``(html symbol, words)``."""
        if self._key_colour:
            lo, hi = (QColor(*c).name() for c in ((250, 240, 205), (100, 10, 70)))
            entries = [(f"<span style='color:{lo}'>&#9679;</span><span style='color:{hi}'>&#9679;</span>",
                        f"used, colour = {self._key_colour} (scale below)"),
                       KEY_ENTRIES[2]]
        else:
            entries = list(KEY_ENTRIES)
        return entries + list(self._key_extra) + list(self._key_curves)

    def key_text(self) -> str:
        """The key as plain text (tests, the report)."""
        import html as _html
        import re as _re

        return "; ".join(_html.unescape(_re.sub("<[^>]+>", "", b)) for _a, b in self.key_entries())

    def _update_key(self):
        """Lay the key out in as few lines as fit the plot's width."""
        from PySide6.QtGui import QFont, QFontMetricsF
        import html as _html
        import re as _re

        label = self.data_plot.titleLabel
        font = QFont(label.item.font())
        font.setPointSizeF(9.0)
        fm = QFontMetricsF(font)
        # the key may take the plot's width less the left axis and the margins
        room = max(120.0, self.width() - self.data_plot.getAxis("left").width() - 30.0)
        entries = self.key_entries()
        avail = room
        for _attempt in range(6):
            lines, cur, cur_w = [], [], 0.0
            gap = fm.horizontalAdvance("    ")
            for sym, words in entries:
                plain = _html.unescape(_re.sub("<[^>]+>", "", f"{sym} {words}"))
                w = fm.horizontalAdvance(plain) + 4
                if cur and cur_w + gap + w > avail:
                    lines.append(cur)
                    cur, cur_w = [], 0.0
                cur.append(f"{sym} {words}")
                cur_w += (gap if cur_w else 0.0) + w
            if cur:
                lines.append(cur)
            text = "<br>".join("&nbsp;&nbsp;".join(line) for line in lines)
            if text != self._key_html:
                self._key_html = text
                self.data_plot.setTitle(text, size="9pt", color="#333333")
            # measured as drawn: narrower again when the drawn text is wider than the room
            if label.item.boundingRect().width() <= room or len(lines) >= len(entries):
                break
            avail *= 0.8
        # the title row as high as the key's lines (pyqtgraph's setTitle fixes it at 30 px:
        # a key of three or more lines was cut at the top and ran into the points)
        height = int(math.ceil(label.item.boundingRect().height())) + 2
        if self.data_plot.layout.rowMinimumHeight(0) != height:
            label.setMaximumHeight(height)
            self.data_plot.layout.setRowFixedHeight(0, height)

    def resizeEvent(self, ev):
        # the key first: the layout's minimum width follows it, and the resize below
        # sizes the layout to the view (a wider minimum would hang out of the view)
        if getattr(self, "_key_html", 0) != 0:  # (pyqtgraph resizes before __init__ ends)
            self._update_key()
        super().resizeEvent(ev)

    # ---------------------------------------------------------------- options
    def set_log(self, log_x: bool | None = None, log_y: bool | None = None):
        """Logarithmic axes (points with values <= 0 are not drawn on a log axis)."""
        if log_x is not None:
            self.log_x = bool(log_x)
        if log_y is not None:
            self.log_y = bool(log_y)
        self.data_plot.setLogMode(self.log_x, self.log_y)
        self.resid_plot.setLogMode(self.log_x, False)
        self._set_positions()
        self._draw_result()
        self.data_plot.enableAutoRange()
        self._auto_resid_range(reset=True)
        self.axes_changed.emit()

    def set_band_visible(self, on: bool):
        self.show_band = bool(on)
        self._draw_result()

    def set_single_fit_visible(self, on: bool):
        """Show (True) or hide the single fit's curve and band (a comparison hides them)."""
        self.single_fit_visible = bool(on)
        self.curve.setVisible(self.single_fit_visible)
        self.band.setVisible(self.single_fit_visible and self.show_band)

    def set_box_mode(self, on: bool):
        self.vb_data.box_mode = self.vb_resid.box_mode = bool(on)

    # ---------------------------------------------------------------- coordinates
    def to_view_x(self, x):
        """Data x as plotted: log10 x on a log axis (NaN where x <= 0), else x itself."""
        if not self.log_x:
            return np.asarray(x, float)
        with np.errstate(all="ignore"):
            x = np.asarray(x, float)
            return np.where(x > 0, np.log10(np.where(x > 0, x, 1.0)), np.nan)

    def to_view_y(self, y):
        """Data y as plotted: log10 y on a log axis (NaN where y <= 0), else y itself."""
        if not self.log_y:
            return np.asarray(y, float)
        with np.errstate(all="ignore"):
            y = np.asarray(y, float)
            return np.where(y > 0, np.log10(np.where(y > 0, y, 1.0)), np.nan)

    def point_scene_pos(self, index: int, residual: bool = False) -> QPointF:
        """Scene position of one point (for tests and tooltips)."""
        item = self.resid_points if residual else self.points
        return item.mapToScene(QPointF(item.x[index], item.y[index]))

    # ---------------------------------------------------------------- document
    def detach(self) -> None:
        """Stop following the document (a copy of the view made for an export, before
        it is deleted)."""
        self.document.unsubscribe(self._on_document)

    def _on_document(self, event, **info):
        if event == "data":
            m = self.document.measurements
            self.data_plot.setLabel("bottom", m.label("x"))
            self.data_plot.getAxis("bottom").showLabel(False)  # shown under the residuals
            self.data_plot.setLabel("left", m.label("y"))
            self.resid_plot.setLabel("bottom", m.label("x"))
            self._label_residual_axis()
            self._set_positions()
            self._restyle()
            self._draw_result()
            self.data_plot.enableAutoRange()
            self._auto_resid_range(reset=True)
        elif event == "mask":
            self._restyle()
        elif event == "selection":
            sel = np.zeros(self.document.n, bool)
            sel[self.document.selection] = True
            self.points.set_style(selected=sel)
            self.resid_points.set_style(selected=sel)
        elif event == "result":
            self._restyle()
            self._draw_result()
            self.redrawn.emit()
        elif event == "settings":
            self._mark_stale()

    def _set_positions(self):
        m = self.document.measurements
        self.points.set_points(self.to_view_x(m.x), self.to_view_y(m.y))
        self._set_residual_points()

    def residual_values(self):
        """The residual plot's y values and whether they are standardised.

        Standardised: residual / scale (sigma-weighted residuals when sigma was given),
        clipped to +-RESID_CLIP; raw: residuals in units of y. With no usable scale (an
        exact fit) the raw residuals are shown.
        """
        m = self.document.measurements
        res = self.document.result
        if res is None or len(res.residuals) != m.n:
            return np.full(m.n, np.nan), self.resid_standardised
        if self.resid_standardised:
            z = np.asarray(res.std_residuals, float)
            if np.isfinite(res.scale) and res.scale > 0 and np.any(np.isfinite(z)):
                return z, True
        return np.asarray(res.residuals, float), False

    def _set_residual_points(self):
        m = self.document.measurements
        r, standardised = self.residual_values()
        shown = r
        arrows_x, arrows_y, arrows_sym = [], [], []
        if standardised:
            shown = np.clip(r, -RESID_CLIP, RESID_CLIP)
            beyond = np.flatnonzero(np.isfinite(r) & (np.abs(r) > RESID_CLIP))
            tx = self.to_view_x(m.x)
            for i in beyond:
                up = r[i] > 0
                arrows_x.append(tx[i])
                arrows_y.append((RESID_CLIP + 0.7) * (1 if up else -1))
                arrows_sym.append("t1" if up else "t")
        self.resid_points.set_points(self.to_view_x(m.x), shown)
        self.resid_arrows.setData(arrows_x, arrows_y, symbol=arrows_sym or "t")
        self.resid_arrows.setToolTip(
            f"{len(arrows_x)} residual(s) beyond {RESID_CLIP:g} scales, drawn at the edge" if arrows_x else "")
        if self._resid_shown_standardised != standardised:
            self._resid_shown_standardised = standardised
            self._label_residual_axis()

    def _label_residual_axis(self):
        m = self.document.measurements
        if self._resid_shown_standardised:
            self.resid_plot.setLabel("left", "residual / scale")
        else:
            self.resid_plot.setLabel("left", f"residual ({m.y_unit})" if m.y_unit else "residual")

    def set_residuals_standardised(self, on: bool):
        """Residual plot in scales (True, the default) or in units of y (False)."""
        self.resid_standardised = bool(on)
        self._set_residual_points()
        self._auto_resid_range(reset=True)

    def _restyle(self):
        doc = self.document
        n = doc.n
        res = doc.result
        if res is not None and len(res.weights) == n:
            w = np.asarray(res.weights, float).copy()
            w[doc.excluded] = 1.0
        else:
            w = np.ones(n)
        level = weight_levels(w)
        style = doc.status()
        sel = np.zeros(n, bool)
        sel[doc.selection] = True
        self.points.set_style(level, style, sel)
        self.resid_points.set_style(level, style, sel)

    def _mark_stale(self):
        doc = self.document
        if doc.result is not None and doc.stale:
            if doc.fit_failed:
                msg = f"previous result (stale): {doc.fit_message}"
            else:
                msg = "stale: refitting..."
            if self.stale_text.textItem.toPlainText() != msg:
                self.stale_text.setText(msg)
            if self.curve.opts["pen"] is not self._stale_pen:
                self.curve.setPen(self._stale_pen)
        else:
            if self.stale_text.textItem.toPlainText():
                self.stale_text.setText("")
            if self.curve.opts["pen"] is not self._curve_pen:
                self.curve.setPen(self._curve_pen)
        vr = self.data_plot.vb.viewRange()
        self.stale_text.setPos(vr[0][0], vr[1][1])

    def _draw_result(self):
        doc = self.document
        res = doc.result
        m = doc.measurements
        if res is None or m.n == 0 or len(res.weights) != m.n:
            self.curve.setData([], [])
            self.band.set_band([], [], [])
            self._set_residual_points()
            self._mark_stale()
            return
        grid = curve_grid(m.x, log_x=self.log_x)
        if grid.size == 0:
            return
        with np.errstate(all="ignore"):
            try:
                yhat = np.asarray(res.predict(grid), float)
            except Exception:  # a model that cannot evaluate: no curve, logged
                log.debug("fitted curve not drawn", exc_info=True)
                yhat = np.full(grid.size, np.nan)
            ok = np.isfinite(yhat)
            self.curve.setData(self.to_view_x(grid[ok]), self.to_view_y(yhat[ok]))
            self.band.setVisible(self.show_band and self.single_fit_visible)
            if self.show_band:
                try:
                    b_lo, b_hi = res.band(grid)
                    ok = np.isfinite(b_lo) & np.isfinite(b_hi)
                    if self.log_y:  # (``~False`` is -1, which made every band fail here)
                        ok &= (b_lo > 0) & (b_hi > 0)
                    self.band.set_band(self.to_view_x(grid[ok]), self.to_view_y(b_lo[ok]), self.to_view_y(b_hi[ok]))
                except Exception:  # no band (e.g. dof = 0), logged
                    log.debug("confidence band not drawn", exc_info=True)
                    self.band.set_band([], [], [])
        self._set_residual_points()
        self._auto_resid_range()
        self._mark_stale()

    def _auto_resid_range(self, reset: bool = False):
        """Fit the residual plot's y range to the residuals, but only when they left it.

        A refit moves every residual a little; re-ranging the axis on each one made
        it jitter (and re-laid out its ticks on every click). The range is renewed
        when a residual falls outside it or the residuals use under 60 % of it, and
        not at all once the analyst zoomed or panned the residual plot (until new
        data or a change of log axes).
        """
        vb = self.vb_resid
        if reset:
            self._resid_manual = False
        if self._resid_manual:
            return
        vb.enableAutoRange(x=True, y=False)
        pts = self.resid_points
        r = pts.y[pts.finite]
        if r.size == 0:
            return
        lo, hi = float(r.min()), float(r.max())
        if len(self.resid_arrows.data):  # leave room for the edge arrows
            lo = min(lo, -RESID_CLIP - 1.0) if np.any(self.resid_arrows.data["y"] < 0) else lo
            hi = max(hi, RESID_CLIP + 1.0) if np.any(self.resid_arrows.data["y"] > 0) else hi
        span = hi - lo if hi > lo else max(abs(hi), 1e-300)
        y0, y1 = vb.viewRange()[1]
        if not reset and y0 <= lo and hi <= y1 and span >= 0.6 * (y1 - y0):
            return
        vb.setYRange(lo - 0.08 * span, hi + 0.08 * span, padding=0)

    def _resid_range_changed_by_hand(self, *_):
        self._resid_manual = True

    # ---------------------------------------------------------------- picking
    def _item_for(self, vb):
        return self.points if vb is self.vb_data else self.resid_points

    def on_click(self, vb, pos, modifiers) -> bool:
        """Click on the plot: toggle the nearest point (Alt: select only)."""
        doc = self.document
        i = self._item_for(vb).nearest(pos)
        if i is None:
            if not modifiers & Qt.AltModifier:
                doc.set_selection([], origin="plot")
            return False
        doc.set_selection([i], origin="plot")
        if modifiers & Qt.AltModifier:
            return True
        exclude = not doc.excluded[i]
        reason = ""
        if exclude and self.ask_reason is not None:
            reason = self.ask_reason(1)
            if reason is None:
                return True
        self.push(MaskCommand(doc, doc.make_mask_change([i], exclude, reason=reason)))
        return True

    def on_box(self, vb, rect, modifiers, finished: bool):
        """Rectangle drag: exclude (Ctrl: restore; Alt: select) the points inside.

        The points follow the rectangle while it is dragged (one undo step for the
        drag). When the drag ends with points newly excluded, ``ask_reason`` is asked
        once for all of them: its answer becomes every one's reason, and cancelling
        (None) takes the whole drag back, so nothing is excluded.
        """
        doc = self.document
        inside = self._item_for(vb).inside(rect)
        if modifiers & Qt.AltModifier:
            doc.set_selection(inside, origin="plot")
            return
        restore = bool(modifiers & Qt.ControlModifier)
        if self._drag is None:
            self._drag = (object(), doc.excluded.copy())
        token, start = self._drag
        # desired state: the start mask, with the points inside set
        target = start.copy()
        target[inside] = not restore
        changed = np.flatnonzero(target != doc.excluded)
        if changed.size:
            change = doc.make_mask_change(changed, target[changed])
            self.push(MaskCommand(doc, change, drag_token=token))
        doc.set_selection(inside, origin="plot")
        if finished:
            self._drag = None
            new = np.flatnonzero(doc.excluded & ~start)
            if new.size and self.ask_reason is not None:
                self._finish_box_reason(token, start, new)

    def _finish_box_reason(self, token, start: np.ndarray, new: np.ndarray):
        """Ask one reason for the points a box drag excluded (see :meth:`on_box`)."""
        doc = self.document
        reason = self.ask_reason(int(new.size))
        if reason is None:  # cancelled: back to the mask before the drag (the step vanishes)
            back = np.flatnonzero(doc.excluded != start)
            if back.size:
                self.push(MaskCommand(doc, doc.make_mask_change(back, start[back]), drag_token=token))
            return
        if not reason:
            return
        now = [doc.times[int(i)] for i in new]
        change = MaskChange(indices=new.astype(np.intp), before=np.ones(new.size, bool),
                            after=np.ones(new.size, bool),
                            reasons_before=[doc.reasons[int(i)] for i in new],
                            reasons_after=[str(reason)] * int(new.size),
                            times_before=list(now), times_after=list(now))
        self.push(MaskCommand(doc, change, drag_token=token))
