"""The Ballast window driven through its widgets (pytest-qt, offscreen).

The numbers the window shows are checked against fitcore.fit run side by side on
the same inputs (the window must add nothing of its own to the computation).
"""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import QItemSelectionModel, QPoint, QSettings, Qt
from PySide6.QtGui import QGuiApplication, QImage

import fitcore
from desktop import dialogs
from desktop.commands import MaskCommand
from desktop.estimates_view import estimates_plain_text
from desktop.main_window import MainWindow
from desktop.points_model import COL

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


@pytest.fixture
def win(open_window):
    return open_window(1400, 860)


@pytest.fixture
def loaded(win, tmp_path, write_demo_csv):
    path = tmp_path / "demo.csv"
    write_demo_csv(path)
    assert win.open_path(str(path))
    assert win.runner.wait()
    win.plot.data_plot.vb.autoRange(padding=0.05)
    QGuiApplication.processEvents()
    return win


def side_by_side(doc):
    """fitcore.fit on exactly what the document holds."""
    m = doc.measurements
    return fitcore.fit(doc.settings.model, m.x, m.y, sigma=m.sigma, excluded=doc.excluded.copy(),
                       **doc.settings.to_fit_kwargs())


def click_point(qtbot, win, i, modifier=Qt.NoModifier):
    plot = win.plot
    scene = plot.point_scene_pos(i)
    view_pos = plot.mapFromScene(scene)
    qtbot.mouseClick(plot.viewport(), Qt.LeftButton, modifier, QPoint(view_pos.x(), view_pos.y()))


def test_open_file_shows_points_units_and_fit(loaded):
    doc = loaded.document
    assert doc.n == 30
    assert loaded.points_model.rowCount() == 30
    assert loaded.points_model.headerData(COL["x"], Qt.Horizontal) == "Time (s)"
    assert loaded.plot.data_plot.getAxis("left").labelText == "Signal (mV)"
    res = doc.result
    assert res is not None and res.converged and not doc.stale
    np.testing.assert_allclose(res.values, side_by_side(doc).values, rtol=1e-12)
    # the two outliers are down-weighted by the default Huber loss
    st = doc.status()
    assert st[5] == 1 and st[20] == 1


def test_change_loss_in_method_panel(loaded):
    panel = loaded.method_panel
    i = panel.loss_combo.findData("cauchy")
    panel.loss_combo.setCurrentIndex(i)
    panel.loss_combo.activated.emit(i)
    assert loaded.runner.wait()
    doc = loaded.document
    assert doc.settings.loss == "cauchy" and doc.result.loss == "cauchy"
    np.testing.assert_allclose(doc.result.values, side_by_side(doc).values, rtol=1e-12)
    loaded.undo_stack.undo()
    assert loaded.runner.wait()
    assert doc.settings.loss == "huber"
    assert panel.loss_combo.currentData() == "huber"


def test_click_point_excludes_then_undo_restores(qtbot, loaded):
    doc = loaded.document
    before = doc.result.values.copy()
    click_point(qtbot, loaded, 5)
    assert loaded.runner.wait()
    assert doc.excluded[5] and doc.excluded.sum() == 1
    idx = loaded.points_model.index(5, COL["status"])
    assert loaded.points_model.data(idx) == "excluded"
    expected = side_by_side(doc)
    assert expected.n_excluded == 1
    np.testing.assert_allclose(doc.result.values, expected.values, rtol=1e-12)
    assert not np.allclose(doc.result.values, before, rtol=1e-9)
    assert doc.selection.tolist() == [5]
    # click again restores
    click_point(qtbot, loaded, 5)
    assert loaded.runner.wait()
    assert not doc.excluded.any()
    loaded.undo_stack.undo()  # undo the restore -> excluded again
    loaded.undo_stack.undo()  # undo the exclusion
    assert loaded.runner.wait()
    assert not doc.excluded.any()
    np.testing.assert_allclose(doc.result.values, before, rtol=1e-12)


def test_box_drag_excludes_the_points_inside_as_one_step(qtbot, loaded):
    doc = loaded.document
    plot = loaded.plot
    vb = plot.vb_data
    x, y = doc.measurements.x, doc.measurements.y
    # rectangle over the first 8 points, grown in three drag steps
    y0, y1 = y.min() - 1, y.max() + 1
    from PySide6.QtCore import QRectF
    for x1 in (x[3] + 0.01, x[6] + 0.01, x[7] + 0.01):
        plot.on_box(vb, QRectF(x[0] - 0.1, y0, x1 - x[0] + 0.1, y1 - y0), Qt.ShiftModifier, False)
    plot.on_box(vb, QRectF(x[0] - 0.1, y0, x[7] + 0.01 - x[0] + 0.1, y1 - y0), Qt.ShiftModifier, True)
    assert loaded.runner.wait()
    assert np.flatnonzero(doc.excluded).tolist() == list(range(8))
    assert loaded.undo_stack.count() == 1
    assert loaded.undo_stack.undoText() == "Exclude 8 points"
    np.testing.assert_allclose(doc.result.values, side_by_side(doc).values, rtol=1e-12)
    # Ctrl: restore the points in a box
    plot.on_box(vb, QRectF(x[0] - 0.1, y0, x[2] + 0.01 - x[0] + 0.1, y1 - y0),
                Qt.ShiftModifier | Qt.ControlModifier, True)
    assert np.flatnonzero(doc.excluded).tolist() == list(range(3, 8))
    loaded.undo_stack.undo()
    loaded.undo_stack.undo()
    assert not doc.excluded.any()


def test_real_drag_in_box_mode_on_the_plot(qtbot, loaded):
    doc = loaded.document
    plot = loaded.plot
    a = plot.mapFromScene(plot.point_scene_pos(0))
    b = plot.mapFromScene(plot.point_scene_pos(3))
    p0 = QPoint(int(a.x()) - 10, int(min(a.y(), b.y())) - 30)
    p1 = QPoint(int(b.x()) + 4, int(max(a.y(), b.y())) + 30)
    vp = plot.viewport()
    loaded.box_action.setChecked(True)  # box mode: a plain drag excludes (Shift+drag does too)
    qtbot.mousePress(vp, Qt.LeftButton, Qt.NoModifier, p0)
    for t in np.linspace(0.2, 1.0, 5):
        qtbot.mouseMove(vp, QPoint(int(p0.x() + t * (p1.x() - p0.x())), int(p0.y() + t * (p1.y() - p0.y()))))
    qtbot.mouseMove(vp, p1)  # the scene takes the drag's end from the last move
    qtbot.mouseMove(vp, p1)
    qtbot.mouseRelease(vp, Qt.LeftButton, Qt.NoModifier, p1)
    assert loaded.runner.wait()
    assert np.flatnonzero(doc.excluded).tolist() == [0, 1, 2, 3]
    assert loaded.undo_stack.count() == 1


def test_table_edits_are_undoable_commands(loaded):
    doc = loaded.document
    proxy = loaded.proxy
    idx = proxy.index(7, COL["status"])
    assert proxy.setData(idx, Qt.Unchecked, Qt.CheckStateRole)
    assert doc.excluded[7] and loaded.undo_stack.count() == 1
    ridx = proxy.index(7, COL["reason"])
    assert proxy.flags(ridx) & Qt.ItemIsEditable
    assert proxy.setData(ridx, "pipette bubble", Qt.EditRole)
    assert doc.reasons[7] == "pipette bubble" and loaded.undo_stack.count() == 2
    assert doc.exclusion_record()[0][:2] == (7, "pipette bubble")
    loaded.undo_stack.undo()
    assert doc.reasons[7] == ""
    loaded.undo_stack.undo()
    assert not doc.excluded[7]


def test_keyboard_shortcut_excludes_table_selection(qtbot, loaded):
    doc = loaded.document
    loaded.table.setFocus()
    loaded.table.selectRow(2)
    loaded.table.selectionModel().select(loaded.proxy.index(4, 0),
                                         QItemSelectionModel.Select | QItemSelectionModel.Rows)
    assert doc.selection.tolist() == [2, 4]
    qtbot.keyClick(loaded.table, Qt.Key_Delete)
    assert np.flatnonzero(doc.excluded).tolist() == [2, 4]
    qtbot.keyClick(loaded.table, Qt.Key_Z, Qt.ControlModifier)
    assert not doc.excluded.any()


def test_sorting_keeps_row_identity_and_selection_sync(loaded):
    doc = loaded.document
    loaded.table.sortByColumn(COL["y"], Qt.DescendingOrder)
    top = loaded.proxy.mapToSource(loaded.proxy.index(0, 0)).row()
    assert top == int(np.argmax(doc.measurements.y))
    loaded.table.selectRow(0)
    assert doc.selection.tolist() == [top]
    # plot -> table: selecting a point selects its (sorted) row
    doc.set_selection([0], origin="plot")
    assert loaded.selected_points().tolist() == [0]
    assert loaded.plot.points.selected[0]


def test_copy_estimates_puts_the_text_on_the_clipboard(loaded):
    text = loaded.copy_estimates()
    clip = QGuiApplication.clipboard().text()
    assert clip == text
    doc = loaded.document
    m = doc.measurements
    # the data record is read again by fitcore alone (file, SHA-256, reading notes)
    from fitcore.report import DataRecord

    data = DataRecord.from_data(fitcore.read_table(m.source).choose(0, 1))
    assert clip == estimates_plain_text(side_by_side(doc), m.x_unit, m.y_unit, data=data)
    for name in doc.result.param_names:
        assert name in clip


def test_bad_file_shows_error_and_keeps_data(loaded, tmp_path, errors):
    doc = loaded.document
    x_before = doc.measurements.x.copy()
    values = doc.result.values.copy()
    bad = tmp_path / "broken.csv"
    bad.write_bytes(b"\x00\x01\x02 not a table \xff\xfe" * 20)
    assert not loaded.open_path(str(bad))
    assert len(errors) == 1 and "broken.csv" in errors[0][1]
    assert not loaded.open_path(str(tmp_path / "missing.csv"))
    assert len(errors) == 2
    np.testing.assert_array_equal(doc.measurements.x, x_before)
    np.testing.assert_array_equal(doc.result.values, values)


def test_failed_fit_keeps_previous_result_marked_stale(loaded):
    doc = loaded.document
    good = doc.result
    # leave only one point: a line cannot be fitted to it
    change = doc.make_mask_change(np.arange(1, doc.n), True)
    loaded.push(MaskCommand(doc, change))
    assert loaded.runner.wait()
    assert doc.result is good
    assert doc.stale and doc.fit_failed and doc.fit_message
    assert "Stale" in loaded.estimates.banner.text()
    assert "stale" in loaded.plot.stale_text.textItem.toPlainText()
    loaded.undo_stack.undo()
    assert loaded.runner.wait()
    assert not doc.stale and doc.result is not good


def test_large_fit_runs_in_worker_and_newest_request_wins(qtbot, loaded):
    runner = loaded.runner
    runner.thread_threshold = 0  # force the worker thread
    doc = loaded.document
    for i in (1, 2, 3):
        loaded.push(MaskCommand(doc, doc.make_mask_change([i], True)))
        runner.fit_now()
    assert runner.wait()
    assert doc.result_generation == doc.generation
    np.testing.assert_allclose(doc.result.values, side_by_side(doc).values, rtol=1e-12)


def test_window_state_is_remembered(qtbot, settings_file, errors, tmp_path, write_demo_csv):
    w = MainWindow(QSettings(settings_file, QSettings.IniFormat))
    qtbot.addWidget(w)
    w.logx_action.setChecked(True)
    path = tmp_path / "d.csv"
    write_demo_csv(path)
    w.open_path(str(path))
    w.close()
    w2 = MainWindow(QSettings(settings_file, QSettings.IniFormat))
    qtbot.addWidget(w2)
    assert w2.logx_action.isChecked()
    assert w2.recent_files()[0].endswith("d.csv")


def _sample_files(tmp_path, write_demo_csv):
    files = [str(p) for p in dialogs.sample_sets()]
    if not files:
        p = tmp_path / "invented.csv"
        write_demo_csv(p)
        files = [str(p)]
    return files


def test_screenshot_of_each_sample_set_is_not_blank(qtbot, win, tmp_path, monkeypatch, write_demo_csv):
    monkeypatch.setattr(win, "choose_columns", lambda table: tuple(table.numeric_columns()[:3]))
    for path in _sample_files(tmp_path, write_demo_csv):
        assert win.open_path(path), path
        assert win.runner.wait()
        QGuiApplication.processEvents()
        out = tmp_path / (path.rsplit("/", 1)[-1] + ".png")
        assert win.grab().save(str(out))
        img = QImage(str(out)).convertToFormat(QImage.Format_Grayscale8)
        w, h = img.width(), img.height()
        arr = np.frombuffer(img.constBits(), np.uint8, count=img.sizeInBytes()).reshape(h, -1)[:, :w]
        assert arr.std() > 10, f"screenshot of {path} looks blank"


def test_paste_table_from_clipboard(win):
    # invented demo values, tab-separated as a spreadsheet copies them
    text = "Dose (mg)\tResponse (AU)\n" + "\n".join(f"{d}\t{3 + 2 * d + (0.1 if d % 2 else -0.1)}"
                                                   for d in range(12))
    QGuiApplication.clipboard().setText(text)
    assert win.paste_table()
    assert win.runner.wait()
    doc = win.document
    assert doc.n == 12 and doc.measurements.x_unit == "mg"
    np.testing.assert_allclose(doc.result.values, side_by_side(doc).values, rtol=1e-12)


def test_formula_field_validates_live_and_sets_the_model(loaded):
    panel = loaded.method_panel
    # the box is greyed while a built-in model is chosen; picking "formula..." opens it
    assert not panel.formula_edit.isEnabled()
    i = panel.model_combo.findData("formula...")
    panel.model_combo.setCurrentIndex(i)
    panel.model_combo.activated.emit(i)
    assert panel.formula_edit.isEnabled()
    panel.formula_edit.setText("a*exp(-x/")
    assert panel.formula_checker.wait()  # checked in a child process (desktop.jobs)
    assert "#b42318" in panel.formula_msg.text()  # refused, shown in red
    panel.formula_edit.setText("a + b*x + c*x**2")
    assert panel.formula_checker.wait()
    assert "parameters" in panel.formula_msg.text() and "#1a7f37" in panel.formula_msg.text()
    panel.formula_edit.editingFinished.emit()
    assert loaded.runner.wait()
    doc = loaded.document
    assert doc.settings.model_kind == "formula" and doc.result.param_names == ("a", "b", "c")
    np.testing.assert_allclose(doc.result.values, side_by_side(doc).values, rtol=1e-12)
    assert panel.param_table.rowCount() == 3
