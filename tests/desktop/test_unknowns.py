"""The Unknowns table: paste, read back, follow exclusions and undo (issue 14)."""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtGui import QGuiApplication

import fitcore
from desktop.commands import MaskCommand
from desktop.document import Measurements, Settings
from desktop.unknowns_view import parse_unknowns

# the straight-line worked example of tests/fitcore/test_calibration.py (values from
# memory), with units invented for the window
TX = np.array([0.0, 2, 4, 6, 8, 10, 12])
TY = np.array([2.1, 5.0, 9.0, 12.6, 17.3, 21.0, 24.7])


def test_parse_unknowns_names_columns_and_repeated_rows():
    text = "sample\treading\nA\t2.9\nB\t13,5\t13,6\nA\t3.0\n23.0\n"
    got = parse_unknowns(text)
    assert got == [("A", (2.9, 3.0)), ("B", (13.5, 13.6)), ("sample 1", (23.0,))]
    assert parse_unknowns("4.0\n", taken=["sample 1"]) == [("sample 2", (4.0,))]
    with pytest.raises(ValueError, match="line 2"):
        parse_unknowns("A\t1\nB\tabc\n")


@pytest.fixture
def calib(open_window):
    win = open_window()
    m = Measurements(TX, TY, x_name="Conc", y_name="Signal", x_unit="pg/mL", y_unit="a.u.",
                     source="invented")
    win.load_measurements(m, Settings(model="line", loss="l2"))
    assert win.runner.wait()
    return win


def _values(win) -> np.ndarray:
    """Rows (x0, u(x0)) of the read-back unknowns (an array: pytest.approx compares it
    element by element; a list of tuples is a nested structure that pytest 9.2 refuses)."""
    return np.array([(ip.x, ip.u) for ip in win.unknowns.results], dtype=float)


def test_paste_three_unknowns_exclude_a_standard_and_undo(calib, qtbot):
    win = calib
    view = win.unknowns
    QGuiApplication.clipboard().setText("A\t2.9\nB\t13.5\nC\t23.0\n")
    assert view.paste()
    assert [n for n, _ in view.samples] == ["A", "B", "C"]
    # the textbook values (from memory) and the formula (fitcore's own test checks it)
    first = _values(win)
    assert [round(x, 2) for x, _u in first] == [0.72, 6.21, 11.13]
    assert [round(u, 2) for _x, u in first] == [0.26, 0.24, 0.26]
    assert view.table.item(0, 2).text() == fitcore.format_value(first[0][0], first[0][1])
    assert "LOD" in view.limits_label.text() and "ICH Q2(R1)" in view.limits_label.toolTip()
    # plot marks: horizontal then vertical, one pair of segments per unknown
    xs, ys = view.mark_segments()
    assert xs.size == 12 and xs[1] == pytest.approx(first[0][0]) and ys[3] < ys[2]

    # exclude a standard: every read-back changes
    doc = win.document
    win.push(MaskCommand(doc, doc.make_mask_change([6], True)))
    assert win.runner.wait()
    qtbot.waitUntil(lambda: view.for_result is doc.result and not doc.stale)
    after = _values(win)
    assert all(abs(a[0] - b[0]) > 1e-6 and abs(a[1] - b[1]) > 1e-9 for a, b in zip(first, after))
    ref = fitcore.fit("line", TX[:6], TY[:6])
    assert after[1][0] == pytest.approx(fitcore.inverse_predict(ref, [13.5]).x, rel=1e-10)

    # undo restores them
    win.undo_stack.undo()
    assert win.runner.wait()
    qtbot.waitUntil(lambda: view.for_result is doc.result and not doc.stale)
    assert _values(win) == pytest.approx(first, rel=1e-12)
    # undo once more takes the paste back
    win.undo_stack.undo()
    assert view.samples == [] and view.results == []


def test_unknowns_in_every_copy_format_and_the_report(calib):
    win = calib
    win.unknowns.paste("A\t2.9\t3.0\nB\t13.5\n")
    from desktop.report_export import COPY_FORMATS

    for key, _text, _fmt, _full in COPY_FORMATS:
        text = win.reports.copy(key)
        assert "Unknown samples" in text, key
        assert "ISO 8466-1" in text, key
    html = win.reports.report_html()
    assert "<h2>Unknown samples</h2>" in html and "ICH Q2(R1)" in html


def test_reading_beyond_the_curve_is_flagged_not_a_number(open_window):
    win = open_window()
    x = np.repeat([0.1, 0.3, 1, 3, 10, 30, 100], 2)
    rng = np.random.default_rng(1)  # invented 4PL standards
    y = fitcore.get_model("logistic4").f(x, np.array([0.2, 3.0, 1.2, 5.0]))
    y = y + rng.normal(0, 0.05, x.size)
    win.load_measurements(Measurements(x, y, source="invented"),
                          Settings(model="logistic4", loss="l2"))
    assert win.runner.wait()
    win.unknowns.paste("high\t3.5\nok\t1.6\n")
    res = win.unknowns.results
    assert isinstance(res[0], str) and "upper asymptote" in res[0]
    assert win.unknowns.table.item(0, 2).text() == ""
    assert win.unknowns.table.item(0, 5).text() == "not read back"
    assert win.unknowns.table.item(1, 2).text() != ""


def test_lack_of_fit_is_copied_with_replicate_standards(open_window):
    # EURACHEM QUAM A5 data (replicate standards), fitted by least squares
    win = open_window()
    x = np.repeat([0.1, 0.3, 0.5, 0.7, 0.9], 3)
    y = np.array([0.028, 0.029, 0.029, 0.084, 0.083, 0.081, 0.135, 0.131, 0.133,
                  0.180, 0.181, 0.183, 0.215, 0.230, 0.216])
    win.load_measurements(Measurements(x, y, source="invented"), Settings(model="line", loss="l2"))
    assert win.runner.wait()
    text = win.reports.copy("plain")
    assert "lack of fit: F = " in text and "Calibration checks" in text
    assert "lack of fit" in win.unknowns.limits_label.text()


def test_unknowns_survive_a_session_save_and_reopen(calib, open_window, tmp_path):
    from desktop.unknowns_view import clean_samples

    calib.unknowns.paste("A\t2.9\t3.0\nB\t13.5\n")
    path = tmp_path / "cal.ballast"
    assert calib.sessions.save_to(path)
    w2 = open_window(name="w2")
    assert w2.sessions.open_session(path)
    assert w2.runner.wait()
    assert w2.unknowns.samples == [("A", (2.9, 3.0)), ("B", (13.5,))]
    assert _values(w2) == pytest.approx(_values(calib), rel=1e-12)
    # a damaged list keeps only its well-formed entries
    assert clean_samples([["A", [1.0]], ["B", []], [3, [1.0]], ["C", ["x"]], "D"]) == [("A", (1.0,))]


def test_detection_limits_wait_for_unknowns_on_a_curve_that_is_no_calibration(open_window):
    # a decay's "LOD in minutes" is meaningless; limits appear once unknowns are read back
    win = open_window()
    x = np.linspace(0, 180, 25)
    y = 12000 * np.exp(-x / 41.0) + 190 + np.random.default_rng(3).normal(0, 60, x.size)
    win.load_measurements(Measurements(x, y, x_unit="min", source="invented"),
                          Settings(model="exp_decay", loss="huber"))
    assert win.runner.wait()
    view = win.unknowns
    assert "LOD" not in view.limits_label.text()
    assert "Paste readings" in view.limits_label.text()
    view.paste("S1\t5000\n")
    assert "LOD" in view.limits_label.text() or "limits not available" in view.limits_label.text()


def test_detection_limits_shown_at_once_for_a_calibration_line(calib):
    assert calib.unknowns.limits_apply()
    assert "LOD" in calib.unknowns.limits_label.text()
