"""The 4PL's quick start (logit line + robust plateaus) and the scan kept as its wider
search (``Model.guess_search``), tried first when a fit from the quick start fails.

All data invented (seeded). References: scipy.optimize.least_squares (trf, Huber loss,
at the scale Ballast reports) for the optimum; otherwise common practice (a start
only has to lead to the same optimum).
"""
import numpy as np
import pytest
from scipy.optimize import least_squares

import fitcore
from fitcore.model import Model


def _curve(n, seed, outliers=2):
    rng = np.random.default_rng(seed)
    x = np.geomspace(0.01, 100, n)
    m = fitcore.get_model("logistic4")
    y = m(x, [2.0, 100.0, 1.1, 1.3]) + rng.normal(0, 2.0, n)
    y[n // 3] -= 35.0
    if outliers > 1:
        y[(2 * n) // 3] += 25.0
    return x, y


@pytest.mark.parametrize("n,seed", [(20, 1), (25, 3), (40, 5), (80, 7)])
@pytest.mark.parametrize("loss", ["huber", "tukey"])
def test_quick_start_reaches_the_scan_starts_optimum(n, seed, loss):
    # common practice: the start is a means; the fit from the quick start must be the
    # fit from the scan's start (to 1e-6 standard errors)
    x, y = _curve(n, seed)
    m = fitcore.get_model("logistic4")
    quick = fitcore.fit(m, x, y, loss=loss)
    scan = fitcore.fit(m, x, y, loss=loss, p0=m.guess_search(x, y))
    assert quick.converged and scan.converged
    assert np.all(np.abs(quick.values - scan.values) <= 1e-6 * scan.stderr)
    assert quick.scale == pytest.approx(scan.scale, rel=1e-9)


def test_huber_quick_start_optimum_matches_scipy():
    # scipy.optimize.least_squares(trf, loss="huber") at Ballast's own threshold
    # (scale * tuning) minimises the same objective: the same optimum
    x, y = _curve(25, 3)
    m = fitcore.get_model("logistic4")
    res = fitcore.fit(m, x, y, loss="huber")
    sp = least_squares(lambda p: m.f(x, p) - y, m.guess(x, y), jac=lambda p: m.jac(x, p),
                       method="trf", loss="huber", f_scale=res.scale * res.tuning,
                       xtol=1e-15, ftol=1e-15, gtol=1e-15)
    np.testing.assert_allclose(res.values, sp.x, rtol=0, atol=1e-5 * float(np.max(res.stderr)))


def test_a_failed_quick_start_is_retried_from_the_search():
    # a model whose quick guess is off (found by trying starts: the fit from it alone
    # fails the verdict) and whose wider search is the 4PL's scan: the engine must try
    # the search's start first (before its generic log/grid searches) and report that
    # fit (common practice: a fit is only as good as its start)
    m4 = fitcore.get_model("logistic4")
    off = [91.8622, -129.7378, -20.6964, 4.6066]
    calls = []

    def search(x, y):
        calls.append(1)
        return m4.guess_search(x, y)

    bad = Model("logistic4_badstart", m4.param_names, m4.f, m4.jac, f_jac=m4.f_jac,
                hess_w=m4.hess_w, lower=m4.lower, guess=lambda x, y: np.array(off),
                guess_search=search)
    x, y = _curve(25, 3)
    ref = fitcore.fit(m4, x, y, loss="huber", p0=m4.guess_search(x, y))
    calls.clear()
    res = fitcore.fit(bad, x, y, loss="huber")
    assert calls == [1]  # (asked only when the fit from the quick guess failed)
    assert res.converged, res.message
    assert np.all(np.abs(res.values - ref.values) <= 1e-6 * ref.stderr)


def test_search_start_not_used_when_the_analyst_gives_the_start():
    # an analyst's complete start is theirs: no model search replaces it (common practice)
    calls = []
    m4 = fitcore.get_model("logistic4")

    def search(x, y):
        calls.append(1)
        return m4.guess_search(x, y)

    m = Model("logistic4_counted", m4.param_names, m4.f, m4.jac, f_jac=m4.f_jac,
              hess_w=m4.hess_w, lower=m4.lower, guess=m4.guess, guess_search=search)
    x, y = _curve(25, 3)
    fitcore.fit(m, x, y, loss="huber", p0=[0.0, 1.0, -8.0, 1e6])
    assert calls == []


def test_logistic5_still_starts_from_the_scan():
    # the 5PL's start is the 4PL scan's with s = 1 (unchanged by the quick start)
    x, y = _curve(25, 3)
    m4, m5 = fitcore.get_model("logistic4"), fitcore.get_model("logistic5")
    np.testing.assert_array_equal(m5.guess(x, y), np.append(m4.guess_search(x, y), 1.0))


def test_monotone_pole_check_agrees_with_the_grid_search():
    # common practice (the verdict's own rule): for the 4PL, declared monotone in x, the
    # pole check from the data points alone must give what the 2001-point grid search
    # gives, on seeded parameters and doses (x = 0 included; x < 0 is not finite there)
    from fitcore.solvers.problem import _Problem
    from fitcore.solvers.verdict import _pole_search

    m4 = fitcore.get_model("logistic4")
    assert m4.monotone_in_x
    plain = Model("logistic4_plain", m4.param_names, m4.f, m4.jac, lower=m4.lower)
    rng = np.random.default_rng(12)
    negative = 0
    for t in range(300):
        n = int(rng.integers(3, 40))
        x = np.sort(rng.choice([0.0, 1.0], p=[0.2, 0.8]) * 10 ** rng.uniform(-3, 3, n))
        if t % 10 == 0:
            x = np.sort(rng.uniform(-5, 50, n))  # some negative doses: not finite there
        p = np.array([rng.normal(0, 50), rng.normal(100, 50),
                      rng.choice([-1, 1]) * 10 ** rng.uniform(-2, 2), 10 ** rng.uniform(-4, 4)])
        y = m4.f(x, p)
        one = np.broadcast_to(1.0, (n,))
        fast = _pole_search(_Problem(m4, x, y, one, np.ones(4, bool), p, unit=True), p, 2001)
        grid = _pole_search(_Problem(plain, x, y, one, np.ones(4, bool), p, unit=True), p, 2001)
        assert fast == grid, (x, p)
        negative += grid is not None
    assert negative > 0  # (the grid search did find the non-finite stretch x < 0)
