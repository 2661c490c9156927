"""Entry point: ``ballast [FILE]`` opens the window (console script ``ballast``).

With no file the first sample set is opened; File > Open sample set... lists them all.
"""
from __future__ import annotations

import argparse
import logging
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

from fitcore import __version__  # the package alone: no numpy (see one_blas_thread)
from fitcore.threads import limit_process

from . import qt_imports  # before PySide6 loads: remembers Python's __import__ before PySide6 loads

log = logging.getLogger(__name__)

# The shared libraries Qt's xcb platform plugin needs that a minimal Linux install
# often lacks, with the Debian/Ubuntu package that provides each (README, "Linux").
XCB_PACKAGES = {
    "libxcb-cursor.so.0": "libxcb-cursor0",
    "libxkbcommon-x11.so.0": "libxkbcommon-x11-0",
    "libxkbcommon.so.0": "libxkbcommon0",
    "libxcb-icccm.so.4": "libxcb-icccm4",
    "libxcb-keysyms.so.1": "libxcb-keysyms1",
    "libxcb-image.so.0": "libxcb-image0",
    "libxcb-render-util.so.0": "libxcb-render-util0",
    "libxcb-shape.so.0": "libxcb-shape0",
    "libxcb-xinerama.so.0": "libxcb-xinerama0",
    "libxcb-xkb.so.1": "libxcb-xkb1",
    "libxcb-randr.so.0": "libxcb-randr0",
    "libxcb-xfixes.so.0": "libxcb-xfixes0",
    "libxcb-sync.so.1": "libxcb-sync1",
    "libxcb-shm.so.0": "libxcb-shm0",
    "libxcb-util.so.1": "libxcb-util1",
    "libX11-xcb.so.1": "libx11-xcb1",
    "libEGL.so.1": "libegl1",
    "libGL.so.1": "libgl1",
    "libfontconfig.so.1": "libfontconfig1",
    "libdbus-1.so.3": "libdbus-1-3",
}


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="ballast", description="Outlier-aware curve fitting of lab measurements.")
    p.add_argument("file", nargs="?",
                   help="measurement file (CSV, TSV, XLSX, ODS) or session (.ballast) to open")
    p.add_argument("--samples", action="store_true", help="start with the sample-set picker")
    p.add_argument("--version", action="version", version=f"ballast {_version()}")
    return p


def _version() -> str:
    return __version__


def _platform_name(environ) -> str:
    """The Qt platform plugin this start will use ("" when Qt decides by itself)."""
    name = environ.get("QT_QPA_PLATFORM", "").split(":", 1)[0].strip()
    if name:
        return name
    if not sys.platform.startswith("linux"):
        return ""
    if environ.get("WAYLAND_DISPLAY") and environ.get("XDG_SESSION_TYPE") == "wayland":
        return "wayland"
    return "xcb"


def _missing_libraries(plugin: Path) -> list[str]:
    """Shared libraries the plugin needs that the dynamic loader cannot find."""
    ldd = shutil.which("ldd")
    if not ldd or not plugin.is_file():
        return []
    try:
        out = subprocess.run([ldd, str(plugin)], check=False, capture_output=True, text=True, timeout=10).stdout
    except (OSError, subprocess.SubprocessError):
        return []
    names = [line.split("=>")[0].strip() for line in out.splitlines() if "not found" in line]
    return list(dict.fromkeys(names))


def display_problem(environ=None, plugin_dir: Path | None = None) -> str:
    """Why Qt would abort at start on this machine, in words, or "" when it should start.

    Qt ends the process with SIGABRT (exit code 134) and a message that names the wrong
    package when its xcb plugin cannot load; checking first lets us say what is missing.
    """
    environ = os.environ if environ is None else environ
    if _platform_name(environ) != "xcb":
        return ""
    if not environ.get("DISPLAY"):
        return ("There is no display to open a window on (DISPLAY is not set). Start Ballast "
                "from a desktop session, under Xvfb (xvfb-run ballast ...), or set "
                "QT_QPA_PLATFORM=offscreen to run without a screen.")
    if plugin_dir is None:
        import PySide6

        plugin_dir = Path(PySide6.__file__).parent / "Qt" / "plugins" / "platforms"
    missing = _missing_libraries(plugin_dir / "libqxcb.so")
    if not missing:
        return ""
    packages = sorted({XCB_PACKAGES.get(lib, "") for lib in missing} - {""})
    text = ("Qt's window system plugin (xcb) cannot load: the system libraries "
            + ", ".join(missing) + " are missing.")
    if packages:
        text += " On Debian or Ubuntu install them with: sudo apt install " + " ".join(packages)
    return text


def _quit_on_interrupt(app) -> None:
    """Ctrl+C in the terminal closes the windows as the window's close button would.

    Qt's event loop runs in C++, so Python only sees the signal when it next runs
    Python code; a short timer gives it that chance.
    """
    from PySide6.QtCore import QTimer

    def close_all(*_):
        for w in app.topLevelWidgets():
            if w.isVisible():
                w.close()
        if not any(w.isVisible() for w in app.topLevelWidgets()):
            app.quit()

    signal.signal(signal.SIGINT, close_all)
    timer = QTimer(app)
    timer.timeout.connect(lambda: None)
    timer.start(200)
    app._interrupt_timer = timer  # kept alive with the application


def one_blas_thread() -> None:
    """The window's problems are small: one BLAS thread for this process and its
    analysis children (set before numpy loads; an explicit setting is kept). With the
    default two threads on a busy 2-core machine, 300 small line fits took 3-9x longer."""
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")
    if "numpy" in sys.modules:  # loaded already (embedded use): set the libraries directly
        limit_process(1)


def main(argv=None) -> int:
    """Start the Ballast window. Returns the application's exit code."""
    args = build_parser().parse_args(sys.argv[1:] if argv is None else argv)
    one_blas_thread()
    problem = display_problem()
    if problem:
        print(f"ballast: {problem}", file=sys.stderr)
        return 3
    # the child process for background jobs starts now (it inherits one BLAS thread),
    # its imports beside the window's own imports and build (2 cores): the first file's
    # jobs find it ready
    from .child_process import start_early

    start_early()
    # numpy, scipy and fitcore load before Qt: once PySide6 is loaded, every later module
    # import pays its feature check (inspect.getsource of the module; ~0.2 s over the
    # ~1000 modules the window needs)
    from . import job_kinds  # noqa: F401

    from PySide6.QtWidgets import QApplication

    qt_imports.restore_python_import()  # before any thread imports: see qt_imports
    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setOrganizationName("Ballast")
    app.setApplicationName("Ballast")
    _quit_on_interrupt(app)

    if os.environ.get(EXIT_AFTER_FIRST_FIT):
        _accept_column_choice(app)
    try:
        create_window(args)
    except Exception as err:  # the program must start: logged, then once more with fresh settings
        log.warning("the window could not be built; retrying with fresh settings", exc_info=True)
        create_window(args, qsettings=_fresh_settings(err))
    if not any(w.isVisible() for w in app.topLevelWidgets()):
        return 0  # closed while its first file was read (Ctrl+C): the quit came before the loop
    if os.environ.get(EXIT_AFTER_FIRST_FIT):
        _exit_after_first_fit(app)
    _import_fitting_later(app)
    return app.exec()  # safe: Qt event loop


def _import_fitting_later(app) -> None:
    """Once the event loop runs (the window painted with its first result), the scipy
    modules a fit in this process needs are imported in a thread.

    The first result of a file comes from the analysis process (``MainWindow.method_for``)
    and the window shows it without scipy (issue 12); the first edit (a point excluded,
    a loss chosen) fits here and would otherwise wait about half a second for them.
    """
    import threading

    from PySide6.QtCore import QTimer

    from . import gui_gc

    def load():
        with gui_gc.worker():  # the GUI thread's garbage collection waits for these imports
            try:
                import scipy.linalg  # lazy: after the first paint (see above)
                import scipy.optimize  # lazy: after the first paint (see above)
                import scipy.special  # noqa: F401 - lazy: after the first paint (see above)
            except Exception:  # noqa: BLE001 - a fit imports them itself and reports what fails
                pass

    # a moment after the loop starts: the window's first paint (and the bench hook's report,
    # which runs at 0 ms) do not share the interpreter lock with the imports
    QTimer.singleShot(WARM_UP_DELAY_MS,
                      lambda: threading.Thread(target=load, name="ballast-imports", daemon=True).start())


#: when the fitting modules start loading after the event loop starts (ms)
WARM_UP_DELAY_MS = 300


#: ``BALLAST_EXIT_AFTER_FIRST_FIT=1 ballast FILE``: when the first fit result is on
#: screen, print ``ballast: first fit on screen`` (or ``... failed``) on stdout and
#: close the window (bench/bench_start.py times the start with it; tests use it)
EXIT_AFTER_FIRST_FIT = "BALLAST_EXIT_AFTER_FIRST_FIT"


def _accept_column_choice(app) -> None:
    """Under the bench hook: a column dialog is answered with its own choice (as a user
    pressing Enter would), so a table of more than two columns opens unattended."""
    from PySide6.QtCore import QTimer

    from .dialogs import ColumnDialog

    def accept():
        w = app.activeModalWidget()
        if isinstance(w, ColumnDialog):
            w.accept()

    timer = QTimer(app)
    timer.timeout.connect(accept)
    timer.start(10)
    app._column_timer = timer  # kept alive with the application


def _exit_after_first_fit(app) -> None:
    from PySide6.QtCore import QTimer

    from .main_window import MainWindow

    wins = [w for w in app.topLevelWidgets() if isinstance(w, MainWindow) and w.isVisible()]
    if not wins:
        return
    win = wins[0]
    done = []

    def report():
        if done:
            return
        done.append(True)
        app.processEvents()  # the views repaint with the result
        ok = win.document.result is not None
        print("ballast: first fit on screen" if ok else "ballast: first fit failed", flush=True)
        win.close()
        app.quit()

    def on_document(event, **info):
        if event == "result":
            QTimer.singleShot(0, report)

    if win.document.result is not None or win.document.fit_message:
        QTimer.singleShot(0, report)
    else:
        win.document.subscribe(on_document)
        QTimer.singleShot(120_000, report)  # nothing came: say so rather than hang a bench


def _fresh_settings(err):
    """Settings for a second start after the first window failed to build: the user's
    settings file is moved aside (``.damaged``), reported, and an empty one is used."""
    from PySide6.QtCore import QSettings

    qs = QSettings()
    name = qs.fileName()
    moved = ""
    if name and os.path.isfile(name):
        moved = name + ".damaged"
        try:
            os.replace(name, moved)
        except OSError:
            moved = ""
    qs = QSettings()
    qs.clear()
    print(f"ballast: the window could not be built with the saved settings ({type(err).__name__}: {err}); "
          + (f"they were moved to {moved} and defaults are used." if moved else "defaults are used."),
          file=sys.stderr)
    return qs


def create_window(args, qsettings=None, recovery_dir=None):
    """The program's window, shown, with its first content (a QApplication must exist).

    Work a crash left behind is offered first (restored: nothing else is opened);
    then the file named on the command line (measurements or a ``.ballast`` session),
    the sample picker, or the first sample set.
    """
    # here, not at the top: `ballast` sets one BLAS thread before numpy loads and looks
    # for a display before Qt loads (tests/fitcore/test_boundary.py)
    from . import dialogs
    from .main_window import MainWindow, first_sample_set

    win = MainWindow(qsettings, recovery_dir=recovery_dir)
    win.sessions.interactive = True  # ask before closing with unsaved work
    win.show()
    reset = getattr(win, "settings_reset", [])
    if reset:
        win.statusBar().showMessage("Damaged settings were reset to their defaults: " + ", ".join(reset) + ".",
                                    15000)
    try:
        if win.sessions.offer_recovery():
            return win
    except Exception as err:  # a start-up step that fails must not stop the program: told, logged
        log.warning("recovery could not be offered", exc_info=True)
        dialogs.error_box(win, "Recovery failed", f"Autosaved work could not be offered ({type(err).__name__}: "
                          f"{err}). Ballast starts without it; the recovery files are left in "
                          f"{win.sessions.recovery_dir}.")
    try:
        if args.file:
            win.open_path(args.file)
        elif args.samples:
            win.open_sample_picker()
        else:
            first = first_sample_set()
            if first:
                win.open_path(first)
    except Exception as err:  # as above: told, logged, the (empty) window kept
        log.warning("the first file could not be opened", exc_info=True)
        dialogs.error_box(win, "Cannot open the file", f"{args.file or 'The first sample set'} could not be "
                          f"opened ({type(err).__name__}: {err}).")
    return win


if __name__ == "__main__":
    sys.exit(main())
