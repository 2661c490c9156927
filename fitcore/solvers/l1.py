"""Least absolute deviations: exact linear programmes (HiGHS) for linear models and
sequential linear programming with a trust region for nonlinear ones."""
from __future__ import annotations

import math

import numpy as np
from scipy import optimize, sparse

from .problem import FitError, _Inner, _Problem, _project, _start_residuals


# --------------------------------------------------------------------------- L1
_L1_DIRECT_MAX = 6000  # up to this many points one LP over all of them


def _pow2(v: float) -> float:
    """The power of two nearest below ``v`` (1 when v is 0 or not finite): scaling by
    it is exact in floating point."""
    if not (v > 0 and math.isfinite(v)):
        return 1.0
    return math.ldexp(1.0, math.frexp(v)[1] - 1)


def _lad_dual(A, b, lo, hi, g=None):
    """Solve ``min sum |b - A t| (+ g^T t)`` over ``lo <= t <= hi`` through its dual.

    The dual, ``max b^T d + lo^T mu - hi^T nu`` subject to ``A^T d + mu - nu = g``,
    ``-1 <= d <= 1``, ``mu, nu >= 0`` (one mu per finite lower bound, one nu per finite
    upper bound), has k equality constraints instead of n and is solved much faster
    than the primal with its 2n slack columns; t is the (negated) multiplier vector of
    its equality constraints. Returns t, or None when HiGHS gives no usable answer.
    """
    n, k = A.shape
    fl, fh = np.flatnonzero(np.isfinite(lo)), np.flatnonzero(np.isfinite(hi))
    c = np.concatenate([-b, -lo[fl], hi[fh]])
    if fl.size or fh.size:
        E = np.zeros((k, fl.size + fh.size))
        E[fl, np.arange(fl.size)] = 1.0
        E[fh, fl.size + np.arange(fh.size)] = -1.0
        Aeq = np.hstack([A.T, E])
    else:
        Aeq = A.T
    bounds = np.empty((n + fl.size + fh.size, 2))
    bounds[:n] = (-1.0, 1.0)
    bounds[n:] = (0.0, np.inf)
    beq = np.zeros(k) if g is None else g
    res = optimize.linprog(c, A_eq=Aeq, b_eq=beq, bounds=bounds, method="highs")
    if res.status != 0 or res.eqlin is None:
        return None
    t = -np.asarray(res.eqlin.marginals, dtype=float)
    return t if np.all(np.isfinite(t)) else None


def _lad_primal(A, b, lo, hi):
    """The primal LP ``min 1^T (e+ + e-)``, ``A t + e+ - e- = b`` (the fallback)."""
    n, k = A.shape
    c = np.concatenate([np.zeros(k), np.ones(2 * n)])
    eye = sparse.identity(n, format="csr")
    Aeq = sparse.hstack([sparse.csr_matrix(A), eye, -eye], format="csr")
    bounds = [(a if np.isfinite(a) else None, z if np.isfinite(z) else None)
              for a, z in zip(lo, hi)] + [(0, None)] * (2 * n)
    res = optimize.linprog(c, A_eq=Aeq, b_eq=b, bounds=bounds, method="highs")
    if res.status != 0:
        raise FitError(f"the L1 linear programme failed: {res.message}")
    return res.x[:k]


def _lad_globbed(A, b, lo, hi):
    """Exact L1 fit of many points by Portnoy and Koenker's preprocessing (*Statistical
    Science* 12, 1997, section 4): an L1 fit of a seeded subsample of about
    ``(k n)^(2/3)`` points predicts the sign of most residuals; the points confidently
    above (below) the fit are merged into one linear term ``g^T t`` of the objective
    (their residuals' sum, whose sign is then fixed), and only the band of uncertain
    points goes into the LP. The answer is checked on every point: where a merged
    point's residual has the wrong sign it goes back into the band and the LP is
    solved again, so the result is the exact L1 solution of all the points."""
    n, k = A.shape
    m = min(n, max(2000, int(2.0 * (k * n) ** (2.0 / 3.0))))
    pick = np.sort(np.random.default_rng(20240611).choice(n, m, replace=False))
    t = _lad_dual(A[pick], b[pick], lo, hi)
    if t is None:
        return None
    band = min(n, 2 * m)
    for _ in range(8):
        r = b - A @ t
        order = np.argsort(r, kind="stable")
        mid = n // 2
        # the points nearest the median of the residuals go into the LP (the L1 fit has
        # about as many residuals above as below it)
        a = max(0, mid - band // 2)
        z = min(n, a + band)
        a = max(0, z - band)
        keep = np.zeros(n, bool)
        keep[order[a:z]] = True
        hi_set = np.zeros(n, bool)
        hi_set[order[z:]] = True
        low_set = ~(keep | hi_set)
        for _ in range(8):
            g = -(A[hi_set].sum(axis=0) - A[low_set].sum(axis=0))
            t_new = _lad_dual(A[keep], b[keep], lo, hi, g=g)
            if t_new is None:
                return None
            r = b - A @ t_new
            tol = 1e-10 * (1.0 + np.abs(b))
            wrong = (hi_set & (r < -tol)) | (low_set & (r > tol))
            n_wrong = int(wrong.sum())
            t = t_new
            if n_wrong == 0:
                return t
            if n_wrong > 0.1 * band:
                break  # the band was too narrow: widen it and start again
            keep |= wrong
            hi_set &= ~wrong
            low_set &= ~wrong
        band = min(n, 2 * band)
        if band >= n:
            return _lad_dual(A, b, lo, hi)
    return None


def _l1_linear(A: np.ndarray, b: np.ndarray, lower, upper) -> np.ndarray:
    """Exact least-absolute-deviations fit ``min sum |b - A theta|`` by linear programming.

    An L1 minimiser need not be unique (a whole edge of the LP can be optimal); the rows
    are put in a canonical order first so that the vertex returned does not depend on
    the order of the points in the file.

    HiGHS's feasibility and optimality tolerances are absolute (about 1e-7), so the LP
    is posed in normalised units: b less a least-squares fit, divided by the median of
    those residuals, and each column of A divided by its root mean square (powers of
    two, so the scaling itself is exact); the bounds follow. The answer is then
    equivariant under rescaling y or x (y of 1e-12 and of 1e12 give the same fit).
    """
    A = np.asarray(A, dtype=float)
    b = np.asarray(b, dtype=float)
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    if not (np.all(np.isfinite(A)) and np.all(np.isfinite(b))):
        raise FitError("the L1 linear programme got non-finite model values or "
                       "derivatives; check that x lies where the model is defined")
    order = np.lexsort(np.vstack([b[None, :], A.T[::-1]]))
    A, b = A[order], b[order]
    n, k = A.shape
    dA = np.array([_pow2(v) for v in np.sqrt(np.einsum("ij,ij->j", A, A) / max(n, 1))])
    As = A / dA
    with np.errstate(all="ignore"):
        t0 = np.linalg.lstsq(As, b, rcond=None)[0]
    t0 = np.where(np.isfinite(t0), t0, 0.0)
    theta0 = np.clip(t0 / dA, lower, upper)
    theta0 = np.where(np.isfinite(theta0), theta0, 0.0)
    bc = b - A @ theta0
    ab = np.abs(bc)
    med = float(np.median(ab)) if n else 0.0
    sb = _pow2(med if med > 0 else (float(np.max(ab)) if n else 0.0))
    bs = bc / sb
    with np.errstate(all="ignore"):
        lo = (lower - theta0) * dA / sb
        hi = (upper - theta0) * dA / sb
    t = _lad_globbed(As, bs, lo, hi) if n > _L1_DIRECT_MAX else None
    if t is None:
        t = _lad_dual(As, bs, lo, hi)
    if t is None:
        t = _lad_primal(As, bs, lo, hi)
    return theta0 + t * sb / dA


def _l1_nonlinear(prob: _Problem, theta: np.ndarray, max_iter: int = 200) -> _Inner:
    """Sequential linear programming with a box trust region for min sum |r|.

    Each step is the exact L1 fit of the linearised residuals within the box. It stops
    when that step predicts no decrease (the point is stationary for the L1 objective:
    the linearised programme's optimum is the current point), when an accepted step is
    below 1e-12 of the parameters, or when the box has shrunk to rounding size. A model
    that is not finite at the start is a FitError (as for the other losses); non-finite
    values met later end the iterations with ``converged=False``.
    """
    theta = _project(np.asarray(theta, dtype=float).copy(), prob.lower, prob.upper)
    r = _start_residuals(prob, theta)
    obj = float(np.sum(np.abs(r)))
    delta = np.maximum(0.1 * np.abs(theta), 1e-3)
    converged, message = False, f"did not converge in {max_iter} iterations"
    it = 0
    for it in range(1, max_iter + 1):
        J = prob.jac(theta)
        if not np.all(np.isfinite(J)):
            return _Inner(theta, r, obj, it, False,
                          "the model's derivatives are not finite at the current parameters")
        lo = np.maximum(-delta, prob.lower - theta)
        hi = np.minimum(delta, prob.upper - theta)
        try:
            step = _l1_linear(J, r, lo, hi)
        except FitError as e:
            return _Inner(theta, r, obj, it, False, f"L1 step failed: {e}")
        if not np.all(np.isfinite(step)):
            return _Inner(theta, r, obj, it, False, "the L1 step is not finite")
        pred = obj - float(np.sum(np.abs(r - J @ step)))
        if pred <= 1e-13 * obj or np.all(np.abs(step) <= 1e-14 * (np.abs(theta) + 1e-14)):
            converged, message = True, "converged"
            break
        cand = _project(theta + step, prob.lower, prob.upper)
        r_new = prob.resid(cand)
        obj_new = float(np.sum(np.abs(r_new))) if np.all(np.isfinite(r_new)) else math.inf
        if obj_new < obj:
            ratio = (obj - obj_new) / pred
            small = np.all(np.abs(cand - theta) <= 1e-12 * (np.abs(theta) + 1e-12))
            theta, r, obj = cand, r_new, obj_new
            if ratio > 0.75:
                delta = delta * 2.0
            if small:
                converged, message = True, "converged"
                break
        else:
            delta = delta * 0.25
            if np.all(delta <= 1e-13 * (np.abs(theta) + 1e-13)):
                converged, message = True, "converged"
                break
    return _Inner(theta, r, obj, it, converged, message)


# --------------------------------------------------------------------------- small n
_LAD_SMALL_MAX = 400  # up to this many points a start's exact L1 fit is found here
_LAD_CERT_TOL = 1e-11  # relative slack of the optimality certificate (rounding)


def _weighted_median_row(r, ad, w):
    """The row where ``sum w_i |r_i - lam ad_i|`` is least along an edge: the
    weighted median of the break points ``r_i / ad_i`` with weights ``w_i |ad_i|``
    (the first at which the cumulative weight reaches half); None when no row moves."""
    nz = np.flatnonzero(ad)
    if nz.size == 0:
        return None
    q = r[nz] / ad[nz]
    order = np.argsort(q, kind="stable")
    c = np.cumsum((w[nz] * np.abs(ad[nz]))[order])
    return int(nz[order[int(np.searchsorted(c, 0.5 * c[-1]))]])


def _lad_small(A: np.ndarray, b: np.ndarray) -> np.ndarray | None:
    """Exact ``min sum |b - A t|`` for up to a few hundred points and a few columns,
    by descent from vertex to vertex: the simplex method of the L1 problem in the form
    Barrodale and Roberts gave it (SIAM J. Numer. Anal. 10, 1973), where each step
    goes along one edge as far as the objective falls, to a weighted median of the
    residuals' break points along that edge.

    A vertex is a fit through k of the points (the basis B, rows of the matrix M).
    Edge j frees basis point j and keeps the others on the fit (direction ``M^-1
    e_j``); the objective's slope along it is ``w_j - v_j`` (``w_j + v_j`` backwards)
    with ``v = (w sign r)^T A M^-1`` over the other points, so a vertex is optimal when
    ``|v_j| <= w_j`` for every j (the LP's dual certificate). The first k steps start
    from t = 0 and bring in one point each. Points that are exact repeats are merged
    into one with their count as the weight w, and the rows are put in a canonical
    order first (the vertex returned does not depend on the order of the points).

    Returns None, and the caller solves the linear programme, where the answer cannot
    be certified here: a rank-deficient design, a degenerate vertex (more than k
    points exactly on the fit, e.g. exactly collinear data), a badly conditioned
    basis, or no certificate within the iteration limit.
    """
    n, k = A.shape
    if k == 0 or n < k or n > _LAD_SMALL_MAX:
        return None
    order = np.lexsort(np.vstack([b[None, :], A.T[::-1]]))
    A, b = A[order], b[order]
    same = (b[1:] == b[:-1]) & np.all(A[1:] == A[:-1], axis=1)
    if same.any():
        first = np.flatnonzero(np.concatenate([[True], ~same]))
        w = np.diff(np.append(first, n)).astype(float)
        A, b = A[first], b[first]
    else:
        w = np.ones(n)
    m = b.size
    if m < k:
        return None
    dA = np.array([_pow2(v) for v in np.sqrt(np.einsum("ij,ij->j", A, A) / m)])
    As = A / dA
    absA = np.abs(As)
    basis = np.full(k, -1)
    M = np.eye(k)
    Minv = np.eye(k)
    t = np.zeros(k)
    r = b.copy()
    # first k steps: along each still-free unit direction to a point (t moves from 0)
    for j in range(k):
        d = Minv[:, j]
        ad = As @ d
        ad[basis[:j]] = 0.0
        i = _weighted_median_row(r, ad, w)
        if i is None:
            return None  # no point moves along this direction: rank deficient
        t = t + (r[i] / ad[i]) * d
        M[j] = As[i]
        basis[j] = i
        try:
            Minv = np.linalg.inv(M)
        except np.linalg.LinAlgError:
            return None
        r = b - As @ t
        r[basis[:j + 1]] = 0.0
    nonbasic = np.ones(m, bool)
    nonbasic[basis] = False
    for _ in range(20 * (m + k)):
        try:
            t = np.linalg.solve(M, b[basis])
        except np.linalg.LinAlgError:
            return None
        r = b - As @ t
        r[basis] = 0.0
        size = np.abs(b) + absA @ np.abs(t)  # the rounding scale of each residual
        if np.any(nonbasic & (np.abs(r) <= 1e-12 * size)):
            return None  # degenerate vertex: the certificate below would not be exact
        v = ((w * np.sign(r)) @ As) @ Minv
        wb = w[basis]
        excess = np.abs(v) - wb
        j = int(np.argmax(excess))
        if excess[j] <= _LAD_CERT_TOL * float(np.sum(w)):
            if np.abs(M).max() * np.abs(Minv).max() > 1e10:
                return None  # the certificate itself is not reliable
            return t / dA
        sgn = 1.0 if v[j] > 0 else -1.0
        d = sgn * Minv[:, j]
        ad = As @ d
        ad[basis] = 0.0
        ad[basis[j]] = sgn
        i = _weighted_median_row(r, ad, w)
        if i is None or i == basis[j]:
            return None  # no descent where the slope says there is one: rounding
        nonbasic[basis[j]] = True
        nonbasic[i] = False
        M[j] = As[i]
        basis[j] = i
        try:
            Minv = np.linalg.inv(M)
        except np.linalg.LinAlgError:
            return None
    return None


def _l1_linear_start(prob: _Problem, theta0) -> tuple[np.ndarray, bool]:
    """The exact L1 fit of a linear model, and whether it was found (small problems
    without bounds by :func:`_lad_small`, else, or where it cannot certify its answer,
    by the linear programme)."""
    A = prob.jac(theta0)
    b = prob.rhs()
    if (b.size <= _LAD_SMALL_MAX and not np.any(np.isfinite(prob.lower))
            and not np.any(np.isfinite(prob.upper))
            and np.all(np.isfinite(A)) and np.all(np.isfinite(b))):
        t = _lad_small(A, b)
        if t is not None:
            return t, True
    try:
        return _l1_linear(A, b, prob.lower, prob.upper), True
    except FitError:
        return theta0, False


_NEAR_L1_TUNING = 0.05
