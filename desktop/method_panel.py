"""The method panel: model, loss, scale, alpha, held parameters and start values.

Widgets here only *propose* new settings: each edit builds a new
:class:`~desktop.document.Settings` and pushes a
:class:`~desktop.commands.SettingsCommand`; the panel then follows the document
(also after undo/redo). The loss preview draws rho and the weight against the
standardised residual for the chosen loss, straight from ``fitcore.get_loss``.
"""
from __future__ import annotations

from typing import Callable

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QDoubleValidator
from PySide6.QtWidgets import (
    QCheckBox, QComboBox, QDoubleSpinBox, QFormLayout, QGroupBox, QHBoxLayout, QHeaderView,
    QLabel, QLineEdit, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget,
)

from .commands import SettingsCommand
from .document import Document, Settings

FORMULA_ITEM = "formula..."


def model_param_names(settings: Settings) -> tuple[str, ...]:
    """Parameter names of the settings' model (empty when it cannot be built)."""
    try:
        if settings.model_kind == "formula":
            from fitcore.formula import validate_formula

            ok, _msg, names = validate_formula(settings.model)
            return tuple(names) if ok else ()
        import fitcore

        return tuple(fitcore.get_model(settings.model).param_names)
    except Exception:  # noqa: BLE001 - engine module missing or model unknown
        return ()


def _loss_title(name: str) -> str:
    try:
        from fitcore.losses import LOSS_TITLES

        return LOSS_TITLES.get(name, name)
    except Exception:  # noqa: BLE001
        return name


class LossPreview(pg.PlotWidget):
    """rho(u) (scaled to 1 at the edge of the range) and weight(u) for one loss."""

    U_MAX = 6.0

    def __init__(self, parent=None):
        super().__init__(parent, background="w")
        self.setMinimumHeight(150)
        self.setMaximumHeight(190)
        self.setMenuEnabled(False)
        self.setMouseEnabled(False, False)
        self.hideButtons()
        self.getPlotItem().setLabel("bottom", "standardised residual u")
        self.addLegend(offset=(5, 5), labelTextColor=(30, 30, 30))
        self.rho_curve = self.plot(pen=pg.mkPen(31, 92, 170, width=2), name="rho (scaled)")
        self.w_curve = self.plot(pen=pg.mkPen(200, 30, 45, width=2), name="weight")
        self.k_lines = [pg.InfiniteLine(angle=90, pen=pg.mkPen(120, 120, 120, style=Qt.DotLine))
                        for _ in range(2)]
        for ln in self.k_lines:
            self.addItem(ln)
        self.setYRange(0, 1.05)
        self.setXRange(-self.U_MAX, self.U_MAX)
        self.message = ""

    def show_loss(self, name: str, alpha: float | None = None):
        """Draw the loss ``name`` (alpha only for the general/adaptive loss)."""
        u = np.linspace(-self.U_MAX, self.U_MAX, 401)
        try:
            import fitcore

            loss = fitcore.get_loss(name, alpha=alpha if name in ("general", "adaptive") else None)
            rho = np.asarray(loss.rho(u), float)
            w = np.asarray(loss.weight(u), float)
        except Exception as err:  # noqa: BLE001 - engine missing or a bad alpha
            self.message = str(err)
            self.rho_curve.setData([], [])
            self.w_curve.setData([], [])
            return
        top = np.nanmax(np.abs(rho)) or 1.0
        self.rho_curve.setData(u, rho / top)
        self.w_curve.setData(u, w)
        k = getattr(loss, "tuning", None)
        for ln, v in zip(self.k_lines, (-1, 1)):
            ln.setVisible(bool(k))
            if k:
                ln.setValue(v * float(k))
        self.message = ""


class MethodPanel(QWidget):
    """Model, loss and scale controls bound to a :class:`Document`."""

    def __init__(self, document: Document, push: Callable, parent=None):
        super().__init__(parent)
        self.document = document
        self.push = push
        self._updating = False

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        box = QGroupBox("Method")
        form = QFormLayout(box)
        self.model_combo = QComboBox()
        try:
            import fitcore

            names = list(fitcore.builtin_models())
        except Exception:  # noqa: BLE001 - models module not there yet
            names = ["line"]
        for n in names:
            self.model_combo.addItem(n, n)
        self.model_combo.addItem(FORMULA_ITEM, FORMULA_ITEM)
        form.addRow("Model", self.model_combo)
        self.formula_edit = QLineEdit()
        self.formula_edit.setPlaceholderText("e.g. A*exp(-x/tau) + C")
        form.addRow("Formula", self.formula_edit)
        self.formula_msg = QLabel("")
        self.formula_msg.setWordWrap(True)
        form.addRow("", self.formula_msg)
        self.model_info = QLabel("")
        self.model_info.setWordWrap(True)
        self.model_info.setStyleSheet("color: #444;")
        form.addRow("", self.model_info)

        self.loss_combo = QComboBox()
        try:
            import fitcore

            loss_names = list(fitcore.LOSS_NAMES)
        except Exception:  # noqa: BLE001
            loss_names = ["l2", "huber"]
        for n in loss_names:
            self.loss_combo.addItem(_loss_title(n), n)
        form.addRow("Loss", self.loss_combo)

        scale_row = QHBoxLayout()
        self.scale_combo = QComboBox()
        self.scale_combo.addItem("auto (robust estimate)", "auto")
        self.scale_combo.addItem("fixed value", "fixed")
        self.scale_edit = QLineEdit()
        self.scale_edit.setValidator(QDoubleValidator(1e-300, 1e300, 12))
        self.scale_edit.setPlaceholderText("scale in y units")
        scale_row.addWidget(self.scale_combo)
        scale_row.addWidget(self.scale_edit)
        form.addRow("Scale", scale_row)

        self.alpha_spin = QDoubleSpinBox()
        self.alpha_spin.setRange(-20.0, 2.0)
        self.alpha_spin.setSingleStep(0.25)
        self.alpha_spin.setDecimals(3)
        form.addRow("Alpha", self.alpha_spin)
        for combo in (self.model_combo, self.loss_combo, self.scale_combo):
            combo.setSizeAdjustPolicy(QComboBox.AdjustToMinimumContentsLengthWithIcon)
            combo.setMinimumContentsLength(12)
        lay.addWidget(box)

        pbox = QGroupBox("Start values and held parameters")
        pl = QVBoxLayout(pbox)
        self.param_table = QTableWidget(0, 3)
        self.param_table.setHorizontalHeaderLabels(["parameter", "start / held value", "hold"])
        header = self.param_table.horizontalHeader()
        # the value column takes the spare width, so its header is not cut short
        header.setSectionResizeMode(0, QHeaderView.ResizeToContents)
        header.setSectionResizeMode(1, QHeaderView.Stretch)
        header.setSectionResizeMode(2, QHeaderView.ResizeToContents)
        self.param_table.verticalHeader().setVisible(False)
        self.param_table.setMaximumHeight(150)
        pl.addWidget(self.param_table)
        hint = QLabel("Blank start = automatic. A held parameter keeps its value in the fit.")
        hint.setWordWrap(True)
        hint.setStyleSheet("color: #555;")
        pl.addWidget(hint)
        lay.addWidget(pbox)

        prev = QGroupBox("Loss preview")
        prl = QVBoxLayout(prev)
        self.preview = LossPreview()
        prl.addWidget(self.preview)
        lay.addWidget(prev)
        lay.addStretch(1)

        self.model_combo.activated.connect(self._on_model_picked)
        self.formula_edit.textChanged.connect(self._on_formula_typed)
        self.formula_edit.editingFinished.connect(self._on_formula_done)
        self.loss_combo.activated.connect(self._on_loss_picked)
        self.scale_combo.activated.connect(self._on_scale_changed)
        self.scale_edit.editingFinished.connect(self._on_scale_changed)
        self.alpha_spin.editingFinished.connect(self._on_alpha_changed)
        self.param_table.itemChanged.connect(self._on_param_edited)
        document.subscribe(self._on_document)
        self._sync_from_document()

    # ------------------------------------------------------------ helpers
    def _propose(self, new: Settings, text: str):
        if self._updating or new == self.document.settings:
            return
        self.push(SettingsCommand(self.document, new, text))

    @staticmethod
    def _prune(new: Settings) -> Settings:
        names = set(model_param_names(new))
        return new.with_(fixed={k: v for k, v in new.fixed if k in names},
                         p0={k: v for k, v in new.p0 if k in names})

    # ------------------------------------------------------------ edits
    def _on_model_picked(self, _i=None):
        name = self.model_combo.currentData()
        s = self.document.settings
        if name == FORMULA_ITEM:
            self.formula_edit.setFocus()
            text = self.formula_edit.text().strip()
            if text:
                self._on_formula_done()
            return
        self._propose(self._prune(s.with_(model=name, model_kind="builtin")), f"Model: {name}")

    def _on_formula_typed(self, text: str):
        text = text.strip()
        if not text:
            self.formula_msg.setText("")
            return
        try:
            from fitcore.formula import validate_formula

            ok, msg, _names = validate_formula(text)
        except Exception as err:  # noqa: BLE001 - formula module not there
            ok, msg = False, f"formulas are not available ({err})"
        colour = "#1a7f37" if ok else "#b42318"
        self.formula_msg.setText(f"<span style='color:{colour}'>{msg}</span>")

    def _on_formula_done(self):
        text = self.formula_edit.text().strip()
        if not text:
            return
        try:
            from fitcore.formula import validate_formula

            ok, _msg, _names = validate_formula(text)
        except Exception:  # noqa: BLE001
            ok = False
        if not ok:
            return
        s = self.document.settings
        self._propose(self._prune(s.with_(model=text, model_kind="formula")), "Model: formula")

    def _on_loss_picked(self, _i=None):
        name = self.loss_combo.currentData()
        self._propose(self.document.settings.with_(loss=name), f"Loss: {_loss_title(name)}")

    def _on_scale_changed(self):
        s = self.document.settings
        if self.scale_combo.currentData() == "auto":
            self.scale_edit.setEnabled(False)
            self._propose(s.with_(scale="auto"), "Scale: auto")
            return
        self.scale_edit.setEnabled(True)
        try:
            v = float(self.scale_edit.text().replace(",", "."))
        except ValueError:
            v = 0.0
        if not (v > 0 and np.isfinite(v)):
            res = self.document.result
            if res is not None and np.isfinite(res.scale) and res.scale > 0:
                v = float(res.scale)
                self._updating = True
                self.scale_edit.setText(f"{v:.6g}")
                self._updating = False
            else:
                return
        self._propose(s.with_(scale=v), f"Scale: {v:.6g}")

    def _on_alpha_changed(self):
        v = float(self.alpha_spin.value())
        self._propose(self.document.settings.with_(alpha=v), f"Alpha: {v:g}")

    def _on_param_edited(self, _item):
        if self._updating:
            return
        fixed, p0 = {}, {}
        res = self.document.result
        for r in range(self.param_table.rowCount()):
            name = self.param_table.item(r, 0).text()
            txt = (self.param_table.item(r, 1).text() if self.param_table.item(r, 1) else "").strip()
            held = self.param_table.item(r, 2).checkState() == Qt.Checked
            val = None
            if txt:
                try:
                    val = float(txt.replace(",", "."))
                except ValueError:
                    val = None
            if held:
                if val is None and res is not None and name in res.param_names:
                    val = res[name]
                if val is not None:
                    fixed[name] = val
            elif val is not None:
                p0[name] = val
        self._propose(self.document.settings.with_(fixed=fixed, p0=p0), "Held/start values")

    # ------------------------------------------------------------ follow the document
    def _on_document(self, event, **info):
        if event in ("settings", "data"):
            self._sync_from_document()
        elif event == "result" and self.document.settings.loss == "adaptive":
            res = self.document.result
            self.preview.show_loss("adaptive", res.alpha if res is not None else None)

    def _sync_from_document(self):
        s = self.document.settings
        self._updating = True
        try:
            if s.model_kind == "formula":
                self.model_combo.setCurrentIndex(self.model_combo.findData(FORMULA_ITEM))
                if self.formula_edit.text().strip() != s.model:
                    self.formula_edit.setText(s.model)
            else:
                i = self.model_combo.findData(s.model)
                if i >= 0:
                    self.model_combo.setCurrentIndex(i)
            self.model_info.setText(self._model_text(s))
            i = self.loss_combo.findData(s.loss)
            if i >= 0:
                self.loss_combo.setCurrentIndex(i)
            if s.scale == "auto":
                self.scale_combo.setCurrentIndex(0)
                self.scale_edit.setEnabled(False)
            else:
                self.scale_combo.setCurrentIndex(1)
                self.scale_edit.setEnabled(True)
                self.scale_edit.setText(f"{float(s.scale):.6g}")
            self.alpha_spin.setValue(float(s.alpha))
            self.alpha_spin.setEnabled(s.loss == "general")
            names = model_param_names(s)
            fixed, p0 = dict(s.fixed), dict(s.p0)
            self.param_table.setRowCount(len(names))
            for r, n in enumerate(names):
                it = QTableWidgetItem(n)
                it.setFlags(Qt.ItemIsEnabled)
                self.param_table.setItem(r, 0, it)
                v = fixed.get(n, p0.get(n))
                self.param_table.setItem(r, 1, QTableWidgetItem("" if v is None else f"{v:.10g}"))
                hold = QTableWidgetItem("")
                hold.setFlags(Qt.ItemIsEnabled | Qt.ItemIsUserCheckable)
                hold.setCheckState(Qt.Checked if n in fixed else Qt.Unchecked)
                self.param_table.setItem(r, 2, hold)
            res = self.document.result
            alpha = s.alpha if s.loss == "general" else (res.alpha if res is not None and res.alpha is not None else None)
            self.preview.show_loss(s.loss, alpha)
        finally:
            self._updating = False

    @staticmethod
    def _model_text(s: Settings) -> str:
        if s.model_kind == "formula":
            return ""
        try:
            import fitcore

            m = fitcore.get_model(s.model)
            return m.formula or m.title
        except Exception:  # noqa: BLE001
            return ""
