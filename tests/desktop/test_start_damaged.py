"""The program always starts (issue 16): a damaged settings file and damaged recovery
files (400-digit integers, nesting 995 deep, not JSON) give a message and a way forward,
never an exception out of create_window."""
from __future__ import annotations

from PySide6.QtCore import QSettings

from desktop import app as app_module
from desktop import session_io


def test_damaged_settings_and_recovery_files_still_start(qtbot, tmp_path, monkeypatch, errors):
    ini = tmp_path / "b.ini"
    ini.write_text("[window]\nstate=12\nmain_split=abc\n[view]\nband=maybe\n[General]\nrecent=@Invalid()\n")
    rec = tmp_path / "recovery"
    rec.mkdir()
    (rec / "deep.ballast.recovery").write_text('{"format":"ballast-session","version":1,"data":'
                                               + "[" * 995 + "]" * 995 + "}")
    (rec / "huge.ballast.recovery").write_text('{"format":"ballast-session","version":1,"data":{"x":['
                                               + "9" * 400 + "]}}")
    asked = []
    monkeypatch.setattr(session_io, "ask_restore", lambda parent, text: asked.append(text) or False)
    args = app_module.build_parser().parse_args([])
    w = app_module.create_window(args, QSettings(str(ini), QSettings.IniFormat), recovery_dir=rec)
    qtbot.addWidget(w)
    assert w.isVisible() and w.document.has_data  # the first sample set opened after the messages
    assert "window/state" in w.settings_reset and "view/band" in w.settings_reset
    assert asked == []  # nothing readable to offer
    texts = " ".join(t for _, t in errors)
    assert "nested too deeply" in texts and "400 digits" in texts
    assert "not be offered again" in texts  # the way forward: moved aside
    assert not [p for p in rec.iterdir() if p.name.endswith(".ballast.recovery")]
    assert len([p for p in rec.iterdir() if p.name.endswith(".damaged")]) == 2


def test_no_recovery_file_without_unsaved_work(qtbot, tmp_path, errors):
    from desktop.main_window import MainWindow
    from fitcore import session as fs

    rec = tmp_path / "recovery"
    w = MainWindow(QSettings(str(tmp_path / "a.ini"), QSettings.IniFormat), recovery_dir=rec)
    qtbot.addWidget(w)
    w.sessions._timer.setInterval(20)
    data = tmp_path / "d.csv"
    data.write_text("x,y\n" + "".join(f"{i},{2 * i + 1 + (i % 3) * 0.1}\n" for i in range(12)))
    assert w.open_path(str(data))
    assert w.runner.wait()
    qtbot.wait(300)
    assert w.sessions.autosave() is None
    assert fs.find_recovery(rec) == []  # opening a file is no unsaved work


def test_restored_saved_as_is_only_a_suggestion(qtbot, tmp_path, monkeypatch, errors):
    import numpy as np

    from fitcore import session as fs

    rec = tmp_path / "recovery"
    victim = tmp_path / "unrelated.ballast"
    victim.write_text("not mine")
    s = fs.Session(x=np.arange(10.0), y=2 * np.arange(10.0) + 1, method=fs.Method(model="line", loss="l2"))
    s.exclude(3, "bubble")
    fs.write_recovery(s, rec, for_path=victim)
    monkeypatch.setattr(session_io, "ask_restore", lambda parent, text: True)
    monkeypatch.setattr(session_io, "ask_unsaved", lambda parent, text: "discard")
    asked = []
    monkeypatch.setattr(session_io, "ask_save_path", lambda parent, start: asked.append(start) or "")
    args = app_module.build_parser().parse_args([])
    w = app_module.create_window(args, QSettings(str(tmp_path / "a.ini"), QSettings.IniFormat), recovery_dir=rec)
    qtbot.addWidget(w)
    assert w.document.exclusion_record()[0][:2] == (3, "bubble")
    assert not w.sessions.save()  # Ctrl+S asks (cancelled here) instead of overwriting
    assert asked == [str(victim)]
    assert victim.read_text() == "not mine"


def test_steady_changes_do_not_postpone_autosave(qtbot, tmp_path, errors):
    from desktop.commands import MaskCommand
    from desktop.main_window import MainWindow

    w = MainWindow(QSettings(str(tmp_path / "a.ini"), QSettings.IniFormat), recovery_dir=tmp_path / "rec")
    qtbot.addWidget(w)
    data = tmp_path / "d.csv"
    data.write_text("x,y\n" + "".join(f"{i},{2 * i + 1 + (i % 3) * 0.1}\n" for i in range(20)))
    assert w.open_path(str(data))
    w.runner.wait()
    sm = w.sessions
    sm._timer.setInterval(300)
    doc = w.document
    written = []
    for i in range(12):  # a change every 100 ms for 1.2 s, each before the interval ends
        w.push(MaskCommand(doc, doc.make_mask_change([i % 6], not doc.excluded[i % 6], reason=f"c{i}")))
        qtbot.wait(100)
        written.append(sm.last_recovery is not None)
    assert any(written), "a restarting timer never wrote the recovery file while the user kept working"


def test_a_start_up_step_that_fails_is_told_and_logged(qtbot, tmp_path, monkeypatch, errors, caplog):
    # an unexpected error while the first file opens: the window stays, the message box
    # names it, and its traceback is in the log (common practice for a broad except)
    import logging

    from desktop.main_window import MainWindow

    def boom(self, *_a, **_k):
        raise RuntimeError("reader on fire")

    monkeypatch.setattr(MainWindow, "open_path", boom)
    args = app_module.build_parser().parse_args([])
    with caplog.at_level(logging.WARNING, logger="desktop.app"):
        w = app_module.create_window(args, QSettings(str(tmp_path / "c.ini"), QSettings.IniFormat),
                                     recovery_dir=tmp_path / "rec")
    qtbot.addWidget(w)
    assert w.isVisible()
    assert errors and errors[-1][0] == "Cannot open the file" and "reader on fire" in errors[-1][1]
    assert any(r.exc_info and str(r.exc_info[1]) == "reader on fire" for r in caplog.records)
