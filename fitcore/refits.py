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
from .scale import MAD_CONSTANT
from .solvers.assemble import _assemble
from .solvers.dispatch import _run_once
from .solvers.mscale import _SCALE_JUMP, _is_minimum, _newton_with_mad
from .solvers.problem import FitError, _project
from .solvers.setup import _prepare
from .solvers.start import _passes

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

    def __init__(self, model, values, free, scale, settings: dict, usable: bool = True):
        self.model = model
        self.settings = dict(settings)
        self.loss = self.settings.get("loss", "l2")
        values = np.asarray(values, float)
        free = np.asarray(free, bool)
        self.p0 = dict(zip(model.param_names, (float(v) for v in values)))
        self.theta0 = values[free]
        self.s0 = float(scale) if scale is not None else math.nan
        self.lower = np.asarray(model.lower, float)[free]
        self.upper = np.asarray(model.upper, float)[free]
        self.enabled = (bool(usable) and self.loss not in ("l1", "adaptive")
                        and bool(np.all(np.isfinite(self.theta0)))
                        and not self._on_bound(self.theta0))
        self.n_fast = 0
        self.n_fallback = 0

    @classmethod
    def from_fit(cls, res: FitResult, settings: dict) -> "WarmRefit":
        return cls(res.model, res.values, res.free, res.scale, settings,
                   usable=bool(res.converged))

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
        st = _prepare(self.model, x, y, self.loss, p0=self.p0, excluded=excluded,
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


def first_attempt(model, x, y, sigma, p0: dict, settings: dict) -> np.ndarray | None:
    """The parameters :func:`fitcore.fit` finds from ``p0`` on its first attempt, when
    that attempt passes the fit's verdict (converged, finite, the curve sensitive to
    its parameters, no pole among the points) and the result counts as converged:
    ``fit`` returns exactly that attempt then. None otherwise (``fit`` would go on to
    search other starts for a nonlinear model)."""
    kw = _prepare_kw(settings)
    kw["max_iter"] = int(settings.get("max_iter", kw["max_iter"]))
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        try:
            st = _prepare(model, x, y, settings.get("loss", "l2"), p0=p0, excluded=None,
                          sigma=sigma, **kw)
            out = _run_once(st)
        except (FitError, ValueError, ArithmeticError, np.linalg.LinAlgError):
            return None
        if not st.linear and not _passes(st, out):
            return None
        res = _assemble(st, out)
    if not res.converged:
        return None
    return np.asarray(res.values, float)


def _prepare_kw(settings: dict) -> dict:
    """``fit``'s keywords in ``settings`` as :func:`_prepare` takes them."""
    return {"scale": settings.get("scale", "auto"), "alpha": settings.get("alpha"),
            "fixed": settings.get("fixed"), "tuning": settings.get("tuning"),
            "sigma_mode": settings.get("sigma_mode", "absolute"), "max_iter": 2000}




# --------------------------------------------------------------------------- batched
class Cancelled(Exception):
    """``cancel()`` said True during :meth:`BatchRefit.solve`."""


class BatchRefit:
    """Many refits of one fit at once: Newton's method on each problem's estimating
    equations, with the linear algebra stacked over the problems.

    The same equations, start, steps and stopping rule as :class:`WarmRefit` (which
    runs ``fitcore.solvers.mscale._newton_with_mad`` on one problem): per problem the
    MAD scale and its slope, psi and psi', the Gauss-Newton matrix
    ``J^T diag(psi') J`` plus the scale column, a scaled solve, projection on the
    bounds, and the step measured in standard errors. Only the model is evaluated
    problem by problem (models take one parameter vector). Each problem's iterates
    depend on its own data alone, so a problem gets the same result in any batch.

    :meth:`solve` takes the problems as rows of equal length and returns
    ``(values, ok)``: the refitted parameter vectors and where the iteration settled;
    the caller runs the full ``fit`` for the rest.
    """

    def __init__(self, res_like: WarmRefit, x, y, sigma):
        """``res_like`` carries the fit (model, values, free, scale, settings); x, y,
        sigma are the fitted (used) points, for the method's checks."""
        w = res_like
        self.w = w
        self.enabled = w.enabled
        if not self.enabled:
            return
        st = _prepare(w.model, x, y, w.loss, p0=w.p0, excluded=None, sigma=sigma,
                      **_prepare_kw(w.settings))
        self.loss_obj = st.loss_obj
        self.free = st.free
        self.p_fixed = st.prob.p_fixed.copy()
        self.auto = st.fixed_scale is None and st.loss != "l2"
        if st.loss == "l2":
            s = w.s0 if w.s0 > 0 and math.isfinite(w.s0) else 1.0
        elif self.auto:
            s = w.s0
        else:
            s = st.fixed_scale
        self.s_start = s
        self.enabled = bool(s > 0 and math.isfinite(s))

    def _eval(self, X, Y, SIG, theta, rows):
        """Whitened residuals and Jacobian (free columns) of the given rows."""
        model, free = self.w.model, self.free
        m = X.shape[1]
        k_all = free.size
        R = np.empty((rows.size, m))
        JJ = np.empty((rows.size, m, k_all))
        for j, b in enumerate(rows):
            p = self.p_fixed.copy()
            p[free] = theta[b]
            try:
                if model.f_jac is not None:
                    f, Jf = model.f_jac(X[b], p)
                else:
                    f, Jf = model.f(X[b], p), model.jac(X[b], p)
                R[j] = Y[b] - np.asarray(f, float)
                JJ[j] = np.asarray(Jf, float).reshape(m, k_all)
            except (ValueError, ArithmeticError, TypeError):
                R[j] = np.nan  # the model cannot be evaluated there: this row fails
                JJ[j] = np.nan
        J = JJ if free.all() else JJ[:, :, free]
        if SIG is not None:
            R /= SIG[rows]
            J = J / SIG[rows][:, :, None]
        return R, J

    def solve(self, X, Y, SIG=None, cancel=None):
        """``(values, ok)`` for the problems in the rows of X, Y (and SIG); ``cancel()``
        is asked at every iteration, and :class:`Cancelled` raised when it says True."""
        self.cancel = cancel
        B, m = X.shape
        k = int(self.free.sum())
        theta = np.tile(self.w.theta0, (B, 1))
        ok = np.zeros(B, bool)
        if not self.enabled or m <= k:
            return self._values(theta), ok
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            self._newton(X, Y, SIG, theta, ok)
            rest = np.flatnonzero(~ok)
            if rest.size:
                # Newton did not settle from the full fit (a resample far from it): damped
                # reweighted steps with the scale re-estimated at each step bring these
                # near their fixed point, then Newton again
                th = np.tile(self.w.theta0, (rest.size, 1))
                near = self._irls(X[rest], Y[rest], None if SIG is None else SIG[rest], th)
                sub = rest[near]
                if sub.size:
                    th2 = th[near]
                    ok2 = np.zeros(sub.size, bool)
                    self._newton(X[sub], Y[sub], None if SIG is None else SIG[sub], th2, ok2)
                    theta[sub[ok2]] = th2[ok2]
                    ok[sub[ok2]] = True
        return self._values(theta), ok

    def _check(self):
        if self.cancel is not None and self.cancel():
            raise Cancelled()

    def _scale(self, R):
        if not self.auto:
            return np.full(R.shape[0], self.s_start)
        return MAD_CONSTANT * np.median(np.abs(R), axis=1)

    def _irls(self, X, Y, SIG, theta, max_iter: int = 60):
        """Levenberg-Marquardt steps of the reweighted least-squares problem, one step per
        scale update (the MAD of the current residuals), until the step is below 1e-3
        standard errors and the scale moves by less than 1e-4; returns where that
        happened (the rows' theta is updated in place)."""
        loss = self.loss_obj
        B = X.shape[0]
        lam = np.full(B, 1e-3)
        near = np.zeros(B, bool)
        active = np.arange(B)
        s_prev = np.full(B, np.nan)
        lower, upper = self.w.lower, self.w.upper
        for _ in range(max_iter):
            if active.size == 0:
                break
            self._check()
            R, J = self._eval(X, Y, SIG, theta, active)
            s = self._scale(R)
            fine = np.all(np.isfinite(R), axis=1) & (s > 0) & np.isfinite(s)
            U = R / s[:, None]
            wts = np.clip(np.asarray(loss.weight(U), float), 0.0, None)
            obj = np.sum(np.asarray(loss.rho(U), float), axis=1)
            Jw = J * wts[:, :, None]
            Gm = np.einsum("bmi,bmj->bij", Jw, J)
            rhs = np.einsum("bmi,bm->bi", Jw, R)
            dg = np.diagonal(Gm, axis1=1, axis2=2)
            th = theta[active]
            # the step at the current damping; a step that does not lower the objective
            # at this scale is retried with more damping (up to 4 times) before moving on
            accepted = np.zeros(active.size, bool)
            step = np.zeros_like(th)
            todo = fine.copy()
            for _try in range(4):
                if not todo.any():
                    break
                Md = Gm + lam[active][:, None, None] * np.eye(th.shape[1]) * dg[:, :, None]
                z = _stack_solve(Md, rhs, todo)
                cand = _project(th + np.where(np.isfinite(z), z, 0.0), lower, upper)
                idx = np.flatnonzero(todo & np.all(np.isfinite(z), axis=1))
                if idx.size == 0:
                    break
                Rt, _ = self._eval(X, Y, SIG, _rows(theta, active, cand), active[idx])
                ot = np.sum(np.asarray(loss.rho(Rt / s[idx][:, None]), float), axis=1)
                better = np.isfinite(ot) & (ot <= obj[idx])
                acc = idx[better]
                accepted[acc] = True
                step[acc] = cand[acc] - th[acc]
                lam[active[acc]] = np.maximum(lam[active[acc]] / 3.0, 1e-12)
                lam[active[idx[~better]]] *= 10.0
                todo = np.zeros(active.size, bool)
                todo[idx[~better]] = True
            theta[active[accepted]] = th[accepted] + step[accepted]
            try:
                ginv = np.diagonal(np.linalg.pinv(Gm), axis1=1, axis2=2)
            except np.linalg.LinAlgError:
                ginv = np.full(th.shape, np.inf)
            se = s[:, None] * np.sqrt(np.abs(ginv))
            small = np.all(np.abs(step) <= 1e-3 * se, axis=1)
            steady = np.abs(s - s_prev[active]) <= 1e-4 * s
            s_prev[active] = s
            done = fine & small & steady
            near[active[done]] = True
            keep = fine & ~done & (accepted | (lam[active] < 1e10))
            active = active[keep]
        return near

    def _values(self, theta):
        P = np.tile(self.p_fixed, (theta.shape[0], 1))
        P[:, self.free] = theta
        return P

    def _newton(self, X, Y, SIG, theta, ok):
        loss, auto = self.loss_obj, self.auto
        lower, upper = self.w.lower, self.w.upper
        B, m = X.shape
        k = theta.shape[1]
        s = np.full(B, self.s_start)
        norm_prev = np.full(B, np.inf)
        smooth = np.full(B, auto and m >= 20 and m // 2 - int(math.ceil(m ** (2 / 3))) >= 0
                         and m // 2 + int(math.ceil(m ** (2 / 3))) < m)
        wwin = int(math.ceil(m ** (2 / 3)))
        active = np.arange(B)
        h = m // 2
        redesc = loss.redescending
        for _ in range(MAX_ITER + 1):
            if active.size == 0:
                break
            self._check()
            R, J = self._eval(X, Y, SIG, theta, active)
            good = np.all(np.isfinite(R), axis=1) & np.all(np.isfinite(J), axis=(1, 2))
            nb = active.size
            sa = s[active]
            if auto:
                A = np.abs(R)
                order = np.argsort(A, axis=1, kind="stable")
                rr = np.arange(nb)[:, None]
                if m % 2:
                    mid = order[:, h:h + 1]
                else:
                    mid = order[:, h - 1:h + 1]
                sa = MAD_CONSTANT * np.mean(A[rr, mid], axis=1)
                # slope of the MAD: exact one-point (two-point) slope, or averaged over
                # the ranks within w of the median while the steps are long
                win = order[:, max(h - wwin, 0):h + wwin + 1]
                exact_slope = -np.einsum("bm,bmk->bk", np.sign(R[rr, mid]),
                                         J[rr[:, :, None], mid[:, :, None], np.arange(k)]) / mid.shape[1]
                sm_slope = -np.einsum("bm,bmk->bk", np.sign(R[rr, win]),
                                      J[rr[:, :, None], win[:, :, None], np.arange(k)]) / win.shape[1]
                g = MAD_CONSTANT * np.where(smooth[active][:, None], sm_slope, exact_slope)
                good &= (sa > 0) & np.isfinite(sa)
                s[active] = sa
            U = R / sa[:, None]
            psi, dpsi = loss.psi_dpsi(U)
            psi = np.asarray(psi, float)
            dpsi = np.asarray(dpsi, float)
            G = np.einsum("bm,bmi,bmj->bij", dpsi, J, J)
            F = np.einsum("bm,bmi->bi", psi, J)
            M = G + np.einsum("bm,bmi->bi", dpsi * U, J)[:, :, None] * g[:, None, :] if auto else G
            d = np.sqrt(np.abs(np.diagonal(M, axis1=1, axis2=2))) + 1e-300
            norm = np.linalg.norm(F / d, axis=1)
            good &= np.isfinite(norm) & (norm <= 4.0 * norm_prev[active])
            norm_prev[active] = norm
            Ms = M / d[:, :, None] / d[:, None, :]
            Gs = G / d[:, :, None] / d[:, None, :]
            z = _stack_solve(Ms, F / d, good)
            step = sa[:, None] * z / d
            good &= np.all(np.isfinite(step), axis=1)
            th = theta[active]
            new = _project(th + np.where(good[:, None], step, 0.0), lower, upper)
            step = new - th
            ginv = _stack_inv_diag(Gs, good)
            se = sa[:, None] * np.sqrt(np.abs(ginv)) / d
            in_se = np.where(se > 0, np.abs(step) / se, np.inf)
            rel = np.abs(step) <= 1e-10 * np.abs(th)
            small = rel | (in_se <= 0.1 * TOL)
            done_here = good & np.all(small, axis=1)  # this iterate is the root
            done_next = good & ~done_here & np.all(rel | (in_se <= TOL), axis=1)
            if redesc:
                pd = _stack_posdef(Gs)
                bad = (done_here | done_next) & ~pd
                if auto:
                    bad |= (done_here | done_next) & (sa > _SCALE_JUMP * self.s_start)
                good &= ~bad
                done_here &= ~bad
                done_next &= ~bad
            theta[active[done_next]] = new[done_next]
            moving = good & ~done_here & ~done_next
            theta[active[moving]] = new[moving]
            finished = done_here | done_next
            ok[active[finished]] = True
            smooth[active] = smooth[active] & ~np.all(rel | (in_se <= 1e-2), axis=1)
            active = active[moving]
        # a settled refit must not end on a bound (the constrained problem is the full
        # fit's to solve)
        for b in np.flatnonzero(ok):
            if self.w._on_bound(theta[b]):
                ok[b] = False


def _rows(theta, active, cand):
    """``theta`` with the active rows replaced by ``cand`` (a copy)."""
    out = theta.copy()
    out[active] = cand
    return out


def _stack_solve(M, F, good):
    """``solve(M[b], F[b])`` for every b; NaN rows where singular or not ``good``."""
    out = np.full(F.shape, np.nan)
    idx = np.flatnonzero(good)
    if idx.size == 0:
        return out
    try:
        out[idx] = np.linalg.solve(M[idx], F[idx][:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        for b in idx:
            try:
                out[b] = np.linalg.solve(M[b], F[b])
            except np.linalg.LinAlgError:
                pass
    return out


def _stack_inv_diag(G, good):
    out = np.full(G.shape[:2], np.nan)
    idx = np.flatnonzero(good)
    if idx.size == 0:
        return out
    try:
        out[idx] = np.diagonal(np.linalg.inv(G[idx]), axis1=1, axis2=2)
    except np.linalg.LinAlgError:
        for b in idx:
            try:
                out[b] = np.diag(np.linalg.inv(G[b]))
            except np.linalg.LinAlgError:
                pass
    return out


def _stack_posdef(G):
    """True where the (scaled) matrix is positive definite, as ``_is_minimum`` judges."""
    try:
        ev = np.linalg.eigvalsh(G)
    except np.linalg.LinAlgError:
        return np.zeros(G.shape[0], bool)
    return ev[:, 0] > 1e-10 * np.maximum(ev[:, -1], 1e-300)


__all__ = ["WarmRefit", "BatchRefit", "Cancelled", "first_attempt", "TOL"]
