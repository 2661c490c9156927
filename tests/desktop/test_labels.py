"""Labels that say what the fit did (issue 17 items 10 and 16), driven through the window.

Each label is checked against the fit's own record of what it did (``FitResult``:
``scale_method``, ``alpha``, ``alpha_stderr``, the model's units), never against a
hard-coded number; units are checked against dimensional analysis by hand.
"""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QApplication

from desktop.commands import MaskCommand
from desktop.document import Measurements, Settings
from desktop.method_panel import FORMULA_ITEM
from desktop.points_model import COL
from fitcore.losses import LOSS_NAMES
from fitcore.session import load_session

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


def decay(sigma: bool, n=24, seed=5):
    """Invented decay data, in s and mV, with a sigma column when asked and one outlier."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 60.0, n)
    u = np.full(n, 2.0)
    y = 100.0 * np.exp(-x / 15.0) + 10.0 + rng.normal(0, 2.0, n)
    y[7] += 30.0
    return Measurements(x, y, u if sigma else None, x_name="t", y_name="V",
                        sigma_name="u(V)" if sigma else "", x_unit="s", y_unit="mV",
                        source="decay.csv")


def calibration():
    """Invented calibration: x in mg/L, y an absorbance without a unit."""
    x = np.repeat(np.arange(1.0, 9.0), 2)
    y = 0.005 + 0.098 * x + np.tile([0.001, -0.001], 8)
    y[9] += 0.05
    return Measurements(x, y, None, x_name="nitrate", y_name="absorbance", x_unit="mg/L",
                        y_unit="", source="cal.csv")


@pytest.fixture
def win(open_window):
    return open_window(1400, 900)


def show(win, m, settings=None):
    win.load_measurements(m, settings)
    assert win.runner.wait()
    QApplication.processEvents()


def pick(combo, data):
    i = combo.findData(data)
    assert i >= 0, data
    combo.setCurrentIndex(i)
    combo.activated.emit(i)


def table_units(win) -> dict:
    t = win.estimates.table
    return {t.item(r, 0).text(): t.item(r, 4).text() for r in range(t.rowCount())}


def summary(win) -> dict:
    from desktop.estimates_view import summary_lines

    return dict(summary_lines(win.document.result, win.document.measurements.y_unit))


def _for_loss(loss, check, win):
    try:
        check(win, loss)
    except AssertionError as err:
        raise AssertionError(f"loss {loss}: {err}") from err


# ---------------------------------------------------------------- a. the scale shown
def test_scale_choice_says_what_the_fit_used(win):
    for loss in LOSS_NAMES:  # one window for all losses (a window costs ~0.6 s)
        _for_loss(loss, _check_scale_choice, win)


def _check_scale_choice(win, loss):
    show(win, decay(sigma=True), Settings(model="exp_decay", loss=loss, alpha=1.0))
    res = win.document.result
    assert res is not None and res.loss == loss
    panel = win.method_panel
    shown = panel.scale_combo.currentText()
    scale_line = summary(win)["scale"]
    assert f"scale               {scale_line}" in win.estimates.plain_text()  # as copied
    assert scale_line.startswith(f"{res.scale:.6g} (in units of sigma), {res.scale_method}")
    if "fixed at 1" in res.scale_method:  # the fit took sigma as absolute: scale 1
        assert res.scale == 1.0
        assert shown != "auto" and shown.startswith("1") and "\u03c3" in shown
        assert "absolute" in panel.scale_combo.toolTip()
    else:  # estimated: L2, L1 and the adaptive loss estimate it whatever the sigma
        assert loss in ("l2", "l1", "adaptive")
        assert shown == "auto"


def test_scale_choice_without_sigma_and_fixed(win):
    show(win, decay(sigma=False), Settings(model="exp_decay", loss="huber"))
    panel = win.method_panel
    assert "normalised MAD" in win.document.result.scale_method
    assert panel.scale_combo.currentText() == "auto"
    assert summary(win)["scale"].startswith(f"{win.document.result.scale:.6g} mV, normalised MAD")
    show(win, decay(sigma=True), Settings(model="exp_decay", loss="huber", scale=2.0))
    assert win.document.result.scale_method == "fixed by the analyst"
    assert panel.scale_combo.currentText() == "fixed" and panel.scale_edit.text() == "2"
    # back to the automatic choice: with absolute sigma that is scale 1, and it says so
    pick(panel.scale_combo, "auto")
    assert win.runner.wait()
    assert "fixed at 1" in win.document.result.scale_method
    assert panel.scale_combo.currentText().startswith("1") and panel.scale_edit.text() == ""


def test_fixed_scale_is_not_offered_to_a_loss_that_estimates_its_own(win):
    # least squares, L1 and the adaptive loss take no fixed scale (fit() refuses one):
    # a fixed scale kept from Huber stays in the method for Huber, is not passed to
    # least squares, and the panel says why instead of offering a box that does nothing
    show(win, decay(sigma=False), Settings(model="exp_decay", loss="huber", scale=2.0))
    panel = win.method_panel
    assert panel.scale_combo.isEnabled() and panel.scale_edit.isEnabled()
    pick(panel.loss_combo, "l2")
    assert win.runner.wait()
    res = win.document.result
    assert res.loss == "l2" and res.converged and not res.info["scale_fixed"]
    assert win.document.settings.scale == 2.0  # kept for the losses that take it
    assert not panel.scale_combo.isEnabled() and not panel.scale_edit.isEnabled()
    assert "estimates its own scale" in panel.scale_combo.toolTip()
    pick(panel.loss_combo, "huber")
    assert win.runner.wait()
    assert win.document.result.scale == 2.0 and panel.scale_combo.isEnabled()


# ---------------------------------------------------------------- b. the formula box
def test_formula_box_follows_the_model_after_new_data(win):
    show(win, calibration(), Settings(model="line", loss="huber"))
    panel = win.method_panel
    pick(panel.model_combo, FORMULA_ITEM)
    panel.formula_edit.setText("m*x + b")
    panel.formula_edit.editingFinished.emit()
    assert win.runner.wait()
    assert win.document.settings.model_kind == "formula"
    assert panel.formula_edit.text() == "m*x + b" and panel.formula_edit.isEnabled()
    # other data with a built-in model: no old formula left in the box
    show(win, decay(sigma=False), Settings(model="exp_decay", loss="huber"))
    assert panel.model_combo.currentData() == "exp_decay"
    assert panel.formula_edit.text() == "" and not panel.formula_edit.isEnabled()
    assert panel.model_info.text() == "y = A*exp(-x/tau) + C"
    # picking "formula..." again brings the formula back, ready to apply
    pick(panel.model_combo, FORMULA_ITEM)
    assert panel.formula_edit.text() == "m*x + b"
    assert win.runner.wait()
    assert win.document.settings.model == "m*x + b"
    # and undo to the built-in model empties the box again
    win.undo_stack.undo()
    assert win.runner.wait()
    assert win.document.settings.model == "exp_decay"
    assert panel.formula_edit.text() == ""


# ---------------------------------------------------------------- c, d. units
def test_slope_of_a_unitless_y_has_a_unit(win):
    # y = a + b x: b in y/x; y without a unit -> b per mg/L (dimensional analysis by hand)
    show(win, calibration(), Settings(model="line", loss="huber"))
    assert table_units(win) == {"a": "", "b": "1/(mg/L)", "x_intercept": "mg/L"}
    text = win.estimates.plain_text()
    assert "1/(mg/L)" in text


def test_formula_parameters_carry_units(win):
    show(win, decay(sigma=False), Settings(model="A*exp(-x/tau) + C", model_kind="formula",
                                           loss="huber", p0={"A": 90.0, "tau": 10.0, "C": 5.0}))
    assert win.document.result.converged
    # by hand: A and C carry y's unit, x/tau is dimensionless so tau carries x's
    assert table_units(win) == {"A": "mV", "tau": "s", "C": "mV"}
    show(win, decay(sigma=False), Settings(model="m*x + b", model_kind="formula", loss="huber"))
    assert table_units(win) == {"m": "mV/s", "b": "mV"}
    # a unit the formula does not fix stays blank
    show(win, decay(sigma=False), Settings(model="a*x**p + c", model_kind="formula", loss="l2",
                                           p0={"a": -10.0, "p": 0.5, "c": 100.0}))
    assert table_units(win) == {"a": "", "p": "", "c": "mV"}


# ---------------------------------------------------------------- f. the loss in words
def test_loss_summary_is_true_for_every_loss(win):
    for loss in LOSS_NAMES:  # one window for all losses
        _for_loss(loss, _check_loss_summary, win)


def _check_loss_summary(win, loss):
    show(win, calibration(), Settings(model="line", loss=loss, alpha=-2.0))
    res = win.document.result
    lines = summary(win)
    copied = win.estimates.plain_text()
    label = lines["loss"]
    assert label in copied  # the window and the copy say the same
    if loss in ("l2", "l1", "adaptive"):
        # no tuning constant: least squares and L1 have none; the adaptive loss's width
        # is its fitted scale c itself
        assert "tuning constant" not in label and "tuning constant" not in copied
    else:
        assert f"tuning constant {res.tuning:.6g} × scale" in label
    assert "shape alpha" not in label  # the window states the shape once, on its own line
    if loss == "general":
        assert lines["alpha"] == "-2, fixed" and "shape alpha = -2, fixed" in copied
    elif loss == "adaptive":
        assert "fitted" in lines["alpha"] and f"shape alpha = {lines['alpha']}" in copied
        if res.alpha_stderr is None:  # at an end of [0, 2]: no curvature to give u
            assert res.alpha in (0.0, 2.0)
            assert "no standard uncertainty" in lines["alpha"]
        else:
            assert lines["alpha"].startswith(f"{res.alpha:.1f}"[:3])
            assert "(" in lines["alpha"]  # value(u)
    else:
        # no shape: no alpha line at all (it read "alpha: -" under Huber)
        assert "alpha" not in lines and "shape alpha" not in copied


def test_adaptive_alpha_with_its_uncertainty(win):
    # Cauchy-like noise: the fitted shape lies inside (0, 2) and has a standard uncertainty
    rng = np.random.default_rng(11)
    x = np.linspace(0.0, 10.0, 80)
    y = 2.0 + 0.5 * x + 0.3 * rng.standard_t(3, 80)
    show(win, Measurements(x, y, None, x_unit="s", y_unit="mV"), Settings(model="line", loss="adaptive"))
    res = win.document.result
    assert res.alpha_stderr is not None and 0.0 < res.alpha < 2.0
    from fitcore.report import format_value

    assert summary(win)["alpha"] == f"{format_value(res.alpha, res.alpha_stderr)}, fitted"


# ---------------------------------------------------------------- 16. a reason being typed
def _type_reason(qtbot, win, point, text):
    doc = win.document
    win.push(MaskCommand(doc, doc.make_mask_change([point], True)))
    assert win.runner.wait()
    row = win.proxy.mapFromSource(win.points_model.index(point, COL["reason"]))
    win.table.setFocus()
    win.table.setCurrentIndex(row)
    win.table.edit(row)
    QApplication.processEvents()
    editor = QApplication.focusWidget()
    assert editor is not None and editor is not win.table
    qtbot.keyClicks(editor, text)
    assert doc.reasons[point] == ""  # typed, not yet confirmed
    return editor


def test_reason_kept_when_the_table_loses_focus(qtbot, win):
    # Qt's delegate writes the text on focus-out by itself; this guards that the reason
    # column's own delegate keeps doing so
    show(win, calibration(), Settings(model="line", loss="huber"))
    _type_reason(qtbot, win, 9, "air bubble")
    qtbot.mouseClick(win.method_panel.scale_edit, Qt.LeftButton)  # focus leaves the table
    win.method_panel.loss_combo.setFocus()
    QApplication.processEvents()
    assert win.document.reasons[9] == "air bubble"


def test_reason_typed_is_saved_and_copied_before_return(qtbot, win, tmp_path):
    show(win, calibration(), Settings(model="line", loss="huber"))
    editor = _type_reason(qtbot, win, 9, "air bubble")
    # a save by shortcut or menu takes no focus from the editor: the text goes in anyway
    path = tmp_path / "work.ballast"
    assert win.sessions.save_to(str(path))
    assert [(e.index, e.reason) for e in load_session(str(path)).exclusions] == [(9, "air bubble")]
    assert "air bubble" in win.estimates.plain_text()
    assert QApplication.focusWidget() is editor  # still editing: nothing was taken away
    qtbot.keyClicks(editor, " in the cell")
    assert win.sessions.has_unsaved_work()  # the longer text is new work
    assert win.document.reasons[9] == "air bubble in the cell"


# ---------------------------------------------------------------- the batch window's method
@pytest.mark.parametrize("loss", ["huber", "l2", "adaptive"])
def test_batch_method_line_says_what_the_fits_use(win, loss):
    import fitcore
    from desktop.batch_window import NONE, open_batch_window

    show(win, decay(sigma=True), Settings(model="exp_decay", loss=loss))
    batch = open_batch_window(win)
    batch.sigma.clear()
    batch.sigma.addItems([NONE, "u(V)"])
    m = win.document.measurements
    kw = win.document.settings.to_fit_kwargs()
    for column, sigma in ((NONE, None), ("u(V)", m.sigma)):
        batch.sigma.setCurrentText(column)
        text = batch.method_label.text()
        assert f"loss {fitcore.losses.loss_title(loss)}" in text  # its title, not "huber"
        res = fitcore.fit("exp_decay", m.x, m.y, sigma=sigma, **kw)
        if "fixed at 1" in res.scale_method:
            assert "scale fixed at 1 (sigma taken as absolute)" in text
        else:
            assert "scale automatic" in text
    assert ("alpha fitted" in text) == (loss == "adaptive")
    batch.close()


def test_status_bar_names_the_loss_by_its_title(win):
    from fitcore.losses import loss_title

    show(win, calibration(), Settings(model="line", loss="geman_mcclure"))
    msg = win.statusBar().currentMessage()
    assert f"({loss_title('geman_mcclure')})" in msg and "geman_mcclure" not in msg
