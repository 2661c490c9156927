r"""Partition function of the density of Barron's general loss.

``p(x | alpha, c) = exp(-rho_B(x/c, alpha)) / (c Z(alpha))`` with
``Z(alpha) = integral exp(-rho_B(x, alpha, 1)) dx``, defined for ``alpha >= 0`` (for
alpha < 0 the loss is bounded and the integral diverges).

``log_partition`` integrates by adaptive quadrature, split at ``x = 1`` and ``x = 20``
so that the heavy Cauchy-like tail at small alpha is integrated on its own; absolute
accuracy is about 1e-12 (closed forms: Z(0) = pi sqrt 2, Z(1) = 2 e K_1(1),
Z(2) = sqrt(2 pi)). log Z is not smooth at alpha = 2 (its slope grows like -log(2 - alpha)),
so a polynomial interpolant is not accurate there; we integrate each value instead.
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np



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
    return log_partition_quad(alpha)


def log_partition(alpha):
    """log Z(alpha) of the general loss's density (scalar or array, alpha >= 0).

    Values are cached per exact alpha; one new value costs about 0.1 ms.
    """
    if type(alpha) is float and alpha >= 0:  # (the solver's calls: no array round trip)
        return _cached(alpha)
    a = np.asarray(alpha, dtype=float)
    if np.any(~(a >= 0)):
        raise ValueError("the partition function is defined only for alpha >= 0")
    if a.ndim == 0:
        return _cached(float(a))
    return np.array([_cached(float(v)) for v in a.ravel()]).reshape(a.shape)
