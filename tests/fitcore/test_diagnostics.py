"""Point diagnostics: leverage, standardised residuals, Cook's distance, influence.

Outside references: statsmodels OLS influence (on whitened designs for weights) (hat_matrix_diag,
resid_studentized_internal, cooks_distance, dfbeta, dfbetas), side by side; and brute
force refits with the point physically removed. The data are invented (seeded).
"""
from __future__ import annotations


import numpy as np
import pytest
import statsmodels.api as sm

import fitcore
from fitcore.diagnostics import point_diagnostics, refit_settings


def _line_data(n=40, seed=1, outliers=()):
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(0, 10, n))
    y = 1.5 + 0.8 * x + rng.normal(0, 0.5, n)
    for i, d in outliers:
        y[i] += d
    return x, y


def _decay_data(n=50, seed=2):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 12, n)
    y = 4.0 * np.exp(-x / 3.0) + 0.6 + rng.normal(0, 0.06, n)
    y[[7, n - 5]] += [0.5, -0.4]
    return x, y


# --------------------------------------------------------------------------- leverage
def test_leverage_studentised_cook_match_statsmodels_ols():
    x, y = _line_data(outliers=[(5, 4.0), (33, -3.0)])
    res = fitcore.fit("line", x, y)
    d = point_diagnostics(res)
    inf = sm.OLS(y, sm.add_constant(x)).fit().get_influence()
    np.testing.assert_allclose(d.leverage, inf.hat_matrix_diag, rtol=1e-12)
    np.testing.assert_allclose(d.std_residuals, inf.resid_studentized_internal, rtol=1e-10)
    np.testing.assert_allclose(d.cooks_distance, inf.cooks_distance[0], rtol=1e-10)
    assert np.nansum(d.leverage) == pytest.approx(2.0, abs=1e-12)  # trace H = p


def test_leverage_with_sigma_matches_statsmodels_wls():
    x, y = _line_data()
    sigma = np.linspace(0.3, 1.2, x.size)
    res = fitcore.fit("line", x, y, sigma=sigma, sigma_mode="relative")
    d = point_diagnostics(res)
    # statsmodels' WLS results have no influence object: OLS on the whitened design
    sw = 1 / sigma
    inf = sm.OLS(y * sw, sm.add_constant(x) * sw[:, None]).fit().get_influence()
    np.testing.assert_allclose(d.leverage, inf.hat_matrix_diag, rtol=1e-11)


def test_robust_leverage_is_the_weighted_hat_matrix():
    """Huber: hat values of sqrt(w) X with the fit's robust weights, side by side with
    statsmodels OLS on the design whitened by those weights."""
    x, y = _line_data(outliers=[(5, 6.0), (20, -5.0)])
    res = fitcore.fit("line", x, y, loss="huber")
    assert res.weights[5] < 0.5 and res.weights[20] < 0.5
    d = point_diagnostics(res)
    sw = np.sqrt(res.weights)
    inf = sm.OLS(y * sw, sm.add_constant(x) * sw[:, None]).fit().get_influence()
    np.testing.assert_allclose(d.leverage, inf.hat_matrix_diag, rtol=1e-10)


def test_nonlinear_leverage_from_jacobian():
    """Nonlinear: hat values of J at the solution, J by central differences here."""
    x, y = _decay_data()
    res = fitcore.fit("exp_decay", x, y)
    d = point_diagnostics(res)
    p = res.values
    J = np.empty((x.size, 3))
    for j in range(3):
        h = 1e-6 * max(abs(p[j]), 1.0)
        e = np.zeros(3)
        e[j] = h
        J[:, j] = (res.model.f(x, p + e) - res.model.f(x, p - e)) / (2 * h)
    Q, _ = np.linalg.qr(J)
    np.testing.assert_allclose(d.leverage, np.sum(Q**2, axis=1), rtol=1e-6, atol=1e-9)
    assert np.nansum(d.leverage) == pytest.approx(3.0, abs=1e-9)


def test_high_leverage_flag_and_note():
    x, y = _line_data(n=30)
    x = x.copy()
    x[-1] = 40.0  # far out in x
    y = y.copy()
    y[-1] = 1.5 + 0.8 * 40.0 - 8.0  # and off the line: it pulls
    res = fitcore.fit("line", x, y, loss="huber")
    d = point_diagnostics(res)
    assert d.high_leverage[-1]
    assert d.leverage[-1] > 2 * 2 / 30
    assert "point 30" in d.note and "can still pull the fit" in d.note
    # with the points' file rows (a header and a skipped row above), the same warning
    # names the file row, the identifier of the window and the report (issue 17 item 3)
    rows = np.r_[np.arange(2, 20), np.arange(21, 33)]
    assert "row 32" in d.leverage_note(rows) and "point 30" not in d.leverage_note(rows)
    summary = d.summary(rows)
    assert summary.startswith(f"Point diagnostics: influence by {d.method}.")
    assert d.leverage_note(rows) in summary
    # the rule (common practice): h > 2p/n or h > 0.5
    expect = (d.leverage > d.threshold) | (d.leverage > 0.5)
    np.testing.assert_array_equal(d.high_leverage, expect)


def test_no_note_without_high_leverage():
    x = np.tile(np.linspace(0, 1, 5), 8)  # balanced design: every h = 2/40
    y = 1 + x + np.random.default_rng(3).normal(0, 0.1, x.size)
    d = point_diagnostics(fitcore.fit("line", x, y))
    assert not d.high_leverage.any()
    assert d.note == ""


# --------------------------------------------------------------------------- influence
def _brute(res, kwargs, model, x, y):
    """Refit with each point physically removed (not via the exclusion mask)."""
    out = np.empty((x.size, len(res.values)))
    for i in range(x.size):
        r = fitcore.fit(model, np.delete(x, i), np.delete(y, i), **kwargs)
        out[i] = (r.values - res.values) / res.stderr
    return out


@pytest.mark.parametrize("loss,kwargs", [
    ("l2", {}),
    ("huber", {}),
    ("tukey", {}),
    ("huber", {"scale": 0.5}),
])
def test_influence_equals_brute_force_refits_linear(loss, kwargs):
    x, y = _line_data(n=25, outliers=[(3, 3.0), (18, -2.5)])
    res = fitcore.fit("line", x, y, loss=loss, **kwargs)
    d = point_diagnostics(res)
    assert d.exact.all() and "exact refits" in d.method
    brute = _brute(res, dict(loss=loss, **kwargs), "line", x, y)
    np.testing.assert_allclose(d.influence, brute, rtol=1e-6, atol=1e-7)


def test_influence_equals_brute_force_refits_nonlinear():
    x, y = _decay_data(n=30)
    res = fitcore.fit("exp_decay", x, y, loss="huber")
    d = point_diagnostics(res)
    brute = _brute(res, dict(loss="huber"), "exp_decay", x, y)
    np.testing.assert_allclose(d.influence, brute, rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("loss,kwargs", [
    ("tukey", {"sigma_mode": "relative"}),
    ("welsch", {"fixed": {"hill": 1.0}}),
    ("huber", {"sigma_mode": "absolute"}),
])
def test_warm_newton_refits_equal_brute_force_4pl(loss, kwargs):
    """The exact refits solve the estimating equations by Newton's method from the full
    fit (fitcore.refits) instead of a fresh ``fit``: the same root as brute-force refits
    with the point removed and the full fit's values as start values (as the
    diagnostics document; with Tukey, a cold start from the automatic start values finds
    another root for point 13 of this data set), within 1e-6 standard errors, for a 4PL with sigma and with a
    held parameter; and the fast path is the one mostly used (where its iteration does
    not settle, e.g. the MAD's median point keeps changing, the full fit is run instead:
    2 of 20 here with Tukey)."""
    rng = np.random.default_rng(8)
    x = np.geomspace(0.01, 100, 20)
    y = 2.0 + 96.0 / (1 + (x / 1.3) ** 1.1) + rng.normal(0, 2.0, x.size)
    y[6] -= 30.0
    sigma = 1.5 + 0.02 * y
    kw = dict(loss=loss, sigma=sigma, **kwargs)
    res = fitcore.fit("logistic4", x, y, **kw)
    from fitcore import refits
    used = []
    orig = refits.WarmRefit.values

    def spy(self, *a, **k):
        got = orig(self, *a, **k)
        used.append(got is not None)
        return got

    refits.WarmRefit.values = spy
    try:
        d = point_diagnostics(res)
    finally:
        refits.WarmRefit.values = orig
    assert len(used) == x.size and sum(used) >= 0.75 * x.size
    out = np.full((x.size, 4), np.nan)
    for i in range(x.size):
        keep = np.arange(x.size) != i
        r = fitcore.fit("logistic4", x[keep], y[keep], p0=dict(zip(res.param_names, res.values)),
                        **dict(kw, sigma=sigma[keep]))
        with np.errstate(divide="ignore", invalid="ignore"):  # held: stderr 0
            out[i] = (r.values - res.values) / res.stderr
    free = res.free
    np.testing.assert_allclose(d.influence[:, free], out[:, free], rtol=1e-6, atol=1e-6)


def test_l2_influence_against_statsmodels_dfbeta_and_dfbetas():
    """statsmodels: dfbeta = b - b_(i); dfbetas = dfbeta / (s_(i) sqrt((X'X)^-1_jj)),
    with the deleted-point scale s_(i). Ours uses the full fit's standard uncertainty
    s sqrt((X'X)^-1_jj) and the opposite sign: influence = -dfbetas * s_(i) / s."""
    x, y = _line_data(outliers=[(5, 4.0)])
    res = fitcore.fit("line", x, y)
    d = point_diagnostics(res)
    ols = sm.OLS(y, sm.add_constant(x)).fit()
    inf = ols.get_influence()
    np.testing.assert_allclose(d.influence * res.stderr, -inf.dfbeta, rtol=1e-9, atol=1e-12)
    s_i = np.sqrt(inf.sigma2_not_obsi)
    np.testing.assert_allclose(d.influence, -inf.dfbetas * s_i[:, None] / np.sqrt(ols.scale),
                               rtol=1e-9, atol=1e-12)


def test_one_step_is_exact_for_linear_least_squares():
    x, y = _line_data(outliers=[(5, 4.0)])
    res = fitcore.fit("line", x, y)
    exact = point_diagnostics(res)
    approx = point_diagnostics(res, exact_limit=0)
    assert not approx.exact.any() and "one-step" in approx.method
    np.testing.assert_allclose(approx.influence, exact.influence, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize("model,loss,tol", [
    # tolerance: max |one-step - exact| as a fraction of the largest |influence|
    # (measured here: huber 0.4 %, tukey 0.2 %, exp_decay l2 1.5 % on n = 500)
    ("line", "huber", 0.05),
    ("line", "tukey", 0.05),
    ("line", "cauchy", 0.05),
    ("exp_decay", "l2", 0.05),
    ("exp_decay", "huber", 0.05),
])
def test_one_step_close_to_exact_refits(model, loss, tol):
    rng = np.random.default_rng(11)
    n = 120
    x = np.linspace(0, 10, n)
    e = rng.normal(size=n)
    e[rng.choice(n, 8, replace=False)] += rng.normal(0, 8, 8)
    y = (1 + 2 * x + 0.3 * e) if model == "line" else (3 * np.exp(-x / 2.5) + 0.5 + 0.05 * e)
    res = fitcore.fit(model, x, y, loss=loss)
    exact = point_diagnostics(res)
    approx = point_diagnostics(res, exact_limit=0)
    err = np.nanmax(np.abs(approx.influence - exact.influence))
    assert err <= tol * np.nanmax(np.abs(exact.influence))


def test_excluded_points_and_held_parameters_get_nan():
    x, y = _decay_data(n=30)
    excl = np.zeros(x.size, bool)
    excl[[4, 9]] = True
    res = fitcore.fit("exp_decay", x, y, excluded=excl, fixed={"C": 0.6})
    d = point_diagnostics(res)
    for arr in (d.leverage, d.std_residuals, d.cooks_distance, d.max_influence):
        assert np.all(np.isnan(arr[excl])) and np.all(np.isfinite(arr[~excl]))
    assert np.all(np.isnan(d.influence[excl]))
    jc = res.param_names.index("C")
    assert np.all(np.isnan(d.influence[:, jc]))
    free_cols = [j for j in range(3) if j != jc]
    assert np.all(np.isfinite(d.influence[np.ix_(~excl, free_cols)]))
    assert not d.high_leverage[excl].any()
    # exclusion record respected: a refit without point 0 equals brute force
    keep = ~excl
    keep[0] = False
    r0 = fitcore.fit("exp_decay", x[keep], y[keep], fixed={"C": 0.6})
    expect = (r0.values - res.values)[free_cols] / res.stderr[free_cols]
    np.testing.assert_allclose(d.influence[0, free_cols], expect, rtol=1e-6, atol=1e-8)
    assert d.n_used == 28 and d.n_params == 2


def test_missing_values_are_not_used():
    x, y = _line_data(n=20)
    y = y.copy()
    y[3] = np.nan
    d = point_diagnostics(fitcore.fit("line", x, y))
    assert np.isnan(d.leverage[3]) and d.n_used == 19


def test_progress_and_cancel():
    x, y = _line_data(n=30)
    res = fitcore.fit("line", x, y, loss="huber")
    calls = []
    d = point_diagnostics(res, progress=lambda i, n: calls.append((i, n)))
    assert calls[-1] == (30, 30) and len(calls) == 30
    count = {"n": 0}

    def cancel():
        count["n"] += 1
        return count["n"] > 5

    dc = point_diagnostics(res, cancel=cancel)
    assert dc.cancelled and dc.exact.sum() == 5
    assert "cancelled" in dc.method
    # refitted points equal the full run; the rest carry the one-step values
    np.testing.assert_allclose(dc.influence[:5], d.influence[:5], rtol=1e-12)
    assert np.all(np.isfinite(dc.influence[5:]))
    approx = point_diagnostics(res, exact_limit=0)
    np.testing.assert_allclose(dc.influence[5:], approx.influence[5:], rtol=1e-12)


def test_adaptive_fit_diagnostics_hold_shape():
    x, y = _line_data(n=30, outliers=[(4, 5.0)])
    res = fitcore.fit("line", x, y, loss="adaptive")
    d = point_diagnostics(res)
    assert "fitted alpha" in d.method
    kw = refit_settings(res, hold_shape=True)
    assert kw["loss"] == "general" and kw["alpha"] == res.alpha and kw["scale"] == res.scale
    r3 = fitcore.fit("line", np.delete(x, 3), np.delete(y, 3), **kw)
    np.testing.assert_allclose(d.influence[3], (r3.values - res.values) / res.stderr,
                               rtol=1e-6, atol=1e-8)


def test_refit_settings_repeat_the_method():
    x, y = _line_data(n=20)
    sig = np.full(x.size, 0.5)
    r = fitcore.fit("line", x, y, loss="tukey", tuning=4.0, sigma=sig, sigma_mode="relative",
                    scale=0.7, fixed={"a": 1.5})
    kw = refit_settings(r)
    assert kw == {"loss": "tukey", "fixed": {"a": 1.5}, "sigma_mode": "relative",
                  "tuning": 4.0, "scale": 0.7}
    r2 = fitcore.fit("line", x, y, loss="general", alpha=0.5)
    assert refit_settings(r2)["alpha"] == 0.5
    assert "scale" not in refit_settings(r2)


def test_bad_input():
    with pytest.raises(fitcore.FitError):
        point_diagnostics("not a fit")


def test_exact_refits_up_to_500_points_then_the_one_step():
    """n = 500 (the default ``exact_limit``) gets an exact refit per point, n = 501 the
    one-step approximation. How long the 500 refits take is measured by
    ``bench/bench_analysis.py`` (warm-started refits against cold ones), not here."""
    rng = np.random.default_rng(4)
    x = np.linspace(0, 10, 501)
    y = 1 + 2 * x + rng.standard_t(3, 501)
    res = fitcore.fit("line", x[:500], y[:500], loss="huber")
    d = point_diagnostics(res)
    assert d.exact.all() and d.n_failed == 0 and "exact" in d.method.lower()
    assert np.all(np.isfinite(d.influence))
    d501 = point_diagnostics(fitcore.fit("line", x, y, loss="huber"))
    assert not d501.exact.any()
