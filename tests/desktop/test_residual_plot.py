"""The residual plot shows standardised residuals (residual / scale) by default, with
points beyond +-6 scales drawn at the edge under an arrow, so one gross outlier does
not squash the others; raw residuals in units of y stay available (View menu)."""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import QSettings

from desktop.plot_view import RESID_CLIP

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


@pytest.fixture
def loaded(open_window, tmp_path, write_demo_csv):
    win = open_window(1400, 860)
    path = tmp_path / "demo.csv"
    write_demo_csv(path)  # two gross outliers, fitted with the Huber loss
    assert win.open_path(str(path))
    assert win.runner.wait()
    assert win.document.settings.loss == "huber"
    return win


def test_standardised_residuals_are_the_default_and_clip_at_the_edge(loaded):
    plot, res = loaded.plot, loaded.document.result
    z = np.asarray(res.std_residuals, float)
    assert np.count_nonzero(np.abs(z) > RESID_CLIP) == 2  # the two outliers of the demo file
    shown = plot.resid_points.y
    np.testing.assert_allclose(shown, np.clip(z, -RESID_CLIP, RESID_CLIP))
    arrows = plot.resid_arrows.data
    assert len(arrows) == 2
    assert sorted(np.sign(arrows["y"])) == sorted(np.sign(z[np.abs(z) > RESID_CLIP]))
    assert plot.resid_plot.getAxis("left").labelText == "residual / scale"
    # the other residuals fill the plot: the y range is set by the clip, not by the outliers
    y0, y1 = plot.vb_resid.viewRange()[1]
    assert y1 - y0 < 4 * RESID_CLIP


def test_raw_residuals_on_request_and_remembered(loaded, tmp_path):
    loaded.std_resid_action.setChecked(False)
    res = loaded.document.result
    np.testing.assert_allclose(loaded.plot.resid_points.y, res.residuals)
    assert len(loaded.plot.resid_arrows.data) == 0
    assert loaded.plot.resid_plot.getAxis("left").labelText == "residual (mV)"
    loaded.save_state()
    s = QSettings(loaded.qsettings.fileName(), QSettings.IniFormat)
    assert s.value("view/std_residuals", True, type=bool) is False


def test_clicking_a_clipped_residual_still_picks_its_point(loaded):
    plot = loaded.plot
    z = np.asarray(loaded.document.result.std_residuals, float)
    i = int(np.argmax(np.abs(z)))
    from PySide6.QtCore import QPointF

    pos = QPointF(plot.resid_points.x[i], plot.resid_points.y[i])
    assert plot.resid_points.nearest(pos) == i
