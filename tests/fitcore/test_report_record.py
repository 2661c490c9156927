"""The filed record (issue 17): data record, reasons, file rows, held values, siunitx
copy and derived names, checked on the text fitcore writes (no window).

Fits are made with ``fitcore.fit`` on invented demo data; the numbers themselves are
checked elsewhere (tests/fitcore/test_report.py against statsmodels/NIST), here only
what the record says about them.
"""
from __future__ import annotations

import csv
import io
import math
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

import fitcore
from fitcore import report
from fitcore.numbers import held_value_text

ROOT = Path(__file__).resolve().parents[2]


def _decay(fixed=None):
    # invented demo data: an exponential decay, tau = 28.8, with noise
    rng = np.random.default_rng(4)
    x = np.linspace(0, 100, 25)
    y = 5.0 * np.exp(-x / 28.8) + 0.3 + rng.normal(0, 0.03, x.size)
    return fitcore.fit("exp_decay", x, y, fixed=fixed)


def _line_with_exclusion():
    rng = np.random.default_rng(2)
    x = np.linspace(1, 20, 20)
    y = 1.0 + 0.5 * x + rng.normal(0, 0.05, x.size)
    y[3] += 5.0
    excl = np.zeros(x.size, bool)
    excl[3] = True
    return fitcore.fit("line", x, y, excluded=excl, loss="huber")


# ------------------------------------------------------------------ 17.1 data record
def test_data_record_from_a_read_file_states_file_sheet_hash_columns_and_left_out_rows(tmp_path):
    path = tmp_path / "runs.csv"
    path.write_text("Time (s),Signal (mV)\n1,2.1\n2,n/a\n3,4.0\n4,5.1\n5,6.0\n", encoding="utf-8")
    sel = fitcore.read_table(str(path)).choose(0, 1)
    rec = report.DataRecord.from_data(sel)
    assert rec.file_rows == (2, 4, 5, 6) and rec.n_points == 4
    assert len(rec.sha256) == 64
    res = fitcore.fit("line", sel.x, sel.y)
    text = report.estimates_text(res, data=rec)
    method = text.split("\nMethod\n")[1]
    assert str(path) in method and rec.sha256 in method
    assert "x = Time (s), y = Signal (mV)" in method
    assert "points read         4 (file rows 2 to 6)" in method
    # the row the reader left out, and why, reaches the record
    assert "row 3" in method and "n/a" in method
    for fmt in report.FORMATS:
        assert rec.sha256 in report.estimates_text(res, fmt, data=rec)


def test_data_record_names_the_sheet_of_a_workbook():
    sel = fitcore.read_table(str(ROOT / "sample_sets" / "03_enzyme_assay.xlsx")).choose(0, 1)
    rec = report.DataRecord.from_data(sel)
    assert rec.sheet  # the sheet the reader chose
    lines = dict(report.data_lines(rec))
    assert lines["sheet"] == rec.sheet


# ------------------------------------------------------------------ 17.2 reasons
def test_exclusion_without_a_reason_is_marked_in_every_copy_and_the_csv():
    res = _line_with_exclusion()
    for fmt in report.FORMATS:
        text = report.estimates_text(res, fmt, reasons={})
        assert report.NO_REASON in text, fmt
        assert report.NO_REASON not in report.estimates_text(res, fmt, reasons={3: "air bubble"})
    rows = list(csv.reader(io.StringIO(report.points_csv(res, {}))))
    assert rows[4][-1] == report.NO_REASON and rows[4][-2] == "excluded"
    assert rows[5][-1] == ""


# ------------------------------------------------------------------ 17.3 numbering
def test_points_are_named_by_their_file_row_when_it_is_known():
    res = _line_with_exclusion()
    rows = tuple(range(10, 30))  # the data began in row 10 of the file
    rec = report.DataRecord(source="f.csv", file_rows=rows, n_points=20)
    text = report.estimates_text(res, data=rec, reasons={3: "air bubble"})
    assert "row 13 (x = 4, " in text and "air bubble" in text
    assert "point 4" not in text
    # without file rows the point is named by its place in the data
    assert "point 4 (x = 4, " in report.estimates_text(res)
    assert report.point_label(3, rows) == "row 13" and report.point_label(3) == "point 4"
    table = list(csv.reader(io.StringIO(report.points_csv(res, rows=rows))))
    assert table[0][0] == "file row" and table[4][0] == "13"


# ------------------------------------------------------------------ 17.6 held values
def test_held_value_is_shown_as_held_and_rounded_with_the_full_value_in_the_method():
    free = _decay()
    tau = float(free.values[1])
    res = _decay(fixed={"tau": tau})
    plain = report.estimates_text(res)
    assert f"held at {held_value_text(tau)} s" not in plain  # no unit without data units
    assert re.search(rf"^  tau +held at {re.escape(held_value_text(tau))}$", plain, re.M)
    assert "(exact)" not in plain
    # the derived half-life comes from the held tau only: not "exact", no interval
    hl = tau * math.log(2)
    assert f"{held_value_text(hl)} (from held values)" in plain
    assert "conditional" in plain and repr(tau) in plain  # full value in the method block
    assert "conditional on these values" in report.method_statement(res)


def test_held_value_text_rule():
    # a long value (copied from a fit) is rounded to 4 significant digits; a short one
    # (typed) is kept as given
    assert held_value_text(28.76560799323773) == "28.77"
    assert held_value_text(28.7656) == "28.7656"
    assert held_value_text(0.5) == "0.5"
    assert held_value_text(123456789.123) == "1.235e8"


def test_tsv_value_and_uncertainty_cells_are_numbers_for_held_and_derived_rows():
    res = _decay(fixed={"tau": 28.76560799323773})
    for full in (False, True):
        tsv = report.estimates_text(res, "tsv", full_precision=full)
        rows = [r.split("\t") for r in tsv.split("\n\n")[0].splitlines()[1:]]
        for r in rows:
            float(r[1])  # the value cell is a number
            if r[2]:
                float(r[2])
        held = {r[0]: r for r in rows}
        assert held["tau"][2] == "" and held["tau"][6].startswith("held")
        assert held["half_life"][6].startswith("from held values")
        # 17.6 "round it sensibly": the rounded copy rounds assumed values as the plain
        # text does (held at 28.77; half_life 19.94, not 19.939004...); full precision
        # keeps every digit (the full held value is in the method block either way)
        values = dict(zip(res.param_names, res.values))
        values.update({name: v for name, v, _u, _d in res.derived_values()})
        for name in ("tau", "half_life"):
            if full:
                assert float(held[name][1]) == values[name], name
            else:
                assert held[name][1] == held_value_text(values[name]), (name, held[name][1])
        if not full:
            assert held["tau"][1] == "28.77"


# ------------------------------------------------------------------ 17.7 siunitx
def test_siunitx_copy_uses_qty_with_the_unit_and_fills_the_unit_column():
    res = _line_with_exclusion()
    tex = report.estimates_text(res, "siunitx", x_unit="s", y_unit="µg/L")
    assert r"\SI{" not in tex
    assert r"\qty{" + report.format_value(res.values[0], res.stderr[0]) + r"}{\micro g/L}" in tex
    # the unit column holds the unit
    row_a = next(ln for ln in tex.splitlines() if ln.startswith("a &"))
    assert row_a.split(" & ")[2] == r"\unit{\micro g/L}"


@pytest.mark.skipif(shutil.which("pdflatex") is None,
                    reason="no TeX installation (pdflatex) on this machine: the siunitx "
                           "copy cannot be compiled here")
def test_siunitx_and_latex_copies_compile(tmp_path):
    res = _decay(fixed=None)
    held = _decay(fixed={"tau": 28.76560799323773})
    body = "\n\n".join(report.estimates_text(r, fmt, x_unit="s", y_unit="µg/L")
                       for r in (res, held) for fmt in ("latex", "siunitx"))
    doc = ("\\documentclass{article}\n\\usepackage[T1]{fontenc}\n\\usepackage{siunitx}\n"
           "\\begin{document}\n" + body + "\n\\end{document}\n")
    (tmp_path / "copy.tex").write_text(doc, encoding="utf-8")
    run = subprocess.run(["pdflatex", "-interaction=nonstopmode", "-halt-on-error", "copy.tex"],
                         cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stdout[-3000:]
    assert (tmp_path / "copy.pdf").stat().st_size > 1000
    assert "Undefined control sequence" not in run.stdout


# ------------------------------------------------------------------ 13.3 one text, no fallback
def test_one_caution_text_and_no_silent_fallback():
    from fitcore import report_text

    assert report.CAUTION is report_text.CAUTION
    with pytest.raises(ValueError):
        report.loss_title("no_such_loss")
    with pytest.raises(TypeError):
        report.format_value("abc", 1.0)


# ------------------------------------------------------------------ 17.17 names
def test_derived_names_are_plain_descriptions():
    names = {n: [d.name for d in fitcore.get_model(n).derived] for n in fitcore.builtin_models()}
    assert "span" not in names["logistic4"] and "range" in names["logistic4"]
    assert "efficiency" not in sum(names.values(), [])
    mm = {d.name: d for d in fitcore.get_model("michaelis_menten").derived}
    assert "initial_slope" in mm and "kcat/Km" in mm["initial_slope"].description
    # the derived range is top - bottom (the model's own parameters)
    rng = np.random.default_rng(1)
    x = np.geomspace(0.01, 100, 30)
    y = 2 + 8 / (1 + (x / 1.5) ** 1.2) + rng.normal(0, 0.05, x.size)
    res = fitcore.fit("logistic4", x, y)
    d = {n: v for n, v, _u, _d in res.derived_values()}
    assert d["range"] == pytest.approx(res.values[1] - res.values[0], rel=1e-12)


# ------------------------------------------------------------------ 17.5 plot from the data
def test_report_plot_is_svg_drawn_from_the_data_without_qt():
    import xml.etree.ElementTree as ET

    from fitcore.report_plot import POINT_COLOURS, plot_svg

    res = _line_with_exclusion()
    svg = plot_svg(res, x_label="Time (s)", y_label="Signal (mV)")
    root = ET.fromstring(svg)  # well-formed XML
    ns = "{http://www.w3.org/2000/svg}"
    texts = [t.text for t in root.iter(ns + "text")]
    assert texts.count("Time (s)") == 2 and "Signal (mV)" in texts  # both x-axis titles
    # one symbol per point in each panel; the excluded one a crossed ring in both
    circles = list(root.iter(ns + "circle"))
    assert len(circles) == 2 * len(res.x)
    ring = POINT_COLOURS["excluded"][1]
    assert svg.count(f'stroke="{ring}"') == 2
    assert "<image" not in svg and "clipPath" not in svg
