"""Small linear models under a monotone robust loss with the automatic (MAD) scale.

The general route (:func:`.mscale._m_estimate`) reaches the same fixed point through
Levenberg-Marquardt solves that are built for nonlinear models: an exact L1 start, a
loose reweighted solve, Newton's method on the joint (parameters, MAD) equations, then
full-accuracy solves at that scale to confirm it and the solver's verdict. For a model
linear in its parameters the design is a constant matrix and each of those steps is a
few small matrix products, so this module runs them directly: the L1 start
(:func:`.l1._l1_linear_start`), the same loose reweighted solve at its MAD, and the
joint Newton iteration to rounding level, whose last step is itself the convergence
test (the remaining step to the root, in standard errors).

Anything unusual goes back to the general route (the function returns None): bounds
on the parameters, a zero MAD (exact data), a design with fewer than k points inside
the loss's quadratic part, a Newton iteration that does not settle.
"""
from __future__ import annotations

import math

import numpy as np

from ..losses import Loss
from ..scale import MAD_CONSTANT
from .l1 import _l1_linear_start
from .lm import _judged
from .problem import _exact_floor, _Inner, _inv_small, _Problem

#: the joint Newton route of the general code runs below this many points too
_SMALL_MAX = 200
#: condition number (1-norm) of the column-scaled J^T D J above which the verdict runs
_VERDICT_COND = 1e5


def _mad_slope(r: np.ndarray, a: np.ndarray, order: np.ndarray, smooth: bool,
               A: np.ndarray) -> np.ndarray:
    """The gradient of the normalised MAD ``1.4826 median |r|`` w.r.t. the parameters
    (r = b - A theta), as :func:`.mscale._mad_and_gradient` takes it: while the steps
    are long, the slope averaged over every point whose ``|r|`` lies within
    ``ceil(n^(2/3))`` ranks of the median; near the root the slope of the point(s) at
    the median (a tie takes the first in point order). ``a = |r|``, ``order`` its
    stable argsort."""
    n = a.size
    h = n // 2
    if smooth:
        w = int(math.ceil(n ** (2.0 / 3.0)))
        sel = (a >= a[order[h - w]]) & (a <= a[order[h + w]])
        return (-MAD_CONSTANT / np.count_nonzero(sel)) * ((np.sign(r) * sel) @ A)
    # the point(s) at the middle rank(s); where values tie, the first of them in point
    # order: the stable argsort lists tied points in point order, so that is the one
    # at the first rank holding the value
    g = np.zeros(A.shape[1])
    ranks = (h,) if n % 2 else (h - 1, h)
    for p in ranks:
        v = a[order[p]]
        while p > 0 and a[order[p - 1]] == v:
            p -= 1
        i = order[p]
        g += A[i] if r[i] > 0 else (-A[i] if r[i] < 0 else 0.0)
    return (-MAD_CONSTANT / len(ranks)) * g


def _cond1(Gs: np.ndarray, Gi: np.ndarray) -> float:
    """The 1-norm condition number of ``Gs`` from it and its inverse."""
    return float(np.abs(Gs).sum(axis=0).max() * np.abs(Gi).sum(axis=0).max())


def _wls(Aw: np.ndarray, bw: np.ndarray) -> np.ndarray | None:
    """Least-squares solution of ``Aw t = bw``: by the column-scaled normal equations
    where their condition number is at most 1e8 (a small fit's loose solve needs no
    more digits than that leaves), else by LAPACK's SVD solver; None if not finite."""
    G = Aw.T @ Aw
    dg = np.sqrt(G.diagonal())
    if (dg > 0).all():
        Gs = G / (dg[:, None] * dg)
        Gi = _inv_small(Gs)
        if Gi is not None and _cond1(Gs, Gi) <= 1e8:
            t = (Gi @ ((bw @ Aw) / dg)) / dg
            return t if np.isfinite(t).all() else None
    try:
        t = np.linalg.lstsq(Aw, bw, rcond=None)[0]
    except np.linalg.LinAlgError:
        return None
    return t if np.isfinite(t).all() else None


def _linear_mad_small(prob: _Problem, theta0, loss: Loss, max_iter: int = 30):
    """M-estimate of a small linear model with the MAD scale re-estimated to its fixed
    point: ``(inner, s, n_iter)`` with psi and psi' at the solution in ``inner.stats``,
    or None where the general route should decide (see the module's docstring).

    The fixed point is the one the general route finds: the same L1 start, the same
    joint equations ``sum psi(r_i / s(theta)) A_i = 0`` with ``s(theta)`` the
    normalised MAD, the same smoothed MAD slope while steps are long, and the same
    stopping rule as its last phase (a step below 1e-12 standard errors, or 1e-14
    relative).
    """
    n, k = prob.n, prob.k
    if (not prob.model.is_linear or loss.redescending or n >= _SMALL_MAX or 2 * k >= n
            or np.any(np.isfinite(prob.lower)) or np.any(np.isfinite(prob.upper))):
        return None
    theta, exact = _l1_linear_start(prob, theta0)
    if not exact:
        return None
    A = prob.jac(None)
    b = prob.rhs()
    floor = _exact_floor(prob)
    h = n // 2
    odd = n % 2

    def mad_of(r):
        a = np.abs(r)
        order = np.argsort(a, kind="stable")
        med = a[order[h]] if odd else 0.5 * (a[order[h - 1]] + a[order[h]])
        return MAD_CONSTANT * float(med), a, order

    # the general route's loose first solve: reweighted least-squares steps at the L1
    # fit's MAD until a step is below 1e-2 of the parameters (in its column scaling);
    # where the joint iteration starts decides between MAD roots at small n
    r = b - A @ theta
    s = mad_of(r)[0]
    if not (s > floor and math.isfinite(s)):
        return None
    dmax = np.zeros(k)
    for _ in range(100):
        sw = np.sqrt(loss.weight(r / s))
        Aw = A * sw[:, None]
        dmax = np.maximum(np.einsum("ij,ij->j", Aw, Aw), 0.25 * dmax)
        D = np.sqrt(np.where(dmax > 0, dmax, 1.0))
        new = _wls(Aw, b * sw)
        if new is None:
            return None
        step, theta = new - theta, new
        r = b - A @ theta
        if np.linalg.norm(D * step) <= 1e-2 * (np.linalg.norm(D * theta) + 1e-2):
            break
    else:
        return None

    n_w = int(math.ceil(n ** (2.0 / 3.0)))
    smooth = n >= 20 and h - n_w >= 0 and h + n_w < n
    norm_prev = math.inf
    done = near = False
    passes = 0
    while True:
        passes += 1
        if passes > max_iter:
            return None  # not settled: the general route decides
        r = b - A @ theta
        s, a, order = mad_of(r)
        if not (s > floor and math.isfinite(s)):
            return None  # exact data: the general route's exact fit decides
        u = r / s
        psi, dpsi = loss.psi_dpsi(u)
        if done:
            break
        g = _mad_slope(r, a, order, smooth, A)
        F = psi @ A
        Ad = A * dpsi[:, None]
        G = Ad.T @ A
        # Newton on F, as the general route, until a step is below 1e-2 standard errors
        # (the path into the basin decides between several MAD roots at small n); then
        # on s(theta) F(theta), which has the same roots and is linear in theta on each
        # piece for Huber's psi (the same clipped points and median point): one step
        # lands on the root where F's own iteration takes two or three
        M = G + np.outer(u @ Ad - F, g) if near else G + np.outer(u @ Ad, g)
        d = np.sqrt(np.abs(M.diagonal())) + 1e-300
        Fd = F / d
        norm = math.sqrt(float(Fd @ Fd))
        if not math.isfinite(norm) or norm > 4.0 * norm_prev:
            return None
        norm_prev = norm
        dd = d[:, None] * d
        Gs = G / dd
        Mi, Gi = _inv_small(M / dd), _inv_small(Gs)
        if Mi is None or Gi is None:
            return None  # fewer than k points inside the quadratic part, say
        step = s * (Mi @ Fd) / d
        se = s * np.sqrt(np.abs(Gi.diagonal())) / d
        # the step in standard errors, s sqrt(diag G^-1), where it is not below 1e-14
        # relative (a loop over the k values: cheaper than array calls at this size)
        worst = 0.0
        for dj, ej, tj in zip(step.tolist(), se.tolist(), theta.tolist()):
            if not math.isfinite(dj):
                return None
            if abs(dj) > 1e-14 * abs(tj):
                worst = max(worst, abs(dj) / ej if ej > 0 else math.inf)
        if worst <= 1e-13:
            break  # the step to the root is negligible: this iterate is the solution
        # one more pass after a step below 1e-12 standard errors gives the scale and
        # psi there (the iteration contracts by far more than that per step here)
        done = worst <= 1e-12
        near = worst <= 1e-2
        smooth = smooth and not near
        theta = theta + step
    with np.errstate(all="ignore"):
        obj = loss.sum_rho(u, psi)
    obj = obj if math.isfinite(obj) else math.inf
    stats = {"psi": psi, "dpsi": dpsi, "u": u, "s": s}
    inner = _Inner(theta, r, obj, passes, True, "converged", stats)
    if _cond1(Gs, Gi) > _VERDICT_COND:
        # badly conditioned (x far from 0 against its spread, say): the root is known
        # only to cond * eps, and the solver's verdict (first-order and step tests)
        # decides, as on the general route; below this a root the step test accepted
        # passes both by orders of magnitude
        inner = _judged(prob, inner, loss, s)
    return inner, s, passes
