"""Desktop tests run offscreen, with settings written to a temporary folder."""
from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import gc

import pytest

from desktop.qt_imports import restore_python_import

# as the program does (desktop/app.py): Python's own __import__, not shiboken's hook, before
# any window's thread imports (see desktop/qt_imports.py)
restore_python_import()


@pytest.fixture(autouse=True)
def collect_windows_in_the_gui_thread():
    """Windows a test left behind are freed after it, here in the GUI thread. Left to a
    collection that a job's worker thread happens to start (a large JSON answer), a
    widget's destructor ran in that thread and waited for the interpreter lock while
    the GUI thread, deleting another widget, waited for Qt's object lock: the suite hung
    in test_open_responsive (seen twice, gdb stacks in /work/notes/startup.md)."""
    yield
    gc.collect()


@pytest.fixture(autouse=True)
def no_reason_dialog(monkeypatch):
    """The window asks for a reason when excluding (on by default); tests that do not
    answer it themselves answer with an empty reason instead of a modal dialog."""
    from desktop import dialogs

    monkeypatch.setattr(dialogs, "ask_text", lambda parent, title, label: "")


@pytest.fixture
def settings_file(tmp_path):
    """Path of a throw-away QSettings ini file (the user's own settings stay untouched)."""
    return str(tmp_path / "ballast-test.ini")


def _write_demo_line_csv(path, n=30, seed=3):
    """Invented demo data: a line with noise and two gross outliers (rows 6 and 21)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    x = np.linspace(0.5, 15.0, n)
    y = 4.0 + 1.5 * x + rng.normal(0, 0.2, n)
    y[5] += 9.0
    y[20] -= 7.0
    lines = ["Time (s),Signal (mV)"] + [f"{a:.6f},{b:.6f}" for a, b in zip(x, y)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture
def write_demo_csv():
    """The writer of the shared invented demo file: ``write_demo_csv(path) -> path``."""
    return _write_demo_line_csv


@pytest.fixture
def errors(monkeypatch):
    """Error dialogs are recorded as (title, text) instead of shown."""
    from desktop import dialogs

    seen = []
    monkeypatch.setattr(dialogs, "error_box", lambda parent, title, text: seen.append((title, text)))
    return seen


@pytest.fixture
def open_window(qtbot, tmp_path, errors):
    """Factory for a shown main window with throw-away settings: ``open_window(w, h, **kw)``."""
    from PySide6.QtCore import QSettings

    from desktop.main_window import MainWindow

    def make(width=1400, height=900, name="window", **kw):
        w = MainWindow(QSettings(str(tmp_path / f"{name}.ini"), QSettings.IniFormat), **kw)
        qtbot.addWidget(w)
        w.resize(width, height)
        w.show()
        qtbot.waitExposed(w)
        return w

    return make


@pytest.fixture
def make_win(qtbot, tmp_path, monkeypatch):
    """A shown main window at a chosen size, ``make_win(width, height)``; its error
    boxes are collected instead of shown, and the test fails if any appeared."""
    from PySide6.QtCore import QSettings

    from desktop import dialogs
    from desktop.main_window import MainWindow

    seen = []
    monkeypatch.setattr(dialogs, "error_box", lambda parent, title, text: seen.append((title, text)))

    def make(width=1480, height=900):
        w = MainWindow(QSettings(str(tmp_path / "w.ini"), QSettings.IniFormat),
                       recovery_dir=str(tmp_path / "rec"))
        qtbot.addWidget(w)
        w.choose_columns = lambda table: tuple(table.numeric_columns()[:3])
        w.resize(width, height)
        w.show()
        qtbot.waitExposed(w)
        return w

    yield make
    assert not seen, seen
