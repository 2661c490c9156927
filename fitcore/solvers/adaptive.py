"""The adaptive loss: Barron's shape alpha and scale c by maximum likelihood,
alternated with the parameter step; up to ``_ML_LARGE`` points a joint Newton iteration
on (parameters, log c, alpha) finishes after the first solve (:func:`_fit_adaptive_joint`),
with the alternation where it declines."""
from __future__ import annotations

import dataclasses
import math

import numpy as np
from .._lazy import LazyModule

from ..losses import barron_rho, get_loss
from ..partition import log_partition, log_partition_slope
from ..scale import mad
from .lm import _irls_lm, _judged
from .mscale import _robust_with_scale
from .problem import _exact_floor, _Inner, _objective, _Problem, _sample_rows

optimize = LazyModule("scipy.optimize", globals())  # lazy: 0.4 s to import, needed once a fit runs


# --------------------------------------------------------------------------- adaptive
def _nll(r: np.ndarray, alpha: float, log_c: float) -> float:
    c = math.exp(log_c)
    n = r.size
    with np.errstate(all="ignore"):
        v = float(np.sum(barron_rho(r / c, alpha, 1.0))) + n * log_c + n * log_partition(alpha)
    return v if math.isfinite(v) else math.inf


def _nll_r2(r2: np.ndarray, alpha: float, log_c: float) -> float:
    """:func:`_nll` from ``r2 = r**2`` (in place in one work array: fewer passes over
    many residuals; equal to rounding)."""
    n = r2.size
    with np.errstate(all="ignore"):
        z = np.divide(r2, math.exp(2.0 * log_c))
        if alpha == 2.0:
            s = 0.5 * float(np.sum(z))
        elif alpha == 0.0:
            np.multiply(z, 0.5, out=z)
            s = float(np.sum(np.log1p(z, out=z)))
        else:
            b = abs(alpha - 2.0)
            np.divide(z, b, out=z)
            np.log1p(z, out=z)
            np.multiply(z, 0.5 * alpha, out=z)
            s = (b / alpha) * float(np.sum(np.expm1(z, out=z)))
        v = s + n * log_c + n * log_partition(alpha)
    return v if math.isfinite(v) else math.inf


def _nll_slope(r2: np.ndarray, alpha: float, log_c: float) -> tuple[float, float]:
    """First and second derivative of :func:`_nll` in ``log c`` (``r2 = r**2``).

    With ``t = r/c`` and ``psi_B(t) = t w_B(t)``: ``d/dlog c = n - sum t psi_B(t)`` and
    ``d2/dlog c2 = sum t psi_B(t) + sum t^2 psi_B'(t)``. ``t psi_B = z w_B(z)`` with
    ``z = t^2`` is increasing in z for alpha >= 0, so the first derivative increases
    with ``log c``: one root, the profile's minimum over c.
    """
    c2 = math.exp(2.0 * log_c)
    with np.errstate(all="ignore"):
        z = r2 / c2
        if alpha == 2.0:
            s1 = float(z.sum())
            return r2.size - s1, 2.0 * s1
        if alpha == 0.0:
            q = 1.0 + 0.5 * z
            w = 1.0 / q  # (barron_weight's own branch at alpha = 0)
        else:
            b = abs(alpha - 2.0)
            q = 1.0 + z / b
            w = np.exp((0.5 * alpha - 1.0) * np.log1p(z / b))  # barron_weight
        zw = z * w
        s1 = float(zw.sum())
        # psi_B' = w (1 + z/b + (alpha - 2) z / b) / (1 + z/b) (barron_dpsi); only the
        # Newton step uses it, the root is set by the first derivative alone
        b = 2.0 if alpha == 0.0 else abs(alpha - 2.0)
        s2 = float((zw * (q + (alpha - 2.0) / b * z) / q).sum())
        return r2.size - s1, s1 + s2


def _best_log_c(r: np.ndarray, alpha: float, lo_c: float, hi_c: float, start: float,
                r2: np.ndarray | None = None) -> float:
    """The ``log c`` in ``[lo_c, hi_c]`` minimising :func:`_nll` at shape ``alpha``: the
    root of its increasing first derivative, by Newton steps kept inside a shrinking
    bracket (bisection where a step leaves it), to 1e-13 in ``log c``. (``r2``: r**2,
    where the caller has it.)"""
    r2 = r * r if r2 is None else r2
    lo0, hi0 = lo_c, hi_c
    lc = start if lo_c < start < hi_c else 0.5 * (lo_c + hi_c)
    for _ in range(200):
        g, h = _nll_slope(r2, alpha, lc)
        if g == 0.0 or math.isnan(g):
            break
        if g < 0.0:
            lo_c = lc
        else:
            hi_c = lc
        nxt = lc - g / h if h > 0.0 and math.isfinite(h) and math.isfinite(g) else math.nan
        if abs(nxt - lc) <= 1e-13 * max(1.0, abs(lc)):
            # a Newton step below rounding: the root (such a step may land on the end of
            # the bracket it just set, which is no reason to bisect it from afar)
            lc = nxt
            break
        if not lo_c < nxt < hi_c:
            nxt = 0.5 * (lo_c + hi_c)
        if abs(nxt - lc) <= 1e-13 * max(1.0, abs(lc)) or hi_c - lo_c <= 1e-13 * max(1.0, abs(lc)):
            lc = nxt
            break
        lc = nxt
    # a root outside the interval: the iteration closed in on the end nearest to it
    # (the slope keeps its sign there), which is then the minimum
    tol = 1e-12 * max(1.0, abs(lc))
    if lc - lo0 <= tol and not _nll_slope(r2, alpha, lo0)[0] < 0.0:
        return lo0
    if hi0 - lc <= tol and not _nll_slope(r2, alpha, hi0)[0] > 0.0:
        return hi0
    return lc


#: interior shapes of :func:`_profile_grid`'s check of a local search (0 and 2 are
#: compared by the search itself)
_GRID = np.linspace(0.0, 2.0, 11)[1:-1]


def _profile_grid(r2: np.ndarray, alphas: np.ndarray, lo_c: float, hi_c: float,
                  start, with_lc: bool = False):
    """The profile NLL (minimised over ``log c`` in ``[lo_c, hi_c]``) at many shapes
    ``0 < alpha < 2`` at once: :func:`_best_log_c`'s bracketed Newton iteration on every
    row of an (alphas x residuals) array, to 1e-10 in ``log c`` (the NLL to ~1e-20). For a check of a local
    search (where another shape may be better), not for the answer itself.
    ``start``: one log c for all shapes, or one per shape; ``with_lc``: also the
    best log c per shape."""
    a = alphas[:, None]
    b = 2.0 - a
    n = r2.size
    lo = np.full(alphas.size, lo_c)
    hi = np.full(alphas.size, hi_c)
    if np.ndim(start):
        lc = np.where((lo_c < start) & (start < hi_c), start, 0.5 * (lo_c + hi_c))
    else:
        lc = np.full(alphas.size, start if lo_c < start < hi_c else 0.5 * (lo_c + hi_c))
    with np.errstate(all="ignore"):
        for _ in range(100):
            z = r2 / np.exp(2.0 * lc)[:, None]
            q = 1.0 + z / b
            zw = z * np.exp((0.5 * a - 1.0) * np.log(q))
            s1 = zw.sum(axis=1)
            g = n - s1
            h = s1 + (zw * (q - z) / q).sum(axis=1)
            lo = np.where(g < 0.0, lc, lo)
            hi = np.where(g > 0.0, lc, hi)
            nxt = lc - g / h
            # (a step below the tolerance is the root, even on the bracket's end it just
            # set; elsewhere a step leaving the bracket is replaced by bisection)
            done = np.abs(nxt - lc) <= 1e-10 * np.maximum(1.0, np.abs(lc))
            bad = ~(done | ((lo < nxt) & (nxt < hi)))
            lc = np.where(bad, 0.5 * (lo + hi), nxt)
            if done.all():
                break
        lc = np.clip(lc, lo_c, hi_c)
        z = r2 / np.exp(2.0 * lc)[:, None]
        rho = (b / a) * np.expm1(0.5 * a * np.log1p(z / b))
        lz = np.array([log_partition(float(v)) for v in alphas])
        v = rho.sum(axis=1) + n * lc + n * lz
    v = np.where(np.isfinite(v), v, np.inf)
    return (v, lc) if with_lc else v


#: above this many residuals the shape is first located on a seeded subsample of
#: ``_ML_SUB`` of them, then refined on all (a few profile evaluations, not ~20)
_ML_LARGE = 40000
_ML_SUB = 20000


def _ml_shape_scale(r: np.ndarray, alpha: float, c: float, c_floor: float,
                    near: bool = False, local: bool = False, checked: bool = False):
    """Maximum-likelihood (alpha, c) for fixed residuals; alpha in [0, 2], c >= c_floor.

    The profile over alpha is minimised by a bounded scalar search; for each alpha the
    best c solves the likelihood equation in ``log c`` (:func:`_best_log_c`), which
    has one root (was a second bounded search, some 40 evaluations per alpha).

    Many residuals (more than ``_ML_LARGE``): the same search on a seeded subsample
    locates the shape; on all the residuals Brent's method then starts from a bracket
    around it (two of the subsample's standard errors of alpha each side, widened while
    it does not bracket the minimum), which takes a handful of evaluations. Where no
    interior bracket is found (a minimum at 0 or 2) the full search runs on all of them.
    ``near``: alpha and c are the previous step's answer on the same points (refitted
    since): the bracket starts around alpha (many residuals only).

    ``local=True`` (the alternation's middle rounds, where the residuals move little
    from one round to the next; up to ``_ML_LARGE`` residuals) searches near the
    previous ``alpha`` only: within 0.05 of a bound, alpha goes to the bound where the
    profile rises inwards from it and the bound is no worse than the previous alpha
    (two or three evaluations instead of the ~38 the bounded search needs to creep to
    a bound); else a bracket of +-0.05 around it. Where that is inconclusive (the best
    value at the bracket's edge) the full search runs. The first and the last round
    always run the full search.

    ``checked=True`` (the alternation's last round): the local search as above, its
    answer then compared with the profile on a grid of shapes 0.2 ... 1.8
    (:func:`_profile_grid`, one vectorised pass); where a grid shape is better the full
    search runs (some 40 profile evaluations instead of ~5 and the grid).
    """
    if r.size > _ML_LARGE:
        local = checked = False
        got = _ml_polished(r, alpha, c, c_floor, near)
        if got is not None:
            return got
    lo_c = math.log(c_floor)
    hi_c = math.log(max(10.0 * float(np.max(np.abs(r))), 10.0 * c, c_floor * 10.0))

    last = [None]  # the previous trial shape's best log c: the next one's Newton start
    r2 = r * r  # (once, not per trial shape)

    def best_c(a, start):
        # (the likelihood equation has one root: no other c to compare with)
        lc = _best_log_c(r, a, lo_c, hi_c, start if last[0] is None else last[0], r2)
        last[0] = lc
        return lc, _nll(r, a, lc)

    cache = {}

    def prof(a):
        a = float(min(max(a, 0.0), 2.0))
        if a not in cache:
            cache[a] = best_c(a, math.log(max(c, c_floor)))
        return cache[a][1]

    def done(a_best):
        lc, val = cache[float(min(max(a_best, 0.0), 2.0))]
        return float(a_best), math.exp(lc), val, prof

    def found(a_best):
        # (``checked``: a local answer stands where it lies within the local bracket and
        # no shape of a coarse grid beats it; else the full search decides)
        if checked:
            if abs(a_best - alpha) > _LOCAL_BRACKET:
                return None
            v = prof(a_best)
            grid = _profile_grid(r2, _GRID, lo_c, hi_c, cache[float(a_best)][0])
            if not float(grid.min()) >= v - 1e-12 * max(abs(v), 1.0):
                return None
        return done(a_best)

    local = local or checked
    got = None
    if local and (alpha <= _LOCAL_BRACKET or alpha >= 2.0 - _LOCAL_BRACKET):
        edge = 0.0 if alpha <= _LOCAL_BRACKET else 2.0
        inward = _LOCAL_STEP if edge == 0.0 else -_LOCAL_STEP
        if prof(edge) <= min(prof(edge + inward), prof(alpha)):
            got = found(edge)
            if got is not None or checked:
                local = False  # (checked and refused: the full search)
    if got is None and local and 0.0 < alpha < 2.0:
        lo, hi = max(0.0, alpha - _LOCAL_BRACKET), min(2.0, alpha + _LOCAL_BRACKET)
        res = optimize.minimize_scalar(prof, bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-7})
        a = float(res.x)
        if (lo == 0.0 or a > lo + 1e-5) and (hi == 2.0 or a < hi - 1e-5):
            got = found(min([a, 0.0, 2.0, float(alpha)], key=prof))
    if got is not None:
        return got
    res = optimize.minimize_scalar(prof, bounds=(0.0, 2.0), method="bounded",
                                   options={"xatol": 1e-7})
    cands = [float(res.x), 0.0, 2.0, float(alpha)]
    a_best = min(cands, key=prof)
    return done(a_best)


_ROUGH_BELOW = 200  # (points below which the pseudo-Huber start is a rough one)
_LOCAL_STEP = 1e-4  # (the inward trial shape at a bound, local search)
_LOCAL_BRACKET = 0.05  # (half-width of the local search's bracket around alpha)


def _ml_polished(r: np.ndarray, alpha: float, c: float, c_floor: float, near: bool = False):
    """:func:`_ml_shape_scale` of many residuals from a subsample's answer, or None.
    ``near``: (alpha, c) are the previous step's on these points, which moved them only
    a little: the bracket starts at alpha, +-0.001 (the subsample is searched only where
    that does not hold the minimum)."""
    if near and _NEAR_D < alpha < 2.0 - _NEAR_D:
        got = _ml_polished_from(r, c, c_floor, alpha, _NEAR_D, tries=2)
        if got is not None:
            return got
    sub = r[_sample_rows(r.size, _ML_SUB, 20240612)]
    a_s, c_s, _, prof_s = _ml_shape_scale(sub, alpha, c, c_floor)
    h = 1e-3
    if not h < a_s < 2.0 - h:
        return None
    d2 = (prof_s(a_s + h) - 2 * prof_s(a_s) + prof_s(a_s - h)) / (h * h)
    if not (d2 > 0 and math.isfinite(d2)):
        return None
    return _ml_polished_from(r, c_s, c_floor, a_s, 2.0 / math.sqrt(d2), tries=4)


_NEAR_D = 1e-3


def _ml_polished_from(r, c_s, c_floor, a_s, d, tries):
    """Brent's method on all of ``r`` from the bracket ``a_s +- d`` (widened fourfold
    while it does not hold the minimum, up to ``tries`` brackets), or None."""
    c = c_s
    lo_c = math.log(c_floor)
    hi_c = math.log(max(10.0 * float(np.max(np.abs(r))), 10.0 * c, c_floor * 10.0))
    last = [math.log(max(c_s, c_floor))]
    cache = {}
    r2 = r * r

    def prof(a):
        a = float(min(max(a, 0.0), 2.0))
        if a not in cache:
            lc = _best_log_c(r, a, lo_c, hi_c, last[0], r2)
            last[0] = lc
            cache[a] = (lc, _nll_r2(r2, a, lc))
        return cache[a][1]

    for _ in range(tries):
        lo, hi = max(a_s - d, 0.0), min(a_s + d, 2.0)
        p_mid = prof(a_s)
        if prof(lo) > p_mid < prof(hi):
            break
        if lo == 0.0 and hi == 2.0:
            return None
        d *= 4.0
    else:
        return None
    a_best = _parabolic_min(prof, lo, a_s, hi)
    if a_best is None:
        # (Brent's tolerance is relative: about 1e-7 absolute, as the full search's)
        res = optimize.minimize_scalar(prof, bracket=(lo, a_s, hi), method="brent",
                                       options={"xtol": 1e-7 / max(a_s, 1e-2)})
        a_best = float(res.x)
    if not lo <= a_best <= hi:
        return None
    prof(a_best)
    lc, val = cache[float(min(max(a_best, 0.0), 2.0))]
    return a_best, math.exp(lc), val, prof


def _parabolic_min(f, a: float, b: float, c: float, xatol: float = 1e-7,
                   max_iter: int = 30) -> float | None:
    """Minimum of ``f`` bracketed by ``a < b < c`` (``f(b)`` below both ends) by
    successive parabolic interpolation: each step goes to the vertex of the parabola
    through the bracket's three points (a golden-section step where the vertex falls
    outside or too near an end) and keeps the best point inside the new bracket; it
    stops when the next step would be below ``xatol``. A smooth profile from a narrow
    bracket needs one or two steps (Brent's method starts with golden-section steps).
    None when it does not settle in ``max_iter`` steps."""
    fa, fb, fc = f(a), f(b), f(c)
    for _ in range(max_iter):
        den = (b - a) * (fb - fc) - (b - c) * (fb - fa)
        num = (b - a) ** 2 * (fb - fc) - (b - c) ** 2 * (fb - fa)
        x = b - 0.5 * num / den if den != 0.0 else math.nan
        if not (a + 0.01 * (b - a) < x < c - 0.01 * (c - b)):
            x = b + 0.381966 * (c - b) if c - b > b - a else b - 0.381966 * (b - a)
        if abs(x - b) <= xatol or c - a <= 2.0 * xatol:
            return b
        fx = f(x)
        if fx < fb:
            if x > b:
                a, fa = b, fb
            else:
                c, fc = b, fb
            b, fb = x, fx
        elif x > b:
            c, fc = x, fx
        else:
            a, fa = x, fx
    return None


def _fit_adaptive(prob: _Problem, theta, s0: float, *, linear: bool, max_iter: int,
                  warm: tuple[float, float] | None = None):
    if warm is None:
        ref = get_loss("pseudo_huber")
        # (a start: below 200 points a rough one, the alternation below refines it)
        inner, s, total = _robust_with_scale(prob, theta, ref, s0, linear=linear, auto=True,
                                             max_iter=max_iter, rough=prob.n < _ROUGH_BELOW)
        alpha, c = 1.0, s
        if (inner.stats or {}).get("exact"):
            # an exact majority: zero scatter says nothing about the shape, and the ML
            # scale would run to zero; the fit through the majority is the answer
            inner = dataclasses.replace(inner, message=inner.message + (
                "; the adaptive loss's shape cannot be estimated from zero scatter: "
                "alpha held at 1 (pseudo-Huber)"))
            info = {"nll": math.nan, "c_floor": s, "scale_at_floor": True, "exact": True}
            return inner, get_loss("general", tuning=1.0, alpha=1.0), s, 1.0, math.nan, total, info
        if 3 * prob.k <= prob.n <= _ML_LARGE:
            # (up to _ML_LARGE points: the joint Newton iteration; the alternation below
            # where it declines. Not below three points per parameter: there the scale
            # can collapse onto a fit through k of them, a far lower NLL that the
            # alternation found and the joint iteration missed in one 8-point 4PL of 224)
            got = _fit_adaptive_joint(prob, inner, s, linear=linear, max_iter=max_iter)
            if got is not None:
                got[5] += total
                return tuple(got)
    else:
        alpha, c = warm
        s, total = c, 0
        # (from a subsample's fit: close enough for Newton steps at once, which the
        # solve refuses and replaces by reweighted ones where they do not descend)
        inner = _irls_lm(prob, theta, get_loss("general", tuning=1.0, alpha=alpha), c,
                         linear=linear, max_iter=max_iter, xtol=1e-9, polish_steps=False,
                         check=False, near=True)
    c_floor = max(1e-6 * s, 1e-300)
    nll_old = math.inf
    prof = None
    solved = None  # (alpha, log c) of the last solve
    flat = False  # (the NLL changed by <= 1e-11 relative in the last round)
    prev = None  # (log c, g(log c) - log c) of the solve before it, at the same shape
    for round_ in range(60):
        a_new, c, nll, prof = _ml_shape_scale(inner.r, alpha, c, c_floor,
                                              near=nll_old < math.inf, local=round_ > 0)
        if solved is not None and a_new == solved[0]:
            # the shape stays (typically at a bound): the scale alone iterates the map
            # g: log c -> ML log c of the residuals solved at c, which converges only
            # linearly (rate ~0.6 seen: the stopping left up to 4e-5 SE). Once the moves
            # are small (< 5 % in c) and shrink steadily in one direction, a secant
            # step on g(l) - l (extrapolating at most 20 moves ahead: bigger jumps of
            # the scale can take the parameters to another minimum)
            l_in, h = solved[1], math.log(c) - solved[1]
            if flat and abs(h) <= 1e-9:
                break  # (the stopping rule below, one solve earlier: the scale stays)
            if prev is not None and abs(h) < 0.05 and 0.0 < h / prev[1] < 0.95:
                cand = l_in + h / (1.0 - h / prev[1])
                if math.exp(cand) > c_floor:
                    c = math.exp(cand)
            prev = (l_in, h)
        else:
            prev = None
        move = (math.inf if solved is None
                else max(abs(a_new - solved[0]), abs(math.log(c) - solved[1])))
        alpha = a_new
        solved = (alpha, math.log(c))
        loss = get_loss("general", tuning=1.0, alpha=alpha)
        # loose solves while (alpha, c) still move: to a step of 1/100 of their move
        # (between 1e-9 and 1e-4; the first, from the pseudo-Huber start to the first
        # ML shape, to 1e-4: ~15 -> ~6 passes); the solve after the loop is the
        # full-accuracy one (polished) at the final shape and scale
        inner = _irls_lm(prob, inner.theta, loss, c, linear=linear, max_iter=max_iter,
                         xtol=min(1e-4, max(1e-9, 0.01 * move)), ftol=1e-12,
                         polish_steps=False, check=False,
                         near=nll_old < math.inf or warm is not None)
        total += inner.n_iter
        nll = _nll(inner.r, alpha, math.log(c))
        # (at an unchanged shape also the scale's move: the NLL is flat to second
        # order around its minimum, so its change alone stopped with log c ~1e-6 off)
        flat = abs(nll_old - nll) <= 1e-11 * max(abs(nll), 1.0)
        if flat and (prev is None or abs(prev[1]) <= 1e-9):
            break
        nll_old = nll
    alpha, c, nll, prof = _ml_shape_scale(inner.r, alpha, c, c_floor, near=True, checked=True)
    loss = get_loss("general", tuning=1.0, alpha=alpha)
    inner = _irls_lm(prob, inner.theta, loss, c, linear=linear, max_iter=max_iter, near=True)
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
    if info["scale_at_floor"] and mad(inner.r) <= _exact_floor(prob):
        # the ML scale ran to its floor on an exact majority (a proposal-2 start can
        # stay above it with many points off): no scatter to take uncertainties from
        inner = dataclasses.replace(inner, stats=dict(inner.stats or {}, exact=True))
    return inner, loss, c, alpha, alpha_se, total, info


# --------------------------------------------------------------------------- joint Newton
#: the joint Newton iteration keeps alpha at or below this (nearer 2 the slope of log Z
#: grows like -log(2 - alpha)/4 and the loss's alpha-derivatives cancel: the
#: alternation decides there)
_JOINT_ALPHA_MAX = 1.99


def _barron_terms(r: np.ndarray, c: float, a: float, second: bool = True):
    """At ``u = r/c``, shape ``0 <= a < 2``: ``(sum rho, psi, psi', d psi/d alpha,
    sum d rho/d alpha)`` of Barron's loss (psi' only with ``second``).

    With ``b = 2 - a``, ``y = u^2/b``, ``L = log(1 + y)``, ``s = a L/2``:
    ``rho = (b/a) (e^s - 1)`` (``L`` at a = 0), ``w = psi/u = e^s/(1 + y)``,
    ``psi' = w (1 + y - u^2)/(1 + y)``, ``d psi/d alpha = psi (L - y/(1 + y))/2`` and
    ``d rho/d alpha = e^s y/(2(1 + y)) + (L^2/2) phi(s) - (L/2) e^s`` with
    ``phi(s) = (s e^s - e^s + 1)/s^2 = 1/2 + s/3 + s^2/8 + ...`` (no 1/a: the form
    holds at a = 0, where it is ``y/(2(1 + y)) + L^2/4 - L/2``)."""
    b = 2.0 - a
    with np.errstate(all="ignore"):
        u = r / c
        z = u * u
        y = z / b
        q = 1.0 + y
        L = np.log1p(y)
        yq = y / q
        if a == 0.0:
            # (s = 0: e^s = 1, phi = 1/2)
            rho = float(L.sum())
            w = 1.0 / q
            rho_a = float((0.5 * yq + 0.5 * L * (0.5 * L - 1.0)).sum())
        else:
            s = (0.5 * a) * L
            es = np.exp(s)
            rho = (b / a) * float(np.expm1(s).sum())
            w = es / q
            small = s < 1e-3
            phi = np.where(small, 0.5 + s * (1.0 / 3.0 + s * (0.125 + s / 30.0)),
                           (s * es - np.expm1(s)) / np.where(small, 1.0, s * s))
            rho_a = float((0.5 * es * yq + 0.5 * L * (L * phi - es)).sum())
        psi = u * w
        psi_a = 0.5 * psi * (L - yq)
        dpsi = w * (q - z) / q if second else None
    return rho, psi, dpsi, psi_a, rho_a


def _joint_state(prob: _Problem, theta, r, lc: float, a: float, curvature: bool):
    """Gradient and Hessian of the adaptive loss's negative log-likelihood in
    ``(theta, log c, alpha)`` at residuals ``r`` of ``theta``, and whether alpha is held
    at 0 (there and pushed below; the alpha row and column are then not made). None
    where not finite.

    ``NLL = sum rho_B(r/c, alpha) + n log c + n log Z(alpha)``. With ``u = r/c`` and
    ``dr/dtheta = -J``: ``dNLL/dtheta = -J^T psi / c``, ``dNLL/dlog c = n - sum u psi``,
    ``dNLL/dalpha = sum drho/dalpha + n dlogZ/dalpha``; second derivatives
    ``J^T psi' J / c^2 - sum psi d2f / c`` (the model's curvature where it has it),
    ``J^T (psi + u psi') / c``, ``sum (u psi + u^2 psi')``, ``-J^T psi_alpha / c``,
    ``-sum u psi_alpha``; ``d2NLL/dalpha2`` as a one-sided difference of the alpha
    slope over 1e-6."""
    n = r.size
    c = math.exp(lc)
    J = prob.jac(theta)
    _, psi, dpsi, psi_a, rho_a = _barron_terms(r, c, a)
    g_a = rho_a + n * log_partition_slope(a)
    held = a == 0.0 and g_a > 0.0
    k = J.shape[1]
    m = k + 1 if held else k + 2
    with np.errstate(all="ignore"):
        u = r / c
        up = psi + u * dpsi
        # one product for the theta block's gradient and its log c / alpha columns
        W = np.empty((n, 3))
        W[:, 0] = psi
        W[:, 1] = up
        W[:, 2] = psi_a
        P = (W.T @ J) / c
        G = np.empty(m)
        G[:k] = -P[0]
        G[k] = n - float(u @ psi)
        H = np.empty((m, m))
        H[:k, :k] = (J.T @ (J * dpsi[:, None])) / (c * c)
        if curvature:
            Hm = prob.hess_w(theta, psi)
            if Hm is None:
                return None
            H[:k, :k] -= Hm / c
        H[:k, k] = H[k, :k] = P[1]
        H[k, k] = float(u @ up)
        if not held:
            h = 1e-6 if a + 1e-6 <= _JOINT_ALPHA_MAX else -1e-6
            rho_a2 = _barron_terms(r, c, a + h, second=False)[4]
            G[k + 1] = g_a
            H[:k, k + 1] = H[k + 1, :k] = -P[2]
            H[k, k + 1] = H[k + 1, k] = -float(u @ psi_a)
            H[k + 1, k + 1] = (rho_a2 + n * log_partition_slope(a + h) - g_a) / h
    if not math.isfinite(float(G.sum()) + float(H.sum())):
        return None
    return G, H, held


def _joint_nll(prob: _Problem, theta, lc: float, a: float, shared: bool):
    """(NLL, residuals) at a trial point (NLL inf where not finite)."""
    r = prob.resid(theta, with_jac=shared)
    if not np.all(np.isfinite(r)):
        return math.inf, r
    v = _nll_r2(r * r, a, lc) if a > 0.0 else _nll(r, 0.0, lc)
    return v, r


_RADIUS = 2.0  # (the trust region's first radius, in sqrt(diag H) units: ~ standard errors)


def _trust_lambda(ev: np.ndarray, gt: np.ndarray, radius: float) -> float:
    """Levenberg's damping ``lam >= 0`` of the scaled Newton system (eigenvalues
    ``ev``, gradient ``gt`` in its eigenvectors' basis) whose step has length
    ``radius``: 0 where the undamped step is shorter and the matrix positive definite
    (Newton's iteration on ``1/|p(lam)| - 1/radius``, monotone from below)."""
    lo = max(0.0, -float(ev[0]))
    lam = lo + (1e-12 if lo > 0.0 else 0.0)
    if lam == 0.0 and not ev[0] > 1e-10 * ev[-1]:
        lam = 1e-10 * float(ev[-1])
    for _ in range(30):
        e = ev + lam
        t = gt / e
        n2 = float(t @ t)
        p = math.sqrt(n2)
        if p <= radius * (1.0 + 1e-3):
            # (shorter than the radius; the undamped step, where positive definite)
            return lam if lam > 1e-10 * float(ev[-1]) or lo > 0.0 else 0.0
        dn = float((t * t) @ (1.0 / e))  # -(d|p|^2/dlam)/2
        lam += (p / radius - 1.0) * n2 / dn
    return lam


def _joint_newton(prob: _Problem, theta, c: float, alpha: float, c_floor: float,
                  max_iter: int = 30):
    """Minimise the negative log-likelihood over ``(theta, log c, alpha)`` together by
    damped Newton steps, alpha in ``[0, _JOINT_ALPHA_MAX]``.

    Each step solves the full Newton system (Levenberg's damping on the scaled Hessian
    where the step does not descend or the Hessian is not positive definite); alpha
    held at 0 while the step would take it below (the bound's active set). Quadratic
    near the minimum, where the alternation of a solve at fixed (alpha, c) and a
    maximum-likelihood (alpha, c) for fixed residuals converges linearly.

    Returns ``(theta, r, c, alpha, nll, iterations)`` once a full Newton step moved
    every variable by at most 1e-8 of its scaled size (``sqrt(H_ii)`` units, about
    standard errors), or None where the iteration leaves its domain (alpha above
    ``_JOINT_ALPHA_MAX``, c at its floor, a parameter at a bound, no convergence):
    the alternation decides then.
    """
    lower, upper = prob.lower, prob.upper
    bounded = bool(np.any(np.isfinite(lower)) or np.any(np.isfinite(upper)))
    if not 0.0 <= alpha <= _JOINT_ALPHA_MAX or not c > c_floor:
        return None
    shared = prob.model.f_jac is not None and not prob.model.is_linear
    curvature = prob.model.hess_w is not None and not prob.model.is_linear
    theta = np.asarray(theta, dtype=float).copy()
    lc, a = math.log(c), float(alpha)
    lo_c = math.log(c_floor)
    F, r = _joint_nll(prob, theta, lc, a, shared)
    if not math.isfinite(F):
        return None
    k = theta.size
    radius = _RADIUS
    for it in range(1, max_iter + 1):
        st = _joint_state(prob, theta, r, lc, a, curvature)
        if st is None:
            return None
        G, H, held = st
        # (held: alpha at 0 and pushed below, the bound's active set)
        m = G.size
        d = np.sqrt(np.abs(np.diag(H)))
        d = np.where(d > 0, d, 1.0)
        Hs = H / d / d[:, None]
        gs = G / d
        ev, V = np.linalg.eigh(Hs)
        if it > 10 and not ev[0] > 1e-6 * ev[-1]:
            # a flat valley (a parameter ill-determined: the 4PL's EC50 or top running
            # off on 12 points): creeping steps, not Newton's; the alternation decides
            return None
        gt = gs @ V
        sub_eig = None  # (of the system without alpha, made where needed)
        for _ in range(40):
            lam = _trust_lambda(ev, gt, radius)
            zs = -(V @ (gt / (ev + lam)))
            if not held and a + zs[k + 1] / d[k + 1] < 0.0:
                # to the bound, the rest from the Newton system with alpha's move fixed
                if sub_eig is None:
                    sub_eig = np.linalg.eigh(Hs[:k + 1, :k + 1])
                ev1, V1 = sub_eig
                lam1 = max(lam, 1e-3 - ev1[0])
                rhs = gs[:k + 1] - Hs[:k + 1, k + 1] * (a * d[k + 1])
                zs[:k + 1] = -(V1 @ ((rhs @ V1) / (ev1 + lam1)))
                zs[k + 1] = -a * d[k + 1]
            step = np.zeros(k + 2)
            step[:m] = zs / d
            a_new = 0.0 if held or a + step[k + 1] <= 0.0 else a + step[k + 1]
            if a_new > _JOINT_ALPHA_MAX:
                return None
            th_new = theta + step[:k]
            lc_new = lc + step[k]
            if lc_new <= lo_c:
                return None
            norm = float(np.sqrt(zs @ zs))
            if bounded and not np.all((lower < th_new) & (th_new < upper)):
                # (outside a parameter's bounds: a shorter step; where the minimum lies
                # on a bound the radius runs out and the alternation decides)
                radius = 0.25 * norm
                continue
            F_new, r_new = _joint_nll(prob, th_new, lc_new, a_new, shared)
            if F_new <= F + 1e-13 * max(abs(F), 1.0):
                pred = -float(gs @ zs + 0.5 * (zs @ Hs @ zs))
                gain = (F - F_new) / pred if pred > 0.0 else 0.0
                if gain > 0.75 and norm >= 0.9 * radius:
                    radius *= 2.0
                elif gain < 0.25:
                    radius = 0.5 * norm
                break
            radius = 0.25 * norm
        else:
            return None
        scaled = float(np.max(np.abs(zs)))
        theta, lc, a, F, r = th_new, lc_new, a_new, F_new, r_new
        if lam == 0.0 and scaled <= 1e-6:
            return theta, r, math.exp(lc), a, F, it
    return None


def _fit_adaptive_joint(prob: _Problem, start: _Inner, s: float, *, linear: bool,
                        max_iter: int) -> list | None:
    """:func:`_fit_adaptive` from the pseudo-Huber start ``start`` (scale ``s``) by the
    joint Newton iteration (:func:`_joint_newton`), as a list (its iteration count
    without the start's), or None where that iteration declines or its answer fails
    the verdict: then the alternation decides.

    The first ML shape and scale of the start's residuals come from the profile on the
    grid 0, 0.2, ..., 2 (:func:`_grid_start`); the parameters' big move is the
    alternation's first solve at that fixed loss (to a step of 1e-4; this keeps the
    alternation's choice among the local minima of small, outlier-ridden sets, where
    a joint iteration from the start went elsewhere in 4 of 96 battery fits); the joint
    iteration then finishes all together. Its answer is checked against the profile
    on the same grid at its residuals (another basin of the profile over alpha, as
    with two clusters of residuals: the iteration again from the better shape)."""
    theta, r = start.theta, start.r
    c_floor = max(1e-6 * s, 1e-300)
    alpha, c, rows = _grid_start(r, s, c_floor)
    if alpha > _JOINT_ALPHA_MAX:
        return None
    inner = _irls_lm(prob, theta, get_loss("general", tuning=1.0, alpha=alpha), c,
                     linear=linear, max_iter=max_iter, xtol=1e-4, ftol=1e-12,
                     polish_steps=False, check=False)
    total = inner.n_iter
    theta = inner.theta
    best = None
    for _ in range(3):
        got = _joint_newton(prob, theta, c, alpha, c_floor)
        if got is None:
            return None
        theta, r, c, alpha, F, it = got
        total += it
        if best is not None and not F < best[4]:
            break
        best = got
        # another basin of the profile over alpha (two clusters of residuals)?
        chk = _grid_start(r, c, c_floor, F, rows)
        if chk is None:
            break
        alpha, c, rows = chk
        if alpha > _JOINT_ALPHA_MAX:
            return None
    theta, r, c, alpha, F, _ = best
    loss = get_loss("general", tuning=1.0, alpha=alpha)
    inner = _judged(prob, _Inner(theta, r, _objective(loss, r, c), total, True, "converged"),
                    loss, c)
    if not inner.converged:
        return None
    lo_c = math.log(c_floor)
    hi_c = math.log(max(10.0 * float(np.max(np.abs(r))), 10.0 * c, c_floor * 10.0))
    r2 = r * r

    def prof(a):
        lc = _best_log_c(r, a, lo_c, hi_c, math.log(c), r2)
        return _nll(r, a, lc)

    alpha_se = None
    h = 1e-3
    if h < alpha < 2.0 - h:
        d2 = (prof(alpha + h) - 2 * prof(alpha) + prof(alpha - h)) / (h * h)
        if d2 > 0:
            alpha_se = 1.0 / math.sqrt(d2)
    info = {"nll": _nll(r, alpha, math.log(c)), "c_floor": c_floor,
            "scale_at_floor": c <= c_floor * (1 + 1e-6)}
    return [inner, loss, c, alpha, alpha_se, total, info]


def _grid_start(r: np.ndarray, c: float, c_floor: float, than: float | None = None,
                rows=None):
    """The best (alpha, c) of the profile NLL on the shapes 0, 0.2, ..., 1.8, 2 for
    fixed residuals, and the grid's best log c per interior shape (the next call's
    starts: ``rows``); with ``than``: only where it is below that NLL (else None)."""
    lo_c = math.log(c_floor)
    hi_c = math.log(max(10.0 * float(np.max(np.abs(r))), 10.0 * c, c_floor * 10.0))
    r2 = r * r
    start = math.log(max(c, c_floor))
    lc0 = _best_log_c(r, 0.0, lo_c, hi_c, start, r2)
    # (at alpha = 2 the likelihood equation has the closed form c^2 = mean r^2)
    m2 = float(np.mean(r2))
    lc2 = min(max(0.5 * math.log(m2), lo_c), hi_c) if m2 > 0.0 else lo_c
    if rows is None:
        # the interior shapes' Newton iterations start between the two ends' answers
        # (the best log c grows with alpha; fewer passes than from one common start)
        rows = lc0 + (lc2 - lc0) * np.sqrt(0.5 * _GRID)
    vals, lcs = _profile_grid(r2, _GRID, lo_c, hi_c, rows, with_lc=True)
    cands = [(float(v), float(a), float(lc)) for v, a, lc in zip(vals, _GRID, lcs)]
    cands.append((_nll(r, 0.0, lc0), 0.0, lc0))
    cands.append((_nll(r, 2.0, lc2), 2.0, lc2))
    v, a, lc = min(cands)
    if than is not None and not v < than - 1e-9 * max(abs(than), 1.0):
        return None
    return a, math.exp(lc), lcs
