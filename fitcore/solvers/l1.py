"""Least absolute deviations: exact linear programmes (HiGHS) for linear models and
sequential linear programming with a trust region for nonlinear ones."""
from __future__ import annotations

import math

import numpy as np
from .._lazy import LazyModule

from .problem import FitError, _Inner, _inv_small, _Problem, _project, _start_residuals

linalg = LazyModule("scipy.linalg", globals())  # lazy: 0.2 s to import, needed once a fit runs
optimize = LazyModule("scipy.optimize", globals())  # lazy: 0.4 s to import, needed once a fit runs
sparse = LazyModule("scipy.sparse", globals())  # lazy: 0.2 s to import, for the L1 fallback LP only


# --------------------------------------------------------------------------- L1
_L1_DIRECT_MAX = 6000  # up to this many points one LP over all of them


def _pow2(v: float) -> float:
    """The power of two nearest below ``v`` (1 when v is 0 or not finite): scaling by
    it is exact in floating point."""
    if not (v > 0 and math.isfinite(v)):
        return 1.0
    return math.ldexp(1.0, math.frexp(v)[1] - 1)


def _lad_dual(A, b, lo, hi, g=None, method="highs"):
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
    res = optimize.linprog(c, A_eq=Aeq, b_eq=beq, bounds=bounds, method=method)
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


#: Portnoy-Koenker band: the subsample has about ``_PK_SUB (k n)^(2/3)`` points, and the
#: band keeps the points whose residual from the subsample fit is within ``_PK_Z`` of its
#: prediction standard errors (widened by ``_PK_WIDEN`` where that missed a sign)
_PK_SUB = 1.0
_PK_Z = 3.0
_PK_WIDEN = 2.0
_PK_METHOD = "highs-ipm"
_PK_MIN = 500  # the fewest points in a band


def _row_hash(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """A pseudo-random 64-bit key per row computed from the row's values alone (the bits
    of b and of A's entries, mixed by splitmix64's finaliser): the subsample and the
    order of the rows given to the LPs follow it, so the answer does not depend on the
    order of the points (equal rows get equal keys, and are interchangeable)."""
    h = np.full(b.size, 0x9E3779B97F4A7C15, dtype=np.uint64)
    for col in (b, *A.T):
        v = np.ascontiguousarray(col, dtype=float) + 0.0  # (-0.0 and 0.0 alike)
        h ^= v.view(np.uint64)
        h ^= h >> np.uint64(30)
        h *= np.uint64(0xBF58476D1CE4E5B9)
        h ^= h >> np.uint64(27)
        h *= np.uint64(0x94D049BB133111EB)
        h ^= h >> np.uint64(31)
    return h


def _lad_globbed(A, b, lo, hi, guess=None):
    """Exact L1 fit of many points by Portnoy and Koenker's preprocessing (*Statistical
    Science* 12, 1997, section 4).

    An L1 fit of a seeded subsample of about ``(k n)^(2/3)`` points predicts the sign of
    most residuals. Its error at point i has the standard deviation
    ``se_i = (sparsity / 2) |R^-T a_i|`` (the L1 estimate's covariance
    ``(sparsity / 2)^2 (A_s^T A_s)^-1``, ``A_s = Q R`` the subsample's design; the
    sparsity ``1 / f(0)`` from the density of all n residuals near zero). The points
    whose residual is more than ``z se_i`` above (below) the subsample fit are merged
    into one linear term ``g^T t`` of the objective (their residuals' sum, whose sign is
    then taken as fixed), and only the band of the others goes into the LP: a few per
    cent of the points, the ones whose sign the subsample cannot tell. The answer is
    checked on every point: where a merged point's residual has the wrong sign it goes
    back into the band and the LP is solved again (the band widened when many did), so
    the result is the exact L1 solution of all the points.

    ``guess``: a solution known to lie close (a later step of sequential LP, which
    moves the parameters by a fraction of their standard errors) takes the place of
    the subsample's fit; the band and the check are the same.
    """
    n, k = A.shape
    key = _row_hash(A, b)

    def in_key_order(rows):
        return rows[np.argsort(key[rows], kind="stable")]

    def full():  # the LP over all the points (in the order of their keys; the dual
        # simplex, which ends on a vertex: HiGHS's automatic choice may stop 1e-11 short)
        rows = np.argsort(key, kind="stable")
        return _lad_dual(A[rows], b[rows], lo, hi, method="highs-ds")

    m = min(n, max(2000, int(_PK_SUB * (k * n) ** (2.0 / 3.0))))
    if m >= n:
        return full()
    pick = in_key_order(np.argpartition(key, m - 1)[:m])
    As = A[pick]
    t = (_lad_dual(As, b[pick], lo, hi, method=_PK_METHOD) if guess is None
         else np.clip(guess, lo, hi))
    R = np.linalg.qr(As, mode="r")
    if t is None or not (np.all(np.isfinite(R)) and np.min(np.abs(np.diag(R))) > 0):
        return full()
    r = b - A @ t
    ar = np.abs(r)
    # sparsity 1/f(0): the fraction of residuals within +-h of the fit over 2h, with h
    # the 2 % quantile of the nonzero |r| (the subsample fit's own error widens that
    # window a little, which only makes the band wider)
    nonzero = ar[ar > 0]
    if nonzero.size == 0:
        return t  # every point on the subsample's fit: sum |r| = 0, the minimum
    j = max(k + 1, nonzero.size // 50)
    if j >= nonzero.size:
        return full()
    h = float(np.partition(nonzero, j)[j])
    sparsity = 2.0 * h * n / (j + n - nonzero.size)
    with np.errstate(all="ignore"):
        AR = A @ linalg.solve_triangular(R, np.eye(k))  # rows a_i^T R^-1
        se = (0.5 * sparsity) * np.sqrt(np.einsum("ij,ij->i", AR, AR))
    if not np.all(np.isfinite(se)):
        return full()
    tol = 1e-10 * (1.0 + np.abs(b))
    z = _PK_Z
    for _ in range(6):
        keep = ar <= z * se
        if keep.sum() < min(n, _PK_MIN):
            keep[np.argpartition(ar, min(n, _PK_MIN) - 1)[:_PK_MIN]] = True
        if keep.sum() > n // 2:
            break
        hi_set = ~keep & (r > 0)
        low_set = ~keep & (r < 0)
        for _ in range(4):
            g = -(A.T @ (hi_set.astype(float) - low_set))
            band = in_key_order(np.flatnonzero(keep))
            t_new = _lad_dual(A[band], b[band], lo, hi, g=g, method=_PK_METHOD)
            if t_new is None:
                break  # infeasible: the band cannot balance the merged points' pull
            r_new = b - A @ t_new
            wrong = (hi_set & (r_new < -tol)) | (low_set & (r_new > tol))
            n_wrong = int(wrong.sum())
            if n_wrong == 0:
                return t_new
            if n_wrong > 0.02 * keep.sum():
                break  # the band was too narrow: widen it
            keep |= wrong
            hi_set &= ~wrong
            low_set &= ~wrong
        if guess is not None:
            return _lad_globbed(A, b, lo, hi)  # the guess was not close: the subsample's fit
        z *= _PK_WIDEN
    return full()


def _l1_linear(A: np.ndarray, b: np.ndarray, lower, upper, guess=None) -> np.ndarray:
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
    if A.shape[0] <= _L1_DIRECT_MAX:  # (the band path orders its own LPs' rows)
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
    if guess is not None:  # (a solution near which the answer lies: see _lad_globbed)
        with np.errstate(all="ignore"):
            guess = (np.asarray(guess, dtype=float) - theta0) * dA / sb
        if not np.all(np.isfinite(guess)):
            guess = None
    t = _lad_globbed(As, bs, lo, hi, guess) if n > _L1_DIRECT_MAX else None
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
            # (after the first step the next one is small: the large-n band path then
            # centres its band on no step instead of fitting a subsample first)
            step = _l1_linear(J, r, lo, hi, guess=np.zeros(theta.size) if it > 1 else None)
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
        Minv = _inv_small(M)
        if Minv is None:
            return None
        r = b - As @ t
        r[basis[:j + 1]] = 0.0
    absb = np.abs(b)
    slack = _LAD_CERT_TOL * float(w.sum())
    for _ in range(20 * (m + k)):
        # the fit through the basis points, with one step of iterative refinement (an
        # explicit inverse alone loses cond(M) eps of the residuals, units where x is
        # far from 0 against its spread)
        bb = b[basis]
        t = Minv @ bb
        t += Minv @ (bb - M @ t)
        r = b - As @ t
        r[basis] = 0.0
        # (a point on the fit other than the basis: within rounding of its residual)
        zero = np.abs(r) <= 1e-12 * (absb + absA @ np.abs(t))
        zero[basis] = False
        if zero.any():
            return None  # degenerate vertex: the certificate below would not be exact
        v = (((w * np.sign(r)) @ As) @ Minv).tolist()
        # the edge whose slope |v_j| - w_j is the most negative (the first of ties)
        excess = [abs(vj) - w[i] for vj, i in zip(v, basis.tolist())]
        j = max(range(k), key=excess.__getitem__)
        if excess[j] <= slack:
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
        M[j] = As[i]
        basis[j] = i
        Minv = _inv_small(M)
        if Minv is None:
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
