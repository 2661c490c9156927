"""The one model of the work: a data set, a method and an exclusion record.

These types are shared by the library and the window (the window's document holds
them; ``desktop.document.Measurements`` and ``Settings`` are other names for
:class:`DataSet` and :class:`Method`), and a session file stores exactly them
(:mod:`fitcore.session` writes and reads the JSON).

* :class:`DataSet`: x, y, optional sigma, column names and units, where the data came
  from (file and SHA-256), the file row of each point and the notes made while reading.
* :class:`Method`: the model and every option of :func:`fitcore.fit` besides the data.
  Each keyword of ``fit()`` is one field here, with the same name and default; a new
  option of ``fit()`` is one new field line, and it is saved and reopened without any
  other change (the session format writes and reads the option fields generically).
* :class:`Exclusion`: one entry of the exclusion record (point, reason, time).

Nothing here imports Qt.
"""
from __future__ import annotations

from dataclasses import dataclass, field, fields, replace
from typing import Any, Mapping

import numpy as np

from .losses import OWN_SCALE
from .models import get_model, resolve_model

__all__ = ["DataSet", "Method", "Exclusion", "FIT_OPTIONS", "DATA_ARGUMENTS",
           "MODEL_FIELDS", "curve_grid"]

#: points on the x grid a fitted curve is drawn or written on
CURVE_POINTS = 400

#: the keywords of :func:`fitcore.fit` that come from the data set and the exclusion
#: record rather than from the method
DATA_ARGUMENTS = ("model", "x", "y", "sigma", "excluded")
#: the fields of :class:`Method` that say which model is fitted
MODEL_FIELDS = ("model", "model_kind", "model_options")
_MODEL_KINDS = ("builtin", "formula")


# ============================================================================ data set
@dataclass(frozen=True)
class DataSet:
    """One data set: x, y and optional standard uncertainties of y, with their origin.

    Parameters
    ----------
    x, y
        Float arrays of equal length.
    sigma
        Standard uncertainties of y, or None.
    x_name, y_name, sigma_name
        Column names as read from the file.
    x_unit, y_unit
        Units split off the headers ("" when none).
    source
        File path, or a short description such as "clipboard".
    notes
        Human-readable lines about what was skipped or guessed while reading.
    source_rows
        The row of the file (or sheet) each point came from, as the file shows it
        (so a point can be matched to the lab notebook), or None when not known.
    source_sha256
        SHA-256 of the source file's bytes ("" when not known).
    columns
        The column choice as read (``{"x": name, "y": name, "sigma": name or None}``,
        perhaps a sheet); filled from the names when not given.
    """

    x: np.ndarray
    y: np.ndarray
    sigma: np.ndarray | None = None
    x_name: str = "x"
    y_name: str = "y"
    sigma_name: str = ""
    x_unit: str = ""
    y_unit: str = ""
    source: str = ""
    notes: tuple[str, ...] = ()
    source_rows: np.ndarray | None = None
    source_sha256: str = ""
    columns: Mapping = field(default_factory=dict)

    def __post_init__(self):
        x = np.asarray(self.x, dtype=float).ravel()
        y = np.asarray(self.y, dtype=float).ravel()
        if x.size != y.size:
            raise ValueError(f"x has {x.size} values but y has {y.size}; they must match")
        object.__setattr__(self, "x", x)
        object.__setattr__(self, "y", y)
        if self.sigma is not None:
            s = np.asarray(self.sigma, dtype=float).ravel()
            if s.size != x.size:
                raise ValueError(f"sigma has {s.size} values but x and y have {x.size}; "
                                 "they must match")
            object.__setattr__(self, "sigma", s)
        object.__setattr__(self, "notes", tuple(str(n) for n in self.notes))
        if self.source_rows is not None:
            rows = np.asarray(self.source_rows, dtype=np.int64).ravel()
            object.__setattr__(self, "source_rows", rows if rows.size == x.size else None)
        cols = dict(self.columns or {})
        if not cols:
            cols = {"x": self.x_name, "y": self.y_name, "sigma": self.sigma_name or None}
        object.__setattr__(self, "columns", cols)

    def __eq__(self, other):
        if not isinstance(other, DataSet):
            return NotImplemented
        for f in fields(self):
            a, b = getattr(self, f.name), getattr(other, f.name)
            if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
                if a is None or b is None or not np.array_equal(a, b, equal_nan=True):
                    return False
            elif a != b:
                return False
        return True

    __hash__ = None  # arrays inside: compared by value, not hashable

    @property
    def n(self) -> int:
        return int(self.x.size)

    @property
    def names(self) -> dict:
        return {"x": self.x_name, "y": self.y_name, "sigma": self.sigma_name}

    @property
    def units(self) -> dict:
        return {"x": self.x_unit, "y": self.y_unit}

    def file_row(self, i: int) -> int | None:
        """The file row point ``i`` (0-based) came from, or None."""
        rows = self.source_rows
        return int(rows[i]) if rows is not None and 0 <= i < rows.size else None

    def label(self, which: str) -> str:
        """Axis label such as ``"Time (s)"`` for ``which`` in {"x", "y"}."""
        name, unit = (self.x_name, self.x_unit) if which == "x" else (self.y_name, self.y_unit)
        return f"{name} ({unit})" if unit else name

    def with_(self, **kw) -> "DataSet":
        """A copy with some fields changed."""
        return replace(self, **kw)


def curve_grid(x, n: int = CURVE_POINTS, log_x: bool = False) -> np.ndarray:
    """The x values a fitted curve is evaluated on: ``n`` points from the smallest to
    the largest finite x, evenly spaced, or evenly on a log scale over the positive x
    when ``log_x`` (what a log axis can show). Empty when there is no such x."""
    xs = np.asarray(x, dtype=float).ravel()
    xs = xs[np.isfinite(xs)]
    if log_x:
        xs = xs[xs > 0]
    if xs.size == 0:
        return np.zeros(0)
    lo, hi = float(xs.min()), float(xs.max())
    if log_x and hi > lo:
        return np.geomspace(lo, hi, n)
    return np.linspace(lo, hi, n)


# ============================================================================ method
def _named_floats(value, what: str) -> dict:
    """``{name: float}`` from a mapping or ``(name, value)`` pairs."""
    items = value.items() if isinstance(value, Mapping) else value
    try:
        return {str(k): float(v) for k, v in items}
    except (TypeError, ValueError):
        raise ValueError(f"{what} should map parameter names to numbers, not {value!r}") \
            from None


@dataclass(frozen=True)
class Method:
    """How the fit is made: the model and every option of :func:`fitcore.fit`.

    ``model`` is a built-in model name (``model_kind="builtin"``, with
    ``model_options`` such as a polynomial degree) or formula text
    (``model_kind="formula"``). A model built from Python callables cannot be stored.

    The fields after the model ones are the keyword options of :func:`fitcore.fit`,
    each under its own name with the same default (:data:`FIT_OPTIONS`). To carry a new
    option of ``fit()``, add one field here; saving, reopening, :meth:`to_fit_kwargs`
    and :meth:`from_fit_kwargs` handle it without further change (a test holds this
    class against ``fit()``'s signature).

    ``fixed`` and named ``p0`` may be given as dicts or ``(name, value)`` pairs; an
    empty ``p0`` is None, positional start values are kept as a tuple.
    """

    model: str = "line"
    model_kind: str = "builtin"
    model_options: Mapping = field(default_factory=dict)
    # ---- fit() options, same names and defaults as fitcore.fit's keywords
    loss: str = "l2"
    scale: Any = "auto"
    alpha: float | None = None
    p0: Any = None
    fixed: Mapping = field(default_factory=dict)
    tuning: float | None = None
    sigma_mode: str = "absolute"
    max_iter: int = 2000
    weighting: str | None = None  # a rule of fitcore.weighting ("1/x^2", ...), None = none

    def __post_init__(self):
        s = object.__setattr__
        s(self, "model", str(self.model))
        s(self, "model_kind", str(self.model_kind))
        s(self, "model_options", dict(self.model_options or {}))
        s(self, "fixed", _named_floats(self.fixed or {}, "fixed"))
        p0 = self.p0
        if p0 is not None:
            if isinstance(p0, Mapping) or (
                    len(p0) and all(isinstance(e, (tuple, list)) and len(e) == 2 for e in p0)):
                p0 = _named_floats(p0, "p0")
            else:
                p0 = tuple(float(v) for v in np.asarray(p0, dtype=float).ravel())
            if not len(p0):
                p0 = None
        s(self, "p0", p0)
        if not isinstance(self.scale, str):
            s(self, "scale", float(self.scale))
        for key in ("alpha", "tuning"):
            v = getattr(self, key)
            if v is not None:
                s(self, key, float(v))

    __hash__ = None  # dicts inside: compared by value, not hashable

    # ------------------------------------------------------------------ building
    def with_(self, **kw) -> "Method":
        """A copy with some fields changed (dicts or pairs for ``fixed``/``p0``)."""
        return replace(self, **kw)

    @classmethod
    def from_fit_kwargs(cls, model="line", *, model_kind: str | None = None,
                        model_options: Mapping | None = None, **kw) -> "Method":
        """The method of ``fitcore.fit(model, x, y, **kw)``; ``model`` a built-in name
        or formula text (the kind is told from the name when not given)."""
        unknown = set(kw) - set(FIT_OPTIONS)
        if unknown:
            raise TypeError(f"fit() takes no option(s) {', '.join(sorted(unknown))}")
        if model_kind is None:
            model_kind = "builtin" if _is_builtin_name(model) else "formula"
        return cls(model=model, model_kind=model_kind, model_options=model_options or {}, **kw)

    @classmethod
    def from_result(cls, res, **changes) -> "Method":
        """The method a :class:`~fitcore.FitResult` was made with, as far as the result
        records it: model, loss, shape, tuning constant, held parameters, sigma mode and
        whether the scale was fixed (then its value). Start values are not recorded in a
        result; ``changes`` sets or overrides fields."""
        mdl = res.model
        if _is_builtin_name(mdl.name):
            model, kind = mdl.name, "builtin"
        else:
            model, kind = mdl.name, "formula"
        kw = dict(model=model, model_kind=kind, loss=res.loss, alpha=res.alpha,
                  tuning=res.tuning, fixed=dict(res.fixed))
        if res.loss == "adaptive":
            kw["alpha"] = None  # fitted, not chosen
        if res.sigma is not None and res.sigma_mode in ("absolute", "relative"):
            kw["sigma_mode"] = res.sigma_mode
        if scale_was_fixed(res):
            kw["scale"] = float(res.scale)
        rule = (getattr(res, "info", None) or {}).get("weighting")
        if rule:  # the rule's relative sigma are not the analyst's sigma column
            kw["weighting"] = rule["rule"]
            kw.pop("sigma_mode", None)
        kw.update(changes)
        return cls(**kw)

    # ------------------------------------------------------------------ fitting
    def model_spec(self):
        """What to pass as ``model`` to :func:`fitcore.fit`: the name or formula text,
        or the built model when it has options."""
        if self.model_kind == "formula" or not self.model_options:
            return self.model
        return get_model(self.model, **self.model_options)

    def build_model(self):
        """The :class:`fitcore.Model` (raises ValueError for an unknown model)."""
        return resolve_model(self.model_spec())

    def to_fit_kwargs(self) -> dict:
        """Every option for :func:`fitcore.fit` (besides model, x, y, sigma, excluded).

        ``alpha`` is kept in the method as the analyst's preference for the general loss
        (switching back to it restores the shape), but it is passed only with
        ``loss="general"``: ``fit()`` refuses a shape for a loss that has none. Likewise
        a fixed scale and a tuning constant are passed only with a loss that takes them
        (not least squares, L1 or the adaptive loss: ``fitcore.losses.OWN_SCALE``)."""
        kw = {name: getattr(self, name) for name in FIT_OPTIONS}
        if self.loss != "general":
            del kw["alpha"]
        if self.loss in OWN_SCALE:
            del kw["scale"], kw["tuning"]
        kw["fixed"] = dict(self.fixed) or None
        if isinstance(self.p0, Mapping):
            kw["p0"] = dict(self.p0)
        elif self.p0 is not None:
            kw["p0"] = list(self.p0)
        return kw

    def named_p0(self, param_names) -> dict:
        """Start values by parameter name (positional ones matched to ``param_names``)."""
        if self.p0 is None:
            return {}
        if isinstance(self.p0, Mapping):
            return dict(self.p0)
        return {n: v for n, v in zip(param_names, self.p0)}


#: the :class:`Method` fields that are keyword options of :func:`fitcore.fit`
FIT_OPTIONS = tuple(f.name for f in fields(Method) if f.name not in MODEL_FIELDS)


def _is_builtin_name(name) -> bool:
    try:
        get_model(str(name))
    except (ValueError, TypeError):
        return False
    return True


def scale_was_fixed(res) -> bool:
    """True when the analyst fixed the scale of the fit that gave ``res`` (the fit
    records it as ``res.info["scale_fixed"]``; a result without the record counts as
    an automatic scale)."""
    info = getattr(res, "info", None) or {}
    return bool(info.get("scale_fixed", False))


# ============================================================================ exclusions
@dataclass
class Exclusion:
    """One entry of the exclusion record: a point left out by the analyst."""

    index: int
    reason: str = ""
    time: str = ""  # ISO-8601

    def __post_init__(self):
        self.index = int(self.index)
        self.reason = str(self.reason)
        self.time = str(self.time)

