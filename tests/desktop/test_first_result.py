"""A file opened in the window shows its trial fit (made in the analysis process, all
points, the method the window opens it with) as the first result, without fitting again
and without scipy in the window's process (issue 12, window start); the result and
the t quantiles its intervals need travel between the processes intact."""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import fitcore
from desktop import job_kinds

ROOT = Path(__file__).resolve().parents[2]

DRIVER = r"""
import json, os, sys
from PySide6.QtCore import QSettings
from PySide6.QtWidgets import QApplication
from desktop.app import create_window, build_parser
from desktop.dialogs import ColumnDialog
from desktop.main_window import MainWindow

app = QApplication(sys.argv[:1])
tmp = sys.argv[2]
MainWindow.choose_columns = lambda self, table: ColumnDialog(table, self).choice()  # its own choice
win = create_window(build_parser().parse_args([sys.argv[1]]),
                    qsettings=QSettings(os.path.join(tmp, "s.ini"), QSettings.IniFormat), recovery_dir=tmp)
app.processEvents()
doc = win.document
res = doc.result
scipy_loaded = sorted(m for m in sys.modules if m.split(".")[0] == "scipy")
m, s = doc.measurements, doc.settings
print(json.dumps({
    "scipy": scipy_loaded, "stale": doc.stale, "generation_ok": doc.result_generation == doc.generation,
    "model": s.model_spec(), "kwargs": s.to_fit_kwargs(), "x": m.x.tolist(), "y": m.y.tolist(),
    "sigma": None if m.sigma is None else m.sigma.tolist(), "n": int(m.n),
    "values": res.values.tolist(), "stderr": res.stderr.tolist(), "scale": res.scale,
    "intervals": res.intervals(0.95).tolist(), "estimates": win.estimates.table.item(0, 3).text(),
}))
win.sessions.modified = False
win.close()
os._exit(0)
"""


@pytest.mark.parametrize("sample", ["02_tracer_decay.csv", "01_photometric_calibration.csv"])
def test_the_first_result_is_the_trial_fit_and_needs_no_scipy_here(tmp_path, sample):
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", OPENBLAS_NUM_THREADS="1",
               PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    out = subprocess.run([sys.executable, "-c", DRIVER, str(ROOT / "sample_sets" / sample), str(tmp_path)],
                         cwd=ROOT, capture_output=True, text=True, env=env, timeout=180)
    assert out.returncode == 0, out.stderr[-2000:]
    got = json.loads(out.stdout.strip().splitlines()[-1])
    assert got["scipy"] == []  # no fit ran in the window's process, nor a t quantile
    assert not got["stale"] and got["generation_ok"]
    # reference: the library's own fit of the same points with the same method (common practice)
    ref = fitcore.fit(got["model"], np.array(got["x"]), np.array(got["y"]),
                      sigma=None if got["sigma"] is None else np.array(got["sigma"]), **got["kwargs"])
    np.testing.assert_allclose(got["values"], ref.values, rtol=1e-12, atol=0)
    np.testing.assert_allclose(got["stderr"], ref.stderr, rtol=1e-12, atol=0)
    assert got["scale"] == pytest.approx(ref.scale, rel=1e-12)
    np.testing.assert_allclose(got["intervals"], ref.intervals(0.95), rtol=1e-12)
    assert got["estimates"]  # the interval column is filled


def test_t_quantiles_travel_with_a_result_made_in_the_child(monkeypatch):
    x = np.linspace(0.0, 10.0, 12)
    y = 2.0 + 0.5 * x + np.array([0.1, -0.2, 0.05, 0.0, 0.15, -0.1, 0.2, -0.05, 0.0, 0.1, -0.15, 0.05])
    request = {"model": "line", "x": x, "y": y, "sigma": None, "excluded": np.zeros(x.size, bool),
               "kwargs": {"loss": "huber"}}
    res, msg = job_kinds.run_fit(request)
    assert msg is None
    # reference: scipy.stats.t.ppf (two-sided 95 % and one-sided 95 %)
    from scipy import stats

    assert res.t_quantile(0.95) == pytest.approx(stats.t.ppf(0.975, res.dof), rel=1e-12)
    assert res.t_ppf(0.95) == pytest.approx(stats.t.ppf(0.95, res.dof), rel=1e-12)
    wire = json.loads(json.dumps(job_kinds.encode((res, msg))))
    back, _ = job_kinds.decode(wire, res.model)

    class NoScipy:
        def __getattr__(self, name):
            raise AssertionError("the window's process computed a t quantile itself")

    monkeypatch.setattr(sys.modules["fitcore.result"], "special", NoScipy())
    assert back.t_quantile(0.95) == res.t_quantile(0.95)
    assert back.t_ppf(0.95) == res.t_ppf(0.95)
    np.testing.assert_array_equal(back.intervals(0.95), res.intervals(0.95))
