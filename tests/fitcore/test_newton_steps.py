"""Newton steps near the minimum and Newton on the joint (parameters, MAD) equations
for small problems: the same estimates as an independent minimiser, and a scale that
is the MAD fixed point.

Outside references: scipy.optimize.minimize (trust-region Newton on the robust
objective, an independent minimiser); the normalised MAD about zero, 1.4826 median|r|
(Hampel 1974; statsmodels' ``mad(center=0)``).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

import fitcore
from fitcore.losses import get_loss
from fitcore.solvers import mscale


def _logistic(n, seed):
    rng = np.random.default_rng(seed)
    x = np.geomspace(0.01, 100, n)
    y = 2.0 + 98.0 / (1 + (x / 1.3) ** 1.1) + rng.normal(0, 2.0, n)
    y[n // 3] -= 35.0
    y[(2 * n) // 3] += 25.0
    return x, y


def test_fixed_scale_tukey_reaches_the_minimum_of_an_independent_minimiser():
    # 150 points, Tukey at a fixed scale: the reweighted steps alone crept towards the
    # minimum (IRLS converges linearly) and stopped with a first-order cosine of
    # 1.9e-8, reported as "not a minimum"; Newton steps near the minimum reach it
    x, y = _logistic(150, seed=5)
    res = fitcore.fit("logistic4", x, y, loss="tukey", scale=0.5)
    assert res.converged, res.message
    model, loss = res.model, get_loss("tukey")

    def objective(p):
        return float(np.sum(loss.rho((y - model.f(x, p)) / 0.5)))

    def gradient(p):
        u = (y - model.f(x, p)) / 0.5
        return -(loss.psi(u) @ model.jac(x, p)) / 0.5

    ref = optimize.minimize(objective, res.values, jac=gradient, method="BFGS",
                            options={"gtol": 1e-10, "maxiter": 2000})
    # scipy starts at Ballast's answer: it must find no lower point nearby
    assert objective(ref.x) >= objective(res.values) - 1e-9 * objective(res.values)
    assert np.allclose(ref.x, res.values, rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("loss", ["huber", "pseudo_huber", "tukey", "welsch", "cauchy"])
@pytest.mark.parametrize("n", [12, 25, 60])
def test_small_fit_scale_is_the_mad_fixed_point_and_matches_the_alternation(loss, n,
                                                                             monkeypatch):
    x, y = _logistic(n, seed=n)
    res = fitcore.fit("logistic4", x, y, loss=loss)
    assert res.converged, res.message
    r = res.residuals
    assert res.scale == pytest.approx(1.482602218505602 * np.median(np.abs(r)), rel=1e-12)
    # the same fixed point by the plain alternation (scale update, refit), with the
    # joint Newton steps switched off
    monkeypatch.setattr(mscale, "_newton_with_mad", lambda *a, **k: None)
    alt = fitcore.fit("logistic4", x, y, loss=loss)
    assert alt.converged, alt.message
    assert alt.scale == pytest.approx(res.scale, rel=1e-9)
    assert np.allclose(alt.values, res.values, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("alpha", [0.0, 0.3, 1.0, 1.7, 2.0])
def test_adaptive_scale_step_is_the_likelihood_minimum(alpha):
    # the adaptive loss's best scale c for given residuals and shape: Newton on the
    # likelihood equation in log c, against scipy's bounded scalar search on the
    # negative log-likelihood itself, and at alpha = 2 the closed form c^2 = mean r^2
    import math

    from fitcore.solvers.adaptive import _best_log_c, _nll

    rng = np.random.default_rng(7)
    r = rng.normal(0, 0.3, 40)
    r[[3, 17]] += [5.0, -8.0]
    lo, hi = math.log(1e-6), math.log(100.0)
    lc = _best_log_c(r, alpha, lo, hi, start=0.0)
    ref = optimize.minimize_scalar(lambda v: _nll(r, alpha, v), bounds=(lo, hi),
                                   method="bounded", options={"xatol": 1e-12})
    assert lc == pytest.approx(float(ref.x), abs=1e-6)
    assert _nll(r, alpha, lc) <= float(ref.fun) + 1e-10
    if alpha == 2.0:
        assert math.exp(lc) == pytest.approx(math.sqrt(np.mean(r * r)), rel=1e-12)
    # a floor above the minimum holds the scale there
    assert _best_log_c(r, alpha, lc + 0.5, hi, start=0.0) == lc + 0.5


def test_small_qr_steps_equal_numpy_least_squares():
    # the LM step min ||r - J s||^2 + lam ||D s||^2 from LAPACK's QR of [J | r] (and of
    # [R; sqrt(lam) I] when damped), against numpy's SVD least squares on the stacked
    # system; a rank-deficient J falls back to the SVD solve (minimum-norm step)
    from fitcore.solvers.lm import _StepSolver

    rng = np.random.default_rng(3)
    for trial in range(40):
        n, k = int(rng.integers(3, 40)), int(rng.integers(1, 5))
        if n <= k:
            continue
        J = rng.normal(size=(n, k)) * 10.0 ** rng.uniform(-3, 3, k)
        deficient = trial % 5 == 0 and k > 1
        if deficient:
            J[:, -1] = J[:, 0]
        r = rng.normal(size=n)
        D = np.sqrt(np.einsum("ij,ij->j", J, J))
        solver = _StepSolver(J, r, D)
        for lam in (0.0, 1e-6, 1e-2, 10.0):
            got = solver.solve(lam)
            M = np.vstack([J / D, np.sqrt(lam) * np.eye(k)])
            want = np.linalg.lstsq(M, np.concatenate([r, np.zeros(k)]), rcond=None)[0] / D
            if deficient:
                assert not solver.direct
            assert np.allclose(got * D, want * D, rtol=1e-8, atol=1e-8), (trial, lam)
