"""fitcore.uncertainty: the covariance recipes, each against statsmodels run side by
side on the same residuals and design (OLS, WLS with a fixed scale, OLS HC1, RLM with
Huber's H1) or against the 95 % efficiency of the default Huber constant.

Data are invented (a quadratic with Student-t noise); the references decide the
numbers. The L1 recipe is checked in tests/fitcore/test_l1.py (R quantreg's iid
standard errors and a simulation).
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
import statsmodels.api as sm

import fitcore
from fitcore import uncertainty as U
from fitcore.losses import efficiency, get_loss


def _design(n=50, seed=4):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, n)
    X = sm.add_constant(np.c_[x, x ** 2])
    y = X @ [1.0, 2.0, 0.1] + 0.5 * rng.standard_t(3, n)
    sigma = 0.3 + 0.05 * x
    return X, y, sigma


def test_inv_jtj_equals_the_inverse_and_refuses_a_singular_jacobian():
    X, _, _ = _design()
    # numpy's inverse of the normal matrix (well conditioned here)
    np.testing.assert_allclose(U.inv_jtj(X), np.linalg.inv(X.T @ X), rtol=1e-9)
    # the large-n route (Gram matrix, n > 20000) gives the same
    rng = np.random.default_rng(1)
    big = np.c_[np.ones(25000), rng.normal(size=25000), rng.uniform(size=25000)]
    np.testing.assert_allclose(U.inv_jtj(big), np.linalg.inv(big.T @ big), rtol=1e-9)
    with pytest.raises(U.RankDeficient, match="identifiable"):
        U.inv_jtj(np.c_[X, 2 * X[:, 1]])  # a column twice
    with pytest.raises(U.RankDeficient, match="no effect"):
        U.inv_jtj(np.c_[X, np.zeros(len(X))])
    assert U.inv_jtj(np.zeros((4, 0))).shape == (0, 0)


def test_least_squares_covariance_equals_statsmodels_ols_and_wls():
    X, y, sigma = _design()
    n, p = X.shape
    ols = sm.OLS(y, X).fit()
    C, recipe = U.cov_least_squares(X, ols.resid, n - p)
    np.testing.assert_allclose(C, ols.cov_params(), rtol=1e-9)  # statsmodels OLS
    assert recipe == U.RECIPE_LS
    # absolute sigma: the whitened design, no scale (statsmodels WLS, cov_type "fixed
    # scale" with scale 1)
    wls = sm.WLS(y, X, weights=1 / sigma ** 2).fit(cov_type="fixed scale")
    Ca, recipe = U.cov_least_squares(X / sigma[:, None], wls.resid / sigma, n - p, absolute=True)
    np.testing.assert_allclose(Ca, wls.cov_params(), rtol=1e-9)
    assert recipe == U.RECIPE_LS_ABS


def test_huber_h1_equals_statsmodels_rlm():
    X, y, _ = _design()
    n, p = X.shape
    # statsmodels RLM with HuberT (k = 1.345) and its default H1 covariance; our recipe
    # on its residuals and scale
    rlm = sm.RLM(y, X, M=sm.robust.norms.HuberT()).fit(cov="H1")
    C, recipe = U.cov_m_estimate(X, rlm.resid / rlm.scale, rlm.scale, get_loss("huber"), n - p)
    np.testing.assert_allclose(C, rlm.bcov_scaled, rtol=1e-9)
    assert recipe == U.RECIPE_H1


def test_sandwich_of_least_squares_is_statsmodels_hc1():
    # with psi(u) = u the sandwich A^-1 B A^-1 n/(n - p) is White's HC1 covariance
    # (statsmodels OLS, cov_type "HC1")
    X, y, _ = _design()
    n, p = X.shape
    ols = sm.OLS(y, X).fit(cov_type="HC1")
    s = np.sqrt(np.sum(ols.resid ** 2) / (n - p))
    C, recipe = U.cov_m_estimate(X, ols.resid / s, s, get_loss("l2"), n - p, recipe="sandwich")
    np.testing.assert_allclose(C, ols.cov_params(), rtol=1e-9)
    assert recipe == U.RECIPE_SANDWICH
    # the H1 recipe is refused, not replaced, when asked for where it is undefined
    tukey = get_loss("tukey")
    far = np.full(n, 50.0)  # every residual beyond Tukey's c: mean psi' = 0
    with pytest.raises(U.RankDeficient, match="H1 covariance undefined"):
        U.cov_m_estimate(X, far, 1.0, tukey, n - p, recipe="H1")


def test_model_based_covariance_is_least_squares_over_the_efficiency():
    # absolute sigma: C = (J^T W J)^-1 / efficiency at the normal model; the default
    # Huber constant 1.345 is 95 % efficient (Holland & Welsch 1977)
    X, _, sigma = _design()
    J = X / sigma[:, None]
    huber = get_loss("huber")
    C, recipe = U.cov_m_estimate(J, None, 1.0, huber, len(X) - 3, absolute=True)
    np.testing.assert_allclose(C, np.linalg.inv(J.T @ J) / 0.95, rtol=1e-5)
    np.testing.assert_allclose(C, np.linalg.inv(J.T @ J) / efficiency(huber), rtol=1e-9)
    assert recipe == U.RECIPE_M_ABS


# ------------------------------------------------------------------ L1 sparsity: no stand-in
def _failing_linprog(*args, **kwargs):
    # what scipy.optimize.linprog returns when HiGHS gives up (status 4: numerical
    # difficulties; scipy's OptimizeResult fields, eqlin absent)
    return SimpleNamespace(status=4, message="Numerical difficulties encountered.", eqlin=None)


def test_l1_sparsity_refuses_when_its_linear_program_fails(monkeypatch):
    # house rule, no silent fallbacks: a failed LP for the sparsity slope is an error
    # naming the solver's status, never a least-squares slope put in its place (it was)
    rng = np.random.default_rng(7)
    r = rng.laplace(0.0, 1.0, 41)
    assert U.l1_sparsity(r, 2) > 0  # the LP answers normally
    monkeypatch.setattr(U, "optimize", SimpleNamespace(linprog=_failing_linprog))
    with pytest.raises(U.CovarianceUnavailable, match=r"L1 sparsity.*solver status 4") as info:
        U.l1_sparsity(r, 2)
    assert info.value.complete and "estimates are reported" in str(info.value)


def test_l1_fit_keeps_its_estimates_and_says_the_uncertainties_are_missing(monkeypatch):
    # the fit's estimates do not depend on the covariance recipe: with the sparsity LP
    # failing they equal statsmodels QuantReg(q=0.5) (IRLS, good to ~1e-7 of the
    # optimum, as in test_l1.py) and the fit without the failure; the standard
    # uncertainties are NaN and the message says why
    rng = np.random.default_rng(11)
    x = np.linspace(0.0, 10.0, 31)
    y = 1.0 + 2.0 * x + rng.laplace(0.0, 0.5, x.size)
    y[[4, 17]] += 25.0
    good = fitcore.fit("line", x, y, loss="l1")
    monkeypatch.setattr(U, "optimize", SimpleNamespace(linprog=_failing_linprog))
    bad = fitcore.fit("line", x, y, loss="l1")
    qr = sm.QuantReg(y, sm.add_constant(x)).fit(q=0.5, max_iter=5000, p_tol=1e-12)
    np.testing.assert_allclose(bad.values, qr.params, rtol=0, atol=1e-5 * float(np.max(good.stderr)))
    np.testing.assert_array_equal(bad.values, good.values)
    assert np.all(np.isfinite(good.stderr)) and np.all(np.isnan(bad.stderr))
    assert "L1 cannot estimate standard uncertainties" in bad.message
    assert "(the L1 sparsity) could not be computed" in bad.message
    assert bad.covariance_recipe == "not available"


@pytest.mark.parametrize("layout", ["ten shifted at scattered x", "pairs at the same x"])
def test_l1_with_half_of_the_points_off_an_exact_line_says_so_in_its_own_words(layout):
    # 10 points on y = 2x + 1 and 10 shifted by +5: every line between the two groups fits
    # equally well, and the L1 solution (the middle one here) leaves all residuals at
    # +-2.5, so there is no spread near zero to estimate the sparsity from. Before: the
    # scattered layout ended in "HiGHS status 4 ... not recognized" from the sparsity's
    # programme, the paired one in u = 0 (a slope of 0 through a step)
    if layout == "ten shifted at scattered x":
        x = np.arange(1.0, 21.0)
        off = [1, 2, 4, 6, 11, 12, 13, 14, 15, 17]
    else:
        x = np.repeat(np.arange(1.0, 11.0), 2)
        off = list(range(1, 20, 2))
    y = 2.0 * x + 1.0
    y[off] += 5.0
    res = fitcore.fit("line", x, y, loss="l1")
    # the estimates stand: as small a sum of absolute deviations as statsmodels
    # QuantReg(q=0.5) reaches (IRLS, good to ~1e-7 of the optimum, as in test_l1.py)
    qr = sm.QuantReg(y, sm.add_constant(x)).fit(q=0.5, max_iter=5000, p_tol=1e-12)
    assert np.sum(np.abs(res.residuals)) <= np.sum(np.abs(y - qr.fittedvalues)) + 1e-6
    assert res.converged and np.all(np.isnan(res.stderr))
    assert res.covariance_recipe == "not available"
    msg = res.message
    assert "HiGHS" not in msg and "status" not in msg
    for words in ("L1 cannot estimate standard uncertainties here", "all of size 2.5,",
                  "half of the points lie on one line", "estimates are reported",
                  "exclude the points that do not belong", "Huber or least squares"):
        assert words in msg, (words, msg)
    # data with a spread near zero keep their uncertainties (common practice: the
    # check refuses only the degenerate window)
    rng = np.random.default_rng(3)
    y2 = y + rng.laplace(0.0, 0.3, y.size)
    good = fitcore.fit("line", x, y2, loss="l1")
    assert np.all(np.isfinite(good.stderr)) and np.all(good.stderr > 0), good.message
