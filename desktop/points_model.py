"""The points table: a Qt table model over the document's points.

The model is an adapter: it formats the document's arrays when the view asks and
turns edits (the "used" check box, the exclusion reason) into undoable commands. Row
``i`` is always point ``i``; sorting goes through :class:`SortProxy` (see
:func:`make_proxy`), which sorts with one numpy argsort over the column's values, so
the row identity survives any sort order and a 1e5-row sort takes milliseconds (Qt's
sorting proxy compared rows one pair at a time through Python and took 10-25 s).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from PySide6.QtCore import QAbstractProxyModel, QAbstractTableModel, QModelIndex, Qt, QThread
from PySide6.QtGui import QBrush, QColor, QFont
from PySide6.QtWidgets import QStyledItemDelegate

from .commands import MaskCommand, ReasonCommand
from .document import Document

COLUMNS = ("#", "x", "y", "sigma_y", "fitted", "residual", "std. residual", "weight", "status", "reason")
COL = {name: i for i, name in enumerate(COLUMNS)}
STATUS_TEXT = ("used", "down-weighted", "excluded")
#: role giving the sortable raw value of a cell
SORT_ROLE = Qt.UserRole + 1

def _role(role) -> int:
    return role if isinstance(role, int) else int(role.value)


_DISPLAY, _EDIT, _CHECK, _ALIGN = (_role(Qt.DisplayRole), _role(Qt.EditRole), _role(Qt.CheckStateRole),
                                   _role(Qt.TextAlignmentRole))
_BACKGROUND, _FOREGROUND, _FONT, _TOOLTIP = (_role(Qt.BackgroundRole), _role(Qt.ForegroundRole),
                                             _role(Qt.FontRole), _role(Qt.ToolTipRole))
_SORT = _role(SORT_ROLE)
_ROLES_SERVED = frozenset({_DISPLAY, _EDIT, _CHECK, _ALIGN, _BACKGROUND, _FOREGROUND, _FONT, _TOOLTIP, _SORT})
_LEFT = Qt.AlignLeft | Qt.AlignVCenter
_RIGHT = Qt.AlignRight | Qt.AlignVCenter
_INF = float("inf")

_GREY = QBrush(QColor(120, 120, 120))
_EXCLUDED_BG = QBrush(QColor(255, 236, 230))
_DOWN_BG = QBrush(QColor(255, 248, 220))
_FLAG_BG = QBrush(QColor(226, 214, 245))
_NCOL = len(COLUMNS)
#: display formats of the computed columns (narrow, so that the whole table fits beside
#: the plot; the data columns keep 6 significant digits, sorting uses the raw values)
_FORMATS = {"fitted": "{:.6g}", "residual": "{:.4g}", "std. residual": "{:.3g}", "weight": "{:.2f}"}
#: widest a column gets from "fit to contents" (px); "reason" takes what is left
_COLUMN_CAPS = {"#": 56, "x": 110, "y": 110, "sigma_y": 96, "fitted": 96, "residual": 96,
                "std. residual": 96, "weight": 64, "status": 128}


@dataclass
class ExtraColumn:
    """A column appended after :data:`COLUMNS` (point diagnostics).

    ``values`` holds one float per point (NaN = blank); ``flagged`` marks cells drawn
    highlighted, with ``flag_tip`` as their tooltip.
    """

    name: str
    values: np.ndarray
    fmt: str = "{:.4g}"
    tooltip: str = ""
    flagged: np.ndarray | None = None
    flag_tip: str = ""


class PointsModel(QAbstractTableModel):
    """Table model: one row per point, columns :data:`COLUMNS`.

    Parameters
    ----------
    document
        The document shown.
    push
        Callable taking a ``QUndoCommand`` (normally ``QUndoStack.push``); edits made
        in the table go through it.
    """

    def __init__(self, document: Document, push: Callable, parent=None):
        super().__init__(parent)
        self.document = document
        self.push = push
        self._italic = QFont()
        self._italic.setItalic(True)
        self._bold = QFont()
        self._bold.setBold(True)
        self.extra: list[ExtraColumn] = []
        #: rows marked in the "#" column (high-leverage points), with the tooltip
        self.row_flags: np.ndarray | None = None
        self.row_flag_tip = ""
        self._cache_result()
        document.subscribe(self._on_document)

    # ---------------------------------------------------------- document events
    def _cache_result(self):
        doc = self.document
        res = doc.result
        n = doc.n
        if res is not None and len(res.weights) == n:
            self._fitted = np.asarray(res.fitted, float)
            self._resid = np.asarray(res.residuals, float)
            self._std = np.asarray(res.std_residuals, float)
            self._w = np.asarray(res.weights, float)
        else:
            self._fitted = self._resid = self._std = self._w = None
        self._status = doc.status()

    def _on_document(self, event, **info):
        if event == "data":
            self.beginResetModel()
            self._cache_result()
            self.endResetModel()
        elif event in ("mask", "reasons"):
            idx = info.get("indices")
            self._status = self.document.status()
            if idx is None or len(idx) == 0:
                return
            lo, hi = int(np.min(idx)), int(np.max(idx))
            self.dataChanged.emit(self.index(lo, 0), self.index(hi, len(COLUMNS) - 1))
        elif event == "result":
            self._cache_result()
            if self.document.n:
                self.dataChanged.emit(self.index(0, COL["fitted"]),
                                      self.index(self.document.n - 1, len(COLUMNS) - 1))
        elif event == "settings" and self.document.n:
            # the result shown is now stale: repaint in grey
            self.dataChanged.emit(self.index(0, COL["fitted"]),
                                  self.index(self.document.n - 1, COL["weight"]))

    # ---------------------------------------------------------- Qt interface
    def rowCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else self.document.n

    def columnCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else _NCOL + len(self.extra)

    def set_extra_columns(self, columns: list[ExtraColumn]) -> None:
        """Replace the columns shown after :data:`COLUMNS` (empty list: none)."""
        old, new = len(self.extra), len(columns)
        if new < old:
            self.beginRemoveColumns(QModelIndex(), _NCOL + new, _NCOL + old - 1)
            self.extra = list(columns)
            self.endRemoveColumns()
        elif new > old:
            self.beginInsertColumns(QModelIndex(), _NCOL + old, _NCOL + new - 1)
            self.extra = list(columns)
            self.endInsertColumns()
        else:
            self.extra = list(columns)
        if new and self.document.n:
            self.headerDataChanged.emit(Qt.Horizontal, _NCOL, _NCOL + new - 1)
            self.dataChanged.emit(self.index(0, _NCOL), self.index(self.document.n - 1, _NCOL + new - 1))

    def set_row_flags(self, flags, tip: str = "") -> None:
        """Mark rows in the "#" column (None: no marks)."""
        self.row_flags = None if flags is None else np.asarray(flags, bool)
        self.row_flag_tip = tip
        if self.document.n:
            self.dataChanged.emit(self.index(0, 0), self.index(self.document.n - 1, 0))

    def _extra_data(self, row: int, col: ExtraColumn, r: int):
        v = float(col.values[row]) if row < len(col.values) else float("nan")
        flagged = col.flagged is not None and row < len(col.flagged) and bool(col.flagged[row])
        if r == _DISPLAY or r == _EDIT:
            return "" if v != v else col.fmt.format(v)
        if r == _SORT:
            return _INF if v != v else v
        if r == _ALIGN:
            return _RIGHT
        if r == _BACKGROUND:
            return _FLAG_BG if flagged else None
        if r == _FONT:
            return self._bold if flagged else None
        if r == _TOOLTIP:
            return col.flag_tip if flagged and col.flag_tip else (col.tooltip or None)
        return None

    def headerData(self, section, orientation, role=Qt.DisplayRole):
        if orientation == Qt.Horizontal and section >= _NCOL and section - _NCOL < len(self.extra):
            col = self.extra[section - _NCOL]
            if role == Qt.DisplayRole:
                return col.name
            if role == Qt.ToolTipRole:
                return col.tooltip or None
            return None
        if role != Qt.DisplayRole:
            return None
        if orientation == Qt.Vertical:
            return None
        m = self.document.measurements
        name = COLUMNS[section]
        if name == "x":
            return m.label("x")
        if name == "y":
            return m.label("y")
        if name == "sigma_y":
            return f"u({m.y_name})" if m.sigma is not None else "sigma_y"
        if name == "#":  # file rows, as every copy and the report name the points
            return "row" if m.source_rows is not None else "#"
        return name

    def raw(self, row: int, col: int):
        """The unformatted value of a cell (float, int or str; NaN where none)."""
        doc = self.document
        m = doc.measurements
        if col >= _NCOL:
            v = self.extra[col - _NCOL].values
            return float(v[row]) if row < len(v) else float("nan")
        name = COLUMNS[col]
        if name == "#":  # the one identifier: the file row (the place in the data without one)
            fr = m.file_row(row)
            return row + 1 if fr is None else fr
        if name == "x":
            return float(m.x[row])
        if name == "y":
            return float(m.y[row])
        if name == "sigma_y":
            return float(m.sigma[row]) if m.sigma is not None else float("nan")
        if name == "status":
            return int(self._status[row]) if row < len(self._status) else 0
        if name == "reason":
            return doc.reasons[row]
        arr = {"fitted": self._fitted, "residual": self._resid,
               "std. residual": self._std, "weight": self._w}[name]
        if arr is None:
            return float("nan")
        return float(arr[row])

    def sort_keys(self, col: int) -> np.ndarray:
        """The values of one whole column as an array to sort by (NaN -> +inf), the
        same order as the cells' ``SORT_ROLE`` gives, without a Python call per row."""
        doc = self.document
        m = doc.measurements
        n = doc.n
        if col >= _NCOL:
            v = np.full(n, np.nan)
            vals = np.asarray(self.extra[col - _NCOL].values, float)[:n]
            v[:vals.size] = vals
        else:
            name = COLUMNS[col]
            if name == "#":
                rows = m.source_rows
                return np.asarray(rows, np.int64) if rows is not None else np.arange(n)
            if name == "reason":
                return np.array(doc.reasons, dtype=str) if n else np.zeros(0, dtype=str)
            if name == "status":
                st = np.zeros(n, np.int64)
                k = min(n, len(self._status))
                st[:k] = np.asarray(self._status, np.int64)[:k]
                return st
            if name == "x":
                v = np.array(m.x, float)
            elif name == "y":
                v = np.array(m.y, float)
            elif name == "sigma_y":
                v = np.array(m.sigma, float) if m.sigma is not None else np.full(n, np.nan)
            else:
                arr = {"fitted": self._fitted, "residual": self._resid,
                       "std. residual": self._std, "weight": self._w}[name]
                v = np.full(n, np.nan) if arr is None else np.array(arr, float)
        v[np.isnan(v)] = _INF
        return v

    def data(self, index, role=Qt.DisplayRole):
        # roles are compared as plain ints: comparing enum members costs ~1 us each,
        # and a repaint asks for thousands of cells
        r = _role(role)
        if r not in _ROLES_SERVED or not index.isValid():
            return None
        row, col = index.row(), index.column()
        if col >= _NCOL:
            return self._extra_data(row, self.extra[col - _NCOL], r)
        name = COLUMNS[col]
        doc = self.document
        if r == _DISPLAY or r == _EDIT:
            v = self.raw(row, col)
            if name == "status":
                return STATUS_TEXT[v]
            if name == "#":
                return v
            if name == "reason":
                return str(v)
            if v != v or v in (_INF, -_INF):
                return ""
            fmt = _FORMATS.get(name)
            return fmt.format(v) if fmt else f"{v:.6g}"
        if r == _SORT:
            v = self.raw(row, col)
            if isinstance(v, float) and v != v:
                return _INF
            return v
        if r == _CHECK:
            if name != "status":
                return None
            return Qt.Unchecked if doc.excluded[row] else Qt.Checked
        if r == _ALIGN:
            return _LEFT if name in ("status", "reason") else _RIGHT
        if r == _BACKGROUND:
            if name == "#" and self.row_flags is not None and row < len(self.row_flags) \
                    and self.row_flags[row]:
                return _FLAG_BG
            st = self._status[row] if row < len(self._status) else 0
            return _EXCLUDED_BG if st == 2 else (_DOWN_BG if st == 1 else None)
        if r == _FOREGROUND:
            if doc.stale and name in ("fitted", "residual", "std. residual", "weight"):
                return _GREY
            return None
        if r == _FONT:
            return self._italic if doc.excluded[row] else None
        if r == _TOOLTIP:
            if name == "#" and self.row_flags is not None and row < len(self.row_flags) \
                    and self.row_flags[row]:
                return self.row_flag_tip or None
            if name == "#":
                fr = doc.measurements.file_row(row)
                return (f"row {fr} of the file (point {row + 1} of the data)" if fr is not None
                        else f"point {row + 1} of the data (file rows not known)")
            if name == "status":
                return "Uncheck to exclude this point; check to restore it"
            if name == "reason" and doc.excluded[row]:
                t = doc.times[row]
                return f"Excluded {t}" if t else None
            if name == "weight":
                return "Robust weight: 1 = counted fully, below 0.5 = down-weighted"
        return None

    def flags(self, index):
        f = super().flags(index)
        if not index.isValid() or index.column() >= _NCOL:
            return f
        name = COLUMNS[index.column()]
        if name == "status":
            f |= Qt.ItemIsUserCheckable
        if name == "reason" and self.document.excluded[index.row()]:
            f |= Qt.ItemIsEditable
        return f

    def setData(self, index, value, role=Qt.EditRole):
        if not index.isValid():
            return False
        row = index.row()
        if index.column() >= _NCOL:
            return False
        name = COLUMNS[index.column()]
        doc = self.document
        if name == "status" and role == Qt.CheckStateRole:
            state = Qt.CheckState(value) if not isinstance(value, Qt.CheckState) else value
            exclude = state == Qt.Unchecked
            change = doc.make_mask_change([row], exclude)
            if change.is_empty:
                return False
            self.push(MaskCommand(doc, change))
            return True
        if name == "reason" and role == Qt.EditRole:
            text = str(value).strip()
            if text == doc.reasons[row]:
                return False
            self.push(ReasonCommand(doc, row, text))
            return True
        return False


class ReasonDelegate(QStyledItemDelegate):
    """The editor of the reason column. Qt writes a reason into the record on Return
    and when the editor loses focus; :meth:`commit_open` writes it while the editor is
    still open, for a save, copy or close that comes first (a shortcut or a menu takes
    no focus from the editor). The window registers it with
    :meth:`Document.add_pending_edit`."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self._editor = None

    def createEditor(self, parent, option, index):  # Qt's name
        self._editor = super().createEditor(parent, option, index)
        return self._editor

    def destroyEditor(self, editor, index):  # Qt's name
        if editor is self._editor:
            self._editor = None
        super().destroyEditor(editor, index)

    def commit_open(self) -> None:
        """Write the text of an open reason editor into the record (as Return would);
        only on the thread that owns the editor (the GUI thread)."""
        if self._editor is not None and QThread.currentThread() is self.thread():
            self.commitData.emit(self._editor)


def make_proxy(model: PointsModel, parent=None) -> "SortProxy":
    """A sorting proxy over ``model`` that sorts by the raw cell values.

    Rows keep their place while values change after a refit, and sort again when the
    analyst clicks a header.
    """
    return SortProxy(model, parent)


class SortProxy(QAbstractProxyModel):
    """Rows of a :class:`PointsModel` in a sorted order (one ``np.argsort`` per sort).

    ``order[k]`` is the point shown in row ``k`` (None: unsorted, row = point). Values
    that are blank (NaN) sort as +inf, as the cells' ``SORT_ROLE`` says; ties keep the
    point order ascending and the reverse descending (as Qt's sorting proxy did). A sort moves the persistent indexes
    (selection, current cell) with their points, like Qt's own sorting proxy. The order
    is not renewed when values change (a refit), only on a header click or new data.
    """

    def __init__(self, model: PointsModel, parent=None):
        super().__init__(parent)
        self._order = None     # proxy row -> point (None: identity)
        self._inverse = None   # point -> proxy row
        self._sort_col = -1
        self._sort_order = Qt.AscendingOrder
        self.setSourceModel(model)
        model.modelAboutToBeReset.connect(self.beginResetModel)
        model.modelReset.connect(self._source_reset)
        model.dataChanged.connect(self._source_data_changed)
        model.headerDataChanged.connect(self.headerDataChanged)
        model.columnsAboutToBeInserted.connect(
            lambda parent, a, b: self.beginInsertColumns(QModelIndex(), a, b))
        model.columnsInserted.connect(lambda *_: self.endInsertColumns())
        model.columnsAboutToBeRemoved.connect(
            lambda parent, a, b: self.beginRemoveColumns(QModelIndex(), a, b))
        model.columnsRemoved.connect(lambda *_: self.endRemoveColumns())

    # ------------------------------------------------------------ structure
    def rowCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else self.sourceModel().rowCount()

    def columnCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else self.sourceModel().columnCount()

    def index(self, row, column, parent=QModelIndex()):
        if parent.isValid() or not (0 <= row < self.rowCount() and 0 <= column < self.columnCount()):
            return QModelIndex()
        return self.createIndex(row, column)

    def parent(self, index=None):  # Qt's overloads: QObject.parent() and the model's
        if index is None:
            return super().parent()
        return QModelIndex()

    def sibling(self, row, column, index):
        return self.index(row, column)

    def hasChildren(self, parent=QModelIndex()):
        return not parent.isValid() and self.rowCount() > 0

    def source_row(self, row: int) -> int:
        return int(self._order[row]) if self._order is not None else int(row)

    def proxy_row(self, point: int) -> int:
        return int(self._inverse[point]) if self._inverse is not None else int(point)

    def mapToSource(self, index):
        if not index.isValid():
            return QModelIndex()
        row = index.row()
        if self._order is not None:
            if row >= self._order.size:
                return QModelIndex()
            row = int(self._order[row])
        return self.sourceModel().index(row, index.column())

    def mapFromSource(self, index):
        if not index.isValid():
            return QModelIndex()
        row = index.row()
        if self._inverse is not None:
            if row >= self._inverse.size:
                return QModelIndex()
            row = int(self._inverse[row])
        return self.createIndex(row, index.column())

    # ------------------------------------------------------------ cells (straight through)
    def data(self, index, role=Qt.DisplayRole):
        if not index.isValid():
            return None
        src = self.sourceModel()
        return src.data(src.index(self.source_row(index.row()), index.column()), role)

    def headerData(self, section, orientation, role=Qt.DisplayRole):
        """The model's headers; in the table a long "name (unit)" header has its unit on
        a second line, so the column need not be as wide as the whole label."""
        if orientation == Qt.Vertical:
            return None
        value = self.sourceModel().headerData(section, orientation, role)
        if role == Qt.DisplayRole and isinstance(value, str) and len(value) > 12 \
                and value.endswith(")") and " (" in value:
            head, unit = value.rsplit(" (", 1)
            return f"{head}\n({unit}"
        return value

    # ------------------------------------------------------------ sorting
    def sortColumn(self) -> int:
        return self._sort_col

    def sortOrder(self):
        return self._sort_order

    def _compute_order(self, column: int, order) -> np.ndarray | None:
        src = self.sourceModel()
        n = src.rowCount()
        if column < 0 or column >= src.columnCount() or n == 0:
            return None
        key = src.sort_keys(column)
        asc = np.argsort(key, kind="stable")
        # descending is the ascending order reversed (ties then in reverse point order),
        # as Qt's sorting proxy gave them
        return asc if order == Qt.AscendingOrder else asc[::-1].copy()

    def _set_order(self, order: np.ndarray | None):
        self._order = order
        if order is None:
            self._inverse = None
        else:
            inv = np.empty(order.size, np.intp)
            inv[order] = np.arange(order.size)
            self._inverse = inv

    def sort(self, column, order=Qt.AscendingOrder):
        self.layoutAboutToBeChanged.emit()
        old = self.persistentIndexList()
        points = [(self.source_row(i.row()), i.column()) for i in old]
        self._sort_col = int(column)
        self._sort_order = order
        self._set_order(self._compute_order(int(column), order))
        new = [self.createIndex(self.proxy_row(p), c) for p, c in points]
        self.changePersistentIndexList(old, new)
        self.layoutChanged.emit()

    # ------------------------------------------------------------ source signals
    def _source_reset(self):
        self._set_order(self._compute_order(self._sort_col, self._sort_order))
        self.endResetModel()

    def _source_data_changed(self, top_left, bottom_right, roles=()):
        if self._order is None:
            a, b = top_left.row(), bottom_right.row()
        else:  # the changed points are spread over the sorted rows
            a, b = 0, self.rowCount() - 1
        if b >= a:
            self.dataChanged.emit(self.index(a, top_left.column()),
                                  self.index(b, bottom_right.column()), roles)


class ColumnFitter:
    """Fits the points table's column widths to their contents when a data set (and its
    first result) arrives, each capped (:data:`_COLUMN_CAPS`), so that x to reason fit
    beside the plot without scrolling. Widths the analyst drags stay until the next data
    set. Only a few rows are measured, so this is cheap at any size."""

    SAMPLE_ROWS = 60

    def __init__(self, view, document: Document):
        from PySide6.QtCore import QTimer

        self.view = view
        self.document = document
        self._pending = False
        self._had_result = False
        self._timer = QTimer(view)
        self._timer.setSingleShot(True)
        self._timer.setInterval(0)
        self._timer.timeout.connect(self.fit)
        header = view.horizontalHeader()
        header.setResizeContentsPrecision(self.SAMPLE_ROWS)
        header.setStretchLastSection(True)
        header.setMinimumSectionSize(28)
        # no bold titles for a selected row (Qt's highlighted sections): the widths are
        # measured for the plain titles, and a bold 'std. residual' was clipped at 1000 px
        # (the selected rows show the selection)
        header.setHighlightSections(False)
        document.subscribe(self._on_document)

    def _on_document(self, event, **info):
        if event == "data":
            self._had_result = False
            self._timer.start()
        elif event == "result" and not self._had_result and self.document.result is not None:
            self._had_result = True
            self._timer.start()
        elif event == "result" and self.document.result is not None:
            self.grow()

    #: columns whose values change with each fit
    COMPUTED = ("fitted", "residual", "std. residual", "weight")

    def grow(self) -> None:
        """After a refit: widen a computed column whose new values no longer fit (a
        residual of -2.441e-05 after an exclusion); never narrow one (the analyst's
        widths stay)."""
        view = self.view
        header = view.horizontalHeader()
        for name in self.COMPUTED:
            c = COL[name]
            need = min(view.sizeHintForColumn(c), _COLUMN_CAPS.get(name, 96))
            if need > header.sectionSize(c):
                header.resizeSection(c, need)

    def fit(self) -> None:
        view = self.view
        model = view.model()
        if model is None:
            return
        header = view.horizontalHeader()
        fm = header.fontMetrics()
        ncol = model.columnCount()
        for c in range(ncol):
            name = COLUMNS[c] if c < _NCOL else None
            if name == "reason":  # stretched to the rest (it may be the last column)
                header.resizeSection(c, fm.horizontalAdvance("reason") + 10)
                continue
            # the cells' own width, and the header's text with a small margin (the
            # header's size hint also reserves room for a sort arrow on every column)
            text = str(model.headerData(c, Qt.Horizontal) or "")
            text_w = max(fm.horizontalAdvance(line) for line in text.split("\n"))
            width = max(view.sizeHintForColumn(c), text_w + 10)
            if name == "#":  # the widest row number, wherever it is
                width = max(width, view.fontMetrics().horizontalAdvance(str(model.rowCount())) + 12)
            header.resizeSection(c, min(width, _COLUMN_CAPS.get(name, 96)))
