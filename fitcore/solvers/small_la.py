"""numpy.linalg's dense routines for the k x k matrices of a small fit, without the
wrappers' per-call overhead.

A call of ``np.linalg.solve`` or ``inv`` on a 4 x 4 matrix costs some 8 us, almost all
of it in the wrapper (argument checks, type promotion, an ``errstate`` context); the
LAPACK work is below 1 us. A 25-point fit makes some twenty such calls. These helpers
call the same generalized ufuncs that numpy.linalg calls (``numpy.linalg._umath_linalg``)
with the same signature, so the results are the same numbers bit for bit
(tests/fitcore/test_small_la.py checks that against numpy.linalg). Inputs must be
float64 arrays of the right shape: there are no checks.

Where the factorisation fails (a singular matrix) numpy.linalg raises ``LinAlgError``;
these return arrays of NaN instead (what the ufunc itself gives), for the caller's
finiteness test, and numpy's invalid-value flag is raised (a RuntimeWarning unless
the caller's ``errstate`` or warning filter ignores it: the solvers run under
``fit``'s filter; an ``errstate`` per call would cost as much as the call). Where the
private module is missing (another numpy), they fall back to the public functions
with the same contract.
"""
from __future__ import annotations

import numpy as np

try:  # (numpy 1.26 and 2.x: the module numpy.linalg's own functions call)
    from numpy.linalg import _umath_linalg as _ufuncs
    _solve1, _inv, _svd_s = _ufuncs.solve1, _ufuncs.inv, _ufuncs.svd_s
    _qr_r_raw = _ufuncs.qr_r_raw
except (ImportError, AttributeError):  # pragma: no cover - other numpy builds
    _ufuncs = None


def solve(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``np.linalg.solve(a, b)`` for a square float matrix and a vector; NaN where
    ``a`` is singular."""
    if _ufuncs is None:  # pragma: no cover
        try:
            return np.linalg.solve(a, b)
        except np.linalg.LinAlgError:
            return np.full(b.shape, np.nan)
    return _solve1(a, b, signature="dd->d")


def inv(a: np.ndarray) -> np.ndarray:
    """``np.linalg.inv(a)`` for a square float matrix; NaN where it is singular."""
    if _ufuncs is None:  # pragma: no cover
        try:
            return np.linalg.inv(a)
        except np.linalg.LinAlgError:
            return np.full(a.shape, np.nan)
    return _inv(a, signature="d->d")


def svd_thin(a: np.ndarray):
    """``np.linalg.svd(a, full_matrices=False)`` as ``(u, s, vt)``; NaN where the SVD
    does not converge."""
    if _ufuncs is None:  # pragma: no cover
        try:
            return tuple(np.linalg.svd(a, full_matrices=False))
        except np.linalg.LinAlgError:
            m, n = a.shape
            k = min(m, n)
            return np.full((m, k), np.nan), np.full(k, np.nan), np.full((k, n), np.nan)
    return _svd_s(a, signature="d->ddd")


def qr_r(a: np.ndarray) -> np.ndarray:
    """``np.linalg.qr(a, mode="r")`` (the k x k triangle for m >= k rows); ``a`` is
    left unchanged."""
    if _ufuncs is None:  # pragma: no cover
        return np.linalg.qr(a, mode="r")
    a = np.array(a, dtype=float)  # (the factorisation overwrites its input)
    _qr_r_raw(a, signature="d->d")
    return np.triu(a[:min(a.shape), :])
