"""Widths of the window's three panes (method panel | plot and points table | estimates).

:func:`install` is called once by the main window after it built its splitter. It

* lets the side panes be narrow (the method panel scrolls; the estimates pane is put
  in a scroll area too, so at a small window its summary is scrolled, not cut) and
  keeps the plot's own minimum width small (its key wraps, see ``PlotView``), so the
  three minimum widths add up to well under 1000 px and no pane is drawn cut off
  behind another;
* until the analyst drags a pane border (remembered in the settings; from then on the
  saved widths are kept), sizes the panes on every window resize and every new result: the method
  panel about a fifth of the width (236-300 px), the estimates pane as wide as its
  table needs (within 36 % of the window), the plot and points table the rest.
"""
from __future__ import annotations

from PySide6.QtCore import QEvent, QObject, Qt, QTimer
from PySide6.QtWidgets import QFrame, QScrollArea

METHOD_MIN, METHOD_MAX = 236, 300
ESTIMATES_MIN = 250
CENTRE_MIN = 380
#: QSettings key: the analyst has dragged a pane border (then the saved widths stay)
BY_HAND_KEY = "window/panes_by_hand"


class PaneSizer(QObject):
    """Keeps the splitter sizes fitted to the window (see the module text)."""

    def __init__(self, window, main_split, estimates, auto: bool = True):
        super().__init__(window)
        self.window = window
        self.split = main_split
        self.estimates = estimates
        self.auto = bool(auto)
        self._setting = False
        main_split.splitterMoved.connect(self._moved_by_hand)
        window.installEventFilter(self)
        document = getattr(estimates, "document", None)
        if document is not None:
            document.subscribe(self._on_document)

    def _moved_by_hand(self, *_):
        if not self._setting:
            self.auto = False
            qs = getattr(self.window, "qsettings", None)
            if qs is not None:  # remembered: the next window keeps the analyst's widths
                qs.setValue(BY_HAND_KEY, True)

    def _on_document(self, event, **info):
        if event in ("result", "data") and self.auto:
            # after the estimates table has laid out its new cells
            QTimer.singleShot(0, self._fit_if_auto)
            QTimer.singleShot(50, self._fit_if_auto)

    def _fit_if_auto(self):
        if self.auto:
            self.fit()

    def eventFilter(self, obj, ev):
        if obj is self.window and ev.type() in (QEvent.Resize, QEvent.Show) and self.auto:
            self.fit()
        return False

    def estimates_width(self) -> int:
        """Width the estimates pane needs to show its table without scrolling."""
        table = self.estimates.table
        header = table.horizontalHeader()
        need = sum(max(header.sectionSize(c), table.sizeHintForColumn(c), header.sectionSizeHint(c))
                   for c in range(header.count()))
        if header.stretchLastSection() and header.count():
            # the stretched last column: its contents, not the stretched size
            last = header.count() - 1
            need -= max(header.sectionSize(last), table.sizeHintForColumn(last),
                        header.sectionSizeHint(last))
            need += max(table.sizeHintForColumn(last), header.sectionSizeHint(last))
        need += 2 * table.frameWidth() + table.verticalScrollBar().sizeHint().width()
        margins = self.estimates.layout().contentsMargins()
        scroll = getattr(self.window, "estimates_scroll", None)
        if scroll is not None and scroll.verticalScrollBar().isVisible():
            # a tall pane (e.g. the Unknowns under the estimates) scrolls: its bar takes width
            need += scroll.verticalScrollBar().sizeHint().width()
        return int(need + margins.left() + margins.right() + 6)

    def fit(self) -> None:
        total = self.split.width()
        if total <= 0:
            return
        handles = self.split.handleWidth() * (self.split.count() - 1)
        avail = total - handles
        method = max(METHOD_MIN, min(METHOD_MAX, round(0.2 * avail)))
        est = max(ESTIMATES_MIN, min(self.estimates_width(), round(0.36 * avail)))
        centre = avail - method - est
        if centre < CENTRE_MIN:  # a small window: the side panes give way, down to their minimum
            short = CENTRE_MIN - centre
            take = min(short, est - ESTIMATES_MIN)
            est -= take
            short -= take
            method -= min(short, method - METHOD_MIN)
            centre = avail - method - est
        self._setting = True
        try:
            self.split.setSizes([method, max(centre, 0), est])
        finally:
            self._setting = False


def install(window) -> PaneSizer:
    """Set the panes' minimum widths and install the :class:`PaneSizer` on ``window``."""
    split = window.main_split
    method_scroll = split.widget(0)
    method_scroll.setMinimumWidth(METHOD_MIN)
    estimates = window.estimates
    if split.indexOf(estimates) >= 0:
        scroll = QScrollArea()
        scroll.setFrameShape(QFrame.NoFrame)
        scroll.setWidgetResizable(True)
        scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarAsNeeded)
        split.replaceWidget(split.indexOf(estimates), scroll)
        scroll.setWidget(estimates)
        scroll.setMinimumWidth(ESTIMATES_MIN - 40)
        window.estimates_scroll = scroll
    split.setStretchFactor(0, 0)
    split.setStretchFactor(1, 1)
    split.setStretchFactor(2, 0)
    split.setCollapsible(1, False)
    qs = getattr(window, "qsettings", None)
    by_hand = bool(qs is not None and qs.value(BY_HAND_KEY, False, type=bool))
    sizer = PaneSizer(window, split, estimates, auto=not by_hand)
    window.pane_sizer = sizer
    return sizer
