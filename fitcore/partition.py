r"""Partition function of the density of Barron's general loss.

``p(x | alpha, c) = exp(-rho_B(x/c, alpha)) / (c Z(alpha))`` with
``Z(alpha) = integral exp(-rho_B(x, alpha, 1)) dx``, defined for ``alpha >= 0`` (for
alpha < 0 the loss is bounded and the integral diverges).

``log_partition_quad`` integrates by adaptive quadrature, split at ``x = 1`` and
``x = 20`` so that the heavy Cauchy-like tail at small alpha is integrated on its own;
absolute accuracy is about 1e-13 (closed forms: Z(0) = pi sqrt 2, Z(1) = 2 e K_1(1),
Z(2) = sqrt(2 pi); a 30-digit mpmath quadrature agrees to ~1e-15 at alpha 1e-6 ... 2 - 2**-30,
but near alpha = 6.5e-9 this one is off by 1.2e-11, where the table is within 1e-14).

``log_partition`` reads alpha in [0, 2 - 2**-30] from a table (:mod:`._partition_table`,
generated from that quadrature by ``tools/make_partition_table.py``): 25 Chebyshev
pieces of degree 16, within 2.2e-13 of the quadrature at the generator's check points,
a few microseconds a value instead of ~0.1-0.2 ms. log Z is not smooth at the ends (at
alpha = 2 its slope grows like -log(2 - alpha)/4; at 0 it is not analytic), so the
pieces shrink geometrically towards them; other alpha (the last 2**-30 below 2, above
2) are integrated and cached as before.
"""
from __future__ import annotations

import math
from bisect import bisect_right
from functools import lru_cache

import numpy as np

from . import _partition_table as _table


def _rho_scalar(x: float, alpha: float) -> float:
    """:func:`fitcore.losses.barron_rho` at one point, in plain floats (the quadrature
    calls it a few hundred times per alpha; a one-element array costs ~20x more)."""
    z = x * x
    if alpha == 2.0:
        return 0.5 * z
    if alpha == 0.0:
        return math.log1p(0.5 * z)
    if math.isinf(alpha):
        if alpha < 0:
            return -math.expm1(-0.5 * z)
        try:
            return math.expm1(0.5 * z)
        except OverflowError:
            return math.inf
    b = abs(alpha - 2.0)
    try:
        return (b / alpha) * math.expm1(0.5 * alpha * math.log1p(z / b))
    except OverflowError:
        return math.inf


def _integrand(x: float, alpha: float) -> float:
    return math.exp(-_rho_scalar(x, alpha))


def log_partition_quad(alpha: float) -> float:
    """log Z(alpha) by direct quadrature (about 0.1 ms; the exact reference)."""
    alpha = float(alpha)
    if alpha < 0 or math.isnan(alpha):
        raise ValueError("the partition function is defined only for alpha >= 0")
    if alpha == 0.0:
        return math.log(math.pi * math.sqrt(2.0))
    if alpha == 2.0:
        return 0.5 * math.log(2.0 * math.pi)
    from scipy import integrate  # lazy: 0.3 s to import, seldom needed

    total = 0.0
    for a, b in ((0.0, 1.0), (1.0, 20.0), (20.0, math.inf)):
        total += integrate.quad(_integrand, a, b, args=(alpha,), epsabs=1e-14, epsrel=1e-13, limit=200)[0]
    return math.log(2.0 * total)


@lru_cache(maxsize=4096)
def _cached(alpha: float) -> float:
    """The quadrature, cached per exact alpha (outside the table)."""
    return log_partition_quad(alpha)


_EDGES = _table.EDGES
_HI = _EDGES[-1]
_COEFS = _table.COEFS
_LOG_Z0 = math.log(math.pi * math.sqrt(2.0))
_LOG_Z2 = 0.5 * math.log(2.0 * math.pi)


def _scalar(alpha: float) -> float:
    """log Z at one float alpha >= 0: closed forms at 0 and 2, the table inside, else
    the cached quadrature."""
    if alpha == 0.0:
        return _LOG_Z0
    if alpha == 2.0:
        return _LOG_Z2
    if alpha <= _HI:
        i = min(bisect_right(_EDGES, alpha), len(_COEFS)) - 1
        a, b = _EDGES[i], _EDGES[i + 1]
        t = (2.0 * alpha - a - b) / (b - a)
        c = _COEFS[i]
        # Clenshaw's recurrence
        t2 = 2.0 * t
        b1 = b2 = 0.0
        for k in range(len(c) - 1, 0, -1):
            b1, b2 = c[k] + t2 * b1 - b2, b1
        return c[0] + t * b1 - b2
    return _cached(alpha)


def _derivative_coefs(c) -> tuple:
    """Chebyshev coefficients of the derivative (in t) of the series ``c``."""
    n = len(c) - 1
    d = [0.0] * (n + 2)
    for k in range(n, 0, -1):
        d[k - 1] = d[k + 1] + 2.0 * k * c[k]
    d[0] *= 0.5
    return tuple(d[:max(n, 1)])


_DCOEFS = None  # (made on first use)


def log_partition_slope(alpha: float) -> float:
    """d log Z / d alpha for alpha in [0, 2 - 2**-30]: the derivative of the table's
    Chebyshev piece (within ~1e-10 of a 30-digit quadrature's central difference at
    alpha 1e-6 ... 1.9, 2e-9 at 1.99, 2e-7 at 1.999, where the slope grows like
    -log(2 - alpha)/4); NaN elsewhere."""
    global _DCOEFS
    if not 0.0 <= alpha <= _HI:
        return math.nan
    if _DCOEFS is None:
        _DCOEFS = [_derivative_coefs(c) for c in _COEFS]
    i = min(bisect_right(_EDGES, alpha), len(_COEFS)) - 1
    a, b = _EDGES[i], _EDGES[i + 1]
    t = (2.0 * alpha - a - b) / (b - a)
    c = _DCOEFS[i]
    t2 = 2.0 * t
    b1 = b2 = 0.0
    for k in range(len(c) - 1, 0, -1):
        b1, b2 = c[k] + t2 * b1 - b2, b1
    return (c[0] + t * b1 - b2) * 2.0 / (b - a)


def log_partition(alpha):
    """log Z(alpha) of the general loss's density (scalar or array, alpha >= 0).

    alpha in [0, 2 - 2**-30] from the table (within 2.2e-13 of the quadrature), others
    by the quadrature (cached per exact alpha; one new value costs about 0.1 ms).
    """
    if type(alpha) is float and alpha >= 0:  # (the solver's calls: no array round trip)
        return _scalar(alpha)
    a = np.asarray(alpha, dtype=float)
    if np.any(~(a >= 0)):
        raise ValueError("the partition function is defined only for alpha >= 0")
    if a.ndim == 0:
        return _scalar(float(a))
    return np.array([_scalar(float(v)) for v in a.ravel()]).reshape(a.shape)
