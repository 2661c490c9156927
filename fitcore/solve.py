r"""The fitting engine's front door, :func:`fit`; the solvers are in :mod:`fitcore.solvers`.

Problem
-------
With weights from the analyst's standard uncertainties ``sigma_i`` (1 when none are
given), the whitened residuals are ``r_i(theta) = (y_i - f(x_i, theta)) / sigma_i`` and
an M-estimate minimises ``sum_i rho(r_i / s)`` over the points that are used (not
excluded), for a loss ``rho`` and a residual scale ``s``.

Solvers
-------
* Least squares and the M-losses use one iteratively reweighted Gauss-Newton /
  Levenberg-Marquardt loop (``fitcore.solvers.lm._irls_lm``): at each iteration the robust weights
  ``w_i = psi(u_i)/u_i`` give a weighted least-squares model of the objective (a
  majoriser of it for every loss here, since ``psi(u)/u`` is non-increasing in
  ``|u|``); its step is solved by a QR factorisation of ``sqrt(w) J`` (never the
  normal equations) with Marquardt damping, and only steps that lower the true robust
  objective are accepted. For models linear in their parameters the damping is zero and
  the loop is plain IRLS; its first step is the exact weighted least-squares solution
  and later steps are iterative refinement.
* L1 (least absolute deviations) is solved exactly as a linear programme (HiGHS) for
  linear models, and by sequential linear programming with a trust region for
  nonlinear ones.
* Scale "auto": the normalised MAD of the residuals, re-estimated jointly with the
  parameters until it is a fixed point. Redescending losses start from an L1 fit
  (exact for linear models, near-L1 for nonlinear ones) and the MAD of its residuals,
  never from raw least squares, nor from a Huber fit whose scale has grown with
  one-sided outliers.
* The adaptive loss alternates the parameter step with a maximum-likelihood step for
  Barron's shape ``alpha`` in [0, 2] and scale ``c`` (negative log-likelihood
  ``sum rho_B(r_i/c, alpha) + n log c + n log Z(alpha)``); each block step lowers it.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
from ._lazy import LazyModule

from .result import FitResult
from .solvers.adaptive import _nll
from .solvers.assemble import _assemble
from .solvers.dispatch import _run
from .solvers.problem import FitError
from .solvers.setup import _prepare
from . import weighting as _weighting
from .threads import small_problem

# internal names that tests and older callers reach through this module
from .scale import mad  # noqa: F401
from .solvers.l1 import _l1_linear  # noqa: F401
from .solvers.large import _stage_sizes, _subproblem  # noqa: F401
from .solvers.mscale import _mad_and_gradient, _m_estimate, _near_l1  # noqa: F401
from .solvers.problem import (_POOL, _POOL_MAX_POINTS, _Problem,  # noqa: F401
                              _release_scratch, _scratch_for)

optimize = LazyModule("scipy.optimize", globals())  # lazy: 0.4 s to import, needed once a fit runs

__all__ = ["FitError", "alpha_profile", "fit"]


def fit(model, x, y, loss: str = "l2", *, scale="auto", alpha=None, sigma=None,
        excluded=None, p0=None, fixed=None, tuning=None, sigma_mode: str = "absolute",
        max_iter: int = 2000, weighting=None) -> FitResult:
    """Fit ``model`` to the points ``(x, y)`` under a (robust) loss.

    Parameters
    ----------
    model
        A built-in name (see :func:`fitcore.builtin_models`), a formula in Python
        expression syntax whose free names other than ``x`` are the parameters, or a
        :class:`fitcore.Model`.
    x, y
        The measurements. Points where x or y is not a finite number are left out
        (and counted in ``info["n_missing"]``).
    loss
        One of ``l2, l1, huber, pseudo_huber, cauchy, geman_mcclure, welsch, tukey,
        general, adaptive``.
    scale
        ``"auto"`` (robust estimate refined during the fit) or a fixed positive number
        in units of y (of y/sigma when ``sigma`` is given).
    alpha
        Shape of the general loss.
    sigma
        Standard uncertainties of y; residuals are divided by them.
    sigma_mode
        ``"absolute"`` (default: sigma are known standard uncertainties; least squares
        reports ``(J^T W J)^-1`` unscaled and robust losses use scale 1, so the tuning
        constant is in units of sigma) or ``"relative"`` (sigma are relative weights:
        the covariance is scaled by the observed scatter and the robust scale is
        estimated). Ignored when sigma is not given.
    excluded
        Boolean array, True where the analyst left the point out.
    p0
        Start values, a dict (some or all parameters) or a sequence.
    fixed
        Dict of parameters held at a value.
    tuning
        Tuning constant in units of the scale (default: 95 % Gaussian efficiency).
    weighting
        A weighting rule instead of a sigma column: ``"1/x"``, ``"1/x^2"``, ``"1/y"``,
        ``"1/y^2"`` or ``"power"`` (variance a power of the mean, from replicate
        standards); it gives relative sigma (see :mod:`fitcore.weighting`) and is
        recorded in ``info["weighting"]``.
    """
    rule = None
    if weighting is not None:
        sigma, sigma_mode, rule = _weighting.prepare_for_fit(weighting, x, y, sigma, sigma_mode, excluded)
    # every fit runs with one BLAS thread (fitcore.threads): the engine's products are
    # of tall matrices a few columns wide, bound by memory, not arithmetic; measured on
    # 2 shared cores under load (issue 12), two threads took 2-6x the CPU time and
    # 1.1-4x the wall time of one for robust decays at 1e5 and 1e6 points and for
    # least-squares and Huber lines and cubics at 1e6
    with small_problem():
        setup = _prepare(model, x, y, loss, scale=scale, alpha=alpha, sigma=sigma,
                         excluded=excluded, p0=p0, fixed=fixed, tuning=tuning,
                         sigma_mode=sigma_mode, max_iter=max_iter)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            outcome = _run(setup)
        res = _assemble(setup, outcome)
    if rule is not None:
        res.info["weighting"] = rule
    return res


def alpha_profile(model, x, y, alphas=None, *, sigma=None, excluded=None, p0=None,
                  fixed=None, max_rounds: int = 30):
    """Profile negative log-likelihood of the adaptive loss over its shape alpha.

    For each alpha the model parameters and Barron's scale c are fitted by maximum
    likelihood at that fixed shape (alternating a parameter step at scale c with the
    one-dimensional ML step for c); the profile is the minimised
    ``sum rho_B(r_i/c, alpha) + n log c + n log Z(alpha)``.

    Returns ``(alphas, nll, scales)``. Differences of the profile are likelihood
    ratios: an approximate 95 % interval for alpha is where
    ``nll - min(nll) <= 1.92`` (chi-square with one degree of freedom / 2).
    """
    alphas = np.linspace(0.0, 2.0, 21) if alphas is None else np.asarray(alphas, dtype=float)
    if np.any((alphas < 0) | (alphas > 2)):
        raise FitError("the profile is defined for alpha in [0, 2]")
    start = fit(model, x, y, loss="adaptive", sigma=sigma, excluded=excluded, p0=p0, fixed=fixed)
    nlls, scales = [], []
    for a in alphas:
        values, c = start.values.copy(), start.scale
        nll_old = math.inf
        for _ in range(max_rounds):
            res = fit(start.model, x, y, loss="general", alpha=float(a), tuning=1.0, scale=c,
                      sigma=sigma, sigma_mode="relative", excluded=excluded,
                      p0=dict(zip(start.param_names, values)), fixed=fixed)
            used = ~res.excluded & np.isfinite(res.residuals)
            r = res.residuals[used] / (res.sigma[used] if res.sigma is not None else 1.0)
            lo = math.log(max(1e-6 * start.scale, 1e-300))
            hi = math.log(max(10 * float(np.max(np.abs(r))), 10 * c))
            opt = optimize.minimize_scalar(lambda lc, r=r, a=a: _nll(r, float(a), lc), bounds=(lo, hi),
                                           method="bounded", options={"xatol": 1e-10})
            values, c, nll = res.values, math.exp(float(opt.x)), float(opt.fun)
            if abs(nll_old - nll) <= 1e-10 * max(abs(nll), 1.0):
                break
            nll_old = nll
        nlls.append(nll)
        scales.append(c)
    return alphas, np.array(nlls), np.array(scales)
