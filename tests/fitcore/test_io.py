"""Tests for fitcore.io: every dialect is written here, into tmp_path, then read back.

Sources named beside the checks:
* CSV quoting: RFC 4180, section 2 (fields with separators are enclosed in double quotes).
* Byte-order marks: The Unicode Standard, section 23.8 "Specials" (U+FEFF as BOM;
  UTF-8 EF BB BF, UTF-16 LE FF FE, BE FE FF) and RFC 2781 (UTF-16) -- from memory.
* "T / K" headers: quantity calculus, ISO 80000-1:2009 section 7.1 and the IUPAC
  Green Book 3rd ed. section 1.5 (column headed "quantity / unit") -- from memory.
* Digit grouping with a space: SI Brochure 9th ed. (2019) section 5.4.4 -- from memory.
* Apostrophe grouping ("1'234.5", Swiss usage), decimal comma with semicolon CSV
  (European spreadsheet locale exports), "Unicode text" = UTF-16 LE with BOM and tab
  separators (spreadsheet save-as option): common practice.
* pandas.read_csv / openpyxl / odfpy are used side by side as writers and as
  independent readers of the same files.
"""
from __future__ import annotations

import math
import os
import shutil
import stat
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitcore.io import ReadError, Selection, Table, read_clipboard_text, read_table, split_unit


# --------------------------------------------------------------------------- helpers


def write(path: Path, text: str, encoding: str = "utf-8", newline: str = "\n") -> Path:
    path.write_bytes(text.replace("\n", newline).encode(encoding))
    return path


def snapshot(path: Path):
    st_ = os.stat(path)
    return path.read_bytes(), st_.st_mtime_ns, st_.st_size


def assert_unchanged(path: Path, before) -> None:
    assert snapshot(path) == before, f"{path.name} was modified by reading it"


def write_xlsx(path: Path, sheets: dict[str, list[list]]) -> Path:
    import openpyxl

    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for name, rows in sheets.items():
        ws = wb.create_sheet(name)
        for r, row in enumerate(rows, start=1):
            for c, value in enumerate(row, start=1):
                if value is not None:
                    ws.cell(row=r, column=c, value=value)
    wb.save(path)
    return path


def write_ods(path: Path, sheets: dict[str, list[list]]) -> Path:
    from odf.opendocument import OpenDocumentSpreadsheet
    from odf.table import Table as OTable, TableCell, TableRow
    from odf.text import P

    doc = OpenDocumentSpreadsheet()
    for name, rows in sheets.items():
        t = OTable(name=name)
        for row in rows:
            tr = TableRow()
            for v in row:
                if v is None:
                    cell = TableCell()
                elif isinstance(v, (int, float)):
                    cell = TableCell(valuetype="float", value=repr(float(v)))
                    cell.addElement(P(text=repr(float(v))))
                else:
                    cell = TableCell(valuetype="string")
                    cell.addElement(P(text=str(v)))
                tr.addElement(cell)
            t.addElement(tr)
        doc.spreadsheet.addElement(t)
    doc.save(str(path))
    return path


X = [0.0, 0.5, 1.0, 2.0, 5.0, 10.0]
Y = [0.0021, 0.1013, 0.1987, 0.4052, 1.0011, 1.9874]


# --------------------------------------------------------------------------- dialects


def test_comma_csv_with_title_lines_and_units(tmp_path):
    text = "Photometric calibration\nRun 7, 2024-03-05\n\nConcentration (mg/L),Absorbance\n"
    text += "".join(f"{x!r},{y!r}\n" for x, y in zip(X, Y))
    p = write(tmp_path / "cal.csv", text)
    t = read_table(p)
    assert isinstance(t, Table)
    assert t.columns == ["Concentration", "Absorbance"]
    assert t.units == {"Concentration": "mg/L", "Absorbance": ""}
    assert t.headers["Concentration"] == "Concentration (mg/L)"
    np.testing.assert_array_equal(t.column("Concentration"), X)
    np.testing.assert_array_equal(t.column("Absorbance"), Y)
    assert t.dialect.separator == "," and t.dialect.decimal == "." and t.dialect.header_row == 4
    assert t.n_rows == 6 and list(t.source_rows) == [5, 6, 7, 8, 9, 10]
    assert t.title_lines == ["Photometric calibration", "Run 7, 2024-03-05"]
    assert any("above the header" in n for n in t.notes)
    # full header text and position work as column keys too
    np.testing.assert_array_equal(t.column("Concentration (mg/L)"), X)
    np.testing.assert_array_equal(t.column(1), Y)


def test_agrees_with_pandas_on_a_pandas_written_csv(tmp_path):
    rng = np.random.default_rng(3)
    df = pd.DataFrame({"Time (s)": rng.uniform(0, 1e3, 500), "Signal [mV]": rng.normal(0, 1e-3, 500),
                       "u(Signal) [mV]": rng.uniform(1e-5, 1e-4, 500)})
    p = tmp_path / "pd.csv"
    df.to_csv(p, index=False)
    t = read_table(p)
    back = pd.read_csv(p)  # an independent reader of the same file
    assert t.columns == ["Time", "Signal", "u(Signal)"]
    assert t.units == {"Time": "s", "Signal": "mV", "u(Signal)": "mV"}
    for name, col in zip(t.columns, back.columns):
        np.testing.assert_array_equal(t.column(name), back[col].to_numpy())
        np.testing.assert_array_equal(t.column(name), df[col].to_numpy())  # exact round trip


@pytest.mark.parametrize("newline", ["\n", "\r\n", "\r"])
def test_utf8_bom_and_line_endings(tmp_path, newline):
    text = "\ufeffx;y\n1;2\n3;4\n5;6\n"  # Unicode Standard 23.8: BOM EF BB BF
    p = write(tmp_path / "bom.csv", text, newline=newline)
    assert p.read_bytes().startswith(b"\xef\xbb\xbf")
    t = read_table(p)
    assert t.columns == ["x", "y"]  # the BOM must not stick to the first name
    np.testing.assert_array_equal(t.column("y"), [2, 4, 6])
    assert list(t.source_rows) == [2, 3, 4]


def test_semicolon_decimal_comma_cp1252_with_micro_and_degree(tmp_path):
    text = ("Tracer-Zerfall, Messplatz 2\n"
            "Time (min);Counts (cpm);u(Counts);T (°C)\n"
            "0;1 250,5;35,4;21,5\n"
            "2,5;1.104,25;33,2;21,6\n"
            "5;980,75;31,3;21,4\n"
            "7,5;871;29,5;21,5\n"
            "Rate (µmol/min);;;\n")
    p = write(tmp_path / "decay.csv", text, encoding="cp1252")
    before = snapshot(p)
    t = read_table(p)
    assert t.columns == ["Time", "Counts", "u(Counts)", "T"]
    assert t.units["T"] == "°C" and t.units["Counts"] == "cpm" and t.units["u(Counts)"] == ""
    np.testing.assert_array_equal(t.column("Time"), [0, 2.5, 5, 7.5])
    np.testing.assert_array_equal(t.column("Counts"), [1250.5, 1104.25, 980.75, 871])
    np.testing.assert_array_equal(t.column("u(Counts)"), [35.4, 33.2, 31.3, 29.5])
    assert t.dialect.decimal == "," and t.dialect.separator == ";" and t.dialect.encoding == "CP1252"
    assert "decimal comma detected" in t.notes
    assert any("not UTF-8" in n for n in t.notes)
    assert any("thousands separators" in n for n in t.notes)
    # the text row at the end holds no number in the numeric columns: row 7, reported
    assert any("row 7" in n and "µmol" in n for n in t.notes)
    assert_unchanged(p, before)


def test_latin1_explicit_encoding(tmp_path):
    p = write(tmp_path / "l1.txt", "Dauer (s)\tWärme (J)\n1\t2\n3\t4\n", encoding="latin-1")
    t = read_table(p, encoding="latin-1")
    assert t.columns == ["Dauer", "Wärme"]
    with pytest.raises(ReadError, match="cannot be decoded as utf-16"):
        read_table(write(tmp_path / "odd.txt", "a\tb\n1\t2\n3", encoding="latin-1"), encoding="utf-16")


@pytest.mark.parametrize("codec,bom", [("utf-16-le", b"\xff\xfe"), ("utf-16-be", b"\xfe\xff")])
def test_utf16_tab_separated_unicode_text(tmp_path, codec, bom):
    # RFC 2781 / Unicode 23.8: FF FE = little-endian, FE FF = big-endian
    text = "T / K\tR / kOhm\n273.15\t32.65\n298.15\t10\n323.15\t3.6\n"
    p = tmp_path / f"therm_{codec}.txt"
    p.write_bytes(bom + text.replace("\n", "\r\n").encode(codec))
    t = read_table(p)
    assert t.columns == ["T", "R"] and t.units == {"T": "K", "R": "kOhm"}
    np.testing.assert_array_equal(t.column("T"), [273.15, 298.15, 323.15])
    np.testing.assert_array_equal(t.column("R"), [32.65, 10.0, 3.6])
    assert t.dialect.separator == "\t" and t.dialect.encoding.startswith("UTF-16")
    # issue 17 item 1: the decoding reaches the notes (and so the record's Data section)
    assert any("UTF-16" in n and "read as" in n for n in t.notes), t.notes


def test_title_line_notes_keep_whole_words(tmp_path):
    """The note quoting title lines never cuts a word (issue 17 item 14: "the title
    lines of a sample are cut mid-word"); a title of ordinary length is quoted whole,
    a very long one is shortened at a space with an ellipsis (common practice)."""
    short = "Photometric calibration - nitrate standards (invented demo data)"  # 64 chars
    long = " ".join(["calibration"] * 30)  # 359 chars
    text = f"{short}\n{long}\nx,y\n1,2\n3,4\n5,6\n"
    t = read_table(write(tmp_path / "titles.csv", text))
    note = next(n for n in t.notes if "above the header" in n)
    assert repr(short) in note, note
    quoted = note.split("; ")[-1]
    assert quoted.endswith(" …'") and len(quoted) < len(long), quoted
    assert all(w == "calibration" for w in quoted.strip("'").removesuffix(" …").split()), quoted


def test_utf16_without_bom_is_recognised(tmp_path):
    p = tmp_path / "nobom.txt"
    p.write_bytes("a\tb\n1.5\t2.5\n3.5\t4.5\n".encode("utf-16-le"))
    t = read_table(p)
    np.testing.assert_array_equal(t.column("b"), [2.5, 4.5])


def test_whitespace_separated_with_hash_comments(tmp_path):
    text = ("# Raman spectrum, invented\n# laser 785 nm\n"
            "Wavenumber (cm-1)   Intensity (counts)\n"
            "  400.0     1203\n  401.5     1250\n\n  403.0     1302\n")
    p = write(tmp_path / "spec.txt", text)
    t = read_table(p)
    assert t.columns == ["Wavenumber", "Intensity"]
    assert t.units == {"Wavenumber": "cm-1", "Intensity": "counts"}
    np.testing.assert_array_equal(t.column("Wavenumber"), [400.0, 401.5, 403.0])
    assert list(t.source_rows) == [4, 5, 7]
    assert "row 6: empty row skipped" in t.notes
    assert t.dialect.separator == " "


def test_whitespace_header_with_single_spaces_is_grouped(tmp_path):
    text = "Wavenumber (cm-1) Intensity (counts)\n1 2\n3 4\n"
    t = read_table(write(tmp_path / "s.txt", text))
    assert t.columns == ["Wavenumber", "Intensity"]


def test_header_as_comment_line(tmp_path):
    text = "# x y\n1 2\n3 4\n5 6\n"
    t = read_table(write(tmp_path / "c.dat", text))
    assert t.columns == ["x", "y"]
    assert any("comment line 1" in n for n in t.notes)


def test_pipe_separated(tmp_path):
    t = read_table(write(tmp_path / "p.txt", "a|b\n1|2\n3|4\n"))
    assert t.dialect.separator == "|"
    np.testing.assert_array_equal(t.column("b"), [2, 4])


def test_quoted_fields_rfc4180(tmp_path):
    # RFC 4180 section 2: a field containing the separator is enclosed in double quotes
    text = '"Dose, total (nM)","Response (%)"\n"1,000.5",12.5\n"2,500",30\n"10,000.25",88\n'
    t = read_table(write(tmp_path / "q.csv", text))
    assert t.columns == ["Dose, total", "Response"] and t.units["Response"] == "%"
    np.testing.assert_array_equal(t.column(0), [1000.5, 2500, 10000.25])


@pytest.mark.parametrize(
    "cells,decimal,expected",
    [
        (["1,234.5", "12,345.25", "7.5"], None, [1234.5, 12345.25, 7.5]),        # comma groups
        (["1.234,5", "12.345,25", "7,5"], None, [1234.5, 12345.25, 7.5]),        # point groups
        (["1 234,5", "12 345,25", "7,5"], None, [1234.5, 12345.25, 7.5]),        # SI 5.4.4 space
        (["1\u00a0234,5", "12\u202f345,25", "7,5"], None, [1234.5, 12345.25, 7.5]),  # no-break spaces
        (["1'234.5", "12'345.25", "7.5"], None, [1234.5, 12345.25, 7.5]),        # Swiss apostrophe
        (["1.234", "2.5", "3"], ",", [1234.0, math.nan, 3.0]),                   # forced decimal comma
        (["1,234", "2,5", "3"], ".", [1234.0, math.nan, 3.0]),                   # forced decimal point
    ],
)
def test_thousands_separators(tmp_path, cells, decimal, expected):
    text = "x\ty\n" + "".join(f"{i}\t{c}\n" for i, c in enumerate(cells))
    t = read_table(write(tmp_path / "th.tsv", text), decimal=decimal)
    np.testing.assert_array_equal(t.column("y"), expected)
    if decimal is not None:
        assert t.dialect.decimal == decimal
        assert any("row 3" in n and "'2" in n for n in t.notes)  # the cell that does not fit


def test_ambiguous_grouping_is_announced(tmp_path):
    text = "x;y\n1;1,250\n2;2,500\n3;3,750\n"
    t = read_table(write(tmp_path / "amb.csv", text))
    assert t.dialect.decimal == ","
    np.testing.assert_array_equal(t.column("y"), [1.25, 2.5, 3.75])
    assert any("decimal comma assumed" in n for n in t.notes)
    t2 = read_table(tmp_path / "amb.csv", decimal=".")
    np.testing.assert_array_equal(t2.column("y"), [1250, 2500, 3750])


def test_decimal_comma_zero_integer_part_is_not_ambiguous(tmp_path):
    t = read_table(write(tmp_path / "z.csv", "x;y\n0,125;1\n0,250;2\n"))
    np.testing.assert_array_equal(t.column("x"), [0.125, 0.25])
    assert "decimal comma detected" in t.notes


def test_units_split():
    # ISO 80000-1 / Green Book "quantity / unit"; brackets: common practice
    assert split_unit("Time (s)") == ("Time", "s")
    assert split_unit("Signal [mV]") == ("Signal", "mV")
    assert split_unit("T / K") == ("T", "K")
    assert split_unit("Conc. (mg/L)") == ("Conc.", "mg/L")
    assert split_unit("[S] (mM)") == ("[S]", "mM")
    assert split_unit("u(Counts)") == ("u(Counts)", "")
    assert split_unit("Rate (µM/min)") == ("Rate", "µM/min")
    assert split_unit("Absorbance") == ("Absorbance", "")
    assert split_unit("  Wavenumber   (cm-1) ") == ("Wavenumber", "cm-1")


def test_units_row_below_the_header(tmp_path):
    t = read_table(write(tmp_path / "u.csv", "Time;Signal\ns;mV\n1;2\n3;4\n"))
    assert t.columns == ["Time", "Signal"] and t.units == {"Time": "s", "Signal": "mV"}


# --------------------------------------------------------------------------- notes


def test_non_numeric_and_empty_cells_are_reported_with_file_rows(tmp_path):
    rows = ["Sample A", "Time (s),Signal (mV)"]
    for i in range(1, 13):
        y = "n.d." if i in (5, 10) else ("" if i == 7 else f"{i * 1.5}")
        rows.append(f"{i},{y}")
    p = write(tmp_path / "nd.csv", "\n".join(rows) + "\n")
    t = read_table(p)
    # data row i sits in file row i + 2
    assert "rows 7, 12: 'n.d.' is not a number in column Signal" in t.notes
    assert "row 9: no value in column Signal" in t.notes
    y = t.column("Signal")
    assert np.isnan(y[[4, 6, 9]]).all() and np.isfinite(np.delete(y, [4, 6, 9])).all()
    assert t.n_rows == 12  # nothing dropped from the table
    sel = t.choose()
    assert isinstance(sel, Selection)
    assert sel.dropped_rows == (7, 9, 12)
    assert len(sel) == 9 and list(sel.source_rows[:4]) == [3, 4, 5, 6]
    assert any("rows 7, 9, 12: left out" in n for n in sel.notes)


def test_rows_with_extra_cells_are_reported(tmp_path):
    t = read_table(write(tmp_path / "extra.csv", "x,y\n1,2\n3,4,99\n5,6\n"))
    assert list(t.source_rows) == [2, 4]
    assert any(n.startswith("row 3: more cells") for n in t.notes)


def test_infinite_values_are_reported(tmp_path):
    t = read_table(write(tmp_path / "inf.csv", "x,y\n1,2\n2,inf\n3,4\n"))
    assert np.isnan(t.column("y")[1])
    assert any("row 3" in n and "inf" in n for n in t.notes)


def test_duplicate_and_missing_header_names(tmp_path):
    t = read_table(write(tmp_path / "dup.csv", "Signal,Signal,,Signal_2\n1,2,3,4\n5,6,7,8\n"))
    assert t.columns == ["Signal", "Signal_2", "column_3", "Signal_2_2"]
    assert any("column 3 has no header" in n for n in t.notes)
    assert any("appears more than once" in n for n in t.notes)


def test_no_header_row(tmp_path):
    t = read_table(write(tmp_path / "bare.txt", "1.0 2.0 3.0\n4.0 5.0 6.0\n7.0 8.0 9.0\n"))
    assert t.columns == ["column_1", "column_2", "column_3"]
    assert t.dialect.header_row is None
    assert any("no header row" in n for n in t.notes)


def test_trailing_separator_column_is_dropped(tmp_path):
    t = read_table(write(tmp_path / "trail.csv", "x;y;\n1;2;\n3;4;\n"))
    assert t.columns == ["x", "y"]


# --------------------------------------------------------------------------- spreadsheets


def test_xlsx_sheets_by_name_and_index(tmp_path):
    p = write_xlsx(tmp_path / "assay.xlsx", {
        "Assay": [["Enzyme assay (invented)"], [], ["[S] (mM)", "Rate (µM/min)"],
                  *[[s, r] for s, r in zip(X, Y)], [20.0, "pipette slip"], [None, 3.0]],
        "Notes": [["Operator", "A. N. Other"], ["Date", "2024-03-05"]],
        "Second": [["a", "b"], [1, 2], [3, "4,5"]],
    })
    before = snapshot(p)
    t = read_table(p)
    assert t.dialect.kind == "xlsx" and t.dialect.sheet == "Assay" and t.sheet_names == ["Assay", "Notes", "Second"]
    assert t.columns == ["[S]", "Rate"] and t.units == {"[S]": "mM", "Rate": "µM/min"}
    np.testing.assert_array_equal(t.column("[S]")[:6], X)
    np.testing.assert_array_equal(t.column("Rate")[:6], Y)
    assert "row 10: 'pipette slip' is not a number in column Rate" in t.notes
    assert "row 11: no value in column [S]" in t.notes
    assert list(t.source_rows) == list(range(4, 12))
    t2 = read_table(p, sheet="Second")
    np.testing.assert_array_equal(t2.column("b"), [2, 4.5])  # text cell "4,5" read with decimal comma
    t3 = read_table(p, sheet=2)
    assert t3.dialect.sheet == "Second"
    with pytest.raises(ReadError, match=r"'assay.xlsx' has no sheet named 'Data'; its sheets are 'Assay', 'Notes'"):
        read_table(p, sheet="Data")
    with pytest.raises(ReadError, match="no sheet number 5"):
        read_table(p, sheet=5)
    assert_unchanged(p, before)


def test_xlsx_first_sheet_without_numbers_falls_through(tmp_path):
    p = write_xlsx(tmp_path / "notes_first.xlsx", {
        "Notes": [["Read me"], ["numbers are on the next sheet"]],
        "Data": [["x", "y"], [1, 2], [2, 4], [3, 6]],
    })
    t = read_table(p)
    assert t.dialect.sheet == "Data"
    assert any("sheet 'Notes' holds no table" in n for n in t.notes)


def test_xlsx_agrees_with_pandas(tmp_path):
    rng = np.random.default_rng(11)
    df = pd.DataFrame({"Dose (nM)": rng.uniform(0, 100, 50), "Response (%)": rng.uniform(0, 100, 50)})
    p = tmp_path / "pd.xlsx"
    df.to_excel(p, index=False, sheet_name="Plate")
    t = read_table(p)
    np.testing.assert_array_equal(t.column("Dose"), pd.read_excel(p)["Dose (nM)"].to_numpy())


def test_ods(tmp_path):
    p = write_ods(tmp_path / "plate.ods", {
        "Plate": [[], ["Dose-response, row C"], ["Dose (nM)", "Response (%)"],
                  *[[x, y] for x, y in zip(X, Y)], [50.0, "failed"]],
        "Notes": [["text only"]],
    })
    before = snapshot(p)
    t = read_table(p)
    assert t.dialect.kind == "ods" and t.sheet_names == ["Plate", "Notes"]
    assert t.columns == ["Dose", "Response"] and t.units["Response"] == "%"
    np.testing.assert_array_equal(t.column("Dose")[:6], X)
    np.testing.assert_array_equal(t.column("Response")[:6], Y)
    assert list(t.source_rows) == list(range(4, 11))
    assert "row 10: 'failed' is not a number in column Response" in t.notes
    with pytest.raises(ReadError, match="no sheet named 'Nope'"):
        read_table(p, sheet="Nope")
    assert_unchanged(p, before)


# --------------------------------------------------------------------------- choose


def test_choose_columns_sigma_and_errors(tmp_path):
    text = "Time (min);Counts (cpm);u(Counts);Note\n0;100;5;a\n1;90;0;b\n2;80;4;c\n3;x;4;d\n"
    t = read_table(write(tmp_path / "ch.csv", text))
    assert t.numeric_columns() == ["Time", "Counts", "u(Counts)"]
    s = t.choose(sigma="u(Counts)")
    assert s.names == ("Time", "Counts", "u(Counts)")
    assert s.x_unit == "min" and s.y_unit == "cpm"
    np.testing.assert_array_equal(s.x, [0, 2]) and np.testing.assert_array_equal(s.sigma, [5, 4])
    assert s.dropped_rows == (3, 5)
    assert any("row 3: left out because u(Counts) is not a positive number" in n for n in s.notes)
    s2 = t.choose(x="Counts", y="Time")
    np.testing.assert_array_equal(s2.y, [0, 1, 2])
    with pytest.raises(ReadError, match="no column 'Dose'.*columns are 'Time'"):
        t.choose(x="Dose")
    with pytest.raises(ReadError, match="both x and y"):
        t.choose(x="Time", y="Time")
    with pytest.raises(KeyError):
        t.column("missing")


def test_choose_needs_two_numeric_columns(tmp_path):
    t = read_table(write(tmp_path / "one.csv", "x,label\n1,a\n2,b\n3,c\n"))
    with pytest.raises(ReadError, match="only one column with numbers"):
        t.choose()


# --------------------------------------------------------------------------- clipboard


def test_clipboard_text_tab_and_semicolon():
    t = read_clipboard_text("Time (s)\tSignal (mV)\r\n0\t1,5\r\n1\t2,25\r\n")
    assert t.source == "clipboard" and t.dialect.kind == "clipboard"
    np.testing.assert_array_equal(t.column("Signal"), [1.5, 2.25])
    t2 = read_clipboard_text("1;2\n3;4\n")
    assert t2.columns == ["column_1", "column_2"]
    with pytest.raises(ReadError, match="pasted text is empty"):
        read_clipboard_text("  \n")
    with pytest.raises(ReadError, match="one column"):
        read_clipboard_text("1\n2\n3\n")


# --------------------------------------------------------------------------- bad input


def test_bad_input_messages(tmp_path):
    cases = {
        "empty.csv": (b"", r"^'empty.csv' is empty \(0 bytes\)\.$"),
        "blank.csv": (b"\n  \n\n", r"^'blank.csv' contains no text"),
        "junk.csv": (bytes(np.random.default_rng(0).integers(0, 256, 3000, dtype=np.uint8)),
                     r"^'junk.csv' does not look like a text table or a spreadsheet \(it contains binary data\)\.$"),
        "header.csv": (b"Time (s),Signal (mV)\n", r"^'header.csv' has a header but no data rows with numbers\.$"),
        "header2.csv": (b"Title\nTime (s),Signal (mV)\n\n", r"^'header2.csv' has a header but no data rows"),
        "onecol.csv": (b"Signal\n1\n2\n3\n", r"^'onecol.csv' has only one column of numbers; at least two"),
        "broken.xlsx": (b"PK\x03\x04" + b"\x00" * 200, r"^'broken.xlsx' looks like an XLSX spreadsheet but is damaged"),
        "broken.ods": (b"PK\x03\x04" + b"\x14" * 200, r"^'broken.ods' looks like an ODS spreadsheet but is damaged"),
        "fake.xlsx": (b"x,y\n1,2\n", r"^'fake.xlsx' has the extension .xlsx but is not a valid spreadsheet"),
        "old.xls": (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 100, r"old binary Excel \(.xls\) format"),
    }
    for name, (content, pattern) in cases.items():
        p = tmp_path / name
        p.write_bytes(content)
        before = snapshot(p)
        with pytest.raises(ReadError, match=pattern) as info:
            read_table(p)
        msg = str(info.value)
        assert msg.count(". ") == 0 and msg.endswith("."), msg  # one sentence
        assert info.value.__cause__ is None and info.value.__suppress_context__ or info.value.__context__ is None
        assert_unchanged(p, before)


def test_truncated_real_xlsx_is_reported(tmp_path):
    good = write_xlsx(tmp_path / "good.xlsx", {"S": [["x", "y"], [1, 2], [3, 4]]})
    bad = tmp_path / "cut.xlsx"
    bad.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    with pytest.raises(ReadError, match="'cut.xlsx' looks like an XLSX spreadsheet but is damaged"):
        read_table(bad)
    zipped = tmp_path / "other.xlsx"
    import zipfile

    with zipfile.ZipFile(zipped, "w") as zf:
        zf.writestr("readme.txt", "hello")
    with pytest.raises(ReadError, match="ZIP archive but not an XLSX or ODS"):
        read_table(zipped)


def test_missing_file_folder_and_permission(tmp_path, monkeypatch):
    gone = tmp_path / "gone.csv"
    write(gone, "x,y\n1,2\n")
    gone.unlink()
    with pytest.raises(ReadError, match=r"^'gone.csv' does not exist"):
        read_table(gone)
    with pytest.raises(ReadError, match=r"is a folder, not a file\.$"):
        read_table(tmp_path)
    p = write(tmp_path / "locked.csv", "x,y\n1,2\n3,4\n")

    def deny(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr("fitcore.io.os.open", deny)  # the reader opens with os.open (no blocking)
    with pytest.raises(ReadError, match=r"^'locked.csv' cannot be opened: permission denied\.$"):
        read_table(p)
    monkeypatch.undo()


@pytest.mark.skipif(not hasattr(os, "geteuid"), reason="POSIX file permissions")
def test_unreadable_file_real_permissions(tmp_path):
    # root reads any file, so as root the read runs in a forked child that has dropped to
    # the unprivileged 'nobody' ids (65534, common practice on Linux)
    folder = Path(tempfile.mkdtemp(prefix="ballast-perm-"))
    folder.chmod(0o755)
    p = write(folder / "locked.csv", "x,y\n1,2\n3,4\n")
    p.chmod(0)
    try:
        if os.geteuid() != 0:
            with pytest.raises(ReadError, match="permission denied"):
                read_table(p)
            return
        pid = os.fork()
        if pid == 0:  # child: never return into pytest
            code = 3
            try:
                os.setgid(65534)
                os.setuid(65534)
                try:
                    read_table(p)
                    code = 1  # read although unreadable
                except ReadError as err:
                    code = 0 if "permission denied" in str(err) else 2
            finally:
                os._exit(code)
        _, status = os.waitpid(pid, 0)
        assert os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0, status
    finally:
        p.chmod(stat.S_IRUSR | stat.S_IWUSR)
        shutil.rmtree(folder, ignore_errors=True)


def test_bad_arguments(tmp_path):
    p = write(tmp_path / "a.csv", "x,y\n1,2\n3,4\n")
    with pytest.raises(ReadError, match="decimal must be"):
        read_table(p, decimal=";")
    with pytest.raises(ReadError, match="not a known text encoding"):
        read_table(p, encoding="no-such-codec")


def test_text_files_are_never_written(tmp_path):
    p = write(tmp_path / "keep.csv", "T\nx;y\n1,5;2\n\n3;n.d.\n", encoding="cp1252", newline="\r\n")
    before = snapshot(p)
    read_table(p)
    read_table(p, decimal=".")
    assert_unchanged(p, before)
    import hashlib

    assert read_table(p).sha256 == hashlib.sha256(before[0]).hexdigest()


# --------------------------------------------------------------------------- properties

finite = st.floats(allow_nan=False, allow_infinity=False, width=64)


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(finite, finite), min_size=2, max_size=30))
def test_round_trip_comma_csv(tmp_path, pairs):
    p = tmp_path / "rt.csv"
    write(p, "a (s),b (V)\n" + "".join(f"{x!r},{y!r}\n" for x, y in pairs))
    t = read_table(p)
    np.testing.assert_array_equal(t.column("a"), [x for x, _ in pairs])
    np.testing.assert_array_equal(t.column("b"), [y for _, y in pairs])


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(finite, finite), min_size=2, max_size=30),
       st.sampled_from([("utf-16", "\t", "."), ("cp1252", ";", ","), ("utf-8", " ", ".")]))
def test_round_trip_other_dialects(tmp_path, pairs, dialect):
    encoding, sep, dec = dialect
    p = tmp_path / "rt.txt"

    def fmt(v):
        return repr(v).replace(".", dec) if dec == "," else repr(v)

    # decimal comma cells: repr with ',' for the point; the mark must be detectable
    body = "".join(f"{fmt(x)}{sep}{fmt(y)}\n" for x, y in pairs)
    write(p, f"Title line\nx{sep}y\n{body}", encoding=encoding)
    t = read_table(p, decimal=dec if dec == "," else None)
    np.testing.assert_array_equal(t.column("x"), [x for x, _ in pairs])
    np.testing.assert_array_equal(t.column("y"), [y for _, y in pairs])
    assert list(t.source_rows) == list(range(3, 3 + len(pairs)))


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.one_of(finite, st.none()), min_size=3, max_size=40).filter(lambda v: any(e is None for e in v)),
       st.sampled_from([",", "."]))
def test_round_trip_with_text_cells(tmp_path, values, dec):
    # a column holding some 'n.d.' cells takes the cell-by-cell path; numbers must still be exact
    sep = ";" if dec == "," else ","
    p = tmp_path / "nd.csv"
    cells = ["n.d." if v is None else (repr(v).replace(".", ",") if dec == "," else repr(v)) for v in values]
    write(p, f"i{sep}v\n" + "".join(f"{i}{sep}{c}\n" for i, c in enumerate(cells)))
    t = read_table(p, decimal=dec)
    got = t.column("v")
    expected = np.array([np.nan if v is None else v for v in values])
    np.testing.assert_array_equal(got, expected)
    bad_rows = [i + 2 for i, v in enumerate(values) if v is None]
    note = next(n for n in t.notes if "'n.d.' is not a number in column v" in n)
    assert note.startswith(_rows_note(bad_rows))


def _rows_note(rows):
    if len(rows) == 1:
        return f"row {rows[0]}"
    return "rows " + ", ".join(str(r) for r in rows[:12])


# --------------------------------------------------------------------------- sample sets

SAMPLES = Path(__file__).resolve().parents[2] / "sample_sets"
EXPECTED_SAMPLES = {
    # file: (kind, separator, decimal, encoding prefix, columns, units of x and y)
    "01_photometric_calibration.csv": ("text", ",", ".", "UTF-8", ["Concentration", "Absorbance"], ("mg/L", "")),
    "02_tracer_decay.csv": ("text", ";", ",", "CP1252", ["Time", "Counts", "u(Counts)", "T"], ("min", "cpm")),
    "03_enzyme_assay.xlsx": ("xlsx", None, ".", None, ["[S]", "Rate"], ("mM", "µM/min")),
    "04_thermistor.txt": ("text", "\t", ".", "UTF-16", ["T", "R"], ("K", "kOhm")),
    "05_dose_response.ods": ("ods", None, ".", None, ["Dose", "Response"], ("nM", "%")),
    "06_raman_peak.txt": ("text", " ", ".", "UTF-8", ["Wavenumber", "Intensity"], ("cm-1", "counts")),
    "07_two_trends.csv": ("text", ",", ".", "UTF-8 with BOM", ["Load", "Extension"], ("N", "mm")),
}


@pytest.mark.parametrize("name", sorted(EXPECTED_SAMPLES))
def test_sample_sets_read_cleanly(name):
    kind, sep, dec, enc, columns, (xu, yu) = EXPECTED_SAMPLES[name]
    t = read_table(SAMPLES / name)
    assert t.dialect.kind == kind and t.dialect.separator == sep and t.dialect.decimal == dec
    if enc:
        assert t.dialect.encoding.startswith(enc)
    assert t.columns == columns
    sel = t.choose()
    assert (sel.x_unit, sel.y_unit) == (xu, yu)
    assert 5 <= t.n_rows <= 200 and sel.dropped_rows == ()
    assert np.isfinite(sel.x).all() and np.isfinite(sel.y).all()


def test_sample_formats_all_differ_and_readme_lists_them():
    dialects = {(k, s, d, e) for k, s, d, e, *_ in EXPECTED_SAMPLES.values()}
    assert len(dialects) == len(EXPECTED_SAMPLES)
    readme = (SAMPLES / "README.md").read_text(encoding="utf-8")
    assert "invented" in readme.lower()
    for name in EXPECTED_SAMPLES:
        assert f"`{name}`" in readme


def test_sample_generator_reproduces_the_committed_files(tmp_path):
    # in a fresh interpreter: odfpy numbers its automatic names per process
    import subprocess
    import sys

    script = (
        "import importlib.util, pathlib, sys\n"
        "spec = importlib.util.spec_from_file_location('make_samples', sys.argv[1])\n"
        "mod = importlib.util.module_from_spec(spec); spec.loader.exec_module(mod)\n"
        "mod.HERE = pathlib.Path(sys.argv[2]); mod.main()\n"
    )
    subprocess.run([sys.executable, "-c", script, str(SAMPLES / "make_samples.py"), str(tmp_path)],
                   check=True, capture_output=True, timeout=120)
    for name in EXPECTED_SAMPLES:
        assert (tmp_path / name).read_bytes() == (SAMPLES / name).read_bytes(), name


@settings(max_examples=60, deadline=None)
@given(st.text(alphabet=st.sampled_from(list("0123456789.,;\t |-+eE#\"'() abcXYZµ°\n\r")), max_size=200))
def test_arbitrary_text_reads_or_raises_read_error(text):
    # common practice (robustness): odd input gives a Table or a ReadError, never another exception
    try:
        t = read_clipboard_text(text)
    except ReadError as exc:
        assert str(exc).endswith(".")
        return
    assert len(t.columns) >= 2 and len(set(t.columns)) == len(t.columns)
    assert all(t.column(c).shape == (t.n_rows,) for c in t.columns)
    assert t.source_rows.shape == (t.n_rows,) and np.all(np.diff(t.source_rows) > 0)
