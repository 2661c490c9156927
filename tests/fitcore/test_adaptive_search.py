"""The adaptive loss's maximum-likelihood shape search at small n: the last round's
local search checked against a grid of shapes (fitcore.solvers.adaptive).

Reference: the profile NLL minimised by scipy.optimize.minimize_scalar (bounded) on each
side of its interior maximum and at the bounds (Barron 2019's NLL, check-values.md 1.4).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from fitcore.solvers import adaptive


def _two_clusters():
    # 16 residuals in [-1, 1] and 14 near +-20 (invented): the profile NLL over alpha
    # has two minima, at alpha = 0 (a local one) and near 2 (the global one)
    k, s = 14, 20.0
    return np.concatenate([np.linspace(-1, 1, 30 - k),
                           np.where(np.arange(k) % 2, s, -s) + np.linspace(-1, 1, k)])


def _profile(r, a, c_floor):
    lo, hi = math.log(c_floor), math.log(10 * float(np.max(np.abs(r))))
    res = optimize.minimize_scalar(lambda lc: adaptive._nll(r, a, lc), bounds=(lo, hi),
                                   method="bounded", options={"xatol": 1e-12})
    return float(res.fun)


def test_profile_has_two_minima_and_grid_matches_scalar_profile():
    r = _two_clusters()
    c = float(np.std(r))
    grid = adaptive._GRID
    v = adaptive._profile_grid(r * r, grid, math.log(1e-6 * c),
                               math.log(10 * float(np.max(np.abs(r)))), math.log(c))
    want = np.array([_profile(r, float(a), 1e-6 * c) for a in grid])
    assert np.max(np.abs(v - want)) <= 1e-9
    # two minima: at the lower bound and near the upper one (the test's premise)
    p0, p2 = _profile(r, 0.0, 1e-6 * c), _profile(r, 1.98, 1e-6 * c)
    assert p0 < _profile(r, 0.05, 1e-6 * c) and p2 < p0


@pytest.mark.parametrize("start", [0.01, 0.03, 1.99, 1.0])
def test_checked_search_finds_the_global_minimum(start):
    r = _two_clusters()
    c = float(np.std(r))
    # reference: bounded Brent on the right-hand basin [0.5, 2] of the profile
    ref = optimize.minimize_scalar(lambda a: _profile(r, a, 1e-6 * c), bounds=(0.5, 2.0),
                                   method="bounded", options={"xatol": 1e-9})
    assert ref.fun < _profile(r, 0.0, 1e-6 * c)
    alpha, _, nll, _ = adaptive._ml_shape_scale(r, start, c, 1e-6 * c, checked=True)
    assert alpha == pytest.approx(float(ref.x), abs=1e-5)
    assert nll == pytest.approx(float(ref.fun), abs=1e-9)
    if start < 0.05:
        # the local search alone stays in the basin at 0 (the reason for the check)
        assert adaptive._ml_shape_scale(r, start, c, 1e-6 * c, local=True)[0] == 0.0


# invented 12-point inhibition curves (doses 0.5 ... 50 in equal steps), a quarter or a
# tenth of the points gross outliers: the ML shape goes to alpha = 0
_X12 = np.linspace(0.5, 50.0, 12)
_Y12 = {
    "quarter": [143.979198, 67.515587, 77.446873, -14.698251, 41.765932, 19.140079,
                20.063606, 20.375278, 18.545122, 18.008078, 17.957765, 18.760018],
    "tenth": [1.588532, 46.96286, 63.738272, 72.312852, 78.495902, 77.323263,
              77.705873, 107.462243, 79.358821, 79.967917, 82.706261, 81.258436],
}


@pytest.mark.parametrize("which", sorted(_Y12))
def test_returned_scale_solves_the_likelihood_equation(which):
    # first-order condition of Barron's NLL in log c at the returned point (check-values
    # 1.4; stationarity: common practice): n - sum z w(z) = 0 with z = (r/c)^2. The
    # alternation of (alpha, c) and the parameters converges linearly in c at a fixed
    # shape; stopped on the NLL's change alone it left |g|/n ~ 1e-6 here
    import fitcore

    m = fitcore.get_model("logistic4")
    res = fitcore.fit(m, _X12, np.asarray(_Y12[which]), loss="adaptive")
    assert res.converged and res.alpha == 0.0
    r = np.asarray(_Y12[which]) - m.f(_X12, np.asarray(res.values))
    g = adaptive._nll_slope(r * r, 0.0, math.log(res.scale))[0]
    assert abs(g) / r.size <= 1e-9
