"""Copy formats, the HTML/PDF report and the CSV/PNG/SVG exports, through the window.

What the window copies or writes is checked against ``fitcore.report`` run side by
side on ``fitcore.fit`` of the same inputs (the window adds nothing to the numbers),
and the exported confidence band of a least-squares line against statsmodels'
``OLS.get_prediction().conf_int()`` (an outside implementation of the same formula).
"""
from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import numpy as np
import pytest
from pypdf import PdfReader
from PySide6.QtGui import QGuiApplication, QImage

import fitcore
from fitcore import report as fr
from desktop import job_kinds, report_export
from desktop.commands import MaskCommand
from desktop.document import Settings

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


@pytest.fixture
def win(open_window, tmp_path, write_demo_csv):
    w = open_window(1300, 820, recovery_dir=tmp_path / "recovery")
    data = write_demo_csv(tmp_path / "line.csv")
    assert w.open_path(str(data))
    doc = w.document
    doc.apply_settings(Settings(model="line", loss="huber"))
    assert w.runner.wait()
    w.push(MaskCommand(doc, doc.make_mask_change([5], True, reason="pipette bubble")))
    assert w.runner.wait()
    return w


def data_side_by_side(doc):
    """The data record of the window's file, read again by fitcore alone."""
    path = doc.measurements.source
    sel = fitcore.read_table(path).choose(0, 1)
    return fr.DataRecord.from_data(sel)


def side_by_side(doc):
    m = doc.measurements
    return fitcore.fit(doc.settings.model, m.x, m.y, sigma=m.sigma, excluded=doc.excluded.copy(),
                       **doc.settings.to_fit_kwargs())


# ---------------------------------------------------------------------------- copy
@pytest.mark.parametrize("key,fmt,full", [
    (k, f, full) for k, _t, f, full in report_export.COPY_FORMATS if k != "html"])
def test_every_copy_format_equals_fitcore_report_side_by_side(win, key, fmt, full):
    text = win.reports.copy(key)
    clip = QGuiApplication.clipboard().text()
    assert clip == text
    res = side_by_side(win.document)
    # the window adds the analyst's reason for the point it excluded (the fixture's)
    assert clip == fr.estimates_text(res, fmt, level=0.95, full_precision=full,
                                     x_unit="s", y_unit="mV", reasons={5: "pipette bubble"},
                                     data=data_side_by_side(win.document))
    # 17.1: the method block of every copy says where the data came from
    assert "SHA-256" in clip and "line.csv" in clip and "reading notes" in clip


def test_default_copy_carries_html_and_plain_text(win):
    text = win.copy_estimates()  # Ctrl+Shift+C
    md = QGuiApplication.clipboard().mimeData()
    assert md.hasText() and md.hasHtml()
    assert md.text() == text == fr.estimates_text(side_by_side(win.document), "plain",
                                                  x_unit="s", y_unit="mV",
                                                  reasons={5: "pipette bubble"},
                                                  data=data_side_by_side(win.document))
    h = md.html()
    assert h.startswith("<table border=\"1\"") and "<td>a</td>" in h and "<td>b</td>" in h
    # the shortcut is wired to it
    acts = [a for a in win.findChildren(type(win.undo_action)) if a.shortcut().toString() == "Ctrl+Shift+C"]
    assert acts


def test_copied_text_states_how_the_numbers_were_obtained(win):
    text = win.reports.copy("plain")
    res = win.document.result
    import fitcore as fc

    for words in ("Huber", "tuning constant 1.345", "scale", "29 used, 1 excluded",
                  f"degrees of freedom  {res.dof}", "covariance", "95 % two-sided",
                  f"Ballast {fc.__version__}", "b ", "mV/s"):
        assert words in text, words
    assert fr.CAUTION in text
    # reads as a lab report line: "b = 1.4987(93) mV/s   95 % CI ..."
    assert re.search(r"^\s+b\s+= \d+\.\d+\(\d+\) mV/s   95 % CI ", text, re.M)


def test_full_precision_tsv_round_trips_the_estimates(win):
    text = win.reports.copy("tsv_full")
    rows = list(csv.reader(io.StringIO(text), delimiter="\t"))
    res = win.document.result
    got = {r[0]: (float(r[1]), float(r[2])) for r in rows[1:] if r and r[0] in res.param_names}
    for i, name in enumerate(res.param_names):
        assert got[name] == (res.values[i], res.stderr[i])  # exact, not rounded


def test_copy_menu_offers_every_format(win):
    menus = [a.menu() for a in win.menuBar().actions() if a.text() == "&Edit"]
    sub = [a.menu() for a in menus[0].actions() if a.menu() is not None
           and "Copy estimates" in a.text()][0]
    assert len(sub.actions()) == len(report_export.COPY_FORMATS)
    sub.actions()[3].trigger()  # Markdown
    assert QGuiApplication.clipboard().text().startswith("| Quantity | Estimate |")


# ---------------------------------------------------------------------------- report
def test_html_report_is_self_contained_and_complete(win, tmp_path):
    path = win.reports.write_html(tmp_path / "r.html")
    assert path
    text = (tmp_path / "r.html").read_text(encoding="utf-8")
    res = win.document.result
    # self-contained: no link to any outside file; the plot is inline SVG drawn from
    # the data (fitcore.report_plot), no bitmap and no window state (17.5)
    assert not re.search(r"(src|href)=\"(?!data:)", text)
    assert "<img" not in text and text.count("<svg") == 1
    svg = text[text.index("<svg"):text.index("</svg>") + 6]
    from PySide6.QtCore import QByteArray
    from PySide6.QtSvg import QSvgRenderer

    assert QSvgRenderer(QByteArray(svg.encode("utf-8"))).isValid()
    assert svg.count(">Time (s)</text>") == 2  # the x-axis title under both panels
    assert "residual / scale" in svg  # the window's default residual plot (17.12)
    assert "#5a5a6e" in svg and "#ffc800" not in svg  # excluded ring; no selection halo
    # the same data give the same plot, whatever the window shows (zoom, selection)
    win.document.set_selection([0])
    win.plot.data_plot.vb.setRange(xRange=(0, 1), yRange=(0, 1), padding=0)
    again = win.reports.report_html()
    assert again[again.index("<svg"):again.index("</svg>") + 6] == svg
    # the sign-off block: blank lines to fill in when no names were given (17.4)
    signoff = text[text.index("<h2>Sign-off</h2>"):]
    from fitcore.report_text import BLANK

    assert signoff.count(BLANK) == 5
    # estimates as fitcore formats them, correlation, method in words, caution
    est = fr.estimates_text(side_by_side(win.document), "html", x_unit="s", y_unit="mV")
    first_row = est.split("\n")[2]
    assert first_row in text
    corr_row = fr.correlation_text(res, "html").split("\n")[2]
    assert corr_row.replace("<td>", '<td class="num">') in text
    assert "was fitted to 29 of the 30 points in line.csv" in text
    assert "the Huber loss (tuning constant 1.345 × scale)" in text
    assert html_escape(fr.CAUTION) in text
    # exclusion record: file row (the one identifier), value, reason, when
    when = win.document.times[5]
    row = win.document.measurements.file_row(5)
    assert row is not None and row > 6  # (a header and title lines come first)
    assert re.search(rf"<tr><td class=\"num\">{row}</td>"
                     rf"<td class=\"num\">{res.x[5]:.10g}</td>"
                     rf"<td class=\"num\">{res.y[5]:.10g}</td><td>pipette bubble</td>"
                     rf"<td>{re.escape(when)}</td>", text)
    # the points table: one row per point with its weight
    rows = re.findall(r"<tr[^>]*><td class=\"num\">(\d+)</td>.*?<td class=\"num\">([0-9.]+)</td>"
                      r"<td>(used|down-weighted|excluded)</td>", text)
    m = win.document.measurements  # the points by their file rows (17.3)
    assert [int(r[0]) for r in rows] == [m.file_row(i) for i in range(30)]
    assert [float(r[1]) for r in rows] == [round(float(w), 3) for w in res.weights]
    assert [r[2] for r in rows] == fr.point_status(res)
    assert "SHA-256" in text and win.sessions.source_sha256 in text


def html_escape(s):
    import html

    return html.escape(s, quote=True)


def test_pdf_report_prints_through_qt(win, tmp_path):
    path = win.reports.write_pdf(tmp_path / "r.pdf")
    assert path
    raw = (tmp_path / "r.pdf").read_bytes()
    assert raw.startswith(b"%PDF-") and raw.rstrip().endswith(b"%%EOF")
    assert not (tmp_path / "r.pdf.part").exists()
    tdoc = win.reports.text_document()
    plain = tdoc.toPlainText()
    for words in ("Fit report: line.csv", "Estimates", "Method", "Correlation of the estimates",
                  "Exclusion record", "pipette bubble", "Points", "Caution."):
        assert words in plain, words
    # the plot is vector (no image object in the file) and every page is numbered
    assert not re.search(rb"/Subtype\s*/Image", raw)
    pages = win.reports.pages_printed
    assert pages >= 2  # 30 points, method, record and sign-off do not fit one A4 page
    assert report_export.page_footer(2, pages) == f"page 2 of {pages}"
    # an outside reader (pypdf) reads the file Qt wrote: A4 portrait pages, as many as printed
    pdf = PdfReader(tmp_path / "r.pdf")
    assert len(pdf.pages) == pages
    box = pdf.pages[0].mediabox
    assert float(box.height) / float(box.width) == pytest.approx(297 / 210, rel=0.01)  # A4 portrait


def _text_runs(page) -> tuple[str, list]:
    """The page's text and its runs ``(text, baseline y, glyph height)`` in page units
    (y up from the bottom edge), read by pypdf: the text matrix, then the current
    transformation matrix, applied to the run's origin and to its font-size vector."""
    runs = []

    def visit(text, cm, tm, _font, size):
        if text.strip():
            y = cm[1] * tm[4] + cm[3] * tm[5] + cm[5]
            vx, vy = tm[2] * size, tm[3] * size
            height = float(np.hypot(cm[0] * vx + cm[2] * vy, cm[1] * vx + cm[3] * vy))
            runs.append((text, y, height))

    text = page.extract_text(visitor_text=visit)
    return " ".join(text.split()), runs


def test_pdf_footer_is_readable_on_every_page(win, tmp_path):
    """Each printed page ends with "page k of N" in small type within the page (the
    footer's font was taken in printer points and scaled again: letters a fifth of the
    page high, cut at the paper's edge). Read back with pypdf (an outside reader)."""
    pdf = tmp_path / "r.pdf"
    assert win.reports.write_pdf(pdf)
    pages = win.reports.pages_printed
    reader = PdfReader(pdf)
    assert len(reader.pages) == pages
    for k, page in enumerate(reader.pages, start=1):
        page_h = float(page.mediabox.height)
        text, runs = _text_runs(page)
        assert f"page {k} of {pages}" in text, (k, text[-200:])
        foot = [r for r in runs if "page" in r[0]][-1]
        assert 0 <= foot[1] <= page_h and 0 < foot[2] < 0.02 * page_h, (k, foot, page_h)  # small, on the page


def test_pdf_plot_starts_under_its_heading(win):
    """The plot's reserved line sits right under the "Plot" heading (empty paragraphs
    around the anchor left a ~40 px blank band there); common practice: a figure
    follows its heading's own spacing, nothing more."""
    from PySide6.QtCore import QSizeF

    tdoc = win.reports.text_document()
    tdoc.setPageSize(QSizeF(report_export.PDF_LAYOUT_WIDTH, 1400))
    rect, _renderer = report_export._plot_rect(tdoc)
    block = tdoc.begin()
    while block.isValid() and block.text().strip() != "Plot":
        block = block.next()
    assert block.isValid()
    heading = tdoc.documentLayout().blockBoundingRect(block)
    margin = block.blockFormat().bottomMargin()  # the heading's own spacing (Qt: 12 px)
    assert 0 <= rect.top() - heading.bottom() <= margin + 1, (heading.bottom(), margin, rect.top())


def test_signoff_names_are_typed_once_and_remembered(win, tmp_path, monkeypatch):
    asked = []
    monkeypatch.setattr(report_export, "ask_signoff", lambda parent, current: (
        asked.append(dict(current)), {"analyst": "R. Lindqvist", "reviewer": "M. Osei",
                                      "review_date": ""})[1])
    assert win.reports.edit_signoff()
    assert asked == [{"analyst": "", "reviewer": "", "review_date": ""}]
    text = win.reports.report_html()
    signoff = text[text.index("<h2>Sign-off</h2>"):]
    from fitcore.report_text import BLANK

    assert "R. Lindqvist" in signoff and "M. Osei" in signoff
    assert signoff.count(BLANK) == 3  # two signatures and the date of review, by hand
    # remembered in the window's settings: a new window prints them without asking
    win.qsettings.sync()
    from PySide6.QtCore import QSettings

    again = QSettings(win.qsettings.fileName(), QSettings.IniFormat)
    assert again.value("report/analyst") == "R. Lindqvist"
    # the menu carries the action
    from desktop import report_export as rx

    assert rx.ReportExporter.edit_signoff is not None


def test_report_refuses_a_stale_result(win, tmp_path, errors, monkeypatch):
    monkeypatch.setattr(job_kinds, "run_fit", lambda request: (None, "the solver gave up"))
    doc = win.document
    doc.apply_settings(doc.settings.with_(loss="cauchy"))
    assert win.runner.wait()
    assert doc.stale and doc.fit_failed
    assert not win.reports.write_html(tmp_path / "stale.html")
    assert not (tmp_path / "stale.html").exists()
    assert errors and "the solver gave up" in errors[-1][1]


# ---------------------------------------------------------------------------- CSV
def test_curve_csv_matches_the_result_and_statsmodels_band(win, tmp_path):
    import statsmodels.api as sm

    doc = win.document
    doc.apply_settings(Settings(model="line", loss="l2"))
    assert win.runner.wait()
    assert win.reports.write_curve_csv(tmp_path / "c.csv")
    rows = list(csv.reader(open(tmp_path / "c.csv", encoding="utf-8")))
    assert rows[0] == ["x (s)", "fitted (mV)", "band low 95% (mV)", "band high 95% (mV)"]
    a = np.array(rows[1:], float)
    assert a.shape == (report_export.CURVE_POINTS, 4)
    m = doc.measurements
    assert a[0, 0] == m.x.min() and a[-1, 0] == m.x.max()
    res = doc.result
    assert np.array_equal(a[:, 1], res.predict(a[:, 0]))
    lo, hi = res.band(a[:, 0])
    assert np.array_equal(a[:, 2], lo) and np.array_equal(a[:, 3], hi)
    keep = ~doc.excluded
    ols = sm.OLS(m.y[keep], sm.add_constant(m.x[keep])).fit()
    ci = ols.get_prediction(sm.add_constant(a[:, 0])).conf_int(alpha=0.05)
    np.testing.assert_allclose(a[:, 2], ci[:, 0], rtol=1e-9)
    np.testing.assert_allclose(a[:, 3], ci[:, 1], rtol=1e-9)


def test_points_csv_has_residuals_weights_and_reasons(win, tmp_path):
    assert win.reports.write_points_csv(tmp_path / "p.csv")
    rows = list(csv.DictReader(open(tmp_path / "p.csv", encoding="utf-8")))
    res = win.document.result
    assert len(rows) == 30
    assert [float(r["weight"]) for r in rows] == [float(w) for w in res.weights]
    assert [float(r["residual (mV)"]) for r in rows] == [float(v) for v in res.residuals]
    assert rows[5]["status"] == "excluded" and rows[5]["exclusion reason"] == "pipette bubble"
    down = [i for i, r in enumerate(rows) if r["status"] == "down-weighted"]
    assert down == [i for i in range(30) if res.weights[i] < 0.5 and not res.excluded[i]]
    assert 20 in down  # the other gross outlier, left in, is down-weighted by Huber


# ---------------------------------------------------------------------------- plot
def test_plot_png_and_svg_at_the_chosen_size(win, tmp_path, monkeypatch):
    monkeypatch.setattr(report_export, "ask_plot_size", lambda parent, w, h: (640, 360))
    monkeypatch.setattr(report_export, "ask_save_path",
                        lambda parent, title, start, filt: str(tmp_path / "plot.png"))
    assert win.reports.write_plot()
    img = QImage(str(tmp_path / "plot.png"))
    assert (img.width(), img.height()) == (640, 360)
    # the excluded point's slate-grey ring (90, 90, 110) is in the picture: a grey with
    # a blue cast that neither the black/grey text nor the blue or orange points give
    ring = 0
    for yy in range(0, img.height(), 2):
        for xx in range(0, img.width(), 2):
            c = img.pixelColor(xx, yy)
            ring += (abs(c.red() - c.green()) <= 4 and c.blue() - c.red() >= 10
                     and 70 < c.red() < 160)
    assert ring > 0

    assert win.reports.write_plot(tmp_path / "plot.svg", (1000, 700))
    svg = (tmp_path / "plot.svg").read_text(encoding="utf-8")
    assert 'viewBox="0 0 1000 700"' in svg
    assert "<image" not in svg  # vector symbols, no embedded bitmaps
    assert "#5a5a6e" in svg  # the excluded point's ring colour (plot_view.COLOURS)
    assert "#c81e2d" not in svg  # not the red mark of masked points (issue 17.17)
    from PySide6.QtSvg import QSvgRenderer

    assert QSvgRenderer(str(tmp_path / "plot.svg")).isValid()
    # the window's own plot is untouched by exports
    assert win.plot.isVisible() and win.plot.points.isVisible()


@pytest.mark.parametrize("text,size", [("1200 x 800", (1200, 800)), ("640x480", (640, 480)),
                                       ("300, 200", (300, 200)), ("1024×768", (1024, 768))])
def test_parse_size(text, size):
    assert report_export.parse_size(text) == size


@pytest.mark.parametrize("text", ["", "big", "100", "5 x 5", "1e6 x 10", "a x b"])
def test_parse_size_refuses_with_a_message(text):
    with pytest.raises(ValueError, match="width x height|whole numbers|between"):
        report_export.parse_size(text)


def test_latex_copies_have_no_bare_angle_brackets(win):
    # common practice: with LaTeX's default OT1 encoding a text-mode "<" prints as an
    # inverted exclamation mark, so "weight < 0.5" must be written with \textless{}
    for key in ("latex", "siunitx"):
        text = win.reports.copy(key)
        assert r"weight \textless{} 0.5" in text
        assert "<" not in text and ">" not in text


def test_report_includes_bootstrap_diagnostics_and_comparison_only_for_the_fit_shown(win):
    """The analyses done on the fit on screen go into the HTML and PDF report; after a
    refit they belong to an older fit and are left out. The bootstrap intervals are
    checked against ``fitcore.bootstrap`` run side by side with the same seed."""
    from fitcore.bootstrap import bootstrap

    res = win.document.result
    html0 = win.reports.report_html()
    for title in ("Bootstrap intervals", "Point diagnostics", "Loss comparison"):
        assert f"<h2>{title}</h2>" not in html0
    dlg = win.show_bootstrap()
    dlg.kind.setCurrentIndex(dlg.kind.findData("case"))
    dlg.B.setValue(99)
    dlg.seed.setValue(11)
    assert dlg.run() and dlg.job.wait(120000)
    QGuiApplication.processEvents()
    win.diag_action.setChecked(True)
    assert win.diagnostics.wait()
    win.show_comparison()
    assert win.compare_view.job.wait(60000)
    QGuiApplication.processEvents()
    assert win.current_bootstrap() is not None and win.document.result is res

    html = win.reports.report_html()
    ref = bootstrap(res, kind="case", B=99, seed=11, level=0.95)
    boot = html.split("<h2>Bootstrap intervals</h2>")[1].split("<h2>")[0]
    assert ref.method_text in boot
    for k in range(len(res.param_names)):
        # both intervals to the last decimal of the GUM-rounded estimate beside them
        # (GUM 7.2.6: the value to the decimal of its two-digit uncertainty), trailing
        # zeros kept; the decimals are read off the estimate's printed form
        est = fr.format_value(res.values[k], res.stderr[k])
        d = len(re.match(r"-?\d+(?:\.(\d+))?\(", est).group(1) or "")
        lo, hi = ref.intervals[k]
        assert f"[{lo:.{d}f}, {hi:.{d}f}]" in boot, (est, boot)
        clo, chi = res.intervals(0.95)[k]
        assert f"[{clo:.{d}f}, {chi:.{d}f}]" in boot
    note = win.diagnostics.note_text()
    assert note and report_export._h(note.splitlines()[0]) in html
    cmp_part = html.split("<h2>Loss comparison</h2>")[1].split("<h2>")[0]
    for cell in win.compare_view.text().splitlines()[1].split("\t")[1:]:
        assert report_export._h(cell) in cmp_part
    plain = win.reports.text_document().toPlainText()  # what the PDF prints
    for title in ("Bootstrap intervals", "Point diagnostics", "Loss comparison"):
        assert title in plain

    # a refit: the analyses belong to the previous fit and are not reported with the new one
    doc = win.document
    win.push(MaskCommand(doc, doc.make_mask_change([20], True, reason="drift")))
    assert win.runner.wait()
    html2 = win.reports.report_html()
    assert "<h2>Bootstrap intervals</h2>" not in html2
    assert "<h2>Loss comparison</h2>" not in html2
    if win.diagnostics.for_result is not doc.result:
        assert "<h2>Point diagnostics</h2>" not in html2


def test_points_can_be_traced_to_their_file_rows(open_window, tmp_path):
    # sample 06 has three title lines and a header, so its point #58 (the cosmic ray
    # of sample_sets/README.md) is row 62 of the file: the points table's tooltip and
    # the report's exclusion record give that row, so the point can be found in the
    # file and the lab notebook
    from PySide6.QtCore import Qt

    from desktop.commands import MaskCommand
    from desktop.points_model import COL

    root = Path(__file__).resolve().parents[2]
    w = open_window(1400, 900, recovery_dir=tmp_path / "recovery")
    assert w.open_path(str(root / "sample_sets" / "06_raman_peak.txt"))
    assert w.runner.wait()
    doc = w.document
    assert doc.measurements.file_row(57) == 62 and doc.measurements.file_row(0) == 5
    tip = w.points_model.data(w.points_model.index(57, COL["#"]), Qt.ToolTipRole)
    assert tip == "row 62 of the file (point 58 of the data)"
    # the table shows the file row itself, under a "row" header
    assert w.points_model.data(w.points_model.index(57, COL["#"])) == 62
    assert w.points_model.headerData(COL["#"], Qt.Horizontal) == "row"
    w.push(MaskCommand(doc, doc.make_mask_change([57], True, reason="cosmic ray")))
    assert w.runner.wait()
    # the undo step of a changed reason names the point the same way
    from desktop.commands import ReasonCommand
    w.push(ReasonCommand(doc, 57, "cosmic ray"))
    assert w.undo_stack.undoText() == "Reason for row 62"
    html = w.reports.report_html()
    record = html[html.index("Exclusion record"):html.index("<h2>Points</h2>")]
    # one identifier (issue 17 item 3): the file row, as in the table, not the index too
    assert "<th>row</th>" in record and "<th>point</th>" not in record
    assert '<tr><td class="num">62</td><td class="num">' in record
    assert '<td class="num">58</td>' not in record


def test_window_report_is_the_library_report_of_the_same_fit(win, tmp_path):
    """The window's exported HTML is :func:`fitcore.report_html.report_html` of the same
    work done with fitcore alone (file read by fitcore.read_table, fitted by
    fitcore.fit, SHA-256 by hashlib): the same document, byte for byte, once the time
    of writing is the same."""
    import hashlib

    from fitcore.report_html import report_html
    from fitcore.work import DataSet, Exclusion

    when = "2026-01-02T03:04:05+00:00"
    path = win.reports.write_html(tmp_path / "r.html", written=when)
    assert path
    text = (tmp_path / "r.html").read_text(encoding="utf-8")
    src = win.document.measurements.source
    sel = fitcore.read_table(src).choose(0, 1)
    data = DataSet(sel.x, sel.y, sel.sigma, x_name=sel.x_name, y_name=sel.y_name,
                   x_unit=sel.x_unit, y_unit=sel.y_unit, source=sel.source, notes=sel.notes,
                   source_rows=sel.source_rows)
    excluded = np.arange(data.n) == 5
    res = fitcore.fit("line", data.x, data.y, loss="huber", excluded=excluded)
    record = [Exclusion(5, "pipette bubble", win.document.times[5])]
    sha = hashlib.sha256(Path(src).read_bytes()).hexdigest()
    assert text == report_html(res, data, exclusions=record, sha256=sha, written=when)
    # every copy format is the library's copy text of the same work
    from fitcore.report_html import estimates_copy

    for key, _t, fmt, full in report_export.COPY_FORMATS:
        assert win.reports.estimates(fmt, full) == estimates_copy(
            res, fmt, data, exclusions=record, sha256=sha, full_precision=full), key
    # the PDF prints the same document with the plot painted in its place
    resources: dict = {}
    pdf_html = win.reports.report_html(images="resource", resources=resources, written=when)
    svg = resources[report_export.PLOT_MARK]
    assert pdf_html.replace(report_export.PLOT_MARK, svg) == report_html(
        res, data, exclusions=record, sha256=sha, written=when, max_rows=report_export.PDF_MAX_ROWS)
