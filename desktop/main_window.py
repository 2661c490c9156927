"""The Ballast main window: layout, menus, shortcuts, opening files, window state.

Layout: the method panel at the left; at the right the plot beside the estimates,
over a tab area as wide as both (the points table, and the loss comparison and point
diagnostics when opened). The window owns the document, the undo stack and the fit runner.
"""
from __future__ import annotations

import os

import numpy as np
from fitcore import models
from PySide6.QtCore import (
    QCoreApplication, QEventLoop, QItemSelection, QItemSelectionModel, QSettings, Qt, QTimer,
)
from PySide6.QtGui import QAction, QActionGroup, QGuiApplication, QKeySequence, QUndoStack
from PySide6.QtWidgets import (
    QAbstractItemView, QFileDialog, QLabel, QMainWindow, QMessageBox, QProgressDialog, QScrollArea, QSplitter,
    QTableView, QTabWidget, QVBoxLayout, QWidget,
)

from fitcore.losses import loss_phrase
from fitcore.report import loss_title, point_label
from fitcore.model_choice import fit_problem

from . import dialogs, gui_gc, pane_layout
from .banner import Banner
from .commands import MaskCommand, SettingsCommand
from .compare_view import CompareView
from .diagnostics_view import DiagnosticsController
from .document import Document, Measurements, Settings
from .estimates_view import CAUTION, EstimatesView
from .method_panel import MethodPanel
from .pane_layout import AnalysisTab
from .plot_view import PlotView
from .points_model import COL, COLUMNS, ColumnFitter, PointsModel, ReasonDelegate, make_proxy
from .report_export import ReportExporter
from .session_io import SessionManager
from .unknowns_view import UnknownsView
from . import jobs
from .fit_runner import FitRunner
from .jobs import Channel

FILE_FILTER = ("Measurements (*.csv *.tsv *.txt *.xlsx *.ods);;Ballast sessions (*.ballast);;"
               "All files (*)")
MAX_RECENT = 8
#: points a new data set's method is tried on before the data replace the work
TRIAL_POINTS = 2000


class OpenCancelled(Exception):
    """Opening was cancelled (the progress box's Cancel): nothing changes."""


def model_title(settings: Settings) -> str:
    """A model's name for messages: the built-in title, or the formula."""
    if settings.model_kind == "formula":
        return f"formula {settings.model}"
    return models.model_title(settings.model, **settings.model_options)


class MainWindow(QMainWindow):
    """The window.

    Parameters
    ----------
    qsettings
        Where window state and recent files are remembered; default
        ``QSettings("Ballast", "Ballast")``.
    """

    def __init__(self, qsettings: QSettings | None = None, parent=None, recovery_dir=None):
        super().__init__(parent)
        gui_gc.install()  # cyclic garbage (closed windows' widgets) collected on this thread only
        self.setWindowTitle("Ballast")
        self.qsettings = qsettings if qsettings is not None else QSettings("Ballast", "Ballast")
        self.document = Document()
        self.undo_stack = QUndoStack(self)
        self.ask_reasons = True  # on by default: a record wants a reason

        self.plot = PlotView(self.document, self.push, ask_reason=self._ask_reason)
        self.points_model = PointsModel(self.document, self.push, self)
        self.proxy = make_proxy(self.points_model, self)
        self.table = QTableView()
        self.table.setModel(self.proxy)
        self.column_fitter = ColumnFitter(self.table, self.document)
        self.table.setSortingEnabled(True)
        self.table.sortByColumn(-1, Qt.AscendingOrder)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.ExtendedSelection)
        self.table.verticalHeader().setVisible(False)
        self.table.verticalHeader().setDefaultSectionSize(22)
        self.table.setAlternatingRowColors(False)
        self.table.setEditTriggers(QAbstractItemView.DoubleClicked | QAbstractItemView.EditKeyPressed)
        # a reason typed and not yet confirmed is written before any save, copy or close
        self.reason_delegate = ReasonDelegate(self.table)
        self.table.setItemDelegateForColumn(COL["reason"], self.reason_delegate)
        self.document.add_pending_edit(self.reason_delegate.commit_open)
        self.method_panel = MethodPanel(self.document, self.push)
        self.estimates = EstimatesView(self.document)
        self.runner = FitRunner(self.document, parent=self)

        # messages the analyst must read (read notes, a model kept or changed) stay in a
        # banner above the plot and the estimates (as wide as both: a few lines, not a
        # column of them over a narrow plot); the status bar only carries passing news
        self.banner = Banner()
        self.model_check = Channel(self)
        # files are read (and sessions checked) by jobs in a child process: a slow or
        # hostile file never holds the window, and Cancel ends the read at once
        self.reader = Channel(self)
        self.reading = None  # the Job of the read in progress (tests and scripts)
        self.read_progress: QProgressDialog | None = None
        jobs.warm_up()  # the first file opens without waiting for a child to start
        self.model_check.finished.connect(self._model_check_done)
        self._model_check_for = None  # (measurements, settings) the running check is about
        self._model_problem = ""  # why the method kept for new data does not fit them
        self._trial_fit = None  # (measurements, settings, result, seconds): see method_for
        # the points table and the analyses (loss comparison, point diagnostics) share a
        # tab area under the plot and the estimates, as wide as both: at 1000 x 650 every
        # column of the points table fits, and opening an analysis never squeezes the plot
        self.lower_tabs = QTabWidget()
        self.lower_tabs.setDocumentMode(True)
        self.lower_tabs.addTab(self.table, "Points")
        self.top_split = QSplitter(Qt.Horizontal)
        self.top_split.addWidget(self.plot)
        self.top_split.addWidget(self.estimates)
        self.top_split.setStretchFactor(0, 1)
        self.top_split.setStretchFactor(1, 0)
        self.centre = QSplitter(Qt.Vertical)
        self.centre.addWidget(self.top_split)
        self.centre.addWidget(self.lower_tabs)
        self.centre.setStretchFactor(0, 3)
        self.centre.setStretchFactor(1, 2)
        self.centre.setCollapsible(0, False)
        scroll = QScrollArea()
        scroll.setWidget(self.method_panel)
        scroll.setWidgetResizable(True)
        scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)
        scroll.setMinimumWidth(300)
        self.main_split = QSplitter(Qt.Horizontal)
        self.main_split.addWidget(scroll)
        right = QWidget()
        right_lay = QVBoxLayout(right)
        right_lay.setContentsMargins(0, 0, 0, 0)
        right_lay.setSpacing(0)
        right_lay.addWidget(self.banner)
        right_lay.addWidget(self.centre, 1)
        self.main_split.addWidget(right)
        self.main_split.setStretchFactor(0, 0)
        self.main_split.setStretchFactor(1, 1)
        self.main_split.setSizes([300, 1180])
        self.setCentralWidget(self.main_split)

        self.busy_label = QLabel("")
        self.statusBar().addPermanentWidget(self.busy_label)
        self.runner.busy_changed.connect(lambda b: self.busy_label.setText("fitting..." if b else ""))
        self.sessions = SessionManager(self, recovery_dir=recovery_dir, qsettings=qsettings)
        self.reports = ReportExporter(self)
        self.setAcceptDrops(True)
        self._build_menus()
        self.table.selectionModel().selectionChanged.connect(self._table_selection_changed)
        self.estimates.copy_button.clicked.connect(self.copy_estimates)
        self.document.subscribe(self._on_document)
        self._syncing_selection = False
        self._restore_state()
        self._build_analysis()
        self._build_unknowns()
        pane_layout.install(self)  # pane minimum widths that fit 1000 px, panes sized to fit

    # ------------------------------------------------------------------ menus
    def _action(self, menu, text, slot, shortcut=None, checkable=False, checked=False, tip=""):
        act = QAction(text, self)
        if shortcut is not None:
            act.setShortcut(QKeySequence(shortcut))
        if checkable:
            act.setCheckable(True)
            act.setChecked(checked)
            act.toggled.connect(slot)
        else:
            act.triggered.connect(slot)
        if tip:
            act.setStatusTip(tip)
        menu.addAction(act)
        self.addAction(act)
        return act

    def _build_menus(self):
        mb = self.menuBar()
        f = mb.addMenu("&File")
        self._action(f, "&Open...", self.open_dialog, QKeySequence.Open)
        self._action(f, "Open &sample set...", self.open_sample_picker, "Ctrl+Shift+O")
        self.recent_menu = f.addMenu("Open &recent")
        self._action(f, "&Paste table", self.paste_table, "Ctrl+Shift+V",
                     tip="Read a table copied from a spreadsheet")
        self._action(f, "Fit &many files...", self.fit_many_files,
                     tip="Fit every curve of many files with the method on screen")
        f.addSeparator()
        self._action(f, "Open s&ession...", self.sessions.open_dialog, "Ctrl+Alt+O")
        self._action(f, "&Save session", self.sessions.save, QKeySequence.Save)
        self._action(f, "Save session &as...", self.sessions.save_as, QKeySequence.SaveAs)
        f.addSeparator()
        self.reports.add_export_menu(f)
        f.addSeparator()
        self._action(f, "&Quit", self.close, QKeySequence.Quit)

        e = mb.addMenu("&Edit")
        self.undo_action = self.undo_stack.createUndoAction(self, "&Undo")
        self.undo_action.setShortcut(QKeySequence.Undo)
        self.redo_action = self.undo_stack.createRedoAction(self, "&Redo")
        self.redo_action.setShortcuts([QKeySequence(QKeySequence.Redo), QKeySequence("Ctrl+Y")])
        for a in (self.undo_action, self.redo_action):
            e.addAction(a)
            self.addAction(a)
        e.addSeparator()
        self._action(e, "&Exclude selected points", self.exclude_selected, QKeySequence.Delete)
        self._action(e, "Re&store selected points", self.restore_selected, "Insert")
        self._action(e, "&Toggle selected points", self.toggle_selected, "Ctrl+T")
        self.reason_action = self._action(e, "Ask for a &reason when excluding", self._set_ask_reasons,
                                          checkable=True, checked=True)
        e.addSeparator()
        self._action(e, "&Copy estimates", self.copy_estimates, "Ctrl+Shift+C")
        self.reports.add_copy_menu(e)

        v = mb.addMenu("&View")
        self.band_action = self._action(v, "Confidence &band", self.plot.set_band_visible, "Ctrl+B",
                                        checkable=True, checked=True)
        self.logx_action = self._action(v, "Log &x axis", lambda on: self._set_log(log_x=on),
                                        "Ctrl+L", checkable=True)
        self.logy_action = self._action(v, "Log &y axis", lambda on: self._set_log(log_y=on),
                                        "Ctrl+Shift+L", checkable=True)
        self.std_resid_action = self._action(
            v, "&Standardised residuals", self.plot.set_residuals_standardised, checkable=True, checked=True,
            tip="Residual plot in scales (residual / scale, beyond \u00b16 drawn at the edge), or in units of y")
        self.box_action = self._action(v, "Box &mode (drag excludes)", self.plot.set_box_mode, "Ctrl+M",
                                       checkable=True,
                                       tip="Drag a rectangle to exclude points; Ctrl+drag restores")
        self._action(v, "C&orrelation matrix", self.estimates.corr_button.setChecked, "Ctrl+K",
                     checkable=True)
        v.addSeparator()
        self._action(v, "&Refit now", self.runner.fit_now, "F5")

        h = mb.addMenu("&Help")
        self._action(h, "&About Ballast", self.about)
        self._action(h, "&Mouse and keys", self.show_help, QKeySequence.HelpContents)
        self._update_recent_menu()

    def push(self, command):
        self.undo_stack.push(command)

    # ------------------------------------------------------------------ state
    def _restore_state(self):
        """Window layout and view switches from the settings file. A damaged entry (wrong
        type, unreadable bytes) is reset to its default and listed in
        ``self.settings_reset`` (the entry point tells the user); the window always opens."""
        s = self.qsettings
        self.settings_reset: list[str] = []

        def restore(key, apply):
            v = s.value(key)
            if v is None:
                return False
            try:
                ok = apply(v) if isinstance(v, (bytes, bytearray)) or hasattr(v, "toHex") else False
            except (TypeError, ValueError):
                ok = False
            if ok is False:
                s.remove(key)
                self.settings_reset.append(key)
            return ok is not False

        if not restore("window/geometry", self.restoreGeometry):
            self.resize(1480, 900)
        restore("window/state", self.restoreState)
        for key, split in (("window/main_split", self.main_split), ("window/centre", self.centre),
                           ("window/top_split", self.top_split)):
            restore(key, split.restoreState)
        for key, action, default in (("view/band", self.band_action, True), ("view/log_x", self.logx_action, False),
                                     ("view/log_y", self.logy_action, False),
                                     ("view/std_residuals", self.std_resid_action, True),
                                     ("edit/ask_reasons", self.reason_action, True)):
            v = s.value(key, default)
            if isinstance(v, str) and v.strip().lower() in ("true", "false", "1", "0"):
                v = v.strip().lower() in ("true", "1")
            if not isinstance(v, bool):
                s.remove(key)
                self.settings_reset.append(key)
                v = default
            action.setChecked(v)

    def save_state(self):
        s = self.qsettings
        s.setValue("window/geometry", self.saveGeometry())
        s.setValue("window/state", self.saveState())
        s.setValue("window/main_split", self.main_split.saveState())
        s.setValue("window/centre", self.centre.saveState())
        s.setValue("window/top_split", self.top_split.saveState())
        s.setValue("view/band", self.band_action.isChecked())
        s.setValue("view/log_x", self.logx_action.isChecked())
        s.setValue("view/log_y", self.logy_action.isChecked())
        s.setValue("view/std_residuals", self.std_resid_action.isChecked())
        s.setValue("edit/ask_reasons", self.reason_action.isChecked())
        s.sync()

    def closeEvent(self, ev):
        if not self.sessions.confirm_close():
            ev.ignore()
            return
        self.save_state()
        self.model_check.shutdown(1000)
        self.reader.shutdown(1000)
        self.method_panel.formula_checker.shutdown(1000)
        self.runner.enabled = False
        self.runner.wait(5000)
        self._shutdown_analysis()
        super().closeEvent(ev)

    def recent_files(self) -> list[str]:
        v = self.qsettings.value("recent", [])
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, (list, tuple)):  # a damaged settings entry: forget it
            self.qsettings.remove("recent")
            return []
        return [p for p in v if isinstance(p, str) and p]

    def add_recent(self, path: str):
        """Put ``path`` first in File > Open recent (the session manager calls this
        after a save or an open)."""
        path = os.path.abspath(path)
        items = [p for p in self.recent_files() if p != path]
        self.qsettings.setValue("recent", [path] + items[: MAX_RECENT - 1])
        self._update_recent_menu()

    def _update_recent_menu(self):
        self.recent_menu.clear()
        files = self.recent_files()
        for i, p in enumerate(files):
            act = self.recent_menu.addAction(f"&{i + 1} {os.path.basename(p)}")
            act.setStatusTip(p)
            act.triggered.connect(lambda _=False, p=p: self.open_path(p))
        self.recent_menu.setEnabled(bool(files))

    # ------------------------------------------------------------------ opening
    def open_dialog(self):
        start = os.path.dirname(self.recent_files()[0]) if self.recent_files() else str(dialogs.SAMPLE_DIR)
        path, _ = QFileDialog.getOpenFileName(self, "Open measurements", start, FILE_FILTER)
        if path:
            self.open_path(path)

    def open_sample_picker(self):
        dlg = dialogs.SamplePicker(self)
        if dlg.exec() and dlg.path():  # safe: Qt dialog event loop
            self.open_path(dlg.path())

    def choose_columns(self, table):
        """``(x, y, sigma)`` for a table with more than two numeric columns; None = cancel."""
        dlg = dialogs.ColumnDialog(table, self)
        return dlg.choice() if dlg.exec() else None  # safe: Qt dialog event loop

    def open_path(self, path, columns=None) -> bool:
        """Read a file and show it. On any problem an error box; the data stay as they were.

        Unsaved changes on screen are offered for saving first (Save / Discard / Cancel;
        see :meth:`SessionManager.confirm_replace`); Cancel changes nothing.
        """
        name = os.path.basename(str(path))
        if str(path).lower().endswith(".ballast"):
            if not self.sessions.confirm_replace(name):
                return False
            return self.sessions.open_session(path)
        # read first: a file that cannot be read never asks about the work on screen
        job = self.run_job("read", {"path": str(path)}, f"Reading {name}...")
        if job.state == "cancelled":
            self.statusBar().showMessage(f"Opening {name} cancelled; nothing changed.", 6000)
            return False
        if job.state == "failed":
            text = job.message
            # the reader's messages usually name the file already: say it once
            dialogs.error_box(self, "Cannot open file", text if name in text else f"{name}: {text}")
            return False
        table = job.result
        if not self.sessions.confirm_replace(name):
            return False
        suggested = dialogs.sample_method(path)
        settings = Settings(**suggested) if suggested else None
        if self._load_table(table, columns, settings, name=os.path.basename(str(path))):
            view = dialogs.sample_view(path)
            if view is not None:  # a sample set opens with the axes it is meant to be seen on
                self.logx_action.setChecked(view["log_x"])
                self.logy_action.setChecked(view["log_y"])
            self.add_recent(str(path))
            note = self.log_axis_note()
            if note:
                self.statusBar().showMessage(f"{self.statusBar().currentMessage()} {note}", 15000)
            return True
        return False

    def run_job(self, kind: str, payload: dict, text: str, where: str | None = None):
        """Run a job on the reader channel and wait for its end while the window keeps
        serving events; returns the ended :class:`~desktop.jobs.Job` (its ``state`` is
        "finished", "failed" or "cancelled").

        A progress box with Cancel appears when the job takes longer than 0.4 s (window
        modal: the work on screen cannot change meanwhile). Cancel ends the job at once
        and nothing on screen changes.
        """
        job = self.reader.submit(kind, payload, where=where)
        self.reading = job
        if job.running:
            box = QProgressDialog(text, "Cancel", 0, 0, self)
            box.setWindowTitle("Ballast")
            box.setWindowModality(Qt.WindowModal)
            box.setMinimumDuration(400)
            box.setAutoReset(False)
            box.canceled.connect(job.cancel)
            job.progress.connect(lambda done, total: (box.setMaximum(total), box.setValue(done)) if total else None)
            self.read_progress = box
            loop = QEventLoop()
            for sig in (job.finished, job.failed, job.cancelled):
                sig.connect(lambda *_: loop.quit())
            if job.running:  # the answer may have come while the box was built
                loop.exec()  # safe: Qt event loop, until the job has ended
            if job.running:  # the application is quitting (it ends every event loop)
                job.cancel()
                QTimer.singleShot(0, QCoreApplication.quit)  # for the main loop, which may not run yet
            self.read_progress = None
            box.canceled.disconnect(job.cancel)
            box.close()
            box.deleteLater()
        if self.reading is job:
            self.reading = None
        return job

    def _set_log(self, log_x=None, log_y=None):
        self.plot.set_log(log_x=log_x, log_y=log_y)
        note = self.log_axis_note()
        if note:
            self.statusBar().showMessage(note, 15000)

    def log_axis_note(self) -> str:
        """Which points a log axis cannot draw (x or y <= 0), or "" when all are drawn."""
        m = self.document.measurements
        if not self.document.has_data:
            return ""
        parts = []
        for on, name, values in ((self.plot.log_x, "x", m.x), (self.plot.log_y, "y", m.y)):
            if not on:
                continue
            bad = np.flatnonzero(~(np.asarray(values, float) > 0))
            if bad.size:
                shown = ", ".join(point_label(i, m.source_rows) for i in bad[:8]) \
                    + (", ..." if bad.size > 8 else "")
                parts.append(f"log {name} axis: {bad.size} point{'s' if bad.size > 1 else ''} with "
                             f"{name} <= 0 not drawn ({shown}); still fitted")
        return ("Note: " + "; ".join(parts) + ". Switch the log axis off (View menu) to see them."
                if parts else "")

    def paste_table(self):
        if not self.sessions.confirm_replace("the pasted table"):
            return False
        text = QGuiApplication.clipboard().text()
        if not text.strip():
            dialogs.error_box(self, "Nothing to paste", "The clipboard holds no text. Copy a block "
                              "of cells in a spreadsheet first.")
            return False
        job = self.run_job("paste", {"text": text}, "Reading the pasted table...")
        if job.state == "cancelled":
            self.statusBar().showMessage("Pasting cancelled; nothing changed.", 6000)
            return False
        if job.state == "failed":
            dialogs.error_box(self, "Cannot read the pasted table", job.message)
            return False
        return self._load_table(job.result, None)

    def _load_table(self, table, columns, settings: Settings | None = None, name: str = "") -> bool:
        """Show a table's columns as the new data, with a method that can fit them.

        ``settings``: a method suggested for these data (sample sets); otherwise the
        method on screen is kept (see :meth:`method_for`). Data no method can fit are
        refused and the work on screen stays as it was.
        """
        try:
            numeric = table.numeric_columns()
            if columns is None and len(numeric) > 2:
                columns = self.choose_columns(table)
                if columns is None:
                    return False
            x, y, s = columns if columns is not None else (None, None, None)
            sel = table.choose(x, y, s)
            if len(sel) == 0:
                raise ValueError("no row holds usable numbers in both x and y")
            m = Measurements(sel.x, sel.y, sel.sigma, x_name=sel.x_name, y_name=sel.y_name,
                             sigma_name=sel.sigma_name or "", x_unit=sel.x_unit, y_unit=sel.y_unit,
                             source=sel.source, notes=sel.notes, source_rows=sel.source_rows)
            settings, method_note = self.method_for(m, settings)
        except OpenCancelled:
            self.statusBar().showMessage("Opening cancelled; nothing changed.", 6000)
            return False
        except (ValueError, KeyError) as err:
            what = f"{name}: " if name else ""
            keep = " The data on screen stay as they were." if self.document.has_data else ""
            dialogs.error_box(self, "Cannot use this table", f"{what}{err}{keep}")
            return False
        self.undo_stack.clear()  # a new data set starts a new history
        self.model_check.cancel()
        self._model_check_for = None
        trial, self._trial_fit = self._trial_fit, None
        if trial is not None and trial[0] is m and trial[1] is settings:
            # the trial fit was the fit of exactly these inputs (same method, all points, none
            # excluded): it is shown as the first result instead of fitting them again (the
            # window's process then needs no scipy before its first result: issue 12)
            self.runner.enabled = False
            try:
                self.document.apply_measurements(m, settings=settings)
            finally:
                self.runner.enabled = True
            self.runner.deliver(trial[2], trial[3])
        else:
            self.document.apply_measurements(m, settings=settings)
        name = os.path.basename(m.source) if m.source != "clipboard" else "pasted table"
        self.setWindowTitle(f"Ballast - {name}")
        self.banner.clear()
        self._show_read_notes(m, name)
        if self._model_problem:
            self._start_model_check(m, settings, self._model_problem)
        elif method_note:
            self.banner.show_message("model", method_note,
                                     kind="warning" if method_note.startswith("Switched") else "info")
        self.statusBar().showMessage(f"{dialogs.counted(m.n, 'point')} from {name}"
                                     + (f" ({dialogs.counted(len(m.notes), 'read note')} above the plot)"
                                        if m.notes else ""), 15000)
        return True

    # ------------------------------------------------------------------ notes and model check
    def _show_read_notes(self, m: Measurements, name: str) -> None:
        """What the reader left out or guessed, in the banner until closed."""
        notes = [str(n) for n in m.notes]
        if not notes:
            return
        more = len(notes) - 3
        text = (f"Read notes for {name}: " + "; ".join(notes[:3])
                + (f"; and {more} more (point at this text to see all)" if more > 0 else ""))
        self.banner.show_message("notes", text, tooltip="\n".join(notes))

    def _start_model_check(self, m: Measurements, settings: Settings, problem: str) -> None:
        """Try the catalogue models off the GUI thread (see fitcore.model_choice)."""
        self._model_check_for = (m, settings)
        self.banner.show_message(
            "model", f"{model_title(settings)} does not fit these data ({problem}). "
            "Trying the catalogue models...", kind="warning")
        used = ~self.document.excluded
        x, y = m.x[used], m.y[used]
        sig = None if m.sigma is None else m.sigma[used]
        current = settings.model

        self.model_check.submit("model_check", {"x": x, "y": y, "sigma": sig, "current": current})

    def _model_check_done(self, choice) -> None:
        m, settings = self._model_check_for or (None, None)
        self._model_check_for = None
        doc = self.document
        if m is None or doc.measurements is not m:
            return  # new data meanwhile: the answer is moot
        if doc.settings != settings:  # a method chosen by hand meanwhile
            self.banner.clear("model")
            return
        if choice.keep or choice.best is None or choice.best.model == settings.model:
            extra = "" if choice.best is None else " No catalogue model fits them better."
            self.banner.show_message("model", f"{choice.reason()}{extra} Choose another model in Method.",
                                     kind="warning")
            return
        # the loss, scale and weighting stay; held and start values belonged to the old model
        new = settings.with_(model=choice.best.model, model_kind="builtin", model_options={}, p0=None, fixed={})
        cmd = SettingsCommand(doc, new, text=f"Model: {choice.best.title}")
        was = self.sessions.modified
        self.push(cmd)
        # the program's own choice for data just opened is not a change the user made: a
        # file just opened still asks nothing when replaced (the change stays undoable)
        self.sessions.modified = was
        self.banner.show_message(
            "model", f"Model changed to {choice.best.title}. {choice.reason()} "
            f"Of the catalogue models it is the simplest that fits these data as well as any "
            f"(robust criterion over {len(choice.scores)} models).",
            kind="warning", actions=[("Undo", lambda: self._undo_model_change(cmd, settings))])

    def _undo_model_change(self, cmd, before: Settings) -> None:
        stack = self.undo_stack
        if stack.index() > 0 and stack.command(stack.index() - 1) is cmd:
            stack.undo()
        elif self.document.settings != before:
            self.push(SettingsCommand(self.document, before, text=f"Model: {model_title(before)}"))
        self.banner.show_message("model", f"Model back to {model_title(before)}, which does not fit these "
                                 "data well. Choose another in Method.", kind="warning")

    def method_for(self, m: Measurements, suggested: Settings | None = None):
        """``(settings, note)``: the method new data ``m`` open with, and what to tell.

        The rule: a method suggested for the data (a sample set) is used; otherwise the
        method on screen is kept (the same kind of data every week needs the same
        model), and when there were data before, the note says so. A method that cannot
        fit the new data sensibly (the fit refuses the data, does not converge, or gives
        non-finite estimates; tried on at most 2000 evenly spaced points) gives way to
        a straight line with the same loss, automatic scale and no held or start values,
        and the note says why. When not even the line fits, ``ValueError``: the data
        are refused.
        """
        doc = self.document
        current = doc.settings
        self._model_problem = ""
        self._trial_fit = None
        if suggested is not None:
            first, what = suggested, "the suggested model"
            note = ""
        else:
            first, what = current, "the previous model"
            note = (f"Model kept from the previous data: {model_title(current)}; choose "
                    "another in Method." if doc.has_data else "")
        line = Settings(model="line", loss=first.loss, alpha=first.alpha)
        idx = (np.unique(np.linspace(0, m.n - 1, TRIAL_POINTS).round().astype(np.intp))
               if m.n > TRIAL_POINTS else slice(None))
        # least squares when the robust line cannot fit either: a handful of points is
        # too few for an automatic robust scale (fitcore refuses 2p > n)
        plain = Settings(model="line", loss="l2")
        tries = [first] if first == line else [first, line]
        if line.loss != "l2":
            tries.append(plain)
        problems = []
        for s in tries:
            req = {"model": s.model_spec(), "x": m.x[idx], "y": m.y[idx],
                   "sigma": None if m.sigma is None else m.sigma[idx],
                   "excluded": np.zeros(m.x[idx].size, bool), "kwargs": s.to_fit_kwargs()}
            # in a child process, as part of opening: a model that struggles with the new
            # data (seconds of fitting) never holds the window, and Cancel stops it
            job = self.run_job("fit", req, f"Trying {model_title(s)} on the new data...", where="process")
            if job.state != "finished":
                raise OpenCancelled()
            res, msg = job.result
            if s is first and job.seconds > self.runner.slow_fit_s:
                # the window's own fit of these data will be as slow: in the worker, not inline
                self.runner.last_seconds = max(self.runner.last_seconds, job.seconds)
            if res is not None and not (res.converged and np.all(np.isfinite(res.values))):
                msg = res.message if not res.converged else "the estimates are not finite"
            if msg is None:
                if s is first and suggested is None:
                    self._model_problem = fit_problem(s.model, m.x[idx], res)
                if s is line and first is not line:
                    note = (f"Switched to a straight line: {what}, {model_title(first)}, "
                            f"cannot fit these data ({problems[0].rstrip('.')}). Choose another "
                            "model in Method.")
                elif s is plain:
                    note = (f"Switched to a straight line by least squares: {what}, "
                            f"{model_title(first)} with {loss_phrase(first.loss)}, "
                            f"cannot fit these data ({problems[-1].rstrip('.')}). Choose another "
                            "method in Method.")
                if isinstance(idx, slice):  # all points, none excluded: the data's first fit
                    self._trial_fit = (m, s, res, job.seconds)
                return s, note
            problems.append(msg)
        raise ValueError(f"{dialogs.counted(m.n, 'point')} that cannot be fitted, not even by a "
                         f"straight line ({problems[-1].rstrip('.')}).")

    def fit_many_files(self):
        """File > Fit many files...: the batch window (desktop/batch_window.py)."""
        from .batch_window import open_batch_window  # here: batch_window imports this module

        return open_batch_window(self)

    def load_measurements(self, m: Measurements, settings: Settings | None = None):
        """Show measurements built in code (scripts, benchmarks, tests)."""
        self.undo_stack.clear()
        self.document.apply_measurements(m, settings=settings)
        self.method_panel.sync_from_document()

    def dragEnterEvent(self, ev):
        if ev.mimeData().hasUrls():
            ev.acceptProposedAction()

    def dropEvent(self, ev):
        urls = [u for u in ev.mimeData().urls() if u.isLocalFile()]
        if urls:
            self.open_path(urls[0].toLocalFile())
            ev.acceptProposedAction()

    # ------------------------------------------------------------------ selection
    def selected_points(self) -> np.ndarray:
        rows = self.table.selectionModel().selectedRows()
        return np.array(sorted(self.proxy.mapToSource(i).row() for i in rows), np.intp)

    def _table_selection_changed(self, *_):
        if self._syncing_selection:
            return
        self.document.set_selection(self.selected_points(), origin="table")

    def _on_document(self, event, **info):
        if event == "data" and hasattr(self, "diag_table"):
            self._split_columns()
        if event == "selection" and info.get("origin") != "table":
            self._select_rows(self.document.selection)
        elif event == "result":
            res = self.document.result
            if self.document.fit_failed:
                self.statusBar().showMessage(f"Fit failed: {self.document.fit_message} "
                                             "(the previous result is kept, marked stale)", 15000)
            elif res is not None:
                note = self.log_axis_note()
                self.statusBar().showMessage(f"Fitted {dialogs.counted(res.n_used, 'point')} "
                                             f"({loss_title(res.loss)})." + (f" {note}" if note else ""),
                                             15000 if note else 4000)

    def _select_rows(self, rows):
        sm = self.table.selectionModel()
        self._syncing_selection = True
        try:
            sel = QItemSelection()
            ncol = self.proxy.columnCount() - 1
            rows = np.asarray(rows, np.intp)
            if self.proxy.sortColumn() < 0 and self.proxy.rowCount() == self.points_model.rowCount():
                prow = np.unique(rows)  # unsorted table: table row = point index
            else:
                prow = np.unique([self.proxy.mapFromSource(self.points_model.index(int(r), 0)).row()
                                  for r in rows[:5000]])
            prow = prow[prow >= 0]
            if prow.size:  # one selection range per run of adjacent rows (a box drag: a few)
                cut = np.flatnonzero(np.diff(prow) != 1) + 1
                for a, b in zip(prow[np.r_[0, cut]], prow[np.r_[cut - 1, prow.size - 1]]):
                    sel.select(self.proxy.index(int(a), 0), self.proxy.index(int(b), ncol))
            sm.select(sel, QItemSelectionModel.ClearAndSelect)
            if len(rows):
                pi = self.proxy.mapFromSource(self.points_model.index(int(rows[0]), 0))
                self.table.scrollTo(pi)
        finally:
            self._syncing_selection = False

    # ------------------------------------------------------------------ actions
    def _set_ask_reasons(self, on):
        self.ask_reasons = bool(on)

    def _ask_reason(self, n: int):
        if not self.ask_reasons:
            return ""
        return dialogs.ask_text(self, "Reason for exclusion",
                                f"Why exclude {'this point' if n == 1 else f'these {n} points'}? "
                                "(optional)")

    def _set_selected(self, exclude):
        doc = self.document
        idx = doc.selection if doc.selection.size else self.selected_points()
        if idx.size == 0:
            self.statusBar().showMessage("Select points in the table or the plot first.", 4000)
            return
        if exclude is None:  # toggle each
            target = ~doc.excluded[idx]
        else:
            target = np.full(idx.size, bool(exclude))
        reason = ""
        if target.any():
            reason = self._ask_reason(int(target.sum()))
            if reason is None:
                return
        change = doc.make_mask_change(idx, target, reason=reason)
        if not change.is_empty:
            self.push(MaskCommand(doc, change))

    def exclude_selected(self):
        self._set_selected(True)

    def restore_selected(self):
        self._set_selected(False)

    def toggle_selected(self):
        self._set_selected(None)

    def copy_estimates(self):
        """Copy the estimates as plain text plus HTML (one clipboard item)."""
        return self.reports.copy("default")

    def about(self):
        QMessageBox.about(self, "About Ballast",
                          "<b>Ballast</b>: outlier-aware curve fitting of lab measurements.<br><br>"
                          "Point size shows the robust weight; hollow crossed rings are points "
                          f"you excluded.<br><br><i>{CAUTION}</i>")

    def show_help(self):
        QMessageBox.information(
            self, "Mouse and keys",
            "Click a point: exclude it; click again: restore it.\n"
            "Shift+drag: exclude the points in a rectangle; Ctrl+Shift+drag: restore them.\n"
            "Alt+click / Alt+drag: select without changing.\n"
            "Delete / Insert / Ctrl+T: exclude / restore / toggle the selected points.\n"
            "Ctrl+Z / Ctrl+Shift+Z: undo / redo.  Ctrl+Shift+C: copy estimates.\n"
            "Ctrl+B band, Ctrl+L / Ctrl+Shift+L log axes, Ctrl+M box mode, F5 refit.")

    # ------------------------------------------------------------------ analysis
    def _build_analysis(self):
        """Loss comparison, point diagnostics and bootstrap (issue 6): menu, tabs, note."""
        # the analyses open as tabs beside the points table (or in a window of their own),
        # never as a dock that squeezes the plot
        self.compare_view = CompareView(self.document, self.plot)
        self.compare_pane = AnalysisTab("Loss comparison", self.compare_view, self.lower_tabs,
                                        on_close=self.compare_view.close_comparison)
        self.compare_view.closed.connect(self.compare_pane.remove)
        self.diag_table = QTableView()
        self.diag_table.setModel(self.proxy)
        self.diag_table.setSelectionModel(self.table.selectionModel())  # one selection
        self.diag_table.horizontalHeader().setSortIndicator(-1, Qt.AscendingOrder)
        self.diag_table.setSortingEnabled(True)  # (keeps the shared proxy's order: unsorted)
        self.diag_table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.diag_table.setSelectionMode(QAbstractItemView.ExtendedSelection)
        self.diag_table.verticalHeader().setVisible(False)
        self.diag_table.verticalHeader().setDefaultSectionSize(22)
        self.diag_table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.diag_pane = AnalysisTab("Point diagnostics", self.diag_table, self.lower_tabs,
                                     on_close=lambda: self.diag_action.setChecked(False))
        self.proxy.columnsInserted.connect(self._split_columns)
        self.proxy.columnsRemoved.connect(self._split_columns)
        self.proxy.modelReset.connect(self._split_columns)
        self._split_columns()
        self.diag_note = QLabel("")
        self.diag_note.setWordWrap(True)
        self.diag_note.setVisible(False)
        self.estimates.layout().insertWidget(1, self.diag_note)
        self.diagnostics = DiagnosticsController(self.document, self.points_model, self.plot,
                                                 self.diag_note, parent=self)
        self.last_bootstrap = None  # BootstrapRecord of the last finished bootstrap
        self.bootstrap_dialog = None

        menu = self.menuBar().addMenu("&Analyse")
        menu.aboutToShow.connect(jobs.warm_up)  # a warm child process for the jobs
        help_menu = next((a for a in self.menuBar().actions() if a.text() == "&Help"), None)
        if help_menu is not None:
            self.menuBar().insertMenu(help_menu, menu)
        self.compare_action = self._action(menu, "Loss &comparison...", self.show_comparison, "F6",
                                           tip="Fit under several losses side by side")
        self.diag_action = self._action(menu, "Point &diagnostics", self._set_diagnostics, "F7",
                                        checkable=True,
                                        tip="Leverage, standardised residual and influence columns")
        colour = menu.addMenu("Colour points &by")
        group = QActionGroup(self)
        group.setExclusive(True)
        self.colour_actions = {}
        for mode, text in (("none", "&Weight only"), ("leverage", "&Leverage"),
                           ("influence", "&Influence")):
            act = QAction(text, self)
            act.setCheckable(True)
            act.setChecked(mode == "none")
            act.triggered.connect(lambda _=False, m=mode: self.set_colour_mode(m))
            group.addAction(act)
            colour.addAction(act)
            self.colour_actions[mode] = act
        menu.addSeparator()
        self._action(menu, "&Bootstrap intervals...", self.show_bootstrap, "F8",
                     tip="Case or residual bootstrap percentile intervals")

    def _build_unknowns(self):
        """The Unknowns table (read-back of unknown samples, issue 14), a tab beside the points."""
        self.unknowns = UnknownsView(self.document, self.push, self.plot)
        # a table like the points: in the tab area, so the estimates pane stays short
        self.lower_tabs.addTab(self.unknowns, "Unknowns")

    def show_comparison(self):
        """Open the loss comparison (its tab) and run it for the ticked losses."""
        self.compare_pane.open()
        self.compare_view.run()  # says so when there are no data

    def _set_diagnostics(self, on: bool):
        """Point diagnostics on (their tab opens) or off (the tab goes)."""
        self.diagnostics.set_enabled(on)
        if on:
            self.diag_pane.open()
        else:
            self.diag_pane.remove()

    def _split_columns(self, *_):
        """The points table shows the data and fit columns (sigma only when the data have
        one), the diagnostics tab the point's row, x, y and the diagnostic columns (one
        model, one selection)."""
        base = len(COLUMNS)
        keep = (COL["#"], COL["x"], COL["y"])
        m = self.document.measurements
        no_sigma = m is None or getattr(m, "sigma", None) is None
        for c in range(self.proxy.columnCount()):
            extra = c >= base
            # (an empty sigma column would only narrow the reason column)
            self.table.setColumnHidden(c, extra or (c == COL["sigma_y"] and no_sigma))
            self.diag_table.setColumnHidden(c, not (extra or c in keep))
        header = self.diag_table.horizontalHeader()
        for c in keep:  # as wide as in the points table
            header.resizeSection(c, self.table.horizontalHeader().sectionSize(c))
        fm = header.fontMetrics()
        for c in range(base, self.proxy.columnCount()):
            # the cells' width and the header's text (its size hint keeps room for a sort
            # arrow on every column: too wide for eight columns beside each other)
            text = str(self.proxy.headerData(c, Qt.Horizontal) or "")
            need = max(fm.horizontalAdvance(line) for line in text.split("\n")) + 12
            header.resizeSection(c, max(need, self.diag_table.sizeHintForColumn(c)))

    def set_colour_mode(self, mode: str):
        self.diagnostics.set_colour_mode(mode)
        if mode != "none" and not self.diag_action.isChecked():
            self.diag_action.setChecked(True)
        self.colour_actions[mode].setChecked(True)

    def show_bootstrap(self):
        """Open the (non-modal) bootstrap dialog."""
        if self.bootstrap_dialog is None:
            from .bootstrap_dialog import BootstrapDialog  # here: loaded on first use, not at start

            self.bootstrap_dialog = BootstrapDialog(self.document, self)
            self.bootstrap_dialog.done.connect(self._bootstrap_done)
        self.bootstrap_dialog.show()
        self.bootstrap_dialog.raise_()
        return self.bootstrap_dialog

    def _bootstrap_done(self, record):
        self.last_bootstrap = record

    def current_bootstrap(self):
        """The last bootstrap if it belongs to the result now shown, else None."""
        rec = self.last_bootstrap
        if rec is None or rec.result is not self.document.result or self.document.stale:
            return None
        return rec

    def _shutdown_analysis(self):
        if getattr(self, "compare_view", None) is not None:
            self.compare_view.job.shutdown()
            self.diagnostics.shutdown()
        if getattr(self, "bootstrap_dialog", None) is not None:
            self.bootstrap_dialog.job.shutdown()
        # the idle child processes stay for the next window; they end with the program


def first_sample_set():
    """Path of the first sample set, or None."""
    files = dialogs.sample_sets()
    return str(files[0]) if files else None
