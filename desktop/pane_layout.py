"""Widths of the window's panes: the method panel | (the plot | the estimates) over the
tab area of the points table and the analyses.

:func:`install` is called once by the main window after it built its splitter. It

* lets the side panes be narrow (the method panel scrolls; the estimates pane is put
  in a scroll area too, so at a small window its summary is scrolled, not cut) and
  keeps the plot's own minimum width small (its key wraps, see ``PlotView``), so the
  three minimum widths add up to well under 1000 px and no pane is drawn cut off
  behind another;
* until the analyst drags a pane border (remembered in the settings; from then on the
  saved widths are kept), sizes the panes on every window resize and every new result: the method
  panel about a fifth of the width (236-300 px), the estimates pane as wide as its
  table needs (within 45 % of the window), the plot the rest; the tab area under the
  plot and the estimates takes their whole width.
"""
from __future__ import annotations

from PySide6.QtCore import QEvent, QObject, Qt, QTimer
from PySide6.QtWidgets import (
    QAbstractScrollArea, QFrame, QHBoxLayout, QPushButton, QScrollArea, QTabBar, QTabWidget, QVBoxLayout, QWidget,
)

METHOD_MIN, METHOD_MAX = 236, 300
#: share of the height the plot and the estimates get over the tab area (points table)
TOP_SHARE = 0.56
ESTIMATES_MIN = 250
#: widest the estimates pane gets, as a share of the window (it needs ~370-435 px for a
#: table with units and intervals on the sample sets; at 1000 px that is 37-44 %)
EST_SHARE = 0.45
CENTRE_MIN = 320
#: pixels the estimates pane gets beyond what its table needs
WIDTH_SPARE = 6
#: the estimates table's standard-uncertainty column (hidden when the pane is too narrow)
STD_UNC_COLUMN = 2
#: QSettings key: the analyst has dragged a pane border (then the saved widths stay)
BY_HAND_KEY = "window/panes_by_hand"


class PaneSizer(QObject):
    """Keeps the splitter sizes fitted to the window (see the module text)."""

    def __init__(self, window, main_split, estimates, auto: bool = True, top_split=None):
        super().__init__(window)
        self.window = window
        self.split = main_split
        #: the splitter holding the plot and the estimates (None: they sit in main_split)
        self.top = top_split
        self.estimates = estimates
        self.auto = bool(auto)
        self._setting = False
        self._header_hints: dict[int, int] = {}  # column -> its title's width, measured shown
        main_split.splitterMoved.connect(self._moved_by_hand)
        if top_split is not None:
            top_split.splitterMoved.connect(self._moved_by_hand)
        #: the vertical splitter: (plot | estimates) over the tab area
        self.work = getattr(window, "centre", None) if top_split is not None else None
        if self.work is not None:
            self.work.splitterMoved.connect(self._moved_by_hand)
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

    def estimates_width(self, include_hidden: bool = False) -> int:
        """Width the estimates pane needs to show its table without scrolling (with
        ``include_hidden``: also its columns hidden for want of room)."""
        table = self.estimates.table
        header = table.horizontalHeader()
        need = sum(max(header.sectionSize(c), table.sizeHintForColumn(c), self._header_hint(header, c))
                   for c in range(header.count())
                   if include_hidden or not header.isSectionHidden(c))
        if header.stretchLastSection() and header.count():
            # the stretched last column: its contents, not the stretched size
            last = header.count() - 1
            need -= max(header.sectionSize(last), table.sizeHintForColumn(last),
                        header.sectionSizeHint(last))
            need += max(table.sizeHintForColumn(last), header.sectionSizeHint(last))
        need += 2 * table.frameWidth()
        if table.verticalScrollBar().isVisible() or table.verticalScrollBar().maximum() > 0:
            need += table.verticalScrollBar().sizeHint().width()  # more rows than show
        margins = self.estimates.layout().contentsMargins()
        scroll = getattr(self.window, "estimates_scroll", None)
        if scroll is not None and scroll.verticalScrollBar().isVisible():
            # a pane taller than the window (a long summary) scrolls: its bar takes width
            need += scroll.verticalScrollBar().sizeHint().width()
        return int(need + margins.left() + margins.right() + WIDTH_SPARE)

    def _header_hint(self, header, c: int) -> int:
        """The width column ``c``'s title needs. Qt gives 0 for a hidden section, so
        the width measured while it was shown is kept (the titles never change): else
        the hidden std. unc. column counted ~20 px less than the shown one, and each
        fit() flipped it (hidden: fits, so shown; shown: too wide, so hidden), leaving
        the Raman area's unit cut or not by the parity of the number of calls."""
        if not header.isSectionHidden(c):
            self._header_hints[c] = header.sectionSizeHint(c)
        return self._header_hints.get(c, 0)

    def fit(self) -> None:
        total = self.split.width()
        if total <= 0:
            return
        handles = self.split.handleWidth() * (self.split.count() - 1)
        if self.top is not None:
            handles += self.top.handleWidth()
        avail = total - handles
        method = max(METHOD_MIN, min(METHOD_MAX, round(0.2 * avail)))
        need = self.estimates_width(include_hidden=True)
        est = max(ESTIMATES_MIN, min(need, round(EST_SHARE * avail)))
        centre = avail - method - est
        if centre < CENTRE_MIN:  # a small window: the side panes give way, down to their minimum
            short = CENTRE_MIN - centre
            take = min(short, est - ESTIMATES_MIN)
            est -= take
            short -= take
            method -= min(short, method - METHOD_MIN)
            centre = avail - method - est
        # too narrow for every column: the standard-uncertainty column goes first (the
        # estimate shows it already, 1856(13)), so that no unit or interval is cut
        table = self.estimates.table
        squeeze = need - WIDTH_SPARE > est  # (the spare pixels are not needed)
        if table.isColumnHidden(STD_UNC_COLUMN) != squeeze:
            table.setColumnHidden(STD_UNC_COLUMN, squeeze)
        self._setting = True
        try:
            if self.top is None:
                self.split.setSizes([method, max(centre, 0), est])
            else:
                self.split.setSizes([method, avail - method])
                self.top.setSizes([max(centre, 0), est])
                if self.work is not None and self.work.count() == 2:
                    height = self.work.height() - self.work.handleWidth()
                    if height > 0:
                        upper = round(TOP_SHARE * height)
                        self.work.setSizes([upper, height - upper])
        finally:
            self._setting = False


def install(window) -> PaneSizer:
    """Set the panes' minimum widths and install the :class:`PaneSizer` on ``window``."""
    top = getattr(window, "top_split", None)
    split = window.main_split
    method_scroll = split.widget(0)
    method_scroll.setMinimumWidth(METHOD_MIN)
    estimates = window.estimates
    holder = top if top is not None else split
    if holder.indexOf(estimates) >= 0:
        scroll = QScrollArea()
        scroll.setFrameShape(QFrame.NoFrame)
        scroll.setWidgetResizable(True)
        scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarAsNeeded)
        holder.replaceWidget(holder.indexOf(estimates), scroll)
        scroll.setWidget(estimates)
        scroll.setMinimumWidth(ESTIMATES_MIN - 40)
        window.estimates_scroll = scroll
    # rows as high as the points table's (the style's default is ~30 px): the parameters
    # and derived values fit without the table's own scroll bar in a short pane
    estimates.table.verticalHeader().setDefaultSectionSize(22)
    split.setStretchFactor(0, 0)
    split.setStretchFactor(1, 1)
    split.setCollapsible(1, False)
    if top is None:
        split.setStretchFactor(2, 0)
    else:
        top.setStretchFactor(0, 1)
        top.setStretchFactor(1, 0)
        top.setCollapsible(0, False)
    qs = getattr(window, "qsettings", None)
    by_hand = bool(qs is not None and qs.value(BY_HAND_KEY, False, type=bool))
    sizer = PaneSizer(window, split, estimates, auto=not by_hand, top_split=top)
    window.pane_sizer = sizer
    if getattr(window, "lower_tabs", None) is not None:
        install_tab_area(window)
    return sizer


class AnalysisTab(QWidget):
    """An analysis view (the loss comparison, the point diagnostics) shown as a tab of
    the window's tab area, or in a window of its own when the analyst asks for one
    (the tab area's "Own window" button): a small window has no room for a dock beside
    the plot, and a tab never squeezes it.

    ``on_close`` is called when the analyst closes the tab or the own window.
    """

    def __init__(self, title: str, content: QWidget, tabs: QTabWidget, on_close=None):
        super().__init__()
        self.title = title
        self.content = content
        self.tabs = tabs
        self.on_close = on_close
        self.own_window: QWidget | None = None
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        if isinstance(content, QAbstractScrollArea):
            lay.addWidget(content)
        else:  # scrolls in a short tab area rather than pushing the plot up
            scroll = QScrollArea()
            scroll.setWidgetResizable(True)
            scroll.setFrameShape(QFrame.NoFrame)
            scroll.setWidget(content)
            lay.addWidget(scroll)

    @property
    def is_open(self) -> bool:
        """Shown as a tab or in its own window."""
        if self.tabs.indexOf(self) >= 0:
            return True
        return self.own_window is not None and self.own_window.isVisible()

    @property
    def in_own_window(self) -> bool:
        return self.own_window is not None and self.own_window.isVisible()

    def open(self) -> None:
        """Show it: its tab made current (added when missing), or its window raised."""
        if self.in_own_window:
            self.own_window.raise_()
            self.own_window.activateWindow()
            return
        i = self.tabs.indexOf(self)
        if i < 0:
            i = self.tabs.addTab(self, self.title)
        self.tabs.setCurrentIndex(i)

    def remove(self) -> None:
        """Take the tab (or the own window) away without calling ``on_close``."""
        i = self.tabs.indexOf(self)
        if i >= 0:
            self.tabs.removeTab(i)
        if self.own_window is not None:
            self.own_window.hide()

    def close_by_user(self) -> None:
        self.remove()
        if self.on_close is not None:
            self.on_close()

    def detach(self) -> QWidget:
        """Move it into a window of its own (returned), sized for its content."""
        if self.in_own_window:
            return self.own_window
        i = self.tabs.indexOf(self)
        if i >= 0:
            self.tabs.removeTab(i)
        if self.own_window is None:
            self.own_window = _OwnWindow(self, self.tabs.window())
        self.own_window.layout().addWidget(self)
        self.show()
        top = self.tabs.window()
        self.own_window.resize(max(760, int(top.width() * 0.8)), max(460, int(top.height() * 0.6)))
        self.own_window.show()
        return self.own_window

    def attach(self) -> None:
        """Back into the tab area (from its own window)."""
        if self.own_window is not None:
            self.own_window.hide()
        self.setParent(None)
        i = self.tabs.addTab(self, self.title)
        self.tabs.setCurrentIndex(i)


class _OwnWindow(QWidget):
    """The top-level window holding a detached :class:`AnalysisTab`."""

    def __init__(self, tab: AnalysisTab, parent):
        super().__init__(parent, Qt.Window)
        self.tab = tab
        self.setWindowTitle(f"Ballast - {tab.title}")
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        back = QPushButton("Back to the tabs")
        back.setToolTip("Show it as a tab under the plot again")
        back.clicked.connect(tab.attach)
        row = QHBoxLayout()
        row.addStretch(1)
        row.addWidget(back)
        lay.addLayout(row)

    def closeEvent(self, ev):
        super().closeEvent(ev)
        if self.tab.on_close is not None and self.tab.tabs.indexOf(self.tab) < 0:
            self.tab.on_close()


def install_tab_area(window) -> None:
    """The tab area's behaviour: analysis tabs can be closed (the Points and Unknowns
    tabs cannot) and the corner button moves the current analysis into its own window."""
    tabs = window.lower_tabs
    tabs.setTabsClosable(True)
    for k in range(tabs.count()):
        if not isinstance(tabs.widget(k), AnalysisTab):
            _no_close_button(tabs, k)
    button = QPushButton("Own window")
    button.setToolTip("Show the current analysis in a window of its own")
    button.setFlat(True)
    tabs.setCornerWidget(button, Qt.TopRightCorner)
    window.detach_button = button

    def current_changed(_i=None):
        button.setVisible(isinstance(tabs.currentWidget(), AnalysisTab))

    def close_requested(i):
        w = tabs.widget(i)
        if isinstance(w, AnalysisTab):
            w.close_by_user()

    tabs.currentChanged.connect(current_changed)
    tabs.tabCloseRequested.connect(close_requested)
    button.clicked.connect(lambda: isinstance(tabs.currentWidget(), AnalysisTab)
                           and tabs.currentWidget().detach())
    current_changed()


def _no_close_button(tabs: QTabWidget, k: int) -> None:
    bar = tabs.tabBar()
    for side in (QTabBar.RightSide, QTabBar.LeftSide):
        if bar.tabButton(k, side) is not None:
            bar.tabButton(k, side).hide()
            bar.setTabButton(k, side, None)
