"""Entry point: ``ballast [FILE]`` opens the window (console script ``ballast``).

With no file the first sample set is opened; File > Open sample set... lists them all.
"""
from __future__ import annotations

import argparse
import sys


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="ballast", description="Outlier-aware curve fitting of lab measurements.")
    p.add_argument("file", nargs="?", help="measurement file to open (CSV, TSV, XLSX, ODS)")
    p.add_argument("--samples", action="store_true", help="start with the sample-set picker")
    return p


def main(argv=None) -> int:
    """Start the Ballast window. Returns the application's exit code."""
    args = build_parser().parse_args(sys.argv[1:] if argv is None else argv)
    from PySide6.QtWidgets import QApplication

    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setOrganizationName("Ballast")
    app.setApplicationName("Ballast")

    from .main_window import MainWindow, first_sample_set

    win = MainWindow()
    win.show()
    if args.file:
        win.open_path(args.file)
    elif args.samples:
        win.open_sample_picker()
    else:
        first = first_sample_set()
        if first:
            win.open_path(first)
    return app.exec()


if __name__ == "__main__":
    sys.exit(main())
