"""How numbers read in the window: the estimates table's uncertainty, interval and unit
columns, the copied text, the bootstrap dialog, the loss comparison's wording and the
undo entries.

The rounding rule checked is GUM (JCGM 100:2008) 7.2.6: the standard uncertainty to two
significant digits and the value (and so an interval's limits about it) to the same
decimal place; its concise form is 7.2.2's ``value(u)``. The checks read the decimals
off the printed estimate and round the raw numbers with Python's own formatting, so they
do not reuse the code under test. The demo data are invented (a line with noise and two
gross outliers, ``conftest._write_demo_line_csv``, rewritten here with a mg/L unit).
"""
from __future__ import annotations

import html
import re

import numpy as np
import pytest
from PySide6.QtGui import QGuiApplication

import fitcore
from fitcore.compare import adaptive_reading
from desktop import compare_view, estimates_view
from desktop.commands import MaskCommand
from desktop.document import Settings

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")

COL = {"parameter": 0, "estimate": 1, "u": 2, "interval": 3, "unit": 4}


@pytest.fixture
def win(open_window, tmp_path, write_demo_csv):
    w = open_window(1400, 900, recovery_dir=tmp_path / "recovery")
    path = write_demo_csv(tmp_path / "conc.csv")
    text = path.read_text(encoding="utf-8").replace("Signal (mV)", "Conc (mg/L)")
    path.write_text(text, encoding="utf-8")
    assert w.open_path(str(path))
    doc = w.document
    doc.apply_settings(Settings(model="line", loss="huber"))
    assert w.runner.wait()
    w.push(MaskCommand(doc, doc.make_mask_change([5], True, reason="pipette bubble")))
    assert w.runner.wait()
    return w


def _decimals(number: str) -> int:
    m = re.fullmatch(r"-?\d+(?:\.(\d+))?", number)
    assert m, number
    return len(m.group(1) or "")


def _mantissa(estimate: str) -> str:
    return re.match(r"(-?\d+(?:\.\d+)?)\(", estimate).group(1)


def _cells(win):
    t = win.estimates.table
    return [[t.item(r, c).text() for c in range(t.columnCount())] for r in range(t.rowCount())]


def test_uncertainty_column_examples():
    # the reviewer's cases: the estimate's two digits and decimal, never "2e-05"
    # or "1.6e+02" (GUM 7.2.6; the concise forms are GUM 7.2.2's)
    for v, u, column in [(0.00538, 0.0009, "0.00090"), (6.0, 2.0, "2.0"),
                         (1.521, 0.03, "0.030"), (0.004822, 2e-5, "0.000020"),
                         (12480.0, 160.0, "160"), (1.2e5, 2.6e5, "2.6e5")]:
        assert estimates_view.unc_text(v, u) == column, (v, u)
    # the interval beside 1.2(26)e5 uses its power of ten, not [-393581, 640125]
    assert estimates_view.interval_text(-393581.0, 640125.0, 1.2327e5, 2.6e5) == "[-3.9e5, 6.4e5]"


def test_table_columns_follow_the_rounded_estimate(win):
    res = win.document.result
    ci = res.intervals(0.95)
    rows = _cells(win)
    assert [r[0] for r in rows[:2]] == list(res.param_names)
    for k, row in enumerate(rows[:2]):
        u = float(res.stderr[k])
        mant = _mantissa(row[COL["estimate"]])
        d = _decimals(mant)
        # u to two significant digits, written to the estimate's last decimal
        assert row[COL["u"]] == f"{float(f'{u:.2g}'):.{d}f}", row
        # the interval's limits to the same decimal, trailing zeros kept
        assert row[COL["interval"]] == f"[{ci[k, 0]:.{d}f}, {ci[k, 1]:.{d}f}]", row
    # a in y units is plain "mg/L" (no brackets), b is (mg/L)/s
    assert rows[0][COL["unit"]] == "mg/L"
    assert rows[1][COL["unit"]] == "(mg/L)/s"


def test_copied_text_names_units_loss_convergence_and_exclusions_plainly(win):
    text = win.copy_estimates()
    assert QGuiApplication.clipboard().text() == text
    res = win.document.result
    rows = _cells(win)
    # the same unit text as the table's unit column
    for row in rows[:2]:
        assert re.search(rf"^\s+{row[0]}\s+= \S+ {re.escape(row[COL['unit']])}   95 % CI ",
                         text, re.M), row
        estimates = text.split("\nMethod\n")[0]  # the data lines name the y column "Conc (mg/L)"
        assert "(" + row[COL["unit"]] + ")" not in estimates.replace("(mg/L)/s", "")
    # the loss by its title and constant, without its internal name
    assert "Huber; tuning constant 1.345" in text and "(huber)" not in text
    conv = [ln for ln in text.splitlines() if ln.strip().startswith("converged")]
    assert conv and conv[0].split()[1] == ("yes" if res.converged else "NO")
    assert "(converged)" not in text
    # which point was excluded and why, named by its row in the file (index 5: the
    # sixth data row, row 7 of the file under its header row)
    m = win.document.measurements
    assert m.file_row(5) == 7
    assert f"row 7 (x = {m.x[5]:.10g}, y = {m.y[5]:.10g}): pipette bubble" in text
    # the estimates view's own copy button gives the same text
    assert win.estimates.plain_text() == text


def test_window_summary_says_the_loss_title_and_plain_convergence(win):
    summary = win.estimates.summary.text()
    assert "Huber; tuning constant 1.345" in summary and "huber<" not in summary
    assert "converged</b>: yes" in summary and "yes: converged" not in summary


def test_bootstrap_dialog_intervals_use_the_estimates_decimal(win):
    from fitcore.bootstrap import bootstrap

    dlg = win.show_bootstrap()
    dlg.kind.setCurrentIndex(dlg.kind.findData("case"))
    dlg.B.setValue(99)
    dlg.seed.setValue(3)
    assert dlg.run() and dlg.job.wait(120000)
    QGuiApplication.processEvents()
    res = win.document.result
    ref = bootstrap(res, kind="case", B=99, seed=3, level=0.95)  # side by side
    ci = res.intervals(0.95)
    for k in range(len(res.param_names)):
        est = dlg.table.item(k, 1).text()
        assert est == fitcore.format_value(res.values[k], res.stderr[k])
        d = _decimals(_mantissa(est))
        assert dlg.table.item(k, 2).text() == f"[{ci[k, 0]:.{d}f}, {ci[k, 1]:.{d}f}]"
        lo, hi = ref.intervals[k]
        assert dlg.table.item(k, 3).text() == f"[{lo:.{d}f}, {hi:.{d}f}]"
    dlg.close()


def test_latex_copy_has_math_minus_in_intervals(win):
    text = win.reports.copy("latex")
    rows = [ln for ln in text.splitlines() if ln.endswith(r"\\") and "&" in ln][1:]
    for ln in rows:
        ci = ln.split("&")[3]
        assert "-" not in re.sub(r"\$[^$]*\$", "", ci), ln


def test_comparison_progress_counts_losses_and_the_alpha_profile():
    # 5 losses, then the adaptive reading's 3 stages (its last one the alpha profile)
    assert [compare_view.progress_text(i, 5, 5) for i in (0, 3, 5)] == \
        ["0/5 losses", "3/5 losses", "5/5 losses"]
    assert compare_view.progress_text(6, 8, 5) == "5/5 losses; alpha profile"
    assert compare_view.progress_text(8, 8, 5) == "5/5 losses + alpha profile"
    assert "8/8" not in compare_view.progress_text(8, 8, 5)


def test_comparison_states_the_change_in_the_robust_fits_own_uncertainty(open_window, tmp_path):
    # invented demo data: a line whose tail has heavy one-sided outliers, so that the
    # least-squares uncertainty is much larger than the adaptive fit's
    rng = np.random.default_rng(11)
    x = np.linspace(0, 10, 40)
    y = 1.0 + 0.8 * x + rng.normal(0, 0.05, x.size)
    y[::7] += 4.0
    path = tmp_path / "tail.csv"
    path.write_text("x,y\n" + "\n".join(f"{a:.6f},{b:.6f}" for a, b in zip(x, y)) + "\n")
    w = open_window(1400, 900, name="cmp", recovery_dir=tmp_path / "rec")
    assert w.open_path(str(path))
    w.document.apply_settings(Settings(model="line", loss="huber"))
    assert w.runner.wait()
    w.show_comparison()
    view = w.compare_view
    assert view.job.wait(60000)
    QGuiApplication.processEvents()
    ref = adaptive_reading("line", x, y, scale="auto")  # fitcore side by side
    l2, ad = ref.fits["l2"], ref.fits["adaptive"]
    d = np.abs(ad.values - l2.values)
    in_ad, in_l2 = d / ad.stderr, d / l2.stderr
    k = int(np.argmax(in_ad))
    assert in_ad[k] > 3 * in_l2[k]  # the case the note is for
    text = html.unescape(view.adaptive.reading.text())
    name = ad.param_names[k]
    # one reading, one yardstick for "agree" (the combined u), and the robust fit's own u
    # named where it is used (was a second note that contradicted the reading)
    assert ref.text in text and "agree within 2 combined standard uncertainties" in text
    said = (f"u({name}) = {l2.stderr[k]:.2g} against {ad.stderr[k]:.2g} by the adaptive fit, "
            f"and the least-squares {name} lies {in_ad[k]:.3g} of the adaptive fit's standard "
            "uncertainties")
    assert said in text
    assert "moves by" not in text
    copied = view.copy()
    assert copied and said in QGuiApplication.clipboard().text()


def test_undo_entries_name_the_loss_by_its_title(win):
    panel = win.method_panel
    combo = panel.loss_combo
    i = combo.findData("pseudo_huber")
    combo.setCurrentIndex(i)
    combo.activated.emit(i)  # as a pick by the user
    assert win.runner.wait()
    stack = win.undo_stack
    assert stack.text(stack.index() - 1) == "Loss: pseudo-Huber"


def test_fit_warnings_show_in_the_summary_and_the_copied_text(open_window, tmp_path):
    # an exponential decay fitted to a straight line converges, but its parameters are
    # not determined separately: the window and the copied text must say so
    rng = np.random.default_rng(4)
    x = np.linspace(0, 0.05, 50)
    y = 43.0 - 800.0 * x + rng.normal(0, 0.3, 50)
    path = tmp_path / "straight.csv"
    path.write_text("t (s),U (V)\n" + "".join(f"{a:.6f},{b:.6f}\n" for a, b in zip(x, y)),
                    encoding="utf-8")
    w = open_window(1400, 900, recovery_dir=tmp_path / "recovery")
    assert w.open_path(str(path))
    w.document.apply_settings(Settings(model="exp_decay", loss="huber"))
    assert w.runner.wait()
    res = w.document.result
    assert res.converged and res.warnings
    summary = w.estimates.summary.text()
    assert "warning" in summary and "almost interchangeable" in html.unescape(summary)
    text = estimates_view.estimates_plain_text(res)
    assert "almost interchangeable" in text


def test_window_summary_states_held_values_in_the_reports_words():
    # one caution about held values: the window's summary line is fitcore's HELD_NOTE
    # (it had its own, shorter wording)
    from fitcore.report_text import HELD_NOTE

    x = np.linspace(0.0, 10.0, 20)
    res = fitcore.fit("exp_decay", x, 3 * np.exp(-x / 2) + 0.5 + 0.01 * np.sin(3 * x), fixed={"C": 0.5})
    held = dict(estimates_view.summary_lines(res))["held"]
    assert held == HELD_NOTE.removeprefix("; ")
