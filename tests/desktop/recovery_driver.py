"""A real Ballast window in its own process, for tests/desktop/test_recovery_processes.py.

``python recovery_driver.py work RECOVERY_DIR DATA.csv AUTOSAVE_MS`` opens DATA.csv and
then, every 120 ms, excludes or restores one of the first 8 points with a reason, and
prints one JSON line per change: {"i": n, "t": time.time(), "state": [[index, reason], ...]}.
It runs until killed. ``python recovery_driver.py probe RECOVERY_DIR DATA.csv 0`` starts
like the program (offer_recovery; every offer is declined), prints {"offers": [...]},
closes the window normally and exits. ``python recovery_driver.py race RECOVERY_DIR
DATA.csv 0`` builds the window, prints {"ready": true}, then for each line "go" on stdin
runs offer_recovery (each offer declined after 50 ms, a user reading it) and prints
{"offers": n, "errors": [...]}; it ends at end of input. QT_QPA_PLATFORM=offscreen is set here.
"""
from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))


def main() -> int:
    mode, rec, data, autosave_ms = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
    from PySide6.QtCore import QSettings, QTimer
    from PySide6.QtWidgets import QApplication

    app = QApplication([])
    from desktop import dialogs, session_io
    from desktop.commands import MaskCommand
    from desktop.main_window import MainWindow

    dialogs.error_box = lambda parent, title, text: print(json.dumps({"error": text}), flush=True)
    ini = Path(rec).parent / f"{mode}-{os.getpid()}.ini"
    win = MainWindow(QSettings(str(ini), QSettings.IniFormat), recovery_dir=rec)
    if mode == "race":
        errors = []
        dialogs.error_box = lambda parent, title, text: errors.append(text)
        offers = []
        session_io.ask_restore = lambda parent, text: offers.append(text) or time.sleep(0.05) or False
        print(json.dumps({"ready": True}), flush=True)
        for line in sys.stdin:
            if line.strip() != "go":
                continue
            offers.clear()
            errors.clear()
            win.sessions.offer_recovery()
            print(json.dumps({"offers": len(offers), "errors": list(errors)}), flush=True)
        win.close()
        return 0
    if mode == "probe":
        offers = []
        session_io.ask_restore = lambda parent, text: offers.append(text) or False
        win.sessions.offer_recovery()
        print(json.dumps({"offers": offers}), flush=True)
        win.close()
        return 0
    win.sessions._timer.setInterval(autosave_ms)
    assert win.open_path(data)
    win.runner.wait(30000)
    doc = win.document
    state = {"i": 0}
    import random

    rnd = random.Random(os.getpid())

    def step():
        i = state["i"] = state["i"] + 1
        idx = rnd.randrange(8)
        now_excluded = bool(doc.excluded[idx])
        change = doc.make_mask_change([idx], not now_excluded, reason=f"change {i}")
        win.push(MaskCommand(doc, change))
        rec_state = [[int(k), r] for k, r, _t in doc.exclusion_record()]
        print(json.dumps({"i": i, "t": time.time(), "state": sorted(rec_state)}), flush=True)

    timer = QTimer()
    timer.timeout.connect(step)
    timer.start(120)
    print(json.dumps({"ready": True, "own": str(win.sessions.own_recovery)}), flush=True)
    return app.exec()


if __name__ == "__main__":
    sys.exit(main())
