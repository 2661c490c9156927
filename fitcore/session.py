"""Sessions: saved work as versioned JSON (``.ballast`` files), and autosave recovery.

A session holds the measurements (exactly, every float round-trips), where they came
from (file name and SHA-256), the method (model, loss, scale, shape, tuning constant,
held parameters, start values), the exclusion record (index, reason, time) and a
snapshot of the last result. It is plain JSON, never pickle: loading a session reads
data and nothing else, so a session file can never run code.

Layout of a version-1 file::

    {"format": "ballast-session", "version": 1, "created": "2025-01-31T10:15:00+00:00",
     "ballast_version": "0.1.0",
     "data": {"x": [...], "y": [...], "sigma": [...] or null,
              "names": {"x": "Time", "y": "Signal", "sigma": ""},
              "units": {"x": "s", "y": "mV"}, "source_file": "run3.csv",
              "source_sha256": "...", "columns": {"x": "Time", "y": "Signal"}},
     "method": {"model": {"builtin": "exp_decay", "options": {}} or {"formula": "..."},
                "loss": "huber", "scale": "auto" or 0.12, "alpha": null, "tuning": null,
                "fixed": {"C": 0.0}, "p0": null, "sigma_mode": "absolute"},
     "exclusions": [{"index": 6, "reason": "bubble", "time": "2025-01-31T10:14:02+00:00"}],
     "result": {"param_names": [...], "values": [...], "stderr": [...],
                "covariance": [[...]], "scale": ..., ...} or null}

Non-finite floats are written as the strings ``"nan"``, ``"inf"`` and ``"-inf"`` (JSON
has no such numbers). Nothing here imports Qt.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import re
import stat as _stat
import tempfile
from datetime import datetime, timezone
from pathlib import Path
from typing import Mapping

import numpy as np

from . import __version__
from .io import read_regular_file
from .solve import fit
from .weighting import WeightingError, normalise_rule
from .work import FIT_OPTIONS, DataSet, Exclusion, Method

__all__ = [
    "FORMAT_TAG",
    "FORMAT_VERSION",
    "SUFFIX",
    "RECOVERY_SUFFIX",
    "SessionError",
    "DataSet",
    "Exclusion",
    "Method",
    "Session",
    "save_session",
    "load_session",
    "session_to_json",
    "session_from_json",
    "file_sha256",
    "recovery_path",
    "write_recovery",
    "find_recovery",
    "recovery_for",
    "discard_recovery",
    "load_json_bounded",
    "read_bounded_file",
]

FORMAT_TAG = "ballast-session"
FORMAT_VERSION = 1
SUFFIX = ".ballast"
RECOVERY_SUFFIX = ".ballast.recovery"

_NONFINITE = {"nan": math.nan, "inf": math.inf, "-inf": -math.inf}
_SIGMA_MODES = ("absolute", "relative", "none")


class SessionError(ValueError):
    """A session file that cannot be read, or a session that cannot be written."""


def now_iso() -> str:
    """The current time, ISO-8601 with the UTC offset, to the second."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


# ============================================================================ data types
class Session:
    """Saved work: a data set, a method and an exclusion record (the three types of
    :mod:`fitcore.work`), with a snapshot of the last result.

    Pure data (no Qt). Build it from a :class:`~fitcore.work.DataSet` (``data=``) or,
    as before, from the arrays and their descriptions (``x, y, sigma, names, units,
    source_file, source_sha256, columns``); ``x``, ``y``, ``sigma`` and the other data
    fields read through to :attr:`data`. ``result`` is the snapshot dict written by
    :meth:`store_result` (or None).
    """

    def __init__(self, x=None, y=None, sigma=None, names=None, units=None,
                 source_file: str = "", source_sha256: str = "", columns=None,
                 method: Method | None = None, exclusions=None, result: dict | None = None,
                 created: str = "", ballast_version: str = "", saved_as: str = "", *,
                 data: DataSet | None = None, notes=(), source_rows=None):
        if data is None:
            names = dict(names or {})
            units = dict(units or {})
            try:
                data = DataSet(
                    np.array(x, dtype=float), np.array(y, dtype=float),
                    None if sigma is None else np.array(sigma, dtype=float),
                    x_name=str(names.get("x", "x")), y_name=str(names.get("y", "y")),
                    sigma_name=str(names.get("sigma", "") or ""),
                    x_unit=str(units.get("x", "")), y_unit=str(units.get("y", "")),
                    source=str(source_file or ""), notes=tuple(notes),
                    source_rows=source_rows, source_sha256=str(source_sha256 or ""),
                    columns=dict(columns or {}))
            except ValueError as exc:
                raise SessionError(str(exc)) from None
        self.data = data
        self.method = method if method is not None else Method()
        self.exclusions = list(exclusions or [])
        self.result = result
        self.created = created
        self.ballast_version = ballast_version
        self.saved_as = saved_as  # for recovery files: the session path the work belongs to

    def __repr__(self):
        return (f"Session({self.n_points} points from {self.source_file or 'no file'!r}, "
                f"{self.method!r}, {len(self.exclusions)} excluded)")

    # ------------------------------------------------------------------ the data set
    x = property(lambda self: self.data.x)
    y = property(lambda self: self.data.y)
    sigma = property(lambda self: self.data.sigma)
    names = property(lambda self: self.data.names)
    units = property(lambda self: self.data.units)
    columns = property(lambda self: self.data.columns)
    source_rows = property(lambda self: self.data.source_rows)
    notes = property(lambda self: self.data.notes)

    @x.setter
    def x(self, value):
        self._change_data(x=value)

    @y.setter
    def y(self, value):
        self._change_data(y=value)

    @sigma.setter
    def sigma(self, value):
        self._change_data(sigma=value)

    @property
    def source_file(self) -> str:
        return self.data.source

    @source_file.setter
    def source_file(self, value):
        self._change_data(source=str(value))

    @property
    def source_sha256(self) -> str:
        return self.data.source_sha256

    @source_sha256.setter
    def source_sha256(self, value):
        self._change_data(source_sha256=str(value))

    def _change_data(self, **kw):
        try:
            self.data = self.data.with_(**kw)
        except ValueError as exc:
            raise SessionError(str(exc)) from None

    # ------------------------------------------------------------------ exclusions
    @property
    def n_points(self) -> int:
        return int(self.x.size)

    @property
    def excluded(self) -> np.ndarray:
        """Boolean mask, True where the exclusion record leaves a point out."""
        mask = np.zeros(self.n_points, dtype=bool)
        for e in self.exclusions:
            mask[e.index] = True
        return mask

    def exclude(self, index: int, reason: str = "", time: str | None = None) -> Exclusion:
        """Add (or replace) the exclusion of point ``index`` with a reason and time."""
        index = int(index)
        if not 0 <= index < self.n_points:
            raise IndexError(f"point {index} does not exist (there are {self.n_points})")
        self.restore(index)
        e = Exclusion(index, str(reason), time or now_iso())
        self.exclusions.append(e)
        return e

    def restore(self, index: int) -> None:
        """Remove point ``index`` from the exclusion record (if it is there)."""
        self.exclusions = [e for e in self.exclusions if e.index != int(index)]

    def reasons(self) -> dict[int, str]:
        """Index -> reason, as :func:`fitcore.report.points_csv` takes it."""
        return {e.index: e.reason for e in self.exclusions}

    # ------------------------------------------------------------------ fitting
    def refit(self):
        """Run the stored method on the stored data again; returns a FitResult.

        With the same Ballast version this reproduces the stored estimates bit for
        bit (the data round-trip exactly and the fit is deterministic).
        """
        m = self.method
        return fit(m.model_spec(), self.x, self.y, sigma=self.sigma, excluded=self.excluded,
                   **m.to_fit_kwargs())

    def store_result(self, res) -> None:
        """Keep a snapshot of a FitResult in the session (what the file records)."""
        self.result = result_snapshot(res)

    def stored_values(self) -> np.ndarray | None:
        """The stored estimates as a float array (None without a stored result)."""
        if not self.result:
            return None
        return np.array(self.result["values"], dtype=float)

    def reproduces(self, res) -> bool:
        """True when ``res`` has exactly (==) the stored estimates and uncertainties."""
        if not self.result:
            return False
        snap = result_snapshot(res)
        return all(
            _same(snap[k], self.result.get(k)) for k in ("values", "stderr", "covariance")
        ) and snap["param_names"] == self.result.get("param_names")


def _same(a, b) -> bool:
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    return a.shape == b.shape and bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))


def result_snapshot(res) -> dict:
    """The JSON-ready record of a FitResult kept in a session."""
    def opt(v):
        return None if v is None else float(v)

    return {
        "param_names": list(res.param_names),
        "values": [float(v) for v in res.values],
        "stderr": [float(v) for v in res.stderr],
        "covariance": [[float(v) for v in row] for row in np.asarray(res.covariance)],
        "weights": [float(v) for v in res.weights],
        "loss": str(res.loss),
        "scale": float(res.scale),
        "scale_method": str(res.scale_method),
        "alpha": opt(res.alpha),
        "alpha_stderr": opt(getattr(res, "alpha_stderr", None)),
        "tuning": opt(res.tuning),
        "covariance_recipe": str(res.covariance_recipe),
        "converged": bool(res.converged),
        "message": str(res.message),
        "n_used": int(res.n_used),
        "n_excluded": int(res.n_excluded),
        "n_downweighted": int(res.n_downweighted),
        "dof": int(res.dof),
        "n_iter": int(getattr(res, "n_iter", 0)),
        "objective": float(getattr(res, "objective", math.nan)),
        "rss": float(getattr(res, "rss", math.nan)),
        "fixed": {str(k): float(v) for k, v in dict(res.fixed).items()},
    }


# ============================================================================ encoding
def _enc(v):
    """A float for JSON: finite floats as numbers (repr digits), others as strings."""
    v = float(v)
    if math.isnan(v):
        return "nan"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return v


def _enc_tree(obj):
    """Encode floats (also nested in lists/dicts) for JSON."""
    if isinstance(obj, bool) or obj is None or isinstance(obj, str):
        return obj
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _enc(obj)
    if isinstance(obj, np.ndarray):
        return _enc_tree(obj.tolist())
    if isinstance(obj, Mapping):
        return {str(k): _enc_tree(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_enc_tree(v) for v in obj]
    raise SessionError(
        f"a value of type {type(obj).__name__} cannot be stored in a session file"
    )


def _floats_list(values) -> list:
    return [_enc(v) for v in np.asarray(values, dtype=float).ravel()]


def session_to_dict(session: Session) -> dict:
    """The JSON-ready dict of a session (format version 1)."""
    return _session_dict(session, _floats_list)


def _session_dict(session: Session, floats) -> dict:
    """:func:`session_to_dict` with ``floats(array)`` encoding the per-point arrays."""
    m = session.method
    if m.model_kind == "builtin":
        model = {"builtin": str(m.model), "options": _enc_tree(dict(m.model_options))}
    elif m.model_kind == "formula":
        model = {"formula": str(m.model)}
    else:
        raise SessionError(
            f"model kind {m.model_kind!r} cannot be stored; a session keeps a built-in "
            "model name or a formula (models built in Python code cannot be saved)"
        )
    data = {
        "x": floats(session.x),
        "y": floats(session.y),
        "sigma": None if session.sigma is None else floats(session.sigma),
        "names": {str(k): str(v) for k, v in session.names.items()},
        "units": {str(k): str(v) for k, v in session.units.items()},
        "source_file": str(session.source_file),
        "source_sha256": str(session.source_sha256),
        "columns": _enc_tree(dict(session.columns)),
    }
    if session.notes:
        data["notes"] = [str(n) for n in session.notes]
    if session.source_rows is not None:
        data["source_rows"] = [int(r) for r in session.source_rows]
    return {
        "format": FORMAT_TAG,
        "version": FORMAT_VERSION,
        "created": session.created or now_iso(),
        "ballast_version": str(__version__),
        "saved_as": str(session.saved_as or ""),
        "data": data,
        "method": {"model": model, **method_options_dict(m)},
        "exclusions": [
            {"index": int(e.index), "reason": str(e.reason), "time": str(e.time)}
            for e in sorted(session.exclusions, key=lambda e: e.index)
        ],
        "result": None if session.result is None else _result_tree(session.result, floats),
    }


def method_options_dict(m: Method) -> dict:
    """The JSON-ready options of a method: one entry per field of
    :data:`fitcore.work.FIT_OPTIONS`, under the field's name (generic, so a new option
    of ``fit()`` is stored as soon as :class:`~fitcore.work.Method` has its field)."""
    if isinstance(m.scale, str) and m.scale != "auto":
        raise SessionError(f"scale must be 'auto' or a positive number, not {m.scale!r}")
    out = {}
    for name in FIT_OPTIONS:
        value = getattr(m, name)
        if name == "fixed":
            value = {str(k): _enc(v) for k, v in dict(value).items()}
        out[name] = _enc_tree(value)
    return out


def _result_tree(result: Mapping, floats) -> dict:
    out = {str(k): _enc_tree(v) for k, v in result.items() if k != "weights"}
    if "weights" in result:
        out["weights"] = floats(result["weights"])
    return {str(k): out[str(k)] for k in result}  # the stored order


#: JSON text of recently encoded per-point arrays, by content (autosave re-encodes the
#: same x, y and sigma every few seconds; at 1e5 points that took most of its time)
_ARRAY_JSON_CACHE: "dict[tuple, str]" = {}
_ARRAY_JSON_CACHE_SIZE = 8


def _floats_json(values) -> str:
    """JSON text of a float array, exactly as ``json.dumps`` of :func:`_floats_list`.

    Finite floats are written with ``float.__repr__`` (what ``json`` uses); an array
    holding NaN or infinities takes the general path. The text is kept in a small cache
    keyed by a hash of the array's bytes, so an unchanged array costs one hash.
    """
    a = np.ascontiguousarray(np.asarray(values, dtype=float).ravel())
    key = (a.size, hashlib.blake2b(a.view(np.uint8), digest_size=20).digest())
    text = _ARRAY_JSON_CACHE.get(key)
    if text is not None:
        return text
    if np.isfinite(a).all():
        text = "[" + ",".join(map(float.__repr__, a.tolist())) + "]"
    else:
        text = json.dumps(_floats_list(a), allow_nan=False, separators=(",", ":"))
    if a.size >= 64:  # small arrays are cheap; keep the cache for the big ones
        if len(_ARRAY_JSON_CACHE) >= _ARRAY_JSON_CACHE_SIZE:
            _ARRAY_JSON_CACHE.pop(next(iter(_ARRAY_JSON_CACHE)))
        _ARRAY_JSON_CACHE[key] = text
    return text


def session_to_json(session: Session) -> str:
    """The session as JSON text (what :func:`save_session` writes).

    The same text as ``json.dumps(session_to_dict(session), ...)``; the per-point
    arrays are encoded by :func:`_floats_json` and spliced in.
    """
    token = f"@ballast-array-{os.urandom(8).hex()}@"
    parts: list[str] = []

    def floats(values):
        parts.append(_floats_json(values))
        return f"{token}{len(parts) - 1}{token}"

    try:
        text = json.dumps(_session_dict(session, floats), allow_nan=False, ensure_ascii=False,
                          separators=(",", ":"))
        pieces = text.split(f'"{token}')
        out = [pieces[0]]
        for piece in pieces[1:]:
            k, rest = piece.split(f'{token}"', 1)
            out.append(parts[int(k)])
            out.append(rest)
        return "".join(out)
    except (TypeError, ValueError) as exc:
        if isinstance(exc, SessionError):
            raise
        raise SessionError(f"the session cannot be written as JSON: {exc}") from None


# ============================================================================ decoding
class _Check:
    """Reads fields with plain-language errors naming the field."""

    def __init__(self, where: str):
        self.where = where

    def fail(self, msg: str):
        raise SessionError(f"{self.where}: {msg}")

    def get(self, obj: dict, key: str, path: str, *, optional=False, default=None):
        if key not in obj:
            if optional:
                return default
            self.fail(f"the session lacks the field '{path}{key}'")
        return obj[key]

    def dict_(self, v, path: str) -> dict:
        if not isinstance(v, dict):
            self.fail(f"'{path}' should be an object, found {_kind(v)}")
        return v

    def str_(self, v, path: str) -> str:
        if not isinstance(v, str):
            self.fail(f"'{path}' should be text, found {_kind(v)}")
        return v

    def float_(self, v, path: str) -> float:
        if isinstance(v, bool) or not isinstance(v, (int, float, str)):
            self.fail(f"'{path}' should be a number, found {_kind(v)}")
        if isinstance(v, str):
            if v not in _NONFINITE:
                self.fail(f"'{path}' should be a number, found the text {v[:40]!r}")
            return _NONFINITE[v]
        return float(v)

    def opt_float(self, v, path: str):
        return None if v is None else self.float_(v, path)

    def int_(self, v, path: str) -> int:
        if isinstance(v, bool) or not isinstance(v, int):
            self.fail(f"'{path}' should be a whole number, found {_kind(v)}")
        return v

    def floats(self, v, path: str) -> np.ndarray:
        if not isinstance(v, list):
            self.fail(f"'{path}' should be a list of numbers, found {_kind(v)}")
        return np.array([self.float_(e, f"{path}[{i}]") for i, e in enumerate(v)],
                        dtype=float)

    def str_map(self, v, path: str) -> dict:
        v = self.dict_(v, path)
        return {k: self.str_(e, f"{path}.{k}") for k, e in v.items()}

    def tree(self, v, path: str):
        """Nested JSON data with non-finite float strings decoded where numbers are."""
        if isinstance(v, dict):
            return {k: self.tree(e, f"{path}.{k}") for k, e in v.items()}
        if isinstance(v, list):
            return [self.tree(e, f"{path}[{i}]") for i, e in enumerate(v)]
        return v


def _kind(v) -> str:
    return {dict: "an object", list: "a list", str: "text", bool: "true/false",
            type(None): "null", int: "a number", float: "a number"}.get(type(v), type(v).__name__)


def _method_options(c: "_Check", md: dict) -> dict:
    """The fit() options of a stored method, each checked; options the file does not
    hold keep their defaults. Options without a check of their own (any added after
    these) are read as plain JSON data."""
    out = {}
    for name in FIT_OPTIONS:
        if name not in md:
            continue
        v, path = md[name], f"method.{name}"
        if name == "loss" or name == "sigma_mode":
            out[name] = c.str_(v, path)
        elif name == "scale":
            if v == "auto":
                out[name] = "auto"
            else:
                s = c.float_(v, path)
                if not (math.isfinite(s) and s > 0):
                    c.fail(f"'{path}' should be 'auto' or a positive number, found {v!r}")
                out[name] = s
        elif name in ("alpha", "tuning"):
            out[name] = c.opt_float(v, path)
        elif name == "fixed":
            out[name] = {k: c.float_(e, f"{path}.{k}") for k, e in c.dict_(v, path).items()}
        elif name == "p0":
            if v is None:
                out[name] = None
            elif isinstance(v, dict):
                out[name] = {k: c.float_(e, f"{path}.{k}") for k, e in v.items()}
            elif isinstance(v, list):
                out[name] = [float(e) for e in c.floats(v, path)]
            else:
                c.fail(f"'{path}' should be null, an object or a list, found {_kind(v)}")
        elif name == "max_iter":
            out[name] = c.int_(v, path)
        elif name == "weighting":  # a rule of fitcore.weighting, or null
            try:
                out[name] = None if v is None else normalise_rule(c.str_(v, path))
            except WeightingError as e:
                c.fail(f"'{path}': {e}")
        else:
            out[name] = c.tree(v, path)
    if "loss" not in md:
        c.fail("the session lacks the field 'method.loss'")
    mode = out.get("sigma_mode", "absolute")
    if mode not in _SIGMA_MODES:
        c.fail(f"'method.sigma_mode' should be one of {', '.join(_SIGMA_MODES)}, "
               f"found {mode[:40]!r}")
    return out


def session_from_dict(doc, where: str = "session") -> Session:
    """Build a :class:`Session` from a decoded JSON document, checking every field."""
    c = _Check(where)
    if not isinstance(doc, dict):
        c.fail(f"not a Ballast session (the file holds {_kind(doc)}, not an object)")
    if "format" not in doc:
        c.fail("not a Ballast session (it has no 'format' tag)")
    if doc["format"] != FORMAT_TAG:
        c.fail(f"not a Ballast session (its format tag is {str(doc['format'])[:60]!r}, "
               f"expected {FORMAT_TAG!r})")
    version = c.get(doc, "version", "")
    if isinstance(version, bool) or not isinstance(version, int):
        c.fail(f"the format version should be a whole number, found {_kind(version)}")
    if version > FORMAT_VERSION:
        c.fail(f"made by a newer Ballast (format {version}); this version reads up to "
               f"{FORMAT_VERSION}. Update Ballast to open it")
    if version < 1:
        c.fail(f"format version {version} does not exist (versions start at 1)")

    data = c.dict_(c.get(doc, "data", ""), "data")
    x = c.floats(c.get(data, "x", "data."), "data.x")
    y = c.floats(c.get(data, "y", "data."), "data.y")
    if x.size != y.size:
        c.fail(f"data.x has {x.size} values but data.y has {y.size}")
    sig = c.get(data, "sigma", "data.", optional=True)
    sigma = None if sig is None else c.floats(sig, "data.sigma")
    if sigma is not None and sigma.size != x.size:
        c.fail(f"data.sigma has {sigma.size} values but data.x has {x.size}")
    names = c.str_map(c.get(data, "names", "data.", optional=True, default={}), "data.names")
    units = c.str_map(c.get(data, "units", "data.", optional=True, default={}), "data.units")
    source = c.str_(c.get(data, "source_file", "data.", optional=True, default=""),
                    "data.source_file")
    sha = c.str_(c.get(data, "source_sha256", "data.", optional=True, default=""),
                 "data.source_sha256")
    columns = c.tree(c.dict_(c.get(data, "columns", "data.", optional=True, default={}),
                             "data.columns"), "data.columns")
    notes_raw = c.get(data, "notes", "data.", optional=True)
    if notes_raw is None:  # sessions saved by the window before the notes had a field
        notes_raw = columns.pop("notes", []) if isinstance(columns.get("notes"), list) else []
    if not isinstance(notes_raw, list):
        c.fail(f"'data.notes' should be a list of texts, found {_kind(notes_raw)}")
    notes = tuple(c.str_(n, f"data.notes[{i}]") for i, n in enumerate(notes_raw))
    rows_raw = c.get(data, "source_rows", "data.", optional=True)
    rows = None
    if rows_raw is not None:
        if not isinstance(rows_raw, list) or len(rows_raw) != x.size:
            c.fail(f"'data.source_rows' should be a list of {x.size} row numbers")
        rows = np.array([c.int_(r, f"data.source_rows[{i}]") for i, r in enumerate(rows_raw)],
                        dtype=np.int64)

    md = c.dict_(c.get(doc, "method", ""), "method")
    spec = c.dict_(c.get(md, "model", "method."), "method.model")
    if ("builtin" in spec) == ("formula" in spec):
        c.fail("'method.model' should name either a 'builtin' model or a 'formula'")
    if "builtin" in spec:
        kind, text = "builtin", c.str_(spec["builtin"], "method.model.builtin")
        options_m = c.tree(c.dict_(spec.get("options", {}), "method.model.options"),
                           "method.model.options")
    else:
        kind, text = "formula", c.str_(spec["formula"], "method.model.formula")
        options_m = {}
    options = _method_options(c, md)
    method = Method(model=text, model_kind=kind, model_options=options_m, **options)

    ex_raw = c.get(doc, "exclusions", "", optional=True, default=[])
    if not isinstance(ex_raw, list):
        c.fail(f"'exclusions' should be a list, found {_kind(ex_raw)}")
    exclusions, seen = [], set()
    for i, e in enumerate(ex_raw):
        p = f"exclusions[{i}]"
        e = c.dict_(e, p)
        idx = c.int_(c.get(e, "index", p + "."), p + ".index")
        if not 0 <= idx < x.size:
            c.fail(f"'{p}.index' is {idx}, but there are only {x.size} points")
        if idx in seen:
            c.fail(f"point {idx} is excluded twice in the exclusion record")
        seen.add(idx)
        exclusions.append(Exclusion(
            idx,
            c.str_(c.get(e, "reason", p + ".", optional=True, default=""), p + ".reason"),
            c.str_(c.get(e, "time", p + ".", optional=True, default=""), p + ".time"),
        ))

    res_raw = c.get(doc, "result", "", optional=True)
    result = None
    if res_raw is not None:
        r = c.dict_(res_raw, "result")
        result = dict(c.tree(r, "result"))
        names_r = c.get(r, "param_names", "result.")
        if not isinstance(names_r, list) or not all(isinstance(n, str) for n in names_r):
            c.fail("'result.param_names' should be a list of names")
        k = len(names_r)
        for key in ("values", "stderr"):
            arr = c.floats(c.get(r, key, "result."), f"result.{key}")
            if arr.size != k:
                c.fail(f"'result.{key}' has {arr.size} entries for {k} parameters")
            result[key] = [float(v) for v in arr]
        cov = c.get(r, "covariance", "result.")
        if not isinstance(cov, list) or len(cov) != k:
            c.fail(f"'result.covariance' should be a {k} x {k} list of lists")
        result["covariance"] = [
            [float(v) for v in c.floats(row, f"result.covariance[{i}]")] for i, row in
            enumerate(cov)
        ]
        if any(len(row) != k for row in result["covariance"]):
            c.fail(f"'result.covariance' should be a {k} x {k} list of lists")
        for key in ("scale", "objective", "rss"):
            if key in r:
                result[key] = c.float_(r[key], f"result.{key}")
        for key in ("alpha", "alpha_stderr", "tuning"):
            if key in r:
                result[key] = c.opt_float(r[key], f"result.{key}")
        if "weights" in r:
            result["weights"] = [float(v) for v in c.floats(r["weights"], "result.weights")]
        if "converged" in r and not isinstance(r["converged"], bool):
            c.fail("'result.converged' should be true or false")

    return Session(
        x=x, y=y, sigma=sigma, names=names, units=units, source_file=source,
        source_sha256=sha, columns=columns, notes=notes, source_rows=rows,
        method=method, exclusions=exclusions,
        result=result,
        created=c.str_(doc.get("created", ""), "created"),
        ballast_version=c.str_(doc.get("ballast_version", ""), "ballast_version"),
        saved_as=c.str_(doc.get("saved_as", ""), "saved_as"),
    )


#: Bounds of :func:`load_json_bounded` (a session is a few levels deep; its numbers
#: are floats written with repr, at most 17 significant digits).
MAX_SESSION_BYTES = 256 * 1024 * 1024
MAX_JSON_DEPTH = 64
MAX_INT_DIGITS = 40
_JSON_TOKEN_RE = None


def _json_depth(text: str, limit: int) -> int:
    """Deepest nesting of [ and { outside strings; stops counting past ``limit``."""
    global _JSON_TOKEN_RE
    if _JSON_TOKEN_RE is None:
        import re

        _JSON_TOKEN_RE = re.compile(r'"(?:[^"\\]|\\.)*"|[\[\]{}]')
    depth = deepest = 0
    for m in _JSON_TOKEN_RE.finditer(text):
        ch = m.group()
        if ch in "[{":
            depth += 1
            if depth > deepest:
                deepest = depth
                if deepest > limit:
                    return deepest
        elif ch in "]}":
            depth -= 1
    return deepest


def load_json_bounded(text: str, where: str = "session", *, max_bytes: int | None = None,
                      max_depth: int | None = None, max_int_digits: int | None = None):
    """Decode JSON text with bounds on size, nesting depth and integer length.

    Every failure is a :class:`SessionError` naming ``where`` and the bound: text that
    is not JSON, nesting deeper than ``max_depth`` (a 1 KB file of 995 brackets would
    otherwise raise RecursionError), an integer of more than ``max_int_digits`` digits
    (a 400-digit integer would raise OverflowError when read as a float), text longer
    than ``max_bytes`` characters. Used for every session and recovery file.
    """
    max_bytes = MAX_SESSION_BYTES if max_bytes is None else max_bytes
    max_depth = MAX_JSON_DEPTH if max_depth is None else max_depth
    max_int_digits = MAX_INT_DIGITS if max_int_digits is None else max_int_digits
    if not isinstance(text, str):
        raise SessionError(f"{where}: not a Ballast session (no text)")
    if len(text) > max_bytes:
        raise SessionError(f"{where}: the file is {len(text):,} characters long, more than the "
                           f"{max_bytes:,} a session may have")
    depth = _json_depth(text, max_depth)
    if depth > max_depth:
        raise SessionError(f"{where}: not a Ballast session - the JSON is nested too deeply "
                           f"(more than {max_depth} levels; a session has about 5)")

    def parse_int(digits: str):
        n = len(digits.lstrip("+-"))
        if n > max_int_digits:
            raise SessionError(f"{where}: the file holds an integer with {n:,} digits; a session's "
                               f"numbers have at most {max_int_digits} digits")
        return int(digits)

    def parse_constant(name: str):
        raise SessionError(f"{where}: the file holds {name}, which is not JSON "
                           "(non-finite numbers are written as \"nan\", \"inf\", \"-inf\")")

    try:
        return json.loads(text, parse_int=parse_int, parse_constant=parse_constant)
    except json.JSONDecodeError as exc:
        raise SessionError(
            f"{where}: not a Ballast session - the file is not valid JSON "
            f"(line {exc.lineno}, column {exc.colno}: {exc.msg}); it may be damaged or cut short"
        ) from None
    except RecursionError:
        raise SessionError(f"{where}: not a Ballast session - the JSON is nested too deeply") \
            from None
    except SessionError:
        raise  # a bound's own message (from parse_int, parse_constant): already names the file
    except (ValueError, OverflowError) as exc:  # e.g. a float literal too long to convert
        raise SessionError(f"{where}: not a Ballast session - {exc}") from None


def session_from_json(text: str, where: str = "session") -> Session:
    """Parse JSON text into a :class:`Session` (data only; nothing is executed)."""
    doc = load_json_bounded(text, where)
    try:
        return session_from_dict(doc, where)
    except SessionError:
        raise
    except (ValueError, TypeError, OverflowError, KeyError, IndexError, RecursionError) as exc:
        # a field the checks above let through in an unexpected shape: still a plain message
        raise SessionError(f"{where}: the session holds a value Ballast cannot use "
                           f"({type(exc).__name__}: {str(exc)[:200]})") from None


def read_bounded_file(path, what: str = "session file", max_bytes: int | None = None) -> bytes:
    """The bytes of a regular file of at most ``max_bytes`` (default MAX_SESSION_BYTES).

    A FIFO or device is refused without blocking; every failure is a SessionError.
    """
    path = Path(path)
    limit = MAX_SESSION_BYTES if max_bytes is None else max_bytes

    def refuse(kind, size):
        if kind is not None:
            return SessionError(f"the {what} {path} is {kind}, not a regular file")
        if size is not None:
            return SessionError(f"the {what} {path} is {size:,} bytes, more than the {limit:,} "
                                "a session may have")
        return SessionError(f"the {what} {path} is more than {limit:,} bytes")

    try:
        return read_regular_file(path, limit, refuse)
    except FileNotFoundError:
        raise SessionError(f"the {what} {path} does not exist") from None
    except OSError as exc:
        raise SessionError(f"could not read the {what} {path}: {exc.strerror or exc}") from None


# ============================================================================ files
def _fsync_dir(folder: Path) -> None:
    """Flush a folder entry to disk (POSIX); a no-op where folders cannot be opened."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _umask() -> int:
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    old = os.umask(0o022)
    os.umask(old)
    return old


def temporary_beside(path) -> tuple[int, str]:
    """A new temporary file beside ``path``, named as :func:`clean_debris` knows
    debris (``.<name>.<pid>.<random>.tmp``), its folder noted for the next start's
    cleaning; returns ``(descriptor, path)`` as :func:`tempfile.mkstemp` does."""
    path = Path(path)
    _note_folder(path.parent)
    return tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".tmp", dir=path.parent)


def write_atomically(path, data: bytes, verify=None) -> None:
    """Write ``data`` to ``path`` so that a crash leaves the old file or the new one,
    complete: a temporary file in the same folder, flushed and fsync-ed, its size
    checked against ``data`` and, when given, checked by ``verify(temporary_path)``
    (it raises ValueError or OSError when the file is not what it should be), moved
    over ``path`` with :func:`os.replace`, then the folder fsync-ed. Raises OSError
    (a failed check as OSError too).

    A symbolic link is written through (its target is replaced, the link stays). A new
    file gets the mode the umask allows (0666 & ~umask); a replaced file keeps its mode.
    The temporary file is ``.<name>.<pid>.<random>.tmp``; :func:`clean_debris` removes
    those of dead processes, each write first removes its own target's debris, and the
    folder is noted for :func:`clean_written_folders` at the next start.
    """
    path = Path(path)
    if path.is_symlink():
        path = Path(os.path.realpath(path))
    folder = path.parent
    clean_debris(folder, path.name)
    fd, tmp = temporary_beside(path)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
            size = os.fstat(fh.fileno()).st_size
        expected = memoryview(data).nbytes
        if size != expected:  # every writer: the whole of it reached the file
            raise OSError(f"only {size:,} of {expected:,} bytes were written; the old file is kept")
        if verify is not None:
            try:
                verify(tmp)
            except (ValueError, OSError) as exc:
                raise OSError(f"the written file did not check out ({exc}); the old file is kept") from None
        try:
            mode = path.stat().st_mode & 0o777 if path.exists() else 0o666 & ~_umask()
            os.chmod(tmp, mode)
        except OSError:
            pass
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    _fsync_dir(folder)


def save_session(path, session: Session) -> Path:
    """Write ``session`` to ``path`` atomically.

    The JSON is written to a temporary file in the same folder, flushed and
    ``fsync``-ed, then moved over ``path`` with :func:`os.replace` and the folder is
    ``fsync``-ed. A crash at any moment leaves either the previous file or the new
    one, complete, never a mixture.

    Raises
    ------
    SessionError
        If the session holds something that cannot be stored (e.g. a model built in
        Python code) or the folder cannot be written.
    """
    return save_session_text(path, session_to_json(session))


def save_session_text(path, text: str) -> Path:
    """Write session JSON ``text`` atomically (:func:`write_atomically`); a failure
    is a :class:`SessionError` with a plain message."""
    path = Path(path)
    try:
        write_atomically(path, text.encode("utf-8"))
    except OSError as exc:
        raise SessionError(f"could not save the session to {path}: {exc.strerror or exc}") \
            from None
    return path


def load_session(path) -> Session:
    """Read a session file. Only JSON is parsed; nothing in the file is executed.

    Raises
    ------
    SessionError
        With a plain-language message for a missing or unreadable file, text that is
        not JSON (corrupted or cut short), a wrong format tag, a file from a newer
        Ballast, missing fields or fields of the wrong type.
    """
    path = Path(path)
    raw = read_bounded_file(path)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise SessionError(f"{path.name}: not a Ballast session (the file is not UTF-8 text)") \
            from None
    return session_from_json(text, where=path.name)


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes, hex (recorded as ``source_sha256``)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


# ============================================================================ recovery
def recovery_path(for_path, folder) -> Path:
    """Where autosaved work for the session file ``for_path`` goes inside ``folder``.

    The name combines the file's stem with a short hash of its absolute path, so two
    ``run.ballast`` files in different folders do not share a recovery file.
    ``for_path=None`` (work never saved) gives ``untitled.ballast.recovery``.
    """
    folder = Path(folder)
    if for_path is None or str(for_path) == "":
        return folder / f"untitled{RECOVERY_SUFFIX}"
    p = Path(for_path).expanduser().absolute()
    tag = hashlib.sha256(str(p).encode("utf-8")).hexdigest()[:12]
    stem = p.name[: -len(SUFFIX)] if p.name.endswith(SUFFIX) else p.name
    return folder / f"{stem}-{tag}{RECOVERY_SUFFIX}"


def write_recovery(session: Session, folder, for_path=None, *, target=None, write=None) -> Path:
    """Autosave ``session`` (atomically) into ``folder``; returns the recovery file.

    The recovery file records ``for_path`` in ``saved_as`` so the window can offer
    "recover unsaved work for <file>"; the session object is left as it was.
    ``target`` is the file to write (default :func:`recovery_path`), ``write(path,
    session)`` the writer (default :func:`save_session`; the window's keeps its view).
    """
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SessionError(f"could not create the recovery folder {folder}: "
                           f"{exc.strerror or exc}") from None
    target = target or recovery_path(for_path, folder)
    before = session.saved_as
    session.saved_as = "" if for_path is None else str(Path(for_path).expanduser().absolute())
    try:
        return (write or save_session)(target, session)
    finally:
        session.saved_as = before


def find_recovery(folder) -> list[Path]:
    """All recovery files in ``folder``, newest first (an absent folder gives [])."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    files = [p for p in folder.iterdir() if p.name.endswith(RECOVERY_SUFFIX) and p.is_file()]
    return sorted(files, key=lambda p: p.stat().st_mtime, reverse=True)


def recovery_for(folder, for_path=None) -> Path | None:
    """The recovery file for ``for_path`` if one exists and is newer than that file."""
    rp = recovery_path(for_path, folder)
    if not rp.is_file():
        return None
    if for_path is not None and Path(for_path).is_file():
        if Path(for_path).stat().st_mtime > rp.stat().st_mtime:
            return None
    return rp


def discard_recovery(path) -> None:
    """Delete a recovery file (after the work was saved or the offer declined)."""
    try:
        Path(path).unlink()
    except FileNotFoundError:
        pass


# ============================================================================ per-window recovery
# Each running window owns one recovery file, ``window-<pid>-<token>.ballast.recovery``,
# and beside it a lock ``window-<pid>-<token>.ballast.lock`` holding the owner's process
# id, its start time (Linux: /proc/<pid>/stat) and host name, written before the first
# recovery file. A recovery file is *orphaned* when its owner is gone (no lock, a dead
# process, or a process id reused by another program); only orphaned files are offered
# at start, and a window only ever deletes its own file (or an orphan it has restored or
# the user declined). Files of another host (a shared folder) are never touched.
LOCK_SUFFIX = ".ballast.lock"
DAMAGED_SUFFIX = ".damaged"


def process_start_time(pid: int) -> str:
    """The start time of process ``pid`` in clock ticks since boot ("" where unknown)."""
    try:
        with open(f"/proc/{int(pid)}/stat", "rb") as fh:
            stat_line = fh.read().decode("ascii", "replace")
        return stat_line.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError, ValueError):
        return ""


def process_alive(pid: int, start: str = "") -> bool:
    """True when process ``pid`` runs (and, when ``start`` is given and known, is the
    same process that had that start time: a reused process id is not the owner)."""
    try:
        pid = int(pid)
    except (TypeError, ValueError):
        return False
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # exists, owned by someone else
    except OSError:
        return False
    if start:
        now = process_start_time(pid)
        if now and now != str(start):
            return False
    return True


def _host() -> str:
    import socket

    try:
        return socket.gethostname()
    except OSError:
        return ""


def new_recovery_owner() -> str:
    """An owner tag for one window: ``<pid>-<8 hex digits>``."""
    import secrets

    return f"{os.getpid()}-{secrets.token_hex(4)}"


def window_recovery_path(folder, owner: str) -> Path:
    """The recovery file of the window with owner tag ``owner``."""
    return Path(folder) / f"window-{owner}{RECOVERY_SUFFIX}"


def recovery_lock_path(recovery_file) -> Path:
    p = Path(recovery_file)
    stem = p.name[: -len(RECOVERY_SUFFIX)] if p.name.endswith(RECOVERY_SUFFIX) else p.name
    return p.with_name(stem + LOCK_SUFFIX)


def claim_recovery(recovery_file) -> Path:
    """Write the lock of ``recovery_file`` for this process (before the file itself)."""
    lock = recovery_lock_path(recovery_file)
    lock.parent.mkdir(parents=True, exist_ok=True)
    info = {"pid": os.getpid(), "start": process_start_time(os.getpid()), "host": _host()}
    write_atomically(lock, json.dumps(info).encode("utf-8"))
    return lock


def recovery_owner_alive(recovery_file) -> bool:
    """True when the window that owns ``recovery_file`` still runs (or may: another host)."""
    lock = recovery_lock_path(recovery_file)
    try:
        info = load_json_bounded(read_bounded_file(lock, "lock file", 4096).decode("utf-8", "replace"), "lock")
    except SessionError:
        return False  # no lock (an older Ballast, or a crash before it): orphaned
    if not isinstance(info, dict):
        return False
    host = info.get("host")
    if isinstance(host, str) and host and host != _host():
        return True  # cannot check a process on another machine: leave its files alone
    return process_alive(info.get("pid", 0), str(info.get("start", "") or ""))


def orphaned_recovery(folder) -> list[Path]:
    """Recovery files in ``folder`` whose owner is gone, newest first."""
    return [p for p in find_recovery(folder) if not recovery_owner_alive(p)]


def take_orphan(recovery_file, owner: str) -> Path | None:
    """Claim the orphaned ``recovery_file`` for the window with owner tag ``owner``, so
    that no other window offers it too; returns the file under its new name, or None
    when it is not (or no longer) an orphan: another window took it first.

    The claim is one atomic rename into a name of this window's
    (``window-<owner>-taken-<random>``), whose lock naming this process is written
    first: of two windows starting at the same instant, exactly one rename succeeds and
    the other finds the file gone; the new name is never seen as an orphan while this
    process runs (if it dies before dealing with the file, the file is an orphan again,
    nothing is lost). The dead owner's lock is removed after the rename.
    """
    import secrets

    src = Path(recovery_file)
    if recovery_owner_alive(src):
        return None
    target = window_recovery_path(src.parent, f"{owner}-taken-{secrets.token_hex(4)}")
    lock = claim_recovery(target)
    try:
        os.rename(src, target)  # atomic: one claimant wins, the others get FileNotFoundError
    except OSError:
        try:
            lock.unlink()
        except OSError:
            pass
        return None
    try:
        recovery_lock_path(src).unlink()
    except OSError:
        pass
    return target


def give_back_orphan(recovery_file) -> None:
    """Drop this process's lock of a taken orphan (kept, offered again at a later start)."""
    try:
        recovery_lock_path(recovery_file).unlink()
    except OSError:
        pass


def release_recovery(recovery_file) -> None:
    """Delete a recovery file and its lock (the owner's own, or an orphan dealt with)."""
    for p in (Path(recovery_file), recovery_lock_path(recovery_file)):
        try:
            p.unlink()
        except FileNotFoundError:
            pass
        except OSError:
            pass


def set_aside_damaged(recovery_file) -> Path | None:
    """Rename an unreadable recovery file to ``<name>.damaged`` (kept for inspection,
    never offered again) and remove its lock; returns the new path (None on failure)."""
    p = Path(recovery_file)
    target = p.with_name(p.name + DAMAGED_SUFFIX)
    try:
        os.replace(p, target)
    except OSError:
        return None
    try:
        recovery_lock_path(p).unlink()
    except OSError:
        pass
    return target


#: Temporary files of :func:`write_atomically`: ``.<target name>.<pid>.<8 random>.tmp``
#: (the random part is what :func:`tempfile.mkstemp` makes: lower-case letters, digits, _).
_DEBRIS_RE = re.compile(r"^\.(?P<name>.+)\.(?P<pid>\d+)\.[a-z0-9_]{8}\.tmp$")
#: Debris younger than this is left alone even when its process id does not run here:
#: a writer on another machine that shares the folder may still be writing it.
DEBRIS_MIN_AGE_S = 60.0


def clean_debris(folder, name: str | None = None, min_age: float | None = None) -> list[Path]:
    """Remove temporary files that :func:`write_atomically` left behind in ``folder``
    when its process died: regular files named ``.<name>.<pid>.<random>.tmp`` whose
    process no longer runs and that are older than ``min_age`` seconds (default
    DEBRIS_MIN_AGE_S). Nothing else is touched: not other names, not folders or links,
    not the files of running processes. ``name`` limits the search to the debris of
    one target file. Returns what was removed."""
    import time

    folder = Path(folder)
    min_age = DEBRIS_MIN_AGE_S if min_age is None else float(min_age)
    now = time.time()
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        m = _DEBRIS_RE.match(entry.name)
        if not m or (name is not None and m.group("name") != name):
            continue
        pid = int(m.group("pid"))
        if pid == os.getpid() or process_alive(pid):
            continue
        try:
            st = entry.stat(follow_symlinks=False)
            if not _stat.S_ISREG(st.st_mode) or now - st.st_mtime < min_age:
                continue
            os.unlink(entry.path)
            removed.append(Path(entry.path))
        except OSError:
            pass
    return removed


# Folders written to: write_atomically notes each folder it writes into in a small text
# file (one absolute folder a line) when the program names one with
# note_written_folders_in(); at the next start clean_written_folders() removes the debris
# of crashed writers there (a killed PDF export leaves its printer's temporary file).
_WRITTEN_FOLDERS: dict = {"file": None, "noted": set()}
MAX_WRITTEN_FOLDERS = 200
#: the window's list, in its recovery folder
WRITTEN_FOLDERS_NAME = "written-folders.txt"


def note_written_folders_in(registry) -> None:
    """Note every folder :func:`write_atomically` writes into in ``registry`` (None: stop)."""
    _WRITTEN_FOLDERS["file"] = None if registry is None else Path(registry)
    _WRITTEN_FOLDERS["noted"] = set()


def _note_folder(folder: Path) -> None:
    registry = _WRITTEN_FOLDERS["file"]
    key = str(Path(folder).absolute())
    if registry is None or key in _WRITTEN_FOLDERS["noted"] or "\n" in key:
        return
    _WRITTEN_FOLDERS["noted"].add(key)
    try:
        known = _written_folders(registry)
        if key in known:
            return
        registry.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(registry, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o666)
        try:
            os.write(fd, (key + "\n").encode("utf-8", "surrogateescape"))
        finally:
            os.close(fd)
    except OSError:
        pass  # advisory: a write never fails because its folder could not be noted


def _written_folders(registry: Path) -> list[str]:
    try:
        raw = read_bounded_file(registry, "list of written folders", 1 << 20)
    except SessionError:
        return []
    lines = raw.decode("utf-8", "surrogateescape").splitlines()
    return list(dict.fromkeys(s for s in lines if s and os.path.isabs(s)))


def clean_written_folders(registry, min_age: float | None = None) -> list[Path]:
    """Remove the debris of dead writers (:func:`clean_debris`) in every folder noted in
    ``registry``; folders that no longer exist are dropped from it, and it keeps the
    MAX_WRITTEN_FOLDERS most recent. Returns what was removed."""
    registry = Path(registry)
    folders = _written_folders(registry)
    removed: list[Path] = []
    keep = []
    for f in folders:
        if os.path.isdir(f):
            removed += clean_debris(f, min_age=min_age)
            keep.append(f)
    keep = keep[-MAX_WRITTEN_FOLDERS:]
    if keep != folders:
        try:
            write_atomically(registry, "".join(k + "\n" for k in keep).encode("utf-8", "surrogateescape"))
        except OSError:
            pass
    return removed
