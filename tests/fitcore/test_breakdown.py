"""Many one-sided gross outliers: the redescending losses must stay with the majority.

One-sided outliers (all above the curve, a bubble or a saturated detector) are the
hard case for an M-estimate: they pull a Huber-type fit one way and inflate the MAD
scale, and once the scale has grown a redescending loss accepts them. The remedy is
common practice in robust regression (the idea of MM-estimation, Yohai 1987, from
memory): start the redescending fit from a high-breakdown fit and its scale. Ballast
starts it from an L1 fit (exact for linear models, near-L1 for nonlinear ones) with the
MAD of that fit's residuals, and rejects a Newton root whose scale jumps far above the
start's (the second root of the MAD equations, inside the outliers).

The data are invented (a line and an exponential decay with Gaussian noise, sd 0.05,
and a fraction of points moved up by 0.5-3, i.e. 10-60 sd). "Stays with the majority"
means the fitted curve is within 0.1 (2 sd) of the true one everywhere.
"""
from __future__ import annotations

import numpy as np
import pytest

import fitcore
import fitcore.solve as solve

TRUE = {"line": lambda x: 1.0 + 0.5 * x, "exp_decay": lambda x: 3.0 * np.exp(-x / 2.0) + 0.5}


def _one_sided(model, n, frac, seed):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 8, n)
    y0 = TRUE[model](x)
    y = y0 + rng.normal(0, 0.05, n)
    out = rng.random(n) < frac
    y[out] += rng.uniform(0.5, 3.0, out.sum())
    return x, y, y0


@pytest.mark.parametrize("loss,frac", [("tukey", 0.3), ("tukey", 0.4), ("welsch", 0.3),
                                       ("welsch", 0.4), ("cauchy", 0.3), ("geman_mcclure", 0.3)])
@pytest.mark.parametrize("model", ["line", "exp_decay"])
def test_redescending_fit_stays_with_the_majority(model, loss, frac):
    # (Cauchy and Geman-McClure, whose psi falls off slowly, still pull towards 40 %
    # of one-sided outliers enough to grow the MAD: they break in 1-6 of 10 sets there)
    # before the L1 start, a Huber start with the MAD re-estimated broke in 1 of 10 of
    # these data sets at 30 % and in 6-7 of 10 at 40 %
    broken = []
    for seed in range(10):
        x, y, y0 = _one_sided(model, 200, frac, seed)
        res = fitcore.fit(model, x, y, loss=loss)
        if not (res.converged and np.max(np.abs(res.fitted - y0)) < 0.1):
            broken.append(seed)
    assert broken == []


def test_large_data_path_stays_with_the_majority_too():
    # 40 % one-sided: on the 2000-point warm-start stage Newton's method from the L1
    # start jumped to the root inside the outliers (scale 0.9 instead of 0.1) before
    # the scale-jump check; the staged and the plain path must agree
    x, y, y0 = _one_sided("line", 60_000, 0.4, 0)
    res = fitcore.fit("line", x, y, loss="tukey")
    assert np.max(np.abs(res.fitted - y0)) < 0.02
    assert res.scale == pytest.approx(0.1, rel=0.1)


def test_newton_root_with_a_jumped_scale_is_refused(monkeypatch):
    # the 2000-point warm-start stage of the case above, run directly: without the
    # scale-jump check it ends at the root inside the outliers
    x, y, y0 = _one_sided("line", 60_000, 0.4, 0)
    full = solve._Problem(fitcore.get_model("line"), x, y, np.ones_like(x), np.ones(2, bool),
                          np.zeros(2), unit=True)
    sub = solve._subproblem(full, 2000)
    loss = fitcore.get_loss("tukey")
    pick = np.sort(np.random.default_rng(7).choice(x.size, 300, replace=False))
    start = fitcore.get_model("line").guess(x[pick], y[pick])  # as fit() picks them

    def stage():
        inner, s, _ = solve._m_estimate(sub, start, loss, None, linear=True, max_iter=200,
                                        quick=True)
        return np.max(np.abs(inner.theta[0] + inner.theta[1] * x - y0)), s

    err, s = stage()
    assert err < 0.02 and s == pytest.approx(0.1, rel=0.15)
    monkeypatch.setattr(fitcore.solvers.mscale, "_SCALE_JUMP", np.inf)
    err_unchecked, s_unchecked = stage()
    if err_unchecked < 0.02:
        pytest.skip("Newton's method no longer jumps to the other root from this start")
    assert s_unchecked > 4 * s


def test_near_l1_start_is_close_to_the_exact_l1_fit():
    # the near-L1 start (Huber, k = 0.05 at the start's scale, held) against the exact
    # L1 fit by linear programming, on a line with 30 % one-sided outliers, from the
    # model's own start values (as in a fit)
    x, y, _ = _one_sided("line", 400, 0.3, 3)
    l1 = fitcore.fit("line", x, y, loss="l1")
    prob = solve._Problem(fitcore.get_model("line"), x, y, np.ones_like(x), np.ones(2, bool),
                          np.zeros(2), unit=True)
    start = fitcore.get_model("line").guess(x, y)
    s = solve.mad(prob.resid(start))
    near = solve._near_l1(prob, start, s, linear=True, max_iter=200)
    ends = np.array([[1.0, 1.0], [0.0, 8.0]])  # the line's values at x = 0 and x = 8
    # within a fifth of the noise level (0.05) over the data's range
    assert np.max(np.abs((near.theta - l1.values) @ ends)) < 0.01
