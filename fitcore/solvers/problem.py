"""The whitened problem, solver results, scratch arrays and shared small helpers.

:class:`_Problem` holds the used points and the free parameters; :class:`_Inner` is
what every solver returns. Names keep their leading underscore: they are internal to
the engine (``fitcore.solve`` is the public front door).
"""
from __future__ import annotations

import math
import threading
from collections import OrderedDict
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..losses import Loss
from ..model import Model
from ..scale import mad


class FitError(ValueError):
    """The input cannot be fitted (explained in plain words)."""


# --------------------------------------------------------------------------- problem
@dataclass
class _Problem:
    """Whitened problem over the used points and the free parameters."""

    model: Model
    x: np.ndarray
    y: np.ndarray
    sig: np.ndarray
    free: np.ndarray  # bool mask over the model's parameters
    p_fixed: np.ndarray  # full-length vector holding the fixed values
    n_eval: int = 0
    unit: bool = False  # every sigma is 1 (no uncertainties given): skip the divisions

    @property
    def n(self) -> int:
        return self.x.size

    @property
    def k(self) -> int:
        return int(self.free.sum())

    @property
    def all_free(self) -> bool:
        """Every parameter is free (made once)."""
        a = self.__dict__.get("_all_free")
        if a is None:
            a = self._all_free = bool(self.free.all())
        return a

    def full(self, theta: np.ndarray) -> np.ndarray:
        if self.all_free:  # (the same numbers as the masked copy below, one call)
            return np.array(theta, dtype=self.p_fixed.dtype)
        p = self.p_fixed.copy()
        p[self.free] = theta
        return p

    def resid(self, theta: np.ndarray, with_jac: bool = False,
              scratch: "_Scratch | None" = None) -> np.ndarray:
        """Whitened residuals at theta. ``with_jac`` also evaluates the Jacobian in the
        same call where the model can share the work (kept for the next ``jac``).
        ``scratch``: work arrays to write the residuals (and f, J) into; the result is
        then overwritten by the next call with the same scratch."""
        if self.model.is_linear:
            return self.resid_quiet(theta, with_jac, scratch)
        with np.errstate(all="ignore"):
            return self.resid_quiet(theta, with_jac, scratch)

    def resid_quiet(self, theta: np.ndarray, with_jac: bool = False,
                    scratch: "_Scratch | None" = None) -> np.ndarray:
        """:meth:`resid` for a caller that has numpy's floating-point errors ignored
        already (an errstate block costs microseconds, a small model's pass not
        many more)."""
        self.n_eval += 1
        if self.model.is_linear:
            A = self.jac(theta)
            out = None if scratch is None else scratch.get("r", (self.n,))
            out = np.matmul(A, theta, out=out)
            return np.subtract(self.rhs(), out, out=out)  # one fresh array, not two
        if with_jac and self.model.f_jac is not None:
            p = self.full(theta)
            bufs = None if scratch is None else (
                scratch.get("f", (self.n,)), scratch.get("J", (self.n, p.size), "F"))
            f, J = self.model.f_jac(self.x, p, out=bufs)
            key = np.asarray(theta, dtype=float).tobytes()
            held = None if scratch is None else (scratch, scratch.stamp("J"))
            self._jac_at = (key, J, held)
            if scratch is not None:
                self._f_at = (key, f, scratch, scratch.stamp("f"))
        else:
            f = self.model.f(self.x, self.full(theta))
        f = np.asarray(f, dtype=float)
        out = None if scratch is None else scratch.get("r", (self.n,))
        r = np.subtract(self.y, f, out=out)
        return r if self.unit else np.divide(r, self.sig, out=r)

    def release(self) -> None:
        """Drop the cached design matrix (a linear model's; as large as the data at two
        parameters) and kept Jacobian: the fit is done with them. (Rebuilt on demand.)"""
        for name in ("_design", "_offset", "_b", "_jac_at"):
            self.__dict__.pop(name, None)

    def kept_f(self, theta: np.ndarray) -> np.ndarray | None:
        """The model values at theta from the last pass that wrote them into a
        scratch array, while it still holds them; else None."""
        kept = getattr(self, "_f_at", None)
        if (kept is None or kept[0] != np.asarray(theta, dtype=float).tobytes()
                or not kept[2].holds("f", kept[3])):
            return None
        return kept[1]

    def rhs(self) -> np.ndarray:
        """Linear model: the whitened data less the held parameters' part (cached)."""
        b = getattr(self, "_b", None)
        if b is None:
            self.jac(None)
            b = self.y if self._offset is None else self.y - self._offset
            b = self._b = b if self.unit else b / self.sig
        return b

    def jac(self, theta: np.ndarray) -> np.ndarray:
        """Jacobian of the model values f/sigma w.r.t. the free parameters."""
        if self.model.is_linear:
            # constant for a linear model: build the (whitened) design matrix once, in
            # column-major order (the products over the points run faster on columns)
            cached = getattr(self, "_design", None)
            if cached is None:
                with np.errstate(all="ignore"):
                    A = np.asarray(self.model.basis(self.x), dtype=float).reshape(self.n, -1)
                all_free = bool(self.free.all())
                cached = A if all_free else A[:, self.free]
                if not self.unit:
                    cached = cached / self.sig[:, None]
                self._design = np.asfortranarray(cached)
                self._offset = None if all_free else A[:, ~self.free] @ self.p_fixed[~self.free]
                cached = self._design
            return cached
        kept = getattr(self, "_jac_at", None)
        if (kept is not None and kept[0] == np.asarray(theta, dtype=float).tobytes()
                and (kept[2] is None or kept[2][0].holds("J", kept[2][1]))):
            J = np.asarray(kept[1], dtype=float)
        else:
            with np.errstate(all="ignore"):
                J = np.asarray(self.model.jac(self.x, self.full(theta)), dtype=float)
        J = J.reshape(self.n, -1)
        if not self.all_free:
            J = J[:, self.free]
        return J if self.unit else J / self.sig[:, None]

    def hess_w(self, theta: np.ndarray, w: np.ndarray) -> np.ndarray | None:
        """``sum_i w_i d^2(f_i/sigma_i)/dtheta dtheta^T`` over the free parameters, from
        the model's ``hess_w``; None where the model has none (or it is not finite)."""
        with np.errstate(all="ignore"):
            return self.hess_w_quiet(theta, w)

    def hess_w_quiet(self, theta: np.ndarray, w: np.ndarray) -> np.ndarray | None:
        """:meth:`hess_w` for a caller that has floating-point errors ignored."""
        hw = self.model.hess_w
        if hw is None or self.model.is_linear:
            return None
        if not self.unit:
            w = w / self.sig
        H = np.asarray(hw(self.x, self.full(theta), w), dtype=float)
        if not self.all_free:
            H = H[np.ix_(self.free, self.free)]
        return H if _all_finite(H) else None

    @property
    def lower(self):
        """The free parameters' lower bounds (made once; read-only)."""
        b = self.__dict__.get("_lower")
        if b is None:
            b = self._lower = _frozen(np.asarray(self.model.lower, dtype=float)[self.free])
        return b

    @property
    def upper(self):
        """The free parameters' upper bounds (made once; read-only)."""
        b = self.__dict__.get("_upper")
        if b is None:
            b = self._upper = _frozen(np.asarray(self.model.upper, dtype=float)[self.free])
        return b


def _frozen(a: np.ndarray) -> np.ndarray:
    a.flags.writeable = False
    return a


@dataclass
class _Inner:
    theta: np.ndarray
    r: np.ndarray
    objective: float
    n_iter: int
    converged: bool
    message: str
    stats: dict | None = None  # psi and psi' at the solution, when the solver has them


class _Scratch:
    """Named work arrays reused by the Newton passes, within a solve and across solves.

    A fresh array of the data's size costs a page fault per 4 KiB on first touch
    (large blocks come straight from the operating system), which on 1e5 points costs
    as much as the arithmetic on it. The Newton passes write into these arrays
    instead, so whatever is read from one is overwritten by the next pass or solve on
    the same thread: a solve's final arrays (residuals, psi, psi') are valid only
    until the next solve of the same size. ``fit`` uses them before it returns and
    hands out fresh arrays; a Jacobian kept in a scratch array is checked by its
    stamp before reuse (:meth:`_Problem.jac`).
    """

    def __init__(self):
        self._arrays: dict[str, np.ndarray] = {}
        self._stamps: dict[str, object] = {}

    def get(self, name: str, shape: tuple, order: str = "C") -> np.ndarray:
        a = self._arrays.get(name)
        if a is None or a.shape != shape or (order == "F" and not a.flags.f_contiguous):
            a = self._arrays[name] = np.empty(shape, order=order)
        return a

    def stamp(self, name: str) -> object:
        """A new token for the contents just written to ``name``."""
        token = self._stamps[name] = object()
        return token

    def holds(self, name: str, token: object) -> bool:
        """True while ``name`` still holds what was written when ``token`` was made."""
        return self._stamps.get(name) is token


_POOL = threading.local()
_POOL_SIZES = 3  # problem sizes whose scratch a thread keeps (most recently used)
_POOL_MAX_POINTS = 200000  # larger problems get a scratch of their own per solve


def _scratch_for(n: int) -> _Scratch:
    """The calling thread's scratch for problems of ``n`` points.

    At most ``_POOL_SIZES`` sizes up to ``_POOL_MAX_POINTS`` points are kept (some
    13 MB for a three-parameter model on 1e5 points); :func:`_release_scratch` drops
    them.
    """
    if n > _POOL_MAX_POINTS:
        return _Scratch()
    pools = getattr(_POOL, "by_n", None)
    if pools is None:
        pools = _POOL.by_n = OrderedDict()
    sc = pools.pop(n, None) or _Scratch()
    pools[n] = sc
    while len(pools) > _POOL_SIZES:
        pools.popitem(last=False)
    return sc


def _release_scratch() -> None:
    """Drop the calling thread's kept scratch arrays."""
    _POOL.by_n = OrderedDict()


def _objective(loss: Loss, r: np.ndarray, s: float) -> float:
    with np.errstate(all="ignore"):
        return _objective_u(loss, r, s)[0]


def _objective_u(loss: Loss, r: np.ndarray, s: float):
    """``(objective, r / s)`` for a caller that has numpy's floating-point errors
    ignored already; ``r / s`` is None where it was not formed."""
    if loss.name == "l2" and r.size >= 4000:  # (no temporaries as large as r)
        v = 0.5 * float(r @ r) / (s * s)
        return (v if math.isfinite(v) else math.inf), None
    u = r / s
    rho = loss.rho(u)
    # (np.sum's reduction without its wrappers)
    v = float(_add_reduce(rho, None) if type(rho) is np.ndarray else np.sum(rho))
    return (v if math.isfinite(v) else math.inf), u


_add_reduce = np.add.reduce


def _all_finite(a: np.ndarray) -> bool:
    """``np.all(np.isfinite(a))`` of a float array: a finite sum has only finite terms,
    so the elementwise test runs only where the sum is not finite (a non-finite value,
    or an overflow). Call with floating-point errors ignored."""
    return math.isfinite(_add_reduce(a, None)) or bool(np.isfinite(a).all())


def _project(theta, lower, upper):
    """Keep a parameter vector strictly inside its bounds."""
    inside = (theta > lower) & (theta < upper)
    if inside.all():
        return theta  # (strictly inside, or no bounds: nothing to move)
    if not (np.any(np.isfinite(lower)) or np.any(np.isfinite(upper))):
        return theta
    t = np.clip(theta, lower, upper)
    tiny = 1e-12 * np.maximum(np.abs(t), 1e-300)
    t = np.where(t <= lower, lower + np.maximum(tiny, 1e-300), t)
    t = np.where(t >= upper, upper - np.maximum(tiny, 1e-300), t)
    return t


def _start_residuals(prob: _Problem, theta: np.ndarray, quiet: bool = False) -> np.ndarray:
    """The residuals at the start values; a FitError in plain words where the model
    cannot be evaluated there. (``quiet``: the caller has floating-point errors
    ignored.)"""
    if quiet:
        r = prob.resid_quiet(theta)
        if _all_finite(r):
            return r
    else:
        r = prob.resid(theta)
    if not np.all(np.isfinite(r)):
        badmask = ~np.isfinite(r)
        bad = int(np.sum(badmask))
        xs = ", ".join(f"{v:.6g}" for v in prob.x[badmask][:3])
        raise FitError(
            f"the model cannot be evaluated at the start values: it gives a non-finite "
            f"value at {bad} of {r.size} points (x = {xs}{', ...' if bad > 3 else ''}); "
            f"check that x lies where the model is defined (e.g. doses >= 0 for a "
            f"log-logistic curve) or give other start values"
        )
    return r


def _safe_scale(s: float, r: np.ndarray, prob: _Problem) -> float:
    if s > 0 and math.isfinite(s):
        return s
    alt = float(np.std(r))
    if alt > 0 and math.isfinite(alt):
        return alt
    ref = float(np.max(np.abs(prob.y / prob.sig))) if prob.n else 1.0
    return max(ref, 1.0) * 1e-12


_EXACT = 1e-13  # a MAD below this fraction of max |y| (whitened) counts as zero


def _exact_floor(prob: _Problem) -> float:
    ref = float(np.max(np.abs(prob.y / prob.sig))) if prob.n else 0.0
    # (at least 1e-150, so that its square, which the steps divide by, stays normal)
    return max(_EXACT * ref, 1e-150) if ref > 0 and math.isfinite(ref) else 1e-150


def _start_scale(prob: _Problem, theta) -> float:
    r = prob.resid(theta)
    return _safe_scale(mad(r), r, prob)


@lru_cache(maxsize=16)
def _sampled_rows(n: int, m: int, seed: int) -> np.ndarray:
    idx = np.sort(np.random.default_rng(seed).choice(n, size=m, replace=False))
    idx.flags.writeable = False  # shared by every caller
    return idx


def _sample_rows(n: int, m: int, seed: int) -> np.ndarray:
    """``m`` of ``range(n)`` drawn without replacement by a seeded generator, sorted
    (the same draw for the same arguments; cached, as drawing costs a permutation)."""
    return _sampled_rows(int(n), int(m), int(seed))


def _inv_small(M: np.ndarray) -> np.ndarray | None:
    """The inverse of a small square matrix, None when it is singular or not finite:
    1 x 1 and 2 x 2 in closed form (a call of numpy.linalg costs some 10 us of
    overhead, more than the arithmetic of a small fit's step), larger ones by LAPACK."""
    k = M.shape[0]
    if k == 1:
        a = float(M[0, 0])
        return np.array([[1.0 / a]]) if a != 0.0 and math.isfinite(a) else None
    if k == 2:
        a, b, c, d = M.ravel().tolist()
        det = a * d - b * c
        if det == 0.0 or not math.isfinite(det):
            return None
        q = (d / det, -b / det, -c / det, a / det)  # (float division: inf, never raises)
        return np.array(q).reshape(2, 2) if all(map(math.isfinite, q)) else None
    try:
        inv = np.linalg.inv(M)
    except np.linalg.LinAlgError:
        return None
    return inv if np.isfinite(inv).all() else None
