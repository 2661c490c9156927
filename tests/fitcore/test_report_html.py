"""The report document (fitcore.report_html): one function for the window, the batch
and the calibration report.

The numbers in the document are checked against outside implementations run side by
side: statsmodels OLS for a least-squares line (estimates, standard errors, intervals,
fitted values, residuals) and the classical ISO 8466-1 read-back formula written out
here with numpy. The batch's and the calibration's reports are checked to be the
same document as :func:`report_html` of the same fit (the time of writing aside).
Data are invented (a line with one gross outlier); the references decide the numbers.
"""
from __future__ import annotations

import hashlib
import html
import re

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

import fitcore
from fitcore import calibration
from fitcore.numbers import format_interval, format_value, interval_limits
from fitcore.report_html import Unknowns, report_html, report_plot
from fitcore.report_text import CAUTION, BLANK
from fitcore.work import DataSet, Exclusion

WHEN = "2026-01-02T03:04:05+00:00"


def _data():
    # invented calibration-like data: a line, one gross outlier at index 6
    rng = np.random.default_rng(7)
    x = np.linspace(0.5, 12.0, 16)
    y = 0.8 + 1.9 * x + rng.normal(0, 0.12, x.size)
    y[6] += 6.0
    return DataSet(x, y, x_name="Conc", y_name="Signal", x_unit="mg/L", y_unit="mV",
                   source="/lab/run 7.csv", notes=("row 9: left out, no number in Signal",),
                   source_rows=np.arange(2, 18))


def _ols(data, keep):
    X = sm.add_constant(data.x[keep])
    return sm.OLS(data.y[keep], X).fit()


def test_least_squares_report_numbers_equal_statsmodels_ols():
    data = _data()
    excl = np.zeros(data.n, bool)
    excl[6] = True
    res = fitcore.fit("line", data.x, data.y, excluded=excl)
    text = report_html(res, data, exclusions=[Exclusion(6, "bubble in the cell", WHEN)],
                       written=WHEN)
    ols = _ols(data, ~excl)  # statsmodels OLS on the 15 points kept
    ci = ols.conf_int(0.05)
    for k, name in enumerate(("a", "b")):
        v, u = ols.params[k], ols.bse[k]
        # statsmodels' estimate and standard error, GUM-rounded by fitcore.numbers
        cells = re.search(rf"<tr><td>{name}</td><td>([^<]*(?:<[^t][^<]*)*)</td>", text).group(1)
        assert cells == format_value(v, u, rich="html")
        lo, hi = interval_limits(ci[k, 0], ci[k, 1], v, u, rich="html")
        assert f"<td>{lo} to {hi}</td>" in text
    # the points table: fitted values and residuals of statsmodels, by file row
    rows = re.findall(r'<tr[^>]*><td class="num">(\d+)</td><td class="num">[^<]*</td>'
                      r'<td class="num">[^<]*</td><td class="num">([^<]*)</td>'
                      r'<td class="num">([^<]*)</td>', text)
    assert [int(r[0]) for r in rows] == list(range(2, 18))
    fitted = np.delete(np.array([float(r[1]) for r in rows]), 6)
    resid = np.delete(np.array([float(r[2]) for r in rows]), 6)
    np.testing.assert_allclose(fitted, ols.fittedvalues, rtol=1e-5)  # 6 significant digits
    np.testing.assert_allclose(resid, ols.resid, rtol=2e-3, atol=1e-6)  # 4 significant digits
    # the residual standard deviation of the method paragraph (statsmodels' sqrt(scale))
    assert f"residual standard deviation was {np.sqrt(ols.scale):.4g} mV" in text
    # the exclusion record names the point by its file row alone (issue 17 item 3: one
    # identifier everywhere, as the points table and every copy), value and reason
    record = text[text.index("Exclusion record"):text.index("<h2>Points</h2>")]
    assert "<th>row</th>" in record and "<th>point</th>" not in record
    assert "file row" not in record
    assert ('<tr><td class="num">8</td>'
            f'<td class="num">{data.x[6]:.10g}</td>') in record
    assert "<td>bubble in the cell</td><td>" + WHEN in text


def test_exclusion_record_without_file_rows_numbers_the_points():
    # data typed or pasted (no file rows): the place in the data, 1-based, under "point"
    data = _data()
    data = DataSet(data.x, data.y, x_name="Conc", y_name="Signal")
    excl = np.zeros(data.n, bool)
    excl[6] = True
    res = fitcore.fit("line", data.x, data.y, excluded=excl)
    text = report_html(res, data, exclusions=[Exclusion(6, "bubble", WHEN)], written=WHEN)
    record = text[text.index("Exclusion record"):text.index("<h2>Points</h2>")]
    assert "<th>point</th>" in record and "<th>row</th>" not in record
    assert f'<tr><td class="num">7</td><td class="num">{data.x[6]:.10g}</td>' in record


def test_the_document_has_every_section_one_caution_and_the_plot_drawn_from_the_data():
    data = _data()
    res = fitcore.fit("line", data.x, data.y, loss="huber")
    text = report_html(res, data, written=WHEN)
    heads = re.findall(r"<h2>([^<]*)</h2>", text)
    assert heads == ["Plot", "Estimates", "Method", "Correlation of the estimates",
                     "Exclusion record", "Points", "Sign-off"]
    # one caution text (fitcore.report_text.CAUTION), printed once (common practice:
    # a repeated warning is read as boilerplate)
    assert text.count("Robust weights are not a licence") == 1
    assert html.escape(CAUTION, quote=True) in text
    # the plot is fitcore.report_plot's SVG of these data, inline
    assert report_plot(res, data) in text and text.count("<svg") == 1
    assert "row 9: left out, no number in Signal" in text  # the reading notes
    assert "No point was excluded." in text
    assert text.count(BLANK) == 5  # sign-off lines to fill in by hand
    assert "NOT CURRENT" not in text
    # the injected time is the only time printed; without it, two reports differ only there
    assert text.count(WHEN) == 2
    assert report_html(res, data, written=WHEN) == text


def test_analyses_and_the_stale_mark_go_into_their_sections():
    from fitcore.bootstrap import bootstrap

    data = _data()
    res = fitcore.fit("line", data.x, data.y, loss="huber")
    boot = bootstrap(res, kind="case", B=49, seed=3, level=0.95)
    comparison = [["", "a", "b"], ["Huber", "0.81(9)", "1.902(13)"], ["L2", "1.2(4)", "1.86(6)"]]
    text = report_html(res, data, bootstrap=boot, diagnostics_note="Point diagnostics: exact.\n"
                       "High leverage: points 16.", comparison=comparison, stale=True,
                       fit_failure="no convergence", signoff={"analyst": "R. Lindqvist"},
                       written=WHEN)
    heads = re.findall(r"<h2>([^<]*)</h2>", text)
    assert heads.index("Bootstrap intervals") < heads.index("Point diagnostics") \
        < heads.index("Loss comparison") < heads.index("Exclusion record")
    part = text.split("<h2>Bootstrap intervals</h2>")[1].split("<h2>")[0]
    assert boot.method_text in part
    for k in range(2):  # the percentile limits (numpy's percentile of the resamples)
        lo, hi = np.percentile(boot.samples[:, k], [2.5, 97.5])
        assert format_interval(lo, hi, res.values[k], res.stderr[k], rich="html") in part
    assert "<p>High leverage: points 16.</p>" in text
    assert "<th>L2</th><td class=\"num\">1.2(4)</td>" in text
    assert "NOT CURRENT (STALE)" in text and "the last fit failed: no convergence" in text
    assert "R. Lindqvist" in text and text.count(BLANK) == 4


def test_failed_resamples_are_counted_once():
    """A bootstrap whose method text already counts its failed resamples (fitcore's
    own wording) gets no second sentence saying the same (the 4PL sample's report read
    "1 resample failed and was dropped. 1 resample failed to fit and was left out.")."""
    import dataclasses

    from fitcore.bootstrap import bootstrap

    data = _data()
    res = fitcore.fit("line", data.x, data.y, loss="huber")
    boot = bootstrap(res, kind="case", B=49, seed=3, level=0.95)
    failed = dataclasses.replace(boot, n_failed=1,
                                 method_text=boot.method_text + "; 1 resample failed and was dropped")
    part = report_html(res, data, bootstrap=failed, written=WHEN).split(
        "<h2>Bootstrap intervals</h2>")[1].split("<h2>")[0]
    assert part.count("failed") == 1, part[:300]
    # a text that does not count them (an older or outside record) still says so, once
    plain = dataclasses.replace(boot, n_failed=2)
    part = report_html(res, data, bootstrap=plain, written=WHEN).split(
        "<h2>Bootstrap intervals</h2>")[1].split("<h2>")[0]
    assert part.count("failed") == 1 and "2 resamples failed" in part


def test_calibration_report_reads_unknowns_back_by_the_iso_8466_formula():
    data = _data()
    keep = np.ones(data.n, bool)
    keep[6] = False
    res = fitcore.fit("line", data.x, data.y, excluded=~keep)
    readings = [9.7, 9.9, 9.8]
    text = calibration.report_html(res, data, [("S1", readings)], written=WHEN)
    # ISO 8466-1 (classical formula), written out with statsmodels' OLS coefficients
    ols = _ols(data, keep)
    a, b = ols.params
    s = np.sqrt(ols.scale)
    xs = data.x[keep]
    n, m, ybar0 = xs.size, len(readings), float(np.mean(readings))
    x0 = (ybar0 - a) / b
    sxx = np.sum((xs - xs.mean()) ** 2)
    u = s / b * np.sqrt(1 / m + 1 / n + (ybar0 - data.y[keep].mean()) ** 2 / (b ** 2 * sxx))
    part = text.split("<h2>Unknown samples</h2>")[1].split("<h2>")[0]
    assert f'<td class="num">{format_value(x0, u)}</td>' in part
    t = stats.t.ppf(0.975, n - 2)
    assert format_interval(x0 - t * u, x0 + t * u, x0, u) in part
    assert "ISO 8466-1" in part
    # the same document as report_html with the read-back handed in
    items, limits, lof = calibration.read_back(res, [("S1", readings)])
    assert text == report_html(res, data, unknowns=Unknowns(tuple(items), limits, lof),
                               written=WHEN)


def test_batch_report_is_the_report_of_the_same_fit(tmp_path):
    path = tmp_path / "plate.csv"
    data = _data()
    lines = ["Conc (mg/L),Signal (mV),Bad"]
    lines += [f"{float(x)!r},{float(y)!r},{int(i == 6)}" for i, (x, y) in enumerate(zip(data.x, data.y))]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    spec = fitcore.BatchSpec(x="Conc", ys=("Signal",), model="line", loss="huber",
                             exclude="Bad", report=True)
    (row,) = list(fitcore.fit_sources([path], spec, jobs=1))
    sel = fitcore.read_table(path).choose("Conc", "Signal")
    mine = DataSet(sel.x, sel.y, x_name=sel.x_name, y_name=sel.y_name, x_unit="mg/L",
                   y_unit="mV", source=str(path), notes=sel.notes, source_rows=sel.source_rows)
    excl = np.arange(data.n) == 6
    res = fitcore.fit("line", sel.x, sel.y, loss="huber", excluded=excl)
    sha = hashlib.sha256(path.read_bytes()).hexdigest()
    ref = report_html(res, mine, sha256=sha, title="plate.csv / Signal", written=WHEN,
                      exclusions=[Exclusion(6, "marked in column 'Bad' of the file")])
    got = re.sub(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d[+-]\d\d:\d\d", WHEN, row.report)
    assert got == ref


def test_bad_inputs_are_refused_with_a_message():
    data = _data()
    res = fitcore.fit("line", data.x, data.y)
    with pytest.raises(ValueError, match="16 points but the fit has 15"):
        report_html(fitcore.fit("line", data.x[:15], data.y[:15]), data)
    with pytest.raises(TypeError, match="fitcore.work.DataSet"):
        report_html(res, {"x": data.x, "y": data.y})
    # without a data set: the fit's own arrays, points numbered from 1
    text = report_html(res, written=WHEN)
    assert "(not from a file)" in text and "<th>#</th>" in text
