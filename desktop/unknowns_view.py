"""The Unknowns table: read unknown samples off the calibration curve.

The analyst types or pastes the readings of unknown samples (one row per sample;
replicate readings in further columns, or on further rows under the same name) and
sees, for each, x with its standard uncertainty (GUM-rounded), the interval, and flags
for extrapolation or a result below the detection/quantification limit. The
detection limits and (with replicate standards) the lack-of-fit test are shown under
the table. Every read-back is recomputed when a new fit arrives (an exclusion, a
method change, undo); in between the rows are greyed like the estimates.

On the plot each unknown gets a read-back mark: from the left edge at the mean
reading across to the curve, then down to the x axis at the result.

Edits of the unknowns are undoable (:class:`UnknownsCommand`). Computation is
:func:`fitcore.inverse_predict` / :func:`fitcore.detection_limits`; the text for
copies and the report is :func:`fitcore.calibration.unknowns_text`.
"""
from __future__ import annotations

import re

import numpy as np
from PySide6.QtCore import QSize, Qt, Signal
from PySide6.QtGui import QGuiApplication, QUndoCommand
from PySide6.QtWidgets import (
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QSizePolicy,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from fitcore.calibration import DetectionLimits, InversePrediction, flags, limits_lines, read_back, unknowns_text

from .estimates_view import LEVEL, fmt_value, interval_text, unc_text

# models whose detection limits are shown before any unknown is pasted: the usual
# calibration functions (common practice: ISO 8466-1/-2 straight and quadratic lines)
CALIBRATION_MODELS = frozenset({"line", "line_origin", "poly2", "poly3"})
COLUMNS = ("sample", "readings", "x", "u(x)", f"{int(LEVEL * 100)}% interval", "flags")


# ============================================================================ parsing
def _number(cell: str):
    t = cell.strip().replace("\u2212", "-")
    if not t:
        return None
    try:
        return float(t)
    except ValueError:
        pass
    if re.fullmatch(r"[-+]?\d+,\d+([eE][-+]?\d+)?", t):  # decimal comma
        return float(t.replace(",", "."))
    return None


def _cells(line: str) -> list[str]:
    if "\t" in line:
        return line.split("\t")
    if ";" in line:
        return line.split(";")
    return line.split()


def parse_unknowns(text: str, taken=()) -> list[tuple[str, tuple[float, ...]]]:
    """``[(name, readings), ...]`` from typed or pasted text.

    One sample a line: an optional name, then its readings (tab, semicolon or space
    separated; a decimal comma is accepted). Lines under the same name are merged
    (replicates as repeated names). A line without a name gets "sample k". A first line
    with no number at all is taken as a header and skipped. Raises ``ValueError`` with
    the line number for a line that names a sample but gives no reading or a cell that
    is not a number.
    """
    order: list[str] = []
    merged: dict[str, list[float]] = {}
    k = 0
    for ln, raw in enumerate(str(text).splitlines(), start=1):
        if not raw.strip():
            continue
        cells = [c for c in _cells(raw) if c.strip()]
        values = [_number(c) for c in cells]
        if all(v is None for v in values):
            if ln == 1 or not order:
                continue  # a header row
            raise ValueError(f"line {ln} ({raw.strip()[:40]!r}) holds no reading")
        if values[0] is None:
            name, rest, rest_cells = cells[0].strip(), values[1:], cells[1:]
        else:
            k += 1
            name, rest, rest_cells = f"sample {k}", values, cells
            while name in merged or name in taken:
                k += 1
                name = f"sample {k}"
        bad = [c for c, v in zip(rest_cells, rest) if v is None]
        if bad:
            raise ValueError(f"line {ln}: {bad[0].strip()!r} is not a number")
        if not all(np.isfinite(rest)):
            raise ValueError(f"line {ln}: every reading must be a finite number")
        if name not in merged:
            order.append(name)
            merged[name] = []
        merged[name].extend(float(v) for v in rest)
    return [(n, tuple(merged[n])) for n in order]


def clean_samples(raw) -> list[tuple[str, tuple[float, ...]]]:
    """The well-formed ``[name, [readings...]]`` entries of a stored list (a session's
    view); anything else is left out."""
    out = []
    if not isinstance(raw, list):
        return out
    for entry in raw[:10000]:
        if not (isinstance(entry, (list, tuple)) and len(entry) == 2):
            continue
        name, readings = entry
        if not isinstance(name, str) or not isinstance(readings, (list, tuple)) or not readings:
            continue
        try:
            vals = tuple(float(v) for v in readings if not isinstance(v, bool))
        except (TypeError, ValueError):
            continue
        if len(vals) == len(readings) and all(np.isfinite(vals)):
            out.append((name[:200], vals))
    return out


def readings_text(readings) -> str:
    return "  ".join(f"{v:.10g}" for v in readings)


# ============================================================================ undo
class UnknownsCommand(QUndoCommand):
    """Replace the list of unknown samples (typing, pasting, clearing)."""

    def __init__(self, view: UnknownsView, before, after, text: str = "Edit unknowns"):
        super().__init__(text)
        self.view, self.before, self.after = view, list(before), list(after)

    def redo(self):
        self.view.set_samples(self.after)

    def undo(self):
        self.view.set_samples(self.before)


# ============================================================================ view
class UnknownsView(QWidget):
    """Unknowns table + detection limits, observing the document's result."""

    #: emitted after the read-backs were recomputed (or cleared)
    updated = Signal()

    def __init__(self, document, push, plot=None, parent=None):
        super().__init__(parent)
        self.document = document
        self.push = push
        self.plot = plot
        self.samples: list[tuple[str, tuple[float, ...]]] = []
        self.results: list = []  # InversePrediction or error text, per sample
        self.limits = None       # DetectionLimits, an error text, or None
        self.lof = None
        self.for_result = None   # the result the read-backs belong to
        self._filling = False
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 4, 0, 0)
        head = QHBoxLayout()
        title = QLabel("<b>Unknowns</b>")
        self.paste_button = QPushButton("Paste unknowns")
        self.paste_button.setToolTip("One sample a row: a name, then its readings (replicates "
                                     "in further columns or on rows with the same name)")
        self.clear_button = QPushButton("Clear")
        head.addWidget(title)
        head.addStretch(1)
        head.addWidget(self.paste_button)
        head.addWidget(self.clear_button)
        lay.addLayout(head)
        self.table = QTableWidget(1, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(list(COLUMNS))
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        # the pane scrolls as a whole when short; the Unknowns take the height left over
        # rather than raising the pane's minimum (that would squeeze the estimates' width)
        self.setSizePolicy(QSizePolicy.Preferred, QSizePolicy.Ignored)
        self.setMinimumHeight(0)
        lay.addWidget(self.table, 1)
        self.limits_label = QLabel("")
        self.limits_label.setWordWrap(True)
        self.limits_label.setTextInteractionFlags(Qt.TextSelectableByMouse)
        lay.addWidget(self.limits_label)
        self.paste_button.clicked.connect(self.paste)
        self.clear_button.clicked.connect(self.clear)
        self.table.itemChanged.connect(self._item_edited)
        self.marks = None
        if plot is not None:
            import pyqtgraph as pg

            self.marks = pg.PlotCurveItem(pen=pg.mkPen(0, 110, 160, width=1.5, style=Qt.DashLine),
                                          connect="pairs")
            plot.data_plot.addItem(self.marks, ignoreBounds=True)
            plot.redrawn.connect(self._draw_marks)
            plot.axes_changed.connect(self._draw_marks)
        document.subscribe(self._on_document)
        self.recompute()

    # the estimates pane scrolls when its preferred height exceeds the window, and its
    # scroll bar would narrow the estimates table: the Unknowns ask for little height
    # and take what is left over
    def sizeHint(self):
        hint = super().sizeHint()
        return QSize(hint.width(), min(hint.height(), 120))

    def hasHeightForWidth(self) -> bool:
        return False

    # ------------------------------------------------------------------ editing
    def set_samples(self, samples) -> None:
        """Set the unknowns (called by the undo command) and read them back."""
        self.samples = [(str(n), tuple(float(v) for v in r)) for n, r in samples]
        self.recompute()

    def replace_samples(self, samples, text: str = "Edit unknowns") -> None:
        """An undoable change of the unknowns."""
        samples = [(str(n), tuple(r)) for n, r in samples]
        if samples == self.samples:
            return
        self.push(UnknownsCommand(self, self.samples, samples, text))

    def paste(self, text: str | None = None) -> bool:
        """Add the unknowns in ``text`` (default: the clipboard) to the list."""
        if text is None:
            text = QGuiApplication.clipboard().text()
        try:
            new = parse_unknowns(text, taken=[n for n, _ in self.samples])
        except ValueError as err:
            self._say(f"Unknowns not pasted: {err}")
            return False
        if not new:
            self._say("Unknowns not pasted: the clipboard holds no readings.")
            return False
        merged = dict(self.samples)
        order = [n for n, _ in self.samples]
        for n, r in new:
            if n in merged:
                merged[n] = tuple(merged[n]) + tuple(r)
            else:
                order.append(n)
                merged[n] = tuple(r)
        self.replace_samples([(n, merged[n]) for n in order],
                             f"Paste {len(new)} unknown{'s' if len(new) != 1 else ''}")
        return True

    def clear(self):
        if self.samples:
            self.replace_samples([], "Clear unknowns")

    def _say(self, text: str):
        win = self.window()
        bar = getattr(win, "statusBar", None)
        if callable(bar):
            bar().showMessage(text, 10000)

    def _item_edited(self, item):
        if self._filling or item.column() > 1:
            return
        r = item.row()
        name_item = self.table.item(r, 0)
        read_item = self.table.item(r, 1)
        name = name_item.text().strip() if name_item else ""
        rtext = read_item.text() if read_item else ""
        samples = list(self.samples)
        if not rtext.strip():
            if r < len(samples) and not name:  # both cleared: the sample goes
                samples.pop(r)
                self.replace_samples(samples, "Remove unknown")
            elif r < len(samples):
                samples[r] = (name or samples[r][0], samples[r][1])
                self.replace_samples(samples, "Rename unknown")
            return
        try:
            parsed = parse_unknowns(f"{name or 'x'}\t" + "\t".join(_cells(rtext)))
        except ValueError as err:
            self._say(f"Readings not accepted: {err}")
            self._fill()
            return
        readings = parsed[0][1] if parsed else ()
        if not name:
            name = f"sample {len(samples) + 1}" if r >= len(samples) else samples[r][0]
        if r < len(samples):
            samples[r] = (name, readings)
        else:
            samples.append((name, readings))
        self.replace_samples(samples, "Edit unknown")

    # ------------------------------------------------------------------ computing
    def _on_document(self, event, **info):
        if event in ("result", "data"):
            self.recompute()
        elif event in ("mask", "settings"):
            self._fill()  # greyed: the read-backs belong to the previous inputs

    def recompute(self) -> None:
        """Read every unknown back off the current result (``fitcore.calibration.read_back``,
        what the library's calibration report does)."""
        res = self.document.result
        self.for_result = res
        self.results = []
        self.limits = None
        self.lof = None
        if res is not None:
            items, self.limits, self.lof = read_back(res, self.samples, LEVEL)
            self.results = [r for _name, r in items]
        self._fill()
        self._draw_marks()
        self.updated.emit()

    def limits_apply(self) -> bool:
        """Detection limits belong to calibrations: shown for the calibration-line models
        (:data:`CALIBRATION_MODELS`) and, for any other curve, once unknowns are pasted."""
        res = self.for_result
        if res is None:
            return False
        return bool(self.samples) or getattr(res.model, "name", "") in CALIBRATION_MODELS

    @property
    def stale(self) -> bool:
        doc = self.document
        return self.for_result is None or doc.stale or self.for_result is not doc.result

    def items(self) -> list[tuple[str, object]]:
        """``(name, InversePrediction or error text)`` for the copies and the report."""
        return [(n, r) for (n, _rd), r in zip(self.samples, self.results)]

    def text(self, fmt: str = "plain", full_precision: bool = False) -> str:
        """The unknowns and limits in a copy format ("" when there is nothing to say)."""
        if self.for_result is None or not (self.samples or self.lof is not None):
            return ""  # the lack-of-fit test alone is worth a copy (replicate standards)
        return unknowns_text(self.items(), fmt, level=LEVEL, limits=self.limits, lof=self.lof,
                             x_unit=self.document.measurements.x_unit,
                             full_precision=full_precision)

    # ------------------------------------------------------------------ showing
    def _fill(self):
        self._filling = True
        try:
            grey = self.stale
            n = len(self.samples)
            self.table.setRowCount(n + 1)  # a free row for typing the next sample
            for r in range(n + 1):
                if r < n:
                    name, readings = self.samples[r]
                    ip = self.results[r] if r < len(self.results) else None
                else:
                    name, readings, ip = "", (), None
                if isinstance(ip, InversePrediction):
                    cells = [fmt_value(ip.x, ip.u), unc_text(ip.x, ip.u),
                             interval_text(ip.interval[0], ip.interval[1], ip.x, ip.u),
                             "; ".join(flags(ip, self.limits))]
                    tip = ip.method + ("\n" + "\n".join(ip.warnings) if ip.warnings else "")
                elif isinstance(ip, str):
                    cells, tip = ["", "", "", "not read back"], ip
                else:
                    cells, tip = ["", "", "", ""], ""
                texts = [name, readings_text(readings)] + cells
                for c, t in enumerate(texts):
                    it = self.table.item(r, c)
                    if it is None:
                        it = QTableWidgetItem()
                        self.table.setItem(r, c, it)
                    it.setText(t)
                    if c >= 2:
                        it.setFlags(it.flags() & ~Qt.ItemIsEditable)
                        it.setToolTip(tip)
                    if c in (2, 3, 4):
                        it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                    if c == 5 and t:
                        it.setForeground(Qt.darkRed)
                    elif grey and r < n:
                        it.setForeground(Qt.gray)
                    else:
                        it.setForeground(self.table.palette().text())
            x_unit = self.document.measurements.x_unit
            lines = limits_lines(self.limits, self.lof, x_unit) if self.for_result is not None else []
            self.limits_label.setText(self._short_limits(x_unit))
            self.limits_label.setToolTip("\n".join(f"{a}: {b}" for a, b in lines))
        finally:
            self._filling = False

    def _short_limits(self, x_unit: str) -> str:
        """One compact line per figure; the full rules are in the tooltip and the copies."""
        if self.for_result is None:
            return ""
        u = f" {_h(x_unit)}" if x_unit else ""
        lim = self.limits
        parts = []
        if not self.limits_apply():
            lim = None  # a decay's "LOD in minutes" would only mislead
            parts.append("Paste readings of unknown samples to read them off the curve; "
                         "detection limits are shown with them.")
        if isinstance(lim, DetectionLimits):
            parts.append(f"<b>LOD</b> {lim.lod_ich:.3g}{u}, <b>LOQ</b> {lim.loq_ich:.3g}{u} "
                         "(ICH Q2(R1): 3.3&sigma;/S, 10&sigma;/S)")
            parts.append(f"<b>x<sub>c</sub></b> {lim.critical_x:.3g}{u}, <b>x<sub>d</sub></b> "
                         f"{lim.detection_x:.3g}{u} (ISO 11843-2, K = {lim.readings})")
        elif lim:
            parts.append(f"limits not available: {_h(lim)}")
        if self.lof is not None:
            lof = self.lof
            parts.append(f"<b>lack of fit</b>: F = {lof.F:.3g} on {lof.df_lof} and {lof.df_pe} "
                         f"dof, p = {lof.p_value:.3g}")
        return "<br>".join(parts)

    def mark_segments(self):
        """Read-back marks as x/y arrays of segment pairs (data coordinates)."""
        res = self.for_result
        m = self.document.measurements
        if res is None or m.n == 0:
            return np.zeros(0), np.zeros(0)
        x_left = float(np.nanmin(m.x))
        y_bottom = float(min(np.nanmin(m.y), np.nanmin(res.fitted)))
        xs, ys = [], []
        for ip in self.results:
            if not isinstance(ip, InversePrediction):
                continue
            xs += [x_left, ip.x, ip.x, ip.x]
            ys += [ip.mean_reading, ip.mean_reading, ip.mean_reading, y_bottom]
        return np.asarray(xs, float), np.asarray(ys, float)

    def _draw_marks(self):
        if self.marks is None:
            return
        xs, ys = self.mark_segments()
        if xs.size and self.plot is not None:
            tx, ty = self.plot.to_view_x(xs), self.plot.to_view_y(ys)
            ok = np.isfinite(tx) & np.isfinite(ty)
            ok = ok.reshape(-1, 2).all(axis=1).repeat(2)  # whole segments only
            self.marks.setData(tx[ok], ty[ok])
        else:
            self.marks.setData([], [])


def _h(s) -> str:
    import html

    return html.escape(str(s))
