"""Longest event-loop gap while the window opens each hostile-corpus file (issue 16).

    python bench/bench_open.py [--inline]

A 10 ms QTimer ticks while ``MainWindow.open_path`` reads each case of
tests/hostile/runner.py (through the job mechanism: a child process). With
``--inline`` the same files are read by ``fitcore.read_table`` in the GUI thread, for
the same-run comparison. Prints one line per case: longest gap, total time, outcome.
Each case starts from a straight line on the demo data.
"""
from __future__ import annotations

import argparse
import importlib.util
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--inline", action="store_true", help="read in the GUI thread instead (comparison)")
    args = ap.parse_args()
    from PySide6.QtCore import QSettings, QTimer
    from PySide6.QtWidgets import QApplication

    import fitcore
    from desktop import dialogs
    from desktop.main_window import MainWindow

    app = QApplication.instance() or QApplication([])
    dialogs.error_box = lambda parent, title, text: None
    spec = importlib.util.spec_from_file_location("hostile_runner", ROOT / "tests" / "hostile" / "runner.py")
    runner = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(runner)
    with tempfile.TemporaryDirectory() as tmp:
        cases = runner.make_corpus(Path(tmp) / "corpus")
        win = MainWindow(QSettings(str(Path(tmp) / "b.ini"), QSettings.IniFormat))
        win.show()
        win.choose_columns = lambda t: (t.numeric_columns()[0], t.numeric_columns()[-1], None)
        assert win.open_path(str(ROOT / "sample_sets" / "01_photometric_calibration.csv"))
        win.runner.wait(120000)
        where = "GUI thread" if args.inline else "job"
        print(f"{'case':26s} {'longest gap s':>13s} {'total s':>8s}  outcome ({where})")
        for case in cases:
            win.runner.wait(120000)
            win.model_check.wait()
            if win.document.settings.model != "line":
                win.document.apply_settings(win.document.settings.with_(model="line", model_options={},
                                                                        p0=None, fixed={}))
                win.runner.wait(120000)
            for _ in range(5):
                app.processEvents()
            stamps = [time.perf_counter()]
            timer = QTimer()
            timer.timeout.connect(lambda stamps=stamps: stamps.append(time.perf_counter()))
            timer.start(10)
            if args.inline:
                try:
                    fitcore.read_table(case["target"])
                    ok = True
                except (ValueError, OSError, MemoryError):
                    ok = False
            else:
                ok = win.open_path(case["target"])
            timer.stop()
            stamps.append(time.perf_counter())
            gap = float(np.max(np.diff(stamps)))
            print(f"{case['case']:26s} {gap:13.3f} {stamps[-1] - stamps[0]:8.2f}  {'opened' if ok else 'refused'}",
                  flush=True)
        win.sessions.confirm_close = lambda: True
        win.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
