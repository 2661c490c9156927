"""The loss comparison and the adaptive suggestion, driven through the window.

Every number the window shows is checked against ``fitcore.compare`` run side by side
on the same inputs (the window adds nothing of its own to the computation). The demo
data are invented (a line with two gross outliers).
"""
from __future__ import annotations

import html
import time

import numpy as np
import pytest
from PySide6.QtCore import QTimer
from PySide6.QtGui import QGuiApplication

from desktop import compare_view
from desktop.compare_view import DEFAULT_LOSSES, VALUE_ROLE, run_comparison
from desktop.estimates_view import fmt_value
from fitcore.compare import FIT_KWARGS, adaptive_reading, compare_losses

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


@pytest.fixture
def win(open_window):
    return open_window(1400, 900)


@pytest.fixture
def loaded(win, tmp_path, write_demo_csv):
    path = tmp_path / "demo.csv"
    write_demo_csv(path)
    assert win.open_path(str(path))
    assert win.runner.wait()
    return win


def side_by_side(doc, losses=DEFAULT_LOSSES):
    m = doc.measurements
    kw = {k: v for k, v in doc.settings.to_fit_kwargs().items() if k in FIT_KWARGS}
    return compare_losses(doc.settings.model, m.x, m.y, losses=losses, sigma=m.sigma,
                          excluded=doc.excluded.copy(), **kw)


def run_and_wait(win):
    win.show_comparison()
    assert win.compare_view.job.wait(60000)
    QGuiApplication.processEvents()
    return win.compare_view


def test_comparison_table_and_curves_equal_fitcore(loaded):
    view = run_and_wait(loaded)
    cmp = view.comparison
    assert cmp is not None and not cmp.cancelled
    expected = side_by_side(loaded.document)
    t = view.table
    losses = [t.horizontalHeaderItem(c).data(VALUE_ROLE) for c in range(t.columnCount())]
    assert losses == list(DEFAULT_LOSSES)
    names = [t.verticalHeaderItem(r).text() for r in range(t.rowCount())]
    assert names[:2] == ["a", "b"] or names[:2] == list(expected.param_names)
    marks = expected.highlighted()
    for c, loss in enumerate(losses):
        ref = expected.results[loss]
        assert ref is not None
        for k, name in enumerate(ref.param_names):
            item = t.item(names.index(name), c)
            v, u = item.data(VALUE_ROLE)
            np.testing.assert_allclose([v, u], [ref.values[k], ref.stderr[k]], rtol=1e-9)
            assert item.text() == fmt_value(ref.values[k], ref.stderr[k])
            # highlighted exactly where fitcore's pairwise test says the losses differ
            assert (item.background().color().name() == compare_view.DIFF_BG.color().name()) == \
                (name in marks[loss]), (loss, name)
        assert float(t.item(names.index("scale"), c).data(VALUE_ROLE)) == pytest.approx(ref.scale, rel=1e-9)
        assert t.item(names.index("n down-weighted"), c).data(VALUE_ROLE) == ref.n_downweighted
        alpha = t.item(names.index("alpha"), c).data(VALUE_ROLE)
        assert (alpha is None) == (ref.alpha is None)
    # every cell's text is fitcore's (the report and the copies print text_rows)
    rows = cmp.text_rows()
    assert rows[0][1:] == [t.horizontalHeaderItem(c).text() for c in range(t.columnCount())]
    for r in range(t.rowCount()):
        assert rows[r + 1] == [t.verticalHeaderItem(r).text()] + [
            t.item(r, c).text() for c in range(t.columnCount())]
    assert view.text() == "\n".join("\t".join(row) for row in rows)
    # one curve per loss, each the loss's own fitted curve, each named in the key above
    # the plot (a legend inside the plot covered points)
    assert set(view.curves) == set(DEFAULT_LOSSES)
    key = loaded.plot.key_text()
    for loss in DEFAULT_LOSSES:
        assert compare_view.loss_short_title(loss) in key
    pens = {view.curves[lo].opts["pen"].color().name() for lo in DEFAULT_LOSSES}
    assert len(pens) == len(DEFAULT_LOSSES)
    for loss, curve in view.curves.items():
        xs, ys = curve.getData()
        np.testing.assert_allclose(ys, expected.results[loss].predict(xs), rtol=1e-9, atol=1e-12)
    assert not loaded.plot.curve.isVisible()
    # closing brings back the single fit
    view.close_button.click()
    assert view.curves == {} and view.comparison is None
    assert "Huber" not in loaded.plot.key_text()
    assert loaded.plot.curve.isVisible()
    assert not loaded.compare_pane.is_open


def test_shading_follows_the_stated_rule(win):
    """Invented decay with a run of four high points early on: least squares follows them
    and differs from the redescending losses by more than 2 combined standard
    uncertainties; exactly those cells are shaded, and the rule is written under the table
    (fitcore.compare.DIFFERENCE_RULE: E_n > 1 with k = 2, ISO 13528, from memory)."""
    from desktop.document import Measurements, Settings
    from fitcore.compare import DIFFERENCE_RULE

    rng = np.random.default_rng(21)
    x = np.linspace(0, 10, 60)
    y = 3.0 * np.exp(-x / 2.5) + 0.5 + rng.normal(0, 0.05, x.size)
    y[[5, 6, 7, 8]] += 1.5
    win.load_measurements(Measurements(x, y, x_name="t", y_name="counts"), Settings(model="exp_decay"))
    assert win.runner.wait()
    view = run_and_wait(win)
    expected = side_by_side(win.document)
    pairs = expected.differences()
    assert pairs and all(abs(d) > 2 * cu for _p, _a, _b, d, cu in pairs)
    t = view.table
    losses = [t.horizontalHeaderItem(c).data(VALUE_ROLE) for c in range(t.columnCount())]
    names = [t.verticalHeaderItem(r).text() for r in range(t.rowCount())]
    marks = expected.highlighted()
    shaded = {(names[r], losses[c]) for r in range(len(expected.param_names)) for c in range(len(losses))
              if t.item(r, c).background().color().name() == compare_view.DIFF_BG.color().name()}
    assert shaded == {(p, lo) for lo, ps in marks.items() for p in ps}
    assert 0 < len(shaded) < len(expected.param_names) * len(losses)  # a highlight that means something
    assert DIFFERENCE_RULE in html.unescape(view.legend_note.text())
    assert "2 combined standard uncertainties" in t.item(names.index("A"), 0).toolTip()


def test_ticking_another_loss_adds_its_column_and_curve(loaded):
    view = loaded.compare_view
    view.checks["l1"].setChecked(True)
    view.checks["tukey"].setChecked(False)
    view = run_and_wait(loaded)
    want = ("l2", "l1", "huber", "cauchy", "adaptive")
    assert set(view.curves) == set(want)
    expected = side_by_side(loaded.document, want)
    c = [view.table.horizontalHeaderItem(k).data(VALUE_ROLE) for k in range(view.table.columnCount())]
    assert c == list(want)
    v, u = view.table.item(0, c.index("l1")).data(VALUE_ROLE)
    assert v == pytest.approx(expected.results["l1"].values[0], rel=1e-9)


def test_adaptive_panel_equals_fitcore_reading(loaded):
    view = run_and_wait(loaded)
    doc = loaded.document
    m = doc.measurements
    ref = adaptive_reading("line", m.x, m.y, excluded=doc.excluded.copy(), scale="auto")
    panel = view.adaptive
    assert panel.value is not None
    assert panel.value.alpha == pytest.approx(ref.alpha, abs=1e-9)
    assert ref.text in panel.reading.text().replace("&#x27;", "'")
    xs, ys = panel.curve.getData()
    np.testing.assert_allclose(xs, ref.profile[0])
    np.testing.assert_allclose(ys, ref.profile[1] - ref.profile[1].min(), atol=1e-7)
    lo, hi = panel.interval.getRegion()
    assert (lo, hi) == pytest.approx(ref.interval, abs=1e-9)
    assert "alpha = " in panel.alpha_label.text()


def test_cancel_stops_and_keeps_the_single_fit(loaded, qtbot):
    doc = loaded.document
    before = doc.result
    view = loaded.compare_view
    loaded.compare_pane.open()
    assert view.run()
    assert view.cancel_button.isEnabled() and not view.run_button.isEnabled()
    view.cancel_button.click()
    assert not view.job.running
    assert "cancelled" in view.status.text()
    assert view.comparison is None and view.curves == {}
    assert view.run_button.isEnabled()
    assert doc.result is before and loaded.plot.curve.isVisible()
    view.job.idle_worker()
    QGuiApplication.processEvents()
    assert view.comparison is None  # the abandoned run's answer was dropped


def test_cancel_flag_reaches_fitcore(loaded):
    """The worker side: a cancel asked before the first loss returns no fits (in a
    thread), and ends the child process with Cancelled (in a child). How fast the child
    ends is a speed question: bench/bench_analysis.py."""
    from desktop.compare_view import comparison_request
    from desktop.jobs import Cancelled

    req = comparison_request(loaded.document, DEFAULT_LOSSES)
    seen = []
    cmp, reading, err, note = run_comparison(req, progress=lambda i, t: seen.append((i, t)),
                                       cancel=lambda: True, use_child=False)
    assert cmp.cancelled and all(r is None for r in cmp.results.values())
    assert reading is None and seen == []
    with pytest.raises(Cancelled):
        run_comparison(req, cancel=lambda: True, use_child=True)


def test_child_process_answers_equal_fitcore_in_process(loaded):
    """The comparison made in the child process is bit for bit the in-process one."""
    from desktop.compare_view import comparison_request

    req = comparison_request(loaded.document, DEFAULT_LOSSES)
    here = run_comparison(req, use_child=False)
    there = run_comparison(req, use_child=True)
    for loss in DEFAULT_LOSSES:
        a, b = here[0].results[loss], there[0].results[loss]
        assert np.array_equal(a.values, b.values) and np.array_equal(a.covariance, b.covariance)
        assert np.array_equal(a.weights, b.weights) and a.scale == b.scale
        np.testing.assert_array_equal(a.predict(np.linspace(0, 15, 7)), b.predict(np.linspace(0, 15, 7)))
    assert here[1].text == there[1].text
    np.testing.assert_array_equal(here[1].profile[1], there[1].profile[1])


def test_failed_loss_is_shown_as_failed(loaded, monkeypatch):
    import fitcore.compare as fc
    from desktop import job_kinds

    monkeypatch.setattr(job_kinds, "CHILD_MAX_POINTS", 0)  # in-thread, so the patch counts
    real = fc.compare_losses

    def one_fails(*a, **kw):
        out = real(*a, **kw)
        out.results["cauchy"] = None
        out.errors["cauchy"] = "the cauchy fit failed: invented failure for the test"
        return out

    monkeypatch.setattr(job_kinds, "compare_losses", one_fails)
    view = run_and_wait(loaded)
    c = [view.table.horizontalHeaderItem(k).data(VALUE_ROLE) for k in range(view.table.columnCount())]
    item = view.table.item(0, c.index("cauchy"))
    assert item.text() == "failed" and "invented failure" in item.toolTip()
    assert "cauchy" not in view.curves and "huber" in view.curves
    assert "Failed: cauchy" in view.status.text()


def test_change_after_comparison_marks_it_stale(loaded):
    view = run_and_wait(loaded)
    from desktop.commands import MaskCommand

    doc = loaded.document
    loaded.push(MaskCommand(doc, doc.make_mask_change([5], True)))
    assert view.is_stale
    assert "changed since this comparison" in view.status.text()
    assert all(c.opts["pen"].color().name() == "#969696" for c in view.curves.values())
    view = run_and_wait(loaded)
    assert not view.is_stale
    assert view.comparison.results["l2"].n_excluded == 1


def test_window_keeps_processing_events_during_comparison(loaded):
    """A 10 ms timer keeps ticking while the comparison runs in the worker.

    The comparison plus the adaptive profile takes about a second here; run in the
    GUI thread it would return only when done, and the timer could not tick before the
    answer. Behaviour only: ``run()`` returns at once with the job still running, and
    the event loop serves the timer until the answer comes. The longest event gap (a
    speed figure, machine-dependent) is measured by ``bench/bench_analysis.py``.
    """
    view = loaded.compare_view
    loaded.compare_pane.open()
    QGuiApplication.processEvents()
    gaps, last = [], [time.perf_counter()]

    def tick():
        now = time.perf_counter()
        gaps.append(now - last[0])
        last[0] = now

    timer = QTimer()
    timer.timeout.connect(tick)
    timer.start(10)
    assert view.run()
    assert view.job.running and view.comparison is None  # not fitted in the GUI thread
    last[0] = time.perf_counter()
    while view.job.running:
        QGuiApplication.processEvents()
        time.sleep(0.002)
    timer.stop()
    assert view.comparison is not None
    assert len(gaps) >= 3  # ticks were served while the comparison ran



def test_copy_table_puts_the_numbers_on_the_clipboard(loaded):
    view = run_and_wait(loaded)
    view.copy_button.click()
    text = QGuiApplication.clipboard().text()
    lines = text.splitlines()
    assert lines[0].split("\t")[1:] == ["least squares", "Huber", "Cauchy", "Tukey", "adaptive"]
    ref = view.comparison.results["huber"]
    assert fmt_value(ref.values[0], ref.stderr[0]) == lines[1].split("\t")[2]
    assert view.reading.text in text


def test_stars_comparison_warns_that_agreement_does_not_clear_high_leverage(win, reference_dir):
    """CYG OB1 stars (starsCYG.csv, NOTES.md): the four giants pull every M-estimate, so
    the losses agree; the comparison must say that this does not clear them."""
    assert win.open_path(str(reference_dir / "robust" / "starsCYG.csv"),
                         columns=("log.Te", "log.light", None))
    assert win.runner.wait()
    view = run_and_wait(win)
    note = view.leverage_note.text()
    assert view.leverage_note.isVisible()
    for obs in (11, 20, 30, 34):  # named by file row (header on row 1), as in the table
        assert f"row {obs + 1}" in note
    assert "robust loss does not protect" in note
    view.close_button.click()
    assert not view.leverage_note.isVisible()


def test_closing_the_tab_returns_to_the_single_fit(loaded):
    view = run_and_wait(loaded)
    assert view.curves and not loaded.plot.curve.isVisible()
    tabs = loaded.lower_tabs
    tabs.tabCloseRequested.emit(tabs.indexOf(loaded.compare_pane))  # the tab's close button
    assert not loaded.compare_pane.is_open
    assert view.curves == {} and view.comparison is None
    assert loaded.plot.curve.isVisible() and loaded.plot.band.isVisible()


def test_no_data_says_so(win):
    win.show_comparison()
    assert "No data" in win.compare_view.status.text()
    assert not win.compare_view.job.running
