"""Loss comparison and the adaptive suggestion.

The loss comparison fits the document's data and model under several losses in one
action (``fitcore.compare.compare_losses``) in a background job, overlays one curve
per loss in the data plot (named in the key above the plot, never over the points),
and lists the estimates side by side with their standard uncertainties, the scale,
alpha and the number of down-weighted points. Estimates that differ between two
losses by more than twice their combined standard uncertainty are shaded, and the
rule is stated under the table (``fitcore.compare.DIFFERENCE_RULE``; the pairs come
from ``cmp.differences()``).

The adaptive suggestion shows the fitted shape alpha of the adaptive loss with its
uncertainty, the profile negative log-likelihood over alpha in [0, 2] as a small
plot, and the plain-language reading (``fitcore.compare.adaptive_reading``).

Closing the comparison removes the overlays and brings back the single fit. The view
is shown as a tab of the window's tab area (``desktop.pane_layout.AnalysisTab``).
"""
from __future__ import annotations

import html
import logging

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, QTimer, Signal
from PySide6.QtGui import QAction, QBrush, QColor, QFont
from PySide6.QtWidgets import (
    QFrame, QGroupBox, QHBoxLayout, QHeaderView, QLabel, QMenu, QProgressBar, QPushButton,
    QScrollArea, QSplitter, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget,
)

from fitcore.compare import DEFAULT_LOSSES, DIFFERENCE_FACTOR, DIFFERENCE_RULE
from fitcore.compare import FIT_KWARGS as COMPARE_OPTIONS
from fitcore.losses import LOSS_NAMES, LOSSES, loss_short_title, loss_title
from fitcore.work import curve_grid

from .document import Document
from .estimates_view import fmt_value
from .job_kinds import run_here
from .jobs import Channel

log = logging.getLogger(__name__)

#: Qt dash patterns for the registry's dash names (each loss's pen is in its row of
#: fitcore.losses.LOSSES)
DASHES = {"solid": Qt.SolidLine, "dash": Qt.DashLine, "dot": Qt.DotLine,
          "dashdot": Qt.DashDotLine, "dashdotdot": Qt.DashDotDotLine}
_NO_PEN = ((60, 60, 60), "solid")
DIFF_BG = QBrush(QColor(255, 221, 214))
FAIL_FG = QBrush(QColor(180, 35, 24))
#: role holding the raw number behind a table cell (tests and copying)
VALUE_ROLE = Qt.UserRole + 7


def _pen_of(name: str):
    e = LOSSES.get(name)
    return (e.colour, e.dash) if e is not None else _NO_PEN


def loss_pen(name: str, width: float = 2.0):
    rgb, dash = _pen_of(name)
    return pg.mkPen(*rgb, width=width, style=DASHES[dash])


def comparison_request(document: Document, losses) -> dict:
    """Copies of everything one comparison needs (safe to hand to a worker)."""
    req = document.fit_request()
    # the options a comparison passes on (each loss keeps its own tuning constant)
    kw = {k: v for k, v in req["kwargs"].items() if k in COMPARE_OPTIONS}
    if "general" in losses:
        alpha = document.settings.alpha
        kw["alpha"] = 1.0 if alpha is None else float(alpha)
    kw["sigma"] = req["sigma"]
    kw["excluded"] = req["excluded"]
    return {"model": req["model"], "x": req["x"], "y": req["y"], "kwargs": kw,
            "losses": tuple(losses), "generation": req["generation"],
            "rows": document.measurements.source_rows}


def run_comparison(request: dict, progress=None, cancel=None, with_adaptive: bool = True,
                   use_child: bool | None = None):
    """``(cmp, reading or None, reading error or None, leverage note)``, here and now.

    The "compare" job (:mod:`desktop.job_kinds`), run in this thread or, with
    ``use_child``, in a child process this thread waits for (default: the kind's
    choice, a child up to ``CHILD_MAX_POINTS`` points). The window submits the same
    job to its channel instead (:meth:`CompareView.run`).
    """
    where = None if use_child is None else ("process" if use_child else "thread")
    return tuple(run_here("compare", {**request, "with_adaptive": bool(with_adaptive)}, progress, cancel,
                          where=where))


def progress_text(done: int, total: int, n_losses: int) -> str:
    """The progress bar's text, counting what is run: ``"3/5 losses"`` while the losses
    are fitted, then ``"5/5 losses; alpha profile"`` while the adaptive reading (its
    profile over alpha) runs after them, ``"5/5 losses + alpha profile"`` at the end."""
    n = int(n_losses)
    if total <= n or n <= 0:
        return f"{min(done, max(n, total))}/{max(n, total)} losses"
    if done < n:
        return f"{done}/{n} losses"
    return f"{n}/{n} losses" + ("; alpha profile" if done < total else " + alpha profile")


def key_symbol(name: str) -> str:
    """The loss's line in the key above the plot: its colour and dash as text."""
    rgb, dash = _pen_of(name)
    line = {"solid": "&#9472;&#9472;", "dash": "&#8211; &#8211;", "dot": "&middot;&middot;&middot;&middot;",
            "dashdot": "&#8211;&middot;&#8211;", "dashdotdot": "&#8211;&middot;&middot;&#8211;"}[dash]
    return f"<span style='color:{QColor(*rgb).name()}'><b>{line}</b></span>"


class AdaptivePanel(QGroupBox):
    """Fitted alpha with uncertainty, the profile NLL over alpha and the reading."""

    def __init__(self, parent=None):
        super().__init__("Adaptive suggestion", parent)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(6, 6, 6, 6)
        self.alpha_label = QLabel("alpha: -")
        f = QFont()
        f.setBold(True)
        self.alpha_label.setFont(f)
        self.alpha_label.setWordWrap(True)
        lay.addWidget(self.alpha_label)
        self.plot = pg.PlotWidget(background="w")
        self.plot.setMinimumHeight(90)
        self.plot.setMaximumHeight(150)
        self.plot.setMenuEnabled(False)
        self.plot.setMouseEnabled(False, False)
        self.plot.hideButtons()
        pi = self.plot.getPlotItem()
        pi.setLabel("bottom", "shape alpha")
        pi.setLabel("left", "NLL - min")
        pi.showGrid(x=True, y=True, alpha=0.15)
        self.interval = pg.LinearRegionItem(movable=False, brush=pg.mkBrush(165, 35, 140, 35),
                                            pen=pg.mkPen(None))
        self.plot.addItem(self.interval)
        self.curve = self.plot.plot(pen=pg.mkPen(165, 35, 140, width=2), symbol="o", symbolSize=4,
                                    symbolBrush=(165, 35, 140), symbolPen=None)
        self.cut = pg.InfiniteLine(pos=1.92, angle=0, pen=pg.mkPen(120, 120, 120, style=Qt.DotLine))
        self.mark = pg.InfiniteLine(pos=1.0, angle=90, pen=pg.mkPen(165, 35, 140, style=Qt.DashLine))
        self.plot.addItem(self.cut)
        self.plot.addItem(self.mark)
        self.plot.setXRange(0, 2, padding=0.02)
        # the reading first (in a short tab it is what shows), then the profile
        self.reading = QLabel("")
        self.reading.setWordWrap(True)
        self.reading.setTextInteractionFlags(Qt.TextSelectableByMouse)
        lay.addWidget(self.reading)
        lay.addWidget(self.plot)
        self.value = None
        self.clear()

    def clear(self, text: str = "Run the loss comparison to see the suggestion."):
        self.value = None
        self.alpha_label.setText("alpha: -")
        self.curve.setData([], [])
        self.interval.setVisible(False)
        self.mark.setVisible(False)
        self.reading.setText(text)

    def show_reading(self, reading):
        """Show an ``adaptive_reading`` result."""
        self.value = reading
        a, u = float(reading.alpha), reading.alpha_u
        if u is not None and np.isfinite(u) and u > 0:
            self.alpha_label.setText(f"alpha = {fmt_value(a, float(u))}")
        elif a <= 1e-9 or a >= 2.0 - 1e-9:
            self.alpha_label.setText(f"alpha = {a:.2f} (at the {'lower' if a < 1 else 'upper'} end "
                                     "of [0, 2]: no standard uncertainty)")
        else:
            self.alpha_label.setText(f"alpha = {a:.3g}")
        prof = getattr(reading, "profile", None)
        if prof is not None and len(prof) >= 2:
            al, nll = np.asarray(prof[0], float), np.asarray(prof[1], float)
            ok = np.isfinite(al) & np.isfinite(nll)
            if ok.any():
                d = nll[ok] - np.min(nll[ok])
                self.curve.setData(al[ok], d)
                self.plot.setYRange(0, float(max(np.max(d), 2.5)), padding=0.05)
        iv = getattr(reading, "interval", None)
        if iv is not None and len(iv) == 2 and np.all(np.isfinite(iv)):
            self.interval.setRegion((float(iv[0]), float(iv[1])))
            self.interval.setVisible(True)
        else:
            self.interval.setVisible(False)
        self.mark.setPos(a)
        self.mark.setVisible(True)
        text = html.escape(str(reading.text))
        if iv is not None and len(iv) == 2:
            text += (f"<br><span style='color:#555'>approx. 95% interval for alpha: "
                     f"[{float(iv[0]):.3g}, {float(iv[1]):.3g}] (profile likelihood)</span>")
        self.reading.setText(text)


class CompareView(QWidget):
    """Loss choice, run/cancel, the side-by-side table and the adaptive suggestion.

    Parameters
    ----------
    document
        The document compared.
    plot
        The :class:`~desktop.plot_view.PlotView` that receives the overlay curves.
    """

    #: the comparison was closed (the single fit is back)
    closed = Signal()
    #: a comparison finished and is shown
    shown = Signal()

    def __init__(self, document: Document, plot, parent=None):
        super().__init__(parent)
        self.document = document
        self.plot = plot
        self.job = Channel(self)
        self.job.progress.connect(self._on_progress)
        self.job.finished.connect(self._on_finished)
        self.job.failed.connect(self._on_failed)
        self.job.cancelled.connect(self._on_cancelled)
        self.comparison = None
        self.reading = None
        self.generation = -1
        self.curves: dict[str, pg.PlotCurveItem] = {}

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        # one row of controls (the losses in a drop-down menu): in a short tab the table
        # and the suggestion keep the height
        row = QHBoxLayout()
        # a push button with a menu: its size counts the menu arrow (a tool button's
        # instant popup drew the arrow over the last digit of 'Losses: 5 of 10')
        self.losses_button = QPushButton()
        self.losses_button.setToolTip("The losses to fit side by side")
        menu = QMenu(self.losses_button)
        menu.setToolTipsVisible(True)
        self.checks: dict[str, QAction] = {}
        for name in LOSS_NAMES:
            act = menu.addAction(loss_short_title(name))
            act.setCheckable(True)
            act.setChecked(name in DEFAULT_LOSSES)
            act.setToolTip(loss_title(name))
            act.toggled.connect(self._losses_changed)
            self.checks[name] = act
        self.losses_button.setMenu(menu)
        self._losses_changed()
        self.run_button = QPushButton("Compare")
        self.run_button.setToolTip("Fit the data under every ticked loss")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        self.close_button = QPushButton("Close comparison")
        self.close_button.setToolTip("Remove the comparison curves and return to the single fit")
        self.copy_button = QPushButton("Copy table")
        self.copy_button.setToolTip("Copy the comparison as tab-separated text")
        self.copy_button.clicked.connect(self.copy)
        self.progress = QProgressBar()
        self.progress.setTextVisible(True)
        self.progress.setRange(0, 1)
        self.progress.setValue(0)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        for w in (self.losses_button, self.run_button, self.cancel_button, self.progress,
                  self.copy_button, self.close_button):
            row.addWidget(w)
        lay.addLayout(row)
        lay.addWidget(self.status)
        self.leverage_note = QLabel("")
        self.leverage_note.setWordWrap(True)
        self.leverage_note.setTextFormat(Qt.PlainText)
        self.leverage_note.setStyleSheet("color: #3f1a6b; background: #efe6fa; padding: 4px;")
        self.leverage_note.setVisible(False)
        lay.addWidget(self.leverage_note)

        split = QSplitter(Qt.Horizontal)
        split.setChildrenCollapsible(False)
        left = QWidget()
        left_lay = QVBoxLayout(left)
        left_lay.setContentsMargins(0, 0, 0, 0)
        self.table = QTableWidget(0, 0)
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.verticalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.setMinimumHeight(60)
        left_lay.addWidget(self.table, 1)
        self.legend_note = QLabel(
            "<span style='background:#ffddd6'>&nbsp;<b>shaded</b>&nbsp;</span>: differs from another "
            f"loss by {html.escape(DIFFERENCE_RULE)}. Hover for the pairs.")
        self.legend_note.setWordWrap(True)
        left_lay.addWidget(self.legend_note)
        left_lay.addStretch(0)
        split.addWidget(left)
        self.adaptive = AdaptivePanel()
        side = QScrollArea()  # the suggestion scrolls in a short tab, never pushes the plot
        side.setWidgetResizable(True)
        side.setFrameShape(QFrame.NoFrame)
        side.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)
        side.setWidget(self.adaptive)
        split.addWidget(side)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        lay.addWidget(split, 1)
        self.split = split

        self.run_button.clicked.connect(self.run)
        self.cancel_button.clicked.connect(self.cancel)
        self.close_button.clicked.connect(self.close_comparison)
        document.subscribe(self._on_document)
        if hasattr(plot, "axes_changed"):
            plot.axes_changed.connect(self._draw_curves)

    # ------------------------------------------------------------------ running
    def _losses_changed(self, *_):
        n = sum(a.isChecked() for a in self.checks.values())
        self.losses_button.setText(f"Losses: {n} of {len(self.checks)}")

    def chosen_losses(self) -> tuple[str, ...]:
        return tuple(n for n, cb in self.checks.items() if cb.isChecked())

    def run(self) -> bool:
        """Start a comparison of the ticked losses (False when it cannot start)."""
        doc = self.document
        if not doc.has_data:
            self.status.setText("No data: open a file or a sample set first.")
            return False
        losses = self.chosen_losses()
        if not losses:
            self.status.setText("Tick at least one loss.")
            return False
        req = comparison_request(doc, losses)
        self._pending_generation = req["generation"]
        self._n_losses = len(losses)
        self.progress.setRange(0, 0)  # busy until the first progress report
        self.run_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.status.setText(f"Fitting {len(losses)} loss{'' if len(losses) == 1 else 'es'}...")
        self.job.submit("compare", req)
        return True

    def cancel(self):
        if self.job.running:
            self.status.setText("Cancelling...")
            self.job.cancel()

    def _idle(self):
        self.run_button.setEnabled(True)
        self.cancel_button.setEnabled(False)
        self.progress.setRange(0, 1)
        self.progress.setValue(0)

    def _on_progress(self, done, total):
        if total > 0:
            self.progress.setRange(0, total)
            self.progress.setValue(min(done, total))
            self.progress.setFormat(progress_text(done, total, getattr(self, "_n_losses", total)))

    def _on_failed(self, message):
        self._idle()
        self.status.setText(f"The comparison failed: {message}. The previous view is kept.")

    def _on_cancelled(self, partial):
        self._idle()
        self.status.setText("Comparison cancelled; nothing was changed.")

    def _on_finished(self, out):
        self._idle()
        cmp, reading, reading_err, lev_note = out
        if getattr(cmp, "cancelled", False):
            self._on_cancelled(cmp)
            return
        self.comparison = cmp
        self.reading = reading
        self.generation = self._pending_generation
        self._fill_table()
        self._fit_split()
        QTimer.singleShot(0, self._fit_split)  # again once the columns are laid out
        self._draw_curves()
        self.leverage_note.setText(("Agreement between the losses does not clear these points. "
                                    + lev_note) if lev_note else "")
        self.leverage_note.setVisible(bool(lev_note))
        if reading is not None:
            self.adaptive.show_reading(reading)
        else:
            self.adaptive.clear(f"No adaptive reading: {reading_err}" if reading_err else
                                "No adaptive reading.")
        errs = getattr(cmp, "errors", {}) or {}
        nl = len(cmp.results)
        msg = f"Compared {nl} loss{'' if nl == 1 else 'es'} in {self.job.seconds:.2f} s."
        if errs:
            msg += " Failed: " + "; ".join(f"{k}: {v}" for k, v in errs.items())
        self.status.setText(msg)
        self.shown.emit()

    # ------------------------------------------------------------------ showing
    def _ok_results(self):
        cmp = self.comparison
        if cmp is None:
            return {}
        return {k: r for k, r in cmp.results.items() if r is not None}

    def differing(self) -> dict[tuple[str, str], list[tuple[str, float, float]]]:
        """``(param, loss) -> [(other loss, delta, combined u)]`` over the flagged pairs."""
        out: dict = {}
        cmp = self.comparison
        if cmp is None:
            return out
        for param, a, b, delta, cu in cmp.differences():
            out.setdefault((param, a), []).append((b, float(delta), float(cu)))
            out.setdefault((param, b), []).append((a, -float(delta), float(cu)))
        return out

    def _fill_table(self):
        cmp = self.comparison
        losses = list(cmp.results)
        ok = self._ok_results()
        names: list[str] = []
        for r in ok.values():
            for n in r.param_names:
                if n not in names:
                    names.append(n)
        extra = ["scale", "alpha", "n down-weighted", "converged"]
        self.table.clear()
        self.table.setRowCount(len(names) + len(extra))
        self.table.setColumnCount(len(losses))
        self.table.setHorizontalHeaderLabels([loss_short_title(n) for n in losses])
        self.table.setVerticalHeaderLabels(names + extra)
        for c, loss in enumerate(losses):
            hdr = self.table.horizontalHeaderItem(c)
            hdr.setForeground(QBrush(QColor(*_pen_of(loss)[0])))
            hdr.setData(VALUE_ROLE, loss)
            hdr.setToolTip(loss_title(loss))
        flagged = self.differing()
        bold = QFont()
        bold.setBold(True)
        for c, loss in enumerate(losses):
            r = cmp.results[loss]
            if r is None:
                err = (getattr(cmp, "errors", {}) or {}).get(loss, "the fit failed")
                for row in range(len(names) + len(extra)):
                    it = QTableWidgetItem("failed" if row == 0 else "")
                    it.setForeground(FAIL_FG)
                    it.setToolTip(str(err))
                    self.table.setItem(row, c, it)
                continue
            for row, n in enumerate(names):
                if n not in r.param_names:
                    self.table.setItem(row, c, QTableWidgetItem(""))
                    continue
                k = r.param_names.index(n)
                v, u = float(r.values[k]), float(r.stderr[k])
                it = QTableWidgetItem(fmt_value(v, u) + (" (held)" if n in r.fixed else ""))
                it.setData(VALUE_ROLE, (v, u))
                it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                pairs = flagged.get((n, loss))
                if pairs:
                    it.setBackground(DIFF_BG)
                    it.setFont(bold)
                    it.setToolTip(f"Differs by more than {DIFFERENCE_FACTOR:g} combined standard "
                                  "uncertainties from:\n" +
                                  "\n".join(f"  {loss_short_title(o)}: {d:+.4g} ({abs(d) / cu:.2g} combined u)"
                                            if cu > 0 else f"  {loss_short_title(o)}: {d:+.4g}"
                                            for o, d, cu in pairs))
                self.table.setItem(row, c, it)
            base = len(names)
            cells = [
                (f"{r.scale:.4g}", r.scale),
                ("-" if r.alpha is None else f"{r.alpha:.3g}", r.alpha),
                (str(r.n_downweighted), r.n_downweighted),
                ("yes" if r.converged else "NO", r.converged),
            ]
            for j, (text, raw) in enumerate(cells):
                it = QTableWidgetItem(text)
                it.setData(VALUE_ROLE, raw)
                it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                if j == 3 and not r.converged:
                    it.setForeground(FAIL_FG)
                    it.setToolTip(str(r.message))
                self.table.setItem(base + j, c, it)

    def _fit_split(self):
        """Give the table the width its columns need (the suggestion keeps at least 240 px)."""
        t = self.table
        t.resizeColumnsToContents()
        need = (t.verticalHeader().width() + t.horizontalHeader().length() + 2 * t.frameWidth()
                + t.verticalScrollBar().sizeHint().width() + 4)
        # no taller than its rows: the rule under it stays in view
        rows = sum(t.rowHeight(r) for r in range(t.rowCount()))
        t.setMaximumHeight(max(60, rows + t.horizontalHeader().height() + 2 * t.frameWidth()
                               + t.horizontalScrollBar().sizeHint().height()))
        total = sum(self.split.sizes())
        if total > 0:
            left = min(need, max(total - 240, total // 2))
            self.split.setSizes([left, total - left])

    def _draw_curves(self):
        self._remove_curves()
        ok = self._ok_results()
        if not ok:
            return
        plot = self.plot
        m = self.document.measurements
        grid = curve_grid(m.x, log_x=plot.log_x)
        if grid.size == 0:
            return
        stale = self.generation != self.document.generation
        key = []
        for loss, r in ok.items():
            with np.errstate(all="ignore"):
                try:
                    yhat = np.asarray(r.predict(grid), float)
                except Exception:  # a curve that cannot be evaluated: not drawn, logged
                    log.debug("comparison curve of %s not drawn", loss, exc_info=True)
                    continue
            good = np.isfinite(yhat)
            pen = loss_pen(loss)
            if stale:
                pen.setColor(QColor(150, 150, 150))
            curve = pg.PlotCurveItem(plot.to_view_x(grid[good]), plot.to_view_y(yhat[good]), pen=pen)
            curve.setZValue(5)
            plot.data_plot.addItem(curve, ignoreBounds=True)
            self.curves[loss] = curve
            key.append((key_symbol(loss), loss_short_title(loss)))
        if hasattr(plot, "set_key"):
            plot.set_key(curves=key)
        if hasattr(plot, "set_single_fit_visible"):
            plot.set_single_fit_visible(False)

    def _remove_curves(self):
        for c in self.curves.values():
            self.plot.data_plot.removeItem(c)
        self.curves = {}
        if hasattr(self.plot, "set_key"):
            self.plot.set_key(curves=[])

    def close_comparison(self):
        """Remove the comparison and bring back the single fit."""
        self.job.cancel()
        self._remove_curves()
        self.comparison = None
        self.reading = None
        self.table.clear()
        self.table.setRowCount(0)
        self.table.setColumnCount(0)
        self.adaptive.clear()
        self.status.setText("")
        self.leverage_note.setText("")
        self.leverage_note.setVisible(False)
        if hasattr(self.plot, "set_single_fit_visible"):
            self.plot.set_single_fit_visible(True)
        self.closed.emit()

    @property
    def is_stale(self) -> bool:
        return self.comparison is not None and self.generation != self.document.generation

    def _on_document(self, event, **info):
        if event == "data":
            self.close_comparison()
        elif event in ("mask", "settings") and self.comparison is not None:
            self.status.setText("The data or method changed since this comparison "
                                "(curves in grey): press Compare to bring it up to date.")
            self._draw_curves()
            for r in range(self.table.rowCount()):
                for c in range(self.table.columnCount()):
                    it = self.table.item(r, c)
                    if it is not None:
                        it.setForeground(Qt.gray)

    def copy(self) -> str:
        """Put :meth:`text` on the clipboard (returns it)."""
        from PySide6.QtGui import QGuiApplication

        text = self.text()
        if text:
            reading = self.reading.text if self.reading is not None else ""
            QGuiApplication.clipboard().setText(text + (f"\n\n{reading}" if reading else ""))
        return text

    def text(self) -> str:
        """The comparison table as tab-separated text (for copying and the report):
        :meth:`fitcore.compare.LossComparison.text_rows`, the same cells as the table."""
        if self.comparison is None or self.table.columnCount() == 0:
            return ""
        return "\n".join("\t".join(row) for row in self.comparison.text_rows())
