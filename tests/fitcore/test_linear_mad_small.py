"""Small linear models under a monotone loss with the automatic MAD scale
(fitcore.solvers.linear._linear_mad_small, the direct route that replaces the general
Levenberg-Marquardt route there).

Outside references, named beside each check:
* statsmodels RLM(HuberT) with its default scale (the normalised MAD of the residuals
  about 0, re-estimated each iteration), run to tol 1e-14: same estimates, scale and
  Huber H1 standard errors;
* the estimator's defining equations (Huber 1981, 7.7; the MAD as in Hampel 1974):
  sum psi(r_i / s) A_i = 0 with s = 1.4826 median |r_i|, checked directly for the
  pseudo-Huber loss, which statsmodels does not have.
"""
from __future__ import annotations

import numpy as np
import pytest

import fitcore
import fitcore.solvers.dispatch as dispatch
from fitcore.losses import get_loss

sm = pytest.importorskip("statsmodels.api")


def _data(n, seed, quadratic=False):
    """Invented calibration data (seeded): t-distributed scatter and a few gross
    outliers on one side."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 10.0, n) if seed % 2 else np.sort(rng.uniform(0, 10, n))
    y = 1.0 + 0.8 * x + (0.05 * x * x if quadratic else 0.0) + 0.2 * rng.standard_t(4, n)
    bad = rng.choice(n, max(1, n // 10), replace=False)
    y[bad] += rng.uniform(2.0, 6.0, bad.size)
    return x, y


@pytest.mark.parametrize("n,seed,model", [(25, 5, "line"), (12, 2, "line"), (60, 7, "line"),
                                          (150, 9, "line"), (30, 4, "poly2"),
                                          (40, 11, "line_origin")])
def test_huber_auto_scale_matches_statsmodels_rlm(n, seed, model, monkeypatch):
    x, y = _data(n, seed, quadratic=model == "poly2")
    X = {"line": np.c_[np.ones(n), x], "poly2": np.c_[np.ones(n), x, x * x],
         "line_origin": x[:, None]}[model]
    # the direct route answers these (no fallback to the general one)
    called = []
    route = dispatch._linear_mad_small
    monkeypatch.setattr(dispatch, "_linear_mad_small",
                        lambda *a, **k: called.append(route(*a, **k)) or called[-1])
    res = fitcore.fit(model, x, y, loss="huber")
    assert called and called[-1] is not None
    # statsmodels RLM, HuberT (k = 1.345), default MAD scale, to tol 1e-14
    rlm = sm.RLM(y, X, M=sm.robust.norms.HuberT()).fit(tol=1e-14, maxiter=5000)
    assert res.converged
    assert np.allclose(res.values, rlm.params, rtol=1e-7, atol=1e-9)
    assert res.scale == pytest.approx(float(rlm.scale), rel=1e-7)
    assert np.allclose(res.weights, rlm.weights, atol=1e-7)
    assert "H1" in res.covariance_recipe
    assert np.allclose(res.stderr, rlm.bse, rtol=1e-6)


@pytest.mark.parametrize("sigma", [False, True])
def test_pseudo_huber_solves_the_m_and_mad_equations(sigma):
    # the defining equations (Huber 1981; normalised MAD about 0): psi(r/s) orthogonal
    # to the (whitened) design, s = 1.4826 median |r|, to rounding
    x, y = _data(40, 3)
    sig = np.linspace(0.5, 1.5, x.size) if sigma else None
    res = fitcore.fit("line", x, y, loss="pseudo_huber", sigma=sig, sigma_mode="relative")
    assert res.converged
    w = 1.0 if sig is None else sig
    r = res.residuals / w
    A = np.c_[np.ones_like(x), x] / (np.ones_like(x) if sig is None else sig)[:, None]
    assert res.scale == pytest.approx(1.482602218505602 * np.median(np.abs(r)), rel=1e-12)
    psi = get_loss("pseudo_huber").psi(r / res.scale)
    assert np.all(np.abs(psi @ A) <= 1e-10 * (np.abs(psi) @ np.abs(A)))


def test_exact_data_still_reports_the_exact_fit():
    # more than half of the points exactly on a line: the MAD scale is 0, which the
    # general route reports (no uncertainties); the direct route leaves it to it
    x = np.arange(12.0)
    y = 2.0 + 0.5 * x
    y[[2, 7]] += [3.0, -4.0]
    res = fitcore.fit("line", x, y, loss="huber")
    assert np.allclose(res.values, [2.0, 0.5], rtol=0, atol=1e-12)  # the exact majority
    assert "exactly on the curve" in res.message


def test_two_mad_roots_the_one_statsmodels_finds(monkeypatch):
    # 12 invented points, the last two far off with high leverage: the joint (line,
    # MAD) equations have two roots here (scale about 0.95 and 2.41). statsmodels RLM
    # (HuberT, MAD scale, tol 1e-14) reaches the 2.41 one from its least-squares
    # start; so does the general route from the L1 start after its loose reweighted
    # solve, and so must the direct route (a single reweighted pass instead of that
    # loose solve led it to the other root)
    x = np.linspace(0.0, 10.0, 12)
    y = np.array([1.65, 1.19, 1.96, 2.81, 3.43, 3.64, 5.44, 5.92, 6.25, 6.69, 17.22, 18.08])
    sig = np.array([1.91, 1.13, 1.57, 1.85, 1.21, 1.59, 1.45, 0.58, 1.94, 1.72, 1.56, 0.88])
    called = []
    route = dispatch._linear_mad_small
    monkeypatch.setattr(dispatch, "_linear_mad_small",
                        lambda *a, **k: called.append(route(*a, **k)) or called[-1])
    res = fitcore.fit("line", x, y, loss="huber", sigma=sig, sigma_mode="relative")
    assert called and called[-1] is not None
    X = np.c_[np.ones_like(x), x] / sig[:, None]
    rlm = sm.RLM(y / sig, X, M=sm.robust.norms.HuberT()).fit(tol=1e-14, maxiter=5000)
    assert res.converged
    assert np.allclose(res.values, rlm.params, rtol=1e-7)
    assert res.scale == pytest.approx(float(rlm.scale), rel=1e-7)
