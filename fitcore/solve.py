r"""The fitting engine: one front door, :func:`fit`, and the solvers behind it.

Problem
-------
With weights from the analyst's standard uncertainties ``sigma_i`` (1 when none are
given), the whitened residuals are ``r_i(theta) = (y_i - f(x_i, theta)) / sigma_i`` and
an M-estimate minimises ``sum_i rho(r_i / s)`` over the points that are used (not
excluded), for a loss ``rho`` and a residual scale ``s``.

Solvers
-------
* Least squares and the M-losses use one iteratively reweighted Gauss-Newton /
  Levenberg-Marquardt loop (:func:`_irls_lm`): at each iteration the robust weights
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
import threading
import warnings
from collections import OrderedDict
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import optimize, sparse

from . import uncertainty as unc
from .losses import LOSS_NAMES, Loss, get_loss, barron_rho
from .model import Model
from .partition import log_partition
from .result import FitResult
from .scale import mad, proposal2_scale


class FitError(ValueError):
    """The input cannot be fitted (explained in plain words)."""


# --------------------------------------------------------------------------- problem
@dataclass
class _Problem:
    """Whitened problem over the used points and the free parameters."""

    model: Model
    x: np.ndarray
    y: np.ndarray
    sig: np.ndarray
    free: np.ndarray  # bool mask over the model's parameters
    p_fixed: np.ndarray  # full-length vector holding the fixed values
    n_eval: int = 0
    unit: bool = False  # every sigma is 1 (no uncertainties given): skip the divisions

    @property
    def n(self) -> int:
        return self.x.size

    @property
    def k(self) -> int:
        return int(self.free.sum())

    def full(self, theta: np.ndarray) -> np.ndarray:
        p = self.p_fixed.copy()
        p[self.free] = theta
        return p

    def resid(self, theta: np.ndarray, with_jac: bool = False,
              scratch: "_Scratch | None" = None) -> np.ndarray:
        """Whitened residuals at theta. ``with_jac`` also evaluates the Jacobian in the
        same call where the model can share the work (kept for the next ``jac``).
        ``scratch``: work arrays to write the residuals (and f, J) into; the result is
        then overwritten by the next call with the same scratch."""
        self.n_eval += 1
        if self.model.is_linear:
            A = self.jac(theta)
            out = None if scratch is None else scratch.get("r", (self.n,))
            out = np.matmul(A, theta, out=out)
            return np.subtract(self.rhs(), out, out=out)  # one fresh array, not two
        with np.errstate(all="ignore"):
            if with_jac and self.model.f_jac is not None:
                p = self.full(theta)
                bufs = None if scratch is None else (
                    scratch.get("f", (self.n,)), scratch.get("J", (self.n, p.size), "F"))
                f, J = self.model.f_jac(self.x, p, out=bufs)
                key = np.asarray(theta, dtype=float).tobytes()
                held = None if scratch is None else (scratch, scratch.stamp("J"))
                self._jac_at = (key, J, held)
                if scratch is not None:
                    self._f_at = (key, f, scratch, scratch.stamp("f"))
            else:
                f = self.model.f(self.x, self.full(theta))
            f = np.asarray(f, dtype=float)
            out = None if scratch is None else scratch.get("r", (self.n,))
            r = np.subtract(self.y, f, out=out)
            return r if self.unit else np.divide(r, self.sig, out=r)

    def kept_f(self, theta: np.ndarray) -> np.ndarray | None:
        """The model values at theta from the last pass that wrote them into a
        scratch array, while it still holds them; else None."""
        kept = getattr(self, "_f_at", None)
        if (kept is None or kept[0] != np.asarray(theta, dtype=float).tobytes()
                or not kept[2].holds("f", kept[3])):
            return None
        return kept[1]

    def rhs(self) -> np.ndarray:
        """Linear model: the whitened data less the held parameters' part (cached)."""
        b = getattr(self, "_b", None)
        if b is None:
            self.jac(None)
            b = self.y if self._offset is None else self.y - self._offset
            b = self._b = b if self.unit else b / self.sig
        return b

    def jac(self, theta: np.ndarray) -> np.ndarray:
        """Jacobian of the model values f/sigma w.r.t. the free parameters."""
        if self.model.is_linear:
            # constant for a linear model: build the (whitened) design matrix once, in
            # column-major order (the products over the points run faster on columns)
            cached = getattr(self, "_design", None)
            if cached is None:
                with np.errstate(all="ignore"):
                    A = np.asarray(self.model.basis(self.x), dtype=float).reshape(self.n, -1)
                all_free = bool(self.free.all())
                cached = A if all_free else A[:, self.free]
                if not self.unit:
                    cached = cached / self.sig[:, None]
                self._design = np.asfortranarray(cached)
                self._offset = None if all_free else A[:, ~self.free] @ self.p_fixed[~self.free]
                cached = self._design
            return cached
        kept = getattr(self, "_jac_at", None)
        if (kept is not None and kept[0] == np.asarray(theta, dtype=float).tobytes()
                and (kept[2] is None or kept[2][0].holds("J", kept[2][1]))):
            J = np.asarray(kept[1], dtype=float)
        else:
            with np.errstate(all="ignore"):
                J = np.asarray(self.model.jac(self.x, self.full(theta)), dtype=float)
        J = J.reshape(self.n, -1)
        if not self.free.all():
            J = J[:, self.free]
        return J if self.unit else J / self.sig[:, None]

    @property
    def lower(self):
        return np.asarray(self.model.lower, dtype=float)[self.free]

    @property
    def upper(self):
        return np.asarray(self.model.upper, dtype=float)[self.free]


@dataclass
class _Inner:
    theta: np.ndarray
    r: np.ndarray
    objective: float
    n_iter: int
    converged: bool
    message: str
    stats: dict | None = None  # psi and psi' at the solution, when the solver has them


class _Scratch:
    """Named work arrays reused by the Newton passes, within a solve and across solves.

    A fresh array of the data's size costs a page fault per 4 KiB on first touch
    (large blocks come straight from the operating system), which on 1e5 points costs
    as much as the arithmetic on it. The Newton passes write into these arrays
    instead, so whatever is read from one is overwritten by the next pass or solve on
    the same thread: a solve's final arrays (residuals, psi, psi') are valid only
    until the next solve of the same size. ``fit`` uses them before it returns and
    hands out fresh arrays; a Jacobian kept in a scratch array is checked by its
    stamp before reuse (:meth:`_Problem.jac`).
    """

    def __init__(self):
        self._arrays: dict[str, np.ndarray] = {}
        self._stamps: dict[str, object] = {}

    def get(self, name: str, shape: tuple, order: str = "C") -> np.ndarray:
        a = self._arrays.get(name)
        if a is None or a.shape != shape or (order == "F" and not a.flags.f_contiguous):
            a = self._arrays[name] = np.empty(shape, order=order)
        return a

    def stamp(self, name: str) -> object:
        """A new token for the contents just written to ``name``."""
        token = self._stamps[name] = object()
        return token

    def holds(self, name: str, token: object) -> bool:
        """True while ``name`` still holds what was written when ``token`` was made."""
        return self._stamps.get(name) is token


_POOL = threading.local()
_POOL_SIZES = 3  # problem sizes whose scratch a thread keeps (most recently used)
_POOL_MAX_POINTS = 200000  # larger problems get a scratch of their own per solve


def _scratch_for(n: int) -> _Scratch:
    """The calling thread's scratch for problems of ``n`` points.

    At most ``_POOL_SIZES`` sizes up to ``_POOL_MAX_POINTS`` points are kept (some
    13 MB for a three-parameter model on 1e5 points); :func:`_release_scratch` drops
    them.
    """
    if n > _POOL_MAX_POINTS:
        return _Scratch()
    pools = getattr(_POOL, "by_n", None)
    if pools is None:
        pools = _POOL.by_n = OrderedDict()
    sc = pools.pop(n, None) or _Scratch()
    pools[n] = sc
    while len(pools) > _POOL_SIZES:
        pools.popitem(last=False)
    return sc


def _release_scratch() -> None:
    """Drop the calling thread's kept scratch arrays."""
    _POOL.by_n = OrderedDict()


def _objective(loss: Loss, r: np.ndarray, s: float) -> float:
    with np.errstate(all="ignore"):
        v = float(np.sum(loss.rho(r / s)))
    return v if math.isfinite(v) else math.inf


def _project(theta, lower, upper):
    """Keep a parameter vector strictly inside its bounds."""
    if not (np.any(np.isfinite(lower)) or np.any(np.isfinite(upper))):
        return theta
    t = np.clip(theta, lower, upper)
    tiny = 1e-12 * np.maximum(np.abs(t), 1e-300)
    t = np.where(t <= lower, lower + np.maximum(tiny, 1e-300), t)
    t = np.where(t >= upper, upper - np.maximum(tiny, 1e-300), t)
    return t


class _StepSolver:
    """Solves the damped, reweighted Gauss-Newton step for one iteration.

    ``min ||sqrt(w) (r - J step)||^2 + lam ||D step||^2`` in the column-scaled variables
    ``z = D step``. Small problems, and any problem whose scaled Gram matrix has a
    condition number above 1e8, use a QR factorisation of ``sqrt(w) J``. Large
    well-conditioned problems use a Cholesky factorisation of the scaled normal
    equations: with cond <= 1e8 their forward error is below ~1e-8 of the step, and
    the next iteration (fresh residuals) corrects it, like iterative refinement.
    """

    FAST_MIN_ROWS = 4000
    FAST_MAX_COND = 1e8

    def __init__(self, Jw: np.ndarray, rw: np.ndarray, D: np.ndarray):
        self.D = D
        Js = Jw / D
        self.fast = False
        if Jw.shape[0] >= self.FAST_MIN_ROWS:
            G = Js.T @ Js
            ev = np.linalg.eigvalsh(G)
            if ev[0] > 0 and ev[-1] <= self.FAST_MAX_COND * ev[0]:
                self.fast = True
                self.G = G
                self.g = Js.T @ rw
        if not self.fast:
            Q, R = np.linalg.qr(Js, mode="reduced")
            self.R = R
            self.qtr = Q.T @ rw
            self.G = R.T @ R
            self.g = R.T @ self.qtr

    def solve(self, lam: float) -> np.ndarray:
        k = self.D.size
        if self.fast:
            z = np.linalg.solve(self.G + lam * np.eye(k), self.g)
        elif lam > 0:
            M = np.vstack([self.R, math.sqrt(lam) * np.eye(k)])
            z = np.linalg.lstsq(M, np.concatenate([self.qtr, np.zeros(k)]), rcond=None)[0]
        else:
            z = np.linalg.lstsq(self.R, self.qtr, rcond=None)[0]
        return z / self.D

    def predicted_decrease(self, step: np.ndarray) -> float:
        """Decrease of 1/2 ||sqrt(w)(r - J step)||^2 predicted for ``step``."""
        z = step * self.D
        return float(z @ self.g - 0.5 * z @ self.G @ z)


def _irls_lm(prob: _Problem, theta: np.ndarray, loss: Loss, s: float, *,
             linear: bool, max_iter: int = 500, xtol: float = 1e-13,
             ftol: float = 1e-15, polish_steps: bool = True) -> _Inner:
    """Minimise sum rho(r(theta)/s) by reweighted, damped Gauss-Newton steps.

    The damping follows Nielsen's gain-ratio rule (Madsen, Nielsen & Tingleff, *Methods
    for non-linear least squares problems*, 2004): the gain ratio compares the actual
    decrease of the robust objective with the decrease predicted by the reweighted
    quadratic model. After convergence a few undamped steps polish the solution.
    """
    lower, upper = prob.lower, prob.upper
    theta = _project(np.asarray(theta, dtype=float).copy(), lower, upper)
    r = _start_residuals(prob, theta)
    phi = _objective(loss, r, s)
    if not math.isfinite(phi):
        with np.errstate(all="ignore"):
            umax = float(np.max(np.abs(r / s)))
        raise FitError(
            f"the loss ({loss.describe()}) is not finite at the start values: it overflows for "
            f"residuals of {umax:.3g} scale units; give a larger fixed scale, or choose a "
            f"loss that grows more slowly (alpha <= 2)"
        )
    # reweighted steps of a linear model go undamped while they descend (they do for
    # every loss whose weight psi(u)/u does not grow with |u|); after an uphill one the
    # damped rule takes over, as for a nonlinear model
    undamped = linear
    lam = 0.0 if linear else None
    nu = 2.0
    dmax = np.zeros(theta.size)
    message = "converged"
    converged = False
    polish = 0
    last_scaled = math.inf
    it = 0
    for it in range(1, max_iter + 1):
        J = prob.jac(theta)
        if not np.all(np.isfinite(J)):
            return _Inner(theta, r, phi, it, False,
                          "the model's derivatives are not finite at the current parameters")
        w = loss.weight(r / s)
        sw = np.sqrt(np.maximum(w, 0.0))
        Jw = J * sw[:, None]
        rw = r * sw
        d2 = np.einsum("ij,ij->j", Jw, Jw)
        dmax = np.maximum(dmax, d2)
        D = np.sqrt(np.where(dmax > 0, dmax, 1.0))
        step_solver = _StepSolver(Jw, rw, D)
        if lam is None:
            lam = 1e-3  # relative to diag(J^T W J) through D
        accepted = False
        for _ in range(80):
            use_lam = 0.0 if (polish or undamped) else lam
            step = step_solver.solve(use_lam)
            cand = _project(theta + step, lower, upper)
            step = cand - theta
            r_new = prob.resid(cand)
            phi_new = _objective(loss, r_new, s) if np.all(np.isfinite(r_new)) else math.inf
            pred = step_solver.predicted_decrease(step) / (s * s)
            gain = (phi - phi_new) / pred if pred > 0 else (1.0 if phi_new <= phi else -1.0)
            # while polishing, the objective is flat to rounding along ill-conditioned
            # directions: accept a Gauss-Newton step that does not raise it beyond that
            # (and a reweighted step of a linear model descends in exact arithmetic: near
            # the minimum its objective change drowns in rounding, so the same applies)
            tol_phi = 1e-12 * phi if (polish or undamped) else 0.0
            if phi_new <= phi + tol_phi and (gain > 0 or phi_new < phi or polish or undamped):
                accepted = True
                if not undamped and not polish:
                    lam *= max(1.0 / 3.0, 1.0 - (2.0 * gain - 1.0) ** 3) if gain > 0 else 1.0
                    nu = 2.0
                break
            if polish:
                break
            if undamped:
                # uphill: the reweighted quadratic does not bound this loss from above
                # (weights growing with |u|, as the general loss has beyond alpha = 2)
                undamped, lam, nu = False, 1e-3, 2.0
                continue
            lam *= nu
            nu *= 2.0
            if lam > 1e30:
                break
        if not accepted:
            if polish or undamped or lam > 1e30:
                converged = True
                if not polish and not undamped:
                    message = "converged (no further decrease possible in double precision)"
                break
            continue
        scaled = np.linalg.norm(D * step)
        small_step = scaled <= xtol * (np.linalg.norm(D * cand) + xtol)
        small_gain = (phi - phi_new) <= ftol * max(phi, 1e-300)
        theta, r, phi = cand, r_new, phi_new
        if phi == 0.0:
            converged = True
            message = "converged (exact fit)"
            break
        if polish:
            polish += 1
            stalled = polish > 4 and scaled >= 0.9 * last_scaled
            last_scaled = scaled
            if scaled <= 1e-15 * (np.linalg.norm(D * cand) + 1e-15) or polish > 40 or stalled:
                converged = True
                break
            continue
        if small_step or (small_gain and scaled <= 1e-11 * (np.linalg.norm(D * cand) + 1e-11)):
            if linear or not polish_steps:
                converged = True
                break
            polish = 1  # a few undamped steps to reach full accuracy
    else:
        message = f"did not converge in {max_iter} iterations"
    return _Inner(theta, r, phi, it, converged, message)


def _refine_linear_ls(prob: _Problem, theta: np.ndarray, steps: int = 8):
    """Iterative refinement of a linear least-squares solution (Bjorck 1967).

    Refines ``x`` and ``r`` of the augmented system ``r + A x = b, A^T r = c`` with its
    residuals accumulated in extended precision (numpy's longdouble) and corrections
    solved with the QR factors of A. This reaches full double accuracy on
    ill-conditioned problems with large residuals (NIST Wampler 4/5, Filip), where a
    single QR solve loses digits in proportion to cond(A)^2. The same refinement with
    ``b = 0, c = -I`` gives ``(A^T A)^-1`` for the covariance.

    Returns ``(theta, r, inv_ata)``, or None where extended precision is unavailable
    or A is numerically singular.
    """
    ld = np.longdouble
    if np.finfo(ld).eps >= np.finfo(float).eps:  # no extended precision on this platform
        return None
    from scipy.linalg import solve_triangular

    x_ld = prob.x.astype(ld)
    try:
        with np.errstate(all="ignore"):
            A_ld = np.asarray(prob.model.basis(x_ld)).astype(ld).reshape(prob.n, -1)
    except Exception:  # noqa: BLE001 - a basis that cannot take longdouble input
        A_ld = np.asarray(prob.model.basis(prob.x), dtype=float).astype(ld).reshape(prob.n, -1)
    sig = prob.sig.astype(ld)
    b_ld = prob.y.astype(ld)
    if np.any(~prob.free):
        b_ld = b_ld - A_ld[:, ~prob.free] @ prob.p_fixed[~prob.free].astype(ld)
    b_ld = b_ld / sig
    A_ld = A_ld[:, prob.free] / sig[:, None]
    A = A_ld.astype(float)
    if not np.all(np.isfinite(A)):
        return None
    d = np.sqrt(np.einsum("ij,ij->j", A, A))
    d = np.where(d > 0, d, 1.0)
    Q, R = np.linalg.qr(A / d, mode="reduced")
    diag = np.abs(np.diag(R))
    if diag.min() <= 1e-14 * diag.max():
        return None
    k = prob.k
    # right-hand sides: column 0 is the fit, columns 1..k give (A^T A)^-1
    B = np.zeros((prob.n, k + 1), dtype=ld)
    B[:, 0] = b_ld
    Cc = np.zeros((k, k + 1), dtype=ld)
    Cc[:, 1:] = -np.eye(k, dtype=ld)
    Ri = solve_triangular(R, np.eye(k))
    X = np.empty((k, k + 1))
    X[:, 0] = theta
    X[:, 1:] = (Ri @ Ri.T) / np.outer(d, d)
    X = X.astype(ld)
    Rr = B - A_ld @ X
    for _ in range(steps):
        F = (B - Rr - A_ld @ X).astype(float)
        G = ((Cc - A_ld.T @ Rr).astype(float)) / d[:, None]
        H = solve_triangular(R, G, trans="T")
        dZ = solve_triangular(R, Q.T @ F - H)
        dX = dZ / d[:, None]
        dR = F - (A / d) @ dZ
        X = X + dX.astype(ld)
        Rr = Rr + dR.astype(ld)
        if np.all(np.abs(dX) <= 1e-17 * np.abs(X.astype(float)) + 1e-300):
            break
    Xf = X.astype(float)
    inv = Xf[:, 1:]
    return Xf[:, 0], (b_ld - A_ld @ X[:, 0]).astype(float), 0.5 * (inv + inv.T)


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


def _start_residuals(prob: _Problem, theta: np.ndarray) -> np.ndarray:
    """The residuals at the start values; a FitError in plain words where the model
    cannot be evaluated there."""
    r = prob.resid(theta)
    if not np.all(np.isfinite(r)):
        badmask = ~np.isfinite(r)
        bad = int(np.sum(badmask))
        xs = ", ".join(f"{v:.6g}" for v in prob.x[badmask][:3])
        raise FitError(
            f"the model cannot be evaluated at the start values: it gives a non-finite "
            f"value at {bad} of {r.size} points (x = {xs}{', ...' if bad > 3 else ''}); "
            f"check that x lies where the model is defined (e.g. doses >= 0 for a "
            f"log-logistic curve) or give other start values"
        )
    return r


# --------------------------------------------------------------------------- scale
def _safe_scale(s: float, r: np.ndarray, prob: _Problem) -> float:
    if s > 0 and math.isfinite(s):
        return s
    alt = float(np.std(r))
    if alt > 0 and math.isfinite(alt):
        return alt
    ref = float(np.max(np.abs(prob.y / prob.sig))) if prob.n else 1.0
    return max(ref, 1.0) * 1e-12


def _robust_with_scale(prob: _Problem, theta, loss: Loss, s0: float, *, linear: bool,
                       auto: bool, max_iter: int, rule: str = "proposal2",
                       quick: bool = False) -> tuple[_Inner, float, int]:
    """M-estimate at a fixed scale, or jointly with an automatic scale.

    With ``auto`` the parameters and the scale are alternated (loose inner tolerance)
    until the scale is stable to 1e-10; a final solve at that scale runs to full
    accuracy. ``rule="proposal2"`` is Huber's proposal 2 (efficient, for monotone
    losses; the update is accelerated by a secant step on ``s -> proposal2(s)``);
    ``rule="mad"`` re-estimates the normalised MAD of the residuals (50 % breakdown,
    used with redescending losses, as statsmodels' RLM does).
    """
    if auto and rule == "mad":
        return _robust_with_mad(prob, theta, loss, s0, linear=linear, max_iter=max_iter,
                                quick=quick)
    s = _safe_scale(s0, prob.resid(theta), prob)
    total = 0
    if auto:
        loose = dict(xtol=1e-9, ftol=1e-12, polish_steps=False)
        inner = _irls_lm(prob, theta, loss, s, linear=linear, max_iter=max_iter, **loose)
        total += inner.n_iter
        prev = None  # (s, g(s)) of the previous update, for the secant step
        for _ in range(100):
            g = _safe_scale(proposal2_scale(inner.r, loss, s, prob.k), inner.r, prob)
            if abs(g - s) <= 1e-10 * s:
                s = g
                break
            s_next = g
            if prev is not None:
                # secant on h(s) = g(s) - s: converges much faster than the plain
                # fixed point when the (s, theta) coupling is strong
                (s1, _g1), h0, h1 = prev, g - s, prev[1] - prev[0]
                if h1 != h0:
                    cand = s - h0 * (s - s1) / (h0 - h1)
                    if 0.5 * min(s, g) < cand < 2.0 * max(s, g):
                        s_next = cand
            prev = (s, g)
            s = s_next
            inner = _irls_lm(prob, inner.theta, loss, s, linear=linear, max_iter=max_iter, **loose)
            total += inner.n_iter
        theta = inner.theta
    inner = _irls_lm(prob, theta, loss, s, linear=linear, max_iter=max_iter)
    total += inner.n_iter
    return inner, s, total


def _mad_and_gradient(r: np.ndarray, J: np.ndarray, smooth: bool = True,
                      work: _Scratch | None = None):
    """Normalised MAD about zero, ``1.4826 median|r|``, and its gradient w.r.t. theta.

    The median of ``|r|`` is attained at one point (two for even n, averaged), so the
    MAD is piecewise linear in the parameters: ``d|r_k|/dtheta = -sign(r_k) J_k``
    (r = y - f, J = df/dtheta). With many points the pieces are very short (the gap
    between neighbouring order statistics), and that one-point slope says nothing
    about a longer step. ``smooth=True`` averages the slope over the points whose
    ``|r|`` lies within ``w = ceil(n^(2/3))`` ranks of the median (over every
    ``n // 50000``-th point when n is larger): the derivative of the median of the
    whole residual distribution, which is what a Newton step of more than a few pieces
    needs. The value is exact either way. ``work`` supplies the scratch arrays.
    """
    from .scale import MAD_CONSTANT

    n = r.size
    h = n // 2
    # the smoothed slope is a kernel estimate: beyond 50 000 points a regular thinning
    # of the points estimates it as well, at a fraction of the cost
    step = max(1, n // 50000)
    m = -(-n // step)
    w = int(math.ceil(m ** (2.0 / 3.0)))
    smooth = smooth and m >= 20 and m // 2 - w >= 0 and m // 2 + w < m
    # |r| in point order is needed afterwards only by the one-point slope and by an
    # unthinned window; otherwise the selection may reorder it in place
    keep_order = not smooth or step == 1
    def buf(name, size):
        return np.empty(size) if work is None else work.get(name, (size,))

    a = np.abs(r, out=buf("mad_a", n))
    if keep_order:
        p = buf("mad_p", n)
        p[...] = a
    else:
        p = a
    p.partition(h)
    upper = float(p[h])
    med = upper if n % 2 else 0.5 * (float(p[:h].max()) + upper)
    if smooth:
        if step == 1:
            hm = h
            low_half, high_half = p[:h], p[h + 1:]  # views of our own copy: reorder in place
            at = a
        else:
            at = np.abs(r[::step], out=buf("mad_at", m))
            thin = buf("mad_thin", m)
            thin[...] = at
            hm = m // 2
            thin.partition(hm)
            low_half, high_half = thin[:hm], thin[hm + 1:]
        low_half.partition(hm - w)
        high_half.partition(w - 1)
        lo, hi = low_half[hm - w], high_half[w - 1]
        idx = np.flatnonzero((at >= lo) & (at <= hi)) * step
    else:
        vals = [upper] if n % 2 else [float(p[:h].max()), upper]
        # the points that attain the middle values (a tie picks the first; the gradient
        # is then one of the equally valid one-sided ones)
        idx = np.array([int(np.flatnonzero(a == v)[0]) for v in vals])
    grad = -(np.sign(r[idx]) @ J[idx]) / idx.size
    return MAD_CONSTANT * med, MAD_CONSTANT * grad


def _mad_into(r: np.ndarray, work: _Scratch) -> float:
    """``mad(r)`` with the absolute values in a scratch array."""
    a = np.abs(r, out=work.get("mad_a", (r.size,)))
    if not np.isfinite(a).all():
        return mad(r)
    from .scale import MAD_CONSTANT, median

    return MAD_CONSTANT * median(a, overwrite=True)


_HESSIAN_ROWS_FROM = 200000  # from this many points the Newton matrix uses a subset


def _newton_with_mad(prob: _Problem, theta, s: float, loss: Loss, max_iter: int = 30,
                     with_mad: bool = True, tol: float = 1e-4):
    """Newton's method on the M-estimating equations with the scale tied to the MAD.

    Solves ``F(theta) = sum psi(r_i / s(theta)) J_i = 0`` where ``s(theta)`` is the
    normalised MAD of the residuals at theta, so every iterate carries its own exact
    MAD scale. The Jacobian is the Gauss-Newton one, ``-(J^T D J + (J^T D u) g^T) / s``
    with ``D = diag psi'(u)`` and ``g = ds/dtheta`` (smoothed while the steps are long,
    see :func:`_mad_and_gradient`). Both equations are piecewise smooth, so from a
    nearby start (a subsample's fit) the iteration settles in a few steps.

    One pass over the data per iteration. When the Newton step from an iterate is
    below ``tol/10`` standard errors that iterate is returned as it is (its scale and
    psi are exactly its own; the step is the distance to the root); when it is below
    ``tol`` the step is taken and one more pass gives the scale and psi there. psi and
    psi' at the solution are returned in ``stats`` for the covariance. Returns None if
    the iteration does not settle (the caller then falls back to the reweighting loop).
    ``with_mad=False`` keeps the scale ``s`` fixed. ``tol``: the last step's size in
    standard errors at which the iteration counts as converged.

    From ``_HESSIAN_ROWS_FROM`` points on, the Newton matrix (``J^T D J``, ``J^T D u``
    and the MAD slope) comes from a fixed seeded subset of ``max(10000, n/20)`` points,
    scaled up: an inexact Newton method. The equations themselves (``sum psi J`` and
    the MAD) are always over every point, so the solution is the same; the iteration
    then contracts by a factor of some 50 per step instead of quadratically, and each
    pass over all points costs only residuals, psi and one product.
    """
    lower, upper = prob.lower, prob.upper
    theta = np.asarray(theta, dtype=float)
    n, k = prob.n, prob.k

    def _converged(theta, r, s, u, psi, dpsi):
        with np.errstate(all="ignore"):
            obj = loss.sum_rho(u, psi)
        obj = obj if math.isfinite(obj) else math.inf
        stats = {"psi": psi, "dpsi": dpsi, "u": u, "s": s}  # (u = r / s)
        return _Inner(theta, r, obj, it, True, "converged", stats)

    norm_prev = math.inf
    done = False
    smooth = True
    work = _scratch_for(n)  # reused by every pass (fresh large arrays cost page faults)
    iu, ju = np.triu_indices(k)
    Q = None  # products J_i J_j (i <= j): J^T D J is then one matrix-vector product
    constant_J = prob.model.is_linear
    rows = None
    if n >= _HESSIAN_ROWS_FROM:
        m = max(10000, n // 20)
        rows = _sample_rows(n, m, 20190612)
        up = n / m
    for it in range(max_iter + 1):
        r = prob.resid(theta, with_jac=True, scratch=work)
        J = prob.jac(theta)
        if with_mad:
            if done or rows is not None:  # the value over all points; slope below
                s_new, g = _mad_into(r, work), None
            else:
                s_new, g = _mad_and_gradient(r, J, smooth, work)
            if not (s_new > 0 and math.isfinite(s_new)):
                return None
            s = s_new
        u = np.divide(r, s, out=work.get("u", (n,)))
        pd_out = (work.get("psi", (n,)), work.get("dpsi", (n,)), work.get("t", (n,)))
        if done:
            psi, dpsi = loss.psi_dpsi(u, out=pd_out)
            return _converged(theta, r, s, u, psi, dpsi), s, it
        if rows is not None:
            psi = loss.psi(u)
            F = psi @ J
            Js, us = J[rows], u[rows]
            if with_mad:
                _, g = _mad_and_gradient(r[rows], Js, True)
            dps = loss.dpsi(us)
            Jd = Js * dps[:, None]
            G = (Jd.T @ Js) * up
            M = G + np.outer((us @ Jd) * up, g) if with_mad else G
        else:
            psi, dpsi = loss.psi_dpsi(u, out=pd_out)
            dpsi_here = dpsi
            if Q is None or not constant_J:
                if Q is None:
                    Q = work.get("Q", (n, iu.size), "F")
                for col, (i, j) in enumerate(zip(iu, ju)):
                    np.multiply(J[:, i], J[:, j], out=Q[:, col])
            G = np.empty((k, k))
            G[iu, ju] = dpsi @ Q
            G[ju, iu] = G[iu, ju]
            F = psi @ J
            if with_mad:
                M = G + np.outer(np.multiply(dpsi, u, out=pd_out[2]) @ J, g)
            else:
                M = G
        d = np.sqrt(np.abs(np.diag(M))) + 1e-300
        norm = float(np.linalg.norm(F / d))
        if not math.isfinite(norm) or norm > 4.0 * norm_prev:
            return None
        norm_prev = norm
        try:
            step = s * np.linalg.solve(M / d / d[:, None], F / d) / d
        except np.linalg.LinAlgError:
            return None
        if not np.all(np.isfinite(step)):
            return None
        new_theta = _project(theta + step, lower, upper)
        step = new_theta - theta
        # step size in units of each parameter's standard error, s sqrt(diag G^-1)
        # (G = J^T D J; correlated parameters have far larger errors than 1/sqrt(G_jj))
        try:
            se = s * np.sqrt(np.abs(np.diag(np.linalg.inv(G / d / d[:, None])))) / d
        except np.linalg.LinAlgError:
            se = s / d
        with np.errstate(all="ignore"):
            in_se = np.where(se > 0, np.abs(step) / se, np.inf)
        rel = np.abs(step) <= 1e-10 * np.abs(theta)
        if bool(np.all(rel | (in_se <= 0.1 * tol))):
            # the step to the root is negligible (1e-5 standard errors by default): this
            # iterate is the solution, with its scale and psi exactly its own, and no
            # further pass is needed
            dpsi_all = dpsi_here if rows is None else loss.dpsi(u)
            return _converged(theta, r, s, u, psi, dpsi_all), s, it
        # converged once a step is below ``tol`` standard errors (1e-4 by default) or
        # 1e-10 relative: the iteration contracts by 50x or more per step here, so the
        # error left after it is some 1e-6 standard errors, far below anything a result
        # shows; one more pass gives the scale and psi there
        done = bool(np.all(rel | (in_se <= tol)))
        smooth = smooth and not bool(np.all(rel | (in_se <= 1e-2)))  # (full matrix only)
        theta = new_theta
    return None


def _is_minimum(prob: _Problem, inner: _Inner, s: float) -> bool:
    """True when ``J^T diag(psi') J`` is positive definite at the solution."""
    dpsi = (inner.stats or {}).get("dpsi")
    if dpsi is None:
        return False
    J = prob.jac(inner.theta)
    G = (J * dpsi[:, None]).T @ J
    d = np.sqrt(np.abs(np.diag(G))) + 1e-300
    try:
        ev = np.linalg.eigvalsh(G / d / d[:, None])
    except np.linalg.LinAlgError:
        return False
    return bool(ev[0] > 1e-10 * max(ev[-1], 1e-300))


_SCALE_JUMP = 1.5


def _newton_accepted(prob: _Problem, theta, s: float, loss: Loss):
    """:func:`_newton_with_mad` from (theta, s), kept only if it settles, and for a
    redescending psi only at a minimum (positive definite curvature), not a saddle,
    whose scale is at most ``_SCALE_JUMP`` times the start's.

    With many one-sided outliers the MAD equations have a second root inside the
    outliers, with a scale several times larger; from a robust start a Newton step
    can jump there, while the reweighting loop stays with the majority. Starts come
    from L1-type fits, whose scale is if anything too large, so a root with a much
    larger scale is the other one and the loop decides instead.
    """
    got = _newton_with_mad(prob, theta, s, loss)
    if got is None:
        return None
    if loss.redescending and (got[1] > _SCALE_JUMP * s or not _is_minimum(prob, got[0], got[1])):
        return None
    return got


_EXACT = 1e-13  # a MAD below this fraction of max |y| (whitened) counts as zero


def _exact_floor(prob: _Problem) -> float:
    ref = float(np.max(np.abs(prob.y / prob.sig))) if prob.n else 0.0
    return _EXACT * ref if ref > 0 and math.isfinite(ref) else 1e-300


def _exact_fit(prob: _Problem, theta, loss: Loss, floor: float, *, linear: bool,
               max_iter: int, total: int) -> tuple[_Inner, float, int] | None:
    """More than half of the residuals are zero (to rounding): the MAD scale is 0.

    Exact or synthetic data, or very few points (an L1 start interpolates p of them).
    The M-estimate then tends to the fit through that exact majority, and points off
    it get weight 0; the scale carries no information about scatter, so the caller
    reports no uncertainties. The fit is solved at the floor scale; None if its
    residuals are then not mostly zero after all.
    """
    inner = _irls_lm(prob, theta, loss, floor, linear=linear, max_iter=max_iter)
    if not mad(inner.r) <= floor:
        return None
    stats = dict(inner.stats or {}, exact=True)
    msg = "converged (more than half of the points lie exactly on the curve)"
    return (_Inner(inner.theta, inner.r, inner.objective, inner.n_iter, inner.converged, msg,
                   stats), floor, total + inner.n_iter)


def _robust_with_mad(prob: _Problem, theta, loss: Loss, s0: float, *, linear: bool,
                     max_iter: int, quick: bool = False) -> tuple[_Inner, float, int]:
    floor = _exact_floor(prob)
    r0 = prob.resid(theta)
    if mad(r0) <= floor:
        got = _exact_fit(prob, theta, loss, floor, linear=linear, max_iter=max_iter, total=0)
        if got is not None:
            return got
    s = _safe_scale(s0, r0, prob)
    if quick and prob.n >= 200:
        # a warm start for later stages: Newton straight from the robust start values
        got = _newton_accepted(prob, theta, s, loss)
        if got is not None:
            return got
    loose = dict(xtol=1e-9, ftol=1e-12, polish_steps=False)
    inner = _irls_lm(prob, theta, loss, s, linear=linear, max_iter=max_iter, **loose)
    total = inner.n_iter
    if prob.n >= 200:
        # from here Newton on the joint equations settles in a few steps; for a
        # redescending psi its root counts only where the curvature is positive
        # definite there (a minimum, not a saddle), else the alternation below decides
        got = _newton_accepted(prob, inner.theta, _safe_scale(mad(inner.r), inner.r, prob), loss)
        if got is not None:
            return got[0], got[1], total + got[2]
    def next_scale(inner, total):
        """The MAD of the fit's residuals, or the exact fit when it is zero."""
        g = mad(inner.r)
        if g <= floor:
            got = _exact_fit(prob, inner.theta, loss, floor, linear=linear,
                             max_iter=max_iter, total=total)
            if got is not None:
                return g, got
        return _safe_scale(g, inner.r, prob), None

    newton_tries = 3 if prob.n >= 200 else 0
    for _ in range(60):
        g, exact = next_scale(inner, total)
        if exact is not None:
            return exact
        if abs(g - s) <= 1e-10 * s:
            s = g
            break
        if newton_tries and abs(g - s) <= 0.05 * s:
            # near the fixed point now (Newton failed from further away, e.g. when the
            # scale still had far to fall): try it again rather than creep there
            newton_tries -= 1
            got = _newton_accepted(prob, inner.theta, g, loss)
            if got is not None:
                return got[0], got[1], total + got[2]
        s = g
        inner = _irls_lm(prob, inner.theta, loss, s, linear=linear, max_iter=max_iter, **loose)
        total += inner.n_iter
    # tight phase: full-accuracy solves until the MAD fixed point is reproduced exactly
    # enough that the result does not depend on the path (e.g. the order of the points)
    for _ in range(10):
        inner = _irls_lm(prob, inner.theta, loss, s, linear=linear, max_iter=max_iter)
        total += inner.n_iter
        g, exact = next_scale(inner, total)
        if exact is not None:
            return exact
        if abs(g - s) <= 1e-14 * s:
            break
        if abs(g - s) > 1e-6 * s and _ == 9:
            # no fixed point reached: return the fit with the scale it was solved at
            # (a pair that belongs together), marked as not converged
            msg = (f"the MAD scale did not settle (it moved from {s:.6g} to {g:.6g} in the "
                   f"last round); give a fixed scale or check the data")
            inner = _Inner(inner.theta, inner.r, inner.objective, inner.n_iter, False, msg,
                           inner.stats)
            break
        s = g
    return inner, s, total


# --------------------------------------------------------------------------- adaptive
def _nll(r: np.ndarray, alpha: float, log_c: float) -> float:
    c = math.exp(log_c)
    n = r.size
    with np.errstate(all="ignore"):
        v = float(np.sum(barron_rho(r / c, alpha, 1.0))) + n * log_c + n * log_partition(alpha)
    return v if math.isfinite(v) else math.inf


def _ml_shape_scale(r: np.ndarray, alpha: float, c: float, c_floor: float):
    """Maximum-likelihood (alpha, c) for fixed residuals; alpha in [0, 2], c >= c_floor."""
    lo_c = math.log(c_floor)
    hi_c = math.log(max(10.0 * float(np.max(np.abs(r))), 10.0 * c, c_floor * 10.0))

    def best_c(a, start):
        f = lambda lc: _nll(r, a, lc)  # noqa: E731
        res = optimize.minimize_scalar(f, bounds=(lo_c, hi_c), method="bounded",
                                       options={"xatol": 1e-10})
        lc = float(res.x)
        val = float(res.fun)
        if f(start) < val and lo_c <= start <= hi_c:
            lc, val = start, f(start)
        return lc, val

    cache = {}

    def prof(a):
        a = float(min(max(a, 0.0), 2.0))
        if a not in cache:
            cache[a] = best_c(a, math.log(max(c, c_floor)))
        return cache[a][1]

    res = optimize.minimize_scalar(prof, bounds=(0.0, 2.0), method="bounded",
                                   options={"xatol": 1e-7})
    cands = [float(res.x), 0.0, 2.0, float(alpha)]
    a_best = min(cands, key=prof)
    lc, val = cache[float(min(max(a_best, 0.0), 2.0))]
    return float(a_best), math.exp(lc), val, prof


def _fit_adaptive(prob: _Problem, theta, s0: float, *, linear: bool, max_iter: int,
                  warm: tuple[float, float] | None = None):
    if warm is None:
        ref = get_loss("pseudo_huber")
        inner, s, total = _robust_with_scale(prob, theta, ref, s0, linear=linear, auto=True,
                                             max_iter=max_iter)
        alpha, c = 1.0, s
    else:
        alpha, c = warm
        s, total = c, 0
        inner = _irls_lm(prob, theta, get_loss("general", tuning=1.0, alpha=alpha), c,
                         linear=linear, max_iter=max_iter, xtol=1e-9, polish_steps=False)
    c_floor = max(1e-6 * s, 1e-300)
    nll_old = math.inf
    prof = None
    for _ in range(60):
        alpha, c, nll, prof = _ml_shape_scale(inner.r, alpha, c, c_floor)
        loss = get_loss("general", tuning=1.0, alpha=alpha)
        inner = _irls_lm(prob, inner.theta, loss, c, linear=linear, max_iter=max_iter)
        total += inner.n_iter
        nll = _nll(inner.r, alpha, math.log(c))
        if abs(nll_old - nll) <= 1e-11 * max(abs(nll), 1.0):
            break
        nll_old = nll
    alpha, c, nll, prof = _ml_shape_scale(inner.r, alpha, c, c_floor)
    loss = get_loss("general", tuning=1.0, alpha=alpha)
    inner = _irls_lm(prob, inner.theta, loss, c, linear=linear, max_iter=max_iter)
    total += inner.n_iter
    # standard uncertainty of alpha from the curvature of the profile NLL
    alpha_se = None
    h = 1e-3
    if h < alpha < 2.0 - h:
        d2 = (prof(alpha + h) - 2 * prof(alpha) + prof(alpha - h)) / (h * h)
        if d2 > 0:
            alpha_se = 1.0 / math.sqrt(d2)
    info = {"nll": _nll(inner.r, alpha, math.log(c)), "c_floor": c_floor,
            "scale_at_floor": c <= c_floor * (1 + 1e-6)}
    return inner, loss, c, alpha, alpha_se, total, info


# --------------------------------------------------------------------------- front door
def _resolve(model) -> Model:
    if isinstance(model, Model):
        return model
    if isinstance(model, str):
        try:
            from .models import resolve_model
        except ImportError:  # catalogue not available: formulas only
            from .formula import parse_formula as resolve_model
        return resolve_model(model)
    raise FitError(f"a model must be a built-in name, a formula or a fitcore.Model, not {type(model).__name__}")


def _as_1d(name, v, n=None):
    try:
        a = np.asarray(v, dtype=float).ravel()
    except (TypeError, ValueError):
        raise FitError(f"{name} must be numbers") from None
    if n is not None and a.size != n:
        raise FitError(f"{name} has {a.size} values but x has {n}")
    return a


def fit(model, x, y, loss: str = "l2", *, scale="auto", alpha=None, sigma=None,
        excluded=None, p0=None, fixed=None, tuning=None, sigma_mode: str = "absolute",
        max_iter: int = 2000) -> FitResult:
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
    """
    if loss not in LOSS_NAMES:
        raise FitError(f"unknown loss {loss!r}; choose one of {', '.join(LOSS_NAMES)}")
    if sigma_mode not in ("relative", "absolute"):
        raise FitError("sigma_mode must be 'relative' or 'absolute'")
    try:
        mdl = _resolve(model)
    except FitError:
        raise
    except ValueError as e:  # formula and catalogue errors are ValueErrors with messages
        raise FitError(str(e)) from e
    try:
        loss_obj = get_loss(loss, tuning=tuning, alpha=alpha if loss != "adaptive" else None)
    except ValueError as e:
        raise FitError(str(e)) from e

    x = _as_1d("x", x)
    y = _as_1d("y", y, x.size)
    if x.size == 0:
        raise FitError("there are no points to fit")
    n_all = x.size
    excl = np.zeros(n_all, bool) if excluded is None else np.asarray(excluded, dtype=bool).ravel()
    if excl.size != n_all:
        raise FitError(f"the exclusion mask has {excl.size} entries but there are {n_all} points")
    sig_all = None
    if sigma is not None:
        sig_all = _as_1d("sigma", sigma, n_all)
    finite = np.isfinite(x) & np.isfinite(y)
    if sig_all is not None:
        bad_sig = ~(np.isfinite(sig_all) & (sig_all > 0)) & finite & ~excl
        if np.any(bad_sig):
            idx = np.flatnonzero(bad_sig)[:5] + 1
            raise FitError(
                f"sigma must be a positive number for every used point; points "
                f"{', '.join(map(str, idx))}{' ...' if bad_sig.sum() > 5 else ''} have "
                f"{'zero, negative or missing' } sigma"
            )
    used = finite & ~excl
    n_missing = int(np.sum(~finite))
    n_used = int(used.sum())
    if n_used == 0:
        raise FitError("all points are excluded or missing: restore some points to fit")

    # held parameters
    fixed = dict(fixed or {})
    unknown = set(fixed) - set(mdl.param_names)
    if unknown:
        raise FitError(f"cannot hold unknown parameter(s) {sorted(unknown)}; the model has "
                       f"{', '.join(mdl.param_names)}")
    free = np.array([n not in fixed for n in mdl.param_names])
    k = int(free.sum())
    if k == 0:
        raise FitError("every parameter is held: free at least one to fit")
    if n_used < k:
        pts = "1 point is" if n_used == 1 else f"{n_used} points are"
        raise FitError(f"the model has {k} free parameters but only {pts} used; "
                       f"restore points or hold parameters")

    all_used = n_used == n_all
    xu, yu = (x, y) if all_used else (x[used], y[used])
    if sig_all is None:
        sig_u = np.broadcast_to(1.0, (n_used,))  # read-only; never divided by (unit)
    else:
        sig_u = sig_all if all_used else sig_all[used]
    try:
        if n_used > 2000 and (p0 is None or isinstance(p0, dict)):
            # start values need no more than a few thousand points (a seeded subsample)
            pick = np.sort(np.random.default_rng(7).choice(n_used, 300, replace=False))
            start = mdl.start_values(xu[pick], yu[pick], p0)
        else:
            start = mdl.start_values(xu, yu, p0)
    except ValueError as e:
        raise FitError(str(e)) from e
    if not np.all(np.isfinite(start)):
        raise FitError("the start values are not all finite numbers")
    for name, v in fixed.items():
        start[mdl.param_names.index(name)] = float(v)
    prob = _Problem(mdl, xu, yu, sig_u, free, start.copy(), unit=sig_all is None)
    theta0 = start[free]
    linear = mdl.is_linear
    dof = n_used - k
    info: dict = {"n_missing": n_missing, "scale_fixed": not (isinstance(scale, str) and scale == "auto")}
    alpha_out = loss_obj.alpha if loss in ("general",) else None
    alpha_se = None
    absolute = sigma is not None and sigma_mode == "absolute"

    fixed_scale = None
    if not (isinstance(scale, str) and scale == "auto"):
        try:
            fixed_scale = float(scale)
        except (TypeError, ValueError):
            raise FitError(f"scale must be 'auto' or a positive number, not {scale!r}") from None
        if not (fixed_scale > 0 and math.isfinite(fixed_scale)):
            raise FitError(f"scale must be a positive number, not {scale!r}")
    elif absolute and loss not in ("l2", "l1", "adaptive"):
        fixed_scale = 1.0

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        if loss == "l2":
            inner = _irls_lm(prob, theta0, loss_obj, 1.0, linear=linear, max_iter=max_iter)
            refined = _refine_linear_ls(prob, inner.theta) if linear else None
            if refined is not None:
                th, r_th, inv_ata = refined
                info["inv_jtj"] = inv_ata
                inner = _Inner(th, r_th, 0.5 * float(r_th @ r_th), inner.n_iter, inner.converged,
                               "converged (least-squares solution with iterative refinement)")
            s = math.sqrt(float(np.sum(inner.r ** 2)) / dof) if dof > 0 else float("nan")
            scale_method = "residual standard deviation sqrt(RSS/(n - p))"
            n_iter = inner.n_iter
        elif loss == "l1":
            if linear:
                A = prob.jac(theta0)
                b = (yu - mdl.f(xu, prob.full(np.zeros(k))) ) / sig_u
                theta = _l1_linear(A, b, prob.lower, prob.upper)
                r = prob.resid(theta)
                inner = _Inner(theta, r, float(np.sum(np.abs(r))), 1, True, "converged (exact linear programme)")
            else:
                inner = _l1_nonlinear(prob, theta0, max_iter=max_iter)
            s = mad(inner.r)
            s = _safe_scale(s, inner.r, prob)
            scale_method = "normalised MAD of the residuals (does not affect the L1 estimate)"
            n_iter = inner.n_iter
        elif loss == "adaptive":
            warm = None
            if n_used > _LARGE:
                sub = _subproblem(prob)
                s_sub = _start_scale(sub, theta0, linear)
                w_inner, w_loss, w_c, w_alpha, _, w_it, _ = _fit_adaptive(
                    sub, theta0, s_sub, linear=linear, max_iter=max_iter)
                theta0, warm = w_inner.theta, (w_alpha, w_c)
            s0 = _start_scale(prob, theta0, linear)
            inner, loss_obj, s, alpha_out, alpha_se, n_iter, ainfo = _fit_adaptive(
                prob, theta0, s0, linear=linear, max_iter=max_iter, warm=warm)
            info.update(ainfo)
            scale_method = "Barron scale c by maximum likelihood (jointly with alpha)"
            if ainfo.get("scale_at_floor"):
                scale_method += "; held at its floor (residuals nearly exact)"
        else:
            start_theta = theta0
            n_iter = 0
            auto = fixed_scale is None
            if auto:
                scale_method = SCALE_METHOD[_scale_rule(loss_obj)]
            else:
                scale_method = ("fixed by the analyst" if not absolute or scale != "auto"
                                else "fixed at 1: sigma taken as absolute")
            s_start = fixed_scale
            warm_started = False
            if n_used > _LARGE:
                # the whole procedure on a subsample gives a robust start and scale, so
                # the full data need only a few iterations
                sizes = _stage_sizes(n_used, 2000 if linear else 1000)
                sub = _subproblem(prob, sizes[0])
                w_inner, w_s, w_it = _m_estimate(sub, start_theta, loss_obj, fixed_scale,
                                                 linear=linear, max_iter=max_iter,
                                                 quick=True)
                start_theta, n_iter, warm_started = w_inner.theta, w_it, True
                if auto:
                    s_start = w_s
                # larger subsamples in turn: each Newton pass there costs a fraction of
                # one over all the points, and each stage starts the next one closer
                for m in sizes[1:]:
                    # (a stage needs no more than a fraction of its own standard
                    # errors: the next stage's start error is several of them)
                    staged = _newton_with_mad(_subproblem(prob, m), start_theta, s_start,
                                              loss_obj, with_mad=auto, tol=1e-2)
                    if staged is None:
                        break
                    start_theta, n_iter = staged[0].theta, n_iter + staged[2]
                    if auto:
                        s_start = staged[1]
            if not warm_started:
                inner, s, it = _m_estimate(prob, start_theta, loss_obj, fixed_scale,
                                           linear=linear, max_iter=max_iter)
            else:
                rule = _scale_rule(loss_obj)
                if auto and rule == "mad":
                    got = _newton_with_mad(prob, start_theta, s_start, loss_obj)
                else:
                    got = _newton_with_mad(prob, start_theta, s_start, loss_obj, with_mad=False)
                if got is None:
                    got = _robust_with_scale(prob, start_theta, loss_obj, s_start,
                                             linear=linear, auto=auto, max_iter=max_iter,
                                             rule=rule)
                inner, s, it = got
            n_iter += it

    theta = inner.theta
    r = inner.r
    p_full = prob.full(theta)
    converged, message = inner.converged, inner.message

    # ---------------------------------------------------------------- covariance
    cov_free = np.full((k, k), np.nan)
    recipe = ""
    try:
        Jf = prob.jac(theta)
        if loss == "l2":
            cov_free, recipe = unc.cov_least_squares(Jf, r, dof, absolute=absolute,
                                                     inv_jtj=info.pop("inv_jtj", None))
        elif loss == "l1":
            cov_free, recipe = unc.cov_l1(Jf, r)
        else:
            st = inner.stats or {}
            cov_free, recipe = unc.cov_m_estimate(Jf, None if "psi" in st else r / s, s, loss_obj, dof,
                                                  psi=st.get("psi"), dpsi=st.get("dpsi"),
                                                  absolute=absolute and loss != "adaptive")
    except unc.RankDeficient as e:
        converged = False
        message = f"{e}; the estimates are not unique (hold a parameter or add points)"
        recipe = recipe or "not available"
    if (inner.stats or {}).get("exact"):
        cov_free = np.full((k, k), np.nan)
        message += ("; the robust scale is zero, so the uncertainties cannot be estimated "
                    "from the scatter (give sigma or a fixed scale); points off the curve "
                    "get weight 0")
    if dof <= 0:
        message += "; no degrees of freedom left, so uncertainties cannot be estimated"
        cov_free = np.full((k, k), np.nan)
    cov = np.zeros((mdl.n_params, mdl.n_params))
    idx = np.flatnonzero(free)
    cov[np.ix_(idx, idx)] = cov_free
    stderr = np.sqrt(np.maximum(np.diag(cov), 0.0))
    stderr[np.isnan(np.diag(cov))] = np.nan

    # ---------------------------------------------------------------- per point
    with np.errstate(all="ignore"):
        kept_f = None if linear or not all_used else prob.kept_f(theta)
        if linear and all_used and prob.unit and free.all():
            fitted = prob.jac(theta) @ theta  # the design the fit used: no rebuild
        elif kept_f is not None:
            fitted = kept_f.copy()  # the solver's last pass computed exactly these
        else:
            fitted = np.asarray(mdl.f(x, p_full), dtype=float)
    residuals = y - fitted
    with np.errstate(all="ignore"):
        if not s > 0:
            std_res = residuals * np.nan
        elif sig_all is None:
            std_res = residuals / s
        else:
            std_res = residuals / sig_all / s
    if loss == "l2":
        w_used = np.ones(n_used)
    else:
        st = inner.stats or {}
        u_kept = st.get("u") if st.get("s") == s else None  # r / s, when the solver kept it
        w_used = np.asarray(loss_obj.weight(r / s if u_kept is None else u_kept), dtype=float)
        np.clip(w_used, 0.0, 1.0, out=w_used)
    if all_used:
        weights = w_used
    else:
        weights = np.zeros(n_all)
        weights[used] = w_used
    n_down = int(np.count_nonzero(w_used < 0.5))
    sigma_kind = "none" if sigma is None else sigma_mode
    rss = float(r @ r)
    return FitResult(
        model=mdl, loss=loss, param_names=mdl.param_names, values=p_full, stderr=stderr,
        covariance=cov, weights=weights, residuals=residuals, std_residuals=std_res,
        fitted=fitted, x=x.copy(), y=y.copy(),
        sigma=None if sig_all is None else sig_all.copy(), excluded=excl.copy(),
        scale=float(s), scale_method=scale_method, alpha=alpha_out,
        tuning=loss_obj.tuning, covariance_recipe=recipe, converged=bool(converged),
        message=message, n_used=n_used, n_excluded=int(excl.sum()), n_downweighted=n_down,
        dof=dof, fixed={kk: float(v) for kk, v in fixed.items()}, n_iter=int(n_iter),
        objective=float(inner.objective), sigma_mode=sigma_kind, rss=rss,
        alpha_stderr=alpha_se, info=info,
    )


_LARGE = 20000  # above this many used points, robust fits start from a subsample fit
_SUBSAMPLE = 4000


def _stage_sizes(n: int, first: int, factor: int = 12, margin: int = 6) -> list[int]:
    """Subsample sizes for the large-data warm start: ``first``, then ``factor`` times
    larger while a stage stays ``margin`` times smaller than the data."""
    sizes = [first]
    while sizes[-1] * factor * margin <= n:
        sizes.append(sizes[-1] * factor)
    return sizes


@lru_cache(maxsize=16)
def _sampled_rows(n: int, m: int, seed: int) -> np.ndarray:
    idx = np.sort(np.random.default_rng(seed).choice(n, size=m, replace=False))
    idx.flags.writeable = False  # shared by every caller
    return idx


def _sample_rows(n: int, m: int, seed: int) -> np.ndarray:
    """``m`` of ``range(n)`` drawn without replacement by a seeded generator, sorted
    (the same draw for the same arguments; cached, as drawing costs a permutation)."""
    return _sampled_rows(int(n), int(m), int(seed))


def _subproblem(prob: _Problem, m: int = _SUBSAMPLE) -> _Problem:
    """A deterministic random subsample of the used points (seeded, reproducible)."""
    idx = _sample_rows(prob.n, min(m, prob.n), 20190611)
    return _Problem(prob.model, prob.x[idx], prob.y[idx], prob.sig[idx], prob.free, prob.p_fixed,
                    unit=prob.unit)


def _scale_rule(loss: Loss) -> str:
    return "mad"


SCALE_METHOD = {
    "proposal2": "normalised MAD start, refined by Huber's proposal 2 (n - p degrees of freedom)",
    "mad": "normalised MAD of the residuals, re-estimated to convergence",
}


def _m_estimate(prob: _Problem, theta, loss: Loss, fixed_scale, *, linear: bool, max_iter: int,
                quick: bool = False):
    """M-estimate from a plain start.

    With an automatic scale, redescending losses start from the exact L1 fit of a
    linear model (up to 2000 points) or else from a near-L1 fit (:func:`_near_l1`), and
    from the MAD of its residuals; a Huber start with the MAD re-estimated follows
    one-sided outliers, and from about 30 % of them its grown scale lets a
    redescending loss accept them (tests/fitcore/test_breakdown.py). With a fixed
    scale they start from a Huber fit at that scale. The MAD scale rule is used
    throughout: a proposal-2 scale has too low a breakdown point to keep a quarter of
    gross outliers from inflating it.
    ``quick=True`` (the large-data warm start, refined by later stages anyway) skips
    the L1 start and tries Newton's method straight from the robust start values.
    """
    auto = fixed_scale is None
    n_iter = 0
    rule = _scale_rule(loss)
    exact_l1 = False
    if auto and linear and prob.n <= 2000 and not quick:
        theta, exact_l1 = _l1_linear_start(prob, theta)
    s_start = _start_scale(prob, theta, linear) if auto else fixed_scale
    if loss.redescending and auto:
        # the start must not follow the outliers, nor its scale: an L1 fit (exact, or
        # near-L1 below) and the MAD of its residuals
        if not exact_l1:
            pre = _near_l1(prob, theta, s_start, linear=linear, max_iter=max_iter)
            theta, n_iter = pre.theta, pre.n_iter
            s_start = _safe_scale(mad(pre.r), pre.r, prob)
    elif loss.redescending:
        pre, s_pre, n_iter = _robust_with_scale(prob, theta, get_loss("huber"), s_start,
                                                linear=linear, auto=False, max_iter=max_iter,
                                                rule=rule, quick=quick)
        theta = pre.theta
    inner, s, it = _robust_with_scale(prob, theta, loss, s_start, linear=linear, auto=auto,
                                      max_iter=max_iter, rule=rule, quick=quick)
    return inner, s, n_iter + it


def _l1_linear_start(prob: _Problem, theta0) -> tuple[np.ndarray, bool]:
    """The exact L1 fit of a linear model, and whether it was found."""
    A = prob.jac(theta0)
    b = prob.rhs()
    try:
        return _l1_linear(A, b, prob.lower, prob.upper), True
    except FitError:
        return theta0, False


_NEAR_L1_TUNING = 0.05


def _near_l1(prob: _Problem, theta, s: float, *, linear: bool, max_iter: int) -> _Inner:
    """A near-L1 start for a redescending loss: Huber with ``k = 0.05`` at the scale
    ``s`` held fixed, to loose tolerances (1e-4 relative step, 1e-7 relative gain).

    Its psi is bounded and almost the sign of the residual, so like L1 it is pulled
    by how many points lie on each side, not by how far; the scale is held, so it
    cannot grow with the outliers and let them back in (a Huber start with the MAD
    re-estimated does that from about 30 % of one-sided gross outliers; see
    tests/fitcore/test_breakdown.py). Cheaper than an exact nonlinear L1 fit.
    """
    return _irls_lm(prob, theta, get_loss("huber", tuning=_NEAR_L1_TUNING), s, linear=linear,
                    max_iter=max_iter, xtol=1e-4, ftol=1e-7, polish_steps=False)


def _start_scale(prob: _Problem, theta, linear: bool) -> float:
    r = prob.resid(theta)
    return _safe_scale(mad(r), r, prob)


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
