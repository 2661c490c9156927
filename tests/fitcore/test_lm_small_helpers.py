"""The small-problem shortcuts of the Levenberg-Marquardt loop give numpy's and
LAPACK's own numbers: each helper against the public numpy call it stands in for,
bit for bit, including the inputs where that call raises or returns non-finite values.

Outside references: numpy (np.triu, np.linalg.norm, np.linalg.eigvalsh,
np.linalg.solve, np.all(np.isfinite(.)), np.maximum), and the BLAS/LAPACK rule that a
triangular solve (dtrtrs) does not reference the other triangle (LAPACK Users' Guide,
dtrtrs argument A: "the strictly lower triangular part of A is not referenced").
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest

import fitcore
from fitcore.solvers import lm
from fitcore.solvers.problem import _all_finite, _objective, _objective_u
from fitcore.losses import get_loss


def _same(a, b) -> bool:
    a, b = np.asarray(a), np.asarray(b)
    return a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.mark.parametrize("k", [1, 2, 4, 6])
def test_triu_and_norm_are_numpys(k):
    rng = np.random.default_rng(k)
    M = np.asfortranarray(rng.normal(size=(3 * k, k + 1)))[:k, :k]  # a strided slice
    assert _same(lm._triu(M), np.triu(M))
    v = rng.normal(size=k) * 10.0 ** rng.integers(-150, 150, size=k)
    assert lm._norm(v) == np.linalg.norm(v)


def test_triangular_solve_ignores_the_lower_triangle():
    rng = np.random.default_rng(3)
    for _ in range(50):
        R = np.triu(rng.normal(size=(4, 4))) + 3 * np.eye(4)
        b = rng.normal(size=4)
        junk = R + np.tril(rng.normal(size=(4, 4)) * 1e3, -1)
        assert _same(lm._trsolve(junk, b), lm._trsolve(R, b))
    # an exactly singular R: the least-squares fallback sees the upper triangle only
    R = np.triu(rng.normal(size=(4, 4)))
    R[2, 2] = 0.0
    junk = R + np.tril(np.ones((4, 4)), -1)
    assert _same(lm._trsolve(junk, b), np.linalg.lstsq(R, b, rcond=None)[0])


def test_eigvalsh_and_solve_are_numpys_including_failures():
    rng = np.random.default_rng(7)
    with np.errstate(all="ignore"):
        for _ in range(50):
            A = rng.normal(size=(4, 4))
            G = A.T @ A
            b = rng.normal(size=4)
            assert _same(lm._eigvalsh(G), np.linalg.eigvalsh(G))
            assert _same(lm._solve(G, b), np.linalg.solve(G, b))
        # singular: numpy raises, and so does the shortcut
        S = np.ones((3, 3))
        with pytest.raises(np.linalg.LinAlgError):
            np.linalg.solve(S, np.ones(3))
        with pytest.raises(np.linalg.LinAlgError):
            lm._solve(S, np.ones(3))
        # non-finite input: the shortcut answers as numpy does (an error -> None)
        N = np.full((3, 3), np.nan)
        try:
            ref = np.linalg.eigvalsh(N)
        except np.linalg.LinAlgError:
            ref = None
        got = lm._eigvalsh(N)
        assert (got is None) if ref is None else _same(got, ref)


def test_all_finite_is_numpys_test():
    cases = [np.arange(5.0), np.array([1.0, np.nan]), np.array([np.inf, -np.inf]),
             np.array([1e308, 1e308, -1.0]),  # finite, but the sum overflows
             np.array([1e308, np.inf]), np.zeros((3, 4)), np.array([[1.0, np.nan]])]
    with np.errstate(all="ignore"):
        for a in cases:
            assert _all_finite(a) == bool(np.all(np.isfinite(a))), a


@pytest.mark.parametrize("name", ["l2", "huber", "tukey", "cauchy", "welsch"])
def test_objective_is_the_sum_of_rho(name):
    loss = get_loss(name)
    r = np.random.default_rng(1).normal(size=37) * 3.0
    v, u = _objective_u(loss, r, 1.7)
    assert v == float(np.sum(loss.rho(r / 1.7))) == _objective(loss, r, 1.7)
    assert _same(u, r / 1.7)


def test_column_scaling_follows_numpys_maximum_rule():
    # np.maximum(d2, dmax * 0.25) and np.sqrt(np.where(dmax > 0, dmax, 1.0)), the
    # loop's numpy form before, NaN and infinities included
    d2 = [0.0, 1.0, np.nan, np.inf, 2.0, 5.0, 3.0]
    dm = [0.0, 8.0, 1.0, 1.0, np.nan, np.inf, 12.0]
    ref = np.maximum(np.array(d2), np.array(dm) * lm._SCALE_MEMORY)
    got, D = lm._column_scale(d2, dm)
    assert _same(np.array(got), ref)
    with np.errstate(invalid="ignore"):
        assert _same(D, np.sqrt(np.where(ref > 0, ref, 1.0)))


def test_no_floating_point_warnings_escape_a_fit():
    # the loop ignores floating-point errors in one block; a fit through an overflowing
    # region still warns nothing (common practice: library code does not warn on
    # intermediate overflow it handles)
    x = np.geomspace(0.01, 100, 25)
    y = 2.0 + 98.0 / (1 + (x / 1.3) ** 1.1)
    y[5] += 1e6
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = fitcore.fit("logistic4", x, y, loss="tukey")
    assert np.all(np.isfinite(res.values))
