"""Readers against hostile or unusual files (issue 16): regular files only, stated caps,
streaming spreadsheet readers that agree with openpyxl / pandas-odf on ordinary files,
wide text files and a last line cut short.

Sources: the XLSX cell-reference and shared-string layout is ECMA-376 Part 1 section
18.3 (from memory); ODS repeated rows/columns are OpenDocument 1.2 Part 1 sections
9.1.3 (table:number-rows-repeated) and 9.1.4 (table:number-columns-repeated), from
memory. openpyxl and pandas' odf engine are the independent readers compared against.
"""
from __future__ import annotations

import datetime as dt
import os
import zipfile

import numpy as np
import pandas as pd
import pytest

from fitcore import io as fio
from fitcore.io import ReadError, read_table


def test_fifo_and_device_are_refused_without_blocking(tmp_path):
    fifo = tmp_path / "live.csv"
    os.mkfifo(fifo)  # nobody writes: opening it for reading the usual way would block forever
    with pytest.raises(ReadError, match=r"^'live.csv' is a named pipe \(FIFO\), not a regular file"):
        read_table(fifo)
    with pytest.raises(ReadError, match="is a device, not a regular file"):
        read_table("/dev/zero")


def test_size_cap_is_stated(tmp_path, monkeypatch):
    p = tmp_path / "big.csv"
    p.write_text("x,y\n" + "1,2\n" * 1000)
    monkeypatch.setattr(fio, "MAX_FILE_BYTES", 1000)
    with pytest.raises(ReadError, match=r"larger than the 1,000 bytes Ballast reads"):
        read_table(p)


def test_text_cell_cap_is_stated(tmp_path, monkeypatch):
    p = tmp_path / "cells.csv"
    p.write_text("x,y,z\n" + "1,2,3\n" * 400)
    monkeypatch.setattr(fio, "MAX_TEXT_CELLS", 1000)
    with pytest.raises(ReadError, match=r"more than the 1,000 cells Ballast reads"):
        read_table(p)


def test_wide_csv_with_lines_over_the_csv_field_limit(tmp_path):
    # 12,000 columns: every line is longer than 131,072 characters (the csv module's
    # default field limit, which raised a raw _csv.Error before)
    cols = 12000
    rng = np.random.default_rng(5)
    y = rng.normal(size=(6, cols))
    lines = ["x," + ",".join(f"ch{i}" for i in range(cols))]
    lines += [f"{r}," + ",".join(repr(float(v)) for v in y[r]) for r in range(6)]
    p = tmp_path / "spectra.csv"
    p.write_text("\n".join(lines) + "\n")
    assert max(len(s) for s in lines) > 131_072
    t = read_table(p)
    assert len(t.columns) == cols + 1
    s = t.choose(x="x", y="ch11999")
    np.testing.assert_array_equal(s.y, y[:, 11999])
    np.testing.assert_array_equal(t.column("ch0"), y[:, 0])


def test_wide_spectrum_export_picks_x_and_y_from_thousands_of_columns(tmp_path):
    # a spectrometer's series export: time, then 12,000 wavelength columns headed
    # "412.345 nm"; pandas.read_csv of the same file is the independent reader
    cols, rows = 12000, 40
    rng = np.random.default_rng(16)
    wl = np.linspace(200.0, 1100.0, cols)
    y = np.round(rng.normal(0.5, 0.1, size=(rows, cols)), 6)
    cells = [[f"{v:.6f}" for v in r] for r in y]
    cells[7][300] = ""          # an empty cell: that column is checked cell by cell
    cells[9][301] = "inf"       # not a finite number
    cells[3][4000] = "n.d."     # text: that column is read as text, the others as numbers
    header = "Time (s)," + ",".join(f"{w:.3f} nm" for w in wl)
    p = tmp_path / "series.csv"
    p.write_text(header + "\n" + "".join(f"{0.5 * r:.1f}," + ",".join(cells[r]) + "\n" for r in range(rows)))
    t = read_table(p)
    ref = pd.read_csv(p)
    assert len(t.columns) == cols + 1 and t.n_rows == rows
    assert t.units["Time"] == "s" and t.columns[1] == "200.000 nm"
    for j in (0, 1, 5999, 11999):
        s = t.choose(x="Time", y=j + 1)
        np.testing.assert_array_equal(s.x, ref.iloc[:, 0].to_numpy())
        np.testing.assert_array_equal(s.y, ref.iloc[:, j + 1].to_numpy())
        assert s.y_name == f"{wl[j]:.3f} nm"
    assert np.isnan(t.column(301)[7]) and np.isnan(t.column(302)[9])
    assert any("row 9: no value in column" in n for n in t.notes)
    assert any("row 11: 'inf' is not a finite number" in n for n in t.notes)
    s = t.choose(x="Time", y=301)  # the row with the empty cell is left out, and said so
    assert s.dropped_rows == (9,)
    assert np.isnan(t.column(4001)[3]) and any("row 5: 'n.d.' is not a number" in n for n in t.notes)
    np.testing.assert_array_equal(np.delete(t.column(4001), 3), np.delete(y[:, 4000], 3))


def test_wide_table_with_many_text_columns(tmp_path):
    # more than 64 columns holding text: the numeric ones are still read exactly
    rng = np.random.default_rng(17)
    y = np.round(rng.normal(size=(6, 300)), 5)
    cells = [[repr(float(v)) for v in r] for r in y]
    for j in range(0, 300, 3):
        cells[2][j] = "sat"
    p = tmp_path / "many_text.csv"
    p.write_text("t," + ",".join(f"c{j}" for j in range(300)) + "\n"
                 + "".join(f"{r}," + ",".join(cells[r]) + "\n" for r in range(6)))
    t = read_table(p)
    for j in (0, 1, 2, 299):
        expect = y[:, j].copy()
        if j % 3 == 0:
            expect[2] = np.nan
        np.testing.assert_array_equal(t.column(f"c{j}"), expect)
    assert sum("'sat' is not a number" in n for n in t.notes) == 100


def test_wide_reads_leave_the_garbage_collector_as_they_found_it(tmp_path):
    import gc

    wide = tmp_path / "wide.csv"
    wide.write_text("x," + ",".join(f"c{i}" for i in range(9000)) + "\n"
                    + "".join(f"{r}," + ",".join("1.5" for _ in range(9000)) + "\n" for r in range(3)))
    bad = tmp_path / "bad.csv"
    bad.write_text(",".join(["text"] * 20000) + "\n")  # long lines, no numbers: an error
    assert gc.isenabled()
    assert read_table(wide).n_rows == 3 and gc.isenabled()
    with pytest.raises(ReadError):
        read_table(bad)
    assert gc.isenabled()
    gc.disable()
    try:  # switched off by the program: stays off
        read_table(wide)
        assert not gc.isenabled()
    finally:
        gc.enable()


def test_wide_row_statistics_agree_with_the_cell_by_cell_count():
    # the one-pass count over a wide row must give what _cell_kind gives cell by cell
    rng = np.random.default_rng(7)
    pool = ["1", "-2.5", "+.5", "3e-4", " 7 ", "", "  ", "n.d.", "1,5", "1 234", "nm", "1.2.3", "5\t", "\u2212" + "1"]
    for _ in range(200):
        cells = list(rng.choice(pool, size=int(rng.integers(65, 130))))
        if rng.random() < 0.5:
            cells = ["%.6f" % v for v in rng.normal(size=len(cells))]
            cells[int(rng.integers(len(cells)))] = str(rng.choice(pool))
        kinds = [fio._cell_kind(c) for c in cells]
        width = len(kinds)
        while width and kinds[width - 1] == 0:
            width -= 1
        assert fio._row_stats(cells) == (width, kinds.count(1), kinds.count(2)), cells


def test_quoted_field_longer_than_the_csv_limit(tmp_path):
    p = tmp_path / "notes.csv"
    p.write_text('note;x;y\n"' + "n" * 200_000 + '";1;2\n"b";2;4\n"c";3;6\n')
    t = read_table(p)
    np.testing.assert_array_equal(t.column("y"), [2, 4, 6])


def test_unterminated_last_line(tmp_path):
    cut = tmp_path / "cut.csv"
    cut.write_bytes(b"t,v\n1,2\n3,4\n5,")  # the instrument was still writing row 4
    t = read_table(cut)
    np.testing.assert_array_equal(t.column("v"), [2, 4])
    assert any("row 4: the last line has no line end and is incomplete" in n for n in t.notes)
    whole = tmp_path / "whole.csv"
    whole.write_bytes(b"t,v\n1,2\n3,4\n5,12.6")  # complete, but possibly cut: kept and noted
    t = read_table(whole)
    np.testing.assert_array_equal(t.column("v"), [2, 4, 12.6])
    assert any("row 4: the last line has no line end" in n and "cut short" in n for n in t.notes)
    ended = tmp_path / "ended.csv"
    ended.write_bytes(b"t,v\n1,2\n3,4\n")
    assert not any("line end" in n for n in read_table(ended).notes)


def test_xlsx_streaming_reader_agrees_with_openpyxl(tmp_path):
    import openpyxl

    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Run"
    ws.append(["Calibration run"])
    ws.append([])
    ws.append(["Time (s)", "Signal (mV)", "Flag", "When"])
    rng = np.random.default_rng(3)
    vals = rng.normal(size=(20, 2))
    for i, (a, _b) in enumerate(vals):
        ws.append([float(i), float(a), bool(i % 2), dt.datetime(2024, 1, 1 + i)])
    ws.cell(row=30, column=2, value="n.d.")
    ws.cell(row=30, column=1, value=99.0)
    p = tmp_path / "run.xlsx"
    wb.save(p)
    t = read_table(p)
    ref = openpyxl.load_workbook(p, data_only=True)["Run"]
    np.testing.assert_array_equal(t.column("Signal")[:20], [ref.cell(row=r, column=2).value for r in range(4, 24)])
    assert t.source_rows[0] == 4 and t.source_rows[-1] == 30
    assert any("'n.d.' is not a number in column Signal" in n for n in t.notes)
    # date cells stay text (as openpyxl shows them), not day numbers
    assert np.isnan(t.column("When")).all()


def test_ods_streaming_reader_agrees_with_pandas_odf(tmp_path):
    from odf.opendocument import OpenDocumentSpreadsheet
    from odf.table import Table as OTable, TableCell, TableRow
    from odf.text import P

    doc = OpenDocumentSpreadsheet()
    t = OTable(name="Plate")
    rows = [["Dose (nM)", "Resp (%)"]] + [[float(i), float(i * i) / 7] for i in range(12)]
    for row in rows:
        tr = TableRow()
        for v in row:
            if isinstance(v, float):
                c = TableCell(valuetype="float", value=repr(v))
                c.addElement(P(text=repr(v)))
            else:
                c = TableCell(valuetype="string")
                c.addElement(P(text=v))
            tr.addElement(c)
        t.addElement(tr)
    tr = TableRow(numberrowsrepeated=3)  # three identical filled rows
    for v in (20.0, 1.5):
        c = TableCell(valuetype="float", value=repr(v))
        c.addElement(P(text=repr(v)))
        tr.addElement(c)
    t.addElement(tr)
    doc.spreadsheet.addElement(t)
    p = tmp_path / "plate.ods"
    doc.save(str(p))
    ours = read_table(p)
    ref = pd.read_excel(p, engine="odf")
    np.testing.assert_array_equal(ours.column("Dose"), ref["Dose (nM)"].to_numpy(dtype=float))
    np.testing.assert_array_equal(ours.column("Resp"), ref["Resp (%)"].to_numpy(dtype=float))
    assert ours.n_rows == 15


def test_far_cell_and_repeats_state_the_cap(tmp_path):
    import openpyxl

    wb = openpyxl.Workbook()
    ws = wb.active
    for i in range(5):
        ws.append([i, 2 * i])
    ws["XFD1048576"] = 1
    p = tmp_path / "far.xlsx"
    wb.save(p)
    with pytest.raises(ReadError, match=r"spans 1,048,576 rows and 16,384 columns, more than the 4,000,000 cells"):
        read_table(p)


def test_compression_bomb_is_refused_before_unpacking(tmp_path):
    p = tmp_path / "bomb.xlsx"
    main = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
    rel = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
    with zipfile.ZipFile(p, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("xl/workbook.xml", f'<workbook xmlns="{main}" xmlns:r="{rel}"><sheets>'
                                       '<sheet name="S" sheetId="1" r:id="rId1"/></sheets></workbook>')
        zf.writestr("xl/_rels/workbook.xml.rels",
                    '<Relationships xmlns="http://schemas.openxmlformats.org/package/2006/relationships">'
                    '<Relationship Id="rId1" Target="worksheets/sheet1.xml"/></Relationships>')
        zf.writestr("xl/worksheets/sheet1.xml", f'<worksheet xmlns="{main}"><sheetData>'.encode()
                    + b" " * (20 << 20) + b"</sheetData></worksheet>")
    with pytest.raises(ReadError, match=r"times larger than it is stored \(more than 200 times is refused"):
        read_table(p)
