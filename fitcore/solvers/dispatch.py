"""Dispatch: one solver per kind of loss, each returning an :class:`_Outcome`."""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..losses import Loss, get_loss
from ..scale import mad
from . import large
from .adaptive import _fit_adaptive
from .l1 import _l1_linear, _l1_nonlinear
from .linear import _linear_mad_small
from .lm import _irls_lm, _refine_linear_ls
from .mscale import SCALE_METHOD, _m_estimate, _robust_with_scale, _newton_with_mad
from .problem import _exact_floor, _Inner, _safe_scale, _start_scale
from .setup import _Setup
from .start import _improve
from .verdict import _first_order


@dataclass
class _Outcome:
    inner: _Inner
    s: float  # the residual scale the result reports
    scale_method: str
    n_iter: int
    loss_obj: Loss
    alpha: float | None = None
    alpha_se: float | None = None


def _run(st: _Setup) -> _Outcome:
    """The fit, with more starts where the first attempt fails the verdict or starts
    blank (:mod:`.start`)."""
    return _improve(st, _run_once)


def _run_once(st: _Setup) -> _Outcome:
    if st.loss == "l2":
        return _run_l2(st)
    if st.loss == "l1":
        return _run_l1(st)
    if st.loss == "adaptive":
        return _run_adaptive(st)
    return _run_m(st)


def _run_l2(st: _Setup) -> _Outcome:
    prob, linear = st.prob, st.linear
    inner = _irls_lm(prob, st.theta0, st.loss_obj, 1.0, linear=linear, max_iter=st.max_iter)
    refined = _refine_linear_ls(prob, inner.theta) if linear and _needs_refinement(prob) else None
    if refined is not None:
        th, r_th, inv_ata = refined
        st.info["inv_jtj"] = inv_ata
        # the refined solution is judged afresh (the loop's own point may have failed the
        # first-order test only through the rounding that the refinement removes)
        ok = _first_order(prob, th, r_th, None, 1.0)[0]
        inner = _Inner(th, r_th, 0.5 * float(r_th @ r_th), inner.n_iter, ok,
                       "converged (least-squares solution with iterative refinement)" if ok else
                       "the refined least-squares solution fails the first-order test")
    dof = st.dof
    s = math.sqrt(float(np.sum(inner.r ** 2)) / dof) if dof > 0 else float("nan")
    return _Outcome(inner, s, "residual standard deviation sqrt(RSS/(n - p))", inner.n_iter,
                    st.loss_obj)


#: condition number of the column-scaled design above which a linear least-squares fit
#: is refined in extended precision. Below it a QR solve in double precision is already
#: accurate to about eps * cond^2 (2e-12 relative at 100, far less in practice): the
#: refinement changed a 1e6-point line by 2e-16 while taking 3/4 of its time and three
#: times its memory (issue 12). NIST Filip (cond ~1e15 before scaling) and Wampler are
#: refined as before (tests/reference/test_nist_strd.py).
COND_REFINE = 100.0


def _needs_refinement(prob) -> bool:
    """True when the whitened design of a linear model is not well conditioned: the
    eigenvalues of its column-scaled Gram matrix (k x k, one pass over the points) are
    more than ``COND_REFINE**2`` apart, or not all positive and finite (the Gram matrix
    loses what a condition number above 1e8 would need, which then counts as large)."""
    A = prob.jac(None)
    with np.errstate(all="ignore"):
        G = A.T @ A
        d = np.sqrt(np.abs(np.diag(G)))
        if not (np.all(np.isfinite(G)) and np.all(d > 0)):
            return True
        try:
            ev = np.linalg.eigvalsh(G / np.outer(d, d))
        except np.linalg.LinAlgError:
            return True
    return not (ev[0] > 0 and ev[-1] <= COND_REFINE ** 2 * ev[0])


def _run_l1(st: _Setup) -> _Outcome:
    prob = st.prob
    if st.linear:
        A = prob.jac(st.theta0)
        b = (prob.y - st.mdl.f(prob.x, prob.full(np.zeros(st.k)))) / prob.sig
        theta = _l1_linear(A, b, prob.lower, prob.upper)
        r = prob.resid(theta)
        inner = _Inner(theta, r, float(np.sum(np.abs(r))), 1, True,
                       "converged (exact linear programme)")
    else:
        # from a converged robust fit, not the raw start: sequential LP follows the
        # nearest kink of the L1 objective, so its start must already fit the majority
        theta0 = st.theta0
        huber = get_loss("huber")
        pre = _run_m(dataclasses.replace(st, loss="huber", loss_obj=huber, fixed_scale=None,
                                         info={}))
        if pre.inner.converged:
            theta0 = pre.inner.theta
        inner = _l1_nonlinear(prob, theta0, max_iter=st.max_iter)
    m = mad(inner.r)
    floor = _exact_floor(prob)
    on_curve = int(np.count_nonzero(np.abs(inner.r) <= floor))
    # (every residual zero: exact data, whose estimates have zero spread, u = 0 as under
    # least squares; the p points an L1 fit interpolates do not count as a majority)
    if 0.5 * prob.n < on_curve < prob.n and on_curve > st.k:
        # more than half of the points on the curve: the MAD is zero and says nothing
        # about the scatter (its fallback, the residuals' SD, priced one point off an
        # exact line at an uncertainty of 1.08); no uncertainties, as for the M-losses
        inner = dataclasses.replace(inner, stats=dict(inner.stats or {}, exact=True))
        m = floor
    s = _safe_scale(m, inner.r, prob)
    return _Outcome(inner, s, "normalised MAD of the residuals (does not affect the L1 estimate)",
                    inner.n_iter, st.loss_obj)


def _run_adaptive(st: _Setup) -> _Outcome:
    prob, linear, theta0 = st.prob, st.linear, st.theta0
    warm = None
    if st.n_used > large._LARGE:
        sub = large._subproblem(prob)
        w_inner, _, w_c, w_alpha, _, _, _ = _fit_adaptive(
            sub, theta0, _start_scale(sub, theta0), linear=linear, max_iter=st.max_iter)
        theta0, warm = w_inner.theta, (w_alpha, w_c)
    s0 = _start_scale(prob, theta0)
    inner, loss_obj, s, alpha, alpha_se, n_iter, ainfo = _fit_adaptive(
        prob, theta0, s0, linear=linear, max_iter=st.max_iter, warm=warm)
    st.info.update(ainfo)
    method = "Barron scale c by maximum likelihood (jointly with alpha)"
    if ainfo.get("scale_at_floor"):
        method += "; held at its floor (residuals nearly exact)"
    return _Outcome(inner, s, method, n_iter, loss_obj, alpha, alpha_se)


def _run_m(st: _Setup) -> _Outcome:
    prob, linear, loss_obj = st.prob, st.linear, st.loss_obj
    fixed_scale, max_iter = st.fixed_scale, st.max_iter
    auto = fixed_scale is None
    if auto:
        method = SCALE_METHOD
    elif not st.absolute or st.scale_given:
        method = "fixed by the analyst"
    else:
        method = "fixed at 1: sigma taken as absolute"
    # a small linear model with the MAD scale: the same fixed point by direct steps
    got = _linear_mad_small(prob, st.theta0, loss_obj) if auto and linear else None
    if got is not None:
        inner, s, n_iter = got
        return _Outcome(inner, s, method, n_iter, loss_obj,
                        loss_obj.alpha if st.loss == "general" else None)
    staged = large._staged_start(prob, st.theta0, loss_obj, fixed_scale, linear=linear,
                                 max_iter=max_iter)
    if staged is None:
        inner, s, n_iter = _m_estimate(prob, st.theta0, loss_obj, fixed_scale, linear=linear,
                                       max_iter=max_iter)
    else:
        start_theta, s_start, n_iter = staged
        got = _newton_with_mad(prob, start_theta, s_start, loss_obj, with_mad=auto)
        if got is None:
            got = _robust_with_scale(prob, start_theta, loss_obj, s_start, linear=linear,
                                     auto=auto, max_iter=max_iter, rule="mad")
        inner, s, it = got
        n_iter += it
    general = st.loss == "general"
    return _Outcome(inner, s, method, n_iter, loss_obj, loss_obj.alpha if general else None)
