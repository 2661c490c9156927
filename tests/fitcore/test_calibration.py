"""Inverse prediction, detection limits and lack of fit (fitcore.calibration).

Sources are named beside each check. Formulas are re-derived here independently of
fitcore (plain numpy sums), and compared to 1e-10.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import fitcore
from fitcore.calibration import CalibrationError, lack_of_fit

# The widely taught straight-line worked example (fluorescence standards; values from
# memory: x0 = 0.72, 6.21, 11.13 and s_x0 = 0.26, 0.24, 0.26 for single readings).
TX = np.array([0.0, 2, 4, 6, 8, 10, 12])
TY = np.array([2.1, 5.0, 9.0, 12.6, 17.3, 21.0, 24.7])


def _classical(x, y, readings):
    """Independent s_x0 (ISO 8466-1 / EURACHEM QUAM E.4) from plain sums."""
    n = x.size
    xbar, ybar = x.mean(), y.mean()
    sxx = np.sum((x - xbar) ** 2)
    b = np.sum((x - xbar) * (y - ybar)) / sxx
    a = ybar - b * xbar
    s = math.sqrt(np.sum((y - a - b * x) ** 2) / (n - 2))
    m = len(readings)
    y0 = float(np.mean(readings))
    x0 = (y0 - a) / b
    sx0 = s / b * math.sqrt(1 / m + 1 / n + (y0 - ybar) ** 2 / (b * b * sxx))
    return x0, sx0, a, b, s, sxx


def test_textbook_straight_line_single_readings():
    res = fitcore.fit("line", TX, TY)
    expected = [(2.9, 0.72, 0.26), (13.5, 6.21, 0.24), (23.0, 11.13, 0.26)]  # from memory
    for y0, x_book, s_book in expected:
        ip = fitcore.inverse_predict(res, [y0])
        assert round(ip.x, 2) == x_book
        assert round(ip.u, 2) == s_book
        x0, sx0, *_ = _classical(TX, TY, [y0])
        assert ip.x == pytest.approx(x0, rel=1e-10, abs=1e-12)
        assert ip.u == pytest.approx(sx0, rel=1e-10)
        t = stats.t.ppf(0.975, 5)  # Student t on n - 2 = 5 dof
        assert ip.dof == 5
        assert ip.interval[0] == pytest.approx(x0 - t * sx0, rel=1e-10)
        assert ip.interval[1] == pytest.approx(x0 + t * sx0, rel=1e-10)
        assert "ISO 8466-1" in ip.method
        assert not ip.extrapolated and ip.warnings == ()


def test_several_readings_use_one_over_m():
    res = fitcore.fit("line", TX, TY)
    readings = [13.3, 13.5, 13.8]
    ip = fitcore.inverse_predict(res, readings)
    _x0, sx0, *_ = _classical(TX, TY, readings)
    assert ip.m == 3 and ip.mean_reading == pytest.approx(np.mean(readings))
    assert ip.u == pytest.approx(sx0, rel=1e-10)
    # and it is smaller than for one reading of the same mean
    assert ip.u < fitcore.inverse_predict(res, [np.mean(readings)]).u


def test_quam_a5_cadmium(reference_dir):
    # EURACHEM/CITAC QUAM 3rd ed. (2012) example A5 (data as in check-values.md item 22):
    # x0 = 0.25934 mg/L, u(x0) = 0.017849 mg/L (QUAM quotes 0.26 and 0.018).
    x = np.repeat([0.1, 0.3, 0.5, 0.7, 0.9], 3)
    y = np.array([0.028, 0.029, 0.029, 0.084, 0.083, 0.081, 0.135, 0.131, 0.133,
                  0.180, 0.181, 0.183, 0.215, 0.230, 0.216])
    res = fitcore.fit("line", x, y)
    ip = fitcore.inverse_predict(res, [0.0712, 0.0712])
    assert ip.x == pytest.approx(0.25934, abs=1e-5)
    assert ip.u == pytest.approx(0.017849, abs=1e-5)


def test_delta_method_equals_classical_for_a_line_and_fieller_matches():
    # with relative sigma all 1 the general (delta-method, numerical Fieller) path is
    # taken; for a least-squares line it must equal the classical formulas
    res = fitcore.fit("line", TX, TY)
    res_d = fitcore.fit("line", TX, TY, sigma=np.ones(TX.size), sigma_mode="relative")
    for y0 in (2.9, 13.5, 23.0):
        a = fitcore.inverse_predict(res, [y0, y0 + 0.1])
        b = fitcore.inverse_predict(res_d, [y0, y0 + 0.1])
        assert "delta method" in b.method
        assert b.x == pytest.approx(a.x, rel=1e-10, abs=1e-12)
        assert b.u == pytest.approx(a.u, rel=1e-9)
        assert b.fieller[0] == pytest.approx(a.fieller[0], rel=1e-8, abs=1e-10)
        assert b.fieller[1] == pytest.approx(a.fieller[1], rel=1e-8, abs=1e-10)
        # independent Fieller: the prediction band (scipy t) meets y0 at the limits
        _x0, _sx0, a0, b0, s, sxx = _classical(TX, TY, [y0, y0 + 0.1])
        t = stats.t.ppf(0.975, 5)
        for xl in a.fieller:
            half = t * s * math.sqrt(1 / 2 + 1 / 7 + (xl - TX.mean()) ** 2 / sxx)
            assert abs(a0 + b0 * xl - (y0 + 0.05)) == pytest.approx(half, rel=1e-9)


def test_flat_calibration_warns_unbounded():
    rng = np.random.default_rng(3)
    x = np.arange(8.0)
    y = 5 + 0.01 * x + rng.normal(0, 0.5, x.size)  # invented: slope lost in the noise
    res = fitcore.fit("line", x, y)
    ip = fitcore.inverse_predict(res, [5.05])
    assert any("not significantly different from zero" in w for w in ip.warnings)
    assert not (math.isfinite(ip.fieller[0]) and math.isfinite(ip.fieller[1]))


def test_extrapolation_warns_and_is_flagged():
    res = fitcore.fit("line", TX, TY)
    ip = fitcore.inverse_predict(res, [28.0])
    assert ip.extrapolated and any("extrapolated" in w for w in ip.warnings)
    x0, _sx0, *_ = _classical(TX, TY, [28.0])
    assert ip.x == pytest.approx(x0, rel=1e-10)


def test_detection_limits_ich_and_iso_11843():
    res = fitcore.fit("line", TX, TY)
    for K in (1, 3):
        dl = fitcore.detection_limits(res, readings=K)
        _, _, _a, b, s, sxx = _classical(TX, TY, [0.0])
        n = TX.size
        # ICH Q2(R1): 3.3 sigma/S and 10 sigma/S, sigma residual SD, S slope
        assert dl.lod_ich == pytest.approx(3.3 * s / b, rel=1e-10)
        assert dl.loq_ich == pytest.approx(10 * s / b, rel=1e-10)
        # ISO 11843-2: x_c = t(0.95, n - 2) (s/b) sqrt(1/K + 1/n + xbar^2/Sxx), x_d ~ 2 x_c
        xc = stats.t.ppf(0.95, n - 2) * s / b * math.sqrt(1 / K + 1 / n + TX.mean() ** 2 / sxx)
        assert dl.critical_x == pytest.approx(xc, rel=1e-10)
        assert dl.detection_x == pytest.approx(2 * xc, rel=1e-10)
        assert "ICH Q2(R1)" in dl.rules["lod_ich"] and "ISO 11843-2" in dl.rules["critical_x"]


def _bootstrap_sd(model, x, res, x0_reading, m, reps, seed):
    """Parametric bootstrap of the read-back: new standards and new readings from the
    fitted curve with the fitted residual SD, refit, read back."""
    rng = np.random.default_rng(seed)
    target = float(np.mean(x0_reading))
    x_true = fitcore.inverse_predict(res, x0_reading).x
    f_true = float(res.predict([x_true])[0])
    out = []
    for _ in range(reps):
        ys = res.predict(x) + rng.normal(0, res.scale, x.size)
        rr = fitcore.fit(model, x, ys, p0=res.values)
        y0 = f_true + rng.normal(0, res.scale / math.sqrt(m))
        try:
            out.append(fitcore.inverse_predict(rr, [y0]).x)
        except CalibrationError:
            pass
    assert len(out) > 0.95 * reps
    del target
    return float(np.std(out, ddof=1))


def test_4pl_delta_method_against_parametric_bootstrap():
    # invented immunoassay-like standards in duplicate
    rng = np.random.default_rng(1)
    x = np.repeat([0.1, 0.3, 1, 3, 10, 30, 100], 2)
    truth = np.array([0.2, 3.0, 1.2, 5.0])
    y = fitcore.get_model("logistic4").f(x, truth) + rng.normal(0, 0.05, x.size)
    res = fitcore.fit("logistic4", x, y)
    readings = [1.6, 1.65]
    ip = fitcore.inverse_predict(res, readings)
    assert "delta method" in ip.method
    sd = _bootstrap_sd("logistic4", x, res, readings, 2, 250, seed=11)
    assert abs(ip.u / sd - 1) < 0.15, (ip.u, sd)


def test_quadratic_delta_method_against_parametric_bootstrap():
    rng = np.random.default_rng(2)
    x = np.linspace(0, 10, 11)
    y = 0.5 + 2.0 * x - 0.08 * x**2 + rng.normal(0, 0.15, x.size)  # invented, monotone
    res = fitcore.fit("poly2", x, y)
    readings = [9.0]
    ip = fitcore.inverse_predict(res, readings)
    assert "delta method" in ip.method
    sd = _bootstrap_sd("poly2", x, res, readings, 1, 400, seed=12)
    assert abs(ip.u / sd - 1) < 0.15, (ip.u, sd)


def test_reading_above_4pl_upper_asymptote_is_refused():
    rng = np.random.default_rng(1)
    x = np.repeat([0.1, 0.3, 1, 3, 10, 30, 100], 2)
    y = fitcore.get_model("logistic4").f(x, np.array([0.2, 3.0, 1.2, 5.0]))
    y = y + rng.normal(0, 0.05, x.size)
    res = fitcore.fit("logistic4", x, y)
    with pytest.raises(CalibrationError, match="upper asymptote"):
        fitcore.inverse_predict(res, [3.5])
    with pytest.raises(CalibrationError, match="lower asymptote"):
        fitcore.inverse_predict(res, [0.05])


def test_quadratic_two_roots_in_range_refused():
    x = np.linspace(0, 10, 11)
    y = 10 - (x - 5) ** 2 + np.array([0.1, -0.1] * 5 + [0.1])  # invented, turns over
    res = fitcore.fit("poly2", x, y)
    with pytest.raises(CalibrationError, match="more than once"):
        fitcore.inverse_predict(res, [5.0])


def test_robust_calibration_with_one_bad_standard():
    # invented: 16 standards on a line, the top one spoiled by +4 (40 noise SDs, a
    # pipetting slip); one unknown read 4 times near the top. The clean-data answer is
    # the least-squares read-back before the standard was spoiled. Over 10 invented
    # data sets (seeds 0-9) the Tukey read-back of the spoiled data lies within its own
    # standard uncertainty of the clean answer in at least 8 (a standard uncertainty
    # covers about 68 %, so not every set), the least-squares one in none.
    readings = [19.4, 19.5, 19.6, 19.5]
    rob_ok = ls_ok = 0
    for seed in range(10):
        rng = np.random.default_rng(seed)
        x = np.linspace(0, 10, 16)
        y = 1.0 + 2.0 * x + rng.normal(0, 0.1, x.size)
        clean = fitcore.inverse_predict(fitcore.fit("line", x, y), readings).x
        yb = y.copy()
        yb[-1] += 4.0
        rob = fitcore.inverse_predict(fitcore.fit("line", x, yb, loss="tukey"), readings)
        ls = fitcore.inverse_predict(fitcore.fit("line", x, yb), readings)
        assert "robust scale" in rob.method and "ISO 8466-1" in ls.method
        rob_ok += abs(rob.x - clean) < rob.u
        ls_ok += abs(ls.x - clean) < ls.u
        if seed == 0:  # the first set, shown in numbers
            assert abs(rob.x - clean) < rob.u
            assert abs(ls.x - clean) > 1.2 * ls.u
    assert rob_ok >= 8, rob_ok
    assert ls_ok == 0, ls_ok


def test_bad_inputs_have_clear_messages():
    res = fitcore.fit("line", TX, TY)
    with pytest.raises(CalibrationError, match="no reading"):
        fitcore.inverse_predict(res, [])
    with pytest.raises(CalibrationError, match="finite"):
        fitcore.inverse_predict(res, [float("nan")])
    with pytest.raises(CalibrationError, match="numbers"):
        fitcore.inverse_predict(res, ["abc"])
    with pytest.raises(CalibrationError, match="level"):
        fitcore.inverse_predict(res, [3.0], level=95)
    with pytest.raises(CalibrationError, match="K"):
        fitcore.detection_limits(res, readings=0)


def test_lack_of_fit_against_statsmodels_anova():
    # statsmodels anova_lm of the line against the one-mean-per-level model is the
    # classical lack-of-fit F test (Draper & Smith 2.1)
    sm = pytest.importorskip("statsmodels.formula.api")
    import pandas as pd
    from statsmodels.stats.anova import anova_lm

    x = np.repeat([0.1, 0.3, 0.5, 0.7, 0.9], 3)  # QUAM A5 design and data
    y = np.array([0.028, 0.029, 0.029, 0.084, 0.083, 0.081, 0.135, 0.131, 0.133,
                  0.180, 0.181, 0.183, 0.215, 0.230, 0.216])
    lof = lack_of_fit(fitcore.fit("line", x, y))
    df = pd.DataFrame({"x": x, "y": y})
    line = sm.ols("y ~ x", df).fit()
    full = sm.ols("y ~ C(x)", df).fit()
    table = anova_lm(line, full)
    assert lof.F == pytest.approx(table["F"].iloc[1], rel=1e-9)
    assert lof.p_value == pytest.approx(table["Pr(>F)"].iloc[1], rel=1e-8)
    assert (lof.df_lof, lof.df_pe, lof.levels) == (3, 10, 5)
    # no replicates -> no test
    assert lack_of_fit(fitcore.fit("line", TX, TY)) is None
