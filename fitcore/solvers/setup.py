"""Problem set-up: the checks on the analyst's input, in plain words, and the whitened
problem over the used points and the free parameters that the solvers work on."""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..losses import LOSS_NAMES, OWN_SCALE, Loss, get_loss, loss_entry, loss_phrase
from ..model import Model
from .problem import FitError, _Problem
from .recognise import recognise


@dataclass
class _Setup:
    """Everything :func:`fitcore.fit` checked and prepared, for the solver and the
    assembly of the result."""

    mdl: Model
    loss: str
    loss_obj: Loss
    x: np.ndarray  # every point as given (the result reports all of them)
    y: np.ndarray
    excl: np.ndarray
    sig_all: np.ndarray | None
    used: np.ndarray
    fixed: dict
    free: np.ndarray
    prob: _Problem
    theta0: np.ndarray
    fixed_scale: float | None  # None: the scale is estimated
    absolute: bool  # sigma given as absolute standard uncertainties
    scale_given: bool  # the analyst gave a number for the scale
    sigma_kind: str
    max_iter: int
    info: dict = field(default_factory=dict)
    # the free parameters' start from the model's wider search (Model.guess_search),
    # computed on demand; None where the model has none or the analyst gave the start
    search_start: Callable[[], np.ndarray] | None = None

    @property
    def n_all(self) -> int:
        return self.x.size

    @property
    def n_used(self) -> int:
        return self.prob.n

    @property
    def all_used(self) -> bool:
        return self.prob.n == self.x.size

    @property
    def k(self) -> int:
        return int(self.free.sum())

    @property
    def dof(self) -> int:
        return self.n_used - self.k

    @property
    def linear(self) -> bool:
        return self.mdl.is_linear


def _resolve(model) -> Model:
    if isinstance(model, Model):
        return model
    if isinstance(model, str):
        # here, not at the top: fit() of a Model object loads neither the catalogue nor
        # sympy (issue 12)
        from ..models import builtin_models, resolve_model

        text = model.strip()
        if text.isidentifier() and text != "x":
            _refuse_bare_name(text, resolve_model, builtin_models())
        return resolve_model(model)
    raise FitError(f"a model must be a built-in name, a formula or a fitcore.Model, not {type(model).__name__}")


def _refuse_bare_name(text: str, resolve, names) -> None:
    """A single name that is not a built-in model would be read as a formula with one
    parameter (a constant): refuse it, with the closest built-in names."""
    try:
        resolve(text.lower())
        if text.lower() in {n.lower() for n in names}:
            return
    except (ValueError, TypeError):
        pass
    close = difflib.get_close_matches(text.lower(), names, n=3, cutoff=0.6)
    hint = (f"did you mean {' or '.join(repr(c) for c in close)}? " if close else
            f"the built-in models are {', '.join(names)}; ")
    raise FitError(f"{text!r} is not a built-in model; {hint}(a single name is not fitted as "
                   f"a formula; to fit a constant, write it with x, e.g. 'c + 0*x')")


def _as_1d(name, v, n=None):
    if np.iscomplexobj(v) or (isinstance(v, (list, tuple))
                              and any(isinstance(e, complex) for e in v)):
        raise FitError(f"{name} holds complex numbers; fitcore fits real data: fit the real "
                       f"and imaginary parts (or the magnitude) as separate data sets")
    try:
        a = np.asarray(v, dtype=float).ravel()
    except (TypeError, ValueError):
        raise FitError(f"{name} must be numbers") from None
    if n is not None and a.size != n:
        raise FitError(f"{name} has {a.size} values but x has {n}")
    return a


_SCALE_RANGE = 1e100  # a fixed scale this far from the data's size is refused


def _check_scale(s: float, prob: _Problem) -> None:
    """A fixed scale must be on the data's scale: far above it every residual is
    negligible (the loss cannot tell points apart and the fit reads as exact), far
    below it every point is an outlier and the arithmetic underflows."""
    with np.errstate(all="ignore"):
        ref = float(np.max(np.abs(prob.y if prob.unit else prob.y / prob.sig)))
    if s * s == 0.0 or not math.isfinite(s * s):
        raise FitError(f"a fixed scale of {s:g} is outside what double precision can square; "
                       f"give a scale near the scatter of y")
    if ref > 0 and math.isfinite(ref) and not (ref / _SCALE_RANGE <= s <= ref * _SCALE_RANGE):
        raise FitError(f"a fixed scale of {s:g} is {s / ref:.1g} times the largest |y| "
                       f"({ref:.3g}): every residual would be "
                       f"{'negligible against it' if s > ref else 'an outlier at it'}; "
                       f"give a scale near the scatter of y")


def _check_alpha(loss: str, alpha) -> None:
    """``alpha`` is the shape of the general loss only: with any other loss it would be
    ignored (the adaptive loss fits its own), so it is refused rather than dropped."""
    if alpha is None or loss == "general":
        return
    what = ("fits its own shape; to hold alpha fixed use loss='general'" if loss == "adaptive"
            else "has none; leave alpha out or use loss='general'")
    raise FitError(f"alpha is the shape of the general loss; the {loss} loss {what}")


def _iteration_limit(max_iter) -> int:
    """``max_iter`` as a count of at least 1 (a whole float is taken)."""
    try:
        ok = not isinstance(max_iter, bool) and float(max_iter).is_integer() and max_iter >= 1
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise FitError(f"max_iter must be a whole number of at least 1, not {max_iter!r}")
    return int(max_iter)


def _held_values(fixed: dict) -> dict:
    """The held parameters' values as floats; each must be a finite number."""
    out = {}
    for name, v in fixed.items():
        try:
            f = float(v)
        except (TypeError, ValueError):
            f = math.nan
        if not math.isfinite(f):
            raise FitError(f"the held value of {name} must be a finite number, not {v!r}")
        out[name] = f
    return out


def _check_scale_tuning(loss: str, scale, tuning) -> None:
    """A fixed scale or a tuning constant with a loss that takes neither (least squares
    and L1 are scale-free, the adaptive loss fits its own scale) would be ignored while
    the result recorded the scale as fixed: refused rather than dropped."""
    if loss not in OWN_SCALE:
        return
    own = loss_entry(loss).family == "shape"
    why = ("which fits its own scale: leave it out, or use loss='general' to hold a scale"
           if own else "whose estimate does not depend on a scale: leave it out (standard "
           "uncertainties of y go in sigma)")
    if isinstance(scale, str) and scale != "auto":
        raise FitError(f"scale must be 'auto' or a positive number, not {scale!r}")
    if not (isinstance(scale, str) and scale == "auto"):
        raise FitError(f"a fixed scale has no effect on {loss_phrase(loss)}, {why}")
    if tuning is not None:
        raise FitError(f"a tuning constant has no effect on {loss_phrase(loss)}, {why}")


def _prepare(model, x, y, loss, *, scale, alpha, sigma, excluded, p0, fixed, tuning,
             sigma_mode, max_iter) -> _Setup:
    """Check the input and build the problem; every refusal is a FitError."""
    if loss not in LOSS_NAMES:
        raise FitError(f"unknown loss {loss!r}; choose one of {', '.join(LOSS_NAMES)}")
    if sigma_mode not in ("relative", "absolute"):
        raise FitError("sigma_mode must be 'relative' or 'absolute'")
    max_iter = _iteration_limit(max_iter)
    try:
        mdl = _resolve(model)
    except FitError:
        raise
    except ValueError as e:  # formula and catalogue errors are ValueErrors with messages
        raise FitError(str(e)) from e
    _check_alpha(loss, alpha)
    _check_scale_tuning(loss, scale, tuning)
    try:
        loss_obj = get_loss(loss, tuning=tuning, alpha=alpha if loss != "adaptive" else None)
    except ValueError as e:
        raise FitError(str(e)) from e

    x = _as_1d("x", x)
    y = _as_1d("y", y, x.size)
    if x.size == 0:
        raise FitError("there are no points to fit")
    n_all = x.size
    excl = np.zeros(n_all, bool) if excluded is None else np.asarray(excluded, dtype=bool).ravel()
    if excl.size != n_all:
        raise FitError(f"the exclusion mask has {excl.size} entries but there are {n_all} points")
    sig_all = None
    if sigma is not None:
        sig_all = _as_1d("sigma", sigma, n_all)
    finite = np.isfinite(x) & np.isfinite(y)
    if sig_all is not None:
        bad_sig = ~(np.isfinite(sig_all) & (sig_all > 0)) & finite & ~excl
        if np.any(bad_sig):
            idx = np.flatnonzero(bad_sig)[:5] + 1
            raise FitError(
                f"sigma must be a positive number for every used point; points "
                f"{', '.join(map(str, idx))}{' ...' if bad_sig.sum() > 5 else ''} have "
                f"{'zero, negative or missing' } sigma"
            )
    used = finite & ~excl
    n_used = int(used.sum())
    if n_used == 0:
        raise FitError("all points are excluded or missing: restore some points to fit")

    # held parameters
    fixed = dict(fixed or {})
    unknown = set(fixed) - set(mdl.param_names)
    if unknown:
        raise FitError(f"cannot hold unknown parameter(s) {sorted(unknown)}; the model has "
                       f"{', '.join(mdl.param_names)}")
    fixed = _held_values(fixed)
    free = np.array([n not in fixed for n in mdl.param_names])
    k = int(free.sum())
    if k == 0:
        raise FitError("every parameter is held: free at least one to fit")
    if n_used < k:
        pts = "1 point is" if n_used == 1 else f"{n_used} points are"
        raise FitError(f"the model has {k} free parameters but only {pts} used; "
                       f"restore points or hold parameters")

    all_used = n_used == n_all
    xu, yu = (x, y) if all_used else (x[used], y[used])
    if sig_all is None:
        # read-only; never divided by (unit). (A view of one value from 2000 points;
        # below, a small array costs less to make than broadcast_to's view.)
        if n_used > 2000:
            sig_u = np.broadcast_to(1.0, (n_used,))
        else:
            sig_u = np.ones(n_used)
            sig_u.flags.writeable = False
    else:
        sig_u = sig_all if all_used else sig_all[used]
    try:
        if n_used > 2000 and (p0 is None or isinstance(p0, dict)):
            # start values need no more than a few thousand points (a seeded subsample)
            pick = np.sort(np.random.default_rng(7).choice(n_used, 300, replace=False))
            xs, ys = xu[pick], yu[pick]
        else:
            xs, ys = xu, yu
        start = mdl.start_values(xs, ys, p0)
        start, like = _catalogue_start(mdl, xs, ys, p0, start)
    except ValueError as e:
        raise FitError(str(e)) from e
    if not np.all(np.isfinite(start)):
        raise FitError("the start values are not all finite numbers")
    for name, v in fixed.items():
        start[mdl.param_names.index(name)] = float(v)
    search_start = None
    given = set(p0) if isinstance(p0, dict) else (set(mdl.param_names) if p0 is not None else set())
    searcher = _catalogue_model(like).guess_search if like else mdl.guess_search
    if searcher is not None and not given >= set(mdl.param_names):
        def search_start():
            """The start from the model's wider search (the catalogue model's, carried
            over, for a recognised formula), with the held values; None if unusable."""
            try:
                with np.errstate(all="ignore"):
                    t = mdl.start_values(xs, ys, p0, search=True)
                    if like:
                        t, _ = _catalogue_start(mdl, xs, ys, p0, t, search=True)
            except (ValueError, ArithmeticError, np.linalg.LinAlgError):
                return None
            for name, v in fixed.items():
                t[mdl.param_names.index(name)] = float(v)
            return t[free] if np.all(np.isfinite(t)) else None
    prob = _Problem(mdl, xu, yu, sig_u, free, start.copy(), unit=sig_all is None)
    absolute = sigma is not None and sigma_mode == "absolute"

    fixed_scale = None
    scale_given = not (isinstance(scale, str) and scale == "auto")
    if scale_given:
        if isinstance(scale, bool):  # True is no scale, though float() reads it as 1
            raise FitError(f"scale must be 'auto' or a positive number, not {scale!r}")
        try:
            fixed_scale = float(scale)
        except (TypeError, ValueError):
            raise FitError(f"scale must be 'auto' or a positive number, not {scale!r}") from None
        if not (fixed_scale > 0 and math.isfinite(fixed_scale)):
            raise FitError(f"scale must be a positive number, not {scale!r}")
        _check_scale(fixed_scale, prob)
    elif absolute and loss not in OWN_SCALE:
        fixed_scale = 1.0
    if fixed_scale is None and loss not in OWN_SCALE and 2 * k > n_used:
        # a fit can pass exactly through k of the points, and with k > n/2 that zeroes
        # the median absolute residual: the MAD scale is then no estimate at all (a
        # 3-point line 'converged' as an exact fit with scale 5e-13; a 3-point power law
        # spent 13 s creeping up from that zero)
        raise FitError(
            f"an automatic robust scale needs more than twice as many used points as free "
            f"parameters ({n_used} points, {k} parameters): give a fixed scale, hold "
            f"parameters, or use least squares")

    return _Setup(
        mdl=mdl, loss=loss, loss_obj=loss_obj, x=x, y=y, excl=excl, sig_all=sig_all,
        used=used, fixed=fixed, free=free, prob=prob, theta0=start[free],
        fixed_scale=fixed_scale, absolute=absolute, scale_given=scale_given,
        sigma_kind="none" if sigma is None else sigma_mode, max_iter=max_iter,
        info={"n_missing": int(np.sum(~finite)), "scale_fixed": scale_given,
              **({"start_like": like} if like else {})},
        search_start=search_start,
    )


def _catalogue_model(name: str) -> Model:
    from ..models import get_model  # here: see _resolve

    return get_model(name)


def _catalogue_start(mdl: Model, x, y, p0, start, search: bool = False):
    """``(start, catalogue name)``: a formula that is a catalogue curve written another
    way (:mod:`.recognise`) starts from that model's robust guess (``search``: its
    wider search), carried over to the formula's parameters, wherever the analyst gave
    no start value; else ``(start, None)``."""
    names = mdl.param_names
    given = set(p0) if isinstance(p0, dict) else (set(names) if p0 is not None else set())
    if given >= set(names):
        return start, None
    match = recognise(mdl)
    if match is None:
        return start, None
    from ..models import get_model  # here: see _resolve

    try:
        with np.errstate(all="ignore"):
            q = match.carry(get_model(match.name).start_values(x, y, search=search))
    except (ValueError, ArithmeticError, np.linalg.LinAlgError):
        return start, None
    if not np.all(np.isfinite(q)):
        return start, None
    out = np.array(start, dtype=float)
    for j, n in enumerate(names):
        if n not in given:
            out[j] = q[j]
    return out, match.name
