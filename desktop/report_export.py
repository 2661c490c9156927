"""Getting results out of the window: copy formats, the report, CSV and plot exports.

* :meth:`ReportExporter.copy` puts the estimates on the clipboard in one of the
  formats of :func:`fitcore.report.estimates_text`; the HTML format (and the default
  copy) carries both HTML and plain text, so a rich-text editor pastes a table and a
  plain editor the text.
* :meth:`ReportExporter.write_html` writes the report document that
  :func:`fitcore.report_html.report_html` builds (the same function the batch and
  the library call); the window only gathers its inputs: the result, data set,
  exclusion record, sign-off names and the analyses done on the fit shown.
  :meth:`ReportExporter.write_pdf` prints the same document to PDF with Qt's own
  printing (``QPrinter`` + ``QTextDocument``, the plot painted as vector from its
  SVG), no extra program needed.
* :meth:`ReportExporter.write_curve_csv` / :meth:`write_points_csv` write the fitted
  curve and band on a fine grid and the per-point residuals and weights;
  :meth:`write_plot` writes the plot as PNG or SVG at a chosen size.

File names and sizes are asked through module functions (:func:`ask_save_path`,
:func:`ask_plot_size`) that tests replace. Nothing here changes the document, and the
measurement file is never written: every export refuses to overwrite it.
"""
from __future__ import annotations

import html
import os
from pathlib import Path

import numpy as np
from pyqtgraph import functions as fn
from PySide6.QtCore import QBuffer, QByteArray, QIODevice, QMarginsF, QMimeData, QPointF, QRectF, QSizeF, Qt
from PySide6.QtGui import (
    QAbstractTextDocumentLayout, QBrush, QGuiApplication, QImage, QPageLayout, QPageSize, QPainter,
    QPen, QTextDocument,
)
from PySide6.QtSvg import QSvgRenderer
from PySide6.QtWidgets import QApplication, QFileDialog, QInputDialog

from . import dialogs
from .plot_view import COLOURS, EXCLUDED, N_LEVELS, PlotView, PointsItem, level_size
from fitcore.report import DataRecord, curve_csv, points_csv
from fitcore.report_html import REPORT_MAX_ROWS, REPORT_PLOT_SIZE, Unknowns, estimates_copy, report_plot
from fitcore.report_html import report_html as build_report_html
from fitcore.work import curve_grid
from fitcore.report_plot import LEGEND_TEXT
from fitcore.session import temporary_beside, write_atomically

LEVEL = 0.95
#: points in the curve/band CSV
CURVE_POINTS = 1001
#: rows of the points table the PDF prints (Qt's text layout of long tables takes
#: seconds); the HTML prints fitcore.report_html.REPORT_MAX_ROWS
PDF_MAX_ROWS = 500
#: what stands for the plot in the HTML a QTextDocument lays out (replaced by an object
#: that paints the SVG, so the PDF's plot is vector)
PLOT_MARK = "[[ballast-report-plot]]"
#: the sign-off names, remembered in the window's settings
SIGNOFF_KEYS = ("analyst", "reviewer", "review_date")

#: (key, menu text, fitcore format, full precision)
COPY_FORMATS = (
    ("plain", "&Plain text", "plain", False),
    ("tsv", "&Tab-separated (spreadsheet)", "tsv", False),
    ("tsv_full", "Tab-separated, &full precision", "tsv", True),
    ("markdown", "&Markdown table", "markdown", False),
    ("latex", "&LaTeX tabular", "latex", False),
    ("siunitx", "LaTeX with &siunitx", "siunitx", False),
    ("html", "&HTML and plain text (rich-text editors)", "html", False),
)

LEGEND = LEGEND_TEXT  # the report plot's key (fitcore.report_plot)


# ============================================================================ hooks
def ask_save_path(parent, title: str, start: str, filt: str) -> str:
    """A file name to write, or "" when cancelled (tests replace this function)."""
    path, _ = QFileDialog.getSaveFileName(parent, title, start, filt)
    return path


def ask_signoff(parent, current: dict):
    """The sign-off names as a dict (analyst, reviewer, review_date), or None when
    cancelled (tests replace this function)."""
    from PySide6.QtWidgets import QDialog, QDialogButtonBox, QFormLayout, QLineEdit

    dlg = QDialog(parent)
    dlg.setWindowTitle("Report sign-off")
    form = QFormLayout(dlg)
    edits = {}
    for key, label in zip(SIGNOFF_KEYS, ("Analyst", "Reviewer", "Date of review")):
        edits[key] = QLineEdit(current.get(key, ""))
        form.addRow(label, edits[key])
    buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
    buttons.accepted.connect(dlg.accept)
    buttons.rejected.connect(dlg.reject)
    form.addRow(buttons)
    if dlg.exec() != QDialog.Accepted:  # safe: Qt dialog event loop
        return None
    return {k: e.text().strip() for k, e in edits.items()}


def ask_plot_size(parent, width: int, height: int):
    """``(width, height)`` in pixels for a plot export, or None (replaceable)."""
    text, ok = QInputDialog.getText(parent, "Plot size", "Width x height in pixels:",
                                    text=f"{width} x {height}")
    if not ok:
        return None
    return parse_size(text)


def parse_size(text: str):
    """``"1200 x 800"`` (also ``1200x800``, ``1200,800``) -> ``(1200, 800)``."""
    parts = [p for p in text.lower().replace("×", "x").replace(",", "x").replace("*", "x")
             .split("x") if p.strip()]
    if len(parts) != 2:
        raise ValueError(f"give the size as width x height, e.g. 1200 x 800 (not {text!r})")
    try:
        w, h = (int(float(p)) for p in parts)
    except ValueError:
        raise ValueError(f"give the size as two whole numbers, e.g. 1200 x 800 (not {text!r})") \
            from None
    if not (16 <= w <= 20000 and 16 <= h <= 20000):
        raise ValueError(f"a plot size must be between 16 and 20000 pixels a side (got {w} x {h})")
    return w, h


# ============================================================================ helpers
_EXIT_GUARD = []


def _clear_internal_clipboard():
    app = QGuiApplication.instance()
    if app is not None and QGuiApplication.platformName() in ("offscreen", "minimal"):
        app.clipboard().clear()


class _busy:
    """Wait cursor while a report is composed."""

    def __enter__(self):
        QApplication.setOverrideCursor(Qt.WaitCursor)

    def __exit__(self, *exc):
        QApplication.restoreOverrideCursor()
        return False


def _guard_clipboard_at_exit():
    """On platforms whose clipboard lives inside the process (offscreen, minimal: tests,
    scripts) Qt 6.11 crashes at interpreter exit when it still holds a QMimeData set
    from Python; clear it first. The contents die with the process there anyway; a
    desktop platform's clipboard is left alone."""
    if not _EXIT_GUARD:
        import atexit

        atexit.register(_clear_internal_clipboard)
        _EXIT_GUARD.append(True)


def _h(s) -> str:
    return html.escape(str(s), quote=True)


def _same_file(a: str, b: str) -> bool:
    try:
        return bool(a) and os.path.exists(a) and os.path.exists(b) and os.path.samefile(a, b)
    except OSError:
        return False


# ============================================================================ plot images
class _VectorPoints(PointsItem):
    """The window's points item painted as vector circles (for SVG export)."""

    def paint(self, p, option, widget=None):
        # only public state of PointsItem: positions, size levels and styles
        x, y = np.asarray(self.x, float), np.asarray(self.y, float)
        idx = np.flatnonzero(np.isfinite(x) & np.isfinite(y))
        if idx.size == 0:
            return
        style = np.asarray(self.style, np.int64)
        level = np.asarray(self.level, np.int64)
        # paint order: used, down-weighted, excluded; within a style larger symbols first
        idx = idx[np.lexsort((-level[idx], style[idx]))]
        pts = fn.transformCoordinates(p.transform(), np.vstack([x[idx], y[idx]]))
        p.save()
        p.resetTransform()
        p.setRenderHint(QPainter.Antialiasing, True)
        for k, i in enumerate(idx):
            st = int(self.style[i])
            fill, edge = COLOURS[st]
            lev = N_LEVELS - 1 if st == EXCLUDED else int(self.level[i])
            r = level_size(lev) * self.symbol_scale / 2
            c = QPointF(float(pts[0, k]), float(pts[1, k]))
            if st == EXCLUDED:
                p.setPen(QPen(edge, 1.6))
                p.setBrush(Qt.NoBrush)
                p.drawEllipse(c, r, r)
                q = r * 0.44
                p.drawLine(QPointF(c.x() - q, c.y() - q), QPointF(c.x() + q, c.y() + q))
                p.drawLine(QPointF(c.x() - q, c.y() + q), QPointF(c.x() + q, c.y() - q))
            else:
                p.setPen(QPen(edge, 1.0))
                p.setBrush(QBrush(fill))
                p.drawEllipse(c, r, r)
        p.restore()


class _ExportPlot:
    """A hidden copy of the window's plot at an exact pixel size (same view and options)."""

    def __init__(self, window, width: int, height: int):
        src = window.plot
        self.document = window.document
        self.view = PlotView(self.document, lambda _cmd: None)
        v = self.view
        self._keep = []
        v.setAttribute(Qt.WA_DontShowOnScreen, True)
        v.resize(int(width), int(height))
        v.set_band_visible(getattr(src, "show_band", True))
        if src.log_x or src.log_y:
            v.set_log(log_x=src.log_x, log_y=src.log_y)
        v.show()
        QApplication.processEvents()
        for a, b in ((src.data_plot, v.data_plot), (src.resid_plot, v.resid_plot)):
            (x0, x1), (y0, y1) = a.vb.viewRange()
            b.vb.setRange(xRange=(x0, x1), yRange=(y0, y1), padding=0)
        QApplication.processEvents()

    def use_vector_points(self):
        """Draw the points as vector circles (for SVG) instead of the pixmap atlas."""
        v = self.view
        for plot, name in ((v.data_plot, "points"), (v.resid_plot, "resid_points")):
            old = getattr(v, name)
            new = _VectorPoints(old.symbol_scale)
            new.set_points(old.x, old.y)
            new.set_style(old.level, old.style, np.zeros(old.x.size, bool))
            new.setZValue(old.zValue())
            old.setVisible(False)  # hidden, not removed: the plot view still refers to it
            plot.addItem(new)
            self._keep.append(new)
        arrows = getattr(v, "resid_arrows", None)
        if arrows is not None:  # pyqtgraph draws vector symbols when not from its atlas
            arrows.opts["useCache"] = False
        QApplication.processEvents()

    def image(self) -> QImage:
        return self.view.grab().toImage()

    def item_image(self, plot_item, width: int, height: int) -> QImage:
        """One plot (data or residual) alone, ``width`` x ``height`` pixels."""
        self.view.ci.removeItem(self.view.resid_plot if plot_item is self.view.data_plot
                                else self.view.data_plot)
        self.view.resize(int(width), int(height))
        QApplication.processEvents()
        return self.view.grab().toImage()

    def close(self):
        try:
            self.view.detach()
        finally:
            self.view.hide()
            self.view.deleteLater()


def plot_image(window, width: int, height: int) -> QImage:
    """The plot (data over residuals) as an image of exactly ``width`` x ``height`` px."""
    ex = _ExportPlot(window, width, height)
    try:
        return ex.image()
    finally:
        ex.close()


def write_plot_svg(window, path, width: int, height: int) -> None:
    """The plot as SVG at ``width`` x ``height`` (pyqtgraph's SVG exporter)."""
    from PySide6.QtCore import QRect, QRectF, QSize
    from PySide6.QtSvg import QSvgGenerator

    ex = _ExportPlot(window, width, height)
    try:
        ex.use_vector_points()
        data = QByteArray()
        buf = QBuffer(data)
        buf.open(QIODevice.WriteOnly)
        gen = QSvgGenerator()
        gen.setOutputDevice(buf)
        gen.setSize(QSize(int(width), int(height)))
        gen.setViewBox(QRect(0, 0, int(width), int(height)))
        gen.setResolution(96)  # so the drawing is width x height CSS pixels
        gen.setTitle("Ballast plot")
        gen.setDescription("data, fitted curve, confidence band and residuals")
        p = QPainter()
        if not p.begin(gen):
            raise OSError(f"could not write {path}")
        try:
            p.setRenderHint(QPainter.Antialiasing, True)
            ex.view.render(p, QRectF(0, 0, width, height), ex.view.viewport().rect())
        finally:
            p.end()
        del gen
        buf.close()
        write_atomically(path, bytes(data), verify=check_svg)
    finally:
        ex.close()


# ============================================================================ checks
# Each writer goes through fitcore.session.write_atomically, which calls one of these on
# the written temporary file before it replaces the old file (a full disk or a cut
# write leaves the old file and an error for the user).
def _png_bytes(img: QImage) -> bytes:
    ba = QByteArray()
    buf = QBuffer(ba)
    buf.open(QIODevice.WriteOnly)
    ok = img.save(buf, "PNG")
    buf.close()
    if not ok:
        raise OSError("the plot could not be encoded as PNG")
    return bytes(ba)


def check_png(path) -> None:
    """A complete PNG: the signature, an IEND chunk at the end, and Qt decodes it."""
    with open(path, "rb") as fh:
        data = fh.read()
    if not data.startswith(b"\x89PNG\r\n\x1a\n") or not data.endswith(b"IEND\xaeB`\x82"):
        raise ValueError("the PNG file is incomplete")
    img = QImage()
    if not img.loadFromData(data, "PNG") or img.isNull():
        raise ValueError("the PNG file does not decode")


def check_pdf(path) -> None:
    """A complete PDF: the header and the end-of-file marker after its trailer."""
    with open(path, "rb") as fh:
        head = fh.read(8)
        fh.seek(0, os.SEEK_END)
        size = fh.tell()
        fh.seek(max(0, size - 2048))
        tail = fh.read()
    if not head.startswith(b"%PDF-") or b"%%EOF" not in tail or b"startxref" not in tail:
        raise ValueError("the PDF file is incomplete (no trailer)")


def install_printed_pdf(tmp, path) -> None:
    """Check the PDF printer's finished file ``tmp`` and write it over ``path``
    atomically (OSError, the old file kept, when either is incomplete)."""
    try:
        check_pdf(tmp)
    except ValueError as err:
        raise OSError(f"Qt's PDF printer did not finish the file ({err}); the disk may be full") from None
    with open(tmp, "rb") as fh:
        data = fh.read()
    write_atomically(path, data, verify=check_pdf)


def check_svg(path) -> None:
    """A complete SVG: XML that ends with the closing svg tag."""
    with open(path, "rb") as fh:
        data = fh.read()
    if b"<svg" not in data[:4096] or not data.rstrip().endswith(b"</svg>"):
        raise ValueError("the SVG file is incomplete")


# ============================================================================ PDF
#: layout width of the PDF page in CSS-like pixels (the report's plot is 900 wide)
PDF_LAYOUT_WIDTH = 960
FOOTER_HEIGHT = 28
#: the footer's type size in layout pixels (the report's small print is about 11)
FOOTER_FONT_PX = 11


def page_footer(page: int, pages: int) -> str:
    """The foot of every PDF page: ``"page 2 of 3"``."""
    return f"page {page} of {pages}"


PLOT_ANCHOR = "ballast-report-plot"


def _plot_rect(tdoc: QTextDocument):
    """Where the plot's reserved line lies in the laid-out document (layout units)."""
    svg = getattr(tdoc, "plot_svg", "")
    if not svg:
        return None, None
    layout = tdoc.documentLayout()
    block = tdoc.begin()
    while block.isValid():
        it = block.begin()
        while not it.atEnd():
            if PLOT_ANCHOR in it.fragment().charFormat().anchorNames():
                r = layout.blockBoundingRect(block)
                line = block.layout().lineAt(0)
                w, h = REPORT_PLOT_SIZE
                top = r.top() + line.y()  # over the anchor's blank line, its margin below
                return QRectF(r.left(), top, w, h), QSvgRenderer(QByteArray(svg.encode("utf-8")))
            it += 1
        block = block.next()
    return None, None


def paint_page(painter: QPainter, tdoc: QTextDocument, k: int, body_h: float) -> None:
    """Page ``k`` of ``tdoc`` (laid out ``body_h`` high) at the painter's origin, the
    plot painted as vector graphics from its SVG into the line reserved for it."""
    painter.save()
    painter.translate(0, -k * body_h)
    clip = QRectF(0, k * body_h, PDF_LAYOUT_WIDTH, body_h)
    painter.setClipRect(clip)
    ctx = QAbstractTextDocumentLayout.PaintContext()
    ctx.clip = clip
    tdoc.documentLayout().draw(painter, ctx)
    rect, renderer = _plot_rect(tdoc)
    if rect is not None and rect.intersects(clip):
        renderer.render(painter, rect)
    painter.restore()


def print_paged(tdoc: QTextDocument, printer, title: str = "") -> int:
    """Print ``tdoc`` page by page with ``title`` and "page X of Y" at the foot of each
    page; returns the number of pages."""
    painter = QPainter()
    if not painter.begin(printer):
        raise OSError("could not start the PDF printer")
    try:
        page = printer.pageLayout().paintRectPixels(printer.resolution())
        scale = page.width() / PDF_LAYOUT_WIDTH
        body_h = page.height() / scale - FOOTER_HEIGHT
        tdoc.setPageSize(QSizeF(PDF_LAYOUT_WIDTH, body_h))
        pages = tdoc.pageCount()
        for k in range(pages):
            if k:
                printer.newPage()
            painter.save()
            painter.scale(scale, scale)
            paint_page(painter, tdoc, k, body_h)
            painter.restore()
            painter.save()
            painter.scale(scale, scale)
            painter.setPen(QPen(Qt.darkGray))
            # a size in layout pixels (scaled with the page like the text above it); the
            # printer's default font is in its own points and came out a fifth of a page high
            font = painter.font()
            font.setPixelSize(FOOTER_FONT_PX)
            painter.setFont(font)
            foot = QRectF(0, body_h + 6, PDF_LAYOUT_WIDTH, FOOTER_HEIGHT - 6)
            painter.drawText(foot, int(Qt.AlignLeft | Qt.AlignVCenter), title)
            painter.drawText(foot, int(Qt.AlignRight | Qt.AlignVCenter), page_footer(k + 1, pages))
            painter.restore()
    finally:
        painter.end()
    return pages


# ============================================================================ exporter
class ReportExporter:
    """Copy, report and export actions for one main window."""

    def __init__(self, window):
        self.window = window
        self.document = window.document
        self.last_dir = ""
        est = getattr(window, "estimates", None)
        if est is not None:  # the estimates view's own copy states the same data record
            est.data_source = self.data_record

    # ------------------------------------------------------------------ common
    def _status(self, text: str, ms: int = 6000):
        self.window.statusBar().showMessage(text, ms)

    def _result(self, action: str):
        """The current result, or None (with a message) when there is none to use."""
        runner = getattr(self.window, "runner", None)
        if runner is not None:
            runner.wait(30000)
        doc = self.document
        res = doc.result
        if res is None:
            self._status(f"No estimates to {action} yet.")
            return None
        if doc.stale or doc.result_generation != doc.generation:
            dialogs.error_box(
                self.window, "The estimates are out of date",
                f"The last fit failed ({doc.fit_message or 'unknown reason'}); the estimates "
                f"on screen belong to earlier settings. Change the method or undo, then "
                f"{action} again.")
            return None
        return res

    def _reasons(self) -> dict:
        """The analyst's reason per excluded point (index -> text), for the method block."""
        return {i: r for i, r, _t in self.document.exclusion_record()}

    def data_record(self) -> DataRecord:
        """Where the data came from and how they were read (file, sheet, SHA-256,
        columns and units, reading notes, file rows), for every copy and the report."""
        sessions = getattr(self.window, "sessions", None)
        sha = getattr(sessions, "source_sha256", "") if sessions is not None else ""
        return DataRecord.from_data(self.document.measurements, sha256=sha or "")

    def signoff(self) -> dict:
        """The sign-off names (analyst, reviewer, date of review) remembered in the
        window's settings; blank when never typed (the report prints blank lines)."""
        qs = getattr(self.window, "qsettings", None)
        if qs is None:
            return {k: "" for k in SIGNOFF_KEYS}
        return {k: str(qs.value(f"report/{k}", "") or "") for k in SIGNOFF_KEYS}

    def set_signoff(self, analyst=None, reviewer=None, review_date=None) -> dict:
        """Remember sign-off names (None keeps a field); asked once, printed in every report."""
        qs = getattr(self.window, "qsettings", None)
        if qs is None:
            return self.signoff()
        for k, v in zip(SIGNOFF_KEYS, (analyst, reviewer, review_date)):
            if v is not None:
                qs.setValue(f"report/{k}", " ".join(str(v).split()))
        qs.sync()
        return self.signoff()

    def edit_signoff(self) -> bool:
        """Ask for the sign-off names (the menu action); False when cancelled."""
        got = ask_signoff(self.window, self.signoff())
        if got is None:
            return False
        self.set_signoff(**got)
        return True

    def _units(self):
        m = self.document.measurements
        return m.x_unit, m.y_unit

    def _target(self, title: str, suffix: str, filt: str, path=None) -> str:
        if path is None:
            src = self.document.measurements.source
            base = Path(src).stem if src and os.path.isfile(src) else "ballast"
            folder = self.last_dir or (os.path.dirname(src) if src and os.path.isfile(src)
                                       else str(Path.home()))
            path = ask_save_path(self.window, title, os.path.join(folder, base + suffix), filt)
            if not path:
                return ""
        path = str(path)
        if not Path(path).suffix:
            path += suffix[suffix.rfind("."):]
        if _same_file(self.document.measurements.source, path):
            dialogs.error_box(self.window, "Will not overwrite the data",
                              f"{os.path.basename(path)} is the measurement file itself; "
                              "exports never overwrite it. Choose another name.")
            return ""
        self.last_dir = os.path.dirname(os.path.abspath(path))
        return path

    def _write_text(self, path: str, text: str, what: str) -> bool:
        try:
            write_atomically(path, text.encode("utf-8"))
        except OSError as err:
            dialogs.error_box(self.window, f"Cannot write the {what}",
                              f"{path}: {err.strerror or err}")
            return False
        self._status(f"{what[:1].upper() + what[1:]} written to {path}.")
        return True

    # ------------------------------------------------------------------ copy
    def estimates(self, fmt: str = "plain", full_precision: bool = False, res=None) -> str:
        """The estimates as copied: :func:`fitcore.report_html.estimates_copy` of the
        window's result, data set, exclusion record and unknowns."""
        res = res if res is not None else self.document.result
        sessions = getattr(self.window, "sessions", None)
        sha = getattr(sessions, "source_sha256", "") if sessions is not None else ""
        return estimates_copy(res, fmt, self.document.measurements,
                              exclusions=self.document.exclusions(), sha256=sha or "",
                              level=LEVEL, full_precision=full_precision,
                              unknowns=self._unknowns(res))

    def _unknowns(self, res):
        """The unknown samples read back off ``res`` (issue 14), or None."""
        view = getattr(self.window, "unknowns", None)
        if view is None or view.for_result is not res or not (view.samples or view.lof is not None):
            return None
        return Unknowns(tuple(view.items()), view.limits, view.lof)

    def copy(self, key: str = "default") -> str:
        """Copy the estimates in format ``key`` (see :data:`COPY_FORMATS`).

        ``"default"``: plain text plus the same estimates as HTML, in one clipboard
        item. Returns the plain text placed on the clipboard ("" when nothing).
        """
        runner = getattr(self.window, "runner", None)
        if runner is not None:
            runner.wait(30000)
        doc = self.document
        res = doc.result
        if res is None:
            self._status("No estimates to copy yet.")
            return ""
        if doc.stale or doc.result_generation != doc.generation:
            # a copied text travels without the window's stale mark: refuse it
            why = (f"the last fit failed ({doc.fit_message})" if doc.fit_failed and doc.fit_message
                   else "they do not belong to the current inputs")
            self._status("Not copied: the estimates on screen are stale. Fix the inputs "
                         "(method, start values, exclusions) or undo (Ctrl+Z), then copy "
                         f"again. Why stale: {why}.", 20000)
            return ""
        mime = QMimeData()
        if key in ("default", "html"):
            text = self.estimates("plain", res=res)
            mime.setText(text)
            mime.setHtml(self.estimates("html", res=res))
        else:
            spec = {k: (f, full) for k, _t, f, full in COPY_FORMATS}
            if key not in spec:
                raise ValueError(f"unknown copy format {key!r}")
            fmt, full = spec[key]
            text = self.estimates(fmt, full, res=res)
            mime.setText(text)
        _guard_clipboard_at_exit()
        QGuiApplication.clipboard().setMimeData(mime)
        self._status("Estimates copied to the clipboard.")
        return text

    def add_copy_menu(self, menu):
        """Fill a "Copy estimates as" sub-menu of ``menu``."""
        from PySide6.QtGui import QAction

        sub = menu.addMenu("Copy estimates &as")
        for key, text, _f, _full in COPY_FORMATS:
            act = QAction(text, self.window)
            act.triggered.connect(lambda _=False, k=key: self.copy(k))
            sub.addAction(act)
        return sub

    # ------------------------------------------------------------------ CSV
    def curve_grid(self, n: int = CURVE_POINTS) -> np.ndarray:
        plot = getattr(self.window, "plot", None)
        return curve_grid(self.document.measurements.x, n,
                          log_x=plot is not None and plot.log_x)

    def write_curve_csv(self, path=None) -> str:
        """Fitted curve and confidence band on a fine grid over the data's x range."""
        res = self._result("export")
        if res is None:
            return ""
        path = self._target("Export fitted curve and band", "-curve.csv", "CSV (*.csv)", path)
        if not path:
            return ""
        x_unit, y_unit = self._units()
        text = curve_csv(res, self.curve_grid(), LEVEL, x_unit=x_unit, y_unit=y_unit)
        return path if self._write_text(path, text, "curve and band CSV") else ""

    def write_points_csv(self, path=None) -> str:
        """Per point: x, y, sigma, fitted, residual, std residual, weight, status, reason."""
        res = self._result("export")
        if res is None:
            return ""
        path = self._target("Export residuals and weights", "-points.csv", "CSV (*.csv)", path)
        if not path:
            return ""
        x_unit, y_unit = self._units()
        reasons = self._reasons()
        text = points_csv(res, reasons, x_unit=x_unit, y_unit=y_unit,
                          rows=self.document.measurements.source_rows)
        return path if self._write_text(path, text, "points CSV") else ""

    # ------------------------------------------------------------------ plot
    def write_plot(self, path=None, size=None, fmt: str | None = None) -> str:
        """The plot as PNG or SVG (by ``fmt`` or the file's suffix) at ``size`` px."""
        if not self.document.has_data:
            self._status("No plot to export yet.")
            return ""
        plot = self.window.plot
        if size is None:
            try:
                size = ask_plot_size(self.window, max(plot.width(), 200), max(plot.height(), 150))
            except ValueError as err:
                dialogs.error_box(self.window, "Plot size", str(err))
                return ""
            if size is None:
                return ""
        w, h = size
        path = self._target("Export plot", ".png", "PNG image (*.png);;SVG drawing (*.svg)", path)
        if not path:
            return ""
        fmt = (fmt or Path(path).suffix.lstrip(".") or "png").lower()
        try:
            if fmt == "svg":
                write_plot_svg(self.window, path, w, h)
            elif fmt == "png":
                img = plot_image(self.window, w, h)
                write_atomically(path, _png_bytes(img), verify=check_png)
            else:
                raise ValueError(f"plots are exported as .png or .svg, not .{fmt}")
        except ValueError as err:
            dialogs.error_box(self.window, "Cannot export the plot", str(err))
            return ""
        except OSError as err:
            dialogs.error_box(self.window, "Cannot export the plot",
                              f"{path}: {err.strerror or err}. The previous file, if any, is unchanged.")
            return ""
        self._status(f"Plot ({w} x {h} px) written to {path}.")
        return path

    # ------------------------------------------------------------------ report
    def report_html(self, res=None, images: str = "embed", resources: dict | None = None,
                    max_rows: int = REPORT_MAX_ROWS, written: str | None = None) -> str:
        """The report as HTML text: :func:`fitcore.report_html.report_html` of the
        window's result, data, exclusion record, sign-off names and the analyses done
        on the fit shown (the window only gathers them).

        ``images="embed"``: the plot as inline SVG (a self-contained file).
        ``images="resource"``: :data:`PLOT_MARK` where the plot goes, its SVG put into
        ``resources[PLOT_MARK]`` (for ``QTextDocument``, which prints the PDF).
        ``written``: the time of writing to print (default: now).
        """
        if images not in ("embed", "resource"):
            raise ValueError(f"images must be 'embed' or 'resource', not {images!r}")
        res = res if res is not None else self.document.result
        doc = self.document
        sessions = getattr(self.window, "sessions", None)
        sha = getattr(sessions, "source_sha256", "") if sessions is not None else ""
        session_path = getattr(sessions, "path", None) if sessions is not None else None
        plot = getattr(self.window, "plot", None)
        log_x = bool(getattr(plot, "log_x", False))
        placeholder = None
        if images == "resource":  # QTextDocument: an object paints the SVG (see PLOT_MARK)
            placeholder = PLOT_MARK
            if resources is not None:
                resources[PLOT_MARK] = report_plot(res, doc.measurements, level=LEVEL, log_x=log_x)
        # the export actions refuse a stale result; a report built directly says so
        stale = res is not doc.result or doc.stale or doc.result_generation != doc.generation
        return build_report_html(
            res, doc.measurements, exclusions=doc.exclusions(), sha256=sha or "", level=LEVEL,
            log_x=log_x, session_path=session_path or "", signoff=self.signoff(),
            stale=stale, fit_failure=doc.fit_message if stale and doc.fit_failed else "",
            written=written, max_rows=max_rows, plot_placeholder=placeholder,
            **self._analyses(res))

    def _analyses(self, res) -> dict:
        """The bootstrap, point-diagnostics note, loss comparison and unknowns of the
        window, each only when it was computed for ``res`` as it is on screen (not for
        an earlier fit), as :func:`fitcore.report_html.report_html` takes them."""
        win, doc = self.window, self.document
        current = res is doc.result and not doc.stale
        out: dict = {}
        rec = win.current_bootstrap() if current and hasattr(win, "current_bootstrap") else None
        if rec is not None and rec.result is res:
            out["bootstrap"] = rec.bootstrap
        diag = getattr(win, "diagnostics", None)
        if current and diag is not None and getattr(diag, "diagnostics", None) is not None \
                and getattr(diag, "for_result", None) is res:
            out["diagnostics_note"] = diag.note_text()
        cv = getattr(win, "compare_view", None)
        if (current and cv is not None and getattr(cv, "comparison", None) is not None
                and not cv.is_stale and doc.result_generation == doc.generation):
            out["comparison"] = [r.split("\t") for r in cv.text().splitlines()]
        out["unknowns"] = self._unknowns(res)
        return out

    def write_html(self, path=None, written: str | None = None) -> str:
        """The report as one self-contained HTML file (``written``: the time of writing
        to print, default now)."""
        res = self._result("write a report")
        if res is None:
            return ""
        path = self._target("Write report (HTML)", "-report.html", "HTML (*.html *.htm)", path)
        if not path:
            return ""
        with _busy():
            text = self.report_html(res, written=written)
        return path if self._write_text(path, text, "report") else ""

    def text_document(self, res=None) -> QTextDocument:
        """The report as a ``QTextDocument`` (what the PDF prints); the plot is an
        object that paints its SVG (vector), not an image."""
        resources: dict = {}
        text = self.report_html(res, images="resource", resources=resources,
                                max_rows=PDF_MAX_ROWS)
        tdoc = QTextDocument()
        tdoc.setDefaultStyleSheet("")
        h = REPORT_PLOT_SIZE[1]
        # the anchor's paragraph replaces the plot's (no empty paragraphs around it: each
        # was a blank line between the heading and the plot); the plot covers its blank
        # line and the margin under it
        anchor = (f'<p style="margin-top:0px; margin-bottom:{h}px">'
                  f'<a name="{PLOT_ANCHOR}">&nbsp;</a></p>')
        text = text.replace(f"<p>{PLOT_MARK}</p>", anchor).replace(PLOT_MARK, anchor)
        tdoc.setHtml(text)
        # the plot: a line as high as the plot, painted from its SVG by paint_page (Qt's
        # text layout can only hold bitmaps; a vector PDF needs the plot painted)
        tdoc.plot_svg = resources.get(PLOT_MARK, "")
        return tdoc

    def write_pdf(self, path=None) -> str:
        """The report as PDF through Qt's printing (A4, no external program): vector
        plot, "page X of Y" at the foot of every page."""
        from PySide6.QtPrintSupport import QPrinter

        res = self._result("write a report")
        if res is None:
            return ""
        path = self._target("Write report (PDF)", "-report.pdf", "PDF (*.pdf)", path)
        if not path:
            return ""
        try:  # the printer's own file, named as write_atomically names its debris
            fd, tmp = temporary_beside(os.path.abspath(path))
            os.close(fd)
        except OSError as err:
            dialogs.error_box(self.window, "Cannot write the PDF report", f"{path}: {err}")
            return ""
        try:
            printer = QPrinter(QPrinter.HighResolution)
            printer.setOutputFormat(QPrinter.PdfFormat)
            printer.setOutputFileName(tmp)
            printer.setPageLayout(QPageLayout(QPageSize(QPageSize.A4), QPageLayout.Portrait,
                                              QMarginsF(16, 14, 16, 14), QPageLayout.Millimeter))
            printer.setDocName("Ballast report")
            printer.setCreator("Ballast")
            with _busy():
                tdoc = self.text_document(res)
                self.pages_printed = print_paged(tdoc, printer, os.path.basename(
                    self.document.measurements.source or "Ballast report"))
            del printer
            install_printed_pdf(tmp, path)
        except OSError as err:
            dialogs.error_box(self.window, "Cannot write the PDF report",
                              f"{path}: {err}. The previous file, if any, is unchanged.")
            return ""
        finally:
            try:
                os.unlink(tmp)
            except OSError:
                pass
        self._status(f"PDF report written to {path}.")
        return path

    def add_export_menu(self, menu):
        """Fill an "Export" sub-menu and the report actions into ``menu``."""
        from PySide6.QtGui import QAction, QKeySequence

        def act(m, text, slot, shortcut=None):
            a = QAction(text, self.window)
            if shortcut:
                a.setShortcut(QKeySequence(shortcut))
            a.triggered.connect(lambda _=False: slot())
            m.addAction(a)
            self.window.addAction(a)
            return a

        act(menu, "Write &report (HTML)...", self.write_html, "Ctrl+R")
        act(menu, "Write report as P&DF...", self.write_pdf, "Ctrl+Shift+R")
        act(menu, "Report &sign-off names...", self.edit_signoff)
        sub = menu.addMenu("E&xport")
        act(sub, "Fitted &curve and band (CSV)...", self.write_curve_csv)
        act(sub, "&Residuals and weights per point (CSV)...", self.write_points_csv)
        act(sub, "&Plot as PNG or SVG...", self.write_plot)
        return sub
