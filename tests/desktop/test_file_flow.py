"""Replacing the work on screen: the save question, unusable files, the kept model,
stale estimates, sample descriptions, the view kept in sessions, counted nouns.

Every question to the user is answered by replacing the module hook
(``session_io.ask_unsaved``, ``ask_save_path``); no modal dialog is opened. The
references are independent of the code under test: the document's state before the
action (compared with ``==``), the session JSON read with ``json``, the sample
sets' README read here, and ``fitcore.fit`` run side by side.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from PySide6.QtCore import QMimeData, QSettings, QUrl
from PySide6.QtGui import QGuiApplication

import fitcore
from fitcore import session as fs
from desktop import dialogs, session_io
from desktop.commands import MaskCommand, ReasonCommand, SettingsCommand
from desktop.document import MaskChange
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


def write_rows(path, rows, header="x,y"):
    path.write_text(header + "\n" + "\n".join(",".join(str(v) for v in r) for r in rows) + "\n",
                    encoding="utf-8")
    return path


@pytest.fixture
def make_win(qtbot, tmp_path, errors):
    def make(name="w"):
        w = MainWindow(QSettings(str(tmp_path / f"{name}.ini"), QSettings.IniFormat),
                       recovery_dir=tmp_path / f"recovery-{name}")
        qtbot.addWidget(w)
        w.resize(1200, 800)
        return w

    return make


@pytest.fixture
def asked(monkeypatch):
    """The unsaved-work question, answered by ``asked.answer``; the texts are recorded."""
    class Asked(list):
        answer = "cancel"

    seen = Asked()

    def ask(parent, text):
        seen.append(text)
        return seen.answer

    monkeypatch.setattr(session_io, "ask_unsaved", ask)
    return seen


@pytest.fixture
def worked(make_win, tmp_path, asked):
    """Interactive window with unsaved work: an exponential decay under Huber, two
    exclusions with reasons, all made through undoable commands as the window does."""
    data = write_decay_csv(tmp_path / "decay.csv")
    w = make_win()
    w.sessions.interactive = True
    assert w.open_path(str(data))
    doc = w.document
    w.push(SettingsCommand(doc, doc.settings.with_(model="exp_decay", loss="huber")))
    w.push(MaskCommand(doc, doc.make_mask_change([7], True, reason="air bubble")))
    w.push(MaskCommand(doc, doc.make_mask_change([18], True)))
    w.push(ReasonCommand(doc, 18, "detector saturated"))
    assert w.runner.wait()
    assert doc.result is not None and not doc.stale
    return w  # pytest-qt closes it while ``asked`` still answers (no real dialog)


def snapshot(w):
    doc = w.document
    return (doc.measurements.x.copy(), doc.measurements.y.copy(), doc.exclusion_record(),
            doc.settings, doc.result, doc.result.values.copy(), doc.stale,
            w.undo_stack.count(), w.undo_stack.index(), w.windowTitle(), w.sessions.path)


def assert_unchanged(w, before):
    now = snapshot(w)
    assert np.array_equal(now[0], before[0]) and np.array_equal(now[1], before[1])
    assert now[2] == before[2]  # exclusions, reasons and times
    assert now[3] == before[3]  # method
    assert now[4] is before[4] and np.array_equal(now[5], before[5]) and now[6] == before[6]
    assert now[7:] == before[7:]  # undo history, title, session path


# ------------------------------------------------------------------ 1. the save question
def test_cancel_keeps_everything_for_every_way_of_opening(worked, asked, tmp_path, monkeypatch,
                                                          errors):
    w = worked
    other = write_rows(tmp_path / "other.csv", [(i, 2 * i + 1) for i in range(10)])
    before = snapshot(w)
    w.add_recent(str(other))
    monkeypatch.setattr(dialogs, "SamplePicker", _FakePicker.with_path(str(other)))
    QGuiApplication.clipboard().setText("a\tb\n1\t2\n2\t4\n3\t6.5\n")
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(other))])

    ways = {
        "open": lambda: w.open_path(str(other)),
        "recent": lambda: w.recent_menu.actions()[0].trigger(),
        "sample picker": w.open_sample_picker,
        "paste": w.paste_table,
        "drop": lambda: w.dropEvent(_Drop(mime)),
    }
    for name, way in ways.items():
        n = len(asked)
        way()
        assert w.runner.wait()
        assert len(asked) == n + 1, f"{name}: no question asked"
        assert_unchanged(w, before)
    assert "air bubble" not in asked[0] and "2 points" in asked[0]  # says what is at stake
    assert "other.csv" in asked[0]
    assert w.sessions.has_unsaved_work()
    assert not errors


def test_discard_replaces_and_save_saves_first(worked, asked, tmp_path, monkeypatch):
    w = worked
    other = write_rows(tmp_path / "other.csv", [(i, 2 * i + 1 + 0.1 * (-1) ** i) for i in range(10)])
    asked.answer = "save"
    monkeypatch.setattr(session_io, "ask_save_path", lambda parent, start: str(tmp_path / "kept"))
    record = w.document.exclusion_record()
    assert w.open_path(str(other))
    assert w.runner.wait()
    saved = fs.load_session(tmp_path / "kept.ballast")  # the work was saved before replacing
    assert [(e.index, e.reason, e.time) for e in saved.exclusions] == record
    assert w.document.n == 10 and w.undo_stack.count() == 0
    # a freshly opened file holds no changes: opening the next asks nothing
    n = len(asked)
    assert w.open_path(str(write_decay_csv(tmp_path / "third.csv", seed=4)))
    assert len(asked) == n
    w.push(MaskCommand(w.document, w.document.make_mask_change([3], True)))
    asked.answer = "discard"
    assert w.open_path(str(other))
    assert len(asked) == n + 1 and w.document.n == 10
    assert w.document.exclusion_record() == []


def test_save_cancelled_in_the_file_dialog_keeps_the_work(worked, asked, tmp_path, monkeypatch):
    w = worked
    before = snapshot(w)
    asked.answer = "save"
    monkeypatch.setattr(session_io, "ask_save_path", lambda parent, start: "")
    assert not w.open_path(str(write_rows(tmp_path / "o.csv", [(1, 2), (2, 3), (3, 5)])))
    assert_unchanged(w, before)


@pytest.mark.parametrize("rows", [
    [(1, 2)],                          # one point: not even a line can be fitted
    [(1, 5), (1, 5), (1, 5), (1, 5)],  # one x value: no slope
])
def test_unusable_file_keeps_previous_data_and_result(worked, asked, tmp_path, errors, rows):
    w = worked
    before = snapshot(w)
    bad = write_rows(tmp_path / "unusable.csv", rows)
    asked.answer = "discard"
    assert not w.open_path(str(bad))
    assert w.runner.wait()
    assert len(asked) == 1  # asked first, also for a file that then turns out unusable
    assert errors and "unusable.csv" in errors[-1][1] and "stay as they were" in errors[-1][1]
    assert_unchanged(w, before)
    assert w.sessions.has_unsaved_work()  # nothing was replaced: still unsaved


def test_unusable_file_without_questions_also_keeps_the_data(make_win, tmp_path, errors):
    w = make_win()  # not interactive (scripts, tests): no question, same protection
    assert w.open_path(str(write_decay_csv(tmp_path / "d.csv")))
    # the catalogue search for a better model than the line runs after the first fit and
    # may switch the model later: the snapshot is taken once it has (a busy machine
    # finished it after the snapshot, and the test failed)
    assert w.model_check.wait(300000) and w.runner.wait()
    before = snapshot(w)
    assert not w.open_path(str(write_rows(tmp_path / "onerow.csv", [(1, 2)])))
    assert "1 point " in errors[-1][1]
    assert_unchanged(w, before)


# ------------------------------------------------------------------ 2. the kept model
def test_kept_model_is_announced(worked, asked, tmp_path):
    w = worked
    asked.answer = "discard"
    nxt = write_decay_csv(tmp_path / "next-week.csv", n=30, seed=2)
    assert w.open_path(str(nxt))
    assert w.runner.wait()
    doc = w.document
    assert doc.settings.model == "exp_decay"  # kept: the same kind of data each week
    msg = w.banner.text("model")  # stays above the plot (the status bar moves on)
    assert ("Model kept from the previous data: Exponential decay (time constant); choose "
            "another in Method") in msg, msg
    assert not w.model_check.running  # it fits these data: no catalogue search
    ref = fitcore.fit("exp_decay", doc.measurements.x, doc.measurements.y, loss="huber")
    np.testing.assert_allclose(doc.result.values, ref.values, rtol=1e-10)


@pytest.mark.parametrize("where", ["inline", "worker"])
def test_model_that_cannot_fit_the_new_data_falls_back_to_a_line(worked, asked, tmp_path, where):
    # the status bar ends on the same message whether the first fit of the new data
    # ran inline (before the message) or in the worker (after it)
    w = worked
    asked.answer = "discard"
    if where == "worker":
        w.runner.thread_threshold = 0
    else:
        w.runner.slow_fit_s = float("inf")
        w.runner.thread_threshold = 10**9
    two = write_rows(tmp_path / "two.csv", [(1.0, 2.0), (3.0, 7.0)])  # 3 parameters, 2 points
    assert w.open_path(str(two))
    assert w.runner.wait()
    doc = w.document
    # two points are too few for a robust scale (fitcore refuses 2p > n): least squares
    assert doc.settings.model == "line" and doc.settings.loss == "l2"
    msg = w.banner.text("model")  # not the status bar, which the fit's own news replaces
    assert msg.startswith("Switched to a straight line by least squares") and \
        "Exponential decay" in msg and "Huber" in msg, msg
    ref = fitcore.fit("line", doc.measurements.x, doc.measurements.y, loss="l2")
    np.testing.assert_allclose(doc.result.values, ref.values, rtol=1e-12)


def test_fallback_note_names_a_loss_whose_title_says_loss_once(worked, asked, tmp_path):
    # the general loss's title already holds the word ("general robust loss (Barron)"):
    # the note read "with the general robust loss (Barron) loss" (issue 13's example)
    w = worked
    asked.answer = "discard"
    w.document.apply_settings(w.document.settings.with_(loss="general", alpha=1.0))
    assert w.runner.wait()
    assert w.open_path(str(write_rows(tmp_path / "two.csv", [(1.0, 2.0), (3.0, 7.0)])))
    assert w.runner.wait()
    msg = w.banner.text("model")
    assert msg.startswith("Switched to a straight line by least squares"), msg
    assert "with the general robust loss (Barron), cannot fit" in msg, msg


def test_sample_sets_still_open_with_their_own_model(worked, asked):
    w = worked
    asked.answer = "discard"
    path = next(p for p in dialogs.sample_sets() if p.name.startswith("05"))
    assert w.open_path(str(path))
    assert w.runner.wait()
    assert w.document.settings.model == "logistic4"
    assert "Model kept" not in w.banner.text("model") and not w.model_check.running


# ------------------------------------------------------------------ 3. stale estimates
def _make_stale(w):
    doc = w.document
    good = doc.result
    w.push(SettingsCommand(doc, doc.settings.with_(model="A*exp(-t/tau) + C",
                                                    model_kind="formula")))
    assert w.runner.wait()
    assert doc.result is good and doc.stale and doc.fit_failed
    return good


def test_copy_refuses_stale_estimates(worked, errors):
    w = worked
    QGuiApplication.clipboard().setText("before")
    _make_stale(w)
    assert w.copy_estimates() == ""
    for key in ("plain", "tsv", "latex", "html"):
        assert w.reports.copy(key) == ""
    assert QGuiApplication.clipboard().text() == "before"
    msg = w.statusBar().currentMessage()
    assert "Not copied" in msg and "stale" in msg and "undo" in msg, msg
    # file exports refuse too (with a message box), and a report built directly says so
    assert w.reports.write_html(str(w.sessions.recovery_dir.parent / "r.html")) == ""
    assert errors and "out of date" in errors[-1][0]
    assert "NOT CURRENT" in w.reports.report_html(w.document.result)
    # once the inputs are fixed (undo), copying works again
    w.undo_stack.undo()
    assert w.runner.wait() and not w.document.stale
    text = w.copy_estimates()
    assert text and QGuiApplication.clipboard().text() == text
    assert "NOT CURRENT" not in w.reports.report_html(w.document.result)


# ------------------------------------------------------------------ 4. sample descriptions
def _readme_stories():
    """The story column of sample_sets/README.md, read here independently."""
    out = {}
    for line in (dialogs.SAMPLE_DIR / "README.md").read_text(encoding="utf-8").splitlines():
        if line.startswith("| `"):
            cells = line.split("|")
            out[cells[1].strip().strip("`")] = cells[3].strip()
    return out


def test_every_sample_has_a_readable_one_line_description(qtbot):
    stories = _readme_stories()
    files = dialogs.sample_sets()
    assert len(files) >= 7
    picker = dialogs.SamplePicker()
    qtbot.addWidget(picker)
    shown = [picker.list.item(i).text() for i in range(picker.list.count())]
    for p, item in zip(files, shown):
        d = dialogs.sample_description(p)
        assert d, p.name
        assert "\n" not in d and len(d) < 200
        assert d.isprintable() and "\ufffd" not in d and not d.startswith("PK"), (p.name, d)
        assert stories[p.name].replace("`", "").startswith(d.rstrip(".")), (p.name, d)
        assert item.endswith(d)


# ------------------------------------------------------------------ 5. the view in sessions
def test_session_keeps_the_view_and_where_it_was_saved(make_win, tmp_path, errors):
    path05 = next(p for p in dialogs.sample_sets() if p.name.startswith("05"))
    w = make_win()
    assert w.open_path(str(path05))
    assert w.runner.wait()
    assert w.plot.log_x and not w.plot.log_y  # sample 05 is meant to be seen on log x
    w.logy_action.setChecked(True)
    w.colour_actions["leverage"].trigger()  # colour mode: leverage (turns diagnostics on)
    target = tmp_path / "dose.ballast"
    assert w.sessions.save_to(target)
    raw = json.loads(target.read_text(encoding="utf-8"))
    assert raw["version"] == fs.FORMAT_VERSION == 1  # an optional field: no new version
    assert raw["view"] == {"log_x": True, "log_y": True, "colour_by": "leverage",
                           "diagnostics": True}
    assert raw["saved_as"] == str(target.absolute())
    assert fs.load_session(target).reproduces(w.document.result)  # fitcore still reads it

    w2 = make_win("w2")
    assert not w2.plot.log_x
    assert w2.open_path(str(target))
    assert w2.runner.wait()
    assert w2.plot.log_x and w2.plot.log_y
    assert w2.logx_action.isChecked() and w2.logy_action.isChecked()
    assert w2.diagnostics.colour_mode == "leverage" and w2.diag_action.isChecked()
    assert w2.colour_actions["leverage"].isChecked()
    assert w2.sessions.last_check is True and not errors


def test_recovery_file_keeps_the_view(make_win, tmp_path):
    w = make_win()
    assert w.open_path(str(write_decay_csv(tmp_path / "d.csv")))
    w.logy_action.setChecked(True)
    w.push(MaskCommand(w.document, w.document.make_mask_change([7], True)))
    assert w.runner.wait()
    rec = w.sessions.autosave()
    assert json.loads(rec.read_text(encoding="utf-8"))["view"]["log_y"] is True
    assert session_io.read_view(rec)["log_y"] is True


def test_older_session_without_view_still_opens(make_win, tmp_path, errors):
    """A version-1 file as written before the view was stored (fitcore alone)."""
    path05 = next(p for p in dialogs.sample_sets() if p.name.startswith("05"))
    t = fitcore.read_table(path05)
    sel = t.choose()
    s = fs.Session(x=sel.x, y=sel.y, names={"x": sel.x_name, "y": sel.y_name, "sigma": ""},
                   source_file=str(path05), method=fs.Method(model="logistic4", loss="huber"))
    s.store_result(s.refit())
    old = fs.save_session(tmp_path / "old.ballast", s)
    assert "view" not in json.loads(old.read_text(encoding="utf-8"))
    w = make_win()
    assert w.sessions.open_session(old)
    assert w.runner.wait()
    assert w.plot.log_x  # no stored view: the sample set's own view
    assert w.sessions.last_check is True and not errors

    d = write_decay_csv(tmp_path / "d.csv")
    t = fitcore.read_table(d)
    s2 = fs.Session(x=t.column("Elapsed"), y=t.column("Signal"), source_file=str(d),
                    method=fs.Method(model="exp_decay", loss="huber"))
    old2 = fs.save_session(tmp_path / "old2.ballast", s2)
    w.logy_action.setChecked(True)
    assert w.sessions.open_session(old2)
    assert w.runner.wait()
    assert w.plot.log_y and not errors  # no view and not a sample set: the axes as they are


# ------------------------------------------------------------------ 6. counted nouns
def test_counts_read_in_the_right_number(make_win, tmp_path, errors):
    assert dialogs.counted(1, "point") == "1 point"
    assert dialogs.counted(0, "point") == "0 points"
    assert dialogs.counted(2, "loss", "losses") == "2 losses"
    w = make_win()
    assert w.open_path(str(write_rows(tmp_path / "three.csv", [(1, 2), (2, 4.1), (3, 5.9)])))
    assert w.runner.wait()
    doc = w.document
    cmd = MaskCommand(doc, MaskChange(np.array([0, 1], np.intp), np.array([True, False]),
                                      np.array([False, True]), ["", ""], ["", ""],
                                      ["", ""], ["", ""]))
    assert cmd.text() == "Exclude 1, restore 1 point"
    messages = []
    w.statusBar().messageChanged.connect(messages.append)
    one = fs.Session(x=[1.0], y=[2.0], method=fs.Method(model="line", loss="l2"))
    w.sessions.open_session(fs.save_session(tmp_path / "one.ballast", one))
    assert any(m.startswith("Opened one.ballast: 1 point, 0 excluded") for m in messages), messages
    assert not w.open_path(str(write_rows(tmp_path / "onerow.csv", [(1, 2)])))
    assert errors[-1][1].startswith("onerow.csv: 1 point that cannot be fitted")


# ------------------------------------------------------------------ helpers
class _FakePicker:
    """Stands in for the sample picker dialog (no modal dialog in a test)."""

    path_value = ""

    @classmethod
    def with_path(cls, path):
        return type("Picker", (cls,), {"path_value": path})

    def __init__(self, parent=None):
        pass

    def exec(self):
        return True

    def path(self):
        return self.path_value


class _Drop:
    """The part of a QDropEvent the window's dropEvent uses."""

    def __init__(self, mime):
        self._mime = mime

    def mimeData(self):
        return self._mime

    def acceptProposedAction(self):
        pass


# ------------------------------------------------------------------ 2b. a model chosen deliberately
def write_line_csv(path, n=16, seed=5):
    """Invented calibration line (absorbance against concentration), one bad standard."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 30.0, n)
    y = 0.004 + 0.0985 * x + rng.normal(0, 0.002, n)
    y[9] += 0.05
    return write_rows(path, [(f"{a:.3f}", f"{b:.5f}") for a, b in zip(x, y)],
                      header="Concentration (mg/L),Absorbance")


def test_a_kept_model_that_does_not_fit_the_new_data_is_replaced_with_an_undo(worked, asked, tmp_path):
    """A calibration line opened after a decay fit: the decay's time constant is not
    determined by a straight calibration line (the '4000 +- 24000' case), so the
    simplest catalogue model that fits as well as any (the straight line) replaces it,
    said in the banner with an Undo; the Undo button brings the decay back."""
    w = worked
    asked.answer = "discard"
    assert w.open_path(str(write_line_csv(tmp_path / "calibration.csv")))
    assert "does not fit these data" in w.banner.text("model")
    assert w.model_check.wait(300000)
    assert w.runner.wait()
    doc = w.document
    assert doc.settings.model == "line" and doc.settings.loss == "huber"
    msg = w.banner.text("model")
    assert msg.startswith("Model changed to Straight line.") and "Exponential decay" in msg, msg
    ref = fitcore.fit("line", doc.measurements.x, doc.measurements.y, loss="huber")
    np.testing.assert_allclose(doc.result.values, ref.values, rtol=1e-10)
    undo = w.banner.message("model").buttons[0]
    assert undo.text() == "Undo"
    undo.click()
    assert w.runner.wait()
    assert doc.settings.model == "exp_decay"
    assert "Model back to Exponential decay" in w.banner.text("model")


def test_a_line_kept_for_decay_data_gives_way_to_the_decay(make_win, tmp_path):
    w = make_win()
    assert w.open_path(str(write_line_csv(tmp_path / "line.csv")))
    assert w.runner.wait()
    assert w.document.settings.model == "line" and not w.model_check.running  # a line fits a line
    assert w.open_path(str(write_decay_csv(tmp_path / "decay.csv")))
    assert "misses the data systematically" in w.banner.text("model")
    assert w.model_check.wait(300000)
    assert w.document.settings.model == "exp_decay"
    assert w.undo_stack.count() == 1 and w.undo_stack.undoText() == "Model: Exponential decay (time constant)"


def test_read_notes_stay_in_the_banner(make_win, tmp_path):
    rows = [(i, 2.0 * i + 1.0) for i in range(12)]
    rows[4] = (4, "n/a")
    w = make_win()
    assert w.open_path(str(write_rows(tmp_path / "notes.csv", rows)))
    assert w.runner.wait()
    text = w.banner.text("notes")
    assert text.startswith("Read notes for notes.csv:") and "n/a" in text, text
    w.banner.message("notes").close_button.click()
    assert w.banner.text("notes") == ""


# ------------------------------------------------------------------ 2c. small things
def test_an_unreadable_file_is_refused_before_asking_about_unsaved_work(worked, asked, tmp_path, errors):
    """Read first, then ask: a junk file never brings up Save / Discard / Cancel, and
    its message names the file once."""
    w = worked
    junk = tmp_path / "junk.csv"
    junk.write_bytes(b"\x00\x01\x02 not a table \xff\xfe" * 20)
    before = snapshot(w)
    n_asked = len(asked)
    assert not w.open_path(str(junk))
    assert len(asked) == n_asked  # not asked
    title, text = errors[-1]
    assert text.count("junk.csv") == 1, text
    assert_unchanged(w, before)
