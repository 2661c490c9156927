"""Assembly of the :class:`~fitcore.result.FitResult`: covariance, per-point values."""
from __future__ import annotations

import numpy as np

from .. import uncertainty as unc
from ..result import FitResult
from .dispatch import _Outcome
from .setup import _Setup
from .verdict import _insensitive, _pole_in_range


def _covariance(st: _Setup, out: _Outcome, theta, r):
    """The free parameters' covariance, its recipe, and the verdict it may overturn."""
    k, dof, s, loss = st.k, st.dof, out.s, st.loss
    inner = out.inner
    converged, message = inner.converged, inner.message
    exact = bool((inner.stats or {}).get("exact"))
    cov_free = np.full((k, k), np.nan)
    recipe = ""
    try:
        Jf = st.prob.jac(theta)
        if loss == "l2":
            cov_free, recipe = unc.cov_least_squares(Jf, r, dof, absolute=st.absolute,
                                                     inv_jtj=st.info.pop("inv_jtj", None))
        elif loss == "l1":
            cov_free, recipe = unc.cov_l1(Jf, r)
        else:
            stats = inner.stats or {}
            cov_free, recipe = unc.cov_m_estimate(
                Jf, None if "psi" in stats else r / s, s, out.loss_obj, dof,
                psi=stats.get("psi"), dpsi=stats.get("dpsi"),
                absolute=st.absolute and loss != "adaptive")
    except unc.RankDeficient as e:
        converged = False
        message = f"{e}; the estimates are not unique (hold a parameter or add points)"
        recipe = recipe or "not available"
    except unc.CovarianceUnavailable as e:  # the estimates stand, without uncertainties
        cov_free = np.full((k, k), np.nan)
        recipe = "not available"
        if not exact and getattr(e, "complete", False):  # a whole statement: what, what is left, what to do
            message += f"; {e}"
        elif not exact:  # (an exact majority is said below, in its own words)
            message += f"; {e}, so the standard uncertainties are not available"
    if exact and loss == "l1":
        cov_free = np.full((k, k), np.nan)
        message += ("; more than half of the points lie exactly on the curve, so the "
                    "scatter near the fit is zero and the L1 uncertainties cannot be "
                    "estimated")
    elif exact:
        cov_free = np.full((k, k), np.nan)
        hint = "give sigma" if loss == "adaptive" else "give sigma or a fixed scale"
        message += ("; the robust scale is zero, so the uncertainties cannot be estimated "
                    f"from the scatter ({hint}); points off the curve get weight 0")
    if dof <= 0:
        message += "; no degrees of freedom left, so uncertainties cannot be estimated"
        cov_free = np.full((k, k), np.nan)
    if not st.linear:
        converged, message, cov_free = _curve_checks(st, theta, converged, message, cov_free)
        if not converged:
            message += _offset_hint(st.prob.x)
    return cov_free, recipe, converged, message


def _offset_hint(x) -> str:
    """A hint when x lies far from 0 against its spread (timestamps, years): the
    model's parameters then cancel each other to many digits."""
    lo, hi = float(np.min(x)), float(np.max(x))
    span, centre = hi - lo, abs(0.5 * (lo + hi))
    if span > 0 and centre > 1e3 * span:
        return (f"; x lies far from 0 against its spread (from {lo:.10g} to {hi:.10g}), which "
                f"ruins the conditioning: subtract an origin (e.g. x - {lo:.10g}) and fit again")
    return ""


def _curve_checks(st: _Setup, theta, converged, message, cov_free):
    """Parameters that no longer affect the curve, and a pole inside the data: the
    fit is then not converged, whatever the solver's stopping rule said, and such a
    parameter's uncertainty is not reported (it would look finite, e.g. 2e49)."""
    prob = st.prob
    dead = _insensitive(prob, theta)
    if dead:
        names = [np.asarray(st.mdl.param_names)[st.free][j] for j in dead]
        which = ", ".join(names)
        converged = False
        message = (f"{which} no longer {'affects' if len(names) == 1 else 'affect'} the curve "
                   f"(a saturated exponential, a width or rate gone to zero or infinity): "
                   f"the estimate is not determined; try other start values or hold "
                   f"{'it' if len(names) == 1 else 'them'}")
        cov_free = cov_free.copy()
        cov_free[dead, :] = np.nan
        cov_free[:, dead] = np.nan
    pole = _pole_in_range(prob, theta)
    if pole is not None:
        converged = False
        message = (f"the fitted curve has a pole or a non-finite value inside the data's x "
                   f"range (near x = {pole:.6g}): not a valid fit; try other start values "
                   f"or bounds") + ("" if not dead else "; " + message)
    return converged, message, cov_free


def _assemble(st: _Setup, out: _Outcome) -> FitResult:
    mdl, prob, free, s = st.mdl, st.prob, st.free, out.s
    inner = out.inner
    theta, r = inner.theta, inner.r
    p_full = prob.full(theta)
    cov_free, recipe, converged, message = _covariance(st, out, theta, r)
    if cov_free.shape[0] == mdl.n_params:  # every parameter free: the matrix as it is
        cov = np.array(cov_free, dtype=float)
    else:
        cov = np.zeros((mdl.n_params, mdl.n_params))
        idx = np.flatnonzero(free)
        cov[np.ix_(idx, idx)] = cov_free
    var = cov.diagonal()
    stderr = np.sqrt(np.maximum(var, 0.0))
    stderr[np.isnan(var)] = np.nan

    # per point
    x, y, sig_all, all_used, linear = st.x, st.y, st.sig_all, st.all_used, st.linear
    with np.errstate(all="ignore"):
        kept_f = None if linear or not all_used else prob.kept_f(theta)
        if linear and all_used and prob.unit and free.all():
            fitted = prob.jac(theta) @ theta  # the design the fit used: no rebuild
        elif kept_f is not None:
            fitted = kept_f.copy()  # the solver's last pass computed exactly these
        else:
            fitted = np.asarray(mdl.f(x, p_full), dtype=float)
    # the residuals, standardised residuals and least-squares weights are left to the
    # result, which computes them from these on first read (FitResult._PerPoint): a fit
    # of a million points then holds three fewer arrays as large as the data; and the
    # cached design matrix of a linear model goes now, before the copies of x and y
    prob.release()
    n_down = 0
    if st.loss == "l2":
        weights = None
    else:
        stats = inner.stats or {}
        u_kept = stats.get("u") if stats.get("s") == s else None  # r / s, when kept
        w_used = np.asarray(out.loss_obj.weight(r / s if u_kept is None else u_kept),
                            dtype=float)
        np.clip(w_used, 0.0, 1.0, out=w_used)
        n_down = int(np.count_nonzero(w_used < 0.5))
        if all_used:
            weights = w_used
        else:
            weights = np.zeros(st.n_all)
            weights[st.used] = w_used
    return FitResult(
        model=mdl, loss=st.loss, param_names=mdl.param_names, values=p_full, stderr=stderr,
        covariance=cov, weights=weights, residuals=None, std_residuals=None,
        fitted=fitted, x=x.copy(), y=y.copy(),
        sigma=None if sig_all is None else sig_all.copy(), excluded=st.excl.copy(),
        scale=float(s), scale_method=out.scale_method, alpha=out.alpha,
        tuning=out.loss_obj.tuning, covariance_recipe=recipe, converged=bool(converged),
        message=message, n_used=st.n_used, n_excluded=int(st.excl.sum()),
        n_downweighted=n_down,
        dof=st.dof, fixed={kk: float(v) for kk, v in st.fixed.items()},
        n_iter=int(out.n_iter), objective=float(inner.objective), sigma_mode=st.sigma_kind,
        rss=float(r @ r), alpha_stderr=out.alpha_se, info=st.info,
    )
