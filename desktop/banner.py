"""A non-modal message strip above the plot: what the window did on its own, and why.

The status bar is the wrong place for something the analyst must read (a read note
such as "row 8: 'n/a' is not a number, left out", or "the model was changed"): the
next message replaces it within a fraction of a second. A banner message stays until
the analyst closes it or new data replace it, and may carry buttons (Undo).
"""
from __future__ import annotations

from typing import Callable

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QFrame, QHBoxLayout, QLabel, QPushButton, QSizePolicy, QToolButton, QVBoxLayout, QWidget

_COLOURS = {"info": ("#eef4fb", "#7a9cc6"), "warning": ("#fdf5e6", "#d19a3a")}


class _Message(QFrame):
    def __init__(self, key: str, text: str, kind: str, actions, on_close, tooltip: str = ""):
        super().__init__()
        self.key = key
        back, edge = _COLOURS.get(kind, _COLOURS["info"])
        self.setObjectName("bannerMessage")
        self.setStyleSheet(f"#bannerMessage {{ background: {back}; border: 1px solid {edge}; "
                           "border-radius: 3px; }")
        row = QHBoxLayout(self)
        row.setContentsMargins(8, 3, 3, 3)
        row.setSpacing(6)
        self.label = QLabel(text)
        self.label.setWordWrap(True)
        # a long message wraps instead of widening the pane it sits in
        self.label.setMinimumWidth(120)
        self.label.setSizePolicy(QSizePolicy.Ignored, QSizePolicy.Preferred)
        self.label.setTextInteractionFlags(Qt.TextSelectableByMouse)
        if tooltip:
            self.label.setToolTip(tooltip)
        row.addWidget(self.label, 1)
        self.buttons = []
        for caption, callback in actions:
            b = QPushButton(caption)
            b.setAutoDefault(False)
            b.clicked.connect(callback)
            row.addWidget(b, 0, Qt.AlignTop)
            self.buttons.append(b)
        close = QToolButton()
        close.setText("\u00d7")
        close.setToolTip("Close this message")
        close.setAutoRaise(True)
        close.clicked.connect(lambda: on_close(key))
        row.addWidget(close, 0, Qt.AlignTop)
        self.close_button = close


class Banner(QWidget):
    """Messages stacked above the plot; each has a key, so a newer one replaces it."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self._layout = QVBoxLayout(self)
        self._layout.setContentsMargins(0, 0, 0, 2)
        self._layout.setSpacing(2)
        self._messages: dict[str, _Message] = {}
        self.setVisible(False)

    def show_message(self, key: str, text: str, *, kind: str = "info",
                     actions: list[tuple[str, Callable]] | None = None, tooltip: str = "") -> None:
        """Show ``text`` under ``key`` (replacing an older message with the same key)."""
        self.clear(key)
        msg = _Message(key, text, kind, actions or [], self.clear, tooltip)
        self._messages[key] = msg
        self._layout.addWidget(msg)
        self.setVisible(True)

    def clear(self, key: str | None = None) -> None:
        """Remove the message under ``key`` (all messages when ``key`` is None)."""
        keys = list(self._messages) if key is None else [key]
        for k in keys:
            msg = self._messages.pop(k, None)
            if msg is not None:
                self._layout.removeWidget(msg)
                msg.setParent(None)
                msg.deleteLater()
        self.setVisible(bool(self._messages))

    def text(self, key: str) -> str:
        """The text under ``key`` ("" when none is shown)."""
        msg = self._messages.get(key)
        return msg.label.text() if msg is not None else ""

    def message(self, key: str) -> _Message | None:
        return self._messages.get(key)

    def keys(self) -> list[str]:
        return list(self._messages)
