"""File > Fit many files...: the batch in the window.

The method on screen (model, loss, scale, shape, held and start values) is applied to
every curve of the chosen files and folders by :func:`fitcore.batch.fit_sources`, the
engine of the ``ballast-fit`` command, as a "batch" job of the window's one job mechanism
(:mod:`desktop.jobs`: a worker thread that hands the work to worker processes). Rows
appear as curves finish; the table sorts by any column, failed rows are marked, and any
row opens as a normal data set in the main window (with the batch's method), where its
points can be looked at, excluded and refitted.
"""
from __future__ import annotations

import math
import os
from pathlib import Path

from PySide6.QtCore import QAbstractTableModel, QModelIndex, QSortFilterProxyModel, Qt
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import (
    QAbstractItemView, QComboBox, QDialog, QFileDialog, QFormLayout, QHBoxLayout, QLabel, QListWidget,
    QProgressBar, QPushButton, QSpinBox, QSplitter, QTableView, QVBoxLayout, QWidget,
)

import fitcore
from fitcore.batch import BatchSpec, default_jobs, find_files, result_columns, row_cells, write_rows
from fitcore.losses import loss_title

from . import dialogs
from .document import Measurements
from .jobs import Channel
from .main_window import FILE_FILTER, model_title
from .method_panel import sigma_fixes_scale

NONE = "(none)"
FAILED_BRUSH = QBrush(QColor(250, 215, 210))
SORT_ROLE = Qt.UserRole + 1


class ResultsModel(QAbstractTableModel):
    """The batch rows as a table: the columns of ``ballast-fit``'s results file."""

    def __init__(self, param_names=(), parent=None):
        super().__init__(parent)
        self.param_names = list(param_names)
        self.columns = result_columns(self.param_names)
        self.rows: list = []
        self._cells: list[list] = []

    def reset(self, param_names):
        self.beginResetModel()
        self.param_names = list(param_names)
        self.columns = result_columns(self.param_names)
        self.rows, self._cells = [], []
        self.endResetModel()

    def add_rows(self, rows):
        if not rows:
            return
        first = len(self.rows)
        self.beginInsertRows(QModelIndex(), first, first + len(rows) - 1)
        for row in rows:
            self.rows.append(row)
            cells = row_cells(row, len(self.param_names))
            cells[0] = os.path.basename(row.source)  # the full path is in the tooltip
            self._cells.append(cells)
        self.endInsertRows()

    @property
    def n_failed(self) -> int:
        return sum(1 for r in self.rows if r.error)

    def rowCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else len(self.rows)

    def columnCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else len(self.columns)

    def headerData(self, section, orientation, role=Qt.DisplayRole):
        if role == Qt.DisplayRole and orientation == Qt.Horizontal:
            return self.columns[section]
        return None

    def data(self, index, role=Qt.DisplayRole):
        if not index.isValid():
            return None
        row = self.rows[index.row()]
        v = self._cells[index.row()][index.column()]
        name = self.columns[index.column()]
        if role == Qt.DisplayRole:
            if name == "converged" and row.error:
                return "FAILED"
            if v is None:
                return ""
            if isinstance(v, bool):
                return "yes" if v else "no"
            if isinstance(v, float):
                return f"{v:.6g}"
            return str(v)
        if role == SORT_ROLE:
            if isinstance(v, bool):
                return int(v)
            if isinstance(v, (int, float)):
                return float(v) if not math.isnan(v) else math.inf
            if v is None:  # empty numbers after all others
                return math.inf if name not in ("source", "sheet", "group", "y", "warnings", "error") else ""
            return str(v)
        if role == Qt.BackgroundRole and row.error:
            return FAILED_BRUSH
        if role == Qt.ToolTipRole:
            where = " / ".join(t for t in (row.source, row.sheet, row.group, row.y) if t)
            tip = f"{where}\nfailed: {row.error}" if row.error else where
            if row.warnings:
                tip += f"\n{row.warnings}"
            return tip + "\nDouble-click to open this curve in the window."
        if role == Qt.TextAlignmentRole and isinstance(v, (int, float)) and not isinstance(v, bool):
            return int(Qt.AlignRight | Qt.AlignVCenter)
        return None


class BatchWindow(QDialog):
    """Fit many files with the method on screen; see the module text."""

    def __init__(self, main_window, parent=None):
        super().__init__(parent or main_window)
        self.main = main_window
        self.setWindowTitle("Ballast - Fit many files")
        self.setWindowFlag(Qt.WindowMaximizeButtonHint, True)
        # the window's one job mechanism (desktop.jobs): rows arrive through 'partial'
        self.channel = Channel(self)
        self.channel.partial.connect(self._add_rows)
        self.channel.finished.connect(lambda _answer: self._finished(""))
        self.channel.failed.connect(self._finished)
        self.channel.cancelled.connect(lambda _partial: self._finished("stopped"))
        self.spec = None
        self.settings = None

        self.paths = QListWidget()
        self.paths.setSelectionMode(QAbstractItemView.ExtendedSelection)
        add_files = QPushButton("Add &files...")
        add_files.clicked.connect(self.add_files_dialog)
        add_folder = QPushButton("Add f&older...")
        add_folder.clicked.connect(self.add_folder_dialog)
        remove = QPushButton("&Remove")
        remove.clicked.connect(self.remove_selected)
        buttons = QVBoxLayout()
        for b in (add_files, add_folder, remove):
            buttons.addWidget(b)
        buttons.addStretch(1)
        files_row = QHBoxLayout()
        files_row.addWidget(self.paths, 1)
        files_row.addLayout(buttons)

        self.x = self._column_box()
        self.y = self._column_box()
        self.sigma = self._column_box(optional=True)
        self.sigma.currentTextChanged.connect(lambda _t: self.refresh_method())  # the scale
        self.group = self._column_box(optional=True)
        self.jobs = QSpinBox()
        self.jobs.setRange(1, max(64, default_jobs()))
        self.jobs.setValue(default_jobs())
        self.jobs.setToolTip("Worker processes; 1 fits in this program's own process")
        self.method_label = QLabel()
        self.method_label.setWordWrap(True)
        form = QFormLayout()
        form.addRow("x column", self.x)
        form.addRow("y column", self.y)
        form.addRow("sigma_y column", self.sigma)
        form.addRow("group column", self.group)
        form.addRow("worker processes", self.jobs)
        form.addRow("method", self.method_label)

        self.run_button = QPushButton("&Fit all")
        self.run_button.clicked.connect(self.run)
        self.stop_button = QPushButton("&Stop")
        self.stop_button.clicked.connect(self.stop)
        self.stop_button.setEnabled(False)
        self.progress = QProgressBar()
        self.progress.setRange(0, 1)
        self.progress.setValue(0)
        self.progress.setTextVisible(False)
        self.status = QLabel("Add files or folders; every curve in them is fitted with the method on screen.")
        self.status.setWordWrap(True)
        run_row = QHBoxLayout()
        run_row.addWidget(self.run_button)
        run_row.addWidget(self.stop_button)
        run_row.addWidget(self.progress, 1)

        self.model = ResultsModel()
        self.proxy = QSortFilterProxyModel(self)
        self.proxy.setSourceModel(self.model)
        self.proxy.setSortRole(SORT_ROLE)
        self.table = QTableView()
        self.table.setModel(self.proxy)
        self.table.setSortingEnabled(True)
        self.table.sortByColumn(-1, Qt.AscendingOrder)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.doubleClicked.connect(self.open_index)
        self.open_button = QPushButton("&Open in window")
        self.open_button.clicked.connect(self.open_selected)
        self.save_button = QPushButton("Save &table...")
        self.save_button.clicked.connect(self.save_dialog)
        bottom = QHBoxLayout()
        bottom.addWidget(QLabel("Failed rows are shaded; double-click a row to open it in the window."), 1)
        bottom.addWidget(self.open_button)
        bottom.addWidget(self.save_button)

        top = QWidget()
        top_lay = QVBoxLayout(top)
        top_lay.setContentsMargins(0, 0, 0, 0)
        top_lay.addLayout(files_row)
        top_lay.addLayout(form)
        top_lay.addLayout(run_row)
        top_lay.addWidget(self.status)
        low = QWidget()
        low_lay = QVBoxLayout(low)
        low_lay.setContentsMargins(0, 0, 0, 0)
        low_lay.addWidget(self.table, 1)
        low_lay.addLayout(bottom)
        split = QSplitter(Qt.Vertical)
        split.addWidget(top)
        split.addWidget(low)
        split.setStretchFactor(1, 1)
        lay = QVBoxLayout(self)
        lay.addWidget(split)
        self.resize(1000, 700)
        self.refresh_method()

    # ------------------------------------------------------------------ inputs
    @staticmethod
    def _column_box(optional=False) -> QComboBox:
        box = QComboBox()
        box.setEditable(True)
        box.setInsertPolicy(QComboBox.NoInsert)
        if optional:
            box.addItem(NONE)
        box.setMinimumContentsLength(16)
        return box

    def refresh_method(self):
        """Show (and take for the next run) the method on screen in the main window."""
        s = self.main.document.settings
        self.settings = s
        parts = [model_title(s), f"loss {loss_title(s.loss)}"]
        if sigma_fixes_scale(s, self._column(self.sigma, True) is not None):
            parts.append("scale fixed at 1 (sigma taken as absolute)")
        else:
            parts.append("scale automatic" if s.scale == "auto" else f"scale {s.scale:g}")
        if s.loss == "general" and s.alpha is not None:
            parts.append(f"alpha {s.alpha:g}")
        elif s.loss == "adaptive":
            parts.append("alpha fitted")
        if s.fixed:
            parts.append("held " + ", ".join(f"{k} = {v:g}" for k, v in s.fixed.items()))
        if s.p0:
            start = s.p0.items() if isinstance(s.p0, dict) else enumerate(s.p0, 1)
            parts.append("start " + ", ".join(f"{k} = {v:g}" for k, v in start))
        self.method_label.setText("; ".join(parts) + "  (the method on screen; change it in the "
                                  "main window's method panel)")

    def add_paths(self, paths):
        have = {self.paths.item(i).text() for i in range(self.paths.count())}
        for p in paths:
            p = str(p)
            if p and p not in have:
                self.paths.addItem(p)
                have.add(p)
        if self.x.count() == 0:
            files, _ = find_files([self.paths.item(i).text() for i in range(self.paths.count())])
            for path in files[:10]:  # the columns of the first file that reads
                if self._offer_columns(path):
                    break

    def _offer_columns(self, path) -> bool:
        try:
            table = fitcore.read_table(path)
        except (ValueError, OSError):
            return False
        cols = table.columns
        numeric = table.numeric_columns()
        for box in (self.x, self.y):
            box.clear()
            box.addItems(numeric)
        for box in (self.sigma, self.group):
            box.clear()
            box.addItem(NONE)
            box.addItems(cols)
        if len(numeric) > 1:
            self.y.setCurrentIndex(1)
        return True

    def add_files_dialog(self):
        paths, _ = QFileDialog.getOpenFileNames(self, "Files to fit", "", FILE_FILTER)
        self.add_paths(paths)

    def add_folder_dialog(self):
        path = QFileDialog.getExistingDirectory(self, "Folder to fit (subfolders too)")
        if path:
            self.add_paths([path])

    def remove_selected(self):
        for item in self.paths.selectedItems():
            self.paths.takeItem(self.paths.row(item))

    @staticmethod
    def _column(box, optional=False):
        text = box.currentText().strip()
        if optional and (not text or text == NONE):
            return None
        return text

    # ------------------------------------------------------------------ running
    def make_spec(self):
        self.refresh_method()
        s = self.settings
        kw = s.to_fit_kwargs()
        loss = kw.pop("loss")
        x, y = self._column(self.x), self._column(self.y)
        if not x or not y:
            raise ValueError("choose the x and the y column")
        return BatchSpec(x=x, ys=(y,), model=s.model, loss=loss, sigma=self._column(self.sigma, True),
                         group=self._column(self.group, True), options=kw)

    def run(self):
        """Fit every curve of the listed files with the method on screen."""
        if self.running:
            return
        paths = [self.paths.item(i).text() for i in range(self.paths.count())]
        if not paths:
            dialogs.error_box(self, "Nothing to fit", "Add files or folders first.")
            return
        try:
            spec = self.make_spec()
            model = fitcore.resolve_model(spec.model)
        except (ValueError, TypeError) as exc:
            dialogs.error_box(self, "Cannot fit these files", str(exc))
            return
        self.spec = spec
        self.model.reset(model.param_names)
        self.run_button.setEnabled(False)
        self.stop_button.setEnabled(True)
        self.progress.setRange(0, 0)  # busy
        self.status.setText("Fitting...")
        self.channel.submit("batch", {"paths": paths, "spec": spec, "jobs": self.jobs.value()})

    def stop(self):
        """Stop the batch: the window is free at once; the curves in progress finish
        in the background and are not added."""
        if self.running:
            self.channel.cancel()

    def _add_rows(self, rows):
        self.model.add_rows(rows)
        n, bad = len(self.model.rows), self.model.n_failed
        self.status.setText(f"Fitting... {dialogs.counted(n, 'curve')} done" + (f", {bad} failed" if bad else ""))

    def _finished(self, message: str):
        self.run_button.setEnabled(True)
        self.stop_button.setEnabled(False)
        self.progress.setRange(0, 1)
        self.progress.setValue(1)
        n, bad = len(self.model.rows), self.model.n_failed
        if message and message != "stopped":
            self.status.setText(f"The batch could not run: {message}")
            dialogs.error_box(self, "Cannot fit these files", message)
            return
        what = "Stopped: " if message == "stopped" else ""
        self.status.setText(f"{what}{dialogs.counted(n - bad, 'curve')} fitted"
                            + (f", {bad} failed (shaded; the error column says why)" if bad else "")
                            + ". Double-click a row to open it in the window.")
        self.table.resizeColumnsToContents()

    @property
    def running(self) -> bool:
        return self.channel.running

    def closeEvent(self, ev):
        if self.running:
            self.channel.cancel()
        super().closeEvent(ev)

    # ------------------------------------------------------------------ results
    def row_at(self, proxy_row: int):
        return self.model.rows[self.proxy.mapToSource(self.proxy.index(proxy_row, 0)).row()]

    def open_index(self, index):
        if index.isValid():
            self.open_row(self.row_at(index.row()))

    def open_selected(self):
        sel = self.table.selectionModel().selectedRows()
        if sel:
            self.open_index(sel[0])

    def open_row(self, row) -> bool:
        """Show one curve of the batch as the data set of the main window, with the
        batch's method; the window fits it as usual. False when refused or cancelled."""
        import numpy as np

        spec = self.spec
        name = " / ".join(t for t in (os.path.basename(row.source), row.sheet, row.group, row.y) if t)
        if not self.main.sessions.confirm_replace(name):
            return False
        try:
            table = fitcore.read_table(row.source, sheet=row.sheet or None)
            sel = table.choose(spec.x, row.y, spec.sigma)
            keep = np.ones(len(sel), bool)
            if spec.group is not None:
                codes, labels = table.groups(spec.group)
                rows = np.searchsorted(table.source_rows, sel.source_rows)
                keep = codes[rows] == (labels.index(row.group) if row.group in labels else -2)
            if not keep.any():
                raise ValueError("no row of this curve holds usable numbers in both x and y")
        except (ValueError, KeyError, OSError) as exc:
            dialogs.error_box(self, "Cannot open this curve", f"{name}: {exc}")
            return False
        m = Measurements(sel.x[keep], sel.y[keep], None if sel.sigma is None else sel.sigma[keep],
                         x_name=sel.x_name, y_name=sel.y_name, sigma_name=sel.sigma_name or "",
                         x_unit=sel.x_unit, y_unit=sel.y_unit, source=sel.source, notes=sel.notes,
                         source_rows=sel.source_rows[keep])
        self.main.load_measurements(m, settings=self.settings)
        self.main.setWindowTitle(f"Ballast - {name}")
        self.main.statusBar().showMessage(
            f"{dialogs.counted(m.n, 'point')} from {name} (batch row, with the batch's method)", 15000)
        self.main.raise_()
        self.main.activateWindow()
        return True

    def save_dialog(self):
        path, _ = QFileDialog.getSaveFileName(self, "Save the results table", "batch-results.csv",
                                              "CSV (*.csv);;Excel workbook (*.xlsx)")
        if path:
            self.save(path)

    def save(self, path) -> bool:
        try:
            write_rows(Path(path), list(self.model.rows), self.model.param_names)
        except OSError as exc:
            dialogs.error_box(self, "Cannot save the table", f"{path}: {exc.strerror or exc}")
            return False
        self.status.setText(f"Saved {dialogs.counted(len(self.model.rows), 'row')} to {path}")
        return True


def open_batch_window(main_window) -> BatchWindow:
    """Show the main window's batch window (one per window, made on first use)."""
    win = main_window.findChild(BatchWindow)  # its child: made on first use, then kept
    if win is None:
        win = BatchWindow(main_window)
    win.refresh_method()
    win.show()
    win.raise_()
    return win
