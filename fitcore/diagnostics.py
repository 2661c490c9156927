r"""Point diagnostics: which points drive the answer.

For a finished fit (:class:`fitcore.FitResult`), :func:`point_diagnostics` gives per
point

* **leverage** ``h_ii``: the diagonal of the hat matrix of the weighted design
  ``A = sqrt(w) J``, ``H = A (A^T A)^-1 A^T``, where ``J`` is the Jacobian of
  ``f / sigma`` with respect to the fitted parameters at the solution (for a model
  linear in its parameters, the design matrix divided by sigma) and ``w`` the robust
  weights of the fit (1 for least squares). ``sum h_ii = p`` (free parameters). A
  point the robust loss rejects (weight 0) has leverage 0: leverage here measures how
  much the point can pull *this* fit.
* **standardised residual** ``u_i / sqrt(1 - h_ii)`` with ``u_i = r_i / (sigma_i s)``
  the fit's scaled residual (``FitResult.std_residuals``): for least squares this is
  the internally studentised residual.
* **Cook's distance** ``t_i^2 h_ii / (p (1 - h_ii))`` with ``t_i`` the standardised
  residual (Cook 1977; for least squares the textbook value).
* **influence**: the change of each parameter when that point alone is excluded,
  ``(theta_(-i) - theta) / u(theta)`` in standard uncertainties of the full fit.
  Up to ``exact_limit`` used points every point is refitted exactly (same model, loss,
  tuning, scale rule, sigma and held parameters, warm-started from the full fit: Newton's
  method on the estimating equations from the full fit's parameters and scale, run to
  1e-8 standard errors, with a full ``fit`` wherever that does not settle; see
  :mod:`fitcore.refits`). Above
  it, one Newton step on the estimating equations without point ``i``, from the full
  fit, approximates the refit (exact for linear least squares; for M-losses with an
  estimated scale the step includes Huber's proposal-2 scale equation; L1 uses a
  reweighted least-squares step). ``method`` says which was used.

Unlike statsmodels' ``dfbetas`` (OLS only), which divides ``theta - theta_(-i)`` by
the *deleted-point* residual scale ``s_(i)`` times ``sqrt((X^T X)^-1_jj)``, the
influence here divides ``theta_(-i) - theta`` by the full fit's standard uncertainty:
for least squares ``influence = -dfbetas * s_(i) / s``.

High leverage is flagged where ``h_ii > 2p/n`` (a common rule of thumb; common
practice; from memory it goes back to Belsley, Kuh & Welsch 1980) or
``h_ii > 0.5``. A robust loss limits the pull of points with large residuals, but a
point far out in x that the fit passes close to keeps its full weight: it can still
pull the fit.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .losses import DEFAULT_TUNING, OWN_SCALE, get_loss
from .refits import WarmRefit
from .report_text import point_label
from .result import FitResult
from .scale import psi_variance_at_normal
from .solve import FitError, fit
from .threads import small_problem
from .work import scale_was_fixed

HIGH_LEVERAGE_ABS = 0.5
LEVERAGE_NOTE = ("a robust loss does not protect against a point far out in x: "
                 "it can still pull the fit")


# --------------------------------------------------------------------------- shared
def refit_settings(res: FitResult, *, hold_shape: bool = False) -> dict:
    """Keyword arguments for :func:`fitcore.fit` that repeat ``res``'s method.

    Same loss, tuning constant, shape (general loss), held parameters, sigma mode and
    scale rule: an automatic scale is re-estimated by the refit, a scale the analyst
    fixed is passed again. With ``hold_shape`` an adaptive fit is repeated as the
    general loss at its fitted alpha and scale c (the adaptive shape is not re-fitted).
    """
    kw: dict = {"loss": res.loss, "fixed": dict(res.fixed)}
    if res.sigma is not None and res.sigma_mode in ("absolute", "relative"):
        kw["sigma_mode"] = res.sigma_mode
    if res.loss == "general":
        kw["alpha"] = res.alpha
    if res.loss in DEFAULT_TUNING or res.loss == "general":
        kw["tuning"] = res.tuning
    if scale_was_fixed(res):
        kw["scale"] = res.scale
    if res.loss == "adaptive" and hold_shape:
        kw.update(loss="general", alpha=res.alpha, tuning=res.tuning, scale=res.scale)
    return kw


def loss_of(res: FitResult):
    """The loss object the fit used (the adaptive loss as general at its alpha)."""
    if res.loss == "adaptive":
        return get_loss("general", tuning=res.tuning, alpha=res.alpha)
    if res.loss == "general":
        return get_loss("general", tuning=res.tuning, alpha=res.alpha)
    return get_loss(res.loss, tuning=res.tuning)


def used_mask(res: FitResult) -> np.ndarray:
    return ~np.asarray(res.excluded, bool) & np.isfinite(res.x) & np.isfinite(res.y)


def whitened(res: FitResult):
    """``(idx, J, r, sig)`` over the used points: Jacobian of f/sigma (free columns)."""
    used = used_mask(res)
    idx = np.flatnonzero(used)
    xu = res.x[used]
    sig = res.sigma[used] if res.sigma is not None else np.ones(idx.size)
    with np.errstate(all="ignore"):
        J = np.asarray(res.model.jac(xu, res.values), dtype=float).reshape(idx.size, -1)
    J = J[:, res.free] / sig[:, None]
    r = res.residuals[used] / sig
    return idx, J, r, sig


def hat_values(A: np.ndarray) -> np.ndarray:
    """Diagonal of ``A (A^T A)^+ A^T`` by the SVD of the column-scaled ``A``."""
    A = np.asarray(A, dtype=float)
    if A.size == 0:
        return np.zeros(A.shape[0])
    d = np.sqrt(np.sum(A * A, axis=0))
    d = np.where(d > 0, d, 1.0)
    U, sv, _ = np.linalg.svd(A / d, full_matrices=False)
    tol = max(A.shape) * np.finfo(float).eps * (sv[0] if sv.size else 0.0)
    rank = int(np.sum(sv > tol))
    return np.sum(U[:, :rank] ** 2, axis=1)


# --------------------------------------------------------------------------- result
@dataclass
class PointDiagnostics:
    """Per-point diagnostics of one fit; arrays in point order, NaN for unused points.

    Attributes
    ----------
    leverage, std_residuals, cooks_distance
        See the module docstring.
    influence
        ``(n, n_params)``: change of each parameter, in standard uncertainties of the
        full fit, when the point alone is excluded; NaN columns for held parameters.
    max_influence
        Largest ``|influence|`` over the parameters, per point (for plot colouring).
    exact
        True where the influence comes from an exact refit.
    high_leverage
        ``leverage > 2p/n`` or ``> 0.5``; False for unused points.
    threshold
        ``2p/n`` with p free parameters and n used points.
    method
        How the influence was obtained, in words.
    note
        Warning text naming the high-leverage points ("" when there are none).
    n_failed
        Refits that failed (their influence is NaN).
    cancelled
        True when ``cancel()`` stopped the exact refits (the rest keep the one-step
        approximation; see ``exact``).
    """

    leverage: np.ndarray
    std_residuals: np.ndarray
    cooks_distance: np.ndarray
    influence: np.ndarray
    max_influence: np.ndarray
    exact: np.ndarray
    high_leverage: np.ndarray
    threshold: float
    n_used: int
    n_params: int
    method: str
    note: str
    n_failed: int = 0
    cancelled: bool = False

    @property
    def high_leverage_points(self) -> list[int]:
        """Indices (0-based, into the points table) of the high-leverage points."""
        return [int(i) for i in np.flatnonzero(self.high_leverage)]

    def leverage_note(self, rows=None) -> str:
        """The warning naming the high-leverage points, each by :func:`point_label`
        (its file row when ``rows`` holds the points' file rows); "" when none."""
        flagged = np.flatnonzero(self.high_leverage)
        if not flagged.size:
            return ""
        names = [point_label(int(i), rows) for i in flagged[:10]]
        more = f" and {flagged.size - 10} more" if flagged.size > 10 else ""
        return (f"High leverage: {', '.join(names)}{more} (hat value above 2p/n = "
                f"{self.threshold:.3g} or above {HIGH_LEVERAGE_ABS}). Note: {LEVERAGE_NOTE}. "
                f"Check these points, and compare the fit with them excluded.")

    def summary(self, rows=None) -> str:
        """The diagnostics paragraph of the window and the report: how the influence
        was obtained, then the high-leverage warning (points named by file row)."""
        hi = self.leverage_note(rows) or "No high-leverage points."
        return f"Point diagnostics: influence by {self.method}. {hi}"


def _one_step(res: FitResult, J: np.ndarray, r: np.ndarray, with_scale: bool):
    """One Newton step per deleted point from the full fit; returns (delta, labels)."""
    n, k = J.shape
    s = float(res.scale)
    delta = np.full((n, k), np.nan)
    if res.loss == "l1" or not (s > 0 and math.isfinite(s)):
        return _irls_step(res, J, r), "reweighted least-squares one-step"
    loss = loss_of(res) if res.loss != "l2" else None
    u = r / s
    if loss is None:
        psi, dpsi = u, np.ones(n)
        with_scale = False
    else:
        with np.errstate(all="ignore"):
            psi, dpsi = loss.psi(u), loss.dpsi(u)
    m = k + 1 if with_scale else k
    # per-point contributions to the (scaled, sign-flipped) Jacobian of the equations
    C = np.zeros((n, m, m))
    C[:, :k, :k] = dpsi[:, None, None] * J[:, :, None] * J[:, None, :]
    F = np.zeros((n, m))
    F[:, :k] = psi[:, None] * J
    beta = 0.0
    if with_scale:
        beta = psi_variance_at_normal(loss)
        C[:, :k, k] = (dpsi * u)[:, None] * J
        C[:, k, :k] = (2.0 * psi * dpsi)[:, None] * J
        C[:, k, k] = 2.0 * psi * dpsi * u
        F[:, k] = psi * psi
    Ctot = C.sum(axis=0)
    Ftot = F.sum(axis=0)
    if with_scale:
        Ftot[k] -= (n - k) * beta
    Fi = Ftot[None, :] - F  # the equations without point i, at the full fit
    if with_scale:
        Fi[:, k] += beta
    Mi = Ctot[None, :, :] - C
    d = np.sqrt(np.abs(np.diagonal(Ctot))) + 1e-300
    with np.errstate(all="ignore"):
        Ms = Mi / d[None, :, None] / d[None, None, :]
        try:
            z = np.linalg.solve(Ms, (Fi / d)[:, :, None])[:, :, 0]
            step = s * z / d
        except np.linalg.LinAlgError:
            step = np.full((n, m), np.nan)
    delta = step[:, :k]
    bad = ~np.all(np.isfinite(delta), axis=1)
    if np.any(bad):
        delta[bad] = _irls_step(res, J, r)[bad]
    return delta, "one-step Newton approximation from the full fit"


def _irls_step(res: FitResult, J: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Deletion step of the weighted least-squares problem at the fit's weights."""
    used = used_mask(res)
    w = np.clip(res.weights[used], 0.0, None) if res.loss != "l2" else np.ones(r.size)
    A = J * np.sqrt(w)[:, None]
    h = hat_values(A)
    G = A.T @ A
    try:
        Ginv = np.linalg.pinv(G)
    except np.linalg.LinAlgError:
        return np.full(J.shape, np.nan)
    with np.errstate(all="ignore"):
        out = -(J @ Ginv) * (w * r / (1.0 - h))[:, None]
    return out


def _exact_refits(res, idx, settings, p0, base, free, inv_se, infl_free, exact, progress,
                  cancel):
    """Refit leaving out each used point in turn (one BLAS thread: small solves).

    Fills ``infl_free`` and ``exact`` in place; returns ``(cancelled, done, n_failed)``.
    """
    n = idx.size
    cancelled, done, n_failed = False, 0, 0
    warm = WarmRefit.from_fit(res, settings)
    with small_problem(n * int(np.count_nonzero(free))):
        for pos, i in enumerate(idx):
            if cancel is not None and cancel():
                cancelled = True
                break
            excl = base.copy()
            excl[i] = True
            try:
                # Newton from the full fit where it applies and settles (fitcore.refits),
                # else the full fit; both solve the same equations to the same root
                got = warm.values(res.x, res.y, res.sigma, excl)
                if got is None:
                    got = fit(res.model, res.x, res.y, sigma=res.sigma, excluded=excl, p0=p0,
                              **settings).values
                vals = got[free]
                if not np.all(np.isfinite(vals)):
                    raise FitError("non-finite estimates")
                infl_free[pos] = (vals - res.values[free]) * inv_se
            except (FitError, ValueError, ArithmeticError, np.linalg.LinAlgError):
                infl_free[pos] = np.nan
                n_failed += 1
            exact[i] = True
            done += 1
            if progress is not None:
                progress(done, n)
    return cancelled, done, n_failed


def point_diagnostics(res: FitResult, exact_limit: int = 500, *,
                      progress: Callable[[int, int], None] | None = None,
                      cancel: Callable[[], bool] | None = None,
                      hold_shape: bool = True) -> PointDiagnostics:
    """Leverage, standardised residual, Cook's distance and influence per point.

    Parameters
    ----------
    res
        A finished fit.
    exact_limit
        Up to this many used points the influence comes from exact refits, above it
        from the one-step approximation (``exact_limit=0`` forces the approximation).
    progress
        ``progress(i, total)`` after each exact refit.
    cancel
        ``cancel() -> True`` stops the refits; the points not refitted keep the
        one-step values (``exact`` is False there) and ``cancelled`` is True.
    hold_shape
        For an adaptive fit, refit with the shape alpha and scale c held at their
        fitted values (the influence on the parameters at the chosen loss; re-fitting
        alpha for every point would take about ten times longer).
    """
    if not isinstance(res, FitResult):
        raise FitError("point diagnostics need a finished fit (a FitResult)")
    n_all = res.x.size
    p_all = len(res.param_names)
    idx, J, r, _ = whitened(res)
    n, k = J.shape
    nanv = np.full(n_all, np.nan)
    if n == 0 or k == 0:
        raise FitError("the fit has no used points or no fitted parameters")
    if not np.all(np.isfinite(J)):
        raise FitError("the model's derivatives are not finite at the fitted parameters, "
                       "so leverage cannot be computed")
    w = np.ones(n) if res.loss == "l2" else np.clip(res.weights[idx], 0.0, None)
    h = hat_values(J * np.sqrt(w)[:, None])
    leverage = nanv.copy()
    leverage[idx] = h
    u = res.std_residuals[idx]
    with np.errstate(all="ignore"):
        one_minus = np.where(h < 1.0 - 1e-12, 1.0 - h, np.nan)
        t = u / np.sqrt(one_minus)
        cook = t * t * h / (k * one_minus)
    std_res = nanv.copy()
    std_res[idx] = t
    cooks = nanv.copy()
    cooks[idx] = cook

    threshold = 2.0 * k / n
    high = np.zeros(n_all, bool)
    high[idx] = (h > threshold) | (h > HIGH_LEVERAGE_ABS)

    # ---------------------------------------------------------------- influence
    se = res.stderr[res.free]
    with np.errstate(all="ignore"):
        inv_se = np.where((se > 0) & np.isfinite(se), 1.0 / se, np.nan)
    # the scale equation joins the Newton step where the fit estimated the scale by
    # Huber's proposal 2 (M-losses with scale "auto")
    with_scale = (res.loss not in OWN_SCALE
                  and "proposal 2" in str(res.scale_method))
    delta, approx_name = _one_step(res, J, r, with_scale)
    infl_free = delta * inv_se[None, :]
    exact = np.zeros(n_all, bool)
    n_failed = 0
    cancelled = False
    done = 0
    if n <= exact_limit:
        settings = refit_settings(res, hold_shape=hold_shape)
        p0 = dict(zip(res.param_names, (float(v) for v in res.values)))
        base = np.asarray(res.excluded, bool)
        free = res.free
        cancelled, done, n_failed = _exact_refits(res, idx, settings, p0, base, free, inv_se,
                                                  infl_free, exact, progress, cancel)
    influence = np.full((n_all, p_all), np.nan)
    influence[np.ix_(idx, np.flatnonzero(res.free))] = infl_free
    with np.errstate(all="ignore"):
        max_infl = nanv.copy()
        finite_rows = np.any(np.isfinite(infl_free), axis=1)
        mi = np.full(n, np.nan)
        mi[finite_rows] = np.nanmax(np.abs(infl_free[finite_rows]), axis=1)
        max_infl[idx] = mi

    shape_note = ""
    if res.loss == "adaptive" and hold_shape:
        shape_note = "; adaptive loss refitted at its fitted alpha and scale c"
    if n > exact_limit:
        method = (f"{approx_name} ({n} used points > {exact_limit}, the limit for "
                  f"exact refits)")
    elif cancelled:
        method = (f"exact refits for {done} of {n} points (cancelled); {approx_name} "
                  f"for the rest")
    else:
        method = f"exact refits leaving out each of the {n} used points in turn"
    method += shape_note
    if n_failed:
        method += f"; {n_failed} refit{'s' if n_failed != 1 else ''} failed"

    d = PointDiagnostics(leverage=leverage, std_residuals=std_res, cooks_distance=cooks,
                         influence=influence, max_influence=max_infl, exact=exact,
                         high_leverage=high, threshold=threshold, n_used=n, n_params=k,
                         method=method, note="", n_failed=n_failed, cancelled=cancelled)
    d.note = d.leverage_note()
    return d


__all__ = ["point_diagnostics", "PointDiagnostics", "refit_settings", "hat_values",
           "LEVERAGE_NOTE"]
