r"""Warm-started refits of a finished fit on changed data (point diagnostics, bootstrap).

The analyses refit one model many times on data that differ little from the fitted
data: one point left out (point diagnostics) or a resample of the points (bootstrap).
:func:`fitcore.fit` starts every such refit from scratch: start values, an L1 or Huber
pre-fit for the scale, then an alternation of reweighted solves and scale updates
(some 10-15 inner solves, 50-80 Levenberg-Marquardt steps on a 25-100-point 4PL).

:class:`WarmRefit` solves the same estimating equations from the full fit instead:
Newton's method on ``sum psi(r_i / s) J_i = 0`` with the scale ``s`` tied to the
normalised MAD of the residuals where the fit estimated it (the MAD rule the fit
itself uses; ``fitcore.solvers.mscale._newton_with_mad``), or held where the analyst
fixed it (or sigma are absolute). From the full fit's parameters and scale this settles
in a few passes. It is not an approximation: the iteration runs until the last step is
below ``TOL`` (1e-8) standard errors, far below the 1e-6 that the tests allow between
these refits and brute-force ``fit`` calls, and a refit whose iteration does not settle,
that ends on a bound, or (redescending losses) ends at a saddle or with a scale jump
to another root, is not used: the caller then runs :func:`fitcore.fit` as before.

Least absolute deviations (a linear programme) and the adaptive loss with its shape
re-fitted always take the full ``fit``.
"""
from __future__ import annotations

import math
import warnings

import numpy as np

from .result import FitResult
from .solvers.mscale import _SCALE_JUMP, _is_minimum, _newton_with_mad
from .solvers.problem import FitError
from .solvers.setup import _prepare

#: last Newton step, in standard errors of the parameters, at which a refit counts as
#: converged (the result is then within about TOL standard errors of the root)
TOL = 1e-8
MAX_ITER = 40


class WarmRefit:
    """Refits of ``res``'s method on other data, warm-started from ``res``.

    ``settings`` are the keyword arguments of :func:`fitcore.fit` that repeat the method
    (:func:`fitcore.diagnostics.refit_settings`). :meth:`values` returns the refitted
    parameter vector (all parameters, held ones at their value) or None when the fast
    path does not apply or does not settle; the caller then uses ``fit``.
    """

    def __init__(self, res: FitResult, settings: dict):
        self.res = res
        self.settings = dict(settings)
        self.loss = self.settings.get("loss", res.loss)
        self.p0 = dict(zip(res.param_names, (float(v) for v in res.values)))
        self.theta0 = np.asarray(res.values, float)[res.free]
        self.s0 = float(res.scale) if res.scale is not None else math.nan
        lo = np.asarray(res.model.lower, float)[res.free]
        hi = np.asarray(res.model.upper, float)[res.free]
        self.lower, self.upper = lo, hi
        self.enabled = (self.loss not in ("l1", "adaptive")
                        and bool(res.converged)
                        and np.all(np.isfinite(self.theta0))
                        and not self._on_bound(self.theta0))
        self.n_fast = 0
        self.n_fallback = 0

    def _on_bound(self, theta) -> bool:
        with np.errstate(all="ignore"):
            near = 1e-8 * np.maximum(np.abs(theta), 1e-12)
            return bool(np.any(np.isfinite(self.lower) & (theta - self.lower <= near))
                        or np.any(np.isfinite(self.upper) & (self.upper - theta <= near)))

    def values(self, x, y, sigma=None, excluded=None) -> np.ndarray | None:
        if not self.enabled:
            return None
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            try:
                out = self._solve(x, y, sigma, excluded)
            except (FitError, ValueError, ArithmeticError, np.linalg.LinAlgError):
                out = None
        if out is None:
            self.n_fallback += 1
        else:
            self.n_fast += 1
        return out

    def _solve(self, x, y, sigma, excluded):
        st = _prepare(self.res.model, x, y, self.loss, p0=self.p0, excluded=excluded,
                      sigma=sigma, **_prepare_kw(self.settings))
        if st.dof <= 0:
            return None
        prob, loss = st.prob, st.loss_obj
        auto = st.fixed_scale is None and st.loss != "l2"
        if st.loss == "l2":
            # the least-squares root does not depend on s; s only measures the steps
            s = self.s0 if self.s0 > 0 and math.isfinite(self.s0) else 1.0
        elif auto:
            s = self.s0
        else:
            s = st.fixed_scale
        if not (s > 0 and math.isfinite(s)):
            return None
        got = _newton_with_mad(prob, self.theta0.copy(), s, loss, max_iter=MAX_ITER,
                               with_mad=auto, tol=TOL)
        if got is None:
            return None
        inner, s_new, _ = got
        theta = np.asarray(inner.theta, float)
        if not np.all(np.isfinite(theta)) or self._on_bound(theta):
            return None
        if loss.redescending and (not _is_minimum(prob, inner)
                                  or (auto and s_new > _SCALE_JUMP * s)):
            return None
        return prob.full(theta)


def _prepare_kw(settings: dict) -> dict:
    """``fit``'s keywords in ``settings`` as :func:`_prepare` takes them."""
    return {"scale": settings.get("scale", "auto"), "alpha": settings.get("alpha"),
            "fixed": settings.get("fixed"), "tuning": settings.get("tuning"),
            "sigma_mode": settings.get("sigma_mode", "absolute"), "max_iter": 2000}


__all__ = ["WarmRefit", "TOL"]
