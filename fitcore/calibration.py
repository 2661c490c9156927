r"""Calibration: read unknown samples off a fitted curve, detection limits, lack of fit.

``inverse_predict(result, readings, level=0.95)``
    One unknown sample measured ``m`` times (``readings``). The estimate solves
    ``f(x0) = ybar0`` (``ybar0`` the mean reading) by a bracketed root search inside
    the calibrated range (the range of the used standards' x).

    * Straight line ``y = a + b x`` fitted by least squares without sigma or a
      weighting rule: the classical formula (ISO 8466-1; EURACHEM/CITAC QUAM 3rd ed.
      App. E.4; the standard analytical-chemistry texts)::

          x0 = (ybar0 - a) / b
          s_x0 = (s / b) sqrt(1/m + 1/n + (ybar0 - ybar)^2 / (b^2 Sxx))

      with a Student t quantile on ``n - 2`` degrees of freedom.
    * Any other model or loss: the delta method (GUM, JCGM 100:2008, 5.1.2, for an
      implicitly defined quantity): ``u(x0)^2 = (g^T C g + v0 / m) / f'(x0)^2`` with
      ``g`` the gradient of ``f`` in the parameters at ``x0``, ``C`` the fit's
      covariance and ``v0`` the variance of one reading at ``x0`` (``scale^2``; the
      robust scale for a robust loss; sigma or a weighting rule scale it). For a
      straight line least-squares fit this is the classical formula exactly.

    The interval is ``x0 -/+ t u`` (t on the fit's degrees of freedom). The
    Fieller-type interval, the set of x whose prediction band at the mean of ``m``
    readings contains ``ybar0``, is given beside it (``.fieller``); it is unbounded when
    the slope is not significantly different from zero, and the result then says so.

    A reading outside the range of the curve over the standards is extrapolated
    (at most one calibrated range beyond the standards, on the same monotone branch)
    with a warning; a reading the curve does not reach there (e.g. beyond an
    asymptote) or meets more than once is refused with a :class:`CalibrationError`.

``detection_limits(result, level=0.95, readings=1)``
    ICH Q2(R1) (Validation of analytical procedures, part 2, 6.3 and 7.3, "based on
    the standard deviation of the response and the slope"): ``LOD = 3.3 sigma / S``,
    ``LOQ = 10 sigma / S`` with sigma the residual standard deviation and S the slope
    at the blank (x = 0). ISO 11843-2 critical value of the net concentration for a
    straight line: ``x_c = t(1 - alpha, n - 2) (s / b) sqrt(1/K + 1/n + xbar^2 / Sxx)``
    with K readings of the unknown, and the minimum detectable value ``x_d ~ 2 x_c``
    (the standard's approximation for alpha = beta = 0.05 and constant variance). For
    other models and losses the same figures come from the delta method at the blank
    (named so in ``.rules``). Section numbers are given from memory.

``lack_of_fit(result)``
    When standards are measured in replicate (repeated x), the classical F test of
    lack of fit against pure error for a least-squares fit (Draper & Smith, *Applied
    Regression Analysis*, 3rd ed., 2.1; ISO 8466-1 uses the same split)::

        SS_pe  = sum over levels of sum (y - level mean)^2,   df_pe = n - g
        SS_lof = RSS - SS_pe,                                  df_lof = g - p
        F = (SS_lof / df_lof) / (SS_pe / df_pe)

    (weighted by 1/sigma^2 when the fit was weighted).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from ._lazy import LazyModule

from .numbers import format_interval, format_uncertainty, format_value
from .weighting import reading_sigma as _rule_sigma

optimize = LazyModule("scipy.optimize", globals())  # lazy: 0.4 s to import, needed once a fit runs
special = LazyModule("scipy.special", globals())  # lazy: 0.3 s to import, needed once results are made

__all__ = [
    "CalibrationError",
    "DetectionLimits",
    "InversePrediction",
    "LackOfFit",
    "calibrated_range",
    "detection_limits",
    "inverse_predict",
    "lack_of_fit",
]


class CalibrationError(ValueError):
    """A reading or a calibration that cannot be read back (plain-language message)."""


RULE_CLASSICAL = ("ISO 8466-1 straight line: x0 = (mean reading - a)/b, "
                  "s_x0 = (s/b) sqrt(1/m + 1/n + (mean reading - mean y)^2/(b^2 Sxx))")
RULE_DELTA = ("delta method: u(x0)^2 = (g' C g + v0/m)/f'(x0)^2, C the fit's covariance, "
              "v0 the variance of one reading")
RULE_ICH_LOD = "ICH Q2(R1) 6.3: LOD = 3.3 sigma/S (sigma residual SD, S slope at the blank)"
RULE_ICH_LOQ = "ICH Q2(R1) 7.3: LOQ = 10 sigma/S (sigma residual SD, S slope at the blank)"
RULE_ISO_XC = ("ISO 11843-2 critical value: x_c = t(1 - alpha, n - 2) (s/b) "
               "sqrt(1/K + 1/n + xbar^2/Sxx)")
RULE_ISO_XD = "ISO 11843-2 minimum detectable value: x_d ~ 2 x_c (alpha = beta = 0.05)"
RULE_LOF = ("lack-of-fit F test (least squares): F = (SS_lof/(g - p)) / (SS_pe/(n - g)), "
            "pure error from replicate standards")


# --------------------------------------------------------------------------- helpers
def _used(result) -> np.ndarray:
    x, y = np.asarray(result.x, float), np.asarray(result.y, float)
    return ~np.asarray(result.excluded, bool) & np.isfinite(x) & np.isfinite(y)


def calibrated_range(result) -> tuple[float, float]:
    """The x range of the standards used in the fit."""
    xu = np.asarray(result.x, float)[_used(result)]
    if xu.size == 0:
        raise CalibrationError("the calibration has no used standards")
    return float(xu.min()), float(xu.max())


def _slope_index(model) -> int | None:
    """Index of the slope when ``model`` is the straight line ``a + b x``, else None."""
    if not model.is_linear or model.n_params != 2:
        return None
    try:
        t = np.array([0.0, 1.0, 2.0, -3.5])
        A = np.asarray(model.basis(t), float)
    except Exception:  # noqa: BLE001 - a basis that cannot take these x is not a line
        return None
    if A.shape != (4, 2):
        return None
    for j in (0, 1):
        if np.allclose(A[:, j], 1.0, rtol=0, atol=1e-15) and np.allclose(
                A[:, 1 - j], t, rtol=0, atol=1e-15):
            return 1 - j
    return None


def _classical(result) -> bool:
    """True when the classical straight-line formulas apply exactly."""
    return (result.loss == "l2" and result.sigma is None and not result.fixed
            and _weighting(result) is None and _slope_index(result.model) is not None)


def _weighting(result):
    """The weighting rule recorded by fit() (see fitcore.weighting), or None."""
    return (result.info or {}).get("weighting")


def _check_result(result):
    if result is None or not hasattr(result, "model"):
        raise CalibrationError("no calibration fit: fit the standards first")
    if result.dof <= 0:
        raise CalibrationError("the calibration has no degrees of freedom left: more "
                               "standards than parameters are needed to read back unknowns")
    C = np.asarray(result.covariance, float)
    if not np.all(np.isfinite(C)) or not np.all(np.isfinite(result.values)):
        raise CalibrationError("the calibration fit has no usable uncertainties (see its "
                               "message); fix the fit before reading back unknowns")
    if not (result.scale > 0 and math.isfinite(result.scale)):
        raise CalibrationError("the calibration's residual scale is zero or unknown, so the "
                               "spread of a reading cannot be estimated")


def _level_ok(level):
    try:
        level = float(level)
    except (TypeError, ValueError):
        raise CalibrationError(f"level must be a number between 0 and 1, not {level!r}") from None
    if not 0.0 < level < 1.0:
        raise CalibrationError(f"level must lie between 0 and 1 (e.g. 0.95), not {level:g}")
    return level


def _readings(readings) -> np.ndarray:
    if np.isscalar(readings):
        readings = [readings]
    try:
        r = np.asarray(list(readings), dtype=float).ravel()
    except (TypeError, ValueError):
        raise CalibrationError("the readings must be numbers") from None
    if r.size == 0:
        raise CalibrationError("no reading given for the unknown sample")
    if not np.all(np.isfinite(r)):
        raise CalibrationError("every reading must be a finite number")
    return r


def _f(result, x) -> np.ndarray:
    with np.errstate(all="ignore"):
        return np.asarray(result.model.f(np.atleast_1d(np.asarray(x, float)), result.values),
                          float)


def _grad(result, x0: float) -> np.ndarray:
    with np.errstate(all="ignore"):
        return np.asarray(result.model.jac(np.array([float(x0)]), result.values),
                          float).reshape(-1)


def _step(result, x0: float) -> float:
    lo, hi = calibrated_range(result)
    return 1e-4 * max(hi - lo, abs(x0), 1e-300)


def _dfdx(result, x0: float) -> float:
    """Slope of the curve in x at x0 (exact for a line, 4-point central difference)."""
    j = _slope_index(result.model)
    if j is not None:
        return float(result.values[j])
    h = _step(result, x0)
    v = _f(result, [x0 - 2 * h, x0 - h, x0 + h, x0 + 2 * h])
    if not np.all(np.isfinite(v)):
        h /= 100.0
        v = _f(result, [x0 - h, x0 + h])
        return float((v[1] - v[0]) / (2 * h))
    return float((v[0] - 8 * v[1] + 8 * v[2] - v[3]) / (12 * h))


def _dgrad_dx(result, x0: float) -> np.ndarray:
    """d/dx of the parameter gradient at x0 (for the uncertainty of the local slope)."""
    h = _step(result, x0)
    return (_grad(result, x0 + h) - _grad(result, x0 - h)) / (2 * h)


def _interp_sigma(result, x0: float) -> float:
    """Sigma of a new reading at x0: linear interpolation of the standards' sigma in x
    (held constant beyond the ends)."""
    used = _used(result)
    xs = np.asarray(result.x, float)[used]
    ss = np.asarray(result.sigma, float)[used]
    order = np.argsort(xs, kind="stable")
    xs, ss = xs[order], ss[order]
    # average sigma over repeated x, so interp sees a function
    ux, inv = np.unique(xs, return_inverse=True)
    sm = np.bincount(inv, weights=ss) / np.bincount(inv)
    return float(np.interp(x0, ux, sm))


def reading_variance(result, x0: float, reading_sigma: float | None = None) -> float:
    """Variance of one new reading at x0, in y units.

    Without sigma: ``scale^2`` (the residual variance; the robust scale for robust
    losses). With a weighting rule: ``scale^2 v(x0)`` with the rule's variance
    function. With sigma taken as absolute: ``sigma0^2``; as relative:
    ``(scale sigma0)^2``; ``sigma0`` is ``reading_sigma`` when given, else the
    standards' sigma interpolated linearly in x.
    """
    s = float(result.scale)
    rule = _weighting(result)
    if rule is not None:
        sig0 = reading_sigma if reading_sigma is not None else _rule_sigma(
            rule, float(x0), float(_f(result, x0)[0]))
        return (s * float(sig0)) ** 2
    if result.sigma is None:
        if reading_sigma is not None:
            return float(reading_sigma) ** 2
        return s * s
    sig0 = float(reading_sigma) if reading_sigma is not None else _interp_sigma(result, x0)
    if result.sigma_mode == "absolute":
        return sig0 * sig0
    return (s * sig0) ** 2


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class InversePrediction:
    """An unknown sample read back off the calibration curve.

    ``x`` the estimate, ``u`` its standard uncertainty, ``interval`` ``x -/+ t u`` at
    ``level`` with ``dof`` degrees of freedom, ``method`` one line naming the rule;
    ``fieller`` the interval from inverting the prediction band (may hold +-inf),
    ``extrapolated`` True when the mean reading lies beyond the curve's values over
    the standards, ``warnings`` plain sentences.
    """

    x: float
    u: float
    interval: tuple[float, float]
    dof: int
    method: str
    level: float
    readings: tuple[float, ...]
    mean_reading: float
    m: int
    fieller: tuple[float, float]
    extrapolated: bool
    slope: float
    u_curve: float
    u_reading: float
    t: float
    warnings: tuple[str, ...] = ()

    def as_dict(self) -> dict:
        return {
            "x": self.x, "u": self.u, "interval": list(self.interval), "dof": self.dof,
            "method": self.method, "level": self.level, "readings": list(self.readings),
            "mean_reading": self.mean_reading, "m": self.m, "fieller": list(self.fieller),
            "extrapolated": self.extrapolated, "warnings": list(self.warnings),
        }


@dataclass(frozen=True)
class DetectionLimits:
    """Detection and quantification limits in x units; ``rules`` names each figure's rule."""

    lod_ich: float
    loq_ich: float
    critical_x: float
    detection_x: float
    sigma: float
    slope: float
    readings: int
    level: float
    dof: int
    method: str
    rules: dict = field(default_factory=dict)


@dataclass(frozen=True)
class LackOfFit:
    """Lack-of-fit F test against pure error from replicate standards."""

    F: float
    p_value: float
    df_lof: int
    df_pe: int
    ss_lof: float
    ss_pe: float
    levels: int
    method: str = RULE_LOF

    def text(self) -> str:
        return (f"F = {self.F:.4g} on {self.df_lof} and {self.df_pe} dof, "
                f"p = {self.p_value:.3g} ({self.levels} x levels with replicates)")


# --------------------------------------------------------------------------- root search
def _root_in(result, lo: float, hi: float, target: float, n: int = 801):
    """Roots of f(x) = target on [lo, hi]: a grid of sign changes refined by brentq."""
    grid = np.linspace(lo, hi, n)
    xs = np.asarray(result.x, float)[_used(result)]
    grid = np.unique(np.concatenate([grid, xs[(xs >= lo) & (xs <= hi)]]))
    d = _f(result, grid) - target
    roots = []
    ok = np.isfinite(d)
    both = ok[:-1] & ok[1:]
    with np.errstate(invalid="ignore"):
        hit = both & ((d[:-1] == 0.0) | (d[:-1] * d[1:] < 0))
    for i in np.flatnonzero(hit):  # only the sign changes are visited
        a = d[i]
        if a == 0.0:
            roots.append(float(grid[i]))
        else:
            r = optimize.brentq(lambda t: float(_f(result, t)[0]) - target,
                                grid[i], grid[i + 1], xtol=1e-14 * max(1.0, abs(grid[i])),
                                rtol=4 * np.finfo(float).eps, maxiter=200)
            roots.append(float(r))
    if ok[-1] and d[-1] == 0.0:
        roots.append(float(grid[-1]))
    roots = sorted(set(roots))
    return roots, grid, d


def _solve_x0(result, target: float) -> tuple[float, bool]:
    """x0 with f(x0) = target: inside the calibrated range, or on the same monotone
    branch up to one range beyond it (extrapolated = True). Raises otherwise."""
    lo, hi = calibrated_range(result)
    span = hi - lo
    if not span > 0:
        raise CalibrationError("the standards all have the same x: there is no calibrated "
                               "range to read back from")
    j = _slope_index(result.model)
    if j is not None:
        # a straight line: one root anywhere (slope 0 has none)
        b = float(result.values[j])
        if b == 0.0:
            raise CalibrationError("the calibration line is flat (slope 0): a reading does "
                                   "not determine x")
        x0 = (target - float(result.values[1 - j])) / b
        return x0, not (lo <= x0 <= hi)
    roots, _grid, d = _root_in(result, lo, hi, target)
    fv = d + target
    if len(roots) == 1:
        return roots[0], False
    if len(roots) > 1:
        shown = ", ".join(f"{r:.6g}" for r in roots[:4])
        raise CalibrationError(
            f"the reading {target:.6g} meets the curve more than once inside the "
            f"calibrated range (at x = {shown}): the curve is not one-to-one there, so the "
            f"reading cannot be read back unambiguously; narrow the range of standards or "
            f"choose a model that is monotone over it")
    # outside: try each end, going outward on the branch that continues the curve
    found = []
    for edge, outer in ((lo, lo - span), (hi, hi + span)):
        r2, g2, d2 = _root_in(result, min(edge, outer), max(edge, outer), target)
        if not r2:
            continue
        root = max(r2) if outer < edge else min(r2)
        # the curve must be monotone from the edge to the root, in the direction it has
        # at the edge inside the range
        between = (g2 >= min(edge, root)) & (g2 <= max(edge, root))
        vals = d2[between]
        if vals.size >= 2 and np.all(np.isfinite(vals)):
            steps = np.diff(vals)
            inside_dir = np.sign(fv[1] - fv[0]) if edge == lo else np.sign(fv[-1] - fv[-2])
            if np.all(np.sign(steps[steps != 0]) == inside_dir):
                found.append(root)
    if len(found) == 1:
        return found[0], True
    finite = fv[np.isfinite(fv)]
    reach = (f"from {finite.min():.6g} to {finite.max():.6g}" if finite.size else "nothing")
    extra = ""
    names = result.param_names
    if "top" in names and "bottom" in names:
        top, bottom = result["top"], result["bottom"]
        hi_a, lo_a = max(top, bottom), min(top, bottom)
        if target >= hi_a:
            extra = f" (it lies above the upper asymptote, {hi_a:.6g})"
        elif target <= lo_a:
            extra = f" (it lies below the lower asymptote, {lo_a:.6g})"
    if len(found) > 1:
        raise CalibrationError(
            f"the reading {target:.6g} lies outside the curve's values over the standards "
            f"({reach}) and the curve reaches it on both sides of the range: it cannot be "
            f"read back unambiguously")
    raise CalibrationError(
        f"the reading {target:.6g} cannot be read back: the curve takes values {reach} over "
        f"the standards (x = {lo:.6g} to {hi:.6g}) and does not reach it on the same branch "
        f"within one calibrated range beyond them{extra}; dilute or re-measure the sample, "
        f"or extend the standards")


def _fieller(result, x0, target, m, t, var_read_fn) -> tuple[float, float]:
    """Interval of x whose prediction band (mean of m readings) contains ``target``."""
    C = np.asarray(result.covariance, float)
    if _classical(result):
        j = _slope_index(result.model)
        a, b = float(result.values[1 - j]), float(result.values[j])
        used = _used(result)
        xu = np.asarray(result.x, float)[used]
        n = xu.size
        xbar = float(xu.mean())
        sxx = float(np.sum((xu - xbar) ** 2))
        s2 = float(result.scale) ** 2
        q = t * t * s2 / sxx
        c = t * t * s2 * (1.0 / m + 1.0 / n)
        D = target - (a + b * xbar)
        A = b * b - q
        if A <= 0:
            return (-math.inf, math.inf)
        disc = b * b * D * D - A * (D * D - c)
        root = math.sqrt(max(disc, 0.0))
        d1, d2 = (b * D - root) / A, (b * D + root) / A
        return (xbar + d1, xbar + d2)

    def h(x):
        g = _grad(result, x)
        v = float(g @ C @ g) + var_read_fn(x) / m
        return (target - float(_f(result, x)[0])) ** 2 - t * t * v

    def h_grid(xs):
        # the same as h on many x at once (one Jacobian call): the scan is vectorised
        with np.errstate(all="ignore"):
            J = np.asarray(result.model.jac(xs, result.values), float).reshape(xs.size, -1)
            var = np.einsum("ij,jk,ik->i", J, C, J)
            vr = np.array([var_read_fn(float(v)) for v in xs]) if _varies(result) \
                else np.full(xs.size, var_read_fn(float(x0)))
            return (target - _f(result, xs)) ** 2 - t * t * (var + vr / m)

    lo, hi = calibrated_range(result)
    span = hi - lo
    out = []
    for direction, limit in ((-1, lo - 2 * span), (1, hi + 2 * span)):
        grid = np.linspace(x0, limit, 400)
        hv = h_grid(grid[1:])
        edge = -math.inf if direction < 0 else math.inf
        bad = ~np.isfinite(hv)
        pos = hv > 0
        stop = np.flatnonzero(bad | pos)
        if stop.size and pos[stop[0]]:
            k = int(stop[0])
            prev = grid[k]  # grid[k] is the last point inside (grid[0] = x0)
            edge = optimize.brentq(h, prev, grid[k + 1], xtol=1e-12 * max(1.0, abs(grid[k + 1])))
        out.append(edge)
    return (out[0], out[1])


def _varies(result) -> bool:
    """True when the variance of a reading depends on x (sigma or a weighting rule)."""
    return result.sigma is not None or _weighting(result) is not None


# --------------------------------------------------------------------------- public
def inverse_predict(result, readings: Sequence[float] | float, level: float = 0.95, *,
                    reading_sigma: float | None = None) -> InversePrediction:
    """Read one unknown sample off the calibration curve; see the module docstring.

    ``readings`` are the sample's replicate readings (one number or a sequence);
    ``reading_sigma`` optionally gives the standard uncertainty of one reading when the
    calibration was fitted with sigma (default: interpolated from the standards).
    """
    level = _level_ok(level)
    _check_result(result)
    r = _readings(readings)
    m = int(r.size)
    ybar0 = float(r.mean())
    x0, extrapolated = _solve_x0(result, ybar0)
    t = result.t_quantile(level)
    C = np.asarray(result.covariance, float)
    warns: list[str] = []

    if _classical(result):
        j = _slope_index(result.model)
        a, b = float(result.values[1 - j]), float(result.values[j])
        used = _used(result)
        xu = np.asarray(result.x, float)[used]
        yu = np.asarray(result.y, float)[used]
        n = xu.size
        xbar, ybar = float(xu.mean()), float(yu.mean())
        sxx = float(np.sum((xu - xbar) ** 2))
        s = float(result.scale)
        x0 = (ybar0 - a) / b
        u = abs(s / b) * math.sqrt(1.0 / m + 1.0 / n + (ybar0 - ybar) ** 2 / (b * b * sxx))
        u_read = abs(s / b) / math.sqrt(m)
        u_curve = abs(s / b) * math.sqrt(1.0 / n + (ybar0 - ybar) ** 2 / (b * b * sxx))
        slope = b
        se_b = s / math.sqrt(sxx)
        slope_ok = abs(b) > t * se_b
        method = f"{RULE_CLASSICAL}; Student t on n - 2 = {result.dof} dof"

        def var_fn(xv):
            return s * s
    else:
        slope = _dfdx(result, x0)
        if not (math.isfinite(slope) and slope != 0.0):
            raise CalibrationError(f"the curve is flat at x = {x0:.6g} (slope 0): a reading "
                                   f"there does not determine x")
        g = _grad(result, x0)
        var_curve = max(float(g @ C @ g), 0.0)

        def var_fn(xv, _rs=reading_sigma):
            return reading_variance(result, xv, _rs)

        v0 = var_fn(x0)
        u_curve = math.sqrt(var_curve) / abs(slope)
        u_read = math.sqrt(v0 / m) / abs(slope)
        u = math.sqrt(var_curve + v0 / m) / abs(slope)
        dg = _dgrad_dx(result, x0)
        u_slope = math.sqrt(max(float(dg @ C @ dg), 0.0))
        slope_ok = abs(slope) > t * u_slope
        what = "robust scale" if result.loss != "l2" else "residual variance"
        if _weighting(result) is not None or result.sigma is not None:
            what += " times the reading's relative variance" if (
                _weighting(result) is not None or result.sigma_mode != "absolute") else ""
            if result.sigma is not None and result.sigma_mode == "absolute" \
                    and _weighting(result) is None:
                what = "the reading's sigma"
        method = f"{RULE_DELTA} ({what}); Student t on {result.dof} dof"

    fieller = _fieller(result, x0, ybar0, m, t, var_fn)
    if not slope_ok or not (math.isfinite(fieller[0]) and math.isfinite(fieller[1])):
        warns.append("the slope is not significantly different from zero at this level: "
                     "the interval from inverting the prediction band is unbounded, so "
                     "this calibration cannot bound the unknown")
    lo, hi = calibrated_range(result)
    if extrapolated:
        warns.append(f"the mean reading {ybar0:.6g} lies outside the curve's values over the "
                     f"standards (x = {lo:.6g} to {hi:.6g}): x = {x0:.6g} is extrapolated")
    if not result.converged:
        warns.append("the calibration fit did not converge: " + str(result.message))
    return InversePrediction(
        x=float(x0), u=float(u), interval=(float(x0 - t * u), float(x0 + t * u)),
        dof=int(result.dof), method=method, level=level, readings=tuple(float(v) for v in r),
        mean_reading=ybar0, m=m, fieller=(float(fieller[0]), float(fieller[1])),
        extrapolated=bool(extrapolated), slope=float(slope), u_curve=float(u_curve),
        u_reading=float(u_read), t=float(t), warnings=tuple(warns))


def detection_limits(result, level: float = 0.95, readings: int = 1, *,
                     blank_x: float = 0.0) -> DetectionLimits:
    """ICH Q2(R1) LOD/LOQ and the ISO 11843-2 critical and detectable values (x units).

    ``readings`` is K, the number of readings of an unknown; ``level`` is 1 - alpha of
    the one-sided critical value. See the module docstring for the rules.
    """
    level = _level_ok(level)
    _check_result(result)
    try:
        K = int(readings)
    except (TypeError, ValueError):
        raise CalibrationError("the number of readings K must be a whole number") from None
    if K < 1:
        raise CalibrationError("the number of readings K must be at least 1")
    t1 = result.t_ppf(level)  # the one-sided t quantile (scipy.stats.t.ppf)
    rules = {"lod_ich": RULE_ICH_LOD, "loq_ich": RULE_ICH_LOQ,
             "critical_x": RULE_ISO_XC, "detection_x": RULE_ISO_XD}
    if _classical(result):
        j = _slope_index(result.model)
        b = float(result.values[j])
        xu = np.asarray(result.x, float)[_used(result)]
        n = xu.size
        xbar = float(xu.mean())
        sxx = float(np.sum((xu - xbar) ** 2))
        s = float(result.scale)
        sigma, S = s, b
        xc = t1 * abs(s / b) * math.sqrt(1.0 / K + 1.0 / n + xbar * xbar / sxx)
        method = (f"straight line by least squares, n = {n}, K = {K}, "
                  f"t({level:g}, {result.dof} dof) = {t1:.6g}")
    else:
        f0 = float(_f(result, blank_x)[0])
        S = _dfdx(result, blank_x)
        if not (math.isfinite(f0) and math.isfinite(S)) or S == 0.0:
            raise CalibrationError(f"the curve has no usable slope at the blank (x = "
                                   f"{blank_x:g}), so detection limits cannot be given")
        v0 = reading_variance(result, blank_x)
        if not (v0 > 0 and math.isfinite(v0)):
            raise CalibrationError(
                "the weighting gives a reading at the blank zero variance (a 1/x or 1/y "
                "rule at x or y = 0), so detection limits cannot be estimated from this "
                "calibration; measure blanks and use their standard deviation")
        sigma = math.sqrt(v0)
        g = _grad(result, blank_x)
        C = np.asarray(result.covariance, float)
        xc = t1 * math.sqrt(v0 / K + max(float(g @ C @ g), 0.0)) / abs(S)
        delta = (" - delta-method form at the blank for a model other than a straight "
                 "least-squares line")
        rules = {"lod_ich": RULE_ICH_LOD + " (sigma of a reading at the blank)",
                 "loq_ich": RULE_ICH_LOQ + " (sigma of a reading at the blank)",
                 "critical_x": "ISO 11843-2 critical value" + delta
                 + ": x_c = t(1 - alpha, dof) sqrt(v0/K + g' C g)/|f'(0)|",
                 "detection_x": RULE_ISO_XD}
        method = (f"{result.model.title or result.model.name}, loss {result.loss}, "
                  f"K = {K}, t({level:g}, {result.dof} dof) = {t1:.6g}")
    return DetectionLimits(
        lod_ich=float(3.3 * sigma / abs(S)), loq_ich=float(10.0 * sigma / abs(S)),
        critical_x=float(xc), detection_x=float(2.0 * xc), sigma=float(sigma),
        slope=float(S), readings=K, level=level, dof=int(result.dof), method=method,
        rules=rules)


def replicate_levels(result) -> tuple[np.ndarray, np.ndarray]:
    """Distinct x of the used standards and how many standards sit at each."""
    xu = np.asarray(result.x, float)[_used(result)]
    ux, counts = np.unique(xu, return_counts=True)
    return ux, counts


def lack_of_fit(result) -> LackOfFit | None:
    """Lack-of-fit F test for a least-squares fit with replicate standards, else None."""
    if result is None or result.loss != "l2":
        return None
    used = _used(result)
    xu = np.asarray(result.x, float)[used]
    yu = np.asarray(result.y, float)[used]
    fu = np.asarray(result.fitted, float)[used]
    if result.sigma is not None:
        w = 1.0 / np.asarray(result.sigma, float)[used] ** 2
    else:
        w = np.ones_like(xu)
    ux, inv = np.unique(xu, return_inverse=True)
    g = ux.size
    n = xu.size
    p = int(np.count_nonzero(result.free))
    df_pe, df_lof = n - g, g - p
    if df_pe <= 0 or df_lof <= 0:
        return None
    means = np.bincount(inv, weights=w * yu) / np.bincount(inv, weights=w)
    ss_pe = float(np.sum(w * (yu - means[inv]) ** 2))
    rss = float(np.sum(w * (yu - fu) ** 2))
    ss_lof = max(rss - ss_pe, 0.0)
    if not ss_pe > 0:
        return None
    F = (ss_lof / df_lof) / (ss_pe / df_pe)
    return LackOfFit(F=float(F), p_value=float(special.fdtrc(df_lof, df_pe, F)),
                     df_lof=int(df_lof), df_pe=int(df_pe), ss_lof=ss_lof, ss_pe=ss_pe,
                     levels=int(g))


# --------------------------------------------------------------------------- text
UNKNOWN_FORMATS = ("plain", "tsv", "markdown", "latex", "siunitx", "html")


def _esc_html(s: str) -> str:
    import html as _html

    return _html.escape(str(s))


def _esc_tex(s: str) -> str:
    out = str(s)
    for a, b in (("\\", r"\textbackslash{}"), ("&", r"\&"), ("%", r"\%"), ("$", r"\$"),
                 ("#", r"\#"), ("_", r"\_"), ("{", r"\{"), ("}", r"\}")):
        out = out.replace(a, b)
    return out


def unknown_rows(items, limits=None, *, full_precision: bool = False):
    """Table rows for read-back unknowns.

    ``items``: ``(name, InversePrediction or error text)`` pairs. Returns a list of
    dicts with ``name``, ``readings`` (count), ``mean``, ``x``, ``u``, ``interval``
    (texts, GUM-rounded by :func:`fitcore.report.format_value`) and ``flag``.
    """
    rows = []
    for name, ip in items:
        if isinstance(ip, str) or ip is None:
            rows.append({"name": str(name), "readings": "", "mean": "", "x": "", "u": "",
                         "interval": "", "flag": f"not read back: {ip or 'no fit'}"})
            continue
        if full_precision:
            xt, ut = repr(float(ip.x)), repr(float(ip.u))
            it = f"[{ip.interval[0]!r}, {ip.interval[1]!r}]"
        else:
            xt = format_value(ip.x, ip.u, style="paren")
            ut = format_uncertainty(ip.x, ip.u)
            it = format_interval(ip.interval[0], ip.interval[1], ip.x, ip.u)
        rows.append({"name": str(name), "readings": str(ip.m), "mean": f"{ip.mean_reading:.6g}",
                     "x": xt, "u": ut, "interval": it, "flag": "; ".join(flags(ip, limits))})
    return rows


def flags(ip, limits=None) -> list[str]:
    """Short flags of one read-back: extrapolated, below the detection/quantification
    limits (ICH Q2(R1) figures), slope not significant."""
    out = []
    if ip.extrapolated:
        out.append("extrapolated")
    if limits is not None and isinstance(limits, DetectionLimits):
        if ip.x < limits.lod_ich:
            out.append("below LOD")
        elif ip.x < limits.loq_ich:
            out.append("below LOQ")
    if any("not significantly" in w for w in ip.warnings):
        out.append("slope not significant")
    return out


def limits_lines(limits, lof=None, x_unit: str = "") -> list[tuple[str, str]]:
    """(label, text) lines for detection limits and the lack-of-fit test."""
    unit = f" {x_unit}" if x_unit else ""
    out: list[tuple[str, str]] = []
    if isinstance(limits, DetectionLimits):
        for key, label in (("lod_ich", "LOD"), ("loq_ich", "LOQ"),
                           ("critical_x", "critical value x_c"),
                           ("detection_x", "detection limit x_d")):
            out.append((label, f"{getattr(limits, key):.4g}{unit} ({limits.rules[key]})"))
    elif limits:
        out.append(("limits", f"not available: {limits}"))
    if lof is not None:
        out.append(("lack of fit", f"{lof.text()}; {lof.method}"))
    return out


def unknowns_text(items, fmt: str = "plain", *, level: float = 0.95, limits=None, lof=None,
                  x_unit: str = "", full_precision: bool = False) -> str:
    """The unknown samples read back off the calibration, in a copy/report format.

    ``items``: ``(name, InversePrediction or error text)`` pairs; ``limits``: a
    :class:`DetectionLimits` (or an error text); ``lof``: a :class:`LackOfFit`. The
    method of the read-back is named (from the first result).
    """
    if fmt not in UNKNOWN_FORMATS:
        raise ValueError(f"unknown format {fmt!r}; choose one of {', '.join(UNKNOWN_FORMATS)}")
    items = list(items)
    if not items and limits is None and lof is None:
        return ""
    rows = unknown_rows(items, limits, full_precision=full_precision)
    pct = f"{100 * float(level):.6g} %"
    first = next((ip for _n, ip in items if isinstance(ip, InversePrediction)), None)
    method = first.method if first is not None else ""
    unit = f" ({x_unit})" if x_unit else ""
    head = ["sample", "readings", "mean reading", f"x{unit}", f"u(x){unit}",
            f"{pct} interval", "flags"]
    keys = ["name", "readings", "mean", "x", "u", "interval", "flag"]
    extra = limits_lines(limits, lof, x_unit)
    if method:
        extra = [("read-back method", method)] + extra
    title = ("Unknown samples read back off the calibration" if items
             else "Calibration checks")
    if fmt == "plain":
        lines = [title]
        for r in rows:
            if not r["x"]:
                lines.append(f"  {r['name']}: {r['flag']}")
                continue
            flag = f"  [{r['flag']}]" if r["flag"] else ""
            sp = f" {x_unit}" if x_unit else ""
            lines.append(f"  {r['name']}: x = {r['x']}{sp}, {pct} interval {r['interval']}{sp} "
                         f"(mean of {r['readings']} reading{'s' if r['readings'] != '1' else ''}"
                         f" {r['mean']}){flag}")
        lines += [f"  {a}: {b}" for a, b in extra]
        return "\n".join(lines) + "\n"
    if fmt == "tsv":
        def cell(s):
            return str(s).replace("\t", " ").replace("\n", " ")
        lines = [title] + (["\t".join(head)] if rows else [])
        lines += ["\t".join(cell(r[k]) for k in keys) for r in rows]
        lines += [f"{cell(a)}\t{cell(b)}" for a, b in extra]
        return "\n".join(lines) + "\n"
    if fmt == "markdown":
        def md(s):
            return str(s).replace("|", "\\|")
        lines = [f"**{title}**", ""]
        if rows:
            lines += ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        lines += ["| " + " | ".join(md(r[k]) for k in keys) + " |" for r in rows]
        lines += ([""] if rows else []) + [f"- {md(a)}: {md(b)}" for a, b in extra]
        return "\n".join(lines) + "\n"
    if fmt in ("latex", "siunitx"):
        def num(s):
            if fmt == "siunitx" and s and s[0] in "-0123456789" and "(" in s:
                return r"\num{" + s + "}"
            return _esc_tex(s)
        lines = [f"% {title}"]
        if rows:
            lines += [r"\begin{tabular}{lrrrrll}", r"\hline",
                      " & ".join(_esc_tex(h) for h in head) + r" \\", r"\hline"]
            lines += [" & ".join(num(r[k]) if k in ("x",) else _esc_tex(r[k]) for k in keys)
                      + r" \\" for r in rows]
            lines += [r"\hline", r"\end{tabular}"]
        lines += [f"% {a}: {b}" for a, b in extra]
        return "\n".join(lines) + "\n"
    # html
    out = [f"<p><b>{_esc_html(title)}</b></p>"]
    if rows:
        out += ['<table border="1" cellspacing="0" cellpadding="3">',
                "<tr>" + "".join(f"<th>{_esc_html(h)}</th>" for h in head) + "</tr>"]
    for r in rows:
        cells = []
        for k in keys:
            cls = "" if k in ("name", "flag") else ' class="num"'
            cells.append(f"<td{cls}>{_esc_html(r[k])}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    if rows:
        out.append("</table>")
    if extra:
        out.append("<ul>" + "".join(f"<li><b>{_esc_html(a)}</b>: {_esc_html(b)}</li>"
                                    for a, b in extra) + "</ul>")
    return "\n".join(out) + "\n"


def read_back(result, samples, level: float = 0.95):
    """Every unknown sample read off ``result``, with the calibration's limits and
    lack-of-fit test, as the report takes them.

    ``samples``: ``(name, readings)`` pairs. Returns ``(items, limits, lof)``: items
    ``(name, InversePrediction)``, or ``(name, text)`` saying why that sample cannot
    be read back (a reading the curve never or twice meets); ``limits`` a
    :class:`DetectionLimits` or the text saying why there are none; ``lof`` a
    :class:`LackOfFit` or None (no replicate standards, or not least squares).
    """
    items = []
    for name, readings in samples:
        try:
            items.append((str(name), inverse_predict(result, readings, level)))
        except (CalibrationError, ValueError, ArithmeticError) as err:
            items.append((str(name), str(err)))
    try:
        limits = detection_limits(result, level)
    except (CalibrationError, ValueError, ArithmeticError) as err:
        limits = str(err)
    return items, limits, lack_of_fit(result)


def report_html(result, data=None, samples=(), *, level: float = 0.95, **report) -> str:
    """The fit report of a calibration with its unknowns read back: the document of
    :func:`fitcore.report_html.report_html` (the window's and the batch's report) with
    the section of the samples (``(name, readings)`` pairs), the detection limits and
    the lack-of-fit test. ``data`` and the keywords in ``report`` go to that function.
    """
    # here, not at the top: fitcore.report_html imports this module (unknowns_text)
    from .report_html import Unknowns
    from .report_html import report_html as build

    items, limits, lof = read_back(result, samples, level)
    return build(result, data, level=level, unknowns=Unknowns(tuple(items), limits, lof), **report)
