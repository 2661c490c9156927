"""fitcore.report_plot: the report's plot drawn from the data as SVG.

The drawing is read back: point symbols must sit on one affine map of the data (each
axis linear, or linear in log10 x on a log axis), and the shaded band, mapped back
through that map, must be the pointwise 95 % confidence band of statsmodels OLS
(``get_prediction().conf_int()``) for a least-squares line. Data are invented.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest
import statsmodels.api as sm

import fitcore
from fitcore.report_plot import POINT_COLOURS, plot_svg

NS = "{http://www.w3.org/2000/svg}"


def _line(n=25, seed=3):
    rng = np.random.default_rng(seed)
    x = np.linspace(1.0, 50.0, n)
    y = 2.0 + 0.4 * x + rng.normal(0, 0.8, n)
    return x, y


def _circles(svg):
    root = ET.fromstring(svg)
    return [(float(c.get("cx")), float(c.get("cy"))) for c in root.iter(NS + "circle")]


def _affine(u, v):
    """``v = a + b u`` through the drawn points, and the largest misfit (pixels)."""
    b, a = np.polyfit(u, v, 1)
    return a, b, float(np.max(np.abs(a + b * u - v)))


def test_points_lie_on_one_affine_map_and_the_band_is_statsmodels_ols():
    x, y = _line()
    res = fitcore.fit("line", x, y)
    svg = plot_svg(res, x_label="Dose (mg)", y_label="Response")
    pts = np.array(_circles(svg))
    n = x.size
    assert len(pts) == 2 * n  # data panel, then residual panel
    data, resid = pts[:n], pts[n:]
    ax, bx, ex = _affine(x, data[:, 0])
    ay, by, ey = _affine(y, data[:, 1])
    assert ex < 0.01 and ey < 0.01  # coordinates are written to 0.01 px
    assert bx > 0 and by < 0  # x to the right, y upwards
    # the residual panel: the same x map, its own y map of y - fitted
    np.testing.assert_allclose(resid[:, 0], data[:, 0], atol=1e-9)
    assert _affine(res.residuals, resid[:, 1])[2] < 0.01
    # the band: the polygon's upper then lower edge, mapped back to data units
    poly = ET.fromstring(svg).find(NS + "polygon").get("points").split()
    xy = np.array([[float(c) for c in p.split(",")] for p in poly])
    half = len(xy) // 2
    up, dn = xy[:half], xy[half:][::-1]
    xg = (up[:, 0] - ax) / bx
    ols = sm.OLS(y, sm.add_constant(x)).fit()  # statsmodels, side by side
    ci = ols.get_prediction(sm.add_constant(xg)).conf_int(alpha=0.05)
    tol = 0.006 / abs(by) + 0.006 / bx * abs(ols.params[1])  # rounding of both coordinates
    np.testing.assert_allclose((up[:, 1] - ay) / by, ci[:, 1], atol=tol)
    np.testing.assert_allclose((dn[:, 1] - ay) / by, ci[:, 0], atol=tol)
    assert "Dose (mg)" in svg and "Response" in svg


def test_log_axis_is_linear_in_log10_x():
    x = np.geomspace(0.1, 1000, 15)
    y = 3.0 + np.log10(x) + np.random.default_rng(2).normal(0, 0.05, x.size)
    svg = plot_svg(fitcore.fit("poly2", x, y), log_x=True)
    data = np.array(_circles(svg))[: x.size]
    assert _affine(np.log10(x), data[:, 0])[2] < 0.01
    assert _affine(x, data[:, 0])[2] > 10  # not linear in x
    # decades as ticks (1e-1 ... 1e3)
    for t in ("0.1", "1", "10", "100", "1000"):
        assert re.search(rf'text-anchor="middle">{t}</text>', svg), t
    # a log axis is refused (drawn linear) when some x is not positive
    svg_lin = plot_svg(fitcore.fit("line", x - 1.0, y), log_x=True)
    assert _affine(x - 1.0, np.array(_circles(svg_lin))[: x.size, 0])[2] < 0.01


def test_symbols_show_weight_and_exclusion():
    x, y = _line()
    y[4] += 30.0  # a gross outlier: Tukey gives it weight 0
    excl = np.zeros(x.size, bool)
    excl[10] = True
    res = fitcore.fit("line", x, y, loss="tukey", excluded=excl)
    svg = plot_svg(res)
    root = ET.fromstring(svg)
    fills = [c.get("fill") for c in root.iter(NS + "circle")]
    assert fills.count(POINT_COLOURS["down-weighted"][0]) == 2 * int(np.sum(res.weights[~excl] < 0.5))
    rings = [g for g in root.iter(NS + "g") if g.get("stroke") == POINT_COLOURS["excluded"][1]]
    assert len(rings) == 2  # the excluded point, in both panels
    radii = {float(c.get("r")) for c in root.iter(NS + "circle") if c.get("fill") == POINT_COLOURS["used"][0]}
    assert max(radii) == pytest.approx(5.0)  # weight 1: the largest symbol


def test_residual_panel_in_scales_with_a_gross_outlier_at_the_edge():
    """Issue 17 item 12 in the report: one gross outlier must not squash the other
    residuals to a line. The lower panel shows residual / scale (the window's default),
    values beyond 6 scales at the edge with an arrow; raw residuals on request. The
    check is geometric: drawn positions against ``res.std_residuals`` (fitcore's own
    numbers, the window plots the same) and the spread of the ordinary points."""
    x, y = _line()
    y[7] += 400.0  # hundreds of scales off the line
    res = fitcore.fit("line", x, y, loss="huber")
    n = x.size
    svg = plot_svg(res)
    assert "residual / scale" in svg and "residual y − fitted" not in svg
    drawn = np.array(_circles(svg))[n:]
    resid = drawn[np.argsort(drawn[:, 0]), 1]  # drawn by weight; x increases with the index
    z = np.asarray(res.std_residuals, float)
    inner = np.abs(z) <= 6
    assert not inner[7] and inner.sum() == n - 1
    _a, b, err = _affine(z[inner], resid[inner])
    assert err < 0.01 and b < 0  # the ordinary points on one map of z, upwards
    assert np.ptp(resid[inner]) > 20  # spread over the panel (was < 1 px raw)
    assert resid[7] == pytest.approx(_a + b * 6.0, abs=0.01)  # drawn at the edge, +6
    arrows = [p for p in ET.fromstring(svg).iter(NS + "path") if p.get("fill") == "#3c3c3c"]
    assert len(arrows) == 1
    raw = plot_svg(res, residuals="raw")
    assert "residual y − fitted" in raw
    drawn = np.array(_circles(raw))[n:]
    assert _affine(res.residuals, drawn[np.argsort(drawn[:, 0]), 1])[2] < 0.01
    with pytest.raises(ValueError, match="standardised"):
        plot_svg(res, residuals="log")


def test_nothing_to_draw_is_an_error():
    x, y = _line()
    res = fitcore.fit("line", x, y)
    with pytest.raises(ValueError, match="no finite points"):
        plot_svg(_NoPoints(res))


class _NoPoints:
    """A result whose x are all missing (the plot has nothing to place)."""

    def __init__(self, res):
        self._res = res
        self.x = np.full(len(res.x), np.nan)

    def __getattr__(self, name):
        return getattr(self._res, name)
