"""The model's second derivatives (``Model.hess_w``) and the Newton steps that use them.

Outside references: mpmath (50-digit arithmetic, derivatives by ``mpmath.diff``) for
the 4PL's second derivatives; the estimates of the Gauss-Newton iteration (the
solver without the curvature term, an iteration that converges to the same root more
slowly) for the fits.
"""
from __future__ import annotations

import numpy as np
import pytest

import fitcore
from fitcore.models import get_model
from fitcore.solvers import lm, mscale


def _mp_hessian_sum(x, p, w):
    """sum_i w_i d2f(x_i)/dp dp^T of the 4PL at 50 digits (mpmath.diff)."""
    import mpmath as mp

    mp.mp.dps = 50
    H = np.zeros((4, 4))
    for xi, wi in zip(x, w):
        xi = mp.mpf(float(xi))

        def f(b, t, h, e, xi=xi):
            if xi == 0:
                return t if h > 0 else b  # (the x = 0 limit per sign of hill)
            return b + (t - b) / (1 + (xi / e) ** h)

        pm = [mp.mpf(float(v)) for v in p]
        for i in range(4):
            for j in range(i, 4):
                order = [0, 0, 0, 0]
                order[i] += 1
                order[j] += 1
                v = float(mp.diff(f, pm, tuple(order)))
                H[i, j] += float(wi) * v
                if i != j:
                    H[j, i] += float(wi) * v
    return H


@pytest.mark.parametrize("p", [(2.0, 100.0, 1.1, 1.3), (5.0, -30.0, -2.5, 0.2),
                               (0.0, 1.0, 0.4, 40.0)])
def test_logistic4_second_derivatives_match_mpmath(p):
    m = get_model("logistic4")
    x = np.concatenate([[0.0], np.geomspace(0.01, 100, 7)])
    w = np.random.default_rng(3).normal(size=x.size)
    H = m.hess_w(x, np.array(p), w)
    ref = _mp_hessian_sum(x, p, w)
    np.testing.assert_allclose(H, ref, rtol=1e-9, atol=1e-9 * np.max(np.abs(ref)))
    assert np.array_equal(H, H.T)


def _logistic(n, seed):
    rng = np.random.default_rng(seed)
    x = np.geomspace(0.01, 100, n)
    y = 2.0 + 98.0 / (1 + (x / 1.3) ** 1.1) + rng.normal(0, 2.0, n)
    y[n // 3] -= 35.0
    y[(2 * n) // 3] += 25.0
    return x, y


@pytest.mark.parametrize("loss", ["huber", "tukey", "cauchy"])
@pytest.mark.parametrize("n", [15, 40])
def test_newton_with_curvature_reaches_the_gauss_newton_root_in_fewer_passes(
        loss, n, monkeypatch):
    x, y = _logistic(n, seed=n + 1)
    passes = []
    newton = mscale._newton_with_mad

    def counted(*a, **k):
        got = newton(*a, **k)
        passes.append(None if got is None else got[2])
        return got

    monkeypatch.setattr(mscale, "_newton_with_mad", counted)
    res = fitcore.fit("logistic4", x, y, loss=loss)
    assert res.converged, res.message
    with_curvature = [p for p in passes if p is not None]
    passes.clear()
    monkeypatch.setattr(mscale, "_CURVATURE", False)
    monkeypatch.setattr(lm, "_CURVATURE", False)
    gn = fitcore.fit("logistic4", x, y, loss=loss)
    assert gn.converged, gn.message
    without = [p for p in passes if p is not None]
    # the same root: estimates to 1e-7 of their standard errors, the same MAD scale
    assert np.all(np.abs(res.values - gn.values) <= 1e-7 * res.stderr)
    assert res.scale == pytest.approx(gn.scale, rel=1e-9)
    if loss == "huber":  # (the joint Newton iteration runs for a monotone psi)
        assert with_curvature and without and sum(with_curvature) < sum(without)


@pytest.mark.parametrize("smooth", [False, True])
def test_mad_and_gradient_refuses_non_finite_residuals(smooth):
    # a Newton iterate where the model is not finite (a 4PL step to EC50 <= 0 gives
    # NaN everywhere): NaN scale (the caller then refuses the iterate), not an
    # IndexError out of fit() (seen on a 12-point 4PL with a third of the points
    # gross outliers). Common practice: a non-finite residual has no order statistic.
    r = np.linspace(-1.0, 1.0, 25)
    r[:20] = np.nan
    J = np.ones((25, 4))
    s, g = mscale._mad_and_gradient(r, J, smooth)
    assert np.isnan(s) and g.shape == (4,)
