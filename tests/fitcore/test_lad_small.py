"""The small-n exact L1 fit (fitcore.solvers.l1._lad_small, vertex descent) that
starts robust fits of linear models.

Outside reference, named beside each check: scipy.optimize.linprog (HiGHS) on the
primal LP ``min 1^T (e+ + e-)``, ``A t + e+ - e- = b``, posed here in well-scaled
units, independently of fitcore; its optimum objective is the exact L1 minimum
(a vertex of the optimal face may differ where the minimiser is not unique, so the
objectives are compared, not the parameters).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, sparse

import fitcore
from fitcore.solvers.l1 import _lad_small

_LD = np.longdouble


def _objective(A, b, t):
    """sum |b - A t| in extended precision (no rounding of the sum decides a check)."""
    return float(np.abs(b.astype(_LD) - A.astype(_LD) @ np.asarray(t).astype(_LD)).sum())


def _linprog_l1(A, b):
    """Reference: scipy.optimize.linprog's primal L1 LP (columns and b scaled to order
    one here); the objective of its answer, evaluated like ours."""
    n, k = A.shape
    d = np.sqrt((A * A).mean(axis=0))
    sb = np.median(np.abs(b - np.median(b))) or 1.0
    c = np.concatenate([np.zeros(k), np.ones(2 * n)])
    eye = sparse.identity(n, format="csr")
    Aeq = sparse.hstack([sparse.csr_matrix(A / d), eye, -eye], format="csr")
    res = optimize.linprog(c, A_eq=Aeq, b_eq=b / sb,
                           bounds=[(None, None)] * k + [(0, None)] * (2 * n), method="highs")
    assert res.status == 0
    return _objective(A, b, res.x[:k] * sb / d)


def _cases():
    """Lines and polynomials with heavy-tailed noise, ties and repeats (seeded)."""
    rng = np.random.default_rng(20261205)
    out = []
    for trial in range(160):
        n = int(rng.integers(2, 80))
        k = int(rng.integers(1, 5))
        kind = trial % 6
        x = rng.uniform(-3, 10, n)
        if kind == 1:
            x = np.round(x)  # duplicated x
        elif kind == 2:
            x = np.linspace(0, 10, n)  # a regular grid (edges of optimal faces)
        A = np.vander(x, k, increasing=True)
        if n < k:
            continue
        y = A @ rng.normal(size=k) + rng.standard_t(2, n)
        if kind == 3:
            y = np.round(y, 1)  # rounded y: ties of residuals
        elif kind == 4:
            A, y = np.repeat(A, 2, axis=0), np.repeat(y, 2)  # every point twice
        elif kind == 5:
            y = y * 1e-9  # tiny units
        out.append((A, y))
    return out


def test_small_lad_reaches_the_linprog_optimum_on_a_battery():
    # scipy.optimize.linprog (HiGHS) primal LP: the same optimum objective, to 1e-9
    # relative (plus rounding of the data); the vertex search answers most cases
    answered = 0
    cases = _cases()
    for A, y in cases:
        t = _lad_small(A, y)
        if t is None:
            continue  # (the caller then solves the LP)
        answered += 1
        ours, ref = _objective(A, y, t), _linprog_l1(A, y)
        rounding = 1e-14 * float(np.abs(y).sum() + (np.abs(A) @ np.abs(t)).sum())
        assert ours <= ref * (1 + 1e-9) + rounding
    assert answered >= 0.9 * len(cases)


@pytest.mark.parametrize("offset", [1e6, 1e8, 1.7e9])
def test_small_lad_with_x_far_from_zero(offset):
    # x far from 0 against its spread (timestamps): the basis matrices are badly
    # conditioned and the intercept is large (an explicit inverse alone left the fit
    # units off the basis points). Reference: scipy.optimize.linprog on the centred
    # design [1, x - c] (the same column space, exactly: x - c is exact in floating
    # point here), its objective evaluated like ours
    rng = np.random.default_rng(1)
    answered = 0
    for _ in range(30):
        n = int(rng.integers(4, 60))
        x = offset + rng.uniform(0, 100, n)
        y = 3.0 - x + rng.standard_t(2, n)
        A = np.c_[np.ones(n), x]
        t = _lad_small(A, y)
        if t is None:
            continue  # (too badly conditioned to certify: the caller solves the LP)
        answered += 1
        ref = _linprog_l1(np.c_[np.ones(n), x - offset], y)
        rounding = 1e-14 * float(np.abs(y).sum() + (np.abs(A) @ np.abs(t)).sum())
        assert _objective(A, y, t) <= ref * (1 + 1e-9) + rounding
    assert answered >= 20


def test_small_lad_on_n_equal_p_interpolates():
    # n = p: the L1 minimum is 0 (the fit through every point; scipy linprog agrees)
    x = np.array([0.0, 1.0, 3.0])
    A = np.vander(x, 3, increasing=True)
    y = np.array([1.0, -2.0, 5.0])
    t = _lad_small(A, y)
    assert t is not None
    assert np.allclose(A @ t, y, rtol=0, atol=1e-13)
    assert _linprog_l1(A, y) == pytest.approx(0.0, abs=1e-12)


def test_small_lad_refuses_rank_deficient_and_degenerate_data():
    # all x equal: the line is not identifiable (no vertex exists); exactly collinear
    # data: more than k points on the fit (a degenerate vertex). Both go to the LP.
    A = np.c_[np.ones(6), np.full(6, 2.0)]
    assert _lad_small(A, np.arange(6.0)) is None
    x = np.arange(8.0)
    assert _lad_small(np.c_[np.ones(8), x], 1.0 + 2.0 * x) is None


def test_small_lad_does_not_depend_on_the_order_of_the_points():
    # a regular grid with an even count: the L1 line need not be unique; the vertex
    # returned is the same for any order of the points (canonical order; common practice)
    rng = np.random.default_rng(3)
    x = np.arange(20.0)
    y = 2.0 + 0.5 * x + rng.normal(0, 1, 20)
    A = np.c_[np.ones(20), x]
    t = _lad_small(A, y)
    for seed in range(5):
        p = np.random.default_rng(seed).permutation(20)
        assert np.array_equal(_lad_small(A[p], y[p]), t)


def test_all_equal_x_is_still_refused_with_a_robust_loss():
    # a line through points that all share one x is not identifiable: reported as
    # before (rank-deficient, not converged), whatever the start's L1 solver
    res = fitcore.fit("line", [1.0] * 6, [1, 2, 3, 4, 5, 9], loss="huber")
    assert not res.converged
    assert "rank-deficient" in res.message
