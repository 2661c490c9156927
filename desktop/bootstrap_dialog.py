"""Bootstrap intervals: case or residual resampling of the current fit.

The dialog runs ``fitcore.bootstrap.bootstrap`` on the document's current result in a
background job (fitcore itself spreads large jobs over a process pool), with a
progress bar and Cancel, and lists the percentile intervals beside the analytic ones.
It names the method and B. The last finished bootstrap is kept on the main window
(``MainWindow.last_bootstrap``, a :class:`BootstrapRecord`) so the report can include it.
"""
from __future__ import annotations

import html
from dataclasses import dataclass

import numpy as np
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QComboBox, QDialog, QDoubleSpinBox, QFormLayout, QHBoxLayout, QHeaderView, QLabel,
    QProgressBar, QPushButton, QSpinBox, QTableWidget, QTableWidgetItem, QVBoxLayout,
)

from fitcore.report import format_interval

from .document import Document
from .estimates_view import CAUTION, fmt_value
from .job_kinds import run_here
from .jobs import Channel

KINDS = (("case", "case resampling (rows drawn with replacement)"),
         ("residual", "residual resampling (fitted curve + drawn residuals)"))
#: role holding the raw (lo, hi) behind an interval cell
VALUE_ROLE = Qt.UserRole + 8


@dataclass(frozen=True)
class BootstrapRecord:
    """One finished bootstrap and the fit it resampled.

    ``result`` is the :class:`fitcore.result.FitResult`; ``bootstrap`` the object from
    ``fitcore.bootstrap.bootstrap`` (``intervals``, ``samples``, ``B``, ``kind``,
    ``n_failed``, ``method_text``); ``seed`` and ``level`` as asked.
    """

    result: object
    bootstrap: object
    seed: int
    level: float
    generation: int

    @property
    def method_text(self) -> str:
        return str(getattr(self.bootstrap, "method_text", ""))


def run_bootstrap(res, kind: str, B: int, seed: int, level: float, progress=None, cancel=None,
                  use_child: bool | None = None):
    """``fitcore.bootstrap.bootstrap`` of ``res``, here and now (the "bootstrap" job of
    :mod:`desktop.job_kinds`: in a child process this thread waits for up to
    ``CHILD_MAX_POINTS`` points; fitcore spreads a long run over its own pool there).
    The dialog submits the same job to its channel."""
    where = None if use_child is None else ("process" if use_child else "thread")
    return run_here("bootstrap", bootstrap_payload(res, kind, B, seed, level), progress, cancel,
                    where=where)


def bootstrap_payload(res, kind: str, B: int, seed: int, level: float) -> dict:
    """The "bootstrap" job's payload."""
    return {"result": res, "kind": kind, "B": int(B), "seed": int(seed), "level": float(level)}


class BootstrapDialog(QDialog):
    """Non-modal dialog: kind, B, seed, level; Run / Cancel; the interval table.

    Parameters
    ----------
    document
        The window's document (its current result is resampled).
    """

    #: a bootstrap finished: the :class:`BootstrapRecord`
    done = Signal(object)

    def __init__(self, document: Document, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Bootstrap intervals")
        self.setModal(False)
        self.document = document
        self.record: BootstrapRecord | None = None
        self.job = Channel(self)
        self.job.progress.connect(self._on_progress)
        self.job.finished.connect(self._on_finished)
        self.job.failed.connect(self._on_failed)
        self.job.cancelled.connect(self._on_cancelled)
        self._pending = None

        lay = QVBoxLayout(self)
        form = QFormLayout()
        self.kind = QComboBox()
        for key, text in KINDS:
            self.kind.addItem(text, key)
        self.B = QSpinBox()
        self.B.setRange(50, 200000)
        self.B.setValue(999)
        self.B.setSingleStep(100)
        self.B.setToolTip("Number of resamples (999 puts the 2.5% and 97.5% points on samples)")
        self.seed = QSpinBox()
        self.seed.setRange(0, 2**31 - 1)
        self.seed.setValue(0)
        self.seed.setToolTip("Same seed, same data, same answer")
        self.level = QDoubleSpinBox()
        self.level.setRange(0.5, 0.999)
        self.level.setDecimals(3)
        self.level.setSingleStep(0.01)
        self.level.setValue(0.95)
        form.addRow("resampling", self.kind)
        form.addRow("B (resamples)", self.B)
        form.addRow("seed", self.seed)
        form.addRow("level", self.level)
        lay.addLayout(form)
        row = QHBoxLayout()
        self.run_button = QPushButton("Run")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        self.progress = QProgressBar()
        self.progress.setRange(0, 1)
        self.progress.setValue(0)
        self.close_button = QPushButton("Close")
        for w in (self.run_button, self.cancel_button, self.progress, self.close_button):
            row.addWidget(w)
        lay.addLayout(row)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        lay.addWidget(self.status)
        self.table = QTableWidget(0, 4)
        self.table.setHorizontalHeaderLabels(["parameter", "estimate", "analytic interval",
                                              "bootstrap percentile interval"])
        self.table.verticalHeader().setVisible(False)
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        lay.addWidget(self.table, 1)
        self.method = QLabel("")
        self.method.setWordWrap(True)
        self.method.setTextInteractionFlags(Qt.TextSelectableByMouse)
        lay.addWidget(self.method)
        caution = QLabel(CAUTION)
        caution.setWordWrap(True)
        caution.setStyleSheet("color: #6b4e00; background: #fff6d6; padding: 4px;")
        lay.addWidget(caution)
        self.run_button.clicked.connect(self.run)
        self.cancel_button.clicked.connect(self.cancel)
        self.close_button.clicked.connect(self.close)
        self.resize(620, 420)
        document.subscribe(self._on_document)

    # ------------------------------------------------------------------ running
    def run(self) -> bool:
        doc = self.document
        res = doc.result
        if res is None:
            self.status.setText("No fit to resample yet.")
            return False
        if doc.stale:
            self.status.setText("The shown fit is stale; wait for the refit (or fix the fit) first.")
            return False
        kind = self.kind.currentData()
        B, seed, level = self.B.value(), self.seed.value(), round(self.level.value(), 6)
        self._pending = (res, seed, level, doc.generation)
        self.progress.setRange(0, B)
        self.progress.setValue(0)
        self.run_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.status.setText(f"Resampling {B} times ({kind})...")
        self.job.submit("bootstrap", bootstrap_payload(res, kind, B, seed, level))
        return True

    def cancel(self):
        if self.job.running:
            self.status.setText("Cancelling...")
            self.job.cancel()

    def _idle(self):
        self.run_button.setEnabled(True)
        self.cancel_button.setEnabled(False)

    def _on_progress(self, done, total):
        if total > 0:
            self.progress.setRange(0, total)
        self.progress.setValue(done)

    def _on_failed(self, message):
        self._idle()
        self.status.setText(f"The bootstrap failed: {message}. Earlier intervals are kept.")

    def _on_cancelled(self, partial):
        self._idle()
        self.progress.setValue(0)
        self.status.setText("Bootstrap cancelled; earlier intervals (if any) are kept.")

    def _on_finished(self, b):
        self._idle()
        res, seed, level, gen = self._pending
        self.record = BootstrapRecord(res, b, seed, level, gen)
        self._fill()
        nf = int(getattr(b, "n_failed", 0) or 0)
        self.status.setText(f"Done in {self.job.seconds:.1f} s." +
                            (f" {nf} resample{'' if nf == 1 else 's'} failed to fit and "
                             f"{'was' if nf == 1 else 'were'} left out." if nf else ""))
        self.done.emit(self.record)

    def _fill(self):
        rec = self.record
        res, b = rec.result, rec.bootstrap
        iv = np.asarray(b.intervals, float)
        ci = res.intervals(rec.level)
        names = list(res.param_names)
        self.table.setRowCount(len(names))
        pct = f"{rec.level * 100:g}%"
        self.table.setHorizontalHeaderLabels(["parameter", "estimate", f"analytic {pct} interval",
                                              f"bootstrap {pct} percentile interval"])
        for r, name in enumerate(names):
            held = name in res.fixed
            v, u = float(res.values[r]), float(res.stderr[r])
            # both intervals by the one rule of the window and the report: limits to
            # the last decimal (and power of ten) of the rounded estimate
            cells = [name + (" (held)" if held else ""),
                     fmt_value(v, u, held=held),
                     "-" if held or not np.all(np.isfinite(ci[r])) else format_interval(
                         ci[r, 0], ci[r, 1], v, u),
                     "-" if held or not np.all(np.isfinite(iv[r])) else format_interval(
                         iv[r, 0], iv[r, 1], v, u)]
            for c, text in enumerate(cells):
                it = QTableWidgetItem(text)
                if c > 0:
                    it.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                if c == 2:
                    it.setData(VALUE_ROLE, (float(ci[r, 0]), float(ci[r, 1])))
                if c == 3:
                    it.setData(VALUE_ROLE, (float(iv[r, 0]), float(iv[r, 1])))
                self.table.setItem(r, c, it)
        text = rec.method_text or f"{b.kind} bootstrap, B = {b.B}"
        seed = "" if "seed" in text else f" (seed {rec.seed})"
        warns = "".join(f"<br><b>Warning</b>: {html.escape(w)}."
                        for w in getattr(b, "warnings", None) or [])
        self.method.setText(f"<b>Method</b>: {html.escape(text)}{seed}. "
                            f"Analytic: {html.escape(str(res.covariance_recipe))}, Student t."
                            + warns)

    def _on_document(self, event, **info):
        if event in ("data", "mask", "settings") and self.record is not None:
            if self.record.generation != self.document.generation:
                self.status.setText("The fit changed since these intervals: press Run to redo them.")
                for r in range(self.table.rowCount()):
                    for c in range(self.table.columnCount()):
                        it = self.table.item(r, c)
                        if it is not None:
                            it.setForeground(Qt.gray)

    def closeEvent(self, ev):
        self.job.cancel()
        super().closeEvent(ev)
