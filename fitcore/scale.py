"""Robust statistics shared by the engine and the start values: medians, the
normalised MAD, Huber and Tukey IRLS weights, and residual scale estimates."""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from .losses import Loss

#: 1 / Phi^{-1}(3/4): makes the MAD a consistent estimate of sigma at the normal
#: (Huber 1981; check-values.md section 6 item 1).
MAD_CONSTANT = 1.482602218505602


def mad(r, center: float | None = 0.0) -> float:
    """Normalised median absolute deviation ``1.4826 * median|r - center|``.

    ``center=None`` subtracts the median first. For regression residuals the fit is
    the centre, so the default is 0 (as statsmodels' RLM does).
    """
    r = np.asarray(r, dtype=float)
    finite = np.isfinite(r)
    if not finite.all():
        r = r[finite]
    if r.size == 0:
        return float("nan")
    c = median(r) if center is None else float(center)
    return MAD_CONSTANT * median(np.abs(r - c) if c != 0.0 else np.abs(r), overwrite=True)


def median(v, overwrite: bool = False) -> float:
    """Median of a 1-d float array, equal to ``np.median``.

    One selection (``partition`` at the upper middle) and, for even sizes, the
    maximum of the lower half: numpy's two-index partition is several times slower
    on large arrays. ``overwrite=True`` lets the array be reordered in place. From
    ``SELECT_FROM`` values the middle ones come from :func:`order_stats` (``v`` is
    then left as it is).
    """
    v = np.asarray(v, dtype=float)
    n = v.size
    if n == 0:
        return float("nan")
    h = n // 2
    if n >= SELECT_FROM:
        got = order_stats(v, (h,) if n % 2 else (h - 1, h))
        if n % 2:
            return float(got[0])
        return 0.5 * (float(got[0]) + float(got[1]))
    if overwrite:
        v.partition(h)
        p = v
    else:
        p = np.partition(v, h)
    upper = float(p[h])
    if n % 2:
        return upper
    return 0.5 * (float(p[:h].max()) + upper)


#: from this many values :func:`median` selects by :func:`order_stats`
SELECT_FROM = 2000
_SAMPLE = 4096  # about this many values of a strided sample place the bracket


def order_stats(v, ranks) -> np.ndarray:
    """The values of the given ranks (0-based, ascending; NaN sorts last, as in
    ``np.sort``) of a 1-d float array, exactly: ``np.partition(v, ranks)[ranks]``.
    ``v`` is not modified.

    On large arrays one selection over all values (~1.2 ms at 1e5 with numpy's
    partition) is replaced by a bracket from a strided sample (Floyd and Rivest,
    CACM 18, 1975): values of the sample's ranks a few binomial standard deviations
    either side of the wanted ones bound the wanted order statistics; two comparisons
    over all values check that (counts) and gather the few per cent in between, whose
    selection gives the exact values. If the bracket misses (rare: a sample that does
    not represent the array), the plain partition runs.
    """
    v = np.asarray(v, dtype=float)
    ranks = [int(k) for k in ranks]
    n = v.size
    lo_k, hi_k = min(ranks), max(ranks)
    step = n // _SAMPLE
    if step >= 4:
        sample = v[::step].copy()
        m = sample.size
        margin = 2.0 * math.sqrt(m)  # 4 binomial SDs of a rank in the sample (SD <= sqrt(m)/2)
        i_lo = int(math.floor(lo_k * m / n - margin))
        i_hi = int(math.ceil(hi_k * m / n + margin))
        at = [i for i in (i_lo, i_hi) if 0 <= i < m]
        if at:
            sample.partition(_two_or_more(at, m))
        lo = float(sample[i_lo]) if 0 <= i_lo < m else -math.inf
        hi = float(sample[i_hi]) if 0 <= i_hi < m else math.inf
        if not (math.isnan(lo) or math.isnan(hi)):
            inside = v < lo
            below = int(np.count_nonzero(inside))
            np.logical_not(inside, out=inside)
            inside &= v <= hi  # (NaN compares False: not inside, above, as it sorts last)
            mid = np.compress(inside, v)
            if below <= lo_k and below + mid.size > hi_k:
                rel = [k - below for k in ranks]
                mid.partition(_two_or_more(rel, mid.size))
                return mid[rel]
    p = np.partition(v, _two_or_more(ranks, n))
    return p[ranks]


def _two_or_more(ranks, n):
    """``ranks`` with a neighbour added where there is one rank only: numpy (2.x, x86)
    selects a single rank by another algorithm that is 5-10x slower on arrays of some
    thousand values than its selection of several (same values either way)."""
    if len(ranks) > 1 or n < 2:
        return ranks
    k = ranks[0]
    return [k, k + 1] if k + 1 < n else [k - 1, k]


def row_medians(v) -> np.ndarray:
    """``np.median(v, axis=1)`` for a 2-d float array, by the same one-selection route
    as :func:`median`."""
    v = np.asarray(v, dtype=float)
    n = v.shape[1]
    h = n // 2
    part = np.partition(v, h, axis=1)
    return 0.5 * (part[:, :h].max(axis=1) + part[:, h]) if n % 2 == 0 else part[:, h]


def mad_about_median(r) -> float:
    """Normalised MAD about the median, ``1.4826 * median|r - median(r)|``, of all
    values as given (non-finite ones included: the start-value code relies on their
    place in the ordering); 0 for empty input."""
    r = np.asarray(r, dtype=float)
    if r.size == 0:
        return 0.0
    return float(MAD_CONSTANT * median(np.abs(r - median(r))))


#: Huber's and Tukey's tuning constants for 95 % efficiency (as the registry's)
HUBER_K = 1.345
TUKEY_C = 4.685


def huber_weights(u, k: float = HUBER_K) -> np.ndarray:
    """Huber's IRLS weights ``min(1, k/|u|)`` of standardised residuals ``|u|``
    (1 at u = 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.minimum(k / np.asarray(u, dtype=float), 1.0)


def tukey_weights(u, c: float = TUKEY_C) -> np.ndarray:
    """Tukey biweight IRLS weights ``(1 - (u/c)^2)^2`` for ``|u| < c``, else 0."""
    u = np.asarray(u, dtype=float)
    return np.where(u < c, (1.0 - (u / c) ** 2) ** 2, 0.0)


@lru_cache(maxsize=256)
def _beta_cached(key) -> float:
    loss = key[1]
    phi = lambda t: math.exp(-0.5 * t * t) / math.sqrt(2 * math.pi)  # noqa: E731
    f = lambda t: 2.0 * float(loss.psi(np.array([t]))[0]) ** 2 * phi(t)  # noqa: E731
    pts = [loss.tuning] if loss.tuning else None
    from scipy import integrate  # lazy: 0.3 s to import, seldom needed

    return integrate.quad(f, 0.0, 40.0, points=pts, epsabs=1e-14, epsrel=1e-12, limit=200)[0]


@lru_cache(maxsize=256)
def _slope_cached(key) -> float:
    loss = key[1]
    phi = lambda t: math.exp(-0.5 * t * t) / math.sqrt(2 * math.pi)  # noqa: E731
    # E[psi'(Z)] = E[Z psi(Z)] (integration by parts; psi continuous, as for every loss
    # here), which needs no derivative at a Huber corner
    f = lambda t: 2.0 * t * float(loss.psi(np.array([t]))[0]) * phi(t)  # noqa: E731
    pts = [loss.tuning] if loss.tuning else None
    from scipy import integrate  # lazy: 0.3 s to import, seldom needed

    return integrate.quad(f, 0.0, 40.0, points=pts, epsabs=1e-14, epsrel=1e-12, limit=200)[0]


def psi_slope_at_normal(loss: Loss) -> float:
    """``E[psi'(Z)]`` for a standard normal Z (0.8213 for Huber k = 1.345, its
    ``P(|Z| <= k)``)."""
    if loss.name == "huber" and loss.tuning:
        # closed form (Huber 1981, 4.5): a first Huber fit needs no quadrature and does
        # not load scipy.integrate (0.05 s of the window's start)
        return math.erf(loss.tuning / math.sqrt(2.0))
    return _slope_cached((loss.name, loss))


def psi_variance_at_normal(loss: Loss) -> float:
    """``beta = E[psi(Z)^2]`` for a standard normal Z (0.7101645 for Huber k = 1.345)."""
    if loss.name == "huber" and loss.tuning:  # closed form (Huber 1981, 4.5), as above
        k = loss.tuning
        inside = math.erf(k / math.sqrt(2.0))  # P(|Z| <= k)
        return inside - 2.0 * k * math.exp(-0.5 * k * k) / math.sqrt(2.0 * math.pi) + k * k * math.erfc(
            k / math.sqrt(2.0))
    return _beta_cached((loss.name, loss))


def proposal2_scale(r, loss: Loss, s0: float, n_free: int, *, tol: float = 1e-12,
                    max_iter: int = 200) -> float:
    """Huber's proposal 2 scale for fixed residuals ``r``.

    Solves ``sum psi(r_i / s)^2 = (n - p) * beta`` by the fixed-point iteration
    ``s^2 <- s^2 * sum psi(r_i/s)^2 / ((n - p) beta)`` (Huber 1981, section 7.7),
    which converges monotonically for monotone psi, but only linearly (some 40 rounds
    to 1e-12 on a 25-point 4PL): a secant step on ``g(s) - s`` through the last two
    rounds is taken where it lies between half the smaller and twice the larger of
    ``s`` and ``g(s)`` (a handful of rounds). It stops, as the plain iteration does,
    where one round moves ``s`` by at most ``tol`` relative.
    """
    r = np.asarray(r, dtype=float)
    dof = r.size - n_free
    if dof <= 0 or not (s0 > 0):
        return float(s0)
    beta = psi_variance_at_normal(loss)
    s = float(s0)
    prev = None  # (s, g(s)) of the previous round
    for _ in range(max_iter):
        q = float(np.sum(loss.psi(r / s) ** 2))
        if q <= 0:
            break
        s_new = s * math.sqrt(q / (dof * beta))
        if abs(s_new - s) <= tol * s:
            s = s_new
            break
        s_next = s_new
        if prev is not None:
            s1, g1 = prev
            h0, h1 = s_new - s, g1 - s1
            if h1 != h0 and s1 != s:
                cand = s - h0 * (s - s1) / (h0 - h1)
                if 0.5 * min(s, s_new) < cand < 2.0 * max(s, s_new):
                    s_next = cand
        prev = (s, s_new)
        s = s_next
    return s
