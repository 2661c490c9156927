"""File > Fit many files...: the batch table in the window (invented data)."""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt

import fitcore


@pytest.fixture
def plate(tmp_path):
    """A long table of three wells (text group cells) and a junk file beside it."""
    rng = np.random.default_rng(11)
    x = np.linspace(0.0, 8.0, 15)
    lines = ["Well,Dose (mg),Signal (mV)"]
    for well, slope in (("C3", 2.0), ("A1", 1.0), ("B2", 3.0)):
        y = 0.5 + slope * x + rng.normal(0, 0.05, x.size)
        y[4] += 3.0
        lines += [f"{well},{a:.6f},{b:.6f}" for a, b in zip(x, y)]
    lines.append("D4,1.0,2.0")  # one point: this curve fails
    folder = tmp_path / "plate"
    folder.mkdir()
    (folder / "plate.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    (folder / "broken.xlsx").write_bytes(b"PK\x03\x04 not really a workbook")
    return folder


def test_batch_window_table_sorts_marks_failures_and_opens_a_row(open_window, qtbot, plate, errors):
    from desktop.batch_window import FAILED_BRUSH
    from desktop.document import Settings

    win = open_window()
    win.document.settings = Settings(model="line", loss="huber")
    bw = win.fit_many_files()
    bw.add_paths([str(plate)])
    assert bw.x.currentText() == "Dose" and bw.y.currentText() == "Signal"  # offered from the first file
    bw.group.setCurrentText("Well")
    bw.jobs.setValue(1)
    bw.run()
    qtbot.waitUntil(lambda: not bw.running, timeout=60000)
    rows = bw.model.rows
    assert [(r.source.endswith("broken.xlsx"), r.group) for r in rows] == [
        (True, ""), (False, "C3"), (False, "A1"), (False, "B2"), (False, "D4")]
    failed = [r for r in rows if r.error]
    assert len(failed) == 2 and "damaged" in failed[0].error
    # every fitted row is the single fit of that well's points
    table = fitcore.read_table(plate / "plate.csv")
    codes, labels = table.groups("Well")
    for r in rows[1:4]:
        keep = codes == labels.index(r.group)
        ref = fitcore.fit("line", table.column("Dose")[keep], table.column("Signal")[keep], "huber")
        assert np.allclose(r.values, ref.values, rtol=1e-12, atol=0)
    # failed rows are marked
    model = bw.model
    conv = model.columns.index("converged")
    for i, r in enumerate(rows):
        idx = model.index(i, conv)
        assert (model.data(idx) == "FAILED") == bool(r.error)
        assert (model.data(idx, role=Qt.BackgroundRole) is FAILED_BRUSH) == bool(r.error)
    # sortable: by slope, failed rows (no value) last
    slope = model.columns.index("b")  # line: a + b*x
    bw.table.sortByColumn(slope, Qt.AscendingOrder)
    assert [bw.row_at(i).group for i in range(5)][:3] == ["A1", "C3", "B2"]
    assert {bw.row_at(i).group for i in (3, 4)} == {"", "D4"}
    # a row opens as a normal data set, fitted with the batch's method
    b2 = next(i for i in range(5) if bw.row_at(i).group == "B2")
    bw.open_index(bw.proxy.index(b2, 0))
    assert win.document.n == 15 and win.document.settings.model == "line"
    qtbot.waitUntil(lambda: win.document.result is not None and not win.document.stale, timeout=30000)
    assert np.allclose(win.document.result.values, bw.row_at(b2).values, rtol=1e-9)
    assert "B2" in win.windowTitle()
    assert errors == []


def test_unexpected_error_in_the_batch_job_is_shown_and_logged(open_window, qtbot, plate, monkeypatch, errors,
                                                                 caplog):
    # an engine bug while the batch runs: one line in a message box, the traceback in
    # the log (common practice: a broad except keeps the cause somewhere it can be read)
    import logging

    import fitcore.batch
    from desktop.document import Settings

    def boom(*_a, **_k):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(fitcore.batch, "fit_sources", boom)
    win = open_window()
    win.document.settings = Settings(model="line", loss="huber")
    bw = win.fit_many_files()
    bw.add_paths([str(plate)])
    with caplog.at_level(logging.WARNING, logger="desktop.jobs"):
        bw.run()
        qtbot.waitUntil(lambda: not bw.running, timeout=60000)
    assert errors and errors[-1][0] == "Cannot fit these files"
    assert "RuntimeError: disk on fire" in errors[-1][1]
    assert any(r.exc_info and str(r.exc_info[1]) == "disk on fire" for r in caplog.records)


def test_stop_answers_at_once_and_keeps_the_rows_fitted(open_window, qtbot, plate, errors):
    # Stop goes through the window's one job mechanism: the batch window is idle at
    # once, the rows already shown stay, and a new run starts cleanly
    from desktop.document import Settings

    win = open_window()
    win.document.settings = Settings(model="line", loss="huber")
    bw = win.fit_many_files()
    bw.add_paths([str(plate)])
    bw.group.setCurrentText("Well")
    bw.jobs.setValue(1)
    bw.run()
    qtbot.waitUntil(lambda: len(bw.model.rows) >= 1 or not bw.running, timeout=60000)
    bw.stop()
    assert not bw.running and bw.run_button.isEnabled()
    assert bw.status.text().startswith("Stopped") or len(bw.model.rows) == 5
    bw.run()  # again, all of it
    qtbot.waitUntil(lambda: not bw.running, timeout=60000)
    assert len(bw.model.rows) == 5 and errors == []
