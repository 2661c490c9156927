"""Point diagnostics in the window: table columns, plot colouring, high-leverage flags.

:class:`DiagnosticsController` computes ``fitcore.diagnostics.point_diagnostics`` for
the document's current result in a background job whenever diagnostics are switched
on and a new result arrives (a newer result supersedes a running computation). It
then

* adds columns to the points table: leverage, standardised residual, the largest
  influence and the influence on each parameter (change of the parameter, in its
  standard uncertainties, when that point alone is excluded). The header tooltips and
  the note name the method (exact refits, or the one-step approximation for large n);
* flags high-leverage points: highlighted cells in the table, a square marker in the
  plot with an entry in the key above the plot (never over the data), and a note in the
  estimates area that robust losses do not protect against them;
* optionally colours the used points in the plot by leverage or by influence, with a
  colour bar under the plots; the key above the plot then says what the colour shows.
"""
from __future__ import annotations

import time

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QObject, Qt, QTimer, Signal
from PySide6.QtGui import QColor
from PySide6.QtWidgets import QLabel

from .document import Document
from .job_kinds import run_here
from .jobs import Channel
from .points_model import ExtraColumn

#: our own colour ramp for the plot colouring (pale sand -> amber -> brick -> plum)
RAMP = [(250, 240, 205), (240, 170, 70), (200, 70, 40), (100, 10, 70)]
N_BINS = 16
HIGH_LEV_COLOUR = (110, 40, 170)
COLOUR_MODES = ("none", "leverage", "influence")

HIGH_LEVERAGE_NOTE = ("High-leverage points (far out in x) can pull any fit, robust or not: "
                      "a robust loss down-weights large residuals, and a point with high "
                      "leverage drags the curve towards itself so that its residual stays "
                      "small. Check these points on their own merits.")


#: the key entry of the high-leverage marks
HIGH_LEVERAGE_KEY = "high leverage (robust losses do not protect)"


def ramp_colormap() -> pg.ColorMap:
    return pg.ColorMap(np.linspace(0.0, 1.0, len(RAMP)), [QColor(*c) for c in RAMP])


def _method_label(d) -> str:
    """Short name of the influence method: "exact refits", "one-step" or "mixed"."""
    exact = np.asarray(getattr(d, "exact", []), bool)
    lev = np.asarray(d.leverage, float)
    used = np.isfinite(lev)
    if exact.size == lev.size and used.any():
        if exact[used].all():
            return "exact refits"
        if not exact[used].any():
            return "one-step"
        return "mixed"
    m = str(getattr(d, "method", "") or "").lower()
    return "one-step" if "step" in m else ("exact refits" if "exact" in m else "?")


def diagnostic_columns(d, param_names, free=None) -> list[ExtraColumn]:
    """The table columns for one diagnostics object."""
    lev = np.asarray(d.leverage, float)
    std = np.asarray(d.std_residuals, float)
    infl = np.asarray(d.influence, float)
    if infl.ndim == 1:
        infl = infl[:, None]
    high = np.asarray(getattr(d, "high_leverage", np.zeros(lev.size, bool)), bool)
    method = _method_label(d)
    worst = getattr(d, "max_influence", None)
    if worst is None:
        with np.errstate(all="ignore"):
            absinf = np.abs(infl)
            any_ok = np.isfinite(absinf).any(axis=1)
            worst = np.where(any_ok, np.nanmax(np.where(np.isfinite(absinf), absinf, -1.0), axis=1),
                             np.nan)
    worst = np.asarray(worst, float)
    full_method = str(getattr(d, "method", "") or method)
    short = "refits" if method == "exact refits" else method
    flag_tip = "High leverage: " + HIGH_LEVERAGE_NOTE
    cols = [
        ExtraColumn("leverage", lev, "{:.4f}",
                    "Leverage (hat value; J-based for nonlinear models). Points far out in x "
                    "have high leverage.", high, flag_tip),
        ExtraColumn("stud. residual", std, "{:.3f}",
                    "Standardised residual corrected for leverage, u / sqrt(1 - h) (for least "
                    "squares the internally studentised residual)", None),
        ExtraColumn(f"max |infl.| ({short})", worst, "{:.3f}",
                    f"Largest change of any parameter, in its standard uncertainties, when this "
                    f"point alone is excluded. Method: {full_method}", None),
    ]
    for k, name in enumerate(param_names):
        if free is not None and k < len(free) and not free[k]:
            continue
        if k >= infl.shape[1]:
            break
        cols.append(ExtraColumn(f"infl. {name}", infl[:, k], "{:+.3f}",
                                f"Change of {name}, in standard uncertainties of {name}, when this "
                                f"point alone is excluded. Method: {full_method}", None))
    return cols


def run_diagnostics(res, progress=None, cancel=None, exact_limit: int = 500,
                    use_child: bool | None = None):
    """``fitcore.diagnostics.point_diagnostics(res)``, here and now (the "diagnostics" job).

    The exact refits (up to ``exact_limit`` used points) run in a child process this
    thread waits for, so the window keeps its GIL; the one-step approximation for
    larger data is a few vectorised numpy calls and runs here (see
    :mod:`desktop.job_kinds`). The window submits the same job to its channel.
    """
    where = None if use_child is None else ("process" if use_child else "thread")
    return run_here("diagnostics", {"result": res, "exact_limit": int(exact_limit)}, progress, cancel,
                    where=where)


class DiagnosticsController(QObject):
    """Keeps point diagnostics of the current result and shows them.

    Parameters
    ----------
    document, points_model, plot
        The window's document, points table model and plot view.
    note_label
        A label (in the estimates area) that receives the method and high-leverage note.
    """

    #: new diagnostics are shown (or they were cleared)
    changed = Signal()
    #: progress of the background computation (done, total)
    progress = Signal(int, int)
    busy_changed = Signal(bool)

    def __init__(self, document: Document, points_model, plot, note_label: QLabel | None = None,
                 parent=None, exact_limit: int = 500):
        super().__init__(parent)
        self.document = document
        self.points_model = points_model
        self.plot = plot
        self.note_label = note_label
        if note_label is not None:
            note_label.setTextFormat(Qt.PlainText)
        self.exact_limit = int(exact_limit)
        self.enabled = False
        self.colour_mode = "none"
        self.diagnostics = None
        self.for_result = None
        self.message = ""
        self.job = Channel(self)
        self.job.finished.connect(self._on_finished)
        self.job.failed.connect(self._on_failed)
        self.job.cancelled.connect(lambda _r: None)
        self.job.progress.connect(self.progress)
        self.job.busy_changed.connect(self.busy_changed)
        self._job_result = None
        # a burst of refits (clicking through points) starts one computation, not ten
        self._debounce = QTimer(self)
        self._debounce.setSingleShot(True)
        self._debounce.setInterval(200)
        self._debounce.timeout.connect(self.refresh)
        self._colour_item = None
        self._colour_bar = None
        self._lev_item = None
        document.subscribe(self._on_document)
        if hasattr(plot, "axes_changed"):
            plot.axes_changed.connect(self._draw_plot)

    # ------------------------------------------------------------ switching
    def set_enabled(self, on: bool) -> None:
        """Show (and keep computing) the diagnostics, or remove them."""
        self.enabled = bool(on)
        if self.enabled:
            self.refresh()
        else:
            self.job.cancel()
            self._clear()

    def set_colour_mode(self, mode: str) -> None:
        """Colour the plot's used points by "leverage", "influence", or "none"."""
        if mode not in COLOUR_MODES:
            raise ValueError(f"colour mode must be one of {', '.join(COLOUR_MODES)}")
        self.colour_mode = mode
        if mode != "none" and not self.enabled:
            self.set_enabled(True)
        self._draw_plot()

    def refresh(self) -> None:
        """Compute diagnostics for the current result (in the background)."""
        res = self.document.result
        if not self.enabled:
            return
        if res is None:
            self._clear("No fit yet.")
            return
        if res is self.for_result and self.diagnostics is not None:
            self._show()
            return
        self._job_result = res
        self._set_note("Computing point diagnostics...")
        self.job.submit("diagnostics", {"result": res, "exact_limit": self.exact_limit})

    def wait(self, timeout_ms: int = 60000) -> bool:
        """Process events until the diagnostics are up to date (tests and scripts)."""
        from PySide6.QtCore import QCoreApplication, QDeadlineTimer

        deadline = QDeadlineTimer(timeout_ms)
        while self._debounce.isActive():
            QCoreApplication.processEvents()
            time.sleep(0.005)
            if deadline.hasExpired():
                return False
        return self.job.wait(max(1, int(deadline.remainingTime())))

    # ------------------------------------------------------------ results
    def _on_document(self, event, **info):
        if not self.enabled:
            return
        if event == "result":
            if self.document.result is not self.for_result:
                self._set_note("Point diagnostics: updating for the new fit...")
                self._debounce.start()
        elif event in ("data",):
            self.job.cancel()
            self._clear()
        elif event in ("mask", "settings"):
            # the shown diagnostics belong to the previous result: say so until refitted
            if self.diagnostics is not None:
                self._set_note("Point diagnostics are for the previous fit; updating after the refit.")

    def _on_finished(self, d):
        if self._job_result is not self.document.result:
            return  # an older result; the newer one is on its way
        self.diagnostics = d
        self.for_result = self._job_result
        self.message = ""
        self._show()

    def _on_failed(self, message):
        self.message = message
        self._set_note(f"Point diagnostics failed: {message}")

    def _clear(self, note: str = ""):
        self.diagnostics = None
        self.for_result = None
        self.points_model.set_extra_columns([])
        self.points_model.set_row_flags(None)
        self._remove_plot_items()
        self._set_note(note)
        self.changed.emit()

    def _show(self):
        d, res = self.diagnostics, self.for_result
        if d is None or res is None:
            return
        self.points_model.set_extra_columns(diagnostic_columns(d, res.param_names, res.free))
        hi = np.asarray(getattr(d, "high_leverage", []), bool)
        self.points_model.set_row_flags(hi if hi.any() else None,
                                        "High leverage: " + HIGH_LEVERAGE_NOTE)
        self._draw_plot()
        self._set_note(self.note_text())
        self.changed.emit()

    def high_leverage_points(self) -> np.ndarray:
        """Indices of the flagged high-leverage points (empty when none or not computed)."""
        d = self.diagnostics
        if d is None:
            return np.zeros(0, np.intp)
        return np.flatnonzero(np.asarray(getattr(d, "high_leverage", []), bool))

    def note_text(self) -> str:
        """Plain text for the estimates area and the report (fitcore's wording; the
        high-leverage points named by their file rows)."""
        d = self.diagnostics
        if d is None:
            return ""
        return d.summary(rows=self.document.measurements.source_rows)

    def _set_note(self, text: str):
        if self.note_label is None:
            return
        hi = self.high_leverage_points()
        if text and hi.size:
            self.note_label.setStyleSheet("color: #3f1a6b; background: #efe6fa; padding: 4px;")
        else:
            self.note_label.setStyleSheet("color: #333; padding: 2px;")
        self.note_label.setText(text)
        self.note_label.setVisible(bool(text))

    # ------------------------------------------------------------ plot
    def colour_values(self) -> np.ndarray | None:
        d = self.diagnostics
        if d is None or self.colour_mode == "none":
            return None
        if self.colour_mode == "leverage":
            return np.asarray(d.leverage, float)
        if getattr(d, "max_influence", None) is not None:
            return np.asarray(d.max_influence, float)
        infl = np.abs(np.asarray(d.influence, float))
        if infl.ndim == 1:
            return infl
        with np.errstate(all="ignore"):
            return np.nanmax(np.where(np.isfinite(infl), infl, np.nan), axis=1)

    def _remove_plot_items(self):
        plot = self.plot
        for item in (self._colour_item, self._lev_item):
            if item is not None:
                plot.data_plot.removeItem(item)
        self._colour_item = self._lev_item = None
        if self._colour_bar is not None:
            plot.removeItem(self._colour_bar)
            self._colour_bar = None
        if hasattr(plot, "set_key"):
            plot.set_key(colour="", extra=[])

    def _draw_plot(self):
        self._remove_plot_items()
        d = self.diagnostics
        if d is None or not self.enabled:
            return
        plot = self.plot
        m = self.document.measurements
        if len(np.asarray(d.leverage)) != m.n:
            return
        px, py = plot.to_view_x(m.x), plot.to_view_y(m.y)
        used = ~self.document.excluded
        vals = self.colour_values()
        if vals is not None:
            ok = used & np.isfinite(vals) & np.isfinite(px) & np.isfinite(py)
            top = float(np.max(vals[ok])) if ok.any() else 1.0
            top = top if top > 0 else 1.0
            cmap = ramp_colormap()
            bins = np.clip((vals[ok] / top * (N_BINS - 1)).round().astype(int), 0, N_BINS - 1)
            table = cmap.getLookupTable(0.0, 1.0, N_BINS, alpha=False)
            brushes = [pg.mkBrush(*map(int, table[b])) for b in range(N_BINS)]
            edge = pg.mkPen(60, 60, 60, width=0.8)
            self._colour_item = pg.ScatterPlotItem(px[ok], py[ok], size=10, pen=edge,
                                                   brush=[brushes[b] for b in bins], symbol="o")
            self._colour_item.setZValue(8)
            plot.data_plot.addItem(self._colour_item)
            label = ("leverage" if self.colour_mode == "leverage"
                     else "influence")
            # under the plots, horizontal: a bar at the right took ~80 px of a narrow plot
            # and its tick labels were cut at the view's edge
            # (no axis title: the key above the plot says what the colour shows; plain
            # tick numbers, never an SI factor such as "x0.001")
            self._colour_bar = pg.ColorBarItem(values=(0.0, top), colorMap=cmap, width=12,
                                               interactive=False, orientation="horizontal",
                                               colorMapMenu=False, rounding=top / 100.0)
            self._colour_bar.axis.enableAutoSIPrefix(False)
            plot.addItem(self._colour_bar, row=2, col=0)
        hi = self.high_leverage_points()
        if hi.size:
            self._lev_item = pg.ScatterPlotItem(px[hi], py[hi], size=17, symbol="s",
                                                pen=pg.mkPen(*HIGH_LEV_COLOUR, width=2.2),
                                                brush=pg.mkBrush(None))
            self._lev_item.setZValue(9)
            plot.data_plot.addItem(self._lev_item)
        if hasattr(plot, "set_key"):
            extra = ([(f"<span style='color:{QColor(*HIGH_LEV_COLOUR).name()}'>&#9633;</span>",
                       HIGH_LEVERAGE_KEY)] if hi.size else [])
            plot.set_key(colour="" if vals is None else label, extra=extra)

    def shutdown(self):
        self.job.shutdown()
