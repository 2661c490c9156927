"""Which catalogue model fits a data set: the check made when new data are opened.

Opening new data with the model of the previous data silently fitted a decay to a
calibration line (tau = 4000 +- 24000). The window therefore asks this module, for
the data just opened, whether the method on screen still describes them, and if
not which catalogue model does.

The criterion (our own rule, documented here because the window quotes it):

* every candidate is fitted with the Huber loss and automatic scale (robust, so one
  bad point does not decide the model) on at most ``max_points`` evenly spaced points;
* a candidate *fails* when the fit does not converge, gives non-finite estimates, or
  leaves a parameter that enters the curve nonlinearly (a time constant, a rate, an
  EC50, a width) undetermined: its estimate under two standard uncertainties from
  zero (|t| < 2, common practice for "not significantly different from zero"), the
  "tau = 4000 +- 24000" case. Parameters that enter linearly (offsets, amplitudes,
  polynomial coefficients) are exempt: a calibration line's intercept may well be
  zero within its uncertainty;
  zero within its uncertainty; a candidate also fails when its residuals, in order of
  x, change sign far too seldom (Wald-Wolfowitz runs test, one-sided p < 0.001: the
  curve misses the data systematically; common practice in calibration checks);
* the others are scored by a robust Bayesian information criterion,
  ``n log(s^2) + p log(n)`` with ``s`` the fitted robust scale (the BIC form is common
  practice for choosing among regression models); every model within ``2 log(n)``
  (two parameters' worth) of the lowest counts as fitting as well, and of those the
  one with the fewest parameters is proposed (a calibration line stays a line);
* the model on screen is kept when it does not fail (:func:`fit_problem`), which
  costs no more than its own fit; only then are the other catalogue models tried.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from .models import resolve_model
from .solve import fit

#: the catalogue models tried, cheapest and most common first
CANDIDATES = ("line", "line_origin", "poly2", "poly3", "exp_decay", "exp_rise", "power_law",
              "michaelis_menten", "logistic4", "arrhenius", "gauss_peak", "lorentz_peak")


@dataclass(frozen=True)
class ModelScore:
    """How one model fits the data (see the module text for the rule)."""

    model: str
    title: str
    n: int
    p: int
    scale: float
    criterion: float  # robust BIC; inf when the model failed
    problem: str  # "" when the model fits

    @property
    def fits(self) -> bool:
        return not self.problem


@dataclass(frozen=True)
class ModelChoice:
    """The outcome of :func:`choose_model`."""

    keep: bool
    current: ModelScore
    best: ModelScore | None
    scores: tuple[ModelScore, ...]

    def reason(self) -> str:
        """One sentence on why the current model is kept or replaced."""
        cur, best = self.current, self.best
        if self.keep:
            return f"{cur.title} fits these data (checked against {len(self.scores)} catalogue models)."
        if cur.problem:
            why = cur.problem
        else:
            why = (f"its robust scale {cur.scale:.3g} is well above the {best.scale:.3g} of "
                   f"{best.title.lower()} (robust criterion {cur.criterion:.1f} against {best.criterion:.1f})")
        return f"{cur.title} does not fit these data: {why}."


#: peak models, tried only when the data have their highest or lowest values inside the x range
PEAKS = ("gauss_peak", "lorentz_peak")


def _has_inner_extreme(x, y) -> bool:
    """True when the largest or smallest y (after a running median of 5) lies away from
    both ends of the x range (a peak or a dip; monotone data cannot need a peak model)."""
    n = x.size
    if n < 7:
        return True
    yo = y[np.argsort(x, kind="stable")]
    pad = np.pad(yo, 2, mode="edge")
    smooth = np.median(np.lib.stride_tricks.sliding_window_view(pad, 5), axis=1)
    edge = max(1, n // 10)
    inner = slice(edge, n - edge)
    return bool(np.argmax(smooth) in range(n)[inner] or np.argmin(smooth) in range(n)[inner])


def _thin(x, y, sigma, max_points):
    n = x.size
    if n <= max_points:
        return x, y, sigma
    idx = np.unique(np.linspace(0, n - 1, max_points).round().astype(np.intp))
    return x[idx], y[idx], None if sigma is None else sigma[idx]


def _nonlinear_parameters(model, x, values) -> list[bool]:
    """Which parameters enter the curve nonlinearly (a second difference along each)."""
    if model.is_linear:
        return [False] * len(values)
    out = []
    with np.errstate(all="ignore"):
        f0 = np.asarray(model(x, values), float)
        size = float(np.max(np.abs(f0))) if f0.size else 0.0
        for j, v in enumerate(values):
            d = 0.25 * abs(v) if v != 0 else 0.25
            up, down = values.copy(), values.copy()
            up[j] += d
            down[j] -= d
            second = np.asarray(model(x, up), float) - 2.0 * f0 + np.asarray(model(x, down), float)
            out.append(not np.all(np.isfinite(second)) or float(np.max(np.abs(second))) > 1e-9 * max(size, 1e-300))
    return out


def runs_test_p(residuals, x) -> float:
    """One-sided p-value of the Wald-Wolfowitz runs test for too few sign changes.

    Residuals are taken in order of ``x``; zeros are dropped. Normal approximation
    (adequate from about 10 points of each sign; with fewer, 1.0 is returned).
    """
    order = np.argsort(np.asarray(x, float), kind="stable")
    r = np.asarray(residuals, float)[order]
    r = r[np.isfinite(r) & (r != 0)]
    n1 = int(np.count_nonzero(r > 0))
    n2 = int(r.size - n1)
    if n1 < 5 or n2 < 5:
        return 1.0
    runs = 1 + int(np.count_nonzero(np.diff(np.sign(r)) != 0))
    n = n1 + n2
    mean = 2.0 * n1 * n2 / n + 1.0
    var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0))
    if var <= 0:
        return 1.0
    z = (runs - mean) / math.sqrt(var)
    return 0.5 * math.erfc(-z / math.sqrt(2.0))


def fit_problem(model, x, result) -> str:
    """Why ``result`` (a fit of ``model`` to points at ``x``, used points only) does not
    describe the data, or "" when it does (rules in the module text)."""
    m = resolve_model(model)
    values = np.asarray(result.values, float)
    stderr = np.asarray(result.stderr, float)
    p = values.size
    x = np.asarray(x, float)
    if not result.converged:
        return f"the fit does not converge ({result.message.rstrip('.')})"
    if not np.all(np.isfinite(values)):
        return "the estimates are not finite"
    if x.size <= p:
        return f"{x.size} points cannot determine {p} parameters"
    nonlinear = _nonlinear_parameters(m, x, values)
    for i in range(p):
        if not np.isfinite(stderr[i]) or (nonlinear[i] and 2.0 * stderr[i] > abs(values[i])):
            return (f"parameter {result.param_names[i]} is not determined by these data "
                    f"({values[i]:.3g} with standard uncertainty {stderr[i]:.2g})")
    resid = np.asarray(result.residuals, float)
    if resid.size == x.size and runs_test_p(resid, x) < 1e-3:
        return "the curve misses the data systematically (too few sign changes of the residuals along x)"
    return ""


def assess(model, x, y, sigma=None, *, title: str | None = None) -> ModelScore:
    """Fit ``model`` robustly (Huber, automatic scale) and score it."""
    try:
        m = resolve_model(model)
        title = title or m.title or str(model)
    except (ValueError, TypeError) as err:
        return ModelScore(str(model), title or str(model), x.size, 0, math.nan, math.inf, str(err))
    n = int(x.size)
    try:
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore")
            res = fit(m, x, y, loss="huber", sigma=sigma)
    except (ValueError, ArithmeticError) as err:
        return ModelScore(m.name, title, n, len(m.param_names), math.nan, math.inf,
                          f"the fit is refused ({str(err).rstrip('.')})")
    p = len(res.values)
    problem = fit_problem(m, x, res)
    scale = float(res.scale)
    if problem or not (np.isfinite(scale) and scale >= 0):
        return ModelScore(m.name, title, n, p, scale, math.inf, problem or "no usable scale")
    tiny = np.finfo(float).tiny
    crit = n * math.log(max(scale, tiny) ** 2) + p * math.log(n)
    return ModelScore(m.name, title, n, p, scale, crit, "")


def choose_model(x, y, sigma=None, current="line", *, candidates: Sequence[str] = CANDIDATES,
                 max_points: int = 80, progress: Callable | None = None,
                 cancel: Callable[[], bool] | None = None) -> ModelChoice:
    """Is ``current`` a good model for these data, and if not, which catalogue model is?

    ``x``, ``y``, ``sigma``: the used points (exclusions already removed). Returns a
    :class:`ModelChoice`; ``progress(done, total)`` and ``cancel()`` are called between
    fits (a window runs this off its GUI thread).
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    sigma = None if sigma is None else np.asarray(sigma, float)
    ok = np.isfinite(x) & np.isfinite(y)
    if sigma is not None:
        ok &= np.isfinite(sigma) & (sigma > 0)
        sigma = sigma[ok]
    x, y, sigma = _thin(x[ok], y[ok], sigma, max_points)
    candidates = [c for c in candidates if c not in PEAKS or _has_inner_extreme(x, y)]
    names = list(dict.fromkeys([current] + [c for c in candidates if c != current])) \
        if isinstance(current, str) else [current] + list(candidates)
    scores = []
    for k, name in enumerate(names):
        if cancel is not None and cancel():
            break
        scores.append(assess(name, x, y, sigma))
        if progress is not None:
            progress(k + 1, len(names))
    cur = scores[0]
    fitting = [s for s in scores if s.fits]
    if not fitting:
        return ModelChoice(True, cur, None, tuple(scores))
    lowest = min(s.criterion for s in fitting)
    tolerance = 2.0 * math.log(max(cur.n, 2))
    as_good = [s for s in fitting if s.criterion <= lowest + tolerance]
    best = min(as_good, key=lambda s: (s.p, s.criterion))
    keep = cur.fits and cur.criterion <= lowest + tolerance
    return ModelChoice(keep, cur, best, tuple(scores))
