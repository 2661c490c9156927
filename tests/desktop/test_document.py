"""The window's pure state and its undo commands (no widgets)."""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtGui import QUndoStack

from desktop.commands import MaskCommand, ReasonCommand, SettingsCommand
from desktop.document import Document, Measurements


def make_doc(n=10):
    # invented demo data
    x = np.arange(n, dtype=float)
    return Document(Measurements(x, 2 * x + 1, x_name="t", x_unit="s", y_name="S", y_unit="mV"))


def test_events_and_generation():
    doc = make_doc()
    seen = []
    doc.subscribe(lambda ev, **kw: seen.append(ev))
    g = doc.generation
    doc.apply_mask_change(doc.make_mask_change([2, 3], True, reason="bubble"))
    assert seen == ["mask"] and doc.generation == g + 1
    assert doc.excluded.tolist() == [False, False, True, True] + [False] * 6
    rec = doc.exclusion_record()
    assert [r[:2] for r in rec] == [(2, "bubble"), (3, "bubble")]
    assert all(r[2] for r in rec)  # a time is recorded


def test_mask_change_leaves_out_no_ops():
    doc = make_doc()
    doc.apply_mask_change(doc.make_mask_change([1], True))
    ch = doc.make_mask_change([1, 2], True)
    assert ch.indices.tolist() == [2]


def test_mask_change_rejects_bad_index():
    with pytest.raises(IndexError):
        make_doc().make_mask_change([10], True)


def test_undo_redo_mask_and_reason(qapp):
    doc = make_doc()
    stack = QUndoStack()
    stack.push(MaskCommand(doc, doc.make_mask_change([4], True, reason="spike")))
    assert doc.excluded[4] and doc.reasons[4] == "spike"
    stack.push(ReasonCommand(doc, 4, "air bubble"))
    assert doc.reasons[4] == "air bubble"
    stack.undo()
    assert doc.reasons[4] == "spike"
    stack.undo()
    assert not doc.excluded.any() and doc.reasons[4] == "" and doc.times[4] == ""
    stack.redo()
    assert doc.excluded[4] and doc.reasons[4] == "spike"


def test_drag_steps_merge_into_one_command(qapp):
    doc = make_doc()
    stack = QUndoStack()
    token = object()
    stack.push(MaskCommand(doc, doc.make_mask_change([1, 2], True), drag_token=token))
    stack.push(MaskCommand(doc, doc.make_mask_change([3], True), drag_token=token))
    # the rectangle shrinks again: point 1 leaves it and goes back to its old state
    stack.push(MaskCommand(doc, doc.make_mask_change([1], False), drag_token=token))
    assert stack.count() == 1
    assert np.flatnonzero(doc.excluded).tolist() == [2, 3]
    stack.undo()
    assert not doc.excluded.any()
    # a new drag is a new step
    stack.redo()
    stack.push(MaskCommand(doc, doc.make_mask_change([5], True), drag_token=object()))
    assert stack.count() == 2


def test_drag_that_ends_where_it_started_leaves_no_step(qapp):
    doc = make_doc()
    stack = QUndoStack()
    token = object()
    stack.push(MaskCommand(doc, doc.make_mask_change([7], True)))
    stack.push(MaskCommand(doc, doc.make_mask_change([1], True), drag_token=token))
    stack.push(MaskCommand(doc, doc.make_mask_change([1], False), drag_token=token))
    assert stack.count() == 1 and stack.undoText() == "Exclude 1 point"


def test_settings_command(qapp):
    doc = make_doc()
    stack = QUndoStack()
    old = doc.settings
    stack.push(SettingsCommand(doc, old.with_(loss="cauchy", fixed={"b": 1.0})))
    assert doc.settings.loss == "cauchy" and doc.settings.to_fit_kwargs()["fixed"] == {"b": 1.0}
    stack.undo()
    assert doc.settings == old


def test_results_from_old_generation_are_dropped():
    doc = make_doc()

    class R:  # minimal stand-in carrying only what accept_result reads
        converged = True
        message = "ok"
        weights = np.ones(10)

    g = doc.generation
    doc.apply_mask_change(doc.make_mask_change([0], True))
    assert not doc.accept_result(R(), g)
    assert doc.accept_result(R(), doc.generation) and not doc.stale
    R.converged = False
    failed = R()
    doc.apply_settings(doc.settings.with_(loss="l1"))
    assert doc.accept_result(failed, doc.generation)
    assert doc.stale and doc.result is not failed


def test_fit_request_is_a_copy():
    doc = make_doc()
    req = doc.fit_request()
    req["excluded"][0] = True
    assert not doc.excluded[0]
    assert req["kwargs"]["loss"] == doc.settings.loss


def test_measurements_validate_lengths():
    with pytest.raises(ValueError, match="must match"):
        Measurements([1, 2], [1])
    m = Measurements([1], [2], x_name="Time", x_unit="s")
    assert m.label("x") == "Time (s)" and m.label("y") == "y"


# ---------------------------------------------------------------------- one model of the work
from hypothesis import HealthCheck, given  # noqa: E402
from hypothesis import settings as hsettings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from fitcore.session import session_from_json  # noqa: E402
from desktop.session_io import apply_session, document_to_session, session_json  # noqa: E402


def _window_round_trip(doc):
    text = session_json(document_to_session(doc), {"log_x": True})
    other = Document()
    apply_session(other, session_from_json(text))
    return other


def test_document_holds_the_fitcore_types():
    from fitcore.work import DataSet, Method

    doc = make_doc()
    assert isinstance(doc.measurements, DataSet) and isinstance(doc.settings, Method)
    assert doc.settings.loss == "huber"  # the window's default method


@hsettings(max_examples=60, deadline=None,
           suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_every_fit_option_survives_the_window(work_strategies, data):
    method = data.draw(work_strategies.methods)
    # what the window saves and reopens: the document's method, data set (with file
    # rows and read notes) and exclusion record, unchanged
    x = np.arange(6, dtype=float)
    doc = Document(Measurements(x, 3 * x, x_name="t", source_rows=np.arange(2, 8),
                                notes=("1 row skipped: empty",)))
    doc.apply_settings(method)
    doc.apply_mask_change(doc.make_mask_change([1, 4], True, reason="bubble"))
    other = _window_round_trip(doc)
    assert other.settings == method
    assert other.measurements == doc.measurements
    assert other.exclusion_record() == doc.exclusion_record()
