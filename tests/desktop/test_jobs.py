"""The window's one background-job mechanism (desktop/jobs.py, desktop/job_kinds.py).

Behaviour checks (common practice for job queues: one answer per job, newest wins,
cancel answers at once); no timings are asserted.
"""
from __future__ import annotations

import numpy as np
import pytest

import fitcore
from desktop import job_kinds, jobs


@pytest.fixture
def channel(qtbot):
    ch = jobs.Channel()
    yield ch
    ch.shutdown()


def _record(ch):
    seen = []
    ch.finished.connect(lambda r: seen.append(("finished", r)))
    ch.failed.connect(lambda m: seen.append(("failed", m)))
    ch.cancelled.connect(lambda r: seen.append(("cancelled", r)))
    return seen


def test_a_table_read_in_the_child_equals_the_one_read_here(channel, tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("# title line\nx (s),y (mV),note\n1,2.5,a\n2,3.25,b\n3,,c\n4,5e-3,a\n", encoding="utf-8")
    here = fitcore.read_table(path)
    job = channel.submit("read", {"path": str(path)})
    assert job.where == "process" and job.wait() and job.state == "finished"
    there = job.result
    assert there.columns == here.columns and there.units == here.units and there.notes == here.notes
    for c in here.columns:
        np.testing.assert_array_equal(there.column(c), here.column(c))  # bit for bit
    np.testing.assert_array_equal(there.source_rows, here.source_rows)
    assert there.dialect == here.dialect and there.sha256 == here.sha256
    assert there.groups("note")[1] == here.groups("note")[1]


def test_a_refused_file_fails_with_the_readers_message(channel, tmp_path):
    seen = _record(channel)
    job = channel.submit("read", {"path": str(tmp_path / "missing.csv")})
    assert job.wait() and job.state == "failed"
    assert seen == [("failed", job.message)] and "missing.csv" in job.message


def test_newest_submission_wins_and_cancel_answers_at_once(channel, tmp_path):
    seen = _record(channel)
    busy = []
    channel.busy_changed.connect(busy.append)
    x = np.linspace(0, 1, 50)
    req = {"model": "line", "x": x, "y": 2 * x, "sigma": None, "excluded": np.zeros(50, bool), "kwargs": {}}
    first = channel.submit("fit", req)
    second = channel.submit("fit", {**req, "y": 3 * x})
    assert first.state == "cancelled" and second.running
    assert channel.wait() and second.state == "finished"
    res, msg = second.result
    assert msg is None and res.values[1] == pytest.approx(3.0)
    assert [k for k, _ in seen] == ["finished"] and busy == [True, False]  # one answer: the newest
    third = channel.submit("fit", req)
    channel.cancel()
    assert third.state == "cancelled" and not channel.running  # at once, without waiting
    assert seen[-1] == ("cancelled", None)
    channel.idle_worker()


def test_inline_jobs_answer_before_submit_returns(channel):
    seen = _record(channel)
    job = channel.submit("formula", {"text": "a*exp(-x/tau)"}, where="inline")
    assert job.state == "finished" and seen == [("finished", job.result)]
    assert job.result[0] is True and job.result[2] == ("a", "tau")


def test_a_child_job_past_its_time_limit_is_ended_with_a_message():
    # the bootstrap of a 2000-resample run cannot end within 1 ms
    x = np.linspace(0, 10, 40)
    res = fitcore.fit("line", x, 1 + 2 * x + np.sin(7 * x))
    with pytest.raises(job_kinds.TimeLimit, match="did not finish within"):
        job_kinds.run_here("bootstrap", {"result": res, "kind": "case", "B": 20000, "seed": 1, "level": 0.95},
                           where="process", time_limit=0.001)


def test_hostile_formula_is_checked_in_the_child_with_a_clear_message():
    ok, msg, names = job_kinds.run_here("formula", {"text": "(((3*a)**999)**999)**999+x"})
    assert not ok and "total exponent" in msg and names == ()


def test_an_internal_error_in_the_child_reaches_the_parent_log_with_its_traceback(caplog):
    # the child's stderr goes nowhere: an engine bug there is answered in one line and
    # its traceback travels with the answer, for the parent's log (common practice)
    import io
    import json
    import logging

    out = io.StringIO()
    job_kinds.serve(io.StringIO(json.dumps({"kind": "fit", "payload": {}}) + "\n"), out)
    answer = json.loads(out.getvalue().splitlines()[-1])
    assert answer["error"].startswith("an internal error (KeyError")
    assert answer["traceback"].startswith("Traceback") and "KeyError" in answer["traceback"]
    with caplog.at_level(logging.WARNING, logger="desktop.job_kinds"):
        with pytest.raises(ValueError, match="^an internal error"):
            job_kinds.raise_child_error(answer)
    assert any("KeyError" in r.getMessage() for r in caplog.records)


def test_a_job_can_hand_over_items_while_it_runs(channel, monkeypatch):
    # partial results (the batch window's rows) arrive in order, none lost to the
    # progress throttle, before the job's one answer (common practice for a job queue
    # that streams)
    def run(p, progress, cancel):
        for i in range(p["n"]):
            progress(i + 1, p["n"], [i])
        return "all sent"

    monkeypatch.setitem(job_kinds.KINDS, "stream", job_kinds.Kind(run=run, title="streaming"))
    got, order = [], []
    channel.partial.connect(lambda items: (got.extend(items), order.append("partial")))
    channel.finished.connect(lambda r: order.append(r))
    job = channel.submit("stream", {"n": 200})
    assert job.wait() and job.state == "finished"
    assert got == list(range(200)) and order[-1] == "all sent" and order.count("all sent") == 1
