"""Recognise a formula that is a catalogue curve written another way, so that it gets
the catalogue's robust start values.

``Vmax*x/(Km + x)``, ``A*exp(-x/tau) + C``, ``C + A*exp(-k*x)`` or ``d + (a - d)/(1 +
(x/c)**b)`` are the catalogue's Michaelis-Menten, exponential decays and 4PL with other
names, in another order, or with a parameter replaced by its negative or reciprocal
(a rate for a time constant, a Hill slope of the other sign). A formula starts at 1
for every parameter; a catalogue model starts from a guess made for its curve that
outliers do not move (:mod:`fitcore.models`). When a formula is such a curve, the
catalogue's guess, carried over to the formula's parameters, is its start.

The test is numerical and never executes text: for every nonlinear catalogue model
with as many parameters, every assignment of catalogue parameters to formula
parameters (a parameter that enters linearly from one that does, as itself or its
negative; a nonlinear one from a nonlinear one, up to four parameters also as its
reciprocal; then, where no assignment matches, with a constant factor on each nonlinear
parameter found by Gauss-Newton, e.g. a half-life ln 2 tau or a FWHM) is tried by
evaluating both curves at fixed x points for two random
parameter vectors; a match within 1e-9 relative on both is taken as the same curve
(two analytic functions that agree at that many generic points of an open set). The
points and probes do not depend on the data, so the answer is kept per formula text.
"""
from __future__ import annotations

import functools
import itertools
from dataclasses import dataclass

import numpy as np

from ..model import Model

# x points and parameter probes: positive (the catalogue's lower bounds are 0), of
# order 1 so that no curve saturates, generic (no symmetry picks a wrong match)
_X = np.array([0.53, 0.71, 0.97, 1.29, 1.66, 2.13, 2.71, 3.37])
_PROBES = np.random.default_rng(20261205).uniform(0.6, 1.8, size=(2, 8))
_TOL = 1e-9
_TRANSFORMS = ("same", "negative", "reciprocal")
_MAX_TRANSFORM_PARAMS = 4  # 3^k k! assignments: 1944 at k = 4


@dataclass(frozen=True)
class Match:
    """Formula parameter j is ``transform`` of catalogue parameter ``source[j]``."""

    name: str  # the catalogue model
    source: tuple[int, ...]
    transform: tuple[str, ...]
    factor: tuple[float, ...] = ()  # constant factors (a half-life: ln 2 times tau)

    def carry(self, p_catalogue: np.ndarray) -> np.ndarray:
        """The formula's parameters for the catalogue's ``p_catalogue``."""
        p = np.asarray(p_catalogue, dtype=float)[list(self.source)]
        with np.errstate(all="ignore"):
            q = np.array([_apply(t, v) for t, v in zip(self.transform, p)])
            return q * np.asarray(self.factor, dtype=float) if self.factor else q


def _apply(t: str, v: float) -> float:
    if t == "negative":
        return -v
    if t == "reciprocal":
        return 1.0 / v if v != 0 else np.inf
    return v


def _values(model: Model, p: np.ndarray) -> np.ndarray | None:
    try:
        with np.errstate(all="ignore"):
            v = np.asarray(model.f(_X, p), dtype=float)
    except Exception:  # noqa: BLE001 - a curve that cannot be evaluated does not match
        return None
    if v.shape != _X.shape or not np.all(np.isfinite(v)):
        return None
    return v


def _close(a: np.ndarray | None, b: np.ndarray) -> bool:
    return a is not None and bool(np.max(np.abs(a - b)) <= _TOL * max(float(np.max(np.abs(b))), 1e-300))


def _linear_mask(model: Model, p: np.ndarray) -> np.ndarray | None:
    """Parameters whose Jacobian column does not change with their own value."""
    try:
        with np.errstate(all="ignore"):
            J0 = np.asarray(model.jac(_X, p), dtype=float)
            out = np.zeros(p.size, bool)
            for j in range(p.size):
                t = p.copy()
                t[j] = 1.7 * t[j] + 0.9
                J1 = np.asarray(model.jac(_X, t), dtype=float)
                scale = max(float(np.max(np.abs(J0[:, j]))), 1e-300)
                out[j] = bool(np.max(np.abs(J1[:, j] - J0[:, j])) <= 1e-9 * scale)
    except Exception:  # noqa: BLE001 - a curve that cannot be differentiated is not matched
        return None
    if J0.shape != (_X.size, p.size) or not np.all(np.isfinite(J0)):
        return None
    return out


def _assignments(lin_f: np.ndarray, lin_c: np.ndarray, k: int, negative: bool = True):
    """(source, transform) pairs that keep linear parameters linear: a parameter that
    enters linearly comes from one that does (as itself or its negative), a nonlinear
    one from a nonlinear one (also as its reciprocal, up to four parameters)."""
    if int(lin_f.sum()) != int(lin_c.sum()):
        return
    f_lin, f_non = np.flatnonzero(lin_f), np.flatnonzero(~lin_f)
    c_lin, c_non = np.flatnonzero(lin_c), np.flatnonzero(~lin_c)
    lin_kinds = ("same", "negative")
    non_kinds = _TRANSFORMS if k <= _MAX_TRANSFORM_PARAMS else ("same",)
    if not negative:  # (a factor's sign stands for the negative)
        non_kinds = tuple(t for t in non_kinds if t != "negative")
    for t_lin in itertools.product(lin_kinds, repeat=f_lin.size):
        for t_non in itertools.product(non_kinds, repeat=f_non.size):
            transform = [""] * k
            for j, t in zip(f_lin, t_lin):
                transform[j] = t
            for j, t in zip(f_non, t_non):
                transform[j] = t
            for perm_lin in itertools.permutations(c_lin):
                for perm_non in itertools.permutations(c_non):
                    source = [0] * k
                    for j, i in zip(f_lin, perm_lin):
                        source[j] = int(i)
                    for j, i in zip(f_non, perm_non):
                        source[j] = int(i)
                    yield tuple(source), tuple(transform)


@functools.lru_cache(maxsize=1)
def _catalogue() -> list[tuple[str, Model]]:
    # here, not at the top: only formulas are matched, so fit() of a Model object does
    # not load the catalogue (issue 12)
    from ..models import MODELS, get_model

    out = []
    for name in MODELS:
        try:
            m = get_model(name)
        except ValueError:
            continue
        if not m.is_linear:
            out.append((name, m))
    return out


@functools.lru_cache(maxsize=256)
def _match_text(formula: str) -> Match | None:
    from ..formula import parse_formula  # here: the formula parser loads sympy

    try:
        model = parse_formula(formula)
    except ValueError:
        return None
    return _match_model(model)


def _match_model(model: Model) -> Match | None:
    k = len(model.param_names)
    lin_f = _linear_mask(model, np.asarray(_PROBES[0][:k]))
    if lin_f is None:
        return None
    candidates = []
    for name, cat in _catalogue():
        if len(cat.param_names) != k:
            continue
        refs = [(p, _values(cat, p)) for p in (_PROBES[0][:k], _PROBES[1][:k])]
        if any(v is None or float(np.ptp(v)) <= 1e-6 * float(np.max(np.abs(v))) for _, v in refs):
            continue  # a probe where the catalogue curve is flat tells nothing
        lin_c = _linear_mask(cat, refs[0][0])
        if lin_c is None:
            continue
        for source, transform in _assignments(lin_f, lin_c, k):
            m = Match(name, source, transform)
            if all(_close(_values(model, m.carry(p)), v) for p, v in refs):
                return m
        candidates.append((name, lin_c, refs))
    if k > _MAX_TRANSFORM_PARAMS:
        return None
    for name, lin_c, refs in candidates:  # then up to constant factors
        for source, transform in _assignments(lin_f, lin_c, k, negative=False):
            m = _with_factors(model, Match(name, source, transform), ~lin_f, refs)
            if m is not None:
                return m
    return None


def _with_factors(model: Model, m: Match, nonlin: np.ndarray, refs) -> Match | None:
    """``m`` with constant factors on its nonlinear parameters that make the formula
    the catalogue curve at both probes (Gauss-Newton on the factors from 1, a dozen
    steps at most), or None. A formula with a numeric constant in place of a
    parameter's unit (``exp(-0.6931*x/t_half)``, a half-life for a time constant) is
    the catalogue curve up to such a factor."""
    idx = np.flatnonzero(nonlin)
    if idx.size == 0:
        return None
    target = np.concatenate([v for _, v in refs])
    size = max(float(np.max(np.abs(target))), 1e-300)

    def resid(c):
        f = np.ones(len(m.source))
        f[idx] = c
        mm = Match(m.name, m.source, m.transform, tuple(float(v) for v in f))
        vals = [_values(model, mm.carry(p)) for p, _ in refs]
        if any(v is None for v in vals):
            return None, mm
        with np.errstate(all="ignore"):
            out = (np.concatenate(vals) - target) / size
        ok = np.all(np.isfinite(out)) and float(np.max(np.abs(out))) < 1e100
        return (out, mm) if ok else (None, mm)

    c = np.ones(idx.size)
    r, mm = resid(c)
    if r is None:
        return None
    norm = float(np.linalg.norm(r))
    for it in range(12):
        if norm <= _TOL:
            return mm
        if it >= 6 and norm > 1e-6:
            return None  # a true factor converges fast (the residual is smooth in it)
        J = np.empty((r.size, idx.size))
        for j in range(idx.size):
            h = 1e-7 * max(abs(c[j]), 1e-3)
            cj = c.copy()
            cj[j] += h
            rj, _ = resid(cj)
            if rj is None:
                return None
            J[:, j] = (rj - r) / h
        try:
            with np.errstate(all="ignore"):
                step = np.linalg.lstsq(J, -r, rcond=None)[0]
        except (np.linalg.LinAlgError, ValueError):
            return None
        if not np.all(np.isfinite(step)):
            return None
        for t in (1.0, 0.5, 0.25):
            c_new = c + t * step
            r_new, mm_new = resid(c_new)
            if r_new is not None and float(np.linalg.norm(r_new)) < norm:
                c, r, mm, norm = c_new, r_new, mm_new, float(np.linalg.norm(r_new))
                break
        else:
            return None
    if norm <= _TOL and all(_close(_values(model, mm.carry(p)), v) for p, v in refs):
        return mm
    return None


def recognise(model: Model) -> Match | None:
    """The catalogue curve that a parsed formula is (see the module text), or None.
    Only formulas are judged (their default start is all ones); catalogue models and
    models built in code keep their own start values."""
    if model.is_linear or getattr(model, "title", "") != "User formula" or not model.formula:
        return None
    text = model.formula
    return _match_text(text)
