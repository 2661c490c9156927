"""The window's document: pure Python state, no widgets and no Qt.

The document holds what the analyst works on:

* the measurements: a :class:`fitcore.work.DataSet` (x, y, optional sigma_y, names
  and units, where they came from, file rows, read notes);
* the exclusion record: a boolean mask, plus a reason and a time per excluded point
  (:meth:`Document.exclusions` gives it as :class:`fitcore.work.Exclusion` entries);
* the method: a :class:`fitcore.work.Method` (model and every option of ``fit()``);
* the last fit result, whether it is stale, and the last fit message.

Widgets observe it through plain callbacks (:meth:`Document.subscribe`) and change it
only through undoable commands (:mod:`desktop.commands`), which call the ``apply_*``
methods here. Every change to the fit inputs bumps :attr:`Document.generation`, so a
fit result computed from older inputs can be recognised and dropped.
"""
from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from fitcore.work import DataSet, Exclusion, Method

#: events sent to subscribers
EVENTS = ("data", "mask", "reasons", "settings", "result", "selection")


#: the window's name for one data set (:class:`fitcore.work.DataSet`)
Measurements = DataSet

#: what the window's method starts as (and what :func:`Settings` fills in)
WINDOW_DEFAULTS = {"loss": "huber", "alpha": 1.0}


def Settings(**fields) -> Method:
    """The window's method: a :class:`fitcore.work.Method` (every option of
    :func:`fitcore.fit`), with the window's defaults for fields not given (the Huber
    loss; shape 1 ready for the general loss)."""
    return Method(**{**WINDOW_DEFAULTS, **fields})


@dataclass
class MaskChange:
    """A change to the exclusion record of some points (what an undo step restores)."""

    indices: np.ndarray
    before: np.ndarray
    after: np.ndarray
    reasons_before: list[str] = field(default_factory=list)
    reasons_after: list[str] = field(default_factory=list)
    times_before: list[str] = field(default_factory=list)
    times_after: list[str] = field(default_factory=list)

    def merged_with(self, later: "MaskChange") -> "MaskChange":
        """One change equivalent to ``self`` followed by ``later`` (vectorised).

        The "before" state of a point comes from the first change that touches it, the
        "after" state from the last one.
        """
        idx = np.union1d(self.indices, later.indices).astype(np.intp)
        n = idx.size
        pa = np.searchsorted(idx, self.indices)
        pb = np.searchsorted(idx, later.indices)

        def obj(values):
            out = np.empty(len(values), dtype=object)
            out[:] = values
            return out

        before, after = np.zeros(n, bool), np.zeros(n, bool)
        rb, ra, tb, ta = (np.empty(n, dtype=object) for _ in range(4))
        before[pb], rb[pb], tb[pb] = later.before, obj(later.reasons_before), obj(later.times_before)
        before[pa], rb[pa], tb[pa] = self.before, obj(self.reasons_before), obj(self.times_before)
        after[pa], ra[pa], ta[pa] = self.after, obj(self.reasons_after), obj(self.times_after)
        after[pb], ra[pb], ta[pb] = later.after, obj(later.reasons_after), obj(later.times_after)
        return MaskChange(idx, before, after, rb.tolist(), ra.tolist(), tb.tolist(), ta.tolist())

    def without_no_ops(self) -> "MaskChange":
        """The same change without the points whose state it leaves as it was."""
        keep = [k for k in range(self.indices.size)
                if self.before[k] != self.after[k] or self.reasons_before[k] != self.reasons_after[k]]
        return MaskChange(
            self.indices[keep], self.before[keep], self.after[keep],
            [self.reasons_before[k] for k in keep], [self.reasons_after[k] for k in keep],
            [self.times_before[k] for k in keep], [self.times_after[k] for k in keep],
        )

    @property
    def is_empty(self) -> bool:
        return self.indices.size == 0


def _now() -> str:
    return _dt.datetime.now().astimezone().isoformat(timespec="seconds")


class Document:
    """The pure state behind one window.

    Subscribers are plain callables ``callback(event, **info)`` registered with
    :meth:`subscribe`; ``event`` is one of :data:`EVENTS`.
    """

    def __init__(self, measurements: DataSet | None = None, settings: Method | None = None):
        self._listeners: list[Callable] = []
        self.settings = settings or Settings()
        self.measurements = Measurements(np.zeros(0), np.zeros(0))
        self.excluded = np.zeros(0, bool)
        self.reasons: list[str] = []
        self.times: list[str] = []
        self.result = None
        self.result_generation = -1
        self.stale = False
        self.fit_message = ""
        self.fit_failed = False
        self.generation = 0
        self.selection = np.zeros(0, np.intp)
        #: callables that write an edit still in progress (a reason being typed in the
        #: points table) into the document; :meth:`flush_pending_edits` calls them
        self._pending_edits: list[Callable] = []
        self._flushing = False
        if measurements is not None:
            self.apply_measurements(measurements)

    # --------------------------------------------------------------- observers
    def subscribe(self, callback: Callable) -> None:
        """Call ``callback(event, **info)`` after every change."""
        self._listeners.append(callback)

    def unsubscribe(self, callback: Callable) -> None:
        if callback in self._listeners:
            self._listeners.remove(callback)

    def _emit(self, event: str, **info) -> None:
        for cb in list(self._listeners):
            cb(event, **info)

    # --------------------------------------------------------------- edits in progress
    def add_pending_edit(self, flush: Callable) -> None:
        """Register ``flush()``, which writes an edit still open in a widget (a reason
        typed but not yet confirmed with Return) into the document."""
        self._pending_edits.append(flush)

    def flush_pending_edits(self) -> None:
        """Write every edit still in progress into the document (before it is saved,
        copied or replaced, so that nothing typed is lost)."""
        if self._flushing:
            return
        self._flushing = True
        try:
            for flush in list(self._pending_edits):
                flush()
        finally:
            self._flushing = False

    # --------------------------------------------------------------- queries
    @property
    def n(self) -> int:
        return self.measurements.n

    @property
    def has_data(self) -> bool:
        return self.n > 0

    def exclusion_record(self) -> list[tuple[int, str, str]]:
        """``(point index, reason, time)`` for every excluded point (a reason still
        being typed included)."""
        self.flush_pending_edits()
        return [(int(i), self.reasons[i], self.times[i]) for i in np.flatnonzero(self.excluded)]

    def exclusions(self) -> list[Exclusion]:
        """The exclusion record as :class:`fitcore.work.Exclusion` entries."""
        return [Exclusion(i, r, t) for i, r, t in self.exclusion_record()]

    def fit_request(self) -> dict:
        """Everything one fit needs, as copies (safe to hand to a worker thread)."""
        m = self.measurements
        return {
            "model": self.settings.model_spec(),
            "x": m.x.copy(),
            "y": m.y.copy(),
            "sigma": None if m.sigma is None else m.sigma.copy(),
            "excluded": self.excluded.copy(),
            "kwargs": self.settings.to_fit_kwargs(),
            "generation": self.generation,
        }

    def status(self) -> np.ndarray:
        """Per point: 0 used, 1 down-weighted (weight < 0.5), 2 excluded."""
        st = np.zeros(self.n, np.int8)
        res = self.result
        if res is not None and len(res.weights) == self.n:
            w = np.asarray(res.weights, float)
            st[(w < 0.5)] = 1
        st[self.excluded] = 2
        return st

    # --------------------------------------------------------------- changes
    def _bump(self) -> None:
        self.generation += 1
        if self.result is not None:
            self.stale = True

    def apply_measurements(self, m: DataSet, *, settings: Method | None = None) -> None:
        """Replace the data set (clears the exclusion record and the result)."""
        self.measurements = m
        self.excluded = np.zeros(m.n, bool)
        self.reasons = [""] * m.n
        self.times = [""] * m.n
        self.selection = np.zeros(0, np.intp)
        if settings is not None:
            self.settings = settings
        self.result = None
        self.result_generation = -1
        self.stale = False
        self.fit_message = ""
        self.fit_failed = False
        self.generation += 1
        self._emit("data")

    def make_mask_change(self, indices, excluded, reason: str = "") -> MaskChange:
        """The change that sets ``excluded`` (bool or bool array) at ``indices``.

        Points whose state would not change are left out of the change.
        """
        idx = np.unique(np.asarray(indices, dtype=np.intp).ravel())
        if idx.size and (idx[0] < 0 or idx[-1] >= self.n):
            raise IndexError(f"point index out of range 0..{self.n - 1}")
        target = np.broadcast_to(np.asarray(excluded, bool), idx.shape)
        keep = self.excluded[idx] != target
        idx, target = idx[keep], target[keep]
        now = _now()
        return MaskChange(
            indices=idx,
            before=self.excluded[idx].copy(),
            after=target.copy(),
            reasons_before=[self.reasons[i] for i in idx],
            reasons_after=[reason if t else "" for t in target],
            times_before=[self.times[i] for i in idx],
            times_after=[now if t else "" for t in target],
        )

    def apply_mask_change(self, change: MaskChange, *, undo: bool = False) -> None:
        """Apply (or with ``undo=True`` revert) a :class:`MaskChange`."""
        if change.is_empty:
            return
        vals = change.before if undo else change.after
        reasons = change.reasons_before if undo else change.reasons_after
        times = change.times_before if undo else change.times_after
        self.excluded[change.indices] = vals
        for i, r, t in zip(change.indices, reasons, times):
            self.reasons[int(i)] = r
            self.times[int(i)] = t
        self._bump()
        self._emit("mask", indices=change.indices)

    def apply_reason(self, index: int, reason: str) -> None:
        """Set the exclusion reason of one point (does not change the fit inputs)."""
        self.reasons[int(index)] = str(reason)
        self._emit("reasons", indices=np.array([index], np.intp))

    def apply_settings(self, settings: Method) -> None:
        """Replace the method settings."""
        if settings == self.settings:
            return
        self.settings = settings
        self._bump()
        self._emit("settings")

    def set_selection(self, indices, *, origin: str = "") -> None:
        """Set the selected points (not undoable, not a fit input)."""
        sel = np.unique(np.asarray(indices, dtype=np.intp).ravel())
        if sel.size == self.selection.size and np.array_equal(sel, self.selection):
            return
        self.selection = sel
        self._emit("selection", origin=origin)

    # --------------------------------------------------------------- results
    def accept_result(self, result, generation: int) -> bool:
        """Store a fit result computed from inputs of ``generation``.

        A result from older inputs is dropped (returns False). A result that did not
        converge keeps the previous result on screen, marked stale.
        """
        if generation != self.generation:
            return False
        if not getattr(result, "converged", False) and self.result is not None:
            self.fit_message = getattr(result, "message", "the fit did not converge")
            self.fit_failed = True
            self.stale = True
            self._emit("result", failed=True)
            return True
        self.result = result
        self.result_generation = generation
        self.stale = not getattr(result, "converged", False)
        self.fit_failed = self.stale
        self.fit_message = getattr(result, "message", "")
        self._emit("result", failed=not result.converged)
        return True

    def reject_fit(self, message: str, generation: int) -> bool:
        """Record that the fit of ``generation`` failed; the old result stays, stale."""
        if generation != self.generation:
            return False
        self.fit_message = message
        self.fit_failed = True
        self.stale = self.result is not None
        self._emit("result", failed=True)
        return True
