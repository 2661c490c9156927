"""Entry point: ``ballast [FILE]`` opens the window (console script ``ballast``).

With no file the first sample set is opened; File > Open sample set... lists them all.
"""
from __future__ import annotations

import argparse
import sys


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="ballast", description="Outlier-aware curve fitting of lab measurements.")
    p.add_argument("file", nargs="?",
                   help="measurement file (CSV, TSV, XLSX, ODS) or session (.ballast) to open")
    p.add_argument("--samples", action="store_true", help="start with the sample-set picker")
    return p


def main(argv=None) -> int:
    """Start the Ballast window. Returns the application's exit code."""
    args = build_parser().parse_args(sys.argv[1:] if argv is None else argv)
    from PySide6.QtWidgets import QApplication

    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setOrganizationName("Ballast")
    app.setApplicationName("Ballast")

    create_window(args)
    return app.exec()  # safe: Qt event loop


def create_window(args, qsettings=None, recovery_dir=None):
    """The program's window, shown, with its first content (a QApplication must exist).

    Work a crash left behind is offered first (restored: nothing else is opened);
    then the file named on the command line (measurements or a ``.ballast`` session),
    the sample picker, or the first sample set.
    """
    from .main_window import MainWindow, first_sample_set

    win = MainWindow(qsettings, recovery_dir=recovery_dir)
    win.sessions.interactive = True  # ask before closing with unsaved work
    win.show()
    if win.sessions.offer_recovery():
        return win
    if args.file:
        win.open_path(args.file)
    elif args.samples:
        win.open_sample_picker()
    else:
        first = first_sample_set()
        if first:
            win.open_path(first)
    return win


if __name__ == "__main__":
    sys.exit(main())
