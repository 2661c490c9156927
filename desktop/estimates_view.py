"""The estimates view: parameters with standard uncertainty and confidence interval.

Below the parameters it lists n used / excluded / down-weighted, the scale, alpha,
degrees of freedom, the convergence state and the covariance recipe; the correlation
matrix is shown on demand. :func:`estimates_plain_text` is what "Copy estimates" puts
on the clipboard.
"""
from __future__ import annotations

import html
import re

import numpy as np
from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QHBoxLayout, QHeaderView, QLabel, QPushButton, QTableWidget, QTableWidgetItem,
    QVBoxLayout, QWidget,
)

from .document import Document

try:  # one wording everywhere: the window, the copies and the report
    from fitcore.report import CAUTION
except ImportError:  # pragma: no cover - fitcore without its report module
    CAUTION = ("Robust weights are not a licence to discard data: follow your laboratory's "
               "procedures and the applicable standards when excluding or down-weighting points.")
LEVEL = 0.95


def fmt_value(value: float, u: float) -> str:
    """``value(u)`` rounded GUM style, by ``fitcore.format_value`` when available."""
    try:
        import fitcore

        return fitcore.format_value(value, u, style="paren")
    except Exception:  # noqa: BLE001 - report module absent or a value it refuses
        if not np.isfinite(u) or u <= 0:
            return f"{value:.6g}"
        return f"{value:.6g} ± {u:.2g}"


def interval_text(lo: float, hi: float, u: float) -> str:
    """``[lo, hi]`` quoted to the last digit of the rounded uncertainty (two significant
    digits, as the estimate beside it), so the column stays narrow; 5 significant
    digits where that would not read well (very large or small numbers, no u)."""
    big = max(abs(lo), abs(hi))
    if np.isfinite(u) and u > 0 and np.isfinite(big) and 1e-4 <= big < 1e7:
        d = max(0, 1 - int(np.floor(np.log10(u))))
        if d <= 8:
            return f"[{lo:.{d}f}, {hi:.{d}f}]"
    return f"[{lo:.5g}, {hi:.5g}]"


def unit_of(expr: str, x_unit: str, y_unit: str) -> str:
    """Turn a model's unit expression ("y/x", "1/x", "x") into real units."""
    if not expr:
        return ""

    def sub(m):
        u = x_unit if m.group(0) == "x" else y_unit
        return f"({u})" if u and ("/" in u or "*" in u or " " in u) else (u or m.group(0))

    if (("x" in expr and not x_unit) or ("y" in expr and not y_unit)):
        return ""
    return re.sub(r"\b[xy]\b", sub, expr)


def summary_lines(res) -> list[tuple[str, str]]:
    """(label, text) pairs describing how the fit was made."""
    def g(name, default=None):
        return getattr(res, name, default)

    alpha = g("alpha")
    lines = [
        ("loss", str(g("loss", ""))),
        ("n used", str(g("n_used", ""))),
        ("n excluded", str(g("n_excluded", ""))),
        ("n down-weighted (w < 0.5)", str(g("n_downweighted", ""))),
        ("scale", f"{g('scale', float('nan')):.6g} ({g('scale_method', '')})"),
        ("alpha", "-" if alpha is None else f"{alpha:.4g}"),
        ("degrees of freedom", str(g("dof", ""))),
        ("converged", ("yes" if g("converged") else "NO") + (f": {g('message')}" if g("message") else "")),
        ("covariance", str(g("covariance_recipe", ""))),
    ]
    return lines


def estimates_plain_text(res, x_unit: str = "", y_unit: str = "") -> str:
    """Plain-text estimates for the clipboard (``fitcore.report`` when present)."""
    try:
        from fitcore.report import estimates_text

        return estimates_text(res, "plain", level=LEVEL, x_unit=x_unit, y_unit=y_unit)
    except ImportError:
        pass
    lines = []
    ci = res.intervals(LEVEL)
    for k, name in enumerate(res.param_names):
        unit = unit_of(res.model.units.get(name, ""), x_unit, y_unit)
        held = "  (held)" if name in res.fixed else ""
        lines.append(f"{name} = {fmt_value(res.values[k], res.stderr[k])}{' ' + unit if unit else ''}"
                     f"   {int(LEVEL * 100)}% CI [{ci[k, 0]:.6g}, {ci[k, 1]:.6g}]{held}")
    lines += [f"{a}: {b}" for a, b in summary_lines(res)]
    lines.append(CAUTION)
    return "\n".join(lines)


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
        ci = res.intervals(LEVEL)
        derived = []
        try:
            derived = res.derived_values()
        except Exception:  # noqa: BLE001 - a derived quantity that cannot be evaluated
            derived = []
        rows = [(n, res.values[k], res.stderr[k], ci[k, 0], ci[k, 1],
                 unit_of(res.model.units.get(n, ""), m.x_unit, m.y_unit),
                 n in res.fixed) for k, n in enumerate(res.param_names)]
        t = res.t_quantile(LEVEL)
        for name, v, u, d in derived:
            rows.append((name, v, u, v - t * u, v + t * u, unit_of(d.unit, m.x_unit, m.y_unit), False))
        self.table.setRowCount(len(rows))
        for r, (n, v, u, lo, hi, unit, held) in enumerate(rows):
            cells = [n + (" (held)" if held else ""), fmt_value(v, u), f"{u:.2g}",
                     interval_text(lo, hi, u), unit]
            for c, text in enumerate(cells):
                it = QTableWidgetItem(text)
                if c in (1, 2, 3):
                    it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                if doc.stale:
                    it.setForeground(Qt.gray)
                self.table.setItem(r, c, it)
        self.summary.setText("<br>".join(f"<b>{html.escape(a)}</b>: {html.escape(b)}"
                                         for a, b in summary_lines(res)))
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
        return estimates_plain_text(res, m.x_unit, m.y_unit)
