"""The adaptive loss's joint Newton iteration on (parameters, log c, alpha) at small n
(fitcore.solvers.adaptive._joint_newton) and the derivatives it is built from.

References: the partition function's slope against central differences of the
independent quadrature ``log_partition_quad`` (scipy.integrate.quad); the loss's alpha
derivatives against central differences of ``barron_rho`` / ``barron_weight``
(Barron 2019's closed form, common practice for derivative checks); the returned
fit against the likelihood equations of Barron's density (check-values.md 1.4),
its alpha equation by a Richardson-extrapolated difference of the NLL with the
quadrature's log Z.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import fitcore
from fitcore.losses import barron_rho, barron_weight
from fitcore.partition import log_partition_quad, log_partition_slope
from fitcore.solvers import adaptive


@pytest.mark.parametrize("alpha", [0.1, 0.3, 0.9, 1.5, 1.8])
def test_log_partition_slope_matches_quadrature_difference(alpha):
    # (Richardson over h = 0.002, 0.001: the quadrature's own ~1e-11 would swamp a
    # narrower difference)
    def diff(h):
        return (log_partition_quad(alpha + h) - log_partition_quad(alpha - h)) / (2 * h)

    want = (4 * diff(0.001) - diff(0.002)) / 3
    assert log_partition_slope(alpha) == pytest.approx(want, abs=1e-7)


def test_log_partition_slope_outside_table_is_nan():
    assert math.isnan(log_partition_slope(2.0)) and math.isnan(log_partition_slope(-0.1))


@pytest.mark.parametrize("alpha", [0.0, 1e-3, 0.4, 1.0, 1.7, 1.98])
def test_alpha_derivatives_of_the_loss(alpha):
    r = np.random.default_rng(7).normal(0.0, 3.0, 40)  # invented residuals
    c = 1.7
    u = r / c
    rho, psi, dpsi, psi_a, rho_a = adaptive._barron_terms(r, c, alpha)
    assert rho == pytest.approx(float(barron_rho(u, alpha).sum()), rel=1e-13)
    assert np.allclose(psi, u * barron_weight(u, alpha), rtol=1e-13, atol=1e-15)
    h = 1e-5
    lo = max(alpha - h, 0.0)
    fd_rho = (barron_rho(u, alpha + h).sum() - barron_rho(u, lo).sum()) / (alpha + h - lo)
    fd_psi = (u * barron_weight(u, alpha + h) - u * barron_weight(u, lo)) / (alpha + h - lo)
    # (one-sided at 0: error O(h))
    tol = 1e-5 if alpha == 0.0 else 1e-7
    assert rho_a == pytest.approx(float(fd_rho), rel=tol)
    assert np.allclose(psi_a, fd_psi, rtol=tol, atol=tol)


def _curve(n, seed):
    # an invented 4PL without outliers (alpha comes out interior)
    rng = np.random.default_rng(seed)
    x = np.geomspace(0.03, 300, n)
    m = fitcore.get_model("logistic4")
    y = m.f(x, np.array([5.0, 110.0, -1.4, 4.0])) + rng.normal(0.0, 2.0, n)
    return m, x, y


def _nll_quad(r, a, lc):
    return (float(np.sum(barron_rho(r / math.exp(lc), a))) + r.size * lc
            + r.size * log_partition_quad(a))


@pytest.mark.parametrize("n,seed", [(40, 2), (80, 3)])
def test_fit_solves_the_likelihood_equations(n, seed):
    m, x, y = _curve(n, seed)
    res = fitcore.fit(m, x, y, loss="adaptive")
    assert res.converged
    a, c = res.alpha, res.scale
    assert 0.05 < a < 1.95
    r = y - m.f(x, np.asarray(res.values))
    u = r / c
    # scale: n = sum u psi(u) (the alternation before the joint iteration: 1.4e-8 and
    # 5.9e-9 on these two)
    assert abs(n - float(np.sum(u * u * barron_weight(u, a)))) / n <= 1e-10
    # shape: the NLL's slope in alpha (Richardson over h = 2e-3, 1e-3) in units of
    # its curvature's standard error (the alternation left 7.6e-7 and 1.3e-7 here)
    lc = math.log(c)

    def slope(h):
        return (_nll_quad(r, a + h, lc) - _nll_quad(r, a - h, lc)) / (2 * h)

    g = (4 * slope(1e-3) - slope(2e-3)) / 3
    h = 1e-3
    curv = (_nll_quad(r, a + h, lc) - 2 * _nll_quad(r, a, lc) + _nll_quad(r, a - h, lc)) / h**2
    assert curv > 0
    assert abs(g) / math.sqrt(curv) <= 1e-8
