"""Undoable commands over the :class:`~desktop.document.Document`.

Every change the analyst can make goes through one of these, pushed on the main
window's ``QUndoStack``. A command holds the before and after state and calls the
document's ``apply_*`` methods; it never touches widgets.
"""
from __future__ import annotations

from PySide6.QtGui import QUndoCommand

from fitcore.report_text import point_label

from .document import Document, MaskChange, Settings

#: command id shared by the steps of one box drag (see :meth:`MaskCommand.mergeWith`)
DRAG_ID = 4101


def _points_text(verb: str, n: int) -> str:
    return f"{verb} {n} point" + ("" if n == 1 else "s")


class MaskCommand(QUndoCommand):
    """Exclude or restore some points.

    Parameters
    ----------
    document
        The document to change.
    change
        The :class:`MaskChange` (from :meth:`Document.make_mask_change`).
    drag_token
        Steps of one box drag share a token; consecutive steps with the same token
        merge into one undo step.
    """

    def __init__(self, document: Document, change: MaskChange, drag_token=None, text: str | None = None):
        super().__init__()
        self.document = document
        self.change = change
        self.drag_token = drag_token
        self._custom_text = text
        self._update_text()

    def _update_text(self):
        if self._custom_text:
            self.setText(self._custom_text)
            return
        n_ex = int(self.change.after.sum())
        n_re = int((~self.change.after).sum())
        if n_ex and not n_re:
            self.setText(_points_text("Exclude", n_ex))
        elif n_re and not n_ex:
            self.setText(_points_text("Restore", n_re))
        else:
            self.setText(f"Exclude {n_ex}, restore {n_re} point" + ("" if n_re == 1 else "s"))

    def id(self) -> int:  # Qt's name
        return DRAG_ID if self.drag_token is not None else -1

    def mergeWith(self, other: QUndoCommand) -> bool:
        if not isinstance(other, MaskCommand) or other.drag_token is None:
            return False
        if other.drag_token != self.drag_token or other.document is not self.document:
            return False
        self.change = self.change.merged_with(other.change).without_no_ops()
        if self.change.is_empty:
            self.setObsolete(True)  # the drag ended where it started
        self._update_text()
        return True

    def redo(self):
        self.document.apply_mask_change(self.change)

    def undo(self):
        self.document.apply_mask_change(self.change, undo=True)


class ReasonCommand(QUndoCommand):
    """Change the exclusion reason of one point."""

    def __init__(self, document: Document, index: int, reason: str):
        # the point named as everywhere else: its file row when known
        super().__init__(f"Reason for {point_label(index, document.measurements.source_rows)}")
        self.document = document
        self.index = int(index)
        self.before = document.reasons[self.index]
        self.after = str(reason)

    def redo(self):
        self.document.apply_reason(self.index, self.after)

    def undo(self):
        self.document.apply_reason(self.index, self.before)


class SettingsCommand(QUndoCommand):
    """Change the method settings (model, loss, scale, alpha, held/start values)."""

    def __init__(self, document: Document, new: Settings, text: str = "Change method"):
        super().__init__(text)
        self.document = document
        self.before = document.settings
        self.after = new

    def redo(self):
        self.document.apply_settings(self.after)

    def undo(self):
        self.document.apply_settings(self.before)
