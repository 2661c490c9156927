"""Sessions through the window: save, open, refusal of bad files, autosave, recovery.

The reference for "reproduces the estimates" is the estimates themselves: a session
saved by the window and reopened in a fresh window must give values, standard
uncertainties and covariance equal with ``==`` (bit for bit), and the same as
``fitcore.fit`` run side by side on the stored data and method. The SHA-256 of the
source file is checked against ``hashlib`` directly.
"""
from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtCore import QSettings

import fitcore
from fitcore import session as fs
from desktop import app as app_module
from desktop import session_io
from desktop.commands import MaskCommand
from desktop.document import Settings
from desktop.main_window import MainWindow

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


def write_decay_csv(path, n=26, seed=11):
    """Invented demo data: an exponential decay with noise and two gross outliers."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 50.0, n)
    y = 800.0 * np.exp(-x / 12.5) + 40.0 + rng.normal(0, 6.0, n)
    y[7] += 160.0
    y[18] -= 90.0
    lines = ["Elapsed (s),Signal (mV)"] + [f"{a:.4f},{b:.5f}" for a, b in zip(x, y)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture
def make_win(qtbot, tmp_path, errors):
    made = []

    def make(name="w", **kw):
        w = MainWindow(QSettings(str(tmp_path / f"{name}.ini"), QSettings.IniFormat),
                       recovery_dir=kw.pop("recovery_dir", tmp_path / "recovery"), **kw)
        qtbot.addWidget(w)
        w.resize(1200, 800)
        made.append(w)
        return w

    return make


@pytest.fixture
def worked(make_win, tmp_path):
    """A window with data, a robust nonlinear method and two exclusions with reasons."""
    data = write_decay_csv(tmp_path / "decay.csv")
    w = make_win()
    assert w.open_path(str(data))
    doc = w.document
    doc.apply_settings(Settings(model="exp_decay", loss="huber"))
    assert w.runner.wait()
    w.push(MaskCommand(doc, doc.make_mask_change([7], True, reason="air bubble")))
    w.push(MaskCommand(doc, doc.make_mask_change([18], True, reason="detector saturated")))
    assert w.runner.wait()
    assert doc.result is not None and not doc.stale
    return w, data


def same(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return a.shape == b.shape and bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))


def test_save_and_reopen_reproduces_estimates_bit_for_bit(worked, make_win, tmp_path, errors):
    w, data = worked
    doc = w.document
    path = tmp_path / "work.ballast"
    assert w.sessions.save_to(path)
    assert not w.sessions.dirty and w.windowTitle().endswith("work.ballast")

    raw = json.loads(path.read_text(encoding="utf-8"))
    assert raw["format"] == "ballast-session" and raw["version"] == fs.FORMAT_VERSION
    assert raw["data"]["source_file"] == str(data)
    assert raw["data"]["source_sha256"] == hashlib.sha256(data.read_bytes()).hexdigest()
    assert raw["data"]["columns"]["x"] == "Elapsed" and raw["data"]["units"]["y"] == "mV"
    assert raw["method"]["model"] == {"builtin": "exp_decay", "options": {}}
    assert raw["method"]["loss"] == "huber"
    assert [e["reason"] for e in raw["exclusions"]] == ["air bubble", "detector saturated"]
    assert raw["result"] is not None

    w2 = make_win("w2")
    assert w2.open_path(str(path))  # File > Open also takes sessions
    assert w2.runner.wait()
    d2 = w2.document
    for a in ("values", "stderr", "covariance", "weights", "residuals"):
        assert same(getattr(d2.result, a), getattr(doc.result, a)), a
    assert d2.result.scale == doc.result.scale
    assert w2.sessions.last_check is True
    assert d2.exclusion_record() == doc.exclusion_record()  # reasons and times kept
    assert d2.settings == doc.settings
    assert np.array_equal(d2.measurements.x, doc.measurements.x)
    assert np.array_equal(d2.measurements.y, doc.measurements.y)
    assert d2.measurements.label("y") == "Signal (mV)"
    assert w2.sessions.source_sha256 == raw["data"]["source_sha256"]
    assert not errors

    # side by side: fitcore alone, from the file, gives the same numbers
    alone = fs.load_session(path).refit()
    assert same(alone.values, doc.result.values) and same(alone.covariance, doc.result.covariance)
    assert fs.load_session(path).reproduces(d2.result)


@pytest.mark.parametrize("settings", [
    Settings(model="line", loss="l2"),
    Settings(model="A*exp(-x/tau) + C", model_kind="formula", loss="general", alpha=0.5,
             p0=(("A", 700.0), ("C", 30.0), ("tau", 10.0))),
    Settings(model="exp_decay", loss="tukey", scale=7.5, fixed=(("C", 40.0),)),
])
def test_reopen_reproduces_other_methods(make_win, tmp_path, settings, errors):
    data = write_decay_csv(tmp_path / "decay.csv", seed=5)
    w = make_win()
    assert w.open_path(str(data))
    w.document.apply_settings(settings)
    assert w.runner.wait() and w.document.result is not None and not w.document.stale
    path = tmp_path / "m.ballast"
    assert w.sessions.save_to(path)
    w2 = make_win("w2")
    assert w2.sessions.open_session(path)
    assert w2.runner.wait()
    assert w2.document.settings == settings
    for a in ("values", "stderr", "covariance"):
        assert same(getattr(w2.document.result, a), getattr(w.document.result, a)), a
    assert w2.sessions.last_check is True
    assert not errors


def test_newer_or_corrupted_session_is_refused_and_work_stays(worked, tmp_path, errors):
    w, _data = worked
    doc = w.document
    good = tmp_path / "good.ballast"
    assert w.sessions.save_to(good)
    before = (doc.measurements.x.copy(), doc.result.values.copy(), doc.exclusion_record(),
              doc.settings, w.sessions.path)

    raw = json.loads(good.read_text(encoding="utf-8"))
    raw["version"] = fs.FORMAT_VERSION + 1
    newer = tmp_path / "newer.ballast"
    newer.write_text(json.dumps(raw), encoding="utf-8")
    cut = tmp_path / "cut.ballast"
    cut.write_bytes(good.read_bytes()[: len(good.read_bytes()) // 2])
    garbage = tmp_path / "garbage.ballast"
    garbage.write_bytes(b"\x89PNG\r\n\x1a\n not json at all \xff")

    for bad, words in ((newer, "newer Ballast"), (cut, "not valid JSON"),
                       (garbage, "not a Ballast session")):
        errors.clear()
        assert not w.sessions.open_session(bad)
        assert len(errors) == 1 and words in errors[0][1], errors
        assert bad.name in errors[0][1]
        assert np.array_equal(doc.measurements.x, before[0])
        assert same(doc.result.values, before[1])
        assert doc.exclusion_record() == before[2]
        assert doc.settings == before[3] and w.sessions.path == before[4]


FIXTURES = Path(__file__).resolve().parents[1] / "data" / "sessions"


def test_window_keeps_every_fit_option_of_a_library_session(make_win, tmp_path, errors):
    # library_v1.ballast was written by the library before the window and the library
    # shared one model of the work: a polynomial with a degree option, a tuning
    # constant, positional start values and sigma taken as relative. The window once
    # refused such a file; it now opens it, refits it exactly as fitcore does (the
    # stored estimates may differ when the engine has changed since: the window then
    # says so), and saves it back with the method unchanged.
    stored = fs.load_session(FIXTURES / "library_v1.ballast")
    w = make_win()
    assert w.sessions.open_session(FIXTURES / "library_v1.ballast")
    assert w.runner.wait()
    assert w.document.settings == stored.method
    assert same(w.document.result.values, stored.refit().values)
    assert w.sessions.last_check is not None
    assert w.document.exclusion_record() == [(18, "detector saturated",
                                              "2026-12-04T18:50:00+00:00")]
    assert w.method_panel.param_table.rowCount() == 4  # the degree-3 polynomial's a0..a3
    out = tmp_path / "again.ballast"
    assert w.sessions.save_to(out)
    again = fs.load_session(out)
    assert again.method == stored.method
    assert again.method.tuning == 5.0 and again.method.sigma_mode == "relative"
    assert again.method.p0 == (1.0, 0.0, 0.0, 0.0)
    assert again.reproduces(stored.refit())
    assert all(title == "Estimates differ from the saved ones" for title, _ in errors)


def test_session_saved_by_the_window_in_format_1_still_opens(make_win, errors):
    # window_v1.ballast: saved by the window before this model of the work (a held
    # parameter, one exclusion with its reason, the view)
    w = make_win()
    assert w.sessions.open_session(FIXTURES / "window_v1.ballast")
    assert w.runner.wait()
    s = w.document.settings
    assert (s.model, s.loss, dict(s.fixed)) == ("exp_decay", "huber", {"C": 40.0})
    stored = fs.load_session(FIXTURES / "window_v1.ballast")
    assert same(w.document.result.values, stored.refit().values)
    assert w.sessions.last_check is not None
    assert [r for _, r, _ in w.document.exclusion_record()] == ["air bubble"]
    assert w.document.measurements.label("y") == "Signal (mV)"
    assert all(title == "Estimates differ from the saved ones" for title, _ in errors)


def test_file_rows_survive_reopening(worked, make_win, tmp_path, errors):
    w, _ = worked
    rows = w.document.measurements.source_rows
    assert rows is not None and rows.size == w.document.n
    path = tmp_path / "rows.ballast"
    assert w.sessions.save_to(path)
    w2 = make_win("w2")
    assert w2.sessions.open_session(path)
    assert np.array_equal(w2.document.measurements.source_rows, rows)
    assert w2.document.measurements.file_row(7) == w.document.measurements.file_row(7)
    assert not errors


def test_autosave_writes_a_recovery_file_after_changes_pause(worked, qtbot, tmp_path):
    w, _ = worked
    sm = w.sessions
    sm._timer.setInterval(40)
    doc = w.document
    w.push(MaskCommand(doc, doc.make_mask_change([3], True, reason="label smudged")))
    qtbot.waitUntil(lambda: sm.last_recovery is not None and sm.last_recovery.exists(), timeout=5000)
    rec = fs.load_session(sm.last_recovery)
    assert sm.last_recovery.parent == tmp_path / "recovery"
    assert sorted(e.index for e in rec.exclusions) == [3, 7, 18]
    assert {e.index: e.reason for e in rec.exclusions}[3] == "label smudged"
    assert rec.saved_as == ""  # never saved: recovery for untitled work
    # saving the work removes the recovery file; a normal close leaves none
    assert sm.save_to(tmp_path / "saved.ballast")
    assert fs.find_recovery(tmp_path / "recovery") == []
    w.push(MaskCommand(doc, doc.make_mask_change([3], False)))
    qtbot.waitUntil(lambda: len(fs.find_recovery(tmp_path / "recovery")) == 1, timeout=5000)
    assert fs.load_session(fs.find_recovery(tmp_path / "recovery")[0]).saved_as == \
        str(tmp_path / "saved.ballast")
    w.close()
    assert fs.find_recovery(tmp_path / "recovery") == []


def _crashed_work(tmp_path):
    """The recovery file a crashed window would have left: a session plus its fit."""
    data = write_decay_csv(tmp_path / "decay.csv", seed=9)
    t = fitcore.read_table(data)
    s = fs.Session(x=t.column("Elapsed"), y=t.column("Signal"),
                   names={"x": "Elapsed", "y": "Signal", "sigma": ""},
                   units={"x": "s", "y": "mV"}, source_file=str(data),
                   source_sha256=fs.file_sha256(data),
                   method=fs.Method(model="exp_decay", loss="cauchy"))
    s.exclude(7, "air bubble", "2025-03-01T10:00:00+00:00")
    s.store_result(s.refit())
    rec = tmp_path / "recovery"
    fs.write_recovery(s, rec, for_path=None)
    return s, rec


def test_start_offers_recovery_and_restores(qtbot, tmp_path, monkeypatch, errors):
    s, rec = _crashed_work(tmp_path)
    asked = []
    monkeypatch.setattr(session_io, "ask_restore", lambda parent, text: asked.append(text) or True)
    monkeypatch.setattr(session_io, "ask_unsaved", lambda parent, text: "discard")
    args = app_module.build_parser().parse_args([])
    w = app_module.create_window(args, QSettings(str(tmp_path / "a.ini"), QSettings.IniFormat),
                                 recovery_dir=rec)
    qtbot.addWidget(w)
    assert w.runner.wait()
    assert len(asked) == 1 and "never saved" in asked[0] and "decay.csv" in asked[0]
    doc = w.document
    assert doc.n == s.n_points and np.array_equal(doc.measurements.x, s.x)
    assert doc.exclusion_record() == [(7, "air bubble", "2025-03-01T10:00:00+00:00")]
    assert doc.settings.model == "exp_decay" and doc.settings.loss == "cauchy"
    assert s.reproduces(doc.result) and w.sessions.last_check is True
    assert w.sessions.dirty  # restored work is not saved yet: still protected
    assert len(fs.find_recovery(rec)) == 1
    assert not errors


def test_declined_recovery_is_discarded(qtbot, tmp_path, monkeypatch, errors):
    _s, rec = _crashed_work(tmp_path)
    monkeypatch.setattr(session_io, "ask_restore", lambda parent, text: False)
    monkeypatch.setattr(session_io, "ask_unsaved", lambda parent, text: "discard")
    args = app_module.build_parser().parse_args([])
    w = app_module.create_window(args, QSettings(str(tmp_path / "a.ini"), QSettings.IniFormat),
                                 recovery_dir=rec)
    qtbot.addWidget(w)
    assert fs.find_recovery(rec) == []
    assert w.document.exclusion_record() == []  # the crashed work was not loaded


def test_close_asks_about_unsaved_work(worked, monkeypatch, tmp_path):
    w, _ = worked
    w.sessions.interactive = True
    answers = ["cancel"]
    monkeypatch.setattr(session_io, "ask_unsaved", lambda parent, text: answers[0])
    w.show()
    w.sessions.autosave()
    assert w.sessions.last_recovery.exists()
    assert not w.close()  # cancelled: the window stays, the recovery file too
    assert w.isVisible() and w.sessions.last_recovery.exists()
    answers[0] = "save"
    monkeypatch.setattr(session_io, "ask_save_path", lambda parent, start: str(tmp_path / "c"))
    assert w.close()
    assert fs.load_session(tmp_path / "c.ballast").reproduces(w.document.result)
    assert fs.find_recovery(tmp_path / "recovery") == []


def test_save_failure_keeps_previous_session_and_says_why(worked, tmp_path, errors, monkeypatch):
    w, _ = worked
    path = tmp_path / "keep.ballast"
    assert w.sessions.save_to(path)
    before = path.read_bytes()
    w.push(MaskCommand(w.document, w.document.make_mask_change([2], True)))
    assert w.runner.wait()

    def full_disk(src, dst):
        raise OSError(28, "No space left on device")

    with monkeypatch.context() as m:
        m.setattr(fs.os, "replace", full_disk)  # the last step of the atomic save fails
        assert not w.sessions.save_to(path)
    assert errors and "could not save" in errors[-1][1] and "No space" in errors[-1][1]
    assert path.read_bytes() == before  # the previous session is intact
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]  # no litter
    assert w.sessions.dirty  # the work is still marked unsaved


def test_source_file_is_never_modified(worked, make_win, tmp_path, qtbot, errors, monkeypatch):
    w, data = worked
    data_bytes = data.read_bytes()
    stat = os.stat(data)
    doc = w.document
    w.sessions._timer.setInterval(20)
    doc.apply_settings(doc.settings.with_(loss="tukey"))
    assert w.runner.wait()
    qtbot.waitUntil(lambda: w.sessions.last_recovery is not None, timeout=5000)
    ex = w.reports
    assert w.sessions.save_to(tmp_path / "a.ballast")
    assert w.sessions.save_to(tmp_path / "b.ballast")
    assert ex.write_html(tmp_path / "r.html") and ex.write_pdf(tmp_path / "r.pdf")
    assert ex.write_curve_csv(tmp_path / "c.csv") and ex.write_points_csv(tmp_path / "p.csv")
    assert ex.write_plot(tmp_path / "p.png", (400, 300))
    assert ex.write_plot(tmp_path / "p.svg", (400, 300))
    # trying to write over the measurement file is refused, with a message
    errors.clear()
    assert not w.sessions.save_to(data)
    assert not ex.write_points_csv(data)
    assert not ex.write_html(data)
    assert len(errors) == 3 and all("measurement file" in t for _, t in errors), errors
    w2 = make_win("w2")
    assert w2.sessions.open_session(tmp_path / "b.ballast") and w2.runner.wait()
    w2.close()
    w.close()
    assert data.read_bytes() == data_bytes
    st2 = os.stat(data)
    assert (st2.st_mtime_ns, st2.st_size) == (stat.st_mtime_ns, stat.st_size)
