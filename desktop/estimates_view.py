"""The estimates view: parameters with standard uncertainty and confidence interval.

Below the parameters it lists n used / excluded / down-weighted, the scale, alpha,
degrees of freedom, the convergence state and the covariance recipe; the correlation
matrix is shown on demand. :func:`estimates_plain_text` is what "Copy estimates" puts
on the clipboard.
"""
from __future__ import annotations

import html

import numpy as np
from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QHBoxLayout, QHeaderView, QLabel, QPushButton, QTableWidget, QTableWidgetItem,
    QVBoxLayout, QWidget,
)

from fitcore.report import (
    CAUTION,
    DataRecord,
    alpha_text,
    convergence_text,
    estimate_cells,
    estimates_text,
    format_interval,
    format_uncertainty,
    format_value,
    loss_label,
    resolve_unit,
    scale_text,
)
from fitcore.report_text import HELD_NOTE

from .document import Document
from .job_kinds import WINDOW_LEVEL

#: the one caution text (fitcore.report.CAUTION), re-exported for the window's widgets
__all__ = ["CAUTION", "EstimatesView", "fmt_value", "estimates_plain_text"]
LEVEL = WINDOW_LEVEL


def fmt_value(value: float, u: float, *, held: bool = False, rich=False) -> str:
    """``value(u)`` rounded GUM style (``fitcore.format_value``); a value it refuses is
    an error, never quietly printed another way."""
    return format_value(value, u, style="paren", held=held, rich=rich)


def interval_text(lo: float, hi: float, value: float, u: float) -> str:
    """``[lo, hi]`` by the one interval rule (``fitcore.report.format_interval``): the
    limits to the last decimal of the rounded estimate beside them, in its notation."""
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return ""
    return format_interval(lo, hi, value, u)


def unc_text(value: float, u: float) -> str:
    """The standard uncertainty column: two significant digits at the decimal and with
    the power of ten of the rounded estimate (``fitcore.report.format_uncertainty``)."""
    return format_uncertainty(value, u)


def unit_of(expr: str, x_unit: str, y_unit: str) -> str:
    """Turn a model's unit expression ("y/x", "1/x", "x") into real units, exactly as
    the copied text and the report do (``fitcore.report.resolve_unit``)."""
    return resolve_unit(expr, x_unit, y_unit)


def summary_lines(res, y_unit: str = "") -> list[tuple[str, str]]:
    """(label, text) pairs describing how the fit was made (the loss by its title and
    the scale with its unit, as the copied text states them). The shape alpha has a
    line only under the losses that have one (the general and the adaptive loss)."""
    def g(name, default=None):
        return getattr(res, name, default)

    alpha = g("alpha")
    lines = [
        ("loss", loss_label(res, shape=False)),  # the shape has its own line below
        ("n used", str(g("n_used", ""))),
        ("n excluded", str(g("n_excluded", ""))),
        ("n down-weighted (w < 0.5)", str(g("n_downweighted", ""))),
        ("scale", scale_text(res, y_unit)),
        ("alpha", None if alpha is None else alpha_text(res)),  # only losses with a shape
        ("degrees of freedom", str(g("dof", ""))),
        ("converged", convergence_text(res)),
        ("covariance", str(g("covariance_recipe", ""))),
    ]
    if g("fixed"):
        lines.append(("held", HELD_NOTE.removeprefix("; ")))  # the report's words
    return [(label, text) for label, text in lines if text is not None]


def estimates_plain_text(res, x_unit: str = "", y_unit: str = "", reasons=None,
                         data: DataRecord | None = None) -> str:
    """Plain-text estimates for the clipboard (``fitcore.report.estimates_text``);
    ``reasons`` (point index -> the analyst's reason) lists why points were excluded,
    ``data`` where the data came from."""
    return estimates_text(res, "plain", level=LEVEL, x_unit=x_unit, y_unit=y_unit,
                          reasons=reasons, data=data)


class EstimatesView(QWidget):
    """Parameters table + fit summary + correlation matrix (on demand)."""

    def __init__(self, document: Document, parent=None):
        super().__init__(parent)
        self.document = document
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 4, 2, 4)  # narrow: every column fits at 1400 px
        self.banner = QLabel("")
        self.banner.setWordWrap(True)
        self.banner.setStyleSheet("color: #b42318; font-weight: bold;")
        lay.addWidget(self.banner)
        self.table = QTableWidget(0, 5)
        self.table.setHorizontalHeaderLabels(
            ["parameter", "estimate", "std. unc.", f"{int(LEVEL * 100)}% interval", "unit"])
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.setWordWrap(False)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        lay.addWidget(self.table, 2)
        self.summary = QLabel("")
        self.summary.setTextInteractionFlags(Qt.TextSelectableByMouse)
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        row = QHBoxLayout()
        self.corr_button = QPushButton("Correlation matrix")
        self.corr_button.setCheckable(True)
        self.copy_button = QPushButton("Copy estimates")
        row.addWidget(self.corr_button)
        row.addWidget(self.copy_button)
        row.addStretch(1)
        lay.addLayout(row)
        self.corr_table = QTableWidget(0, 0)
        self.corr_table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.corr_table.setVisible(False)
        lay.addWidget(self.corr_table, 1)
        caution = QLabel(CAUTION)
        caution.setWordWrap(True)
        caution.setStyleSheet("color: #6b4e00; background: #fff6d6; padding: 4px;")
        lay.addWidget(caution)
        self.corr_button.toggled.connect(self._show_corr)
        #: callable giving the data record (file, SHA-256, reading notes) of the copies;
        #: the window's report exporter sets it (it knows the file's hash)
        self.data_source = None
        self._shown = None  # the result whose cells are on screen
        self._shown_stale = False
        document.subscribe(self._on_document)
        self.refresh()

    def _on_document(self, event, **info):
        # An exclusion or a method change only makes the shown result stale: grey the
        # cells and say so (cheap). The cells are rebuilt once, when a new result
        # arrives; a failed refit keeps the same result object and is only re-marked.
        if event == "result":
            self.refresh(force=False)
        elif event in ("mask", "settings"):
            self._mark()
        elif event == "data":
            self.refresh()

    def _show_corr(self, on: bool):
        self.corr_table.setVisible(on)
        self.refresh()

    def _banner(self) -> None:
        doc = self.document
        res = doc.result
        if doc.stale and res is not None:
            text = (f"Stale: the previous result is shown. {doc.fit_message}"
                    if doc.fit_failed else "Stale: refitting...")
        elif res is None and doc.fit_message:
            text = f"The fit failed: {doc.fit_message}"
        else:
            text = ""
        if text != self.banner.text():
            self.banner.setText(text)

    def _mark(self) -> None:
        """Banner and cell colour for the current stale state, without rebuilding cells."""
        self._banner()
        if self.document.result is not self._shown:
            self.refresh()
            return
        stale = bool(self.document.stale)
        if stale == self._shown_stale:
            return
        self._shown_stale = stale
        colour = Qt.gray if stale else self.table.palette().text()
        for r in range(self.table.rowCount()):
            for c in range(self.table.columnCount()):
                it = self.table.item(r, c)
                if it is not None:
                    it.setForeground(colour)

    def refresh(self, force: bool = True):
        """Rebuild the cells (``force=False``: only when the result object is new)."""
        doc = self.document
        res = doc.result
        if not force and res is not None and res is self._shown:
            self._mark()
            return
        self._banner()
        self._shown = res
        self._shown_stale = bool(doc.stale)
        if res is None:
            self.table.setRowCount(0)
            self.summary.setText("No fit yet." if doc.has_data else "No data: open a file or a sample set.")
            self.corr_table.setRowCount(0)
            return
        m = doc.measurements
        cells = estimate_cells(res, LEVEL, x_unit=m.x_unit, y_unit=m.y_unit)
        self.table.setRowCount(len(cells))
        for r, c in enumerate(cells):
            texts = [c["name"], c["estimate"], c["uncertainty"], c["interval"], c["unit"]]
            for col, text in enumerate(texts):
                it = QTableWidgetItem(text)
                if col in (1, 2, 3):
                    it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                if doc.stale:
                    it.setForeground(Qt.gray)
                self.table.setItem(r, col, it)
        text = "<br>".join(f"<b>{html.escape(a)}</b>: {html.escape(b)}"
                           for a, b in summary_lines(res, m.y_unit))
        warnings = getattr(res, "warnings", ())
        if warnings:
            # signs that this converged fit should not be trusted as it stands
            text += "".join(f'<br><span style="color:#b35900"><b>warning</b>: {html.escape(w)}</span>'
                            for w in warnings)
        self.summary.setText(text)
        if self.corr_table.isVisible():
            R = res.correlation
            k = len(res.param_names)
            self.corr_table.setRowCount(k)
            self.corr_table.setColumnCount(k)
            self.corr_table.setHorizontalHeaderLabels(list(res.param_names))
            self.corr_table.setVerticalHeaderLabels(list(res.param_names))
            for i in range(k):
                for j in range(k):
                    v = R[i, j]
                    self.corr_table.setItem(i, j, QTableWidgetItem("" if not np.isfinite(v) else f"{v:+.3f}"))

    def plain_text(self) -> str:
        res = self.document.result
        if res is None:
            return ""
        m = self.document.measurements
        reasons = {i: r for i, r, _t in self.document.exclusion_record()}
        data = self.data_source() if self.data_source is not None else DataRecord.from_data(m)
        return estimates_plain_text(res, m.x_unit, m.y_unit, reasons, data=data)
