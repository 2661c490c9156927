"""Hostile-input corpus: generated here, run through the readers one case per process.

``python tests/hostile/runner.py FOLDER [CASE or KIND ...]`` writes the corpus into FOLDER, then runs each
case in a forked child of a process that has already imported fitcore (so the child's
figures are those of the case, on top of the imported libraries) and prints one JSON
line per case::

    {"case": "far_cell.xlsx", "expect": "error", "outcome": "project_error",
     "error": "ReadError", "message": "...", "seconds": 0.04, "peak_mb": 160.2}

``outcome`` is ``"ok"`` (a table, session or formula came back), ``"project_error"``
(ReadError, SessionError or FormulaError), ``"raw"`` (any other exception: a bug),
``"killed"`` (the child hit the hang guard of ``HANG_GUARD_S`` seconds or died).
``peak_mb`` is the child's peak resident set (``ru_maxrss`` from ``os.wait4``), which
includes the pages it shares with the parent (about the size of the imported
libraries), so it is an upper bound on what the case itself needed.

tests/hostile/test_hostile_corpus.py checks outcomes and memory; bench/bench_hostile.py
prints the times (tests never assert timings). Every generated file is small (the
bombs are a few kilobytes to a few hundred kilobytes on disk) and the whole corpus is
made in about a second.
"""
from __future__ import annotations

import json
import os
import signal
import sys
import time
import zipfile
from pathlib import Path

HANG_GUARD_S = 60

_CT = ('<?xml version="1.0" encoding="UTF-8"?><Types xmlns="http://schemas.openxmlformats.org/package/2006/'
       'content-types"><Default Extension="xml" ContentType="application/xml"/></Types>')
_WB = ('<?xml version="1.0" encoding="UTF-8"?><workbook xmlns="http://schemas.openxmlformats.org/spreadsheetml/'
       '2006/main" xmlns:r="http://schemas.openxmlformats.org/officeDocument/2006/relationships"><sheets>'
       '<sheet name="Data" sheetId="1" r:id="rId1"/></sheets></workbook>')
_RELS = ('<?xml version="1.0" encoding="UTF-8"?><Relationships xmlns="http://schemas.openxmlformats.org/package/'
         '2006/relationships"><Relationship Id="rId1" Type="http://schemas.openxmlformats.org/officeDocument/'
         '2006/relationships/worksheet" Target="worksheets/sheet1.xml"/></Relationships>')
_SHEET_HEAD = ('<?xml version="1.0" encoding="UTF-8"?><worksheet xmlns="http://schemas.openxmlformats.org/'
               'spreadsheetml/2006/main"><sheetData>')
_SHEET_TAIL = "</sheetData></worksheet>"
_SMALL_ROWS = "".join(f'<row r="{r}"><c r="A{r}"><v>{r}</v></c><c r="B{r}"><v>{2 * r + 1}</v></c></row>'
                      for r in range(1, 9))


def _xlsx(path: Path, sheet_parts) -> None:
    """An XLSX written by hand; ``sheet_parts`` yields the sheet XML in pieces (streamed)."""
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as zf:
        zf.writestr("[Content_Types].xml", _CT)
        zf.writestr("xl/workbook.xml", _WB)
        zf.writestr("xl/_rels/workbook.xml.rels", _RELS)
        with zf.open("xl/worksheets/sheet1.xml", "w", force_zip64=True) as fh:
            for part in sheet_parts:
                fh.write(part.encode() if isinstance(part, str) else part)


_ODS_HEAD = ('<?xml version="1.0" encoding="UTF-8"?><office:document-content '
             'xmlns:office="urn:oasis:names:tc:opendocument:xmlns:office:1.0" '
             'xmlns:table="urn:oasis:names:tc:opendocument:xmlns:table:1.0" '
             'xmlns:text="urn:oasis:names:tc:opendocument:xmlns:text:1.0" office:version="1.2">'
             '<office:body><office:spreadsheet><table:table table:name="Data">')
_ODS_TAIL = "</table:table></office:spreadsheet></office:body></office:document-content>"


def _ods_cell(v) -> str:
    return (f'<table:table-cell office:value-type="float" office:value="{v}"><text:p>{v}</text:p>'
            "</table:table-cell>")


def _ods_rows(n=8) -> str:
    return "".join(f"<table:table-row>{_ods_cell(r)}{_ods_cell(2 * r + 1)}</table:table-row>" for r in range(1, n + 1))


def _ods(path: Path, content_parts) -> None:
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as zf:
        zf.writestr(zipfile.ZipInfo("mimetype"), "application/vnd.oasis.opendocument.spreadsheet")
        with zf.open("content.xml", "w", force_zip64=True) as fh:
            for part in content_parts:
                fh.write(part.encode() if isinstance(part, str) else part)


def _repeat(piece: str, total_bytes: int, chunk=1 << 20):
    block = (piece * max(1, chunk // len(piece))).encode()
    done = 0
    while done < total_bytes:
        yield block
        done += len(block)


def make_corpus(folder) -> list[dict]:
    """Write the corpus into ``folder``; returns the cases (name, kind, path or text, expect)."""
    d = Path(folder)
    d.mkdir(parents=True, exist_ok=True)
    cases: list[dict] = []

    def add(name, kind, target, expect, **extra):
        cases.append({"case": name, "kind": kind, "target": str(target), "expect": expect, **extra})

    # --- spreadsheets
    _xlsx(d / "far_cell.xlsx", [_SHEET_HEAD, _SMALL_ROWS,
                                '<row r="1048576"><c r="XFD1048576"><v>1</v></c></row>', _SHEET_TAIL])
    add("far_cell.xlsx", "table", d / "far_cell.xlsx", "error", match="cells Ballast reads")
    _xlsx(d / "bomb_cells.xlsx", [_SHEET_HEAD, _SMALL_ROWS,
                                  *_repeat('<row><c><v>1</v></c><c><v>2</v></c></row>', 40 << 20),
                                  _SHEET_TAIL])
    add("bomb_cells.xlsx", "table", d / "bomb_cells.xlsx", "error", match="compression bomb")
    _xlsx(d / "bomb_space.xlsx", [_SHEET_HEAD, _SMALL_ROWS, *_repeat(" ", 40 << 20), _SHEET_TAIL])
    add("bomb_space.xlsx", "table", d / "bomb_space.xlsx", "error", match="compression bomb|unpacks to more")
    _xlsx(d / "entities.xlsx", ['<?xml version="1.0"?><!DOCTYPE lol [<!ENTITY a "aaaaaaaaaa">'
                                + "".join(f'<!ENTITY a{i} "{("&a;" if i == 0 else f"&a{i - 1};") * 10}">'
                                          for i in range(9)) + ']>',
                                _SHEET_HEAD.split("?>", 1)[1], '<row r="1"><c r="A1" t="inlineStr"><is><t>&a8;'
                                '</t></is></c></row>', _SMALL_ROWS.replace('r="1"', 'r="2"', 1), _SHEET_TAIL])
    add("entities.xlsx", "table", d / "entities.xlsx", "error", match="damaged")
    _xlsx(d / "ok_small.xlsx", [_SHEET_HEAD, _SMALL_ROWS, _SHEET_TAIL])
    add("ok_small.xlsx", "table", d / "ok_small.xlsx", "ok")

    _ods(d / "repeated_rows.ods", [_ODS_HEAD, _ods_rows(), '<table:table-row table:number-rows-repeated="1000000">',
                                   _ods_cell(1), _ods_cell(2), "</table:table-row>", _ODS_TAIL])
    add("repeated_rows.ods", "table", d / "repeated_rows.ods", "error", match="repeats filled cells")
    _ods(d / "repeated_cols.ods", [_ODS_HEAD, _ods_rows(), '<table:table-row table:number-rows-repeated="20">',
                                   _ods_cell(1).replace("<table:table-cell ", '<table:table-cell '
                                                        'table:number-columns-repeated="16384" '),
                                   "</table:table-row>", _ODS_TAIL])
    add("repeated_cols.ods", "table", d / "repeated_cols.ods", "error", match="repeats filled cells")
    _ods(d / "trailing_empty.ods", [_ODS_HEAD, _ods_rows(),
                                    '<table:table-row table:number-rows-repeated="1048568">'
                                    '<table:table-cell table:number-columns-repeated="16384"/></table:table-row>',
                                    _ODS_TAIL])
    add("trailing_empty.ods", "table", d / "trailing_empty.ods", "ok")
    _ods(d / "bomb.ods", [_ODS_HEAD, _ods_rows(), *_repeat("<table:table-row/>", 30 << 20), _ODS_TAIL])
    add("bomb.ods", "table", d / "bomb.ods", "error", match="compression bomb")

    # --- text
    cols = 12000
    with open(d / "wide.csv", "w", encoding="utf-8") as fh:
        fh.write("wavelength (nm)," + ",".join(f"I{i}" for i in range(cols)) + "\n")
        for r in range(12):
            fh.write(f"{400 + r}," + ",".join(f"{(r * 7 + i) % 997 / 10:.1f}" for i in range(cols)) + "\n")
    add("wide.csv", "table", d / "wide.csv", "ok", choose=("wavelength", "I11999"))
    field = "x" * 200_000
    (d / "long_field.csv").write_text(f'note,x,y\n"{field}",1,2\n"a",2,3\n"b",3,5\n', encoding="utf-8")
    add("long_field.csv", "table", d / "long_field.csv", "ok")
    (d / "long_line_unquoted.csv").write_text("x,y," + field + "\n1,2,3\n2,3,4\n3,5,6\n", encoding="utf-8")
    add("long_line_unquoted.csv", "table", d / "long_line_unquoted.csv", "ok")
    (d / "nul.csv").write_bytes(b"\x00" * (1 << 20))
    add("nul.csv", "table", d / "nul.csv", "error", match="binary data")
    (d / "cut.csv").write_bytes(b"x,y\n1,2\n3,4\n5,12.6\n7,")
    add("cut.csv", "table", d / "cut.csv", "ok", note="no line end")
    with open(d / "sparse_huge.csv", "wb") as fh:  # no disk blocks: a hole
        fh.truncate(300 << 20)
    add("sparse_huge.csv", "table", d / "sparse_huge.csv", "error", match="larger than")
    fifo = d / "pipe.csv"
    if hasattr(os, "mkfifo"):
        if not fifo.exists():
            os.mkfifo(fifo)
        add("pipe.csv (FIFO)", "table", fifo, "error", match="named pipe")
    if os.path.exists("/dev/zero"):
        add("/dev/zero", "table", "/dev/zero", "error", match="device")
    return cases


def extra_cases(folder) -> list[dict]:
    """Sessions and formulas (added by the modules that bound them)."""
    d = Path(folder)
    out = []
    deep = '{"format":"ballast-session","version":1,"data":' + "[" * 990 + "]" * 990 + "}"
    (d / "deep.ballast").write_text(deep, encoding="utf-8")
    out.append({"case": "deep.ballast", "kind": "session", "target": str(d / "deep.ballast"), "expect": "error",
                "match": "nested"})
    huge = ('{"format":"ballast-session","version":1,"data":{"x":[1,' + "9" * 400 + '],"y":[1,2]},'
            '"method":{"model":{"builtin":"line"},"loss":"l2"}}')
    (d / "huge_int.ballast").write_text(huge, encoding="utf-8")
    out.append({"case": "huge_int.ballast", "kind": "session", "target": str(d / "huge_int.ballast"),
                "expect": "error", "match": "digits"})
    for name, text in (("tower_const", "(((3*a)**999)**999)**999+x"),
                       ("tower_x", "(((2*x)**1000)**1000)**1000*a"),
                       ("tower_long", "a*x" + "**x" * 160),
                       ("deep_parens", "(" * 500 + "a*x" + ")" * 500),
                       ("big_literal", "a*x**" + "9" * 5000),
                       ("fact_like", "a*x+" + "*".join(["(x+1)"] * 400))):
        out.append({"case": f"formula:{name}", "kind": "formula", "target": text, "expect": "error"})
    return out


# ------------------------------------------------------------------------ running
def _run_case(case: dict) -> dict:
    kind, target = case["kind"], case["target"]
    if kind == "table":
        from fitcore.io import read_table

        t = read_table(target)
        if case.get("choose"):
            t.choose(*case["choose"])
        return {"rows": t.n_rows, "columns": len(t.columns), "notes": t.notes[:3]}
    if kind == "session":
        from fitcore.session import load_session

        s = load_session(target)
        return {"points": s.n_points}
    if kind == "formula":
        from fitcore.formula import parse_formula

        m = parse_formula(target)
        return {"params": list(getattr(m, "param_names", []))}
    raise ValueError(kind)


def _project_errors():
    from fitcore.formula import FormulaError
    from fitcore.io import ReadError
    from fitcore.session import SessionError

    return (ReadError, SessionError, FormulaError)


def run_one(case: dict) -> dict:
    """Run one case in a forked child; outcome, message, seconds and peak memory."""
    errors = _project_errors()
    r, w = os.pipe()
    t0 = time.perf_counter()
    pid = os.fork()
    if pid == 0:  # child
        os.close(r)
        signal.alarm(HANG_GUARD_S)
        try:
            info = _run_case(case)
            out = {"outcome": "ok", "info": info}
        except errors as err:
            out = {"outcome": "project_error", "error": type(err).__name__, "message": str(err)}
        except BaseException as err:  # noqa: BLE001 - reported as a bug
            out = {"outcome": "raw", "error": type(err).__name__, "message": str(err)[:300]}
        with os.fdopen(w, "w") as fh:
            fh.write(json.dumps(out, default=str))
        os._exit(0)
    os.close(w)
    with os.fdopen(r) as fh:
        data = fh.read()
    _, status, usage = os.wait4(pid, 0)
    seconds = time.perf_counter() - t0
    try:
        out = json.loads(data)
    except ValueError:
        out = {"outcome": "killed", "error": f"wait status {status}", "message": ""}
    out.update(case=case["case"], expect=case["expect"], match=case.get("match"), note=case.get("note"),
               seconds=round(seconds, 3), peak_mb=round(usage.ru_maxrss / 1024, 1))
    return out


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    folder = Path(argv[0])
    root = Path(__file__).resolve().parents[2]
    sys.path.insert(0, str(root))
    import fitcore
    import fitcore.formula
    import fitcore.io
    import fitcore.session  # noqa: F401
    import openpyxl  # noqa: F401
    import pandas  # noqa: F401

    cases = make_corpus(folder) + extra_cases(folder)
    only = set(argv[1:])
    for case in cases:
        if only and case["case"] not in only and case["kind"] not in only:
            continue
        print(json.dumps(run_one(case), default=str), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
