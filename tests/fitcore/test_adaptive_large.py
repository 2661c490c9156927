"""The adaptive loss's shape-and-scale step on many residuals: located on a subsample,
refined on all of them, it must still be the maximum-likelihood (alpha, c) of all.

Outside reference, named beside each check: scipy.optimize.minimize (L-BFGS-B, alpha
bounded to [0, 2]) on the joint negative log-likelihood in (alpha, log c), started away
from the answer; and the step's own full search over [0, 2] on all the residuals (the
small-data path, forced by raising the threshold).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from fitcore.solvers import adaptive


def _residuals(kind, n=200001, seed=4):
    rng = np.random.default_rng(seed)
    if kind == "t3":  # heavy tails: alpha well inside (0, 2)
        return 0.3 * rng.standard_t(3, n)
    if kind == "contaminated":  # 5 % gross outliers on one side: alpha near 0
        r = rng.normal(0, 0.05, n)
        out = rng.random(n) < 0.05
        r[out] += rng.uniform(0.5, 3, out.sum())
        return r
    return rng.normal(0, 2.0, n)  # Gaussian: the likelihood is largest at alpha = 2


@pytest.fixture
def polished(monkeypatch):
    """Records whether the subsample-then-refine step answered (not None)."""
    seen = []
    orig = adaptive._ml_polished

    def recording(*a):
        got = orig(*a)
        seen.append(got is not None)
        return got

    monkeypatch.setattr(adaptive, "_ml_polished", recording)
    return seen


@pytest.mark.parametrize("kind", ["t3", "contaminated"])
def test_refined_shape_and_scale_are_the_maximum_likelihood_of_all_residuals(
        kind, polished, monkeypatch):
    r = _residuals(kind)
    s0 = float(np.median(np.abs(r))) / 0.6745
    alpha, c, nll, _ = adaptive._ml_shape_scale(r, 1.0, s0, 1e-6 * s0)
    assert polished == [True]
    # reference 1: L-BFGS-B on the joint NLL, from alpha = 1 and twice the start scale
    ref = optimize.minimize(lambda v: adaptive._nll(r, v[0], v[1]), [1.0, math.log(2 * s0)],
                            method="L-BFGS-B", bounds=[(0.0, 2.0), (None, None)],
                            options={"ftol": 1e-15, "gtol": 1e-9, "maxiter": 500})
    assert nll <= ref.fun + 1e-9 * abs(ref.fun)
    assert alpha == pytest.approx(ref.x[0], abs=1e-4)
    assert math.log(c) == pytest.approx(ref.x[1], abs=1e-5)
    # reference 2: the full search over [0, 2] on all the residuals
    monkeypatch.setattr(adaptive, "_ML_LARGE", 10**9)
    a_full, c_full, nll_full, _ = adaptive._ml_shape_scale(r, 1.0, s0, 1e-6 * s0)
    assert alpha == pytest.approx(a_full, abs=1e-6)
    assert c == pytest.approx(c_full, rel=1e-7)
    assert nll == pytest.approx(nll_full, rel=1e-12)


def test_a_shape_at_the_end_of_its_range_falls_back_to_the_full_search(polished, monkeypatch):
    # Gaussian residuals: the profile likelihood is largest at alpha = 2, which no
    # interior bracket holds; the answer is the full search's, bit for bit
    r = _residuals("gauss", n=120001)
    got = adaptive._ml_shape_scale(r, 1.0, 2.0, 2e-6)
    assert polished == [False]
    assert got[0] == pytest.approx(2.0, abs=1e-6)
    monkeypatch.setattr(adaptive, "_ML_LARGE", 10**9)
    full = adaptive._ml_shape_scale(r, 1.0, 2.0, 2e-6)
    assert got[:3] == full[:3]


@pytest.mark.parametrize("f, x_min", [
    (lambda x: (x - 0.3) ** 2 + 0.5 * (x - 0.3) ** 4 + 0.1 * math.exp(-x), None),  # smooth
    (lambda x: abs(x - 0.3) + 0.01 * x, 0.3),  # a kink: parabolas fit badly, golden steps
])
def test_parabolic_bracket_search_finds_the_minimum(f, x_min):
    # reference: scipy.optimize.minimize_scalar (bounded Brent) on the same bracket
    ref = optimize.minimize_scalar(f, bounds=(0.0, 1.0), method="bounded",
                                   options={"xatol": 1e-10}).x
    got = adaptive._parabolic_min(f, 0.0, 0.45, 1.0)
    assert got == pytest.approx(ref, abs=1e-6)
    if x_min is not None:
        assert got == pytest.approx(x_min, abs=1e-6)
