"""The method panel: model, loss, scale, alpha, held parameters and start values.

Widgets here only *propose* new settings: each edit builds a new
:class:`~desktop.document.Settings` and pushes a
:class:`~desktop.commands.SettingsCommand`; the panel then follows the document
(also after undo/redo). The loss preview draws rho and the weight against the
standardised residual for the chosen loss, straight from ``fitcore.get_loss``.
"""
from __future__ import annotations

import html
from typing import Callable

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import (
    QComboBox, QDoubleSpinBox, QFormLayout, QGroupBox, QHBoxLayout, QHeaderView,
    QLabel, QLineEdit, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget,
)

from fitcore.losses import LOSS_NAMES, LOSSES, OWN_SCALE, get_loss, loss_title
from fitcore.weighting import RULES, TITLES
from fitcore.models import builtin_models, model_short_title, model_title

from .commands import SettingsCommand
from .document import Document, Settings
from .jobs import Channel

FORMULA_ITEM = "formula..."

OK_COLOUR, WARN_COLOUR, BAD_COLOUR = "#1a7f37", "#b45309", "#b42318"
#: names that usually mean the variable, when a formula uses them instead of x
_VARIABLE_LIKE = ("t", "time", "T", "X", "s", "z", "conc", "dose", "temp", "q", "v", "u", "w")


def model_param_names(settings: Settings) -> tuple[str, ...]:
    """Parameter names of the settings' model (empty when it cannot be built)."""
    try:
        if settings.model_kind == "formula":
            from fitcore.formula import validate_formula  # lazy: loads sympy (0.4 s), for formulas only

            ok, _msg, names = validate_formula(settings.model)
            return tuple(names) if ok else ()
        return tuple(settings.build_model().param_names)
    except ValueError:  # an unknown model or options it does not take
        return ()


def formula_check(text: str) -> tuple[str, str]:
    """``(level, message)`` for a formula: level "ok", "warn" (valid but almost surely
    a mistake: it does not use x) or "bad" (refused). Checked here and now; the panel
    checks in a child process instead (:meth:`MethodPanel.formula_level`)."""
    from fitcore.formula import validate_formula  # lazy: loads sympy (0.4 s), for formulas only

    return formula_level_of(validate_formula(text))


def formula_level_of(checked) -> tuple[str, str]:
    """``(level, message)`` from :func:`fitcore.formula.validate_formula`'s answer."""
    ok, msg, names = checked
    if not ok:
        return "bad", msg
    if "does not use x" in msg:
        guess = next((n for n in _VARIABLE_LIKE if n in names), None)
        params = ", ".join(names)
        if guess is not None:
            head = (f'Warning: "{guess}" is taken as a parameter, and the model does not '
                    f"depend on x (it is a constant). Write x for the variable.")
        else:
            head = "Warning: the model does not depend on x (it is a constant)."
        return "warn", f"{head} Parameters: {params}."
    return "ok", msg


def sigma_fixes_scale(settings: Settings, has_sigma: bool) -> bool:
    """True when the fit will not estimate the scale although it is set to "auto":
    the data carry a sigma column (``has_sigma``) taken as absolute standard
    uncertainties (no weighting rule), so a robust loss uses scale 1, in multiples of
    sigma (the fit states it as "fixed at 1: sigma taken as absolute")."""
    return (settings.scale == "auto" and bool(has_sigma)
            and settings.sigma_mode == "absolute" and not settings.weighting
            and settings.loss not in OWN_SCALE)  # these estimate it whatever the sigma


class LossPreview(pg.PlotWidget):
    """rho(u) (scaled to 1 at the edge of the range) and weight(u) for one loss."""

    U_MAX = 6.0

    def __init__(self, parent=None):
        super().__init__(parent, background="w")
        self.setMinimumHeight(165)
        self.setMaximumHeight(205)
        self.setMenuEnabled(False)
        self.setMouseEnabled(False, False)
        self.hideButtons()
        self.getPlotItem().setLabel("bottom", "standardised residual u")
        # the key is the plot's title, above the curves (a legend inside covered them)
        self.getPlotItem().setTitle("<span style='color:#1f5caa'>&#9472;&#9472;</span> rho (scaled)"
                                    "&nbsp;&nbsp;<span style='color:#c81e2d'>&#9472;&#9472;</span> weight",
                                    size="8pt", color="#1e1e1e")
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
            loss = get_loss(name, alpha=alpha if name in ("general", "adaptive") else None)
            rho = np.asarray(loss.rho(u), float)
            w = np.asarray(loss.weight(u), float)
        except ValueError as err:  # an unknown loss or a bad alpha: say so, draw nothing
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
        self._formula_refused = ""  # message of the last refused formula ("" = none)
        # formulas are checked by "formula" jobs in a child process, with a time limit
        # (desktop.jobs): a formula whose check would take long never holds the window
        self.formula_checker = Channel(self)
        self.formula_checker.finished.connect(self._formula_checked)
        self.formula_checker.failed.connect(self._formula_check_failed)
        self._checks: dict[str, tuple[str, str]] = {}  # formula text -> (level, message)
        self._check_next: str | None = None  # the newest text waiting for the running check
        #: the formula taken out of the box when a built-in model took over; it comes
        #: back when "formula..." is picked again
        self._set_aside_formula = ""

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        box = QGroupBox("Method")
        form = QFormLayout(box)
        self.model_combo = QComboBox()
        for n in builtin_models():
            title = model_title(n)
            self.model_combo.addItem(model_short_title(n), n)
            self.model_combo.setItemData(self.model_combo.count() - 1, f"{title} ({n})", Qt.ToolTipRole)
        self.model_combo.addItem(FORMULA_ITEM, FORMULA_ITEM)
        self.model_combo.setItemData(self.model_combo.count() - 1,
                                     "Your own formula in x, typed in the box below", Qt.ToolTipRole)
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
        for n in LOSS_NAMES:
            title = loss_title(n)
            self.loss_combo.addItem(LOSSES[n].menu, n)
            self.loss_combo.setItemData(self.loss_combo.count() - 1, title, Qt.ToolTipRole)
        form.addRow("Loss", self.loss_combo)

        scale_row = QHBoxLayout()
        self.scale_combo = QComboBox()
        self.scale_combo.addItem("auto", "auto")
        self.scale_combo.setItemData(0, "Automatic: a robust estimate (normalised MAD of the "
                                        "residuals, re-estimated with the fit)", Qt.ToolTipRole)
        self.scale_combo.addItem("fixed", "fixed")
        self.scale_combo.setItemData(1, "A fixed scale that you type in the box beside", Qt.ToolTipRole)
        # no validator: a validator swallows "0" silently; the value is checked on Enter
        self.scale_edit = QLineEdit()
        scale_row.addWidget(self.scale_combo)
        scale_row.addWidget(self.scale_edit)
        form.addRow("Scale", scale_row)

        self.weight_combo = QComboBox()  # weighting rules of calibrations (issue 14)
        for name in RULES:
            # the power rule's title is long (242 px): a short text, the title as its tip
            self.weight_combo.addItem("power of the mean" if name == "power" else TITLES[name], name)
            self.weight_combo.setItemData(self.weight_combo.count() - 1, TITLES[name], Qt.ToolTipRole)
        self.weight_combo.setToolTip("How the variance of y grows along the curve: weights "
                                     "1/x, 1/x\u00b2, 1/y, 1/y\u00b2, or a power of the mean "
                                     "estimated from replicate standards (relative sigma; "
                                     "the scale is still estimated)")
        form.addRow("Weights", self.weight_combo)
        self.weight_combo.currentIndexChanged.connect(self._on_weighting_picked)

        self.alpha_spin = QDoubleSpinBox()
        self.alpha_spin.setRange(-20.0, 2.0)
        self.alpha_spin.setSingleStep(0.25)
        self.alpha_spin.setDecimals(3)
        form.addRow("Alpha", self.alpha_spin)
        for combo, n in ((self.model_combo, 10), (self.loss_combo, 10), (self.scale_combo, 4),
                         (self.weight_combo, 4)):
            combo.setSizeAdjustPolicy(QComboBox.AdjustToMinimumContentsLengthWithIcon)
            combo.setMinimumContentsLength(n)
        # a box never cuts its items: at least as wide as its longest item; where the
        # panel is too narrow for that beside its label (1000 px windows) the row wraps,
        # the label above its box (six model names and 'least squares (L2)' were cut)
        form.setRowWrapPolicy(QFormLayout.WrapLongRows)
        for combo in (self.model_combo, self.loss_combo, self.weight_combo):
            fm = combo.fontMetrics()
            longest = max(fm.horizontalAdvance(combo.itemText(k)) for k in range(combo.count()))
            combo.setMinimumWidth(longest + 32)  # the arrow and the frame
            combo.view().setMinimumWidth(longest + 32)
        #: rejected input (a scale of 0, a start value "abc"): said here, in red
        self.input_msg = QLabel("")
        self.input_msg.setWordWrap(True)
        self.input_msg.setStyleSheet(f"color: {BAD_COLOUR};")
        self.input_msg.setVisible(False)
        form.addRow(self.input_msg)
        lay.addWidget(box)

        pbox = QGroupBox("Start and held values")  # short: the panel fits a narrow window
        pl = QVBoxLayout(pbox)
        self.param_table = QTableWidget(0, 3)
        self.param_table.setHorizontalHeaderLabels(["parameter", "start value", "hold"])
        self.param_table.horizontalHeaderItem(1).setToolTip(
            "Start value (blank = automatic); with hold ticked, the value the parameter is held at")
        header = self.param_table.horizontalHeader()
        # the value column takes the spare width, so its header is not cut short
        header.setSectionResizeMode(0, QHeaderView.ResizeToContents)
        header.setSectionResizeMode(1, QHeaderView.Stretch)
        header.setSectionResizeMode(2, QHeaderView.ResizeToContents)
        self.param_table.verticalHeader().setVisible(False)
        self.param_table.setMaximumHeight(150)
        self.param_table.setMinimumWidth(120)  # the panel must fit a narrow window
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
        self.sync_from_document()

    # ------------------------------------------------------------ helpers
    def _propose(self, new: Settings, text: str):
        if self._updating or new == self.document.settings:
            return
        self.push(SettingsCommand(self.document, new, text))

    @staticmethod
    def _prune(new: Settings) -> Settings:
        names = set(model_param_names(new))
        return new.with_(fixed={k: v for k, v in new.fixed.items() if k in names},
                         p0={k: v for k, v in new.named_p0(model_param_names(new)).items()
                             if k in names})

    # ------------------------------------------------------------ edits
    def _on_model_picked(self, _i=None):
        name = self.model_combo.currentData()
        s = self.document.settings
        self._formula_refused = ""
        if name == FORMULA_ITEM:
            if not self.formula_edit.text() and self._set_aside_formula:
                self._updating = True
                self.formula_edit.setText(self._set_aside_formula)
                self._updating = False
            self._update_formula_box()
            self.formula_edit.setFocus()
            text = self.formula_edit.text().strip()
            if text:
                self._on_formula_done()
            return
        self._update_formula_box()
        self._propose(self._prune(s.with_(model=name, model_kind="builtin", model_options={})),
                      f"Model: {model_short_title(name)}")

    def _on_formula_typed(self, text: str):
        if self._updating:
            return
        self._formula_refused = ""
        self._update_formula_box()

    def _on_formula_done(self):
        if self.model_combo.currentData() != FORMULA_ITEM:
            return
        text = self.formula_edit.text().strip()
        if not text:
            return
        level, msg = self.check_formula_now(text)
        if level == "bad":
            self._formula_refused = msg
            self._update_formula_box()
            return
        self._formula_refused = ""
        s = self.document.settings
        self._propose(self._prune(s.with_(model=text, model_kind="formula", model_options={})),
                      f"Model: formula {text[:40]}")
        self._update_formula_box()

    # ------------------------------------------------------------ formula checks
    def formula_level(self, text: str) -> tuple[str, str] | None:
        """``(level, message)`` of ``text`` when it has been checked; otherwise None, and
        a check is started (one at a time: a check is never cut short by typing, the
        newest text waits for it; the box is updated when the answer comes)."""
        got = self._checks.get(text)
        if got is not None:
            return got
        if self.formula_checker.running:
            if self.formula_checker.current.payload["text"] != text:
                self._check_next = text
        else:
            self.formula_checker.submit("formula", {"text": text})
        return None

    def check_formula_now(self, text: str) -> tuple[str, str]:
        """``(level, message)`` of ``text``, waiting for its check (the window keeps
        serving events; the check ends within its time limit)."""
        while (got := self.formula_level(text)) is None:
            self.formula_checker.wait()
        return got

    def _remember(self, text: str, answer: tuple[str, str]) -> None:
        if len(self._checks) > 256:
            self._checks.pop(next(iter(self._checks)))
        self._checks[text] = answer
        nxt, self._check_next = self._check_next, None
        if nxt is not None and nxt not in self._checks:
            self.formula_checker.submit("formula", {"text": nxt})
        self._update_formula_box()

    def _formula_checked(self, checked):
        self._remember(self.formula_checker.last.payload["text"], formula_level_of(checked))

    def _formula_check_failed(self, message: str):
        # past its time limit, or an error in the checker: refused, with the reason
        self._remember(self.formula_checker.last.payload["text"], ("bad", message))

    def fitted_model_text(self) -> str:
        """What the settings' model is, in words (for "the estimates shown are for ...")."""
        s = self.document.settings
        if s.model_kind == "formula":
            return f"the formula {s.model}"
        return f"{model_title(s.model, **s.model_options)} ({s.model})"

    def _update_formula_box(self):
        """Keep the formula box, its note and the model line in step with the combo and
        the settings: greyed with no note under a built-in model; a refused formula is
        marked "not applied" in red with the model the shown estimates belong to."""
        s = self.document.settings
        picked_formula = self.model_combo.currentData() == FORMULA_ITEM
        self.formula_edit.setEnabled(picked_formula)
        self.formula_msg.setVisible(picked_formula)
        if not picked_formula:
            self.formula_msg.setText("")
            self.model_info.setText(self._model_text(s))
            return
        text = self.formula_edit.text().strip()
        applied = s.model_kind == "formula" and text == s.model
        shown = self.fitted_model_text()
        if self._formula_refused:
            colour = BAD_COLOUR
            msg = (f"<b>Not applied</b>: {html.escape(self._formula_refused)}. The estimates shown "
                   f"are for {html.escape(shown)}.")
        elif not text:
            colour = WARN_COLOUR
            msg = f"Type a formula in x. Until then the estimates are for {html.escape(shown)}."
        elif (got := self.formula_level(text)) is None:
            colour = "#555555"
            msg = "Checking the formula..."
        else:
            level, check = got
            colour = {"ok": OK_COLOUR, "warn": WARN_COLOUR, "bad": BAD_COLOUR}[level]
            msg = html.escape(check)
            if not applied:
                msg += (f" (not applied yet: press Enter; the estimates shown are for "
                        f"{html.escape(shown)})")
        self.formula_msg.setText(f"<span style='color:{colour}'>{msg}</span>")
        self.model_info.setText("" if applied else f"Estimates shown: {shown}")

    def _on_loss_picked(self, _i=None):
        name = self.loss_combo.currentData()
        s = self.document.settings
        new = s.with_(loss=name)
        if name == "general" and s.alpha is None:  # a method saved without a shape
            new = new.with_(alpha=1.0)
        self._propose(new, f"Loss: {loss_title(name)}")

    def _on_weighting_picked(self, _i=None):
        rule = self.weight_combo.currentData() or "none"
        self._propose(self.document.settings.with_(weighting=None if rule == "none" else rule),
                      f"Weighting: {self.weight_combo.currentText()}")

    def _say(self, text: str = ""):
        """Show (or with "" clear) the message about rejected input."""
        self.input_msg.setText(text)
        self.input_msg.setVisible(bool(text))

    def _on_scale_changed(self):
        s = self.document.settings
        if self.scale_combo.currentData() == "auto":
            self.scale_edit.setEnabled(False)
            self.scale_edit.setStyleSheet("")
            self._say()
            self._propose(s.with_(scale="auto"), "Scale: auto")
            return
        self.scale_edit.setEnabled(True)
        text = self.scale_edit.text().strip()
        if not text:  # "fixed" with a blank box: start from the scale of the result shown
            res = self.document.result
            if res is not None and np.isfinite(res.scale) and res.scale > 0:
                v = float(res.scale)
                self._updating = True
                self.scale_edit.setText(f"{v:.6g}")
                self._updating = False
            else:
                self._say("Type a fixed scale (a positive number).")
                return
        else:
            try:
                v = float(text.replace(",", "."))
            except ValueError:
                v = float("nan")
            if not (v > 0 and np.isfinite(v)):
                self.scale_edit.setStyleSheet(f"border: 2px solid {BAD_COLOUR};")
                self._say(f'Scale "{text}" not applied: it must be a positive number. '
                          + self._scale_now())
                return
        self.scale_edit.setStyleSheet("")
        self._say()
        self._propose(s.with_(scale=v), f"Scale: {v:.6g}")

    def _scale_now(self) -> str:
        s = self.document.settings
        return ("The scale is still automatic." if s.scale == "auto"
                else f"The scale is still {float(s.scale):.6g}.")

    def _on_alpha_changed(self):
        v = float(self.alpha_spin.value())
        self._propose(self.document.settings.with_(alpha=v), f"Alpha: {v:g}")

    def _on_param_edited(self, _item):
        if self._updating:
            return
        fixed, p0, bad = {}, {}, []
        res = self.document.result
        s = self.document.settings
        now = s.named_p0(model_param_names(s))
        now.update(dict(s.fixed))
        self._updating = True
        try:
            for r in range(self.param_table.rowCount()):
                name = self.param_table.item(r, 0).text()
                cell = self.param_table.item(r, 1)
                txt = (cell.text() if cell else "").strip()
                held = self.param_table.item(r, 2).checkState() == Qt.Checked
                val = None
                if txt:
                    try:
                        val = float(txt.replace(",", "."))
                    except ValueError:
                        val = None
                    if val is None or not np.isfinite(val):
                        val = None
                        bad.append((name, txt))
                        if cell is not None:
                            cell.setBackground(QBrush(QColor(255, 214, 214)))
                            cell.setToolTip(f'"{txt}" is not a number: not used')
                        if name in now:  # an earlier good value stays in force
                            val = now[name]
                    elif cell is not None:
                        cell.setBackground(QBrush())
                        cell.setToolTip("")
                if held:
                    if val is None and res is not None and name in res.param_names:
                        val = res[name]
                    if val is not None:
                        fixed[name] = val
                elif val is not None:
                    p0[name] = val
        finally:
            self._updating = False
        self._propose(s.with_(fixed=fixed, p0=p0), "Held/start values")
        if bad:
            parts = []
            for name, txt in bad:
                kept = f"{now[name]:.10g} is still used" if name in now else "it stays automatic"
                parts.append(f'start value of {name} "{txt}" is not a number, not used ({kept})')
            self._say("Not applied: " + "; ".join(parts) + ".")
        else:
            self._say()

    # ------------------------------------------------------------ follow the document
    def _on_document(self, event, **info):
        if event in ("settings", "data"):
            self.sync_from_document()
        elif event == "result" and self.document.settings.loss == "adaptive":
            res = self.document.result
            self.preview.show_loss("adaptive", res.alpha if res is not None else None)
            self._show_alpha()

    def _show_alpha(self):
        """The Alpha box: editable for the general loss; for the adaptive loss the fitted
        alpha (greyed); blank ("not used") for the other losses."""
        s = self.document.settings
        res = self.document.result
        spin = self.alpha_spin
        was = self._updating
        self._updating = True
        try:
            if s.loss == "general":
                spin.setSpecialValueText("")
                spin.setValue(1.0 if s.alpha is None else float(s.alpha))
                spin.setToolTip("Shape of the general loss: 2 = least squares, 1 = pseudo-Huber, "
                                "0 = Cauchy, -2 = Geman-McClure, lower = closer to Welsch")
            elif s.loss == "adaptive":
                fitted = (res.alpha if res is not None and not self.document.stale
                          and getattr(res, "loss", "") == "adaptive" else None)
                if fitted is not None and np.isfinite(fitted):
                    spin.setSpecialValueText("")
                    spin.setValue(float(fitted))
                    spin.setToolTip("The adaptive loss fits alpha: this is the fitted value "
                                    "(see alpha in the estimates)")
                else:
                    spin.setSpecialValueText("fitted")
                    spin.setValue(spin.minimum())
                    spin.setToolTip("The adaptive loss fits alpha; the value is in the estimates")
            else:
                spin.setSpecialValueText("not used")
                spin.setValue(spin.minimum())
                spin.setToolTip("Alpha is only used by the general and the adaptive loss")
            spin.setEnabled(s.loss == "general")
        finally:
            self._updating = was

    def sync_from_document(self):
        """Show the document's method in the panel's fields (after the document was
        replaced from outside, e.g. by an opened session)."""
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
                # no formula on show under a built-in model (its formula is the line
                # below); the text comes back when "formula..." is picked again
                if self.formula_edit.text():
                    self._set_aside_formula = self.formula_edit.text()
                    self.formula_edit.setText("")
            self._formula_refused = ""
            self._update_formula_box()
            i = self.loss_combo.findData(s.loss)
            if i >= 0:
                self.loss_combo.setCurrentIndex(i)
            i = self.weight_combo.findData(getattr(s, "weighting", None) or "none")
            self.weight_combo.setCurrentIndex(max(i, 0))
            if s.scale == "auto":
                self.scale_combo.setCurrentIndex(0)
                self.scale_edit.setEnabled(False)
                self.scale_edit.setText("")
            else:
                self.scale_combo.setCurrentIndex(1)
                self.scale_edit.setEnabled(True)
                self.scale_edit.setText(f"{float(s.scale):.6g}")
            self.scale_edit.setStyleSheet("")
            self._say()
            self._scale_wording()
            self._show_alpha()
            names = model_param_names(s)
            fixed, p0 = dict(s.fixed), s.named_p0(names)
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
            alpha = (s.alpha if s.loss == "general"
                     else (res.alpha if res is not None and res.alpha is not None else None))
            self.preview.show_loss(s.loss, alpha)
        finally:
            self._updating = False

    def _scale_wording(self):
        """Say what unit a fixed scale is in: y units, or multiples of sigma when the
        data carry a sigma per point (residuals are divided by sigma first). Where the
        "auto" choice is not what the fit does (absolute sigma: scale 1), the choice
        says what the fit uses instead."""
        m = self.document.measurements
        fixed_by_sigma = sigma_fixes_scale(self.document.settings,
                                           getattr(m, "sigma", None) is not None)
        if fixed_by_sigma:
            self.scale_combo.setItemText(0, "1\u00d7\u03c3")
            self.scale_combo.setItemData(
                0, "Fixed at 1: the sigma column is taken as absolute standard uncertainties, "
                   "so the residuals divided by sigma have scale 1 (least squares, L1 and the "
                   "adaptive loss still estimate it). Choose fixed to give another multiple "
                   "of sigma.", Qt.ToolTipRole)
        else:
            self.scale_combo.setItemText(0, "auto")
            self.scale_combo.setItemData(0, "Automatic: a robust estimate (normalised MAD of "
                                            "the residuals, re-estimated with the fit)",
                                         Qt.ToolTipRole)
        if getattr(m, "sigma", None) is not None:
            self.scale_edit.setPlaceholderText("\u00d7 \u03c3")  # short: the box is narrow
            tip = ("Fixed scale in multiples of sigma: the residuals are divided by each "
                   "point's sigma before the loss sees them")
        else:
            unit = getattr(m, "y_unit", "") or "units of y"
            self.scale_edit.setPlaceholderText(getattr(m, "y_unit", "") or "y units")  # narrow box
            tip = f"Fixed scale of the residuals, in {unit}"
        self.scale_edit.setToolTip(tip)
        self.scale_combo.setToolTip(
            "The scale is 1 because the sigma column is taken as absolute standard "
            "uncertainties (residuals in multiples of sigma). " + tip if fixed_by_sigma else tip)
        # least squares, L1 and the adaptive loss take no fixed scale (fit() refuses one;
        # a scale typed for another loss stays in the method for it): no box that does nothing
        loss = self.document.settings.loss
        own = loss in OWN_SCALE
        self.scale_combo.setEnabled(not own)
        if own:
            self.scale_edit.setEnabled(False)
            self.scale_combo.setToolTip(f"{loss_title(loss)[0].upper()}{loss_title(loss)[1:]} estimates "
                                        "its own scale; a fixed scale applies to the other losses")

    @staticmethod
    def _model_text(s: Settings) -> str:
        if s.model_kind == "formula":
            return ""
        try:
            m = s.build_model()
        except ValueError:  # an unknown model or options it does not take
            return ""
        return m.formula or m.title
