"""Start strategy for formulas and hard problems.

A nonlinear fit is only as good as its start. The plain attempt starts from the
analyst's values, or the model's own guess (the catalogue's robust guesses; a formula
starts at 1 for every parameter). When that attempt fails the convergence verdict
(:mod:`.verdict`), or when the start is blank (every free value 1, the formula
default), :func:`_improve` tries more starts and keeps the best result that passes:

1. **Variable projection** (Golub & Pereyra, SIAM J. Numer. Anal. 10, 1973):
   parameters that enter the model linearly (found numerically: their Jacobian column
   does not depend on their own value) are solved exactly by (trimmed) least squares
   for given values of the others, so only the nonlinear ones need a start.
2. **Log-grid search** for the nonlinear parameters against the data's x range:
   rates, time constants, widths, EC50s and locations are tried at magnitudes
   ``10^(-3..3)`` times the x span, |x| centre and 1, both signs, and at quantiles of
   x (coordinate sweeps, each value scored by the projected residuals; the score is a
   trimmed sum of squares so that outliers do not pick the start).
3. **Log-scale reparametrisation** ``theta_j = theta0_j exp(phi_j)`` for parameters
   without bounds: a curved valley such as NIST MGH10's (``b1 exp(b2/(x+b3))`` with
   b1 ~ 1e-2 and b2 ~ 6e3) is nearly straight in log coordinates. The fit found there is
   polished in the original parameters (the covariance is theirs).
4. The catalogue's guesses apply to a formula that is recognisably a catalogue curve
   (renamed, reordered, a rate for a time constant: :mod:`.recognise`); such a formula
   starts from that model's robust guess (set up in :mod:`.setup`), so its start is
   not blank and the searches above run only if that start fails the verdict. Every
   candidate run uses the analyst's loss; L1 and redescending losses start from a
   converged robust fit (:mod:`.dispatch`).

Candidates are compared by the objective at a common scale; a candidate counts only
when it passes the verdict (first-order test, every parameter affecting the curve, no
pole inside the data).
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np

from ..losses import get_loss
from ..model import Model
from .problem import FitError, _Problem
from .verdict import _insensitive, _pole_in_range

_TRIM = 0.8  # the grid's score: the smallest 80 % of the squared residuals
_SWEEPS = 3
_KEEP = 2  # grid candidates that get a full fit


def _passes(st, out) -> bool:
    """The verdict on a solver outcome, including the curve checks of the result."""
    if not out.inner.converged:
        return False
    theta = out.inner.theta
    if not np.all(np.isfinite(theta)):
        return False
    return not _insensitive(st.prob, theta) and _pole_in_range(st.prob, theta) is None


def _blank(st) -> bool:
    """Every free start value is 1 (a formula's default start)."""
    return bool(np.all(st.theta0 == 1.0))


def _linear_params(prob: _Problem, theta: np.ndarray) -> np.ndarray:
    """Free parameters that enter the model linearly: the Jacobian column of each does
    not change when its own value changes (checked at two points)."""
    k = theta.size
    lin = np.ones(k, bool)
    rng = np.random.default_rng(20240101)
    with np.errstate(all="ignore"):
        for base in (theta, theta * (1.0 + 0.3 * rng.standard_normal(k)) + 0.1):
            J0 = prob.jac(base)
            if not np.all(np.isfinite(J0)):
                continue
            for j in range(k):
                if not lin[j]:
                    continue
                if not np.any(J0[:, j]):  # a column that vanishes here says nothing
                    lin[j] = False
                    continue
                t = base.copy()
                t[j] = 1.7 * t[j] + 0.9
                J1 = prob.jac(t)
                col0, col1 = J0[:, j], J1[:, j]
                scale = max(float(np.max(np.abs(col0))), 1e-300)
                if not (np.all(np.isfinite(col1))
                        and float(np.max(np.abs(col1 - col0))) <= 1e-9 * scale):
                    lin[j] = False
    return lin


class _Projector:
    """Scores of nonlinear parameter values with the linear ones solved for."""

    def __init__(self, prob: _Problem, lin: np.ndarray, robust: bool):
        self.prob, self.lin, self.robust = prob, lin, robust
        self.m = int(np.ceil(_TRIM * prob.n)) if robust else prob.n

    def solve(self, theta: np.ndarray):
        """``(score, theta with the linear parameters solved)``; inf if undefined."""
        prob, lin = self.prob, self.lin
        t = theta.copy()
        t[lin] = 0.0
        with np.errstate(all="ignore"):
            r0 = prob.resid(t)  # y - f with the linear parts at 0 (whitened)
            if not np.all(np.isfinite(r0)):
                return math.inf, theta
            if lin.any():
                A = prob.jac(t)[:, lin]
                if not np.all(np.isfinite(A)):
                    return math.inf, theta
                coef = self._lstsq(A, r0)
                if coef is None:
                    return math.inf, theta
                t[lin] = coef
                r = r0 - A @ coef
            else:
                r = r0
        r2 = r * r
        if self.robust:
            r2 = np.partition(r2, self.m - 1)[: self.m]
        v = float(np.sum(r2))
        return (v if math.isfinite(v) else math.inf), t

    def _lstsq(self, A, b):
        try:
            coef = np.linalg.lstsq(A, b, rcond=None)[0]
            if self.robust:  # two trimmed refits: the outliers do not set the start
                for _ in range(2):
                    r = b - A @ coef
                    keep = np.abs(r) <= np.partition(np.abs(r), self.m - 1)[self.m - 1]
                    coef = np.linalg.lstsq(A[keep], b[keep], rcond=None)[0]
        except (np.linalg.LinAlgError, ValueError):
            return None
        return coef if np.all(np.isfinite(coef)) else None


def _candidate_values(x: np.ndarray, current: float) -> np.ndarray:
    """Values to try for one nonlinear parameter, from the data's x range."""
    lo, hi = float(np.min(x)), float(np.max(x))
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    centre = 0.5 * (lo + hi)
    mags = [span, 1.0] + ([abs(centre)] if abs(centre) > 0 else [])
    vals = [current]
    for mg in mags:
        for e in np.arange(-3.0, 3.01, 0.5 if mg == span else 1.0):
            v = mg * 10.0 ** e
            vals.extend((v, -v))
    vals.extend(np.quantile(x, [0.1, 0.3, 0.5, 0.7, 0.9]).tolist())
    v = np.array(vals, dtype=float)
    v = v[np.isfinite(v)]
    return np.unique(v)


def _grid_starts(st) -> list[np.ndarray]:
    """Start vectors from variable projection and the log-grid search (best first)."""
    prob = st.prob
    theta = np.array(st.theta0, dtype=float)
    lin = _linear_params(prob, theta)
    proj = _Projector(prob, lin, robust=st.loss != "l2")
    best_val, best_t = proj.solve(theta)
    nonlin = np.flatnonzero(~lin)
    lower, upper = prob.lower, prob.upper
    scored: dict[bytes, tuple[float, np.ndarray]] = {}
    if math.isfinite(best_val):
        scored[best_t.tobytes()] = (best_val, best_t)
    for _ in range(_SWEEPS):
        improved = False
        for j in nonlin:
            for v in _candidate_values(prob.x, best_t[j]):
                if not (lower[j] < v < upper[j]) and (np.isfinite(lower[j]) or np.isfinite(upper[j])):
                    continue
                t = best_t.copy()
                t[j] = v
                val, t_solved = proj.solve(t)
                if not math.isfinite(val):
                    continue
                scored[t_solved.tobytes()] = (val, t_solved)
                if val < best_val * (1 - 1e-12):
                    best_val, best_t, improved = val, t_solved, True
        if not improved:
            break
    ranked = sorted(scored.values(), key=lambda vt: vt[0])
    starts: list[np.ndarray] = []
    for _, t in ranked:
        if all(np.max(np.abs(t - s) / (np.abs(s) + 1e-12)) > 1e-3 for s in starts):
            starts.append(t)
        if len(starts) >= _KEEP:
            break
    return starts


def _log_model(model: Model, c: np.ndarray) -> Model:
    """``model`` in the parameters ``phi`` with ``p_j = c_j exp(phi_j)`` where c_j != 0
    (``p_j = phi_j`` where c_j == 0)."""
    logs = c != 0

    def to_p(phi):
        phi = np.asarray(phi, dtype=float)
        with np.errstate(all="ignore"):
            return np.where(logs, c * np.exp(np.where(logs, phi, 0.0)), phi)

    def f(x, phi):
        return model.f(x, to_p(phi))

    def jac(x, phi):
        p = to_p(phi)
        J = np.asarray(model.jac(x, p), dtype=float)
        return J * np.where(logs, p, 1.0)

    return Model(name=model.name, param_names=model.param_names, f=f, jac=jac)


def _log_start(st, run_once):
    """The fit in log coordinates from the same start, mapped back; or None."""
    prob = st.prob
    full0 = prob.full(st.theta0)
    c = np.where(np.isfinite(np.asarray(st.mdl.lower)) | np.isfinite(np.asarray(st.mdl.upper))
                 | ~st.free, 0.0, full0)
    if not np.any(c != 0):
        return None
    lm = _log_model(st.mdl, c)
    phi0 = np.where(c != 0, 0.0, full0)
    wprob = _Problem(lm, prob.x, prob.y, prob.sig, prob.free, phi0.copy(), unit=prob.unit)
    wst = dataclasses.replace(st, mdl=lm, prob=wprob, theta0=phi0[st.free], info={})
    try:
        out = run_once(wst)
    except FitError:
        return None
    phi = wprob.full(out.inner.theta)
    with np.errstate(all="ignore"):
        p = np.where(c != 0, c * np.exp(np.where(c != 0, phi, 0.0)), phi)
    t = p[st.free]
    return t if np.all(np.isfinite(t)) else None


def _score(st, out, s_ref: float) -> float:
    """The objective of an outcome at a common scale ``s_ref``."""
    r = out.inner.r
    if st.loss == "l2":
        return float(r @ r)
    if st.loss == "l1":
        return float(np.sum(np.abs(r)))
    with np.errstate(all="ignore"):
        v = float(np.sum(out.loss_obj.rho(r / s_ref)))
    return v if math.isfinite(v) else math.inf


def _via_least_squares(st, run_once):
    """A robust loss from a blank start: the least-squares fit first (with its own
    searches), then the analyst's loss from there; None unless that passes."""
    st_ls = dataclasses.replace(st, loss="l2", loss_obj=get_loss("l2"), fixed_scale=None,
                                info=dict(st.info))
    try:
        ls = _improve(st_ls, run_once)
        if not _passes(st_ls, ls):
            return None
        sub = dataclasses.replace(st, theta0=ls.inner.theta, info=dict(st.info))
        out = run_once(sub)
    except FitError:
        return None
    if not _passes(st, out):
        return None
    st.info.clear()
    st.info.update(sub.info)
    out.n_iter += ls.n_iter
    return out


def _improve(st, run_once, first=None):
    """The fit from the given start, and more starts when it fails the verdict or the
    start was blank; the best passing outcome (else the plain attempt's). A robust
    loss from a blank start tries the least-squares route first and skips the plain
    attempt when that passes (a robust loop from all ones can take thousands of
    iterations to get nowhere)."""
    if first is None and not st.linear and _blank(st) and st.loss != "l2":
        got = _via_least_squares(st, run_once)
        if got is not None:
            return got
    if first is None:
        first = run_once(st)
    if st.linear:
        return first
    ok_first = _passes(st, first)
    if ok_first and not _blank(st):
        return first
    candidates = [first] if ok_first else []
    infos = {id(first): st.info}
    def attempt(t0):
        sub = dataclasses.replace(st, theta0=t0, info=dict(st.info))
        try:
            out = run_once(sub)
        except FitError:
            return
        if _passes(st, out):
            candidates.append(out)
            infos[id(out)] = sub.info

    def grid():
        try:
            for t0 in _grid_starts(st):
                attempt(t0)
        except FitError:
            pass

    def log():
        t_log = _log_start(st, run_once)
        if t_log is not None:
            attempt(t_log)

    def search():
        # a quick model guess that failed: the model's own wider search first
        t_search = st.search_start() if st.search_start is not None else None
        if t_search is not None and not np.array_equal(t_search, st.theta0):
            attempt(t_search)

    # a blank start says nothing: search first; an analyst's start that failed is
    # kept closest by the same start in log coordinates, so that comes first
    if not _blank(st):
        order = (search, log, grid)
    else:
        order = (grid, log)
    for step in order:
        if len(candidates) > ok_first:
            break
        step()
    if not candidates:
        return first
    s_ref = min(c.s for c in candidates if c.s > 0) if any(c.s > 0 for c in candidates) else 1.0
    best = min(candidates, key=lambda c: _score(st, c, s_ref))
    if best is not first:
        st.info.clear()
        st.info.update(infos[id(best)])
        best.n_iter += first.n_iter
    return best
