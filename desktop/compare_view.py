"""Loss comparison and the adaptive suggestion.

The loss comparison fits the document's data and model under several losses in one
action (``fitcore.compare.compare_losses``) in a background job, overlays one curve
per loss in the data plot with a legend, and lists the estimates side by side with
their standard uncertainties, the scale, alpha and the number of down-weighted
points. Estimates that differ between two losses by more than their combined
standard uncertainty are highlighted (the pairs come from ``cmp.differences()``).

The adaptive suggestion shows the fitted shape alpha of the adaptive loss with its
uncertainty, the profile negative log-likelihood over alpha in [0, 2] as a small
plot, and the plain-language reading (``fitcore.compare.adaptive_reading``).

Closing the comparison removes the overlays and brings back the single fit.
"""
from __future__ import annotations

import html

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QBrush, QColor, QFont
from PySide6.QtWidgets import (
    QCheckBox, QDockWidget, QGridLayout, QGroupBox, QHBoxLayout, QHeaderView, QLabel,
    QProgressBar, QPushButton, QSplitter, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget,
)

from fitcore.compare import DEFAULT_LOSSES
from fitcore.compare import FIT_KWARGS as COMPARE_OPTIONS
from fitcore.losses import LOSS_NAMES, LOSSES, loss_short_title, loss_title
from fitcore.work import curve_grid

from .document import Document
from .estimates_view import fmt_value
from .job_kinds import run_here
from .jobs import Channel

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
            "losses": tuple(losses), "generation": req["generation"]}


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


def shift_note(reading) -> str:
    """The change from least squares to the adaptive fit in each fit's own standard
    uncertainty, for the parameter that moves most by the adaptive fit's u.

    ``fitcore.compare``'s reading divides the change by the combined uncertainty
    ``sqrt(u_LS^2 + u_robust^2)``, which the larger (often the least-squares) u
    dominates; this note states the other yardsticks beside it. "" when there is
    nothing to compare (least squares failed, no free parameter)."""
    fits = getattr(reading, "fits", None) or {}
    l2, ad = fits.get("l2"), fits.get("adaptive")
    if l2 is None or ad is None:
        return ""
    best = None
    for j, name in enumerate(ad.param_names):
        if name in ad.fixed or name not in l2.param_names:
            continue
        k = l2.param_names.index(name)
        d = float(ad.values[j]) - float(l2.values[k])
        u_ad, u_l2 = float(ad.stderr[j]), float(l2.stderr[k])
        if not (np.isfinite(d) and np.isfinite(u_ad) and np.isfinite(u_l2)
                and u_ad > 0 and u_l2 > 0):
            continue
        key = abs(d) / u_ad
        if best is None or key > best[0]:
            best = (key, name, abs(d) / u_l2, abs(d) / float(np.hypot(u_ad, u_l2)))
    if best is None:
        return ""
    in_ad, name, in_l2, in_both = best
    return (f"In the adaptive fit's own standard uncertainty {name} moves by {in_ad:.2g} u "
            f"(by {in_l2:.2g} u of the least-squares fit; {in_both:.2g} of the two combined, "
            f"the yardstick above).")


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
        lay.addWidget(self.alpha_label)
        self.plot = pg.PlotWidget(background="w")
        self.plot.setMinimumHeight(120)
        self.plot.setMaximumHeight(170)
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
        lay.addWidget(self.plot)
        self.reading = QLabel("")
        self.reading.setWordWrap(True)
        self.reading.setTextInteractionFlags(Qt.TextSelectableByMouse)
        lay.addWidget(self.reading)
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
        note = shift_note(reading)
        if note:
            text += f"<br>{html.escape(note)}"
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
        self.legend = None

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        box = QGroupBox("Losses to compare")
        grid = QGridLayout(box)
        grid.setContentsMargins(6, 4, 6, 4)
        self.checks: dict[str, QCheckBox] = {}
        for k, name in enumerate(LOSS_NAMES):
            cb = QCheckBox(loss_short_title(name))
            cb.setChecked(name in DEFAULT_LOSSES)
            cb.setToolTip(loss_title(name))
            self.checks[name] = cb
            grid.addWidget(cb, k // 5, k % 5)
        grid.setHorizontalSpacing(14)
        lay.addWidget(box)
        row = QHBoxLayout()
        self.run_button = QPushButton("Compare")
        self.run_button.setToolTip("Fit the data under every ticked loss")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        self.close_button = QPushButton("Close comparison")
        self.close_button.setToolTip("Remove the comparison curves and return to the single fit")
        self.progress = QProgressBar()
        self.progress.setTextVisible(True)
        self.progress.setRange(0, 1)
        self.progress.setValue(0)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        for w in (self.run_button, self.cancel_button, self.progress, self.close_button):
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
        left = QWidget()
        left_lay = QVBoxLayout(left)
        left_lay.setContentsMargins(0, 0, 0, 0)
        self.table = QTableWidget(0, 0)
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.verticalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        left_lay.addWidget(self.table, 1)
        foot = QHBoxLayout()
        self.legend_note = QLabel("<span style='background:#ffddd6'>&nbsp;bold, shaded&nbsp;</span>: "
                                  "differs from another loss by more than the combined standard "
                                  "uncertainty (hover for the pairs)")
        self.legend_note.setWordWrap(True)
        self.copy_button = QPushButton("Copy table")
        self.copy_button.setToolTip("Copy the comparison as tab-separated text")
        self.copy_button.clicked.connect(self.copy)
        foot.addWidget(self.legend_note, 1)
        foot.addWidget(self.copy_button)
        left_lay.addLayout(foot)
        split.addWidget(left)
        self.adaptive = AdaptivePanel()
        split.addWidget(self.adaptive)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        lay.addWidget(split, 1)

        self.run_button.clicked.connect(self.run)
        self.cancel_button.clicked.connect(self.cancel)
        self.close_button.clicked.connect(self.close_comparison)
        document.subscribe(self._on_document)
        if hasattr(plot, "axes_changed"):
            plot.axes_changed.connect(self._draw_curves)

    # ------------------------------------------------------------------ running
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
                    it.setToolTip("Differs by more than the combined standard uncertainty from:\n" +
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
        self.legend = pg.LegendItem(offset=(-10, 10), labelTextColor=(30, 30, 30),
                                    brush=pg.mkBrush(255, 255, 255, 215), pen=pg.mkPen(160, 160, 160))
        self.legend.setParentItem(plot.data_plot.vb)
        for loss, r in ok.items():
            with np.errstate(all="ignore"):
                try:
                    yhat = np.asarray(r.predict(grid), float)
                except Exception:  # noqa: BLE001 - a curve that cannot be evaluated
                    continue
            good = np.isfinite(yhat)
            pen = loss_pen(loss)
            if stale:
                pen.setColor(QColor(150, 150, 150))
            curve = pg.PlotCurveItem(plot._tx(grid[good]), plot._ty(yhat[good]), pen=pen)
            curve.setZValue(5)
            plot.data_plot.addItem(curve, ignoreBounds=True)
            self.curves[loss] = curve
            self.legend.addItem(curve, loss_short_title(loss))
        if hasattr(plot, "set_single_fit_visible"):
            plot.set_single_fit_visible(False)

    def _remove_curves(self):
        for c in self.curves.values():
            self.plot.data_plot.removeItem(c)
        self.curves = {}
        if self.legend is not None:
            sc = self.legend.scene()
            if sc is not None:
                sc.removeItem(self.legend)
            self.legend = None

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
            note = shift_note(self.reading) if self.reading is not None else ""
            reading = f"{reading} {note}" if note else reading
            QGuiApplication.clipboard().setText(text + (f"\n\n{reading}" if reading else ""))
        return text

    def text(self) -> str:
        """The comparison table as tab-separated text (for copying)."""
        t = self.table
        if t.columnCount() == 0:
            return ""
        rows = ["\t" + "\t".join(t.horizontalHeaderItem(c).text() for c in range(t.columnCount()))]
        for r in range(t.rowCount()):
            cells = [t.verticalHeaderItem(r).text()]
            cells += [(t.item(r, c).text() if t.item(r, c) else "") for c in range(t.columnCount())]
            rows.append("\t".join(cells))
        return "\n".join(rows)


class CompareDock(QDockWidget):
    """Dock holding the :class:`CompareView`; closing it closes the comparison."""

    def __init__(self, document: Document, plot, parent=None):
        super().__init__("Loss comparison", parent)
        self.setObjectName("loss_comparison_dock")
        self.view = CompareView(document, plot, self)
        self.setWidget(self.view)
        self.view.closed.connect(self._closed_by_view)

    def _closed_by_view(self):
        if self.isVisible():
            self.hide()

    def closeEvent(self, ev):
        if self.view.comparison is not None or self.view.curves or self.view.job.running:
            self.view.close_comparison()
        super().closeEvent(ev)
