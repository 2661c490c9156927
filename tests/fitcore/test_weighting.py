"""Weighting rules (fitcore.weighting) through fit(weighting=...), and read-back with them."""
from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm

import fitcore
from fitcore.weighting import estimate_power, rule_sigma

X = np.array([1.0, 2, 5, 10, 20, 50, 100])
# invented: a bioanalytical-style line whose scatter grows with x
Y = np.array([0.052, 0.098, 0.262, 0.49, 1.03, 2.43, 5.12])


@pytest.mark.parametrize("rule,w", [("1/x", 1 / X), ("1/x^2", 1 / X**2),
                                    ("1/y", 1 / Y), ("1/y^2", 1 / Y**2)])
def test_weighted_line_equals_statsmodels_wls(rule, w):
    # statsmodels WLS with weights = 1/variance: same estimates and standard errors
    res = fitcore.fit("line", X, Y, weighting=rule)
    ref = sm.WLS(Y, sm.add_constant(X), weights=w).fit()
    assert res.values == pytest.approx(ref.params, rel=1e-9)
    assert res.stderr == pytest.approx(ref.bse, rel=1e-9)
    assert res.info["weighting"]["rule"] == rule
    assert res.sigma_mode == "relative"


def test_rule_names_and_refusals():
    assert fitcore.fit("line", X, Y, weighting="1/x²").info["weighting"]["rule"] == "1/x^2"
    with pytest.raises(fitcore.FitError, match="unknown weighting rule"):
        fitcore.fit("line", X, Y, weighting="1/z")
    with pytest.raises(fitcore.FitError, match="infinite weight"):
        fitcore.fit("line", np.r_[0.0, X], np.r_[0.0, Y], weighting="1/x^2")
    # the blank excluded: fine
    res = fitcore.fit("line", np.r_[0.0, X], np.r_[0.0, Y], weighting="1/x^2",
                      excluded=np.r_[True, np.zeros(X.size, bool)])
    assert res.n_used == X.size
    with pytest.raises(fitcore.FitError, match="not both"):
        fitcore.fit("line", X, Y, weighting="1/x", sigma=np.ones(X.size))
    assert "weighting" not in fitcore.fit("line", X, Y).info
    from fitcore.report import method_lines

    lines = dict(method_lines(fitcore.fit("line", X, Y, weighting="1/y")))
    assert lines["weighting"].startswith("1/y")


def test_power_of_the_mean_from_replicates():
    # invented: constant CV (variance ~ mean^2) with 5 replicates at 6 levels
    rng = np.random.default_rng(4)
    levels = np.array([1.0, 3, 10, 30, 100, 300])
    x = np.repeat(levels, 5)
    mu = 0.5 + 2.0 * x
    y = mu * (1 + 0.05 * rng.standard_normal(x.size))
    theta, n = estimate_power(x, y)
    # independent: per-level log variance against log mean, least-squares slope
    lm = [math.log(abs(y[x == v].mean())) for v in levels]
    lv = [math.log(y[x == v].var(ddof=1)) for v in levels]
    assert theta == pytest.approx(np.polyfit(lm, lv, 1)[0], rel=1e-12)
    assert n == 6 and 1.5 < theta < 2.5
    res = fitcore.fit("line", x, y, weighting="power")
    info = res.info["weighting"]
    assert info["rule"] == "power" and info["exponent"] == pytest.approx(theta)
    sig, _ = rule_sigma("power", x, y)
    means = np.repeat([y[x == v].mean() for v in levels], 5)
    assert sig == pytest.approx(np.abs(means) ** (theta / 2), rel=1e-12)
    with pytest.raises(fitcore.FitError, match="replicate"):
        fitcore.fit("line", X, Y, weighting="power")


def test_read_back_uses_the_rule_for_the_unknowns_reading():
    res = fitcore.fit("line", X, Y, weighting="1/x^2")
    ip = fitcore.inverse_predict(res, [1.0, 1.02])
    # independent delta-method value: u^2 = (g'Cg + s^2 x0^2 / m) / b^2 (1/x^2: sigma ~ x)
    a, b = res.values
    x0 = (1.01 - a) / b
    g = np.array([1.0, x0])
    u = math.sqrt(g @ res.covariance @ g + (res.scale * x0) ** 2 / 2) / abs(b)
    assert ip.x == pytest.approx(x0, rel=1e-10)
    assert ip.u == pytest.approx(u, rel=1e-9)


def test_thermistor_relative_errors_want_one_over_y_squared():
    # sample set 04 (invented): NTC resistance whose errors are relative (grow with R);
    # one typing slip at 293.15 K (point 7). Unweighted Huber marks three good points
    # on the curve down-weighted besides the slip; with 1/y^2 only the slip is.
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / "sample_sets" / "04_thermistor.txt"
    if not path.exists():  # installed layout
        path = Path(fitcore.__file__).resolve().parents[1] / "desktop" / "sample_sets" / path.name
    t = fitcore.read_table(path)
    x, y = t.column("T"), t.column("R")
    plain = fitcore.fit("arrhenius", x, y, loss="huber")
    weighted = fitcore.fit("arrhenius", x, y, loss="huber", weighting="1/y^2")
    down_plain = set(np.flatnonzero(plain.weights < 0.5) + 1)
    down_w = set(np.flatnonzero(weighted.weights < 0.5) + 1)
    assert 7 in down_plain and len(down_plain) >= 3
    assert down_w == {7}
