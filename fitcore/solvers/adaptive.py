"""The adaptive loss: Barron's shape alpha and scale c by maximum likelihood,
alternated with the parameter step."""
from __future__ import annotations

import math

import numpy as np
from scipy import optimize

from ..losses import barron_rho, get_loss
from ..partition import log_partition
from .lm import _irls_lm
from .mscale import _robust_with_scale
from .problem import _Problem


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
                         linear=linear, max_iter=max_iter, xtol=1e-9, polish_steps=False,
                         check=False)
    c_floor = max(1e-6 * s, 1e-300)
    nll_old = math.inf
    prof = None
    for _ in range(60):
        alpha, c, nll, prof = _ml_shape_scale(inner.r, alpha, c, c_floor)
        loss = get_loss("general", tuning=1.0, alpha=alpha)
        # loose solves while (alpha, c) still move; the solve after the loop is the
        # full-accuracy one (polished) at the final shape and scale
        inner = _irls_lm(prob, inner.theta, loss, c, linear=linear, max_iter=max_iter,
                         xtol=1e-9, ftol=1e-12, polish_steps=False, check=False)
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
