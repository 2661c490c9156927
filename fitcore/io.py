"""Readers for spreadsheet exports: delimited text, XLSX and ODS.

:func:`read_table` turns one file into a :class:`Table` of float columns:

* text in UTF-8 (with or without a byte-order mark), UTF-16 ("Unicode text",
  little- or big-endian) or Latin-1/CP1252, separated by commas, semicolons, tabs,
  vertical bars or runs of spaces;
* decimal point or decimal comma (detected from the numbers, or given), thousands
  separators ("1,234.5", "1.234,5", "1 234,5", "1'234.5");
* title or comment lines above the header row, and units in the headers
  ("Time (s)", "Signal [mV]", "T / K");
* XLSX workbooks (openpyxl) and ODS spreadsheets (odfpy, through pandas).

Nothing is dropped silently: an empty or non-numeric cell becomes NaN and the
table's ``notes`` name it with its row number as shown in the file (1-based).
A file that cannot be read raises :class:`ReadError` with one sentence naming the
file and the problem. The input file is only ever opened for reading.

:meth:`Table.choose` picks the x, y and (optional) sigma columns and returns a
:class:`Selection`; :func:`read_clipboard_text` parses text pasted from a
spreadsheet with the same code.
"""
from __future__ import annotations

import csv
import hashlib
import io as _io
import math
import os
import re
import stat
import warnings
import zipfile
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

__all__ = [
    "ReadError",
    "UnknownColumnError",
    "Dialect",
    "Table",
    "Selection",
    "Measurements",
    "read_table",
    "read_clipboard_text",
    "split_unit",
]

#: Lines looked at to find the separator, decimal mark and header row.
SNIFF_LINES = 400
#: ... but no more than this many characters of them (wide files), unless fewer than
#: SNIFF_MIN_LINES lines would be left.
SNIFF_CHARS = 1_000_000
SNIFF_MIN_LINES = 12
#: At most this many row numbers are spelled out in one note.
MAX_ROWS_IN_NOTE = 12
#: Largest file read (bytes on disk); larger files are refused with a message.
MAX_FILE_BYTES = 256 * 1024 * 1024
#: Largest amount of spreadsheet XML unpacked from one XLSX/ODS file (bytes).
MAX_UNCOMPRESSED_BYTES = 256 * 1024 * 1024
#: Largest grid of one sheet or text table: rows x columns, empty cells included.
MAX_SHEET_CELLS = 4_000_000
#: A ZIP part larger than MAX_RATIO_FREE_BYTES that unpacks more than this many times its
#: stored size is refused (spreadsheet XML compresses about 5-20 times).
MAX_COMPRESSION_RATIO = 200
MAX_RATIO_FREE_BYTES = 8 * 1024 * 1024
#: Cells an ODS file may create by repeating a filled cell or row (table:number-*-repeated).
MAX_REPEATED_CELLS = 200_000
#: Largest text table read: data rows x columns.
MAX_TEXT_CELLS = 10_000_000

_COMMENT_MARKS = ("#", "%", "//")
_TEXT_SEPARATORS = ("\t", ";", ",", "|", " ")  # " " = runs of white space
_SEPARATOR_NAMES = {
    "\t": "tab",
    ";": "semicolon",
    ",": "comma",
    "|": "vertical bar",
    " ": "white space",
}


class ReadError(ValueError):
    """A file or text that cannot be read as a table (the message says why)."""


class UnknownColumnError(ReadError, KeyError):
    """A column name or position that the table does not have."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


# --------------------------------------------------------------------------- numbers

_GROUP_SEPS = {".": ",'\u2019\u00a0\u202f ", ",": ".'\u2019\u00a0\u202f "}


def _number_regex(decimal: str) -> re.Pattern:
    seps = re.escape(_GROUP_SEPS[decimal])
    dec = re.escape(decimal)
    return re.compile(
        r"^[+-]?"
        r"(?:"
        rf"(?:\d{{1,3}}(?P<sep>[{seps}])\d{{3}}(?:(?P=sep)\d{{3}})*|\d+)(?:{dec}\d*)?"
        rf"|{dec}\d+"
        r")"
        r"(?:[eE][+-]?\d+)?$"
    )


_NUMBER_RE = {".": _number_regex("."), ",": _number_regex(",")}
_STRIP_GROUPS = {d: str.maketrans("", "", _GROUP_SEPS[d]) for d in ".,"}
_MINUS_SIGNS = str.maketrans({"\u2212": "-", "\u2013": "-"})


def _parse_number(text: str, decimal: str) -> tuple[float | None, bool]:
    """Parse one cell. Returns ``(value or None, used_thousands_separator)``."""
    s = text.strip().translate(_MINUS_SIGNS)
    m = _NUMBER_RE[decimal].match(s)
    if m is None:
        return None, False
    grouped = m.group("sep") is not None
    if grouped:
        s = s.translate(_STRIP_GROUPS[decimal])
    if decimal == ",":
        s = s.replace(",", ".")
    return float(s), grouped


def _numlike(text: str) -> bool:
    s = text.strip().translate(_MINUS_SIGNS)
    return bool(s) and (_NUMBER_RE["."].match(s) is not None or _NUMBER_RE[","].match(s) is not None)


_MANTISSA_RE = re.compile(r"^[+-]?([\d.,]+)(?:[eE][+-]?\d+)?$")


def _decimal_votes(cells: Iterable[str]) -> tuple[int, int, int, int]:
    """Evidence for the decimal mark: (point, comma, ambiguous point, ambiguous comma).

    "1.5" is a point vote, "0,125" or "12,5" a comma vote; "1,234.5" votes for
    the mark that comes last; "1.234" (1-3 digits, mark, exactly three digits)
    could be a thousands group and counts as ambiguous only.
    """
    point = comma = amb_point = amb_comma = 0
    for cell in cells:
        m = _MANTISSA_RE.match(cell.strip().translate(_MINUS_SIGNS))
        if m is None:
            continue
        body = m.group(1)
        n_point, n_comma = body.count("."), body.count(",")
        if n_point and n_comma:
            if body.rfind(".") > body.rfind(","):
                point += 1
            else:
                comma += 1
        elif n_point + n_comma == 0:
            continue
        else:
            mark = "." if n_point else ","
            if n_point + n_comma > 1:  # "1.234.567": repeated mark = thousands
                if mark == ".":
                    comma += 1
                else:
                    point += 1
                continue
            head, _, tail = body.partition(mark)
            could_group = len(tail) == 3 and 1 <= len(head) <= 3 and head.lstrip("0") == head and head != ""
            if could_group:
                if mark == ".":
                    amb_point += 1
                else:
                    amb_comma += 1
            elif mark == ".":
                point += 1
            else:
                comma += 1
    return point, comma, amb_point, amb_comma


def _choose_decimal(cells: list[str], separator: str | None, notes: list[str]) -> str:
    if separator == ",":
        return "."
    point, comma, amb_point, amb_comma = _decimal_votes(cells)
    if comma > point:
        notes.append("decimal comma detected")
        if point:
            notes.append(f"{point} value(s) looked like they used a decimal point; read as decimal comma")
        return ","
    if point > comma:
        return "."
    if point == comma and point > 0:
        notes.append("the numbers mix decimal point and decimal comma; decimal point assumed")
        return "."
    if amb_comma > amb_point:
        notes.append(
            "decimal comma assumed: values like '1,234' could also be whole numbers with a "
            "thousands separator (pass decimal='.' if so)"
        )
        return ","
    if amb_point > 0:
        notes.append(
            "decimal point assumed: values like '1.234' could also be whole numbers with a "
            "thousands separator (pass decimal=',' if so)"
        )
    return "."


# --------------------------------------------------------------------------- headers

_UNIT_BRACKET_RE = re.compile(r"^(?P<name>.*\S)\s+[\(\[](?P<unit>[^\(\)\[\]]*)[\)\]]$")
_UNIT_SLASH_RE = re.compile(r"^(?P<name>.*\S)\s+/\s+(?P<unit>\S.*)$")


def split_unit(header: str) -> tuple[str, str]:
    """Split a header into name and unit.

    ``"Time (s)"``, ``"Signal [mV]"`` and ``"T / K"`` give ``("Time", "s")``,
    ``("Signal", "mV")``, ``("T", "K")``. A bracket needs a space before it, so
    ``"u(Counts)"`` is a name without unit, and ``"[S] (mM)"`` gives ``("[S]", "mM")``.
    """
    text = " ".join(str(header).split())
    for regex in (_UNIT_BRACKET_RE, _UNIT_SLASH_RE):
        m = regex.match(text)
        if m:
            return m.group("name").strip(), m.group("unit").strip()
    return text, ""


def _make_names(raw: Sequence[str | None], notes: list[str]) -> tuple[list[str], dict[str, str], dict[str, str]]:
    names: list[str] = []
    units: dict[str, str] = {}
    headers: dict[str, str] = {}
    seen: set[str] = set()
    any_header = any(r not in (None, "") for r in raw)
    for i, text in enumerate(raw, start=1):
        text = "" if text is None else str(text).strip()
        name, unit = split_unit(text) if text else ("", "")
        if not name:
            name = f"column_{i}"
            if text == "" and any_header:
                notes.append(f"column {i} has no header; named it {name}")
        if name in seen:
            base, n = name, 2
            while f"{base}_{n}" in seen:
                n += 1
            name = f"{base}_{n}"
            notes.append(f"header '{text}' appears more than once; column {i} named {name}")
        seen.add(name)
        names.append(name)
        units[name] = unit
        headers[name] = text
    return names, units, headers


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Dialect:
    """How a file was read: container, encoding, separator, decimal mark, header row."""

    kind: str  # "text", "xlsx", "ods" or "clipboard"
    encoding: str | None = None
    separator: str | None = None
    decimal: str = "."
    header_row: int | None = None
    sheet: str | None = None

    def describe(self) -> str:
        """One line for people, e.g. ``"text, UTF-8, semicolon-separated, decimal comma"``."""
        parts = [self.kind.upper() if self.kind in ("xlsx", "ods") else self.kind]
        if self.sheet is not None:
            parts.append(f"sheet '{self.sheet}'")
        if self.encoding:
            parts.append(self.encoding)
        if self.separator is not None:
            parts.append(f"{_SEPARATOR_NAMES.get(self.separator, repr(self.separator))}-separated")
        parts.append("decimal comma" if self.decimal == "," else "decimal point")
        parts.append(f"header in row {self.header_row}" if self.header_row else "no header row")
        return ", ".join(parts)

    def __str__(self) -> str:
        return self.describe()


def _resolve(table_columns: Sequence[str], headers: dict[str, str], key, role: str, source: str) -> str:
    if isinstance(key, (int, np.integer)) and not isinstance(key, bool):
        if not -len(table_columns) <= key < len(table_columns):
            raise UnknownColumnError(
                f"{source} has {len(table_columns)} columns, so there is no column number {key} for {role}."
            )
        return table_columns[key]
    if key in table_columns:
        return key
    for name, text in headers.items():  # the full header text works too: "Time (s)"
        if text == key:
            return name
    raise UnknownColumnError(
        f"{source} has no column {key!r} for {role}; its columns are " + ", ".join(repr(c) for c in table_columns) + "."
    )


def _rows_text(rows: np.ndarray) -> str:
    rows = [int(r) for r in rows]
    if len(rows) == 1:
        return f"row {rows[0]}"
    shown = ", ".join(str(r) for r in rows[:MAX_ROWS_IN_NOTE])
    more = f" and {len(rows) - MAX_ROWS_IN_NOTE} more" if len(rows) > MAX_ROWS_IN_NOTE else ""
    return f"rows {shown}{more}"


@dataclass(frozen=True)
class Selection:
    """The x, y and optional sigma columns chosen from a :class:`Table`.

    Rows where x or y (or a given sigma) is not a usable number are left out and
    listed in ``dropped_rows`` (file row numbers) and ``notes``.

    Attributes
    ----------
    x, y : ndarray
        Float arrays of the rows kept.
    sigma : ndarray or None
        Standard uncertainties of y, or None when no sigma column was chosen.
    x_name, y_name, sigma_name : str
        Column names (without units); ``sigma_name`` is None without sigma.
    x_unit, y_unit, sigma_unit : str
        Unit text ("" when the header gave none).
    source_rows : ndarray of int
        File row number of each kept point.
    dropped_rows : tuple of int
        File rows left out because x, y or sigma held no usable number.
    notes : tuple of str
        The table's notes followed by what this choice left out.
    source, sha256 : str
        Where the numbers came from and the SHA-256 of the file bytes.
    """

    x: np.ndarray
    y: np.ndarray
    sigma: np.ndarray | None
    x_name: str
    y_name: str
    sigma_name: str | None
    x_unit: str
    y_unit: str
    sigma_unit: str
    source_rows: np.ndarray
    dropped_rows: tuple[int, ...]
    notes: tuple[str, ...]
    source: str
    sha256: str

    @property
    def names(self) -> tuple[str, str, str | None]:
        return (self.x_name, self.y_name, self.sigma_name)

    @property
    def units(self) -> dict[str, str]:
        out = {self.x_name: self.x_unit, self.y_name: self.y_unit}
        if self.sigma_name is not None:
            out[self.sigma_name] = self.sigma_unit
        return out

    def __len__(self) -> int:
        return len(self.x)


#: The name used in the design notes for the same thing.
Measurements = Selection


class Table:
    """Float columns read from one file or pasted text.

    Attributes
    ----------
    columns : list of str
        Column names without units, in file order (unique).
    units : dict
        Column name -> unit text ("" when the header gave none).
    headers : dict
        Column name -> the header text as written in the file.
    notes : list of str
        Plain-language lines about what was skipped, renamed or guessed.
    source : str
        The path read (or ``"clipboard"``).
    sha256 : str
        SHA-256 hex digest of the file bytes (of the UTF-8 text for pasted text).
    n_rows : int
        Number of data rows.
    source_rows : ndarray of int
        Row number in the file (1-based, as a spreadsheet shows it) of each data row.
    dialect : Dialect
        How the file was read; ``str(dialect)`` is a readable description.
    title_lines : list of str
        Lines above the header row (titles, comments).
    sheet_names : list of str
        Sheets of a workbook (empty for text).
    """

    def __init__(self, columns, units, headers, data, notes, source, sha256, source_rows, dialect,
                 title_lines=(), sheet_names=(), texts=None):
        self.columns = list(columns)
        self.units = dict(units)
        self.headers = dict(headers)
        self._data = {name: np.asarray(data[name], dtype=float) for name in self.columns}
        for arr in self._data.values():
            arr.setflags(write=False)
        self.notes = list(notes)
        self.source = str(source)
        self.sha256 = sha256
        self.source_rows = np.asarray(source_rows, dtype=np.int64)
        self.source_rows.setflags(write=False)
        self.dialect = dialect
        self.title_lines = list(title_lines)
        self.sheet_names = list(sheet_names)
        # column name -> (int32 code per row, -1 where the cell held no text; the texts)
        self._texts = dict(texts or {})
        self._numeric = None

    @property
    def n_rows(self) -> int:
        return int(self.source_rows.size)

    def __len__(self) -> int:
        return self.n_rows

    def __repr__(self) -> str:
        cols = ", ".join(f"{c} [{self.units[c]}]" if self.units[c] else c for c in self.columns)
        return f"<Table {os.path.basename(self.source)}: {self.n_rows} rows; {cols}>"

    def _label(self) -> str:
        return f"'{os.path.basename(self.source)}'" if self.source != "clipboard" else "the pasted text"

    def column(self, name) -> np.ndarray:
        """The column ``name`` (or its position, or its full header text) as floats.

        NaN marks a cell that held no number. The array is read-only.
        """
        return self._data[_resolve(self.columns, self.headers, name, "this request", self._label())]

    def groups(self, name) -> tuple[np.ndarray, list[str]]:
        """Split the rows by the cells of column ``name``, numbers or text (a well, a batch).

        Returns ``(codes, labels)``: ``codes[i]`` is the group of data row ``i`` (an
        index into ``labels``, -1 where the cell is empty), ``labels`` the cell texts
        in order of first appearance (numbers written as ``%.15g``). A number and a
        text that read the same (``7`` and ``"7"``) are one group.
        """
        col = _resolve(self.columns, self.headers, name, "group", self._label())
        values = self._data[col]
        keys = np.full(values.size, -1, np.int64)
        index: dict[str, int] = {}

        def add(codes, texts):  # codes: index into texts per row, -1 for none
            lut = np.array([index.setdefault(t, len(index)) for t in texts], np.int64)
            has = codes >= 0
            keys[has] = lut[codes[has]]

        finite = np.isfinite(values)
        if finite.any():
            uniq, inverse = np.unique(values[finite], return_inverse=True)
            codes = np.full(values.size, -1, np.int64)
            codes[finite] = inverse
            add(codes, [format(float(v), ".15g") for v in uniq])
        if col in self._texts:
            codes, texts = self._texts[col]
            add(codes, [t.strip() for t in texts])
        labels = list(index)
        used = np.flatnonzero(keys >= 0)
        if used.size == 0:
            return keys, []
        # renumber by first appearance in the file
        present, first = np.unique(keys[used], return_index=True)
        order = present[np.argsort(first, kind="stable")]
        rank = np.full(len(labels), -1, np.int64)
        rank[order] = np.arange(order.size)
        keys[used] = rank[keys[used]]
        return keys, [labels[j] for j in order]

    def texts_by_column(self) -> dict:
        """Column name -> ``(codes, texts)`` for the cells that held text: ``codes`` (int32
        per row, -1 where the cell held no text) index ``texts`` (what :meth:`groups` reads)."""
        return dict(self._texts)

    def numeric_columns(self) -> list[str]:
        """Names of the columns with at least one number, in file order."""
        if self._numeric is None:  # the columns never change (read-only): counted once
            self._numeric = [c for c in self.columns if np.isfinite(self._data[c]).any()]
        return list(self._numeric)

    def choose(self, x=None, y=None, sigma=None) -> Selection:
        """Pick the x, y and optional sigma columns.

        Parameters
        ----------
        x, y : str or int, optional
            Column names (or 0-based positions). Defaults: the first and the second
            column that hold numbers.
        sigma : str or int, optional
            Column of standard uncertainties of y; none by default.

        Returns
        -------
        Selection
            Rows where x or y (or sigma) is not a usable number are left out and
            reported in ``dropped_rows`` and ``notes``.

        Raises
        ------
        ReadError
            When a column does not exist, the same column is chosen twice, or
            fewer than two numeric columns are available for the defaults.
        """
        label = self._label()
        numeric = self.numeric_columns()
        if x is None or y is None:
            free = [c for c in numeric if c not in {
                _resolve(self.columns, self.headers, k, "x/y", label) for k in (x, y, sigma) if k is not None}]
            if x is None:
                if not free:
                    raise ReadError(f"{label} has no numeric column left to use as x.")
                x = free.pop(0)
            if y is None:
                if not free:
                    raise ReadError(f"{label} has only one column with numbers, but x and y need two.")
                y = free.pop(0)
        xn = _resolve(self.columns, self.headers, x, "x", label)
        yn = _resolve(self.columns, self.headers, y, "y", label)
        sn = None if sigma is None else _resolve(self.columns, self.headers, sigma, "sigma", label)
        if xn == yn:
            raise ReadError(f"column {xn!r} of {label} was chosen for both x and y.")
        if sn is not None and sn in (xn, yn):
            raise ReadError(f"column {sn!r} of {label} was chosen for sigma and also for x or y.")
        xv, yv = self._data[xn], self._data[yn]
        keep = np.isfinite(xv) & np.isfinite(yv)
        notes = list(self.notes)
        bad_xy = ~keep
        if bad_xy.any():
            notes.append(f"{_rows_text(self.source_rows[bad_xy])}: left out because {xn} or {yn} is not a number")
        sv = None
        if sn is not None:
            sv_all = self._data[sn]
            bad_s = keep & ~(np.isfinite(sv_all) & (sv_all > 0))
            if bad_s.any():
                notes.append(f"{_rows_text(self.source_rows[bad_s])}: left out because {sn} is not a positive number")
            keep &= ~bad_s
            sv = sv_all[keep].copy()
        return Selection(
            x=xv[keep].copy(), y=yv[keep].copy(), sigma=sv,
            x_name=xn, y_name=yn, sigma_name=sn,
            x_unit=self.units[xn], y_unit=self.units[yn], sigma_unit=self.units[sn] if sn else "",
            source_rows=self.source_rows[keep].copy(),
            dropped_rows=tuple(int(r) for r in self.source_rows[~keep]),
            notes=tuple(notes), source=self.source, sha256=self.sha256,
        )


# --------------------------------------------------------------------------- layout

@dataclass
class _Layout:
    header: int | None  # index into the row list
    units_row: int | None
    data: int  # index of the first data row
    width: int
    header_cells: list | None


_PLAIN_NUMBER_RE = re.compile(r"^\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*$")


# a character that cannot occur in a cell _numlike accepts (digits, signs, exponent,
# decimal marks, group separators and white space)
_NOT_NUMBER_CHAR_RE = re.compile(r"[^\deE+\-.,'\u2019\u00a0\u202f\u2212\u2013\s]")


def _cell_kind(cell) -> int:
    """0 = empty, 1 = number, 2 = text."""
    if cell is None:
        return 0
    if isinstance(cell, float):
        return 0 if math.isnan(cell) else 1
    s = str(cell)
    if _PLAIN_NUMBER_RE.match(s):  # fast path: most cells of a wide file
        return 1
    if len(s) <= 256 and _NOT_NUMBER_CHAR_RE.search(s):  # a letter or sign no number has: text
        return 2
    s = s.strip()
    if not s:
        return 0
    return 1 if _numlike(s) else 2


# the plain-number pattern for cells joined by "\n" (no white space across a line end)
_PLAIN_NUMBER_LINES_RE = re.compile(r"^[ \t]*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?[ \t]*$", re.M)

# a cell (a line of the joined row) with a character no number has: text
_TEXT_CELL_LINES_RE = re.compile(r"^[^\n]*?" + _NOT_NUMBER_CHAR_RE.pattern, re.M)


def _row_stats(cells) -> tuple[int, int, int]:
    if len(cells) > 64:
        # a wide row of text cells (a spectrum export): count the plain numbers in one
        # pass; when every cell is one, the row is all numbers (each match lies inside
        # one cell and holds a digit, so no cell is counted twice)
        try:
            joined = "\n".join(cells)
        except TypeError:  # not all text: cell by cell below
            joined = ""
        if joined.count("\n") == len(cells) - 1:
            if len(_PLAIN_NUMBER_LINES_RE.findall(joined)) == len(cells):
                return len(cells), len(cells), 0
            if len(_TEXT_CELL_LINES_RE.findall(joined)) == len(cells):  # a header row: all text
                return len(cells), 0, len(cells)
    kinds = [_cell_kind(c) for c in cells]
    width = len(kinds)
    while width and kinds[width - 1] == 0:
        width -= 1
    n_num = kinds.count(1)
    n_text = kinds.count(2)
    return width, n_num, n_text


def _is_data_row(stats, width_needed: int | None = None) -> bool:
    width, n_num, n_text = stats
    if n_num == 0 or n_num < n_text:
        return False
    if width_needed is not None:
        return width >= 2 or width_needed == 1
    return width >= 2


_UNIT_CELL_RE = re.compile(r"^[\(\[]?[A-Za-z\u00b5\u03bc\u00b0%\u2126/\u00b7*^0-9 .\-]{1,12}[\)\]]?$")
_COMMON_UNITS = {"s", "min", "h", "ms", "us", "\u00b5s", "ns", "K", "V", "mV", "A", "mA", "g", "mg", "kg",
                 "L", "mL", "M", "mM", "nM", "\u00b5M", "m", "cm", "mm", "nm", "Hz", "kHz", "Pa", "kPa",
                 "bar", "J", "W", "cpm", "cps", "counts", "a.u.", "au", "%", "\u00b0C", "Ohm", "kOhm", "mol"}


def _looks_like_units(cells) -> bool:
    """True for a row such as "s;mV;%" under a header row (a separate units row)."""
    texts = [str(c).strip() for c in cells if c not in (None, "") and str(c).strip()]
    if not texts or not all(_UNIT_CELL_RE.match(t) for t in texts):
        return False
    return any(t[:1] in "([" or t in _COMMON_UNITS or any(ch in t for ch in "/\u00b0\u00b5\u03bc%\u2126")
               for t in texts)


def _find_layout(rows: list[list], comment: list[bool] | None = None, stats=None) -> _Layout | None:
    """Find header and first data row in a list of rows of cells (None = no table)."""
    comment = comment or [False] * len(rows)
    stats = stats if stats is not None else [_row_stats(r) for r in rows]
    data_idx = [i for i, s in enumerate(stats) if not comment[i] and _is_data_row(s)]
    if not data_idx:
        return None
    widths = Counter(stats[i][0] for i in data_idx)
    width = max(widths, key=lambda w: (widths[w], w))
    # the first all-number row of the common width whose next rows are data rows too
    def following(i):
        return [j for j in range(i + 1, len(rows)) if stats[j][0] > 0 and not comment[j]][:3]

    start = None
    for strict in (True, False):
        for i in data_idx:
            if stats[i][0] != width or (strict and stats[i][2] > 0):
                continue
            nxt = following(i)
            good = sum(1 for j in nxt if _is_data_row(stats[j]))
            if (strict and good == len(nxt)) or (not strict and 2 * good >= len(nxt)):
                start = i
                break
        if start is not None:
            break
    if start is None:
        start = data_idx[0]
    # step back over directly preceding data rows that hold some text ("0;n.d.")
    while start > 0 and not comment[start - 1] and stats[start - 1][0] == width and _is_data_row(stats[start - 1]):
        start -= 1
    # header: the nearest non-empty row above (blank rows in between are allowed)
    above = [j for j in range(start - 1, -1, -1) if stats[j][0] > 0 or comment[j]]
    header = units_row = None
    header_cells = None
    if above:
        j = above[0]
        if comment[j]:
            cells = rows[j]
            if _row_stats(cells)[0] == width:
                header, header_cells = j, list(cells)
        elif stats[j][2] > 0 and stats[j][0] >= min(2, width):
            header, header_cells = j, list(rows[j])
            # a units row under the header: "s;mV" below "Time;Signal"
            if len(above) > 1 and not comment[above[1]]:
                k = above[1]
                upper = rows[k]
                if (stats[k][2] > 0 and stats[k][1] == 0 and stats[k][0] == stats[j][0]
                        and _looks_like_units(rows[j])
                        and not any(split_unit(str(c))[1] for c in upper if c not in (None, ""))):
                    units_row, header, header_cells = j, k, list(upper)
    return _Layout(header=header, units_row=units_row, data=start, width=width, header_cells=header_cells)


# --------------------------------------------------------------------------- text


def _split_fields(line: str, sep: str) -> list[str]:
    """Cells of one line. Lines without quotes are split directly (any length: the csv
    module refuses fields over 131,072 characters); quoted lines go through csv."""
    if sep == " ":
        line = line.replace("\t", " ").strip()
        if not line:
            return []
        if '"' not in line:
            return line.split()
        return _csv_fields(line, " ", skipinitialspace=True)
    if not line.strip():
        return []
    if '"' not in line:
        return line.split(sep)
    return _csv_fields(line, sep)


def _csv_fields(line: str, sep: str, **kw) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=sep, quotechar='"', **kw))
    except csv.Error:  # a quoted field longer than the csv module's field limit
        return [f.strip('"') for f in (line.split() if sep == " " else line.split(sep))]


def _merge_whitespace_header(line: str, width: int) -> list[str]:
    """Header words of a white-space file grouped into ``width`` names if possible."""
    parts = [p for p in re.split(r"\t|\s{2,}", line.strip()) if p]
    if len(parts) == width:
        return parts
    tokens = _split_fields(line, " ")
    merged: list[str] = []
    for t in tokens:
        if merged and (t[:1] in "([" or t == "/" or merged[-1].endswith(" /")):
            merged[-1] = f"{merged[-1]} {t}"
        else:
            merged.append(t)
    return merged if len(merged) == width else tokens


def _decode(data: bytes, encoding: str | None, label: str) -> tuple[str, str]:
    if encoding is not None:
        try:
            return data.decode(encoding), encoding
        except LookupError:
            raise ReadError(f"{encoding!r} is not a known text encoding (asked for when reading {label}).") from None
        except UnicodeDecodeError:
            raise ReadError(f"{label} cannot be decoded as {encoding} text.") from None
    if data.startswith(b"\xef\xbb\xbf"):
        return data[3:].decode("utf-8", errors="replace"), "UTF-8 with BOM"
    if data.startswith(b"\xff\xfe\x00\x00") or data.startswith(b"\x00\x00\xfe\xff"):
        return data.decode("utf-32", errors="replace").lstrip("\ufeff"), "UTF-32"
    if data.startswith(b"\xff\xfe"):
        return data[2:].decode("utf-16-le", errors="replace"), "UTF-16 LE"
    if data.startswith(b"\xfe\xff"):
        return data[2:].decode("utf-16-be", errors="replace"), "UTF-16 BE"
    head = data[:4096]
    if b"\x00" in head and len(head) >= 4:
        even = head[0::2].count(0) / max(1, len(head[0::2]))
        odd = head[1::2].count(0) / max(1, len(head[1::2]))
        if odd > 0.3 and even < 0.05:
            return data.decode("utf-16-le", errors="replace"), "UTF-16 LE (no BOM)"
        if even > 0.3 and odd < 0.05:
            return data.decode("utf-16-be", errors="replace"), "UTF-16 BE (no BOM)"
        raise ReadError(f"{label} does not look like a text table or a spreadsheet (it contains binary data).")
    try:
        return data.decode("utf-8"), "UTF-8"
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252"), "CP1252"
    except UnicodeDecodeError:
        return data.decode("latin-1"), "Latin-1"


_CONTROL_RE = re.compile(r"[\x00-\x08\x0b\x0e-\x1f\x7f-\x9f\ufffd]")


def _check_text(text: str, label: str) -> None:
    sample = text[:65536]
    if not sample.strip():
        raise ReadError(f"{label} contains no text (only blank lines or spaces).")
    bad = len(_CONTROL_RE.findall(sample))
    if bad > max(2, 0.01 * len(sample)):
        raise ReadError(f"{label} does not look like a text table or a spreadsheet (it contains binary data).")


def _head_lines(text: str, n: int, max_chars: int | None = None) -> tuple[list[str], list[int]]:
    """The first ``n`` lines (fewer once ``max_chars`` are taken, but at least
    ``SNIFF_MIN_LINES``) and the character offset where each starts."""
    lines, offsets = [], []
    pos = 0
    for _ in range(n):
        if pos > len(text) or (pos == len(text) and lines):
            break
        if max_chars is not None and pos > max_chars and len(lines) >= SNIFF_MIN_LINES:
            break
        end = text.find("\n", pos)
        if end < 0:
            end = len(text)
        lines.append(text[pos:end].rstrip("\r"))
        offsets.append(pos)
        pos = end + 1
    return lines, offsets


def _sniff(lines: list[str], decimal: str | None):
    """Choose the separator: the one that yields the most numbers in rows of equal width."""
    best = None
    for prio, sep in enumerate(_TEXT_SEPARATORS):
        if decimal == "," and sep == ",":
            continue
        comment = [line.lstrip().startswith(_COMMENT_MARKS) for line in lines]
        rows = [_split_fields(line.lstrip().lstrip("#%/") if c else line, sep) for line, c in zip(lines, comment)]
        stats = [_row_stats(r) for r in rows]
        counts = Counter(s[0] for i, s in enumerate(stats) if not comment[i] and _is_data_row(s))
        if not counts:
            continue
        width = max(counts, key=lambda w: (counts[w], w))
        score = sum(s[1] for i, s in enumerate(stats) if not comment[i] and s[0] == width and _is_data_row(s))
        if best is None or score > best[0]:
            best = (score, -prio, sep, rows, comment, stats)
    return best


_LONE_CR_RE = re.compile(r"\r(?!\n)")


#: longest title line quoted whole in a reading note (longer ones end at a space, "…")
TITLE_NOTE_CHARS = 100


def _quoted_title(line: str) -> str:
    """A title line as a reading note quotes it: whole, or shortened at a word boundary."""
    t = line.strip()
    if len(t) <= TITLE_NOTE_CHARS:
        return t
    head = t[:TITLE_NOTE_CHARS + 1]
    cut = head.rsplit(" ", 1)[0].rstrip() if " " in head else ""
    return (cut or t[:TITLE_NOTE_CHARS]) + " …"


def _parse_text(text: str, *, label: str, source: str, sha256: str, decimal: str | None,
                encoding_name: str | None, kind: str, utf8_bytes: bytes | None = None) -> Table:
    import pandas as pd

    notes: list[str] = []
    if "\r" in text and _LONE_CR_RE.search(text):  # old Mac or mixed line ends
        text = text.replace("\r\n", "\n").replace("\r", "\n")
        utf8_bytes = None
    lines, offsets = _head_lines(text, SNIFF_LINES, SNIFF_CHARS)
    sniffed = _sniff(lines, decimal)
    if sniffed is None:
        _no_table(lines, label)
    _, _, sep, rows, comment, stats = sniffed
    layout = _find_layout(rows, comment, stats)
    if layout is None:
        _no_table(lines, label)
    if layout.width < 2:
        raise ReadError(f"{label} has only one column; at least two (x and y) are needed.")

    # header cells
    width = layout.width
    header_cells = None
    if layout.header is not None:
        hline = lines[layout.header]
        if comment[layout.header]:
            hline = hline.lstrip().lstrip("#%/").strip()
            notes.append(f"column names taken from the comment line {layout.header + 1}")
        header_cells = _merge_whitespace_header(hline, width) if sep == " " else _split_fields(hline, sep)
    title_end = layout.header if layout.header is not None else layout.data
    title_lines = [lines[j] for j in range(title_end) if lines[j].strip()]
    if title_lines:
        notes.append(
            f"{'line' if len(title_lines) == 1 else str(len(title_lines)) + ' lines'} above the header "
            f"taken as title or comment: " + "; ".join(repr(_quoted_title(t)) for t in title_lines[:3])
            + (" ..." if len(title_lines) > 3 else "")
        )
    if layout.header is None:
        notes.append("no header row found; columns named column_1, column_2, ...")
    unit_cells = None
    if layout.units_row is not None:
        unit_cells = _split_fields(lines[layout.units_row], sep)

    # decimal mark from the data cells seen while sniffing
    data_cells = [c for r in rows[layout.data:] for c in r]
    if decimal is None:
        decimal = _choose_decimal(data_cells, sep, notes)
    elif decimal not in (".", ","):
        raise ReadError(f"decimal must be '.' or ',', not {decimal!r} (reading {label}).")

    ncols = max(width, len(header_cells or []))
    start = offsets[layout.data]
    first_line = layout.data + 1  # 1-based line number of the first body line
    if utf8_bytes is not None:  # hand pandas the bytes: no copy of a large text
        body = memoryview(utf8_bytes)[len(text[:start].encode("utf-8")):]
        n_body_lines = body.obj.count(b"\n", len(utf8_bytes) - len(body))
        ends_open = len(body) > 0 and body[-1:] != b"\n"
    else:
        body = text[start:]
        n_body_lines = body.count("\n")
        ends_open = bool(body) and not body.endswith("\n")
    if ends_open:
        body, ends_open = _unterminated_last_line(text, body, sep, width, first_line + n_body_lines, label, notes)
    n_body_lines += 1 if ends_open else 0
    if n_body_lines * ncols > MAX_TEXT_CELLS:
        raise ReadError(f"{label} holds about {n_body_lines:,} rows of {ncols:,} columns, more than the "
                        f"{MAX_TEXT_CELLS:,} cells Ballast reads; save only the columns needed.")
    df, bad_lines = _read_body(pd, body, sep, decimal, ncols, label)
    line_no = np.arange(n_body_lines, dtype=np.int64)
    if bad_lines:
        line_no = np.delete(line_no, [b - 1 for b in bad_lines if 0 < b <= n_body_lines])
    if len(line_no) != len(df):
        notes.append("some cells span several lines (quoted line breaks); row numbers may be off")
        line_no = np.arange(len(df), dtype=np.int64)
    source_rows = line_no + first_line
    if bad_lines:
        notes.append(f"{_rows_text(np.asarray(bad_lines) + first_line - 1)}: more cells than the header has; "
                     "row skipped")

    raw_names = list(header_cells or []) + [None] * (ncols - len(header_cells or []))
    if unit_cells:
        raw_names = [f"{n} ({u.strip()})" if n and u and u.strip() else n
                     for n, u in zip(raw_names, list(unit_cells) + [""] * ncols)]
    columns: list[np.ndarray] = []
    cell_notes: list[tuple[int, list[tuple[str, np.ndarray]]]] = []
    thousands_seen = False
    df_columns: list = [None] * df.shape[1]
    clean = np.zeros(df.shape[1], bool)
    if df.shape[1] > 64:  # a wide table (a spectrum export): one conversion for the numeric columns
        numeric_types = {t for t in set(df.dtypes)  # each distinct column type once
                         if pd.api.types.is_numeric_dtype(t) and not pd.api.types.is_bool_dtype(t)}
        numeric = np.array([t in numeric_types for t in df.dtypes], bool)
        num_idx = np.flatnonzero(numeric)
        other = np.flatnonzero(~numeric)
        for i in other:
            df_columns[i] = df.iloc[:, i]
        if num_idx.size:
            if other.size <= 64:  # a few text columns: blank them out rather than copy the rest
                part = df.copy(deep=False) if other.size else df
                for i in other:
                    part.isetitem(int(i), np.full(len(df), np.nan))
                matrix = np.asfortranarray(part.to_numpy(dtype=float, na_value=np.nan))
            else:
                matrix = np.zeros((len(df), df.shape[1]), order="F")
                matrix[:, num_idx] = df.iloc[:, num_idx].to_numpy(dtype=float, na_value=np.nan)
            # columns with an empty or infinite cell are checked one by one, the others not
            clean[num_idx] = np.isfinite(matrix[:, num_idx]).all(axis=0)
            for i in num_idx:
                df_columns[i] = matrix[:, i]
    else:
        numeric = np.zeros(df.shape[1], bool)
        df_columns = [col for _, col in df.items()]
    for i in range(ncols):
        col = df_columns[i] if i < len(df_columns) else None
        if col is not None and numeric[i]:
            values, problems = (col, []) if clean[i] else _numeric_values(col)
            grouped = False
        else:
            values, problems, grouped = _convert_column(col, len(df), decimal)
        thousands_seen |= grouped
        columns.append(values)
        cell_notes.append((i, problems))
    return _assemble(raw_names, columns, cell_notes, source_rows, notes, thousands_seen,
                     label=label, source=source, sha256=sha256, title_lines=title_lines,
                     dialect=Dialect(kind=kind, encoding=encoding_name, separator=sep, decimal=decimal,
                                     header_row=None if layout.header is None else layout.header + 1))


def _unterminated_last_line(text: str, body, sep: str, width: int, line_no: int, label: str, notes: list[str]):
    """A last line without a line end may be cut short (a file still being written).

    Kept, with a note, when it has all its cells and ends in a number; else left out
    with a note. Returns the body to read and whether it still ends without a line end.
    """
    cut = text.rfind("\n") + 1
    last = text[cut:].rstrip("\r")
    if not last.strip():
        return body, True
    fields = [f for f in _split_fields(last, sep)]
    if len(fields) >= width and fields and _cell_kind(fields[-1]) == 1:
        notes.append(f"row {line_no}: the last line has no line end; if the file was still being written, "
                     "its last value may be cut short")
        return body, True
    notes.append(f"row {line_no}: the last line has no line end and is incomplete (the file may still be "
                 "being written); row left out")
    if isinstance(body, memoryview):
        end = body.obj.rfind(b"\n")
        start = len(body.obj) - len(body)
        if end < start:
            raise ReadError(f"{label} has only an incomplete data line without a line end (the file may still "
                            "be being written).")
        return memoryview(body.obj)[start:end + 1], False
    end = body.rfind("\n")
    if end < 0:
        raise ReadError(f"{label} has only an incomplete data line without a line end (the file may still "
                        "be being written).")
    return body[:end + 1], False


def _no_table(lines: list[str], label: str):
    nonblank = [ln for ln in lines if ln.strip()]
    if any(_numlike(tok) for ln in nonblank for tok in re.split(r"[\s;,|]+", ln.strip()) if tok):
        raise ReadError(f"{label} has only one column of numbers; at least two (x and y) are needed.")
    if len(nonblank) <= 2:
        raise ReadError(f"{label} has a header but no data rows with numbers.")
    raise ReadError(f"{label} contains no rows of numbers that could be read as a table.")


class _collector_paused:
    """Pause Python's cyclic garbage collector (when ``on``) while a wide table is parsed:
    its passes over the thousands of new column objects (pandas' and ours) took a fifth
    of the time. The collector is switched back on afterwards only if it was on before."""

    def __init__(self, on: bool):
        self.on = on
        self.was = False

    def __enter__(self):
        import gc

        self.was = self.on and gc.isenabled()
        if self.was:
            gc.disable()
        return self

    def __exit__(self, *exc):
        import gc

        if self.was:
            gc.enable()
        return False


def _read_body(pd, body: str, sep: str, decimal: str, ncols: int, label: str):
    kwargs = dict(
        sep=r"\s+" if sep == " " else sep,
        header=None,
        names=list(range(ncols)),
        index_col=False,
        decimal=decimal,
        keep_default_na=False,
        na_values=[""],
        skip_blank_lines=False,
        on_bad_lines="warn",
        engine="c",
        quotechar='"',
        dtype=None,
        # a wide table (a spectrum export): one pass, not chunks that pandas then joins
        # column by column (several times slower for thousands of columns)
        low_memory=ncols <= 64,
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            if isinstance(body, memoryview):
                df = pd.read_csv(_io.BytesIO(body), encoding="utf-8", **kwargs)
            else:
                df = pd.read_csv(_io.StringIO(body), **kwargs)
        except Exception as exc:  # noqa: BLE001 - pandas' messages are deep; give one sentence
            raise ReadError(f"{label} could not be split into columns ({type(exc).__name__}: "
                            f"{str(exc).strip().splitlines()[0] if str(exc).strip() else 'no detail'}).") from None
    bad = []
    for w in caught:
        for m in re.finditer(r"Skipping line (\d+)", str(w.message)):
            bad.append(int(m.group(1)))
    return df, sorted(set(bad))


def _numeric_values(values: np.ndarray):
    """A float column with its empty cells and infinities listed as problems."""
    values = np.array(values, dtype=float)
    problems: list[tuple[str, str, np.ndarray]] = []
    empty = np.isnan(values)
    inf = np.isinf(values)
    if inf.any():
        values[inf] = np.nan
        problems.append(("text", "inf", inf))
    if empty.any():
        problems.append(("empty", "", empty))
    return values, problems


def _convert_column(col, n: int, decimal: str):
    """Float values, list of (problem text, mask) and whether thousands separators were used."""
    import pandas as pd

    if col is None:
        return np.full(n, np.nan), [], False
    problems: list[tuple[str, np.ndarray]] = []
    grouped_any = False
    if pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        values, problems = _numeric_values(col.to_numpy(dtype=float, na_value=np.nan))
        return values, problems, False
    # fast vectorised pass for plain numbers; the rest cell by cell
    if decimal == ",":
        as_text = col.astype(str)
        has_point = as_text.str.contains(".", regex=False).to_numpy(dtype=bool)
        try:
            quick = pd.to_numeric(as_text.str.replace(",", ".", regex=False), errors="coerce")
        except (OverflowError, ValueError, TypeError):
            quick = np.full(n, np.nan)
    else:
        has_point = np.zeros(n, bool)
        try:
            quick = pd.to_numeric(col, errors="coerce")
        except (OverflowError, ValueError, TypeError):  # e.g. a 400-digit integer: cell by cell below
            quick = np.full(n, np.nan)
    quick = np.asarray(quick, dtype=float)
    ok = np.isfinite(quick) & ~has_point
    values = np.where(ok, quick, np.nan)
    texts: dict[str, list[int]] = {}
    empty_rows: list[int] = []
    raw = col.to_numpy(dtype=object)
    for i in np.flatnonzero(~ok):
        cell = raw[i]
        if cell is None or (isinstance(cell, float) and math.isnan(cell)):
            empty_rows.append(i)
            continue
        if isinstance(cell, (int, float, np.floating, np.integer)) and not isinstance(cell, bool):
            try:
                v = float(cell)
            except OverflowError:  # an integer beyond the float range: reported as not finite
                v = math.inf
            grouped = False
        else:
            s = str(cell)
            if not s.strip():
                empty_rows.append(i)
                continue
            v, grouped = _parse_number(s, decimal)
            if v is None:
                texts.setdefault(s.strip(), []).append(i)
                continue
        if not math.isfinite(v):
            texts.setdefault(str(cell).strip(), []).append(i)
            continue
        grouped_any |= grouped
        values[i] = v
    for text, idx in texts.items():
        mask = np.zeros(n, bool)
        mask[idx] = True
        problems.append(("text", text, mask))
    if empty_rows:
        mask = np.zeros(n, bool)
        mask[empty_rows] = True
        problems.append(("empty", "", mask))
    return values, problems, grouped_any


def _assemble(raw_names, columns, cell_notes, source_rows, notes, thousands_seen, *, label, source, sha256,
              title_lines, dialect, sheet_names=()) -> Table:
    columns = list(columns)
    raw_names = list(raw_names)
    n = len(source_rows)
    if n == 0:
        raise ReadError(f"{label} has a header but no data rows with numbers.")
    mat_finite = np.column_stack([np.isfinite(c) for c in columns]) if columns else np.zeros((n, 0), bool)
    # whole rows without a single number (blank lines, comments inside the data)
    empty_row = ~mat_finite.any(axis=1)
    if empty_row.any():
        last_data = np.flatnonzero(~empty_row)
        if last_data.size == 0:
            raise ReadError(f"{label} has a header but no data rows with numbers.")
        has_text = np.zeros(n, bool)
        texts: list[str] = []
        for _, problems in cell_notes:
            for kind, text, mask in problems:
                if kind == "text" and (mask & empty_row).any():
                    has_text |= mask & empty_row
                    if text not in texts:
                        texts.append(text)
        blank = empty_row & ~has_text
        blank[last_data[-1] + 1:] = False  # blank lines at the very end say nothing
        if blank.any():
            notes.append(f"{_rows_text(source_rows[blank])}: empty row skipped")
        if has_text.any():
            shown = ", ".join(repr(t[:40]) for t in texts[:4]) + (", ..." if len(texts) > 4 else "")
            notes.append(f"{_rows_text(source_rows[has_text])}: text but no numbers ({shown}); row skipped")
    keep_rows = ~empty_row
    # columns with neither a header nor any number (trailing separators): drop
    keep_cols = [i for i, c in enumerate(columns)
                 if (raw_names[i] not in (None, "") and str(raw_names[i]).strip()) or mat_finite[:, i].any()]
    raw_names = [raw_names[i] for i in keep_cols]
    if len(keep_cols) < 2:
        raise ReadError(f"{label} has only one column; at least two (x and y) are needed.")
    names, units, headers = _make_names(raw_names, notes)
    notes_of = dict(cell_notes)
    all_rows = bool(keep_rows.all())  # no copies of the columns then (a wide table has thousands)
    data = {}
    texts = {}
    for name, i in zip(names, keep_cols):
        data[name] = columns[i] if all_rows else columns[i][keep_rows]
        for kind, text, mask in notes_of.get(i, []):
            rows = source_rows[mask & keep_rows]
            if rows.size == 0:
                continue
            if kind == "text":  # kept as codes so a text column can split a long table
                codes, labels = texts.setdefault(name, (np.full(int(keep_rows.sum()), -1, np.int32), []))
                codes[mask[keep_rows]] = len(labels)
                labels.append(text)
            if kind == "empty":
                notes.append(f"{_rows_text(rows)}: no value in column {name}")
            elif text == "inf" or text.lower() in ("-inf", "+inf", "infinity", "-infinity"):
                notes.append(f"{_rows_text(rows)}: '{text}' is not a finite number in column {name}")
            else:
                notes.append(f"{_rows_text(rows)}: '{text[:40]}' is not a number in column {name}")
    if thousands_seen:
        notes.append("thousands separators found and removed")
    return Table(names, units, headers, data, notes, source, sha256, source_rows[keep_rows], dialect,
                 title_lines=title_lines, sheet_names=sheet_names, texts=texts)


# --------------------------------------------------------------------------- spreadsheets


def _grid_table(grid: list[list], *, label, source, sha256, decimal, kind, sheet, sheet_names, notes) -> Table:
    """Build a table from sheet rows (cells: float, str or None); row i is sheet row i+1."""
    rows = [[c if (c is None or isinstance(c, float)) else str(c) for c in r] for r in grid]
    layout = _find_layout(rows)
    if layout is None:
        if any(_cell_kind(c) == 1 for r in rows for c in r):
            raise ReadError(f"sheet '{sheet}' of {label} has only one column of numbers; "
                            "at least two (x and y) are needed.")
        raise ReadError(f"sheet '{sheet}' of {label} holds no rows of numbers.")
    if decimal is None:
        text_cells = [c for r in rows[layout.data:] for c in r if isinstance(c, str)]
        decimal = _choose_decimal(text_cells, None, notes) if text_cells else "."
    ncols = max(len(r) for r in rows[layout.data:])
    header = list(layout.header_cells or [])
    ncols = max(ncols, len(header))
    raw_names = [None if c is None else (str(c) if not isinstance(c, float) else repr(c)) for c in header]
    raw_names += [None] * (ncols - len(raw_names))
    if layout.units_row is not None:
        urow = rows[layout.units_row]
        raw_names = [f"{n} ({urow[i]})" if n and i < len(urow) and urow[i] else n for i, n in enumerate(raw_names)]
    title_end = layout.header if layout.header is not None else layout.data
    title_lines = [" ".join(str(c) for c in r if c not in (None, "")) for r in rows[:title_end]]
    title_lines = [t for t in title_lines if t.strip()]
    if title_lines:
        notes.append(f"{len(title_lines)} row(s) above the header taken as title or comment")
    if layout.header is None:
        notes.append("no header row found; columns named column_1, column_2, ...")
    body = rows[layout.data:]
    source_rows = np.arange(layout.data + 1, len(rows) + 1)
    import pandas as pd
    columns, cell_notes, grouped_any = [], [], False
    for i in range(ncols):
        col = pd.Series([r[i] if i < len(r) else None for r in body], dtype=object)
        values, problems, grouped = _convert_column(col, len(body), decimal)
        columns.append(values)
        cell_notes.append((i, problems))
        grouped_any |= grouped
    return _assemble(raw_names, columns, cell_notes, source_rows, notes, grouped_any, label=label, source=source,
                     sha256=sha256, title_lines=title_lines, sheet_names=sheet_names,
                     dialect=Dialect(kind=kind, decimal=decimal, sheet=sheet,
                                     header_row=None if layout.header is None else layout.header + 1))


def _cell_value(v):
    if v is None:
        return None
    if isinstance(v, bool):
        return str(v).upper()
    if isinstance(v, (int, float, np.integer, np.floating)):
        return float(v)
    return str(v)


def _pick_sheet(names: list[str], sheet, label: str) -> int:
    listing = ", ".join(f"'{n}'" for n in names)
    if sheet is None:
        return 0
    if isinstance(sheet, (int, np.integer)) and not isinstance(sheet, bool):
        if 0 <= sheet < len(names):
            return int(sheet)
        raise ReadError(f"{label} has {len(names)} sheet(s) ({listing}), so there is no sheet number {sheet} "
                        "(sheets count from 0).")
    if sheet in names:
        return names.index(sheet)
    raise ReadError(f"{label} has no sheet named '{sheet}'; its sheets are {listing}.")


def _read_workbook(data: bytes, kind: str, sheet, *, label, source, sha256, decimal) -> Table:
    notes: list[str] = []
    try:
        zf = zipfile.ZipFile(_io.BytesIO(data))
        if kind == "xlsx":
            book = _XlsxBook(zf, label)
            names = list(book.names)
            grid_of = book.grid
        else:
            names, grids = _ods_sheets(zf, label)

            def grid_of(idx):
                return grids[idx]
        if names:
            idx = _pick_sheet(names, sheet, label)
            grid = grid_of(idx)
            if sheet is None and _find_layout([list(r) for r in grid]) is None:
                for j in range(len(names)):
                    if j != idx and _find_layout(grid_of(j)) is not None:
                        notes.append(f"sheet '{names[idx]}' holds no table of numbers; read sheet '{names[j]}' "
                                     "instead")
                        idx, grid = j, grid_of(j)
                        break
    except ReadError as err:
        raise ReadError(str(err).rstrip(".") + ".") from None
    except Exception:  # noqa: BLE001 - any reader failure: one sentence for a damaged workbook
        raise ReadError(f"{label} looks like an {kind.upper()} spreadsheet but is damaged or incomplete "
                        "and could not be opened.") from None
    if not names:
        raise ReadError(f"{label} is a workbook without any sheets.")
    if len(names) > 1:
        notes.insert(0, f"read sheet '{names[idx]}' of {len(names)} (" + ", ".join(names) + ")")
    return _grid_table(grid, label=label, source=source, sha256=sha256, decimal=decimal, kind=kind,
                       sheet=names[idx], sheet_names=names, notes=notes)


def _container(data: bytes, path: Path, label: str) -> str:
    ext = path.suffix.lower()
    if data.startswith(b"PK\x03\x04") or data.startswith(b"PK\x05\x06"):
        try:
            with zipfile.ZipFile(_io.BytesIO(data)) as zf:
                members = set(zf.namelist())
                if "xl/workbook.xml" in members:
                    return "xlsx"
                if "mimetype" in members and zf.read("mimetype").startswith(
                        b"application/vnd.oasis.opendocument.spreadsheet"):
                    return "ods"
                if "content.xml" in members and ext == ".ods":
                    return "ods"
        except Exception:  # noqa: BLE001 - BadZipFile, unsupported ZIP features, truncated members ...
            kind = "ODS" if ext == ".ods" else "XLSX"
            raise ReadError(f"{label} looks like an {kind} spreadsheet but is damaged or incomplete "
                            "and could not be opened.") from None
        raise ReadError(f"{label} is a ZIP archive but not an XLSX or ODS spreadsheet.")
    if data.startswith(b"\xd0\xcf\x11\xe0"):
        raise ReadError(f"{label} is in the old binary Excel (.xls) format; save it as .xlsx or CSV and open that.")
    if ext in (".xlsx", ".xlsm", ".ods"):
        raise ReadError(f"{label} has the extension {ext} but is not a valid spreadsheet (damaged or misnamed).")
    return "text"


# --------------------------------------------------------------------------- streaming spreadsheet readers
#
# Both readers walk the sheet XML with expat, a chunk at a time, and keep only the
# cells that hold something: empty cells and empty rows are counted, not stored, and
# trailing ones (ODS "repeated" runs up to the sheet's edge) are never materialised.
# The grid of one sheet is capped at MAX_SHEET_CELLS cells (rows x widest row), the
# XML read from the archive at MAX_UNCOMPRESSED_BYTES; a document type declaration
# (never present in XLSX/ODS) is refused, so entity expansion cannot happen.


class _SheetTooLarge(ReadError):
    pass


def _cap_text(n: int) -> str:
    return f"{n:,}"


def _zip_open_checked(zf: zipfile.ZipFile, name: str, label: str, budget: list[int]):
    info = zf.getinfo(name)
    if info.file_size > MAX_RATIO_FREE_BYTES and info.file_size > MAX_COMPRESSION_RATIO * max(info.compress_size, 1):
        raise _SheetTooLarge(
            f"{label} holds a part ('{name}') that unpacks {info.file_size // max(info.compress_size, 1):,} times "
            f"larger than it is stored (more than {MAX_COMPRESSION_RATIO} times is refused as a compression bomb); "
            "save the table again from the spreadsheet program or as CSV")
    if info.file_size > budget[0]:
        raise _SheetTooLarge(
            f"{label} unpacks to more than {_cap_text(MAX_UNCOMPRESSED_BYTES)} bytes of spreadsheet XML "
            f"(part '{name}' alone declares {_cap_text(info.file_size)}), the most Ballast reads; "
            "save the table in a smaller file or as CSV")
    return zf.open(info)


def _feed(parser, fh, label: str, budget: list[int]) -> None:
    while True:
        chunk = fh.read(1 << 16)
        if not chunk:
            break
        budget[0] -= len(chunk)
        if budget[0] < 0:
            raise _SheetTooLarge(
                f"{label} unpacks to more than {_cap_text(MAX_UNCOMPRESSED_BYTES)} bytes of spreadsheet XML, "
                "the most Ballast reads; save the table in a smaller file or as CSV")
        parser.Parse(chunk, False)
    parser.Parse(b"", True)


def _new_parser():
    from xml.parsers import expat

    parser = expat.ParserCreate(namespace_separator=" ")

    def no_dtd(*_a):
        raise ValueError("a document type declaration is not allowed in a spreadsheet")

    parser.StartDoctypeDeclHandler = no_dtd
    parser.EntityDeclHandler = no_dtd
    parser.buffer_text = True
    return parser


class _GridBuilder:
    """Rows of cells where only what holds a value is stored; empty runs are pending."""

    def __init__(self, label: str, sheet: str):
        self.repeated = 0  # cells made by repeating a non-empty cell or row (ODS)
        self.rows: list[list] = []
        self.pending_rows = 0  # empty rows not yet materialised
        self.row: list = []
        self.pending_cells = 0
        self.width = 0
        self.label = label
        self.sheet = sheet

    def _check(self, n_rows: int, width: int) -> None:
        if n_rows * max(width, 1) > MAX_SHEET_CELLS:
            raise _SheetTooLarge(
                f"sheet '{self.sheet}' of {self.label} spans {_cap_text(n_rows)} rows and {_cap_text(width)} "
                f"columns, more than the {_cap_text(MAX_SHEET_CELLS)} cells Ballast reads; delete far-away "
                "cells or copy the table to a new file")

    def skip_cells(self, n: int) -> None:
        self.pending_cells += n

    def cell(self, value, repeat: int = 1) -> None:
        if value is None:
            self.pending_cells += repeat
            return
        new_len = len(self.row) + self.pending_cells + repeat
        self._check(len(self.rows) + self.pending_rows + 1, max(self.width, new_len))
        if self.pending_cells:
            self.row.extend([None] * self.pending_cells)
            self.pending_cells = 0
        if repeat > 1:
            self._repeat((repeat - 1))
        self.row.extend([value] * repeat)

    def _repeat(self, n_cells: int) -> None:
        self.repeated += n_cells
        if self.repeated > MAX_REPEATED_CELLS:
            raise _SheetTooLarge(
                f"sheet '{self.sheet}' of {self.label} repeats filled cells or rows to more than "
                f"{_cap_text(MAX_REPEATED_CELLS)} cells, the most Ballast expands; write the values out or save "
                "the table as CSV")

    def end_row(self, repeat: int = 1) -> None:
        row, self.row, self.pending_cells = self.row, [], 0
        if not row:
            self.pending_rows += repeat
            return
        n_rows = len(self.rows) + self.pending_rows + repeat
        if repeat > 1:
            self._repeat((repeat - 1) * len(row))
        self.width = max(self.width, len(row))
        self._check(n_rows, self.width)
        if self.pending_rows:
            self.rows.extend([] for _ in range(self.pending_rows))
            self.pending_rows = 0
        self.rows.append(row)
        for _ in range(repeat - 1):
            self.rows.append(list(row))

    def skip_rows(self, n: int) -> None:
        self.pending_rows += n


_XLSX_MAIN = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_XLSX_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_PKG_REL = "http://schemas.openxmlformats.org/package/2006/relationships"
_COL_RE = re.compile(r"^([A-Za-z]{1,3})(\d+)$")
_DATE_FORMAT_IDS = set(range(14, 23)) | {45, 46, 47}


def _col_index(letters: str) -> int:
    n = 0
    for ch in letters.upper():
        n = n * 26 + (ord(ch) - 64)
    return n - 1


def _xlsx_small_part(zf, name: str, label: str, budget: list[int], start, end=None, text=None) -> None:
    if name not in zf.namelist():
        return
    parser = _new_parser()
    parser.StartElementHandler = start
    if end is not None:
        parser.EndElementHandler = end
    if text is not None:
        parser.CharacterDataHandler = text
    with _zip_open_checked(zf, name, label, budget) as fh:
        _feed(parser, fh, label, budget)


def _xlsx_is_date_format(code: str) -> bool:
    code = re.sub(r'"[^"]*"|\[[^\]]*\]|\\.', "", code).lower()
    return any(ch in code for ch in "dyhs") or ("m" in code and ("d" in code or "y" in code))


class _XlsxBook:
    """Sheet names and a streaming sheet reader for an XLSX workbook (no openpyxl)."""

    def __init__(self, zf: zipfile.ZipFile, label: str):
        self.zf, self.label = zf, label
        self.budget = [MAX_UNCOMPRESSED_BYTES]
        sheets: list[tuple[str, str]] = []

        def wb_start(name, attrs):
            if name == f"{_XLSX_MAIN} sheet":
                sheets.append((attrs.get("name", f"Sheet{len(sheets) + 1}"), attrs.get(f"{_XLSX_REL} id", "")))

        _xlsx_small_part(zf, "xl/workbook.xml", label, self.budget, wb_start)
        targets: dict[str, str] = {}

        def rel_start(name, attrs):
            if name == f"{_PKG_REL} Relationship":
                targets[attrs.get("Id", "")] = attrs.get("Target", "")

        _xlsx_small_part(zf, "xl/_rels/workbook.xml.rels", label, self.budget, rel_start)
        self.names = [n for n, _ in sheets]
        self.parts = []
        for _, rid in sheets:
            t = targets.get(rid, "")
            t = t.lstrip("/") if t.startswith("/") else "xl/" + t
            self.parts.append(os.path.normpath(t).replace(os.sep, "/") if t else "")
        self._strings: list[str] | None = None
        self._date_styles: set[int] | None = None

    def strings(self) -> list[str]:
        if self._strings is None:
            out: list[str] = []
            buf: list[str] = []
            state = {"in_t": False, "skip": 0}

            def start(name, attrs):
                if name == f"{_XLSX_MAIN} si":
                    buf.clear()
                elif name == f"{_XLSX_MAIN} rPh":
                    state["skip"] += 1
                elif name == f"{_XLSX_MAIN} t" and not state["skip"]:
                    state["in_t"] = True

            def end(name):
                if name == f"{_XLSX_MAIN} si":
                    out.append("".join(buf))
                elif name == f"{_XLSX_MAIN} rPh":
                    state["skip"] -= 1
                elif name == f"{_XLSX_MAIN} t":
                    state["in_t"] = False

            def text(data):
                if state["in_t"]:
                    buf.append(data)

            _xlsx_small_part(self.zf, "xl/sharedStrings.xml", self.label, self.budget, start, end, text)
            self._strings = out
        return self._strings

    def date_styles(self) -> set[int]:
        if self._date_styles is None:
            custom: dict[int, str] = {}
            xf_fmts: list[int] = []
            state = {"xfs": False}

            def start(name, attrs):
                if name == f"{_XLSX_MAIN} numFmt":
                    try:
                        custom[int(attrs.get("numFmtId", "-1"))] = attrs.get("formatCode", "")
                    except ValueError:
                        pass
                elif name == f"{_XLSX_MAIN} cellXfs":
                    state["xfs"] = True
                elif name == f"{_XLSX_MAIN} xf" and state["xfs"]:
                    try:
                        xf_fmts.append(int(attrs.get("numFmtId", "0")))
                    except ValueError:
                        xf_fmts.append(0)

            def end(name):
                if name == f"{_XLSX_MAIN} cellXfs":
                    state["xfs"] = False

            _xlsx_small_part(self.zf, "xl/styles.xml", self.label, self.budget, start, end)
            self._date_styles = {i for i, f in enumerate(xf_fmts)
                                 if f in _DATE_FORMAT_IDS or (f in custom and _xlsx_is_date_format(custom[f]))}
        return self._date_styles

    def grid(self, idx: int) -> list[list]:
        part = self.parts[idx]
        sheet = self.names[idx]
        b = _GridBuilder(self.label, sheet)
        if not part or part not in self.zf.namelist():
            return b.rows  # a chart sheet or a missing part: no cells
        strings = self.strings()
        dates = self.date_styles()
        st = {"row": 0, "col": 0, "t": "n", "s": 0, "v": None, "in_v": False, "in_t": False, "is": [],
              "in_cell": False, "in_row": False}
        vbuf: list[str] = []
        C, V, T, ROW = (f"{_XLSX_MAIN} c", f"{_XLSX_MAIN} v", f"{_XLSX_MAIN} t", f"{_XLSX_MAIN} row")

        def start(name, attrs):
            if name == C:
                ref = attrs.get("r")
                col = st["col"]
                if ref:
                    m = _COL_RE.match(ref)
                    if m:
                        col = _col_index(m.group(1))
                st["cell_col"] = col
                st["t"] = attrs.get("t", "n")
                try:
                    st["s"] = int(attrs.get("s", "0"))
                except ValueError:
                    st["s"] = 0
                st["in_cell"] = True
                st["is"] = []
                vbuf.clear()
                st["has_v"] = False
            elif name == V and st["in_cell"]:
                st["in_v"] = True
                st["has_v"] = True
            elif name == T and st["in_cell"]:
                st["in_t"] = True
            elif name == ROW:
                r = attrs.get("r")
                target = st["row"] + 1
                if r:
                    try:
                        target = int(r)
                    except ValueError:
                        pass
                if target > st["row"] + 1:
                    b.skip_rows(target - st["row"] - 1)
                st["row"] = max(target, st["row"] + 1) if target > st["row"] else st["row"] + 1
                st["col"] = 0
                st["in_row"] = True

        def end(name):
            if name == V:
                st["in_v"] = False
            elif name == T:
                st["in_t"] = False
            elif name == C:
                st["in_cell"] = False
                col = st["cell_col"]
                value = self._value(st["t"], "".join(vbuf), st["has_v"], "".join(st["is"]), st["s"], strings,
                                    dates)
                if col < len(b.row) + b.pending_cells:
                    col = len(b.row) + b.pending_cells  # out-of-order reference: keep file order
                b.skip_cells(col - len(b.row) - b.pending_cells)
                b.cell(value)
                st["col"] = col + 1
            elif name == ROW:
                b.end_row()
                st["in_row"] = False

        def text(data):
            if st["in_v"]:
                vbuf.append(data)
            elif st["in_t"]:
                st["is"].append(data)

        parser = _new_parser()
        parser.StartElementHandler = start
        parser.EndElementHandler = end
        parser.CharacterDataHandler = text
        with _zip_open_checked(self.zf, part, self.label, self.budget) as fh:
            _feed(parser, fh, self.label, self.budget)
        return b.rows

    @staticmethod
    def _value(t: str, v: str, has_v: bool, inline: str, style: int, strings: list[str], dates: set[int]):
        if t == "inlineStr":
            return inline if inline != "" else None
        if not has_v:
            return None
        if t == "s":
            try:
                s = strings[int(v)]
            except (ValueError, IndexError):
                return None
            return s if s != "" else None
        if t == "b":
            return "TRUE" if v.strip() in ("1", "true") else "FALSE"
        if t in ("str", "e", "d"):
            return v if v != "" else None
        try:
            f = float(v)
        except ValueError:
            return v
        if style in dates and math.isfinite(f):
            from datetime import datetime, timedelta

            try:
                return str(datetime(1899, 12, 30) + timedelta(days=f))
            except OverflowError:
                return f
        return f


_ODS_TABLE = "urn:oasis:names:tc:opendocument:xmlns:table:1.0"
_ODS_OFFICE = "urn:oasis:names:tc:opendocument:xmlns:office:1.0"
_ODS_TEXT = "urn:oasis:names:tc:opendocument:xmlns:text:1.0"


def _ods_repeat(attrs, key: str) -> int:
    try:
        return max(1, int(attrs.get(key, "1")))
    except ValueError:
        return 1


def _ods_sheets(zf: zipfile.ZipFile, label: str) -> tuple[list[str], list[list[list]]]:
    """All sheets of an ODS file in one streaming pass over content.xml."""
    budget = [MAX_UNCOMPRESSED_BYTES]
    names: list[str] = []
    grids: list[list[list]] = []
    TABLE, ROW = f"{_ODS_TABLE} table", f"{_ODS_TABLE} table-row"
    CELL, COVERED = f"{_ODS_TABLE} table-cell", f"{_ODS_TABLE} covered-table-cell"
    P, S, TAB, BR = (f"{_ODS_TEXT} p", f"{_ODS_TEXT} s", f"{_ODS_TEXT} tab", f"{_ODS_TEXT} line-break")
    ANNOT = f"{_ODS_OFFICE} annotation"
    st = {"b": None, "cell": None, "annot": 0, "paras": [], "depth_table": 0}

    def start(name, attrs):
        b = st["b"]
        if name == TABLE:
            st["depth_table"] += 1
            if st["depth_table"] == 1:
                names.append(attrs.get(f"{_ODS_TABLE} name", f"Sheet{len(names) + 1}"))
                st["b"] = _GridBuilder(label, names[-1])
        elif b is None or st["depth_table"] != 1:
            return
        elif name == ROW:
            st["row_repeat"] = _ods_repeat(attrs, f"{_ODS_TABLE} number-rows-repeated")
        elif name in (CELL, COVERED):
            st["cell"] = {
                "repeat": _ods_repeat(attrs, f"{_ODS_TABLE} number-columns-repeated"),
                "type": attrs.get(f"{_ODS_OFFICE} value-type", ""),
                "value": attrs.get(f"{_ODS_OFFICE} value"),
                "bool": attrs.get(f"{_ODS_OFFICE} boolean-value"),
                "date": attrs.get(f"{_ODS_OFFICE} date-value"),
                "time": attrs.get(f"{_ODS_OFFICE} time-value"),
            }
            st["paras"] = []
        elif name == ANNOT:
            st["annot"] += 1
        elif st["cell"] is not None and not st["annot"]:
            if name == P:
                st["paras"].append([])
            elif st["paras"]:
                if name == S:
                    st["paras"][-1].append(" " * min(_ods_repeat(attrs, f"{_ODS_TEXT} c"), 1000))
                elif name == TAB:
                    st["paras"][-1].append("\t")
                elif name == BR:
                    st["paras"][-1].append("\n")

    def end(name):
        b = st["b"]
        if name == TABLE:
            st["depth_table"] -= 1
            if st["depth_table"] == 0 and b is not None:
                grids.append(b.rows)
                st["b"] = None
        elif b is None or st["depth_table"] != 1:
            return
        elif name == ROW:
            b.end_row(st.get("row_repeat", 1))
        elif name in (CELL, COVERED) and st["cell"] is not None:
            c = st["cell"]
            st["cell"] = None
            b.cell(_ods_value(c, st["paras"]), c["repeat"])
        elif name == ANNOT:
            st["annot"] -= 1

    def text(data):
        if st["cell"] is not None and not st["annot"] and st["paras"]:
            st["paras"][-1].append(data)

    parser = _new_parser()
    parser.StartElementHandler = start
    parser.EndElementHandler = end
    parser.CharacterDataHandler = text
    with _zip_open_checked(zf, "content.xml", label, budget) as fh:
        _feed(parser, fh, label, budget)
    return names, grids


def _ods_value(c: dict, paras: list[list[str]]):
    kind = c["type"]
    if kind in ("float", "percentage", "currency") and c["value"] is not None:
        try:
            return float(c["value"])
        except ValueError:
            pass
    if kind == "boolean" and c["bool"] is not None:
        return "TRUE" if c["bool"].strip().lower() == "true" else "FALSE"
    if kind == "date" and c["date"]:
        d = c["date"]
        return d.replace("T", " ") if "T" in d else f"{d} 00:00:00"
    if kind == "time" and c["time"]:
        return c["time"]
    text = "\n".join("".join(p) for p in paras)
    return text if text.strip() != "" else None


# --------------------------------------------------------------------------- public


def file_kind(mode: int) -> str:
    """What a file that is not a regular file is, in words ("a folder", "a device", ...)."""
    return ("a folder" if stat.S_ISDIR(mode) else
            "a named pipe (FIFO)" if stat.S_ISFIFO(mode) else
            "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) else
            "a socket" if stat.S_ISSOCK(mode) else "not a regular file")


def read_regular_file(path, limit: int, refuse) -> bytes:
    """The bytes of ``path`` if it is a regular file of at most ``limit`` bytes.

    Opened without blocking (a FIFO or device never blocks or streams forever) and
    checked with fstat on the open descriptor, so the file read is the file checked.
    ``refuse(kind, size)`` makes the exception raised otherwise: ``kind`` is
    :func:`file_kind`'s words for a file that is not regular (``size`` None), or None
    when the file is too large (``size`` its size, or None when it grew while being
    read). OSError from opening or reading passes through.
    """
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise refuse(file_kind(st.st_mode), None)
        if st.st_size > limit:
            raise refuse(None, st.st_size)
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, 1 << 20)
            if not chunk:
                break
            total += len(chunk)
            if total > limit:  # grew while being read
                raise refuse(None, None)
            chunks.append(chunk)
        return b"".join(chunks)
    finally:
        os.close(fd)


def _read_regular_file(p: Path, label: str) -> bytes:
    """The bytes of ``p`` if it is a regular file of at most MAX_FILE_BYTES (ReadError if not)."""

    def refuse(kind, size):
        if kind == "a folder":
            return ReadError(f"{label} is a folder, not a file.")
        if kind is not None:
            return ReadError(f"{label} is {kind}, not a regular file; Ballast reads only regular files.")
        if size is not None:
            return ReadError(f"{label} is {size:,} bytes, larger than the {MAX_FILE_BYTES:,} bytes Ballast "
                             "reads; split it or save only the columns needed.")
        return ReadError(f"{label} is larger than the {MAX_FILE_BYTES:,} bytes Ballast reads; split it or "
                         "save only the columns needed.")

    return read_regular_file(p, MAX_FILE_BYTES, refuse)


def read_table(path, sheet=None, *, decimal: str | None = None, encoding: str | None = None) -> Table:
    """Read a spreadsheet export into a :class:`Table`.

    Parameters
    ----------
    path : str or os.PathLike
        CSV/TSV/semicolon/white-space text, XLSX or ODS file. Only read, never written.
    sheet : str or int, optional
        Workbook sheet by name or 0-based position. Default: the first sheet (or,
        when it holds no table of numbers, the first sheet that does; a note says so).
        Ignored for text files.
    decimal : {".", ","}, optional
        Decimal mark of text cells; detected when not given.
    encoding : str, optional
        Text encoding (e.g. ``"cp1252"``); detected when not given (byte-order
        mark, UTF-16 byte pattern, UTF-8, else CP1252/Latin-1).

    Returns
    -------
    Table

    Raises
    ------
    ReadError
        With one sentence naming the file and the problem: missing file, folder,
        no permission, empty, binary, damaged workbook, unknown sheet, header
        without data, a single column.

    Examples
    --------
    >>> table = read_table("sample_sets/01_photometric_calibration.csv")  # doctest: +SKIP
    >>> table.columns, table.units["Concentration"]                       # doctest: +SKIP
    (['Concentration', 'Absorbance'], 'mg/L')
    """
    p = Path(os.fspath(path))
    label = f"'{p.name or str(p)}'"
    if decimal is not None and decimal not in (".", ","):
        raise ReadError(f"decimal must be '.' or ',', not {decimal!r} (reading {label}).")
    try:
        data = _read_regular_file(p, label)
    except ReadError:
        raise
    except FileNotFoundError:
        raise ReadError(f"{label} does not exist (it may have been moved, renamed or deleted).") from None
    except IsADirectoryError:
        raise ReadError(f"{label} is a folder, not a file.") from None
    except PermissionError:
        raise ReadError(f"{label} cannot be opened: permission denied.") from None
    except OSError as exc:
        raise ReadError(f"{label} cannot be read: {exc.strerror or exc}.") from None
    if not data:
        raise ReadError(f"{label} is empty (0 bytes).")
    digest = hashlib.sha256(data).hexdigest()
    kind = _container(data, p, label)
    if kind in ("xlsx", "ods"):
        return _read_workbook(data, kind, sheet, label=label, source=str(p), sha256=digest, decimal=decimal)
    text, enc_name = _decode(data, encoding, label)
    _check_text(text, label)
    utf8 = None
    if enc_name == "UTF-8":
        utf8 = data
    elif enc_name == "UTF-8 with BOM":
        utf8 = data[3:]
    del data
    wide = text.count("\n", 0, 65536) < 8 and len(text) > 65536  # long lines: thousands of columns
    with _collector_paused(wide):
        table = _parse_text(text, label=label, source=str(p), sha256=digest, decimal=decimal,
                            encoding_name=enc_name, kind="text", utf8_bytes=utf8)
    if sheet not in (None, 0):
        table.notes.append(f"sheet={sheet!r} ignored: a text file has no sheets")
    if enc_name in ("CP1252", "Latin-1"):
        table.notes.insert(0, f"text is not UTF-8; read as {enc_name}")
    elif enc_name.startswith("UTF-16"):  # the decoding belongs in the record too
        table.notes.insert(0, f"text read as {enc_name}")
    return table


def read_clipboard_text(text: str, *, decimal: str | None = None) -> Table:
    """Parse text pasted from a spreadsheet (tab, semicolon or space separated).

    Same rules as :func:`read_table`; ``source`` is ``"clipboard"`` and ``sha256``
    is taken over the UTF-8 bytes of the text.
    """
    if not isinstance(text, str):
        raise ReadError("the pasted content is not text.")
    label = "the pasted text"
    if decimal is not None and decimal not in (".", ","):
        raise ReadError(f"decimal must be '.' or ',', not {decimal!r} (reading {label}).")
    text = text.lstrip("\ufeff")
    if not text.strip():
        raise ReadError("the pasted text is empty.")
    _check_text(text, label)
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return _parse_text(text, label=label, source="clipboard", sha256=digest, decimal=decimal,
                       encoding_name=None, kind="clipboard")
