"""The large-data L1 path (Portnoy and Koenker's band with merged signs): exact against
the full linear programme.

Outside reference, named beside each check: scipy.optimize.linprog (HiGHS, dual
simplex) on the dual LP of the whole problem, posed here independently of fitcore:
``max b^T d + lo^T mu - hi^T nu`` subject to ``A^T d + mu - nu = 0``, ``|d| <= 1``,
``mu, nu >= 0`` (LP duality: its optimum is the L1 minimum, and the multipliers of its
equality constraints are the L1 estimates), with b and A's columns scaled to order one
here. 20 001 points (odd: a line held at a bound has an intercept that is a median, unique
for an odd count) take the band path (more than ``l1._L1_DIRECT_MAX``).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from fitcore.solvers import l1


def _full_dual_l1(A, b, lower, upper):
    """Reference: (theta, min sum |b - A theta|) over all points by linprog's dual LP."""
    n, k = A.shape
    d = np.sqrt((A * A).mean(axis=0))
    sb = float(np.median(np.abs(b - np.median(b)))) or 1.0
    lo, hi = np.asarray(lower, float) * d / sb, np.asarray(upper, float) * d / sb
    fl, fh = np.flatnonzero(np.isfinite(lo)), np.flatnonzero(np.isfinite(hi))
    E = np.zeros((k, fl.size + fh.size))
    E[fl, np.arange(fl.size)] = 1.0
    E[fh, fl.size + np.arange(fh.size)] = -1.0
    c = -np.concatenate([b / sb, lo[fl], -hi[fh]])
    bounds = [(-1.0, 1.0)] * n + [(0.0, None)] * (fl.size + fh.size)
    res = optimize.linprog(c, A_eq=np.hstack([(A / d).T, E]), b_eq=np.zeros(k),
                           bounds=bounds, method="highs-ds")
    assert res.status == 0
    return -np.asarray(res.eqlin.marginals) * sb / d, -res.fun * sb


def _data(kind, n=20001, seed=3):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 10, n)
    if kind == "line":
        A = np.c_[np.ones(n), x]
        b = 1 + 2 * x + rng.laplace(0, 0.5, n)
    else:  # quadratic with heavy-tailed (Cauchy) noise and one-sided gross outliers
        A = np.c_[np.ones(n), x, x * x]
        b = 1 + 2 * x - 0.1 * x * x + rng.standard_cauchy(n)
        b[rng.random(n) < 0.05] += 50
    return A, b


@pytest.fixture
def lp_calls(monkeypatch):
    """Records the LPs the band path solves: (points, with merged points, solved)."""
    calls = []
    orig = l1._lad_dual

    def recording(A, b, lo, hi, g=None, method="highs"):
        t = orig(A, b, lo, hi, g, method)
        calls.append((A.shape[0], g is not None, t is not None))
        return t

    monkeypatch.setattr(l1, "_lad_dual", recording)
    return calls


@pytest.mark.parametrize("kind", ["line", "quadratic"])
@pytest.mark.parametrize("bounded", [False, True])
@pytest.mark.parametrize("z", [None, 0.25])
def test_band_l1_is_the_full_lp_optimum(kind, bounded, z, lp_calls, monkeypatch):
    # z = 0.25 prediction standard errors and no floor of 500 points: a band far too
    # narrow (its LP infeasible, or merged points coming back with the wrong sign), so
    # that the band is widened (the answer must still be the exact optimum of all the
    # points)
    if z is not None:
        monkeypatch.setattr(l1, "_PK_Z", z)
        monkeypatch.setattr(l1, "_PK_MIN", 20)
    A, b = _data(kind)
    k = A.shape[1]
    lo, hi = np.full(k, -np.inf), np.full(k, np.inf)
    if bounded:  # bounds that bind (the unbounded slope is about 2)
        hi[1] = 1.9 if kind == "line" else 2.2
        lo[0] = 1.2 if kind == "line" else -np.inf
    theta = l1._l1_linear(A, b, lo, hi)
    ref, fun = _full_dual_l1(A, b, lo, hi)
    # the answer came from an LP over a band, not from a fallback over all the points
    band_calls = [c for c in lp_calls if c[1]]
    assert band_calls and lp_calls[-1] == band_calls[-1] and band_calls[-1][2]
    assert max(c[0] for c in lp_calls) < A.shape[0] // 2
    if z is not None:
        assert len(band_calls) >= 2  # the narrow band was corrected
    assert np.sum(np.abs(b - A @ theta)) == pytest.approx(fun, rel=1e-10)
    assert np.allclose(theta, ref, rtol=1e-8, atol=1e-10)
    assert np.all(theta >= lo - 1e-12) and np.all(theta <= hi + 1e-12)


def test_band_l1_does_not_depend_on_the_order_of_the_points():
    # property (common practice): the subsample and the LPs' row order follow the rows'
    # values, so a permutation of the points gives the same estimates to rounding;
    # reference for the optimum: the full dual LP above
    A, b = _data("quadratic", seed=8)
    perm = np.random.default_rng(1).permutation(b.size)
    inf = np.full(3, np.inf)
    t1 = l1._l1_linear(A, b, -inf, inf)
    t2 = l1._l1_linear(A[perm], b[perm], -inf, inf)
    assert np.allclose(t1, t2, rtol=1e-10, atol=1e-12)
    _, fun = _full_dual_l1(A, b, -inf, inf)
    assert np.sum(np.abs(b - A @ t1)) == pytest.approx(fun, rel=1e-10)


def test_band_l1_when_most_points_lie_exactly_on_the_line():
    # 90 % of the points exactly on y = 1 + 2x (many residuals exactly zero, so the
    # density near zero is no guide to the band), 10 % gross outliers; reference: the
    # full dual LP above, and the line itself (common practice: the L1 fit of such data
    # passes through the exact majority)
    rng = np.random.default_rng(2)
    n = 20001
    x = np.round(rng.uniform(0, 10, n), 3)
    A = np.c_[np.ones(n), x]
    b = 1 + 2 * x
    out = rng.random(n) < 0.1
    b[out] += rng.uniform(-30, 30, out.sum())
    inf = np.full(2, np.inf)
    theta = l1._l1_linear(A, b, -inf, inf)
    _, fun = _full_dual_l1(A, b, -inf, inf)
    assert np.sum(np.abs(b - A @ theta)) == pytest.approx(fun, rel=1e-10)
    assert np.allclose(theta, [1.0, 2.0], rtol=1e-10)


@pytest.mark.parametrize("how", ["near", "far"])
def test_band_l1_from_a_guess_is_still_the_full_lp_optimum(how, lp_calls):
    # sequential LP hands its later steps a guess (no step) instead of a subsample fit;
    # a guess near the answer and one far from it (all zeros against an intercept of
    # about 1 and a slope of 2) must both end at the exact optimum of all the points
    A, b = _data("quadratic", seed=6)
    inf = np.full(3, np.inf)
    ref, fun = _full_dual_l1(A, b, -inf, inf)
    guess = ref * (1 + 1e-4) if how == "near" else np.zeros(3)
    theta = l1._l1_linear(A, b, -inf, inf, guess=guess)
    assert np.sum(np.abs(b - A @ theta)) == pytest.approx(fun, rel=1e-10)
    assert np.allclose(theta, ref, rtol=1e-8, atol=1e-10)
    if how == "near":  # no subsample LP: the first LP solved is the band's
        assert lp_calls[0][1] and len(lp_calls) == 1
