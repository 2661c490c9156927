r"""Covariance recipes for the estimates.

All recipes work on the *whitened* problem: residuals ``r_i = (y_i - f_i) / sigma_i``
(sigma_i = 1 when no uncertainties are given) and the Jacobian ``J`` of ``f / sigma``
with respect to the free parameters, over the points used in the fit.

``least squares``
    ``C = s^2 (J^T J)^{-1}`` with ``s^2 = RSS / (n - p)`` (NIST StRD convention); with
    sigma taken as absolute, ``C = (J^T J)^{-1}``.
``Huber H1``
    For M-estimates with scale ``s`` and standardised residuals ``u = r / s``:
    ``C = K^2 [s^2 sum psi(u)^2 / (n - p)] / m^2 (J^T J)^{-1}`` with
    ``m = mean psi'(u)`` and ``K = 1 + (p/n) var(psi'(u)) / m^2`` (Huber 1981, section
    7.6; statsmodels RLM's default "H1", with J in place of the design matrix for
    nonlinear models).
``model-based, absolute sigma``
    With sigma taken as absolute (known standard uncertainties) the scale is 1 and
    the spread of psi is not estimated from the data either, just as least squares
    then reports ``(J^T W J)^{-1}`` unscaled: ``C = s^2 E[psi(Z)^2] / E[psi'(Z)]^2
    (J^T J)^{-1}`` with the expectations at a standard normal Z (Huber 1981, 7.6, the
    asymptotic covariance at the model), i.e. ``(J^T W J)^{-1}`` divided by the loss's
    Gaussian efficiency.
``sandwich``
    ``C = s^2 A^{-1} B A^{-1} n/(n-p)``, ``A = sum psi'(u_i) J_i J_i^T``,
    ``B = sum psi(u_i)^2 J_i J_i^T`` (Huber 1967). Used when H1 is not defined
    (``m <= 0``, possible for redescending losses).
``L1 (sparsity)``
    ``C = tau^2 (J^T J)^{-1}``, ``tau = 1/(2 f(0))``; the sparsity ``1/f(0)`` is the L1
    slope of the sorted nonzero residuals nearest zero against their ranks, with the
    Hall-Sheather bandwidth (Siddiqui 1960; Koenker 2005, 3.4.2; R quantreg's
    ``summary.rq(se = "iid")``), the window kept off the extreme residuals.

The products ``(J^T J)^{-1}`` are formed from the SVD of ``J``, never from the normal
equations, so they keep their accuracy on ill-conditioned problems.
"""
from __future__ import annotations

import math

import numpy as np
from ._lazy import LazyModule

from .losses import Loss
from .solvers import small_la
from .scale import psi_slope_at_normal, psi_variance_at_normal

optimize = LazyModule("scipy.optimize", globals())  # lazy: 0.4 s to import, needed once a fit runs
special = LazyModule("scipy.special", globals())  # lazy: 0.3 s to import, needed once results are made

RECIPE_LS = "least squares: s^2 (J^T J)^-1, s^2 = RSS/(n - p)"
RECIPE_LS_ABS = "least squares with absolute sigma: (J^T W J)^-1, W = 1/sigma^2"
RECIPE_H1 = "Huber H1: K^2 s^2 [sum psi^2/(n - p)] / (mean psi')^2 (J^T J)^-1"
RECIPE_M_ABS = ("model-based, absolute sigma: s^2 E[psi^2]/E[psi']^2 (J^T W J)^-1, "
                "expectations at N(0, 1)")
RECIPE_SANDWICH = "sandwich: s^2 A^-1 B A^-1 n/(n - p), A = sum psi' J J^T, B = sum psi^2 J J^T"
RECIPE_L1 = ("L1: tau^2 (J^T J)^-1, tau = 1/(2 f(0)); sparsity 1/f(0) from the nonzero "
             "residuals nearest 0 (Koenker's iid recipe, Hall-Sheather bandwidth)")


_EPS = float(np.finfo(float).eps)


class RankDeficient(Exception):
    """The Jacobian does not determine all parameters."""


class CovarianceUnavailable(Exception):
    """The recipe could not be computed (the estimates stand; their uncertainties do not).

    ``complete``: the text is a whole statement for the analyst (what happened, what is
    still reported, what to do), not a reason to be completed by the caller.
    """

    def __init__(self, text: str, complete: bool = False):
        super().__init__(text)
        self.complete = complete


#: what an L1 fit still reports, and what the analyst can do, when its sparsity is unknown
_L1_NO_SPREAD_TAIL = ("The estimates are reported (a line or curve with the smallest sum of absolute "
                      "deviations) without standard uncertainties. Look at the residuals: exclude the "
                      "points that do not belong (with a reason), or fit with Huber or least squares, "
                      "or use bootstrap intervals, for uncertainties.")


def _l1_no_spread(what: str) -> CovarianceUnavailable:
    return CovarianceUnavailable(f"L1 cannot estimate standard uncertainties here: {what}. "
                                 + _L1_NO_SPREAD_TAIL, complete=True)


def inv_jtj(J: np.ndarray, rcond: float | None = None) -> np.ndarray:
    """``(J^T J)^{-1}`` from the SVD of J; raises RankDeficient when J is singular."""
    J = np.asarray(J, dtype=float)
    n, p = J.shape
    if p == 0:
        return np.zeros((0, 0))
    if n > 20000:
        # large n: the scaled Gram matrix is accurate enough when well conditioned
        # (column by column: thin matrix products are slow in OpenBLAS)
        G = np.empty((p, p))
        for i in range(p):
            for j in range(i, p):
                G[i, j] = G[j, i] = J[:, i] @ J[:, j]
        d = np.sqrt(np.diag(G))
        if np.any(d == 0) or not np.all(np.isfinite(d)):
            raise RankDeficient("a parameter has no effect on the model at the solution")
        G = G / np.outer(d, d)
        ev = np.linalg.eigvalsh(G)
        if ev[0] > 0 and ev[-1] <= 1e8 * ev[0]:
            return np.linalg.inv(G) / np.outer(d, d)
    # column scaling makes the rank decision independent of parameter units
    d = np.sqrt(np.einsum("ij,ij->j", J, J))
    if not (d.all() and np.isfinite(d).all()):  # (a zero or non-finite column)
        raise RankDeficient("a parameter has no effect on the model at the solution")
    Js = J / d
    # (numpy.linalg.svd's own LAPACK call without its wrapper's overhead: the same numbers)
    U, sv, Vt = small_la.svd_thin(Js)
    if not np.isfinite(sv).all():
        raise np.linalg.LinAlgError("SVD did not converge")  # (as numpy.linalg.svd raises)
    tol = (rcond if rcond is not None else max(n, p) * _EPS) * float(sv[0])
    if sv[-1] <= tol:
        raise RankDeficient("the parameters are not all identifiable (rank-deficient Jacobian)")
    V = Vt.T / sv
    return (V @ V.T) / (d[:, None] * d)  # (np.outer(d, d))


def cov_least_squares(J, r, dof: int, absolute: bool = False, inv_jtj=None):
    """Least-squares covariance; ``inv_jtj`` may pass a refined ``(J^T J)^-1``."""
    base = globals()["inv_jtj"](J) if inv_jtj is None else inv_jtj
    if absolute:
        return base, RECIPE_LS_ABS
    s2 = float(np.sum(r * r)) / dof if dof > 0 else float("nan")
    return s2 * base, RECIPE_LS


def cov_m_estimate(J, u, s: float, loss: Loss, dof: int, recipe: str = "auto", *,
                   psi=None, dpsi=None, absolute: bool = False):
    """H1 (default) or sandwich covariance for an M-estimate; see module docstring.

    ``psi`` and ``dpsi`` may pass ``loss.psi(u)`` and ``loss.dpsi(u)`` when the solver
    already has them (``u`` is then not used). ``absolute=True`` (sigma known) gives
    the model-based covariance instead.
    """
    J = np.asarray(J, dtype=float)
    n, p = J.shape
    if absolute:
        e1 = psi_slope_at_normal(loss)
        if not e1 > 0:
            raise RankDeficient("the loss's mean psi' at the normal model is not positive")
        return s * s * psi_variance_at_normal(loss) / (e1 * e1) * inv_jtj(J), RECIPE_M_ABS
    if psi is None:
        psi = loss.psi(u)
    if dpsi is None:
        dpsi = loss.dpsi(u)
    dpsi = np.asarray(dpsi, dtype=float)
    m = float(dpsi.sum()) / n  # (np.mean: the same sum and division)
    sig2_psi = s * s * float(psi @ psi) / dof if dof > 0 else float("nan")
    if recipe in ("auto", "H1") and m > 0.05:
        var_dpsi = max(float(dpsi @ dpsi) / n - m * m, 0.0)
        K = 1.0 + (p / n) * var_dpsi / (m * m)
        return (K * K * sig2_psi / (m * m)) * inv_jtj(J), RECIPE_H1
    if recipe == "H1":
        raise RankDeficient("H1 covariance undefined: mean psi' is not positive")
    A = (J * dpsi[:, None]).T @ J
    B = (J * (psi * psi)[:, None]).T @ J
    try:
        Ainv = np.linalg.inv(A)
    except np.linalg.LinAlgError:
        raise RankDeficient("the robust curvature matrix is singular") from None
    if not np.all(np.linalg.eigvalsh(0.5 * (A + A.T)) > 0):
        raise RankDeficient("the robust curvature matrix is not positive definite")
    factor = n / dof if dof > 0 else float("nan")
    return s * s * factor * (Ainv @ B @ Ainv), RECIPE_SANDWICH


def _hall_sheather(n: int) -> float:
    """Hall and Sheather's (1988) bandwidth at the median, 95 % level (R quantreg's
    ``bandwidth.rq(0.5, n, hs = TRUE)``, statsmodels' ``hall_sheather``)."""
    z = float(special.ndtri(0.975))  # normal quantile (what scipy.stats.norm.ppf evaluates)
    phi0 = 1.0 / math.sqrt(2.0 * math.pi)  # standard normal density at 0
    return n ** (-1.0 / 3.0) * z ** (2.0 / 3.0) * (1.5 * phi0 ** 2) ** (1.0 / 3.0)


def _lad_slope(t: np.ndarray, v: np.ndarray) -> float:
    """Slope of the L1 line fit of v on t (the dual LP by HiGHS, v scaled to order one)."""
    if v.size == 2:
        return float((v[1] - v[0]) / (t[1] - t[0]))
    sv = float(np.max(np.abs(v - np.median(v)))) or 1.0
    st = float(np.max(np.abs(t))) or 1.0
    A = np.c_[np.ones_like(t), t / st]
    # one solve, no retry with other HiGHS methods: highs-ds never returned on a
    # degenerate window (the two-sizes case is caught before, in l1_sparsity)
    res = optimize.linprog(-v / sv, A_eq=A.T, b_eq=np.zeros(2), bounds=(-1, 1), method="highs")
    if res.status != 0 or res.eqlin is None:  # no other slope is put in its place
        raise _l1_no_spread(
            "the spread of the residuals nearest zero (the L1 sparsity) could not be "
            f"computed (its linear programme stopped with solver status {res.status})")
    return float(-res.eqlin.marginals[1] * sv / st)


def l1_sparsity(r: np.ndarray, p: int) -> float:
    """``1/f(0)`` of the errors from the residuals of an L1 fit with p parameters.

    Koenker's recipe (*Quantile Regression*, 2005, section 3.4.2; R quantreg's
    ``summary.rq(se = "iid")``): drop the residuals that are zero at the L1 solution
    (the p interpolated points, ``pz`` of them), take the ``h + 1`` residuals nearest
    zero, ``h = max(p + 1, ceil(n * hall_sheather(n)))``, sort them, and fit their values
    against their ranks over the nonzero count by L1; the slope is the sparsity. Taking
    the residuals nearest zero, not the order statistics at ``0.5 +- h``, keeps outliers
    out: at n <= 12 the Hall-Sheather window spans nearly the whole sample. The window
    is further capped to leave out the two residuals farthest from zero, so one or two
    gross outliers can never enter it, even at n = 8. Raises CovarianceUnavailable (a
    whole statement for the analyst) when those residuals take only one or two values
    (no spread near zero: e.g. half of the points on a line, half offset from it) or
    when the linear program for the slope fails.
    """
    r = np.asarray(r, dtype=float)
    n = r.size
    a = np.abs(r)
    if n == 0 or not np.any(a > 0):
        return 0.0
    tol = max(1e-9 * float(np.median(a)), 1e-14 * float(np.max(a)))
    nz_mask = a > tol
    nz = int(nz_mask.sum())
    if nz < 2:
        # one nonzero residual (n = p + 1, or an exact fit up to rounding): the
        # difference quotient between it and the zeros, in rank steps of 1/nz
        return float(np.max(a[nz_mask])) if nz else 0.0
    pz = n - nz
    h = max(p + 1, int(math.ceil(n * _hall_sheather(n))))
    cnt = min(h + 1, nz)
    cnt = min(cnt, max(nz - 2, min(nz, 3)))
    rn = r[nz_mask]
    arn = np.abs(rn)
    if cnt < arn.size:
        # the cnt residuals nearest zero, ties at the cut by position (the set a stable
        # sort of all of them would give; one partition, not a sort of n values)
        kth = np.partition(arn, cnt - 1)[cnt - 1]
        below = np.flatnonzero(arn < kth)
        near = np.concatenate([below, np.flatnonzero(arn == kth)[: cnt - below.size]])
    else:
        near = np.arange(arn.size)
    v = np.sort(rn[near])
    sizes = _distinct(v)
    if sizes.size <= 2:
        # no spread near zero to measure: the slope of a step (or of a constant) is an
        # artefact of the ranks (0, so u = 0, or a degenerate programme HiGHS gives up on)
        size = _distinct(np.sort(np.abs(v)))
        shown = " and ".join(f"{w:.6g}" for w in size)
        raise _l1_no_spread(
            f"the residuals nearest the fit are all of size{'s' if size.size > 1 else ''} {shown}, "
            "as when half of the points lie on one line and half are offset from it, so their "
            "spread near zero (the L1 sparsity) cannot be measured and other lines may fit "
            "equally well")
    t = np.arange(pz + 1, pz + cnt + 1, dtype=float) / nz
    return max(_lad_slope(t, v), 0.0)


def _distinct(v: np.ndarray) -> np.ndarray:
    """The distinct values of sorted ``v``, values within rounding (1e-9 of the largest
    magnitude) counted as one."""
    tol = 1e-9 * float(np.max(np.abs(v)))
    keep = np.r_[True, np.diff(v) > tol]
    return v[keep]


def cov_l1(J, r):
    """``C = (sparsity / 2)^2 (J^T J)^-1`` (the median's ``tau (1 - tau) = 1/4``)."""
    J = np.asarray(J, dtype=float)
    n, p = J.shape
    sparsity = l1_sparsity(r, p)
    tau = 0.5 * sparsity
    return tau * tau * inv_jtj(J), RECIPE_L1
