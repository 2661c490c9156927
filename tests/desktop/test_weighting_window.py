"""Weighting rules in the method panel: fitted with, undone, and kept by sessions."""
from __future__ import annotations

import numpy as np
from PySide6.QtCore import QSettings

import fitcore
from fitcore import session as fs
from desktop.main_window import MainWindow


def _write_calibration_csv(path):
    """Invented bioanalytical-style standards whose scatter grows with x."""
    x = np.array([1.0, 2, 5, 10, 20, 50, 100])
    y = np.array([0.052, 0.098, 0.262, 0.49, 1.03, 2.43, 5.12])
    lines = ["Conc (ng/mL),Area"] + [f"{a:g},{b:g}" for a, b in zip(x, y)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path, x, y


def _win(qtbot, tmp_path, name):
    w = MainWindow(QSettings(str(tmp_path / f"{name}.ini"), QSettings.IniFormat),
                   recovery_dir=tmp_path / "recovery")
    qtbot.addWidget(w)
    w.resize(1200, 800)
    return w


def test_weighting_rule_from_the_panel_survives_save_and_reopen(qtbot, tmp_path, errors):
    path, x, y = _write_calibration_csv(tmp_path / "cal.csv")
    w = _win(qtbot, tmp_path, "w")
    assert w.open_path(str(path))
    from desktop.document import Settings

    w.document.apply_settings(Settings(model="line", loss="l2"))
    assert w.runner.wait()
    unweighted = w.document.result.values.copy()
    combo = w.method_panel.weight_combo
    combo.setCurrentIndex(combo.findData("1/x^2"))
    assert w.runner.wait()
    doc = w.document
    assert doc.settings.weighting == "1/x^2"
    res = doc.result
    assert res.info["weighting"]["rule"] == "1/x^2"
    ref = fitcore.fit("line", x, y, weighting="1/x^2")
    assert np.allclose(res.values, ref.values, rtol=1e-12)
    assert not np.allclose(res.values, unweighted, rtol=1e-6)

    out = tmp_path / "cal.ballast"
    assert w.sessions.save_to(out)
    w2 = _win(qtbot, tmp_path, "w2")
    assert w2.sessions.open_session(out)
    assert w2.runner.wait()
    assert w2.document.settings.weighting == "1/x^2"
    assert w2.method_panel.weight_combo.currentData() == "1/x^2"
    assert np.array_equal(w2.document.result.values, res.values)
    # fitcore alone reproduces it from the file
    assert fs.load_session(out).reproduces(w2.document.result)

    # undo takes the rule back
    w.undo_stack.undo()
    assert w.runner.wait()
    assert w.document.settings.weighting is None
    assert np.allclose(w.document.result.values, unweighted, rtol=1e-12)
    assert not errors
