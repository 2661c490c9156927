"""The built-in catalogue of lab models.

Each built-in is a :class:`fitcore.model.Model` with trade parameter names, a
plain-language description and a unit hint per parameter, an exact analytic Jacobian,
bounds where the physics demands them, derived quantities with exact gradients, and a
start-value guess that resists gross outliers.

Public functions
----------------
builtin_models()
    Names in menu order.
get_model(name, **options)
    Build one built-in (``get_model("poly3")``, ``get_model("polynomial", degree=3)``,
    ``get_model("exp_decay", rate=True)``).
resolve_model(spec)
    A :class:`Model`, a built-in name or a formula string -> :class:`Model`.
model_info(name)
    Title, formula text, parameter and derived-quantity descriptions for a menu.

Notes
-----
How the guesses work. Most models have one or two parameters that enter nonlinearly
(a time constant, a rate, a half-saturation constant, a peak width) and the rest enter
linearly. The guess scans the nonlinear parameters over a logarithmic grid scaled to
the data; for every grid value the linear parameters come from a small robust
regression (Huber, then Tukey biweight iterations with a normalised-MAD scale), and
the grid value with the smallest capped sum of squares sum(min((r/s)^2, 9)) wins; s is
one model-free noise level for all grid values (from successive differences of y).
Straight lines use Theil-Sen slopes, power laws and the Arrhenius law a Theil-Sen fit
on the log scale, peak centres come from a running median. None
of these steps is thrown far off by 15 % gross outliers, and all of them accept
unsorted x and repeated x values. A guess never contains NaN: any step that cannot
proceed (too few points, degenerate data) falls back to safe values.

Nothing here imports Qt.
"""
from __future__ import annotations

import functools
import math
import re
from dataclasses import dataclass
from typing import Callable

import numpy as np
from ._lazy import LazyModule

from .model import Derived, Model, linear_model
from .scale import (HUBER_K, MAD_CONSTANT, huber_weights, mad_about_median, median, row_medians,
                    tukey_weights)

special = LazyModule("scipy.special", globals())  # lazy: 0.3 s to import, needed once results are made

__all__ = ["builtin_models", "get_model", "resolve_model", "model_info", "GAS_CONSTANT"]

#: Molar gas constant R = N_A k_B in J/(mol K), exact since the 2019 SI redefinition.
GAS_CONSTANT = 8.31446261815324

_LN2 = math.log(2.0)
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * _LN2)  # 2.3548200450...
_SQRT_2PI = math.sqrt(2.0 * math.pi)
_MAX_POLY_DEGREE = 10


# ============================================================== robust helpers


_GUESS_MAX_POINTS = 1000


def _finite_pairs(x, y, limit=_GUESS_MAX_POINTS):
    """Float copies of x and y with non-finite pairs dropped.

    Large data are thinned for the guess (every k-th point in x order, so the whole x
    range stays covered); start values need no more than ``limit`` points.
    """
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    n = min(x.size, y.size)
    x, y = x[:n], y[:n]
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if x.size > limit:
        idx = np.argsort(x, kind="mergesort")[:: int(math.ceil(x.size / limit))]
        x, y = x[idx], y[idx]
    return x, y


def _spread(y):
    """A positive, finite robust spread of y (MAD, else IQR, else range, else 1)."""
    y = np.asarray(y, dtype=float)
    if y.size:
        s = mad_about_median(y)
        if s > 0 and np.isfinite(s):
            return s
        q = np.percentile(y, [0, 25, 75, 100])
        for s in (q[2] - q[1], q[3] - q[0], np.max(np.abs(y))):
            if s > 0 and np.isfinite(s):
                return float(s)
    return 1.0


def _safe(value, fallback):
    value = float(value)
    return value if np.isfinite(value) else float(fallback)


def _median_or(v, fallback=0.0):
    v = np.asarray(v, dtype=float)
    v = v[np.isfinite(v)]
    return float(np.median(v)) if v.size else float(fallback)


def _theil_sen(x, y, max_pairs=40000):
    """Theil-Sen line: slope = median of pairwise slopes, intercept = median(y - b x).

    For large data a fixed pseudo-random subset of pairs is used (deterministic).
    Returns ``(intercept, slope)``; ``(median(y), 0)`` when no pair has distinct x.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    n = x.size
    if n == 0:
        return 0.0, 0.0
    if n * (n - 1) // 2 <= max_pairs:
        i, j = _pairs(n)
    else:
        rng = np.random.default_rng(12345)
        i = rng.integers(0, n, max_pairs)
        j = rng.integers(0, n, max_pairs)
    dx = x[j] - x[i]
    keep = dx != 0
    if not np.any(keep):
        return float(np.median(y)), 0.0
    slopes = (y[j] - y[i])[keep] / dx[keep]
    slopes = slopes[np.isfinite(slopes)]
    if slopes.size == 0:
        return float(np.median(y)), 0.0
    # (scale.median: np.median's value for finite data, without its dispatch)
    b = median(slopes)
    v = y - b * x
    a = median(v) if np.isfinite(v).all() else float(np.median(v))
    return a, b


@functools.lru_cache(maxsize=16)
def _pairs(n: int) -> tuple[np.ndarray, np.ndarray]:
    """``np.triu_indices(n, k=1)``, kept per n (read-only; the call costs more than a
    small Theil-Sen fit's arithmetic)."""
    i, j = np.triu_indices(n, k=1)
    i.flags.writeable = False
    j.flags.writeable = False
    return i, j


def _products2(Zt, y):
    """Elementwise products of two design columns ``Zt`` (G, 2, n) for
    :func:`_cramer2`, stacked (G, 5, n): z0 z0, z0 z1, z1 z1, z0 y, z1 y."""
    Z0, Z1 = Zt[:, 0, :], Zt[:, 1, :]
    return np.stack([Z0 * Z0, Z0 * Z1, Z1 * Z1, Z0 * y, Z1 * y], axis=1)


def _cramer2(products, w):
    """Weighted two-column normal equations solved by Cramer's rule for a stack
    (weights ``w`` (G, n)): ``(coefficients (G, 2), usable (G,))``; not usable where
    the solution is not finite or the matrix is near singular."""
    a, b, d, p, q = np.einsum("gjn,gn->jg", products, w)
    det = a * d - b * b
    c = np.empty((a.size, 2))
    c[:, 0] = (d * p - b * q) / det
    c[:, 1] = (a * q - b * p) / det
    return c, np.isfinite(c).all(axis=1) & (np.abs(det) > 1e-10 * (a * d))


def _max_abs(vals: list) -> float:
    """``np.max(np.abs(vals))`` of a short non-empty list of floats (NaN if any is)."""
    top = 0.0
    for v in vals:
        if v != v:
            return math.nan
        top = max(top, abs(v))
    return top


def _robust_lstsq(A, y, n_huber=12, n_tukey=6):
    """Outlier-resistant linear least squares for a small design matrix.

    Ordinary least squares, then Huber (k = 1.345) and Tukey biweight (c = 4.685)
    iteratively reweighted steps, each with a normalised-MAD scale of the current
    residuals. Columns are scaled to unit length first, for conditioning.

    Returns ``(coef, residuals)``; coefficients of all-zero columns are 0.
    """
    A = np.asarray(A, dtype=float)
    y = np.asarray(y, dtype=float)
    n, k = A.shape
    norms = np.sqrt(np.sum(A * A, axis=0))
    good = np.isfinite(norms) & (norms > 0)
    coef = np.zeros(k)
    if n == 0 or not np.any(good):
        return coef, y.copy()
    As = A[:, good] / norms[good]
    kk = As.shape[1]

    if kk == 2:
        products = _products2(As.T[None], y)

    def wls(w):
        # small, column-scaled normal equations are ample for a start value; fall back
        # to an orthogonal solve when they are singular
        if kk == 2:
            # Cramer's rule, the same arithmetic as the stacked version (_cramer2: the
            # same sums, then the same IEEE operations on Python floats)
            a, b, d, p, q = np.einsum("gjn,gn->jg", products, w[None]).ravel().tolist()
            det = a * d - b * b
            if det != 0.0:
                c0, c1 = (d * p - b * q) / det, (a * q - b * p) / det
                if math.isfinite(c0) and math.isfinite(c1) and abs(det) > 1e-10 * (a * d):
                    return np.array([c0, c1])
            sw = np.sqrt(w)
            return np.linalg.lstsq(As * sw[:, None], y * sw, rcond=None)[0]
        Aw = As * w[:, None]
        M = Aw.T @ As
        try:
            c = np.linalg.solve(M, Aw.T @ y)
            d = np.diag(M)
            if np.all(np.isfinite(c)) and abs(np.linalg.det(M)) > 1e-10 * np.prod(d):
                return c
        except np.linalg.LinAlgError:
            pass
        sw = np.sqrt(w)
        return np.linalg.lstsq(As * sw[:, None], y * sw, rcond=None)[0]

    with np.errstate(all="ignore"):
        c = wls(np.ones(n))
        r = y - As @ c
        c_list = c.tolist()
        for it in range(n_huber + n_tukey):
            s = mad_about_median(r)
            if not (s > 0 and math.isfinite(s)):
                break
            u = np.abs(r) / s
            if it < n_huber:
                w = np.minimum(HUBER_K / u, 1.0)  # (huber_weights, in this errstate)
            else:
                w = tukey_weights(u)
            if np.count_nonzero(w) <= kk:
                break
            c_new = wls(w)
            # (the tests on the kk floats: all finite; the largest change against
            # 1e-10 (1 + the largest |coefficient|), as np.max would take them)
            new_list = c_new.tolist()
            if not all(map(math.isfinite, new_list)):
                break
            step = (_max_abs([a - b for a, b in zip(new_list, c_list)])
                    <= 1e-10 * (1.0 + _max_abs(c_list)))
            c, c_list = c_new, new_list
            r = y - As @ c
            if step and it >= n_huber:
                break
    coef[good] = c / norms[good]
    return coef, r


def _robust_lstsq_many(As, y, n_huber=12, n_tukey=6):
    """:func:`_robust_lstsq` for a stack of design matrices ``As`` (G, n, k) sharing
    one ``y``: the same iterations, run on every matrix at once.

    Each matrix stops on its own conditions, exactly as in the single version; a
    matrix with an all-zero column, or whose small normal equations are singular, is
    handed to the single version. Returns ``(coefs (G, k), residuals (G, n))``.
    """
    As = np.asarray(As, dtype=float)
    y = np.asarray(y, dtype=float)
    G, n, k = As.shape
    coefs = np.zeros((G, k))
    resid = np.empty((G, n))
    with np.errstate(all="ignore"):
        norms = np.sqrt(np.einsum("gij,gij->gj", As, As))
    plain = np.all(np.isfinite(norms) & (norms > 0), axis=1) if n else np.zeros(G, bool)
    for g in np.flatnonzero(~plain):
        coefs[g], resid[g] = _robust_lstsq(As[g], y, n_huber, n_tukey)
    idx = np.flatnonzero(plain)
    if idx.size == 0:
        return coefs, resid
    Z = As[idx] / norms[idx][:, None, :]

    Zt = np.ascontiguousarray(Z.transpose(0, 2, 1))  # (G, k, n): the products run on rows
    everything = slice(None)

    if k == 2:
        # two columns (the plateau designs of the logistic scans): the normal
        # equations by elementwise products and Cramer's rule, not one LAPACK call
        # per small matrix
        products = _products2(Zt, y)

    def wls(sel, w):
        """Weighted solves for the stack; None where the single version would fall back."""
        if k == 2:
            c, ok = _cramer2(products[sel], w)
            return c if ok.all() else None
        Zw = Zt[sel] * w[:, None, :]
        M = np.matmul(Zw, Z[sel])
        rhs = np.matmul(Zw, y)[:, :, None]
        try:
            c = np.linalg.solve(M, rhs)[:, :, 0]
        except np.linalg.LinAlgError:
            return None
        d = M.diagonal(axis1=1, axis2=2).prod(axis=1)
        if k == 1:
            det = M[:, 0, 0]
        elif k == 2:
            det = M[:, 0, 0] * M[:, 1, 1] - M[:, 0, 1] * M[:, 1, 0]
        else:
            det = np.linalg.det(M)
        ok = np.isfinite(c).all(axis=1) & (np.abs(det) > 1e-10 * d)
        return c if ok.all() else None

    with np.errstate(all="ignore"):
        c = wls(everything, np.ones((idx.size, n)))
        if c is None:  # rare: let the single version decide every matrix
            for g in idx:
                coefs[g], resid[g] = _robust_lstsq(As[g], y, n_huber, n_tukey)
            return coefs, resid
        r = y - np.matmul(Z, c[:, :, None])[:, :, 0]
        live = np.ones(idx.size, bool)
        for it in range(n_huber + n_tukey):
            rows = np.flatnonzero(live)
            if rows.size == 0:
                break
            rr = r[rows] if rows.size < live.size else r
            centre = row_medians(rr)
            sc = MAD_CONSTANT * row_medians(np.abs(rr - centre[:, None]))
            stop = ~((sc > 0) & np.isfinite(sc))
            u = np.abs(rr) / np.where(stop, 1.0, sc)[:, None]
            if it < n_huber:
                w = huber_weights(u)
            else:
                w = tukey_weights(u)
            stop |= np.count_nonzero(w, axis=1) <= k
            if stop.any():
                go = rows[~stop]
                live[rows[stop]] = False
                w = w[~stop]
            else:
                go = rows
            if go.size == 0:
                break
            sel = everything if go.size == live.size else go
            c_new = wls(sel, w)
            if c_new is None:
                # some matrix would take the single version's fallback solve: finish
                # those one by one from the start (the single version is the reference)
                for j in go:
                    g = idx[j]
                    coefs[g], resid[g] = _robust_lstsq(As[g], y, n_huber, n_tukey)
                    live[j] = False
                    c[j] = coefs[g] * norms[g]
                    r[j] = resid[g]
                continue
            if it >= n_huber:  # (the step test stops only the Tukey steps)
                c_old = c[sel]
                small = (np.abs(c_new - c_old).max(axis=1)
                         <= 1e-10 * (1.0 + np.abs(c_old).max(axis=1)))
            c[sel] = c_new
            r[sel] = y - np.matmul(Z[sel], c_new[:, :, None])[:, :, 0]
            if it >= n_huber:
                live[go[small]] = False
    coefs[idx] = c / norms[idx]
    resid[idx] = r
    return coefs, resid


def _noise_scale(x, y):
    """Model-free robust noise level: normalised MAD of successive differences of y
    (sorted by x) divided by sqrt 2, with a floor (see below)."""
    order = np.argsort(x, kind="mergesort")
    d = np.diff(np.asarray(y, dtype=float)[order])
    s = mad_about_median(d) / math.sqrt(2.0) if d.size >= 2 else 0.0
    # floor: 2 % of the 5-95 % range of y, so that on a coarse grid a curve that is
    # nearly right still scores better than one that is far off
    y = np.asarray(y, dtype=float)
    span = float(np.subtract(*np.percentile(y, [95, 5]))) if y.size else 0.0
    floor = max(0.02 * span, 1e-9 * _spread(y))
    return float(s) if np.isfinite(s) and s > floor else floor


def _criterion(r, s, cap=3.0):
    """Capped sum of squares sum(min((r/s)^2, cap^2)): every point counts until it is
    ``cap`` noise levels off, so gross outliers cost a fixed amount each and a curve
    that misses a whole region is not excused (inf if not finite)."""
    u2 = (np.asarray(r, dtype=float) / s) ** 2
    v = float(np.sum(np.minimum(u2, cap * cap)))
    return v if np.isfinite(v) else np.inf


def _criteria(stack, y, scale, finite_only: bool = False, steps: tuple[int, int] = (5, 3)):
    """:func:`_criterion` of the 5 Huber + 3 Tukey robust fit (``steps``) for every
    design matrix in ``stack`` (G, n, k) at once. Returns ``(criteria (G,), coefficients
    (G, k))``; ``finite_only`` gives inf to a matrix with a non-finite entry (without
    fitting it).
    """
    stack = np.asarray(stack, dtype=float)
    crit = np.full(stack.shape[0], np.inf)
    coefs = np.zeros((stack.shape[0], stack.shape[2]))
    ok = np.isfinite(stack).all(axis=(1, 2)) if finite_only else np.ones(stack.shape[0], bool)
    if ok.any():
        c, res = _robust_lstsq_many(stack if ok.all() else stack[ok], y, n_huber=steps[0],
                                    n_tukey=steps[1])
        with np.errstate(all="ignore"):
            v = np.sum(np.minimum((res / scale) ** 2, 9.0), axis=1)
        v[~np.isfinite(v)] = np.inf
        crit[ok], coefs[ok] = v, c
    return crit, coefs


def _first_better(crit, best):
    """Index of the first smallest criterion if it beats ``best`` (as a sequential scan
    with ``<`` would find it), else None."""
    j = int(np.argmin(crit))
    return j if crit[j] < best else None


def _profile(basis_of: Callable[[float], np.ndarray], y, grid, scale, refine=2,
             bases_of: Callable[[np.ndarray], np.ndarray] | None = None):
    """Scan a nonlinear parameter over ``grid``; linear coefficients by robust fit.

    ``basis_of(theta)`` returns the design matrix for the linear parameters;
    ``bases_of(thetas)``, where given, returns them all at once (G, n, k) and must
    agree with it. After the coarse scan the neighbourhood of the best value is scanned
    again ``refine`` times on a finer grid. Returns ``(theta, coef, criterion)``;
    ``theta`` is None when no grid value gave a finite criterion.
    """
    best = (None, None, np.inf)

    def scan(values):
        nonlocal best
        values = np.asarray(values, dtype=float)
        with np.errstate(all="ignore"):
            if bases_of is not None:
                stack = np.asarray(bases_of(values), dtype=float)
            else:
                stack = np.stack([np.asarray(basis_of(float(t)), dtype=float) for t in values])
        # every grid value at once (the same iterations as one _robust_lstsq each); a
        # value whose basis cannot be evaluated scores inf and is never picked
        crit, coefs = _criteria(stack, y, scale, finite_only=True)
        j = _first_better(crit, best[2])
        if j is not None:
            best = (float(values[j]), coefs[j], float(crit[j]))

    grid = np.asarray(grid, dtype=float)
    scan(grid)
    if best[0] is None:
        return best
    lo_ratio = grid[1] / grid[0] if grid.size > 1 and grid[0] > 0 else 2.0
    for _ in range(refine):
        t = best[0]
        scan(t * np.geomspace(1.0 / lo_ratio, lo_ratio, 9))
        lo_ratio = lo_ratio ** 0.25
    # final linear coefficients with the full number of robust iterations
    with np.errstate(all="ignore"):
        A = basis_of(best[0])
    coef, r = _robust_lstsq(A, y)
    return best[0], coef, _criterion(r, scale)


def _smoothed(x, y):
    """Sorted unique x with the median y per x value, then a running median."""
    order = np.argsort(x, kind="mergesort")
    xs, ys = x[order], y[order]
    ux, start = np.unique(xs, return_index=True)
    if ux.size == xs.size:  # every x once (the usual case): no medians to take
        uy = ys.astype(float, copy=True)
    else:
        counts = np.diff(np.append(start, xs.size))
        uy = ys[start].astype(float)
        for i in np.flatnonzero(counts > 1):
            uy[i] = np.median(ys[start[i]:start[i] + counts[i]])
    m = ux.size
    width = 7 if m >= 25 else 5 if m >= 9 else 3 if m >= 3 else 1
    return ux, _running_median(uy, width)


def _running_median(v, width):
    """Running median with windows that shrink at the ends (no edge replication,
    so one wild end value cannot take over the first or last window)."""
    h = width // 2
    if v.size == 0 or h == 0:
        return v.copy()
    if v.size < width or not np.isfinite(v).all():
        padded = np.concatenate([np.full(h, np.nan), v, np.full(h, np.nan)])
        windows = np.lib.stride_tricks.sliding_window_view(padded, width)
        return np.nanmedian(windows, axis=1)
    # full windows inside, shrinking ones at the ends (nanmedian is slow on small rows)
    out = np.empty(v.size)
    # (row_medians: np.median(..., axis=1)'s values without its dispatch)
    out[h:v.size - h] = row_medians(np.lib.stride_tricks.sliding_window_view(v, width))
    # the shrinking end windows (a few values each) by Python's sort: np.median's call
    # costs more than the arithmetic here; the same middle value, or mean of the two
    vals = v.tolist()
    for i in range(h):
        out[i] = _small_median(vals[:i + h + 1])
        out[v.size - 1 - i] = _small_median(vals[v.size - 1 - i - h:])
    return out


def _small_median(vals: list) -> float:
    """Median of a short list of finite floats, as np.median gives it."""
    vals = sorted(vals)
    m = len(vals) // 2
    return vals[m] if len(vals) % 2 else (vals[m - 1] + vals[m]) / 2.0


def _geomgrid(lo, hi, num):
    lo, hi = float(lo), float(hi)
    if not (lo > 0 and hi > lo and np.isfinite(hi)):
        lo, hi = 1e-3, 1e3
    return np.geomspace(lo, hi, num)


def _positive_scale(x):
    """Typical positive size of x: (max |x|, smallest positive spacing, span)."""
    ax = np.abs(x)
    big = float(np.max(ax)) if ax.size else 1.0
    ux = np.unique(x)
    d = np.diff(ux)
    d = d[d > 0]
    small = float(np.min(d)) if d.size else (big if big > 0 else 1.0)
    span = float(ux[-1] - ux[0]) if ux.size > 1 else (big if big > 0 else 1.0)
    big = big if big > 0 else 1.0
    span = span if span > 0 else big
    return big, small, span


# ================================================================ the models


def _float_array(x):
    """x as a float array, keeping extended precision (longdouble) when given it.

    The least-squares refinement evaluates bases in longdouble (see fitcore.solve).
    """
    x = np.asarray(x)
    return x.astype(np.result_type(x.dtype, np.float64), copy=False)


def _line():
    def basis(x):
        x = _float_array(x)
        # column-major (n, 2): the solver's products run down the columns
        return np.stack([np.ones_like(x), x]).T

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        a, b = _theil_sen(x, y)
        return np.array([_safe(a, 0.0), _safe(b, 0.0)])

    x_int = Derived(
        "x_intercept",
        func=lambda p: -p[0] / p[1],
        grad=lambda p: np.array([-1.0 / p[1], p[0] / p[1] ** 2]),
        description="x where the line crosses y = 0 (-a/b)",
        unit="x",
    )
    return linear_model(
        "line", ("a", "b"), basis, guess=guess,
        formula="y = a + b*x", title="Straight line",
        descriptions={"a": "intercept (y at x = 0)", "b": "slope"},
        units={"a": "y", "b": "y/x"}, derived=(x_int,),
    )


def _line_origin():
    def basis(x):
        return _float_array(x)[:, None]

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        coef, _ = _robust_lstsq(x[:, None], y)
        return np.array([_safe(coef[0], 0.0)])

    return linear_model(
        "line_origin", ("b",), basis, guess=guess,
        formula="y = b*x", title="Straight line through the origin",
        descriptions={"b": "slope"}, units={"b": "y/x"},
    )


def _poly(degree: int):
    degree = int(degree)
    names = tuple(f"c{j}" for j in range(degree + 1))

    def basis(x):
        # Plain monomial columns; the linear solver scales columns and uses QR.
        return np.vander(_float_array(x), degree + 1, increasing=True)

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        if x.size <= degree:
            p = np.zeros(degree + 1)
            p[0] = _median_or(y)
            return p
        # centre and scale x for the robust fit, then map back to monomials in x
        xc = float(np.median(x))
        xs = _spread(x)
        t = (x - xc) / xs
        coef_t, _ = _robust_lstsq(np.vander(t, degree + 1, increasing=True), y)
        # y = sum c_j t^j with t = (x - xc)/xs  ->  coefficients in powers of x
        poly_t = np.polynomial.Polynomial(coef_t)
        poly_x = poly_t(np.polynomial.Polynomial([-xc / xs, 1.0 / xs]))
        p = np.zeros(degree + 1)
        p[: poly_x.coef.size] = poly_x.coef[: degree + 1]
        p[~np.isfinite(p)] = 0.0
        return p

    terms = " + ".join(
        ["c0"] + [f"c{j}*x" if j == 1 else f"c{j}*x**{j}" for j in range(1, degree + 1)]
    )
    units = {}
    descriptions = {}
    for j, n in enumerate(names):
        units[n] = "y" if j == 0 else "y/x" if j == 1 else f"y/x^{j}"
        descriptions[n] = (
            "constant term (y at x = 0)" if j == 0
            else "coefficient of x" if j == 1 else f"coefficient of x^{j}"
        )
    ordinal = {2: "Quadratic", 3: "Cubic", 4: "Quartic", 5: "Quintic"}
    title = ordinal.get(degree, f"Polynomial of degree {degree}")
    if degree in ordinal:
        title += f" polynomial (degree {degree})"
    return linear_model(
        f"poly{degree}", names, basis, guess=guess, formula=f"y = {terms}",
        title=title, descriptions=descriptions, units=units,
    )


def _exp_grid_fit(x, y):
    """Grid over the time constant tau; returns (A, tau, C) for A*exp(-x/tau) + C."""
    big, small, span = _positive_scale(x)
    x_min = float(np.min(x))
    grid = _geomgrid(span / 100.0, span * 30.0, 48)

    def basis(tau):
        return np.column_stack([np.exp(-(x - x_min) / tau), np.ones_like(x)])

    def bases(taus):
        out = np.ones((taus.size, x.size, 2))
        out[:, :, 0] = np.exp(-(x - x_min)[None, :] / taus[:, None])
        return out

    tau, coef, _ = _profile(basis, y, grid, _noise_scale(x, y), bases_of=bases)
    if tau is None:
        return _median_or(y) - np.min(y), span / 3.0, float(np.min(y))
    amp_shift, c = coef
    # A exp(-x/tau) = A exp(-x_min/tau) exp(-(x - x_min)/tau)
    amp = amp_shift * math.exp(min(x_min / tau, 700.0))
    return float(amp), float(tau), float(c)


def _exp_decay(rate: bool = False):
    if rate:
        names = ("A", "k", "C")

        def f(x, p):
            A, k, C = p
            with np.errstate(over="ignore", under="ignore"):
                return A * np.exp(-k * x) + C

        def jac(x, p):
            A, k, C = p
            with np.errstate(over="ignore", under="ignore", invalid="ignore"):
                e = np.exp(-k * x)
                dk = np.where(e == 0.0, 0.0, -A * x * e)
            return np.column_stack([e, dk, np.ones_like(x)])

        def guess(x, y):
            x, y = _finite_pairs(x, y)
            if x.size < 3:
                return np.array([_spread(y), 1.0 / _positive_scale(x)[2], _median_or(y)])
            A, tau, C = _exp_grid_fit(x, y)
            return np.array([_safe(A, _spread(y)), 1.0 / tau, _safe(C, _median_or(y))])

        derived = (
            Derived("half_life", lambda p: _LN2 / p[1],
                    lambda p: np.array([0.0, -_LN2 / p[1] ** 2, 0.0]),
                    "x for the decaying part to halve (ln 2 / k)", "x"),
            Derived("tau", lambda p: 1.0 / p[1],
                    lambda p: np.array([0.0, -1.0 / p[1] ** 2, 0.0]),
                    "time constant (1/k)", "x"),
        )
        return Model(
            "exp_decay_rate", names, f, jac, guess=guess,
            lower=(-np.inf, 0.0, -np.inf), formula="y = A*exp(-k*x) + C",
            title="Exponential decay (rate constant)",
            descriptions={"A": "amplitude (decaying part at x = 0)",
                          "k": "rate constant", "C": "offset (level as x -> infinity)"},
            units={"A": "y", "k": "1/x", "C": "y"}, derived=derived,
        )

    names = ("A", "tau", "C")

    def f(x, p):
        A, tau, C = p
        with np.errstate(over="ignore", under="ignore", divide="ignore"):
            return A * np.exp(-x / tau) + C

    def f_jac(x, p, out=None):
        # one exponential for both; J column-major (n, 3); ``out`` = (f, J) to fill
        A, tau, C = p
        x = np.asarray(x, dtype=float).ravel()
        if out is None:
            fx, J = None, np.empty((x.size, 3), order="F")
        else:
            fx, J = out
        with np.errstate(all="ignore"):
            z = np.divide(x, tau, out=J[:, 1])
            np.negative(z, out=J[:, 0])
            e = np.exp(J[:, 0], out=J[:, 0])
            fx = np.multiply(e, A, out=fx)
            fx += C
            dtau = J[:, 1]
            np.multiply(dtau, e, out=dtau)
            dtau *= A / tau
            if not np.all(np.isfinite(dtau)):
                dtau[e == 0.0] = 0.0
        J[:, 2] = 1.0
        return fx, J

    def jac(x, p):
        return f_jac(x, p)[1]

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        if x.size < 3:
            return np.array([_spread(y), _positive_scale(x)[2], _median_or(y)])
        A, tau, C = _exp_grid_fit(x, y)
        return np.array([_safe(A, _spread(y)), tau, _safe(C, _median_or(y))])

    derived = (
        Derived("half_life", lambda p: _LN2 * p[1],
                lambda p: np.array([0.0, _LN2, 0.0]),
                "x for the decaying part to halve (tau ln 2)", "x"),
        Derived("rate", lambda p: 1.0 / p[1],
                lambda p: np.array([0.0, -1.0 / p[1] ** 2, 0.0]),
                "rate constant (1/tau)", "1/x"),
    )
    return Model(
        "exp_decay", names, f, jac, guess=guess, f_jac=f_jac,
        lower=(-np.inf, 0.0, -np.inf), formula="y = A*exp(-x/tau) + C",
        title="Exponential decay (time constant)",
        descriptions={"A": "amplitude (decaying part at x = 0)",
                      "tau": "time constant", "C": "offset (level as x -> infinity)"},
        units={"A": "y", "tau": "x", "C": "y"}, derived=derived,
    )


def _exp_rise():
    def f(x, p):
        ymax, k = p
        with np.errstate(over="ignore"):
            return -ymax * np.expm1(-k * x)

    def jac(x, p):
        ymax, k = p
        with np.errstate(all="ignore"):
            e = np.exp(-k * x)
            dk = np.where(e == 0.0, 0.0, ymax * x * e)
            return np.column_stack([-np.expm1(-k * x), dk])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        big, small, span = _positive_scale(x)
        if x.size < 2:
            return np.array([_safe(np.max(np.abs(y), initial=1.0), 1.0), 1.0 / big])
        grid = _geomgrid(1e-3 / big, 30.0 / small if small > 0 else 30.0 / big, 60)
        k, coef, _ = _profile(lambda k: -np.expm1(-k * x)[:, None], y, grid,
                              _noise_scale(x, y))
        if k is None:
            return np.array([_safe(np.max(np.abs(y)), 1.0), 1.0 / big])
        return np.array([_safe(coef[0], np.max(np.abs(y))), k])

    derived = (
        Derived("half_rise", lambda p: _LN2 / p[1],
                lambda p: np.array([0.0, -_LN2 / p[1] ** 2]),
                "x where y reaches half the plateau (ln 2 / k)", "x"),
        Derived("initial_slope", lambda p: p[0] * p[1],
                lambda p: np.array([p[1], p[0]]),
                "slope at x = 0 (ymax k)", "y/x"),
    )
    return Model(
        "exp_rise", ("ymax", "k"), f, jac, guess=guess, lower=(-np.inf, 0.0),
        formula="y = ymax*(1 - exp(-k*x))", title="Exponential rise to a plateau",
        descriptions={"ymax": "plateau (y as x -> infinity)", "k": "rate constant"},
        units={"ymax": "y", "k": "1/x"}, derived=derived,
    )


def _power_law():
    def f(x, p):
        a, b = p
        with np.errstate(all="ignore"):
            return a * np.power(x, b)

    def jac(x, p):
        a, b = p
        with np.errstate(all="ignore"):
            xb = np.power(x, b)
            lx = np.log(np.where(x > 0, x, 1.0))
            db = np.where(x > 0, a * xb * lx, np.where(x == 0, 0.0, np.nan))
        return np.column_stack([xb, db])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        pos = x > 0
        x, y = x[pos], y[pos]
        if x.size == 0:
            return np.array([1.0, 1.0])
        sign = 1.0 if np.count_nonzero(y > 0) >= np.count_nonzero(y < 0) else -1.0
        keep = sign * y > 0
        if np.count_nonzero(keep) < 2:
            return np.array([_safe(_median_or(y / x), 1.0) or 1.0, 1.0])
        lx, ly = np.log(x[keep]), np.log(sign * y[keep])
        a0, b = _theil_sen(lx, ly)
        b = _safe(b, 1.0)
        # amplitude by a robust fit through the origin on the original scale
        with np.errstate(all="ignore"):
            coef, _ = _robust_lstsq(np.power(x, b)[:, None], y)
        a = coef[0] if coef[0] != 0 and np.isfinite(coef[0]) else sign * math.exp(min(a0, 700))
        return np.array([_safe(a, 1.0), b])

    return Model(
        "power_law", ("a", "b"), f, jac, guess=guess, formula="y = a*x**b",
        title="Power law (x > 0)",
        descriptions={"a": "prefactor (y at x = 1)", "b": "exponent"},
        units={"a": "y/x^b", "b": ""},
    )


def _michaelis_menten():
    def f(x, p):
        vmax, km = p
        with np.errstate(all="ignore"):
            return vmax * x / (km + x)

    def jac(x, p):
        vmax, km = p
        with np.errstate(all="ignore"):
            d = km + x
            return np.column_stack([x / d, -vmax * x / d ** 2])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        big, small, span = _positive_scale(x)
        xp = x[x > 0]
        lo = float(np.min(xp)) if xp.size else small
        hi = float(np.max(xp)) if xp.size else big
        top = float(np.max(np.abs(y))) if y.size else 1.0
        if x.size < 2:
            return np.array([_safe(2 * top, 1.0) or 1.0, hi])
        k, coef, _ = _profile(lambda km: (x / (km + x))[:, None], y,
                              _geomgrid(lo / 30.0, hi * 30.0, 60), _noise_scale(x, y))
        if k is None:
            return np.array([_safe(2 * top, 1.0) or 1.0, hi])
        return np.array([_safe(coef[0], top), k])

    derived = (
        Derived("initial_slope", lambda p: p[0] / p[1],
                lambda p: np.array([1.0 / p[1], -p[0] / p[1] ** 2]),
                "slope at x = 0, Vmax/Km (kcat/Km, the catalytic efficiency, only "
                "after dividing by the enzyme concentration)",
                "y/x"),
    )
    return Model(
        "michaelis_menten", ("Vmax", "Km"), f, jac, guess=guess, lower=(-np.inf, 0.0),
        formula="y = Vmax*x/(Km + x)", title="Michaelis-Menten (saturation)",
        descriptions={"Vmax": "limiting rate (y as x -> infinity)",
                      "Km": "Michaelis constant (x at half of Vmax)"},
        units={"Vmax": "y", "Km": "x"}, derived=derived,
    )


def _log_ratio(x, ec50):
    """ln(x/EC50), -inf at x = 0, NaN for x < 0."""
    x = np.asarray(x, dtype=float)
    # EC50 <= 0 (a step onto its bound): NaN, which the solver refuses like any
    # non-finite curve (math.log raised a raw ValueError out of fit())
    lec = math.log(ec50) if ec50 > 0 else math.nan
    if x.size and x.min() > 0:  # (the usual case: the same numbers, fewer passes)
        return np.log(x) - lec
    with np.errstate(all="ignore"):
        return np.where(x > 0, np.log(np.where(x > 0, x, 1.0)) - lec,
                        np.where(x == 0, -np.inf, np.nan))


def _logistic_z(x, hill, ec50):
    """z = hill * ln(x/EC50), with the x = 0 limit taken per sign of hill."""
    lr = _log_ratio(x, ec50)
    if 1e-100 < abs(hill) < 1e100:  # (|lr| < 800: no overflow, no 0 * inf; the usual case)
        return hill * lr, lr
    with np.errstate(all="ignore"):
        z = hill * lr
    if hill == 0:
        z = np.where(np.isinf(lr), 0.0, z)
    return z, lr


def _logistic_start(x, y):
    """Start values (bottom, top, hill, EC50) for the 4PL, sign of hill by trend."""
    xp = x[x > 0]
    big, small, span = _positive_scale(x)
    xlo = float(xp.min()) if xp.size else small
    xhi = float(xp.max()) if xp.size else big
    ux, sy = _smoothed(x, y)
    m = ux.size
    if m < 2:
        v = _median_or(y)
        return v, v + 1.0, 1.0, math.sqrt(xlo * xhi)
    q = max(1, m // 5)
    vals = sy.tolist()  # (short lists: Python's sort, the same medians as np.median)
    y_low, y_high = _small_median(vals[:q]), _small_median(vals[-q:])
    y_min, y_max = float(sy.min()), float(sy.max())
    falling = y_low >= y_high
    top, bottom = (y_max, y_min)
    hill_sign = 1.0 if falling else -1.0
    if top - bottom <= 0:
        top = bottom + _spread(y)
    # logit linearisation: ln(1/F - 1) = hill * (ln x - ln EC50), F = (y - bottom)/(top - bottom)
    F = (y - bottom) / (top - bottom)
    sel = (x > 0) & (F > 0.05) & (F < 0.95)
    hill, ec50 = hill_sign, math.sqrt(xlo * xhi)
    xsel = x[sel]
    if xsel.size >= 2 and xsel.max() > xsel.min():  # (two distinct x at least)
        lx = np.log(xsel)
        t = np.log(1.0 / F[sel] - 1.0)
        a0, h = _theil_sen(lx, t)
        if math.isfinite(h) and h * hill_sign > 0:
            hill = h
            # (np.clip of one value; NaN stays NaN)
            ec50 = math.exp(min(max(-a0 / h, math.log(xlo) - 3), math.log(xhi) + 3))
    if not (hill * hill_sign > 0):
        hill = hill_sign
    # midpoint crossing of the smoothed curve as a cross-check for EC50
    mid = 0.5 * (top + bottom)
    above = sy > mid
    cross = np.nonzero(above[1:] != above[:-1])[0]
    if cross.size and not (xlo / 10 < ec50 < xhi * 10):
        i = cross[0]
        xm = 0.5 * (ux[i] + ux[i + 1])
        if xm > 0:
            ec50 = xm
    return bottom, top, hill, ec50


def _logistic_design(x, hill, ec50):
    """Design matrix [1 - g, g] of the plateaus at (hill, EC50)."""
    z, _ = _logistic_z(x, hill, ec50)
    g = special.expit(-z)
    return np.column_stack([1.0 - g, g])


def _logistic_designs(x, pairs):
    """:func:`_logistic_design` for many ``(hill, EC50)`` pairs at once, (G, n, 2).

    The same element-wise operations in the same order as the single version (so the
    same numbers), without a Python call and two small arrays per pair.
    """
    hs = np.array([float(h) for h, _ in pairs])
    les = np.array([math.log(e) for _, e in pairs])  # math.log, as _log_ratio uses
    with np.errstate(all="ignore"):
        pos = x > 0
        lx = np.log(np.where(pos, x, 1.0))
        lr = np.where(pos, lx[None, :] - les[:, None], np.where(x == 0, -np.inf, np.nan)[None, :])
        z = hs[:, None] * lr
    zero = hs == 0
    if zero.any():
        z[zero] = np.where(np.isinf(lr[zero]), 0.0, z[zero])
    g = special.expit(-z)
    out = np.empty(g.shape + (2,))
    out[:, :, 0] = 1.0 - g
    out[:, :, 1] = g
    return out


def _logistic_guess(x, y):
    """(bottom, top, hill, EC50): robust scan over hill and EC50, plateaus linear.

    Candidates: the logit-linearised start and a coarse grid (EC50 across the positive
    x range in steps of ~0.4 decades, hill = +-0.5 ... +-4); the three best are refined
    once on finer local grids, and the best of those gives the start (its plateaus
    are the scan's robust fit: the solver that follows refines all four parameters).
    The result is put in the convention top >= bottom (the curve is unchanged).
    """
    b0, t0, h0, e0 = _logistic_start(x, y)
    xp = x[x > 0]
    if x.size < 4 or xp.size < 2:
        return b0, t0, h0, e0
    lo, hi = float(np.min(xp)), float(np.max(xp))
    noise = _noise_scale(x, y)
    ecs = _geomgrid(lo / 2.0, hi * 2.0, _GUESS_ECS).tolist()
    cands = [(h0, e0)] + [
        (s * h, e) for s in (1.0, -1.0) for h in (0.5, 1.0, 2.0, 4.0) for e in ecs
    ]

    def crits(pairs):
        # every candidate at once (one 3 Huber + 2 Tukey robust fit each)
        return _criteria(_logistic_designs(x, pairs), y, noise, finite_only=True,
                         steps=_GUESS_STEPS)

    coarse, coefs = crits(cands)
    order = sorted(range(len(cands)), key=lambda i: coarse[i])  # stable, as before
    # refine the three best coarse candidates, each on its own local grid (the three
    # scored in one batch; each keeps its own first better value)
    state = [(cands[i][0], cands[i][1], coarse[i], coefs[i]) for i in order[:3]]
    step_e = (ecs[1] / ecs[0]) ** 0.5 if len(ecs) > 1 else 1.6
    for hr, er in _GUESS_LEVELS(step_e):
        fh, fe = np.geomspace(1.0 / hr, hr, 5), np.geomspace(1.0 / er, er, 7)
        grids = [[(h, e) for h in hc * fh for e in (ec * fe).tolist()] for hc, ec, _, _ in state]
        v, cs = crits([pair for grid in grids for pair in grid])
        for t, grid in enumerate(grids):
            vt = v[t * len(grid):(t + 1) * len(grid)]
            jt = _first_better(vt, state[t][2])
            if jt is not None:
                state[t] = (grid[jt][0], grid[jt][1], vt[jt], cs[t * len(grid) + jt])
    best_crit, best = np.inf, None
    for h1, e1, crit0, c1 in state:
        if crit0 < best_crit:
            best_crit, best = crit0, (h1, e1, c1)
    if best is None:
        return b0, t0, h0, e0
    h, e, (b_, t_) = best
    if not _GUESS_SCAN_PLATEAUS:
        z, _ = _logistic_z(x, h, e)
        g = special.expit(-z)
        (b_, t_), _ = _robust_lstsq(np.column_stack([1.0 - g, g]), y)
    if t_ < b_:  # same curve with the plateaus named the other way round
        b_, t_, h = t_, b_, -h
    return float(b_), float(t_), h, e


def _logistic_quick(x, y):
    """(bottom, top, hill, EC50) without a scan: the logit-linearised start
    (:func:`_logistic_start`) with the plateaus from a robust fit of the data at its
    (hill, EC50); the scan's start (:func:`_logistic_guess`) where that start fails
    the plausibility checks below. The 4PL's ``guess`` from ``_QUICK_FROM`` points
    on; the scan stays its ``guess_search``, tried when a fit from here fails the
    verdict."""
    b0, t0, h0, e0 = _logistic_start(x, y)
    if x.size < 4 or np.count_nonzero(x > 0) < 2:
        return b0, t0, h0, e0
    # (the scan's robust fit of each candidate: 3 Huber + 2 Tukey steps)
    A = _logistic_design(x, h0, e0)
    (b_, t_), _ = _robust_lstsq(A, y, *_GUESS_STEPS)
    # a start the data do not support goes to the scan: plateaus far outside the data
    # (more than half their range beyond it), or a curve that does not pass through
    # the middle half of its transition inside the data (e.g. the logit line fooled by
    # outliers into a hill of 0.06 on two decades of x)
    y_lo, y_hi = float(np.min(y)), float(np.max(y))
    reach = 0.5 * (y_hi - y_lo)
    g = A[:, 1]
    if not (y_lo - reach <= b_ <= y_hi + reach and y_lo - reach <= t_ <= y_hi + reach
            and float(np.min(g)) < 0.25 and float(np.max(g)) > 0.75):
        return _logistic_guess(x, y)
    h = h0
    if t_ < b_:  # same curve with the plateaus named the other way round
        b_, t_, h = t_, b_, -h
    return float(b_), float(t_), h, e0


# From this many points the 4PL starts from the quick start above, not the scan: on a
# 448-fit battery (n 8-150, 0-35 % outliers, Huber and Tukey; /work/notes/q4pl.md) every
# fit of 25 points or more reached the same optimum from either start (or converged
# only from the quick one), while below 20 points a few fits settled elsewhere.
_QUICK_FROM = 20
_GUESS_ECS = 12
_GUESS_STEPS = (3, 2)
_GUESS_SCAN_PLATEAUS = True


def _GUESS_LEVELS(step_e):
    return ((1.3, step_e),)


_SHARE_MAX = 2000  # (the 4PL's f_jac keeps its intermediate arrays up to this size)


def _logistic4():
    names = ("bottom", "top", "hill", "EC50")

    def f(x, p):
        bottom, top, hill, ec50 = p
        z, _ = _logistic_z(x, hill, ec50)
        return bottom + (top - bottom) * special.expit(-z)

    def jac(x, p):
        bottom, top, hill, ec50 = p
        z, lr = _logistic_z(x, hill, ec50)
        g = special.expit(-z)  # 1/(1 + (x/EC50)^hill)
        gg = special.expit(-z) * special.expit(z)  # g (1 - g), no cancellation
        d = top - bottom
        with np.errstate(invalid="ignore"):
            dh = np.where(gg == 0.0, 0.0, -d * gg * lr)
            de = d * gg * hill / ec50
        return np.column_stack([1.0 - g, g, dh, de])

    # ln(x/EC50), g and g (1 - g) of the last f_jac call on at most _SHARE_MAX points,
    # for hess_w at the same x (the same array object, which the solvers never change)
    # and parameters: they ask for both at one point in turn (a tuple, replaced whole:
    # safe across threads)
    shared = [None]

    def f_jac(x, p, out=None):
        # f and jac above with z and g computed once (the same arithmetic, the same
        # numbers); ``out`` = (f, J) to fill, J column-major (n, 4)
        # (Python floats: the same IEEE arithmetic as numpy's scalars, cheaper)
        bottom, top, hill, ec50 = np.asarray(p, dtype=float).tolist()
        x_in = x
        x = np.asarray(x, dtype=float).ravel()
        z, lr = _logistic_z(x, hill, ec50)
        g = special.expit(-z)
        d = top - bottom
        gg = g * special.expit(z)
        if x.size <= _SHARE_MAX:
            shared[0] = (x_in, (bottom, top, hill, ec50), lr, g, gg)
        if out is None:
            f_out, J = np.empty(x.size), np.empty((x.size, 4))  # (as column_stack made it)
        else:
            f_out, J = out
        # each value written where it goes (the same operations as bottom + d g,
        # 1 - g, where(gg == 0, 0, -d gg ln(x/EC50)) and d gg hill / EC50)
        np.add(np.multiply(g, d, out=f_out), bottom, out=f_out)
        np.subtract(1.0, g, out=J[:, 0])
        J[:, 1] = g
        with np.errstate(invalid="ignore"):
            dh = np.multiply(np.multiply(gg, -d, out=J[:, 2]), lr, out=J[:, 2])
            if not gg.all():  # (x = 0 or a saturated curve: gg = 0, ln -inf)
                dh[gg == 0.0] = 0.0
            np.divide(np.multiply(np.multiply(gg, d, out=J[:, 3]), hill, out=J[:, 3]), ec50,
                      out=J[:, 3])
        return f_out, J

    def hess_w(x, p, w):
        # sum_i w_i d2f_i/dp dp^T. With g = 1/(1 + e^z), z = hill ln(x/EC50),
        # gg = g (1 - g), d = top - bottom: dg/dz = -gg, dgg/dz = -gg (1 - 2g),
        # dz/dhill = ln(x/EC50), dz/dEC50 = -hill/EC50; the (bottom, top) block is 0
        bottom, top, hill, ec50 = p
        kept = shared[0]
        if kept is not None and kept[0] is x and kept[1] == (bottom, top, hill, ec50):
            lr, g, gg = kept[2:]  # (f_jac's arrays at this point: the same numbers)
        else:
            x = np.asarray(x, dtype=float).ravel()
            z, lr = _logistic_z(x, hill, ec50)
            g = special.expit(-z)
            gg = g * special.expit(z)
        d = top - bottom
        # the five sums by one row reduction (the same pairwise sums as np.sum of each
        # row, so the same numbers; one call instead of six)
        V = np.empty((5, lr.size))
        with np.errstate(invalid="ignore"):
            if not gg.all():  # (x = 0: gg = 0, lr = -inf; NaN counts as nonzero, as before)
                lr = np.where(gg == 0.0, 0.0, lr)
            wg = np.multiply(w, gg, out=V[0])
            np.multiply(wg, lr, out=V[1])  # w gg ln(x/EC50)
            c = np.multiply(wg, 1.0 - 2.0 * g, out=V[2])
            np.multiply(c, lr, out=V[3])
            np.multiply(V[3], lr, out=V[4])
            s_wg, s_a, s_c, s_cl, s_cll = V.sum(axis=1).tolist()
        s_bh, s_be = s_a, -s_wg * hill / ec50
        s_hh = d * s_cll
        s_he = d / ec50 * (s_wg - hill * s_cl)
        s_ee = d * hill / ec50 ** 2 * (hill * s_c - s_wg)
        return np.array([[0.0, 0.0, s_bh, s_be],
                         [0.0, 0.0, -s_bh, -s_be],
                         [s_bh, -s_bh, s_hh, s_he],
                         [s_be, -s_be, s_he, s_ee]])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        b, t, h, e = (_logistic_quick if x.size >= _QUICK_FROM else _logistic_guess)(x, y)
        return np.array([_safe(b, 0.0), _safe(t, 1.0), _safe(h, 1.0), _safe(e, 1.0)])

    def guess_search(x, y):
        x, y = _finite_pairs(x, y)
        b, t, h, e = _logistic_guess(x, y)
        return np.array([_safe(b, 0.0), _safe(t, 1.0), _safe(h, 1.0), _safe(e, 1.0)])

    derived = (
        Derived("log10_EC50", lambda p: math.log10(p[3]),
                lambda p: np.array([0.0, 0.0, 0.0, 1.0 / (p[3] * math.log(10.0))]),
                "decimal logarithm of EC50", ""),
        Derived("range", lambda p: p[1] - p[0],
                lambda p: np.array([-1.0, 1.0, 0.0, 0.0]),
                "height of the transition, top - bottom", "y"),
    )
    return Model(
        "logistic4", names, f, jac, guess=guess, f_jac=f_jac, hess_w=hess_w,
        guess_search=guess_search, monotone_in_x=True,
        lower=(-np.inf, -np.inf, -np.inf, 0.0),
        formula="y = bottom + (top - bottom)/(1 + (x/EC50)**hill)",
        title="Four-parameter logistic (dose-response, x >= 0)",
        descriptions={
            "bottom": "plateau at high x when hill > 0 (at x = 0 when hill < 0)",
            "top": "plateau at x = 0 when hill > 0 (at high x when hill < 0)",
            "hill": "Hill slope; > 0: response falls with dose, < 0: it rises",
            "EC50": "x at the midpoint between bottom and top",
        },
        units={"bottom": "y", "top": "y", "hill": "", "EC50": "x"}, derived=derived,
    )


def _logistic5():
    names = ("bottom", "top", "hill", "EC50", "s")

    def f(x, p):
        bottom, top, hill, ec50, s = p
        z, _ = _logistic_z(x, hill, ec50)
        with np.errstate(over="ignore"):
            g = np.exp(-s * np.logaddexp(0.0, z))  # (1 + (x/EC50)^hill)^(-s)
        return bottom + (top - bottom) * g

    def jac(x, p):
        bottom, top, hill, ec50, s = p
        z, lr = _logistic_z(x, hill, ec50)
        sp = np.logaddexp(0.0, z)  # ln(1 + u)
        with np.errstate(over="ignore", under="ignore"):
            g = np.exp(-s * sp)
        d = top - bottom
        dz = -d * s * g * special.expit(z)  # d f / d z
        with np.errstate(invalid="ignore"):
            dh = np.where(dz == 0.0, 0.0, dz * lr)
            ds = np.where(g == 0.0, 0.0, -d * g * sp)
        de = -dz * hill / ec50
        return np.column_stack([1.0 - g, g, dh, de, ds])

    model4 = _logistic4()

    def guess(x, y):
        p4 = model4.guess_search(x, y)
        return np.append(p4, 1.0)

    def x_mid(p):
        hill, ec50, s = p[2], p[3], p[4]
        return ec50 * (2.0 ** (1.0 / s) - 1.0) ** (1.0 / hill)

    def x_mid_grad(p):
        hill, ec50, s = p[2], p[3], p[4]
        q = 2.0 ** (1.0 / s) - 1.0
        xm = ec50 * q ** (1.0 / hill)
        dq_ds = -(2.0 ** (1.0 / s)) * _LN2 / s ** 2
        return np.array([0.0, 0.0, -xm * math.log(q) / hill ** 2, xm / ec50,
                         xm * dq_ds / (hill * q)])

    derived = (
        Derived("x_mid", x_mid, x_mid_grad,
                "x where y is halfway between bottom and top", "x"),
    )
    return Model(
        "logistic5", names, f, jac, guess=guess,
        lower=(-np.inf, -np.inf, -np.inf, 0.0, 0.0),
        formula="y = bottom + (top - bottom)/(1 + (x/EC50)**hill)**s",
        title="Five-parameter logistic (asymmetric, x >= 0)",
        descriptions={
            "bottom": "plateau at high x when hill > 0 (at x = 0 when hill < 0)",
            "top": "plateau at x = 0 when hill > 0 (at high x when hill < 0)",
            "hill": "Hill slope; > 0: response falls with dose, < 0: it rises",
            "EC50": "location; the midpoint only when s = 1 (see x_mid)",
            "s": "asymmetry exponent (s = 1 gives the four-parameter logistic)",
        },
        units={"bottom": "y", "top": "y", "hill": "", "EC50": "x", "s": ""},
        derived=derived,
    )


def _arrhenius(t_ref: float | None = None):
    R = GAS_CONSTANT

    def f(x, p):
        ln_a, ea = p
        with np.errstate(all="ignore"):
            return np.exp(ln_a - ea / (R * x))

    def jac(x, p):
        ln_a, ea = p
        with np.errstate(all="ignore"):
            k = np.exp(ln_a - ea / (R * x))
            return np.column_stack([k, -k / (R * x)])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        keep = (x > 0) & (y > 0)
        if np.count_nonzero(keep) < 2:
            return np.array([_safe(math.log(max(_median_or(y[y > 0], 1.0), 1e-300)), 0.0),
                             5e4])
        inv_t = 1.0 / x[keep]
        ly = np.log(y[keep])
        c = float(np.median(inv_t))
        a0, b = _theil_sen(inv_t - c, ly)  # ln k = (ln A - Ea c/R) + (-Ea/R) (1/T - c)
        ea = -b * R
        ln_a = a0 - b * c
        return np.array([_safe(ln_a, 0.0), _safe(ea, 5e4)])

    derived = [
        Derived("A", lambda p: math.exp(p[0]), lambda p: np.array([math.exp(p[0]), 0.0]),
                "pre-exponential factor exp(lnA)", "y"),
        Derived("Ea_kJ", lambda p: p[1] / 1000.0, lambda p: np.array([0.0, 1e-3]),
                "activation energy in kJ/mol", "kJ/mol"),
    ]
    if t_ref is not None:
        t_ref = float(t_ref)
        if not (t_ref > 0 and np.isfinite(t_ref)):
            raise ValueError(f"arrhenius: t_ref must be a positive temperature in K, got {t_ref}")

        def k_ref(p, t=t_ref):
            return math.exp(p[0] - p[1] / (R * t))

        derived.append(Derived(
            "k_ref", k_ref, lambda p, t=t_ref: k_ref(p) * np.array([1.0, -1.0 / (R * t)]),
            f"rate constant at T = {t_ref:g} K", "y"))
    return Model(
        "arrhenius", ("lnA", "Ea"), f, jac, guess=guess,
        formula="y = exp(lnA - Ea/(R*x)),  R = 8.31446261815324 J/(mol K), x = T in K",
        title="Arrhenius law (x = temperature in K)",
        descriptions={"lnA": "natural logarithm of the pre-exponential factor A",
                      "Ea": "activation energy in J/mol"},
        units={"lnA": "", "Ea": "J/mol"}, derived=tuple(derived),
    )


def _peak_start(x, y, shape: Callable[[np.ndarray, float, float], np.ndarray]):
    """Start values (A, x0, width, base) for a peak of unit height ``shape(x, x0, w)``.

    Candidate centres are the three highest local maxima and the three lowest local
    minima of a running median (so a dip is found as well as a peak); for each the
    width is scanned with height and baseline fitted robustly. The best candidate's
    centre and width are then refined on finer local grids.
    """
    big, small, span = _positive_scale(x)
    if x.size < 4:
        base = _median_or(y)
        return (_safe(np.max(y, initial=base + 1) - base, 1.0),
                _median_or(x), span / 4.0, base)
    ux, sy = _smoothed(x, y)
    m = ux.size
    centres = []
    if m >= 3:
        inner = np.arange(1, m - 1)
        maxima = inner[(sy[1:-1] >= sy[:-2]) & (sy[1:-1] >= sy[2:])]
        minima = inner[(sy[1:-1] <= sy[:-2]) & (sy[1:-1] <= sy[2:])]
        centres += list(maxima[np.argsort(-sy[maxima])][:3])
        centres += list(minima[np.argsort(sy[minima])][:3])
    centres += [int(np.argmax(sy)), int(np.argmin(sy))]
    centres = [float(ux[i]) for i in dict.fromkeys(centres)]
    grid = _geomgrid(small / 2.0, span, 24)
    noise = _noise_scale(x, y)

    def basis(xc, w):
        return np.column_stack([shape(x, xc, w), np.ones_like(x)])

    def bases(pairs):
        """``basis`` for many (centre, width) pairs at once, (G, n, 2): the same
        element-wise arithmetic, broadcast instead of one call per pair."""
        xc = np.array([float(p[0]) for p in pairs])[:, None]
        w = np.array([float(p[1]) for p in pairs])[:, None]
        out = np.ones((len(pairs), x.size, 2))
        with np.errstate(all="ignore"):
            out[:, :, 0] = shape(x[None, :], xc, w)
        return out

    best = (np.inf, None, None, None)
    # the width scan of every candidate centre at once (as _profile without refinement,
    # centre by centre), then each centre's best width fitted with the full iterations
    with np.errstate(all="ignore"):
        stack = bases([(xc, w) for xc in centres for w in grid])
    scan_crit, _ = _criteria(stack, y, noise, finite_only=True)
    scan_crit = scan_crit.reshape(len(centres), len(grid))
    picked = [(xc, float(grid[int(np.argmin(v))])) for xc, v in zip(centres, scan_crit)
              if np.min(v) < np.inf]
    if picked:
        with np.errstate(all="ignore"):
            finals = bases(picked)
        coefs, res = _robust_lstsq_many(finals, y)
        for (xc, w), coef, r in zip(picked, coefs, res):
            crit = _criterion(r, noise)
            if crit < best[0]:
                best = (crit, xc, w, coef)
    if best[1] is None:
        med = float(np.median(sy))
        return float(np.max(sy) - med), float(ux[int(np.argmax(sy))]), span / 10.0, med
    for _ in range(2):
        # each local grid at once (the same robust fit per candidate as one by one)
        crit, x0, w, coef = best
        xcs = x0 + w * np.linspace(-0.5, 0.5, 11)
        v, cs = _criteria(bases([(xc, w) for xc in xcs]), y, noise)
        j = _first_better(v, best[0])
        if j is not None:
            best = (v[j], float(xcs[j]), w, cs[j])
        crit, x0, w, coef = best
        wcs = w * np.geomspace(0.6, 1.6, 9)
        v, cs = _criteria(bases([(x0, wc) for wc in wcs]), y, noise)
        j = _first_better(v, best[0])
        if j is not None:
            best = (v[j], x0, float(wcs[j]), cs[j])
    _, x0, w, _ = best
    coef, _ = _robust_lstsq(basis(x0, w), y)
    return float(coef[0]), float(x0), float(w), float(coef[1])


def _gauss_shape(x, x0, s):
    with np.errstate(all="ignore"):
        return np.exp(-0.5 * ((x - x0) / s) ** 2)


def _gauss_peak():
    def f(x, p):
        A, x0, s, base = p
        return A * _gauss_shape(x, x0, s) + base

    def jac(x, p):
        A, x0, s, base = p
        e = _gauss_shape(x, x0, s)
        with np.errstate(all="ignore"):
            t = (x - x0) / s
            dx0 = np.where(e == 0.0, 0.0, A * e * t / s)
            ds = np.where(e == 0.0, 0.0, A * e * t * t / s)
        return np.column_stack([e, dx0, ds, np.ones_like(x)])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        A, x0, s, base = _peak_start(x, y, _gauss_shape)
        span = _positive_scale(x)[2]
        return np.array([_safe(A, 1.0), _safe(x0, _median_or(x)),
                         _safe(s, span / 10.0), _safe(base, 0.0)])

    c = _FWHM_PER_SIGMA
    derived = (
        Derived("FWHM", lambda p: c * p[2], lambda p: np.array([0.0, 0.0, c, 0.0]),
                "full width at half maximum (2 sqrt(2 ln 2) sigma)", "x"),
        Derived("area", lambda p: p[0] * p[2] * _SQRT_2PI,
                lambda p: np.array([p[2] * _SQRT_2PI, 0.0, p[0] * _SQRT_2PI, 0.0]),
                "area above the baseline (A sigma sqrt(2 pi))", "x*y"),
    )
    return Model(
        "gauss_peak", ("A", "x0", "sigma", "base"), f, jac, guess=guess,
        lower=(-np.inf, -np.inf, 0.0, -np.inf),
        formula="y = A*exp(-(x - x0)**2/(2*sigma**2)) + base",
        title="Gaussian peak on a constant baseline",
        descriptions={"A": "height above the baseline", "x0": "centre",
                      "sigma": "standard deviation width", "base": "baseline"},
        units={"A": "y", "x0": "x", "sigma": "x", "base": "y"}, derived=derived,
    )


def _lorentz_shape(x, x0, g):
    with np.errstate(all="ignore"):
        d = x - x0
        return g * g / (d * d + g * g)


def _lorentz_peak():
    def f(x, p):
        A, x0, g, base = p
        return A * _lorentz_shape(x, x0, g) + base

    def jac(x, p):
        A, x0, g, base = p
        with np.errstate(all="ignore"):
            d = x - x0
            q = d * d + g * g
            L = g * g / q
            dx0 = 2.0 * A * g * g * d / q ** 2
            dg = 2.0 * A * g * d * d / q ** 2
        return np.column_stack([L, dx0, dg, np.ones_like(x)])

    def guess(x, y):
        x, y = _finite_pairs(x, y)
        A, x0, g, base = _peak_start(x, y, _lorentz_shape)
        span = _positive_scale(x)[2]
        return np.array([_safe(A, 1.0), _safe(x0, _median_or(x)),
                         _safe(g, span / 10.0), _safe(base, 0.0)])

    derived = (
        Derived("FWHM", lambda p: 2.0 * p[2], lambda p: np.array([0.0, 0.0, 2.0, 0.0]),
                "full width at half maximum (2 gamma)", "x"),
        Derived("area", lambda p: math.pi * p[0] * p[2],
                lambda p: np.array([math.pi * p[2], 0.0, math.pi * p[0], 0.0]),
                "area above the baseline (pi A gamma)", "x*y"),
    )
    return Model(
        "lorentz_peak", ("A", "x0", "gamma", "base"), f, jac, guess=guess,
        lower=(-np.inf, -np.inf, 0.0, -np.inf),
        formula="y = A*gamma**2/((x - x0)**2 + gamma**2) + base",
        title="Lorentzian peak on a constant baseline",
        descriptions={"A": "height above the baseline", "x0": "centre",
                      "gamma": "half width at half maximum", "base": "baseline"},
        units={"A": "y", "x0": "x", "gamma": "x", "base": "y"}, derived=derived,
    )


# ================================================================= registry

@dataclass(frozen=True)
class ModelEntry:
    """One row of the model registry.

    ``build(**options)`` makes the :class:`~fitcore.model.Model` (whose ``title``,
    formula, parameter descriptions and units are set where it is built, above);
    ``options`` are the options it accepts with their defaults; ``short`` is the
    short title for the window's model list (the closed list is narrow).
    """

    name: str
    build: Callable[..., Model]
    options: dict
    short: str


#: the model registry, in menu order. To add a model: write its builder above (a
#: Model with title, formula, jac, guess, descriptions, units) and add ONE row here;
#: tests/fitcore/test_models.py checks every row (jacobian, start values, a recovery fit).
MODELS: dict[str, ModelEntry] = {e.name: e for e in (
    ModelEntry("line", _line, {}, "Straight line"),
    ModelEntry("line_origin", _line_origin, {}, "Line through origin"),
    ModelEntry("poly2", lambda: _poly(2), {}, "Quadratic"),
    ModelEntry("poly3", lambda: _poly(3), {}, "Cubic"),
    ModelEntry("poly4", lambda: _poly(4), {}, "Quartic"),
    ModelEntry("poly5", lambda: _poly(5), {}, "Quintic"),
    ModelEntry("exp_decay", _exp_decay, {"rate": False}, "Exp. decay (time const.)"),
    ModelEntry("exp_decay_rate", lambda: _exp_decay(rate=True), {}, "Exp. decay (rate const.)"),
    ModelEntry("exp_rise", _exp_rise, {}, "Exp. rise to plateau"),
    ModelEntry("power_law", _power_law, {}, "Power law"),
    ModelEntry("michaelis_menten", _michaelis_menten, {}, "Michaelis-Menten"),
    ModelEntry("logistic4", _logistic4, {}, "4-parameter logistic"),
    ModelEntry("logistic5", _logistic5, {}, "5-parameter logistic"),
    ModelEntry("arrhenius", _arrhenius, {"t_ref": None}, "Arrhenius law"),
    ModelEntry("gauss_peak", _gauss_peak, {}, "Gaussian peak"),
    ModelEntry("lorentz_peak", _lorentz_peak, {}, "Lorentzian peak"),
)}
# name -> (builder, accepted options with defaults), read from the registry
_REGISTRY: dict[str, tuple[Callable[..., Model], dict]] = {
    n: (e.build, e.options) for n, e in MODELS.items()}


_ALIASES = {"polynomial": "polynomial", "poly1": "line", "linear": "line"}
_POLY_RE = re.compile(r"^poly(\d+)$")


def builtin_models() -> list[str]:
    """Names of the built-in models, in menu order.

    ``"polynomial"`` (with ``degree=``) and ``"polyN"`` for other degrees up to 10
    are accepted by :func:`get_model` too, but not listed.
    """
    return list(_REGISTRY)


def _normalise(name) -> str:
    if not isinstance(name, str):
        raise TypeError(f"a model name must be text, got {type(name).__name__}")
    return name.strip().lower()


def _is_known_name(key: str) -> bool:
    return key in _REGISTRY or key in _ALIASES or bool(_POLY_RE.match(key))


def get_model(name: str, **options) -> Model:
    """Build a built-in model by name.

    Parameters
    ----------
    name
        One of :func:`builtin_models`, or ``"polynomial"`` (needs ``degree``), or
        ``"polyN"`` with N from 1 to 10. Case and surrounding spaces do not matter.
    **options
        Model options: ``degree`` for ``"polynomial"``; ``rate=True`` for
        ``"exp_decay"`` (the rate-constant form ``A*exp(-k*x) + C``); ``t_ref``
        (a temperature in K) for ``"arrhenius"`` adds the derived rate constant there.

    Returns
    -------
    Model

    Raises
    ------
    ValueError
        Unknown name, or an option the model does not take.
    """
    key = _normalise(name)
    key = _ALIASES.get(key, key)
    if key == "polynomial":
        extra = set(options) - {"degree"}
        if extra:
            raise ValueError(f"model 'polynomial' takes only the option 'degree', "
                             f"not {', '.join(sorted(extra))}")
        if "degree" not in options:
            raise ValueError("model 'polynomial' needs a degree, e.g. "
                             "get_model('polynomial', degree=3)")
        return _polynomial(options["degree"])
    m = _POLY_RE.match(key)
    if m and key not in _REGISTRY:
        if options:
            raise ValueError(f"model {key!r} takes no options")
        return _polynomial(int(m.group(1)))
    if key not in _REGISTRY:
        raise ValueError(
            f"unknown model {name!r}; built-in models are: {', '.join(_REGISTRY)} "
            f"(and 'polynomial' with a degree)"
        )
    builder, accepted = _REGISTRY[key]
    extra = set(options) - set(accepted)
    if extra:
        takes = (f"only the option(s) {', '.join(sorted(accepted))}" if accepted
                 else "no options")
        raise ValueError(f"model {key!r} takes {takes}, not {', '.join(sorted(extra))}")
    kwargs = {k: options[k] for k in options}
    if key == "exp_decay":
        return _exp_decay(rate=bool(kwargs.get("rate", False)))
    return builder(**kwargs)


def _polynomial(degree) -> Model:
    try:
        d = int(degree)
        ok = d == degree
    except (TypeError, ValueError):
        ok = False
    if not ok or not 1 <= d <= _MAX_POLY_DEGREE:
        raise ValueError(f"polynomial degree must be a whole number from 1 to "
                         f"{_MAX_POLY_DEGREE}, got {degree!r}")
    if d == 1:
        return _line()
    return _poly(d)


def resolve_model(spec) -> Model:
    """Turn a model specification into a :class:`Model`.

    Parameters
    ----------
    spec
        A :class:`Model` (returned as is), a built-in name (see
        :func:`builtin_models`), or a formula string in Python expression syntax
        whose free names other than ``x`` are the parameters
        (``"a*exp(-x/tau) + c"``), handed to :func:`fitcore.formula.parse_formula`.

    Raises
    ------
    TypeError
        ``spec`` is neither a Model nor text.
    ValueError
        Empty text, or a formula that cannot be read (the formula module's own
        error, a ``ValueError``, says what is wrong).
    """
    if isinstance(spec, Model):
        return spec
    if not isinstance(spec, str):
        raise TypeError(
            f"a model must be a built-in name, a formula text or a fitcore.Model, "
            f"got {type(spec).__name__}"
        )
    key = spec.strip().lower()
    if not key:
        raise ValueError("the model is empty: give a built-in name or a formula")
    if _is_known_name(key):
        return get_model(key)
    try:
        from .formula import parse_formula  # here: the formula parser loads sympy
    except ImportError as exc:  # pragma: no cover - only while formula.py is missing
        raise ValueError(
            f"{spec!r} is not a built-in model ({', '.join(_REGISTRY)}), and formulas "
            f"cannot be read because the formula module is unavailable ({exc})"
        ) from None
    return parse_formula(spec)


def model_info(name: str, **options) -> dict:
    """Menu information on a built-in model.

    Returns
    -------
    dict
        ``name``, ``title``, ``formula``, ``linear`` (bool), ``params`` (list of
        dicts with ``name``, ``description``, ``unit``, ``lower``, ``upper``) and
        ``derived`` (list of dicts with ``name``, ``description``, ``unit``).
    """
    m = get_model(name, **options)
    return {
        "name": m.name,
        "title": m.title,
        "formula": m.formula,
        "linear": m.is_linear,
        "params": [
            {"name": n, "description": m.descriptions.get(n, ""),
             "unit": m.units.get(n, ""), "lower": lo, "upper": hi}
            for n, lo, hi in zip(m.param_names, m.lower, m.upper)
        ],
        "derived": [
            {"name": d.name, "description": d.description, "unit": d.unit}
            for d in m.derived
        ],
    }


def model_title(name: str, **options) -> str:
    """The full title of a built-in model (its name when it is not one)."""
    try:
        return get_model(name, **options).title or str(name)
    except (ValueError, TypeError):
        return str(name)


def model_short_title(name: str) -> str:
    """The short title of a built-in model for narrow lists (the full title, or the
    name, when the registry has no short one)."""
    e = MODELS.get(name) if isinstance(name, str) else None
    return e.short if e is not None else model_title(name)
