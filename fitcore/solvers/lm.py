"""The reweighted, damped Gauss-Newton (Levenberg-Marquardt) loop and the iterative
refinement of linear least squares."""
from __future__ import annotations

import math

import numpy as np
from .._lazy import LazyModule

from ..losses import Loss
from .verdict import COSINE_TOL, STEP_REL, _first_order, _step_small
from .problem import (FitError, _all_finite, _Inner, _objective_u, _Problem, _project,
                      _start_residuals)

lapack = LazyModule("scipy.linalg.lapack", globals())  # lazy: 0.2 s to import, needed once a fit runs

# numpy's own kernels behind np.einsum (without ``optimize``), np.linalg.eigvalsh and
# np.linalg.solve: the same arithmetic without the Python wrappers, which at a few
# parameters cost more than the work (callers keep the wrappers' error rules, see
# _eigvalsh and _solve)
try:
    from numpy._core.multiarray import c_einsum as _einsum
except ImportError:  # (numpy < 2)
    _einsum = np.einsum
_umath_linalg = getattr(np.linalg, "_umath_linalg", None)


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
    __slots__ = ("D", "fast", "direct", "G", "g", "R", "qtr")

    def __init__(self, Jw: np.ndarray, rw: np.ndarray, D: np.ndarray):
        self.D = D
        self.fast = False
        if Jw.shape[0] >= self.FAST_MIN_ROWS:
            # (the scaled Gram matrix from J's own: no scaled copy of J, which at a
            # million points is as large as the data)
            G = (Jw.T @ Jw) / np.outer(D, D)
            ev = np.linalg.eigvalsh(G)
            if ev[0] > 0 and ev[-1] <= self.FAST_MAX_COND * ev[0]:
                self.fast = True
                self.G = G
                self.g = (Jw.T @ rw) / D
        self.direct = False
        if not self.fast:
            n, k = Jw.shape
            if n > k:
                # one Householder QR of [J | r] (LAPACK directly: numpy's wrappers cost
                # more than the arithmetic at this size): R, and Q^T r in its last column
                A = np.empty((n, k + 1), order="F")
                np.divide(Jw, D, out=A[:, :k])
                A[:, k] = rw
                qr, _, info = _geqrf(A)
                R = _triu(qr[:k, :k])
                # triangular solves where R is safely regular (cond(R) <= 1e12 by
                # LAPACK's estimate: the same solution as the SVD solve below to
                # rounding); else the SVD solve, which truncates a rank deficiency
                self.direct = (info == 0 and all(abs(v) > 0 for v in R.diagonal().tolist())
                               and _trcond(R) >= 1e-12)
                self.R, self.qtr = R, qr[:k, k].copy()
            else:
                Q, R = np.linalg.qr(Jw / D, mode="reduced")
                self.R, self.qtr = R, Q.T @ rw
            self.G = self.R.T @ self.R
            self.g = self.R.T @ self.qtr

    @classmethod
    def newton(cls, J: np.ndarray, psi: np.ndarray, dpsi: np.ndarray, s: float,
               D: np.ndarray, H: np.ndarray | None = None) -> "_StepSolver | None":
        """The step of Newton's method on the robust objective (curvature ``psi'``
        instead of the reweighting's ``psi(u)/u``), in the same column scaling; None
        where ``J^T diag(psi') J`` is not safely positive definite (condition number
        above 1e8 in the scaled variables: then the reweighted step decides).
        ``H``: the model's curvature term ``sum psi_i d^2 f_i`` where known; the
        matrix is then the objective's full Hessian (times s^2), and must be positive
        definite itself."""
        Js = J / D
        G = (Js * dpsi[:, None]).T @ Js
        if H is not None:
            G = G - s * (H / D) / D[:, None]
        ev = _eigvalsh(G)
        if ev is None or not (ev[0] > 0 and ev[-1] <= cls.FAST_MAX_COND * ev[0]):
            return None
        self = cls.__new__(cls)
        self.D, self.fast, self.G = D, True, G
        self.g = Js.T @ (psi * s)
        return self

    def solve(self, lam: float) -> np.ndarray:
        k = self.D.size
        if self.fast:
            z = _solve(self.G + lam * _eye(k), self.g)
        elif self.direct:
            if lam > 0:
                # min ||[R; sqrt(lam) I] z - [Q^T r; 0]|| by a QR of the stacked system
                A = np.zeros((2 * k, k + 1), order="F")
                A[:k, :k] = self.R
                A[:k, k] = self.qtr
                A[_stacked_diagonal(k)] = math.sqrt(lam)  # (the rest of A[k:] stays 0)
                qr, _, _ = _geqrf(A)
                # (the triangular solve reads only the upper triangle of qr)
                z = _trsolve(qr[:k, :k], qr[:k, k])
            else:
                z = _trsolve(self.R, self.qtr)
        elif lam > 0:
            M = np.vstack([self.R, math.sqrt(lam) * np.eye(k)])
            z = np.linalg.lstsq(M, np.concatenate([self.qtr, np.zeros(k)]), rcond=None)[0]
        else:
            z = np.linalg.lstsq(self.R, self.qtr, rcond=None)[0]
        return z / self.D

    def predicted_decrease(self, step: np.ndarray) -> tuple[float, np.ndarray]:
        """Decrease of 1/2 ||sqrt(w)(r - J step)||^2 predicted for ``step``, and the
        scaled step ``D step`` it was computed from."""
        z = step * self.D
        return float(z @ self.g - 0.5 * z @ self.G @ z), z


def _geqrf(A):
    """Householder QR of a Fortran-ordered float matrix, overwritten: (qr, tau, info)."""
    qr, tau, _, info = lapack.dgeqrf(A, overwrite_a=1)
    return qr, tau, info


def _trcond(R) -> float:
    """LAPACK's estimate of the reciprocal condition number of upper triangular R."""
    rcond, info = lapack.dtrcon(R)
    return float(rcond) if info == 0 else 0.0


def _trsolve(R, b):
    """``R^-1 b`` for upper triangular R (LAPACK reads only the upper triangle; the
    fallback for an exactly singular R takes it alone too)."""
    x, info = lapack.dtrtrs(R, b)
    return x if info == 0 else np.linalg.lstsq(np.triu(R), b, rcond=None)[0]


# small constant arrays, made once per size (read-only): at a few parameters, making
# them costs more than the arithmetic they serve
_CONST: dict = {}


def _lower_mask(k: int) -> np.ndarray:
    m = _CONST.get(("tril", k))
    if m is None:
        m = _CONST["tril", k] = np.tri(k, k, -1, dtype=bool)
        m.flags.writeable = False
    return m


_ZERO = np.zeros(1)
_ZERO.flags.writeable = False


def _triu(M: np.ndarray) -> np.ndarray:
    """``np.triu(M)`` of a square matrix (the same call, with its mask kept)."""
    return np.where(_lower_mask(M.shape[0]), _ZERO, M)


def _eye(k: int) -> np.ndarray:
    e = _CONST.get(("eye", k))
    if e is None:
        e = _CONST["eye", k] = np.eye(k)
        e.flags.writeable = False
    return e


def _stacked_diagonal(k: int):
    """Index of the diagonal of the lower k x k block of a (2k, .) matrix."""
    d = _CONST.get(("diag", k))
    if d is None:
        d = _CONST["diag", k] = (np.arange(k, 2 * k), np.arange(k))
    return d


def _eigvalsh(G: np.ndarray) -> np.ndarray | None:
    """``np.linalg.eigvalsh(G)`` of a float matrix; None where it raises LinAlgError
    (no convergence). Call with floating-point errors ignored."""
    if _umath_linalg is None or G.dtype != np.float64 or G.ndim != 2:
        try:
            return np.linalg.eigvalsh(G)
        except np.linalg.LinAlgError:
            return None
    ev = _umath_linalg.eigvalsh_lo(G, signature="d->d")
    # (numpy's wrapper turns the kernel's NaN on no convergence into LinAlgError)
    return ev if math.isfinite(ev.sum()) else _eigvalsh_checked(G)


def _eigvalsh_checked(G):
    try:
        return np.linalg.eigvalsh(G)
    except np.linalg.LinAlgError:
        return None


def _solve(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``np.linalg.solve(A, b)`` for a float matrix and vector. Call with
    floating-point errors ignored."""
    if _umath_linalg is None or A.dtype != np.float64 or b.dtype != np.float64:
        return np.linalg.solve(A, b)
    z = _umath_linalg.solve1(A, b, signature="dd->d")
    # (a singular A: the kernel's NaN, which numpy's wrapper raises as LinAlgError)
    return z if math.isfinite(z.sum()) else np.linalg.solve(A, b)


def _column_scale(d2: list, dmax: list):
    """``dmax = np.maximum(d2, dmax * _SCALE_MEMORY)`` and the column scaling
    ``D = np.sqrt(np.where(dmax > 0, dmax, 1.0))``, on Python floats (the same
    numbers, NaN where either is NaN as np.maximum has it): ``(dmax list, D array)``."""
    dmax = [a if (a != a or a >= b) else b for a, b in zip(d2, [m * _SCALE_MEMORY for m in dmax])]
    return dmax, np.array([math.sqrt(v) if v > 0 else 1.0 for v in dmax])


def _norm(v: np.ndarray) -> float:
    """``np.linalg.norm`` of a float vector (its own arithmetic: sqrt of v.dot(v))."""
    return math.sqrt(v.dot(v))


_CURVATURE = True  # Newton steps with the model's second derivatives where it has them
_NEAR = 1e-6  # relative step below which the robust losses take Newton steps
_SCALE_MEMORY = 0.25  # the column scaling's memory factor per iteration (squared norms)


def _irls_lm(prob: _Problem, theta: np.ndarray, loss: Loss, s: float, *,
             linear: bool, max_iter: int = 500, xtol: float = 1e-13,
             ftol: float = 1e-15, polish_steps: bool = True,
             check: bool = True, newton_steps: bool = True, near: bool = False) -> _Inner:
    """Minimise sum rho(r(theta)/s) by reweighted, damped Gauss-Newton steps.

    The damping follows Nielsen's gain-ratio rule (Madsen, Nielsen & Tingleff, *Methods
    for non-linear least squares problems*, 2004): the gain ratio compares the actual
    decrease of the robust objective with the decrease predicted by the reweighted
    quadratic model. After convergence a few undamped steps polish the solution.

    Stopping (small steps, no further decrease, a refused polishing step) is not the
    verdict: with ``check`` (full-accuracy solves) ``converged`` is True only when the
    first-order test of :mod:`.verdict` holds at the returned point. The loose inner
    solves of the scale iterations pass ``check=False`` (their verdict is the final
    solve's).
    """
    lower, upper = prob.lower, prob.upper
    theta = _project(np.asarray(theta, dtype=float).copy(), lower, upper)
    # one errstate block for the whole loop (one per evaluation cost more than the
    # arithmetic of a small problem's pass); the loop calls the quiet forms
    with np.errstate(all="ignore"):
        r = _start_residuals(prob, theta, quiet=True)
        inner = _lm_loop(prob, theta, r, loss, s, linear, max_iter, xtol, ftol,
                         polish_steps, newton_steps, near)
    return _judged(prob, inner, loss, s) if check else inner


def _lm_loop(prob: _Problem, theta: np.ndarray, r: np.ndarray, loss: Loss, s: float,
             linear: bool, max_iter: int, xtol: float, ftol: float, polish_steps: bool,
             newton_steps: bool, near: bool) -> _Inner:
    """The iterations of :func:`_irls_lm`, with numpy's floating-point errors ignored
    by the caller. (Python floats and lists stand in for numpy calls on the
    k-vectors where they give the same numbers: at 25 points a numpy call costs more
    than its arithmetic.)"""
    lower, upper = prob.lower, prob.upper
    lo_l, up_l = lower.tolist(), upper.tolist()
    phi, u = _objective_u(loss, r, s)
    if not math.isfinite(phi):
        umax = float(np.max(np.abs(r / s)))
        raise FitError(
            f"the loss ({loss.describe()}) is not finite at the start values: it overflows for "
            f"residuals of {umax:.3g} scale units; give a larger fixed scale, or choose a "
            f"loss that grows more slowly (alpha <= 2)"
        )
    robust = loss.name != "l2"
    # reweighted steps of a linear model go undamped while they descend (they do for
    # every loss whose weight psi(u)/u does not grow with |u|); after an uphill one the
    # damped rule takes over, as for a nonlinear model
    undamped = linear
    lam = 0.0 if linear else None
    nu = 2.0
    dmax = [0.0] * theta.size
    message = "converged"
    converged = False
    polish = 0
    last_scaled = math.inf
    it = 0
    # Newton steps near the minimum for the robust losses (least squares: the
    # reweighted step is already Newton's)
    newton_ok = newton_steps and robust
    near = near and newton_ok  # (a warm start: try Newton steps at once)
    shared = prob.model.f_jac is not None and not prob.model.is_linear
    curvature = _CURVATURE and prob.model.hess_w is not None and not prob.model.is_linear
    for it in range(1, max_iter + 1):
        J = prob.jac(theta)
        if not robust:  # unit weights: no weighted copies of J and r
            Jw, rw = J, r
        else:
            if u is None:
                u = r / s
            w = loss.weight(u)
            sw = np.sqrt(np.maximum(w, 0.0))
            Jw = J * sw[:, None]
            rw = r * sw
        d2 = _einsum("ij,ij->j", Jw, Jw).tolist()
        # (a finite sum of squares needs a finite J: J itself is tested only where
        # the sum is not finite)
        if not math.isfinite(sum(d2)) and not np.isfinite(J).all():
            return _Inner(theta, r, phi, it, False,
                          "the model's derivatives are not finite at the current parameters")
        # column scaling from the current column norms, with a memory that fades by
        # half per iteration (a plain running maximum goes stale once a column shrinks
        # by orders of magnitude, as in MGH10's valley; the current norms alone let a
        # shrinking column's parameter run away in one step, as in MGH17)
        dmax, D = _column_scale(d2, dmax)
        step_solver = None
        if near:
            # close to the minimum: Newton steps (the reweighted ones converge only
            # linearly, at a rate set by how far psi(u)/u is from psi'(u))
            psi, dpsi = loss.psi_dpsi(u)
            H = prob.hess_w_quiet(theta, psi) if curvature else None
            step_solver = _StepSolver.newton(J, psi, dpsi, s, D, H)
        newton = step_solver is not None
        if not newton:
            step_solver = _StepSolver(Jw, rw, D)
        if lam is None:
            lam = 1e-3  # relative to diag(J^T W J) through D
        accepted = False
        for _ in range(80):
            use_lam = 0.0 if (polish or undamped or newton) else lam
            step = step_solver.solve(use_lam)
            cand = theta + step
            # (_project's own test, on Python floats: strictly inside every bound)
            if not all(a < v < b for v, a, b in zip(cand.tolist(), lo_l, up_l)):
                cand = _project(cand, lower, upper)
            step = cand - theta
            # (with the Jacobian in the same pass where the model shares the work: kept
            # for the next iteration, which starts from this candidate once accepted)
            r_new = prob.resid_quiet(cand, with_jac=shared)
            if _all_finite(r_new):
                phi_new, u_new = _objective_u(loss, r_new, s)
            else:
                phi_new, u_new = math.inf, None
            pred, zstep = step_solver.predicted_decrease(step)
            pred /= s * s
            gain = (phi - phi_new) / pred if pred > 0 else (1.0 if phi_new <= phi else -1.0)
            # while polishing, the objective is flat to rounding along ill-conditioned
            # directions: accept a Gauss-Newton step that does not raise it beyond that
            # (and a reweighted step of a linear model descends in exact arithmetic: near
            # the minimum its objective change drowns in rounding, so the same applies)
            tol_phi = 1e-12 * phi if (polish or undamped or newton) else 0.0
            if phi_new <= phi + tol_phi and (gain > 0 or phi_new < phi or polish or undamped
                                             or newton):
                accepted = True
                if not undamped and not polish and not newton:
                    lam *= max(1.0 / 3.0, 1.0 - (2.0 * gain - 1.0) ** 3) if gain > 0 else 1.0
                    nu = 2.0
                break
            if newton:
                # refused: back to reweighted steps for the rest of this solve (not
                # re-armed when they get small again: they would alternate with refused
                # Newton tries and creep, 2000 iterations per solve)
                near, newton, newton_ok = False, False, False
                step_solver = _StepSolver(Jw, rw, D)
                continue
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
        scaled = _norm(zstep)  # (||D step||: step * D is D * step)
        ncand = _norm(D * cand)
        small_step = scaled <= xtol * (ncand + xtol)
        small_gain = (phi - phi_new) <= ftol * max(phi, 1e-300)
        theta, r, phi, u = cand, r_new, phi_new, u_new
        if newton_ok and not near and scaled <= _NEAR * (ncand + _NEAR):
            near = True
        if phi == 0.0:
            converged = True
            message = "converged (exact fit)"
            break
        if polish:
            polish += 1
            stalled = polish > 4 and scaled >= 0.9 * last_scaled
            last_scaled = scaled
            if scaled <= 1e-15 * (ncand + 1e-15) or polish > 40 or stalled:
                converged = True
                break
            continue
        if small_step or (small_gain and scaled <= 1e-11 * (ncand + 1e-11)):
            if linear or not polish_steps:
                converged = True
                break
            polish = 1  # a few undamped steps to reach full accuracy
    else:
        message = f"did not converge in {max_iter} iterations"
    return _Inner(theta, r, phi, it, converged, message)


def _judged(prob: _Problem, inner: _Inner, loss: Loss, s: float) -> _Inner:
    """``inner`` with the verdict of :mod:`.verdict` at its point: a solve that stopped
    (``converged``) keeps that only where the first-order and per-parameter step tests
    hold. (:func:`_irls_lm` applies it with ``check``; a caller that runs several
    solves, of which only the last is returned, applies it to that one.)"""
    theta, r = inner.theta, inner.r
    if not (inner.converged and inner.objective > 0.0):
        return inner
    psi_loss = None if loss.name == "l2" else loss
    # (u = r/s, psi and psi' at this point where the solver kept them: the Newton
    # iteration's last pass, at this scale and these residuals)
    st = inner.stats
    kept = (st if st and st.get("s") == s and st.get("r") is r and "dpsi" in st
            and psi_loss is not None else None)
    ok, cos, j = _first_order(prob, theta, r, psi_loss, s, kept=kept)
    if not ok:
        name = np.asarray(prob.model.param_names)[prob.free][j]
        message = (f"stopped at a point that is not a minimum (first-order test: the "
                   f"gradient along {name} has cosine {cos:.1e} with the residuals, "
                   f"above {COSINE_TOL:g}); try other start values")
    else:
        ok, rel, j = _step_small(prob, theta, r, psi_loss, s, kept=kept)
        if ok:
            return inner
        name = np.asarray(prob.model.param_names)[prob.free][j]
        message = (f"stopped before the estimates settled (per-parameter step test: "
                   f"a further step would move {name} by {rel:.1e} of its value, "
                   f"above {STEP_REL:g}); try more iterations or other start values")
    return _Inner(theta, r, inner.objective, inner.n_iter, False, message, inner.stats)


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
