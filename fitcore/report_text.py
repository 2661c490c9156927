"""Report text built from a :class:`FitResult`: the one place for every sentence.

:func:`estimates_text`, :func:`correlation_text`, :func:`points_csv` and
:func:`curve_csv` write a fit's estimates, correlations, per-point table and fitted
curve as plain text, TSV, Markdown, LaTeX (plain or siunitx) or HTML. Every estimates
text carries a *method* block (:func:`method_lines`) that states how the numbers were
obtained, where the data came from (:func:`data_lines`) and the one :data:`CAUTION`.
:func:`method_statement` says the same in one paragraph for the report.

Numbers are formatted by :mod:`fitcore.numbers`; nothing here imports Qt.
"""
from __future__ import annotations

import csv
import html
import io
import math
import re
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from . import __version__
from .numbers import (format_correlation, format_interval, format_uncertainty, format_value,
                      held_value_text, interval_limits)
from .numbers import full_precision as _full
from .units import resolve_unit
from .weighting import rule_text

__all__ = [
    "CAUTION",
    "FORMATS",
    "estimates_text",
    "correlation_text",
    "method_lines",
    "method_statement",
    "estimate_cells",
    "signoff_lines",
    "signoff_html",
    "siunitx_unit",
    "DataRecord",
    "data_lines",
    "point_label",
    "loss_title",
    "NO_REASON",
    "HELD_NOTE",
    "loss_label",
    "alpha_text",
    "scale_text",
    "convergence_text",
    "excluded_points_text",
    "resolve_unit",
    "point_status",
    "points_csv",
    "curve_csv",
]

#: Output formats understood by :func:`estimates_text` and :func:`correlation_text`.
FORMATS = ("plain", "tsv", "markdown", "latex", "siunitx", "html")

#: The one caution text: printed by the window, every copy and the report whenever the
#: fit down-weighted or excluded points, or used a robust loss.
CAUTION = (
    "Robust weights are not a licence to discard data; follow your laboratory's "
    "documented procedures and the applicable standard for regulated or clinical work."
)


def loss_title(name: str) -> str:
    """The human title of a loss (``"Huber"``, ``"Tukey biweight"``) from the loss
    registry (``fitcore.losses.LOSSES``); an unknown name is an error, never printed
    as it is."""
    # here, not at the top: fitcore.report (format_value & co.) loads without scipy
    from .losses import LOSSES
    from .losses import loss_title as registry_title

    name = str(name)
    if name not in LOSSES:
        raise ValueError(f"unknown loss {name!r}: no title to print")
    return registry_title(name)


def loss_label(res, *, shape: bool = True) -> str:
    """The loss in words: its title, tuning constant and shape (``"Huber; tuning
    constant 1.345 × scale"``), never its internal name. The adaptive loss has no
    tuning constant to state (its width is the fitted scale itself). ``shape=False``
    leaves the shape out (for a summary that states it on a line of its own)."""
    name = str(res.loss)
    parts = [loss_title(name)]
    if (name != "adaptive" and res.tuning is not None
            and math.isfinite(float(res.tuning))):
        parts.append(f"tuning constant {float(res.tuning):.6g} × scale")
    if shape and res.alpha is not None:
        parts.append(f"shape alpha = {alpha_text(res)}")
    return "; ".join(parts)


def scale_text(res, y_unit: str = "") -> str:
    """The scale with its unit and how it was obtained: ``"0.0019 mV, normalised MAD
    of the residuals, ..."``; in units of sigma when sigma are absolute."""
    scale_unit = ""
    if res.sigma is None or res.sigma_mode == "none":
        scale_unit = f" {y_unit}" if y_unit else ""
    elif res.sigma_mode == "absolute":
        scale_unit = " (in units of sigma)"
    scale = f"{float(res.scale):.6g}{scale_unit}"
    if res.scale_method:
        scale += f", {res.scale_method}"
    return scale


def alpha_text(res) -> str:
    """The shape alpha of a general or adaptive fit in words: ``"1, fixed"``, a fitted
    ``"0.055(59), fitted"``, or at the end of the adaptive loss's range ``"0, fitted at
    the end of its range 0 to 2, no standard uncertainty"``; ``""`` for a loss without
    a shape."""
    if res.alpha is None:
        return ""
    alpha = float(res.alpha)
    if str(res.loss) != "adaptive":
        return f"{alpha:.6g}, fixed"
    se = res.alpha_stderr
    if se is not None and math.isfinite(float(se)) and float(se) > 0:
        return f"{format_value(alpha, float(se))}, fitted"
    if alpha <= 0.0 or alpha >= 2.0:
        return f"{alpha:.6g}, fitted at the end of its range 0 to 2, no standard uncertainty"
    return f"{alpha:.6g}, fitted, no standard uncertainty"


def _version() -> str:
    return str(__version__)


def _is_robust(res) -> bool:
    return str(res.loss) != "l2"


def _needs_caution(res) -> bool:
    return _is_robust(res) or res.n_excluded > 0 or res.n_downweighted > 0


class _Items(str):
    """Text joined from ``items`` with ``"; "``, keeping the items (for layouts that
    put one item a line)."""

    items: tuple[str, ...]

    def __new__(cls, items):
        obj = super().__new__(cls, "; ".join(items))
        obj.items = tuple(items)
        return obj


#: excluded points listed by name in a report's method block; the rest are counted
MAX_LISTED_EXCLUSIONS = 20


def _g10(x) -> str:
    x = float(x)
    return _full(x) if not math.isfinite(x) else f"{x:.10g}"


def _one_line(text) -> str:
    return " ".join(str(text).split())


#: written for an exclusion whose reason was not given
NO_REASON = "NO REASON GIVEN"


def point_label(i: int, rows=None) -> str:
    """The one identifier of point ``i`` (0-based) in every text: ``"row 13"``, its
    row in the data file (as a spreadsheet shows it), when the file rows are known
    (``rows[i]``); otherwise ``"point 7"`` (its place in the data, index + 1)."""
    if rows is not None:
        try:
            r = rows[int(i)]
        except (IndexError, TypeError):
            r = None
        if r is not None:
            return f"row {int(r)}"
    return f"point {int(i) + 1}"


def excluded_points_text(res, reasons: Mapping[int, str] | None = None,
                         limit: int = MAX_LISTED_EXCLUSIONS, *, rows=None) -> str:
    """The excluded points, compactly: ``"row 9 (x = 3.0, y = 17.5): pipette bubble; ..."``.

    Each point is named by :func:`point_label` (its file row when ``rows``, the file
    row of every point, is given); x and y are given to 10 significant digits (as in
    the report's exclusion record). ``reasons`` maps a point index (0-based) to the
    analyst's reason; with ``reasons`` given a point without one is marked
    :data:`NO_REASON`, without it no reason part is written. At most ``limit`` points
    are listed, then ``"and N more"``. Returns ``"none"`` when no point is excluded.
    The result is a ``str`` whose ``items`` attribute holds the entries.
    """
    idx = [int(i) for i in np.flatnonzero(np.asarray(res.excluded, dtype=bool))]
    if not idx:
        return _Items(["none"])
    items = []
    for i in idx[: max(int(limit), 0)]:
        item = f"{point_label(i, rows)} (x = {_g10(res.x[i])}, y = {_g10(res.y[i])})"
        if reasons is not None:
            reason = _one_line(reasons.get(i, "") or "")
            item += f": {reason or NO_REASON}"
        items.append(item)
    rest = len(idx) - len(items)
    if rest > 0:
        items.append(f"and {rest} more")
    return _Items(items)


def convergence_text(res) -> str:
    """``"yes"``, or ``"yes (exact fit)"`` when the solver's message says more than
    "converged"; ``"NO (did not converge in 200 iterations)"`` when it did not."""
    msg = _one_line(res.message or "")
    if res.converged:
        if msg.lower() in ("", "converged"):
            return "yes"
        if msg.lower().startswith("converged (") and msg.endswith(")"):
            return "yes " + msg[len("converged "):]
        return f"yes ({msg})"
    return f"NO ({msg})" if msg else "NO"


#: said wherever a parameter was held: the uncertainties are not unconditional
HELD_NOTE = ("; held values are assumptions: every uncertainty and interval is conditional "
             "on them (their own uncertainty is not included)")

_SHEET_NOTE = re.compile(r"^read sheet '(.*)' of \d+")


@dataclass(frozen=True)
class DataRecord:
    """Where the data of a fit came from and how they were read, for the record.

    Built by :meth:`from_data` from a ``fitcore.work.DataSet`` or a
    ``fitcore.io.Selection`` (``source``, ``x_name``, ``y_name``, ``sigma_name``,
    ``x_unit``, ``y_unit``, ``notes``, ``source_rows``, ``source_sha256``/``sha256``,
    ``columns["sheet"]``); every field may be blank.

    Attributes
    ----------
    source : str
        File path, or a short description (``"clipboard"``).
    sha256 : str
        SHA-256 of the file bytes as read.
    sheet : str
        The sheet read from a workbook ("" for a text file).
    x_column, y_column, sigma_column : str
        The columns chosen (names as in the file, without units).
    x_unit, y_unit : str
        Units split off the headers.
    n_points : int
        Points taken into the fit's data (before any exclusion).
    notes : tuple of str
        What the reader decided or left out, with file rows and why (decoding,
        decimal comma, rows that held no number...).
    file_rows : tuple of int or None
        The file row of each point, or None when unknown.
    """

    source: str = ""
    sha256: str = ""
    sheet: str = ""
    x_column: str = ""
    y_column: str = ""
    sigma_column: str = ""
    x_unit: str = ""
    y_unit: str = ""
    n_points: int = 0
    notes: tuple = ()
    file_rows: tuple | None = None

    @classmethod
    def from_data(cls, data, *, sha256: str = "", sheet: str = "") -> "DataRecord":
        """A record from a data object (see the class notes); ``sha256``/``sheet``
        override what the object carries."""
        notes = tuple(str(n) for n in (getattr(data, "notes", ()) or ()))
        columns = getattr(data, "columns", None)
        if not sheet:
            sheet = str(getattr(data, "sheet", "") or "")
        if not sheet and isinstance(columns, Mapping):  # fitcore.work.DataSet
            sheet = str(columns.get("sheet", "") or "")
        if not sheet:  # the reader names the sheet it read in its first note
            for n in notes:
                m = _SHEET_NOTE.match(n)
                if m:
                    sheet = m.group(1)
                    break
        rows = getattr(data, "source_rows", None)
        x = getattr(data, "x", ())
        return cls(
            source=str(getattr(data, "source", "") or ""),
            sha256=str(sha256 or getattr(data, "sha256", "")
                       or getattr(data, "source_sha256", "") or ""),
            sheet=sheet,
            x_column=str(getattr(data, "x_name", "") or ""),
            y_column=str(getattr(data, "y_name", "") or ""),
            sigma_column=str(getattr(data, "sigma_name", "") or ""),
            x_unit=str(getattr(data, "x_unit", "") or ""),
            y_unit=str(getattr(data, "y_unit", "") or ""),
            n_points=int(len(x)),
            notes=notes,
            file_rows=None if rows is None else tuple(int(r) for r in np.asarray(rows).ravel()),
        )

    def column_text(self) -> str:
        """``"x = Time (s), y = Signal (mV), u(y) = sd (mV)"``."""
        def one(name, unit):
            return f"{name} ({unit})" if unit else name

        parts = [f"x = {one(self.x_column or 'x', self.x_unit)}",
                 f"y = {one(self.y_column or 'y', self.y_unit)}"]
        if self.sigma_column:
            parts.append(f"standard uncertainty of y = {one(self.sigma_column, self.y_unit)}")
        return ", ".join(parts)


def data_lines(data: DataRecord) -> list[tuple[str, str]]:
    """The data part of a method block as ``(label, text)`` pairs: data file, sheet,
    SHA-256, columns and units, points read, and every reading note (rows left out
    and why, decoding, decimal comma)."""
    out = [("data", data.source or "(not from a file)")]
    if data.sheet:
        out.append(("sheet", data.sheet))
    if data.sha256:
        out.append(("SHA-256", data.sha256))
    out.append(("columns", data.column_text()))
    rows = ""
    if data.file_rows:
        rows = f" (file rows {min(data.file_rows)} to {max(data.file_rows)})"
    out.append(("points read", f"{data.n_points}{rows}"))
    notes = [_one_line(n) for n in data.notes if str(n).strip()]
    out.append(("reading notes", _Items(notes) if notes else "none"))
    return out


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def method_statement(res, level: float = 0.95, *, y_unit: str = "",
                     data: DataRecord | None = None) -> str:
    """How the estimates were obtained, in plain words (one paragraph, for the report).

    Says the same as :func:`method_lines` (the loss by :func:`loss_label`), in
    sentences: the model and the points it was fitted to, the loss, sigma, the scale,
    exclusions, down-weighting, held parameters (and that uncertainties are
    conditional on them), the covariance and interval recipe, convergence and the
    Ballast version.
    """
    m = res.model
    model = m.title or m.name
    if m.formula and m.formula != model:
        model = f"{model}, {m.formula}"
    n_total = len(res.x)
    source = data.source if data is not None else ""
    where = f" in {source.replace(chr(92), '/').rsplit('/', 1)[-1]}" if source else ""
    if str(res.loss) == "l2":
        how = "least squares (no robust weighting)"
    else:  # the words of loss_label, as a phrase: "the Huber loss (tuning constant ...)"
        from .losses import loss_phrase  # here: see loss_title

        loss_title(res.loss)  # an unknown loss is an error here too
        _title, *rest = loss_label(res).split("; ")
        how = loss_phrase(str(res.loss)) + (f" ({'; '.join(rest)})" if rest else "")
    parts = [f"The model ({model}) was fitted to {res.n_used} of the "
             f"{_plural(n_total, 'point')}{where} by minimising {how}."]
    if res.sigma is not None and res.sigma_mode != "none":
        parts.append("Each residual was divided by the standard uncertainty given for its y "
                     + ("(taken as known, absolute)." if res.sigma_mode == "absolute"
                        else "(taken as relative weights only)."))
    unit = f" {y_unit}" if y_unit and (res.sigma is None or res.sigma_mode == "none") else ""
    if _is_robust(res):
        parts.append(f"The residual scale was {float(res.scale):.4g}{unit} "
                     f"({res.scale_method}).")
    else:
        parts.append(f"The residual standard deviation was {float(res.scale):.4g}{unit}.")
    if res.n_excluded:
        parts.append(f"{_plural(res.n_excluded, 'point')} "
                     f"{'was' if res.n_excluded == 1 else 'were'} excluded by the analyst; "
                     "each is listed with its reason and time in the exclusion record.")
    else:
        parts.append("No point was excluded by the analyst.")
    if _is_robust(res):
        parts.append(f"The loss gave {_plural(res.n_downweighted, 'point')} a weight "
                     "below 0.5.")
    if res.fixed:
        parts.append("Held at given values: "
                     + ", ".join(f"{k} = {_full(v)}" for k, v in res.fixed.items())
                     + "; every uncertainty and interval is conditional on these values.")
    t = res.t_quantile(level)
    pct = f"{100 * level:.6g} %"
    cov = res.covariance_recipe or "the default recipe"
    if math.isfinite(t):
        parts.append(f"Standard uncertainties come from the covariance ({cov}); intervals are "
                     f"two-sided {pct} Student-t intervals with {res.dof} degrees of freedom "
                     f"(t = {t:.4g}).")
    else:
        parts.append(f"Standard uncertainties come from the covariance ({cov}); no interval "
                     "can be given (no degrees of freedom left).")
    if not res.converged:
        parts.append(f"WARNING: the fit did not converge ({res.message}).")
    parts.append(f"Computed with Ballast {_version()}.")
    return " ".join(parts)


def method_lines(res, level: float = 0.95, *, y_unit: str = "",
                 reasons: Mapping[int, str] | None = None,
                 data: "DataRecord | None" = None) -> list[tuple[str, str]]:
    """The method block as ``(label, text)`` pairs, in the order printed.

    States the model, loss (with tuning constant and shape), scale and how it was
    obtained, points used/excluded/down-weighted, degrees of freedom, covariance
    recipe, confidence level with the t quantile, held parameters, the excluded points
    (:func:`excluded_points_text`, with the analyst's ``reasons`` when given),
    convergence, any warnings (:attr:`FitResult.warnings`) and the Ballast version.
    With ``data`` (a :class:`DataRecord`) the block starts with where the data came
    from and how they were read (:func:`data_lines`), and points are named by their
    file rows.
    """
    out = data_lines(data) if data is not None else []
    rows = data.file_rows if data is not None else None
    m = res.model
    title = m.title or m.name
    model = f"{title}: {m.formula}" if m.formula and m.formula != title else title
    out += [("model", model), ("loss", loss_label(res))]
    out.append(("scale", scale_text(res, y_unit)))
    if res.sigma is not None and res.sigma_mode != "none":
        meaning = {"absolute": "absolute standard uncertainties of y",
                   "relative": "relative weights only (scaled by the fit)"}.get(
            res.sigma_mode, res.sigma_mode)
        out.append(("sigma", meaning))
    rule = (getattr(res, "info", None) or {}).get("weighting")
    if rule:  # a weighting rule of fitcore.weighting (issue 14)
        out.append(("weighting", rule_text(rule)))
    out.append((
        "points",
        f"{res.n_used} used, {res.n_excluded} excluded by the analyst, "
        f"{res.n_downweighted} down-weighted by the loss (weight < 0.5)",
    ))
    out.append(("degrees of freedom", f"{res.dof}"))
    out.append(("covariance", res.covariance_recipe or "not stated"))
    t = res.t_quantile(level)
    pct = f"{100 * level:.6g} %"
    if math.isfinite(t):
        out.append(("confidence level",
                    f"{pct} two-sided, t = {t:.6g} (Student, {res.dof} degrees of freedom)"))
    else:
        out.append(("confidence level", f"{pct}: no interval (no degrees of freedom left)"))
    if res.fixed:
        held = ", ".join(f"{k} = {_full(v)}" for k, v in res.fixed.items())
        out.append(("held parameters", held + HELD_NOTE))
    if res.n_excluded:
        out.append(("excluded points", excluded_points_text(res, reasons, rows=rows)))
    out.append(("converged", convergence_text(res)))
    for w in getattr(res, "warnings", ()):
        out.append(("warning", w))
    out.append(("software", f"Ballast {_version()} (fitcore)"))
    return out


class _Row:
    __slots__ = ("name", "value", "u", "low", "high", "unit", "held", "derived", "note",
                 "from_held")

    def __init__(self, name, value, u, low, high, unit, held=False, derived=False, note="",
                 from_held=False):
        self.name, self.value, self.u = name, float(value), float(u)
        self.low, self.high, self.unit = float(low), float(high), unit
        self.held, self.derived, self.note = held, derived, note
        self.from_held = from_held

    @property
    def assumed(self) -> bool:
        """Held, or derived from held values only: no uncertainty and no interval."""
        return self.held or self.from_held


def _rows(res, level, units, x_unit, y_unit) -> list[_Row]:
    units = dict(units or {})
    t = res.t_quantile(level)
    rows = []
    ci = res.intervals(level)
    for i, name in enumerate(res.param_names):
        unit = units.get(name)
        if unit is None:
            unit = resolve_unit(res.model.units.get(name, ""), x_unit, y_unit)
        held = name in res.fixed
        low, high = (float(ci[i, 0]), float(ci[i, 1])) if not held else (math.nan, math.nan)
        note = res.model.descriptions.get(name, "")
        rows.append(_Row(name, res.values[i], 0.0 if held else res.stderr[i], low, high,
                         unit, held=held, note=note))
    for name, v, u, d in res.derived_values():
        unit = units.get(name)
        if unit is None:
            unit = resolve_unit(d.unit, x_unit, y_unit)
        # a quantity computed from held parameters only has u = 0 by propagation: it
        # inherits their assumption, it is not exact
        from_held = bool(res.fixed) and float(u) == 0.0
        rows.append(_Row(name, v, u, v - t * u, v + t * u, unit, derived=True,
                         note=d.description, from_held=from_held))
    return rows


#: the estimate text of a quantity computed from held values only
FROM_HELD = "from held values"


def _estimate(row: _Row, style="paren", rich=False, full=False) -> str:
    if full:
        if row.held:
            return f"held at {_full(row.value)}"
        if row.from_held:
            return f"{_full(row.value)} ({FROM_HELD})"
        return f"{_full(row.value)} ± {_full(row.u)}"
    if row.held:
        return f"held at {held_value_text(row.value, rich=rich)}"
    if row.from_held:
        return f"{held_value_text(row.value, rich=rich)} ({FROM_HELD})"
    return format_value(row.value, row.u, style, rich=rich)


def _no_interval(row: _Row) -> str:
    """What an interval cell says when there is none."""
    if row.held:
        return "none (held)"
    if row.from_held:
        return f"none ({FROM_HELD})"
    return ""


def _ci_pair(row: _Row, full=False, rich=False, exponent=None) -> tuple[str, str]:
    """The interval limits of a row, by the one rule of :func:`interval_limits`."""
    if row.assumed or not (math.isfinite(row.low) and math.isfinite(row.high)):
        return "", ""
    if full:
        return _full(row.low), _full(row.high)
    return interval_limits(row.low, row.high, row.value, row.u, rich=rich, exponent=exponent)


def estimate_cells(res, level: float = 0.95, *, x_unit: str = "", y_unit: str = "",
                   units: Mapping[str, str] | None = None) -> list[dict]:
    """The estimates as the cells of a table on screen, worded as in every copy.

    One dict per parameter, then per derived quantity, with the keys ``name``,
    ``estimate`` (``"4.213(25)"``, ``"held at 28.77"``, ``"19.94 (from held
    values)"``), ``uncertainty`` (:func:`format_uncertainty`; ``""`` for held values),
    ``interval`` (``"[lo, hi]"`` by :func:`format_interval`, or ``""``), ``unit``,
    ``kind`` (``"free"``, ``"held"``, ``"from held"``) and ``derived`` (bool).
    """
    out = []
    for r in _rows(res, float(level), units, x_unit, y_unit):
        if r.assumed:
            unc, iv = "", ""
        else:
            unc = format_uncertainty(r.value, r.u)
            iv = (format_interval(r.low, r.high, r.value, r.u)
                  if math.isfinite(r.low) and math.isfinite(r.high) else "")
        out.append({"name": r.name, "estimate": _estimate(r), "uncertainty": unc,
                    "interval": iv, "unit": r.unit, "derived": r.derived,
                    "kind": "held" if r.held else ("from held" if r.from_held else "free")})
    return out


# ============================================================================ escaping
_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
    "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}",
    # outside math mode the old OT1 font encoding prints "<" and ">" as inverted marks
    "<": r"\textless{}", ">": r"\textgreater{}",
}


def _tex(s: str) -> str:
    """Escape text for LaTeX (outside math mode)."""
    return "".join(_LATEX_SPECIAL.get(c, c) for c in str(s))


def _md(s: str) -> str:
    """Escape text for a Markdown table cell."""
    return re.sub(r"([\\`*_|<>\[\]])", r"\\\1", str(s))


def _h(s: str) -> str:
    return html.escape(str(s), quote=True)


# ============================================================================ estimates
def estimates_text(
    res,
    fmt: str = "plain",
    *,
    level: float = 0.95,
    units: Mapping[str, str] | None = None,
    full_precision: bool = False,
    x_unit: str = "",
    y_unit: str = "",
    reasons: Mapping[int, str] | None = None,
    data: DataRecord | None = None,
) -> str:
    """The estimates of a fit, with a method block, ready to paste into a report.

    Parameters
    ----------
    res : FitResult
        The fit.
    fmt : {"plain", "tsv", "markdown", "latex", "siunitx", "html"}
        ``"plain"``: one estimate a line (``tau = 4.213(25) s``). ``"tsv"``: a header
        row, then value, standard uncertainty, unit and interval in separate cells (for
        spreadsheets; value and uncertainty cells always hold plain numbers or
        nothing), then the method as label/text rows. ``"markdown"``: a table.
        ``"latex"``: a plain ``tabular``; ``"siunitx"``: the same with siunitx v3
        commands, ``\\qty{value(unc)}{unit}`` and ``\\num{}``. ``"html"``: a
        ``<table>`` for rich-text editors.
    level : float
        Confidence level of the two-sided intervals (Student t with ``res.dof``).
    units : dict, optional
        Unit text per parameter (or derived quantity) name; overrides the model's.
    full_precision : bool
        Print values and uncertainties at full round-trip precision instead of
        rounding them per GUM (the rounded form is the default).
    x_unit, y_unit : str
        Units of the data, substituted into the model's parameter units (``"y/x"``).
        Taken from ``data`` when not given.
    reasons : dict, optional
        The analyst's reason per excluded point (0-based index), listed with the
        excluded points in the method block.
    data : DataRecord, optional
        Where the data came from and how they were read: stated at the top of the
        method block, and the excluded points are named by their file rows.

    Returns
    -------
    str

    Notes
    -----
    Values are rounded with :func:`format_value`; interval limits by
    :func:`interval_limits` (the last decimal and power of ten of their estimate).
    Held parameters read ``held at 28.77`` (:func:`held_value_text`) and get no
    interval; the method block says that uncertainties are conditional on them.
    Derived quantities carry uncertainties propagated by the delta method from the
    full covariance, and intervals ``value ± t·u`` with the same t; one computed from
    held parameters only reads ``(from held values)``.
    """
    if fmt not in FORMATS:
        raise ValueError(f"unknown report format {fmt!r}; choose one of {', '.join(FORMATS)}")
    if not (0.0 < float(level) < 1.0):
        raise ValueError(f"confidence level must lie between 0 and 1 (got {level!r})")
    if data is not None:
        x_unit = x_unit or data.x_unit
        y_unit = y_unit or data.y_unit
    rows = _rows(res, float(level), units, x_unit, y_unit)
    meth = method_lines(res, float(level), y_unit=y_unit, reasons=reasons, data=data)
    meth.append(("derived quantities",
                 "uncertainties propagated from the covariance (delta method)"
                 if any(r.derived for r in rows) else "none"))
    caution = CAUTION if _needs_caution(res) else ""
    pct = f"{100 * float(level):.6g} %"
    fp = bool(full_precision)
    return {
        "plain": _plain, "tsv": _tsv, "markdown": _markdown, "latex": _latex,
        "siunitx": _siunitx, "html": _html,
    }[fmt](rows, meth, caution, pct, fp)


def _plain(rows, meth, caution, pct, fp):
    lines = ["Estimates (standard uncertainty in parentheses, in units of the last digit)"]
    width = max((len(r.name) for r in rows), default=1)
    for kind in (False, True):
        sel = [r for r in rows if r.derived == kind]
        if not sel:
            continue
        if kind:
            lines.append("Derived quantities")
        for r in sel:
            est = _estimate(r, full=fp)
            unit = f" {r.unit}" if r.unit else ""
            lo, hi = _ci_pair(r, fp)
            ci = f"   {pct} CI {lo} to {hi}{unit}" if lo else ""
            eq = " " if r.held else " = "  # "tau  held at 28.77 s"
            lines.append(f"  {r.name.ljust(width)}{eq}{est}{unit}{ci}")
    lines.append("Method")
    lw = max(len(k) for k, _ in meth)
    for k, v in meth:
        items = getattr(v, "items", None) or (v,)
        lines.append(f"  {k.ljust(lw)}  {items[0]}")
        lines += [f"  {'':{lw}}  {it}" for it in items[1:]]
    if caution:
        lines += ["", caution]
    return "\n".join(lines) + "\n"


def _tsv_cell(s) -> str:
    return str(s).replace("\t", " ").replace("\r", " ").replace("\n", " ")


def _tsv_numbers(r: _Row, fp: bool) -> tuple[str, str, str]:
    """``(value cell, uncertainty cell, note)``: the two cells are plain numbers (or
    empty), never words, so that a spreadsheet reads them as numbers."""
    if r.assumed:  # rounded as the plain text rounds it (held at 28.77); every digit in fp
        value = _full(r.value) if fp else held_value_text(r.value)
        return value, "", "held" if r.held else FROM_HELD
    if not math.isfinite(r.u):
        return _full(r.value), "", "uncertainty unknown"
    if r.u == 0.0:
        return _full(r.value), "0", "exact"
    if fp or not math.isfinite(r.value):
        return _full(r.value), _full(r.u), ""
    # the rounded pair: the same digits as the paren form, in two cells
    pm = format_value(r.value, r.u, "pm", exponent=0)
    v, _, u = pm.partition(" ± ")
    return v, u, ""


def _tsv(rows, meth, caution, pct, fp):
    head = ["parameter", "value", "standard uncertainty", "unit",
            f"{pct} CI low", f"{pct} CI high", "note"]
    out = ["\t".join(head)]
    for r in rows:
        v, u, how = _tsv_numbers(r, fp)
        lo, hi = _ci_pair(r, fp, exponent=0)  # positional, as the value cell beside it
        note = "; ".join(p for p in (how, "derived" if r.derived else "", r.note) if p)
        out.append("\t".join(_tsv_cell(c) for c in (r.name, v, u, r.unit, lo, hi, note)))
    out.append("")
    out.append("method\t")
    out += [f"{_tsv_cell(k)}\t{_tsv_cell(v)}" for k, v in meth]
    if caution:
        out.append(f"caution\t{caution}")
    return "\n".join(out) + "\n"


def _markdown(rows, meth, caution, pct, fp):
    out = [f"| Quantity | Estimate | Unit | {pct} CI |", "|---|---|---|---|"]
    for r in rows:
        lo, hi = _ci_pair(r, fp, rich=True)
        ci = f"{lo} to {hi}" if lo else _no_interval(r)
        name = _md(r.name) + (" (derived)" if r.derived else "")
        out.append(f"| {name} | {_md(_estimate(r, rich=True, full=fp))} | "
                   f"{_md(r.unit)} | {_md(ci)} |")
    out += ["", "**Method**", ""]
    out += [f"- {_md(k)}: {_md(v)}" for k, v in meth]
    if caution:
        out += ["", f"*{_md(caution)}*"]
    return "\n".join(out) + "\n"


def _latex_table(rows, meth, caution, pct, fp, cell, limit, rich):
    p = pct.replace("%", r"\%")
    out = [r"\begin{tabular}{llll}", r"\hline",
           rf"Quantity & Estimate & Unit & {p} CI \\", r"\hline"]
    for r in rows:
        lo, hi = _ci_pair(r, fp, rich=rich)
        # limits in math mode (or siunitx's \num), so a minus is a minus, not a hyphen
        ci = f"{limit(lo)} to {limit(hi)}" if lo else _tex(_no_interval(r))
        name = _tex(r.name) + (" (derived)" if r.derived else "")
        est, unit = cell(r)
        out.append(rf"{name} & {est} & {unit} & {ci} \\")
    out += [r"\hline", r"\end{tabular}", "", r"\paragraph{Method}", r"\begin{itemize}"]
    out += [rf"\item {_tex(k)}: {_tex(v)}" for k, v in meth]
    out.append(r"\end{itemize}")
    if caution:
        out += ["", r"\emph{" + _tex(caution) + "}"]
    return "\n".join(out) + "\n"


def _latex(rows, meth, caution, pct, fp):
    def cell(r):
        if fp or r.assumed:
            est = _tex(_estimate(r, full=fp)).replace("±", r"$\pm$")
        else:
            est = "$" + format_value(r.value, r.u, rich="latex") + "$"
        return est, _tex(r.unit)

    return _latex_table(rows, meth, caution, pct, fp, cell, lambda t: f"${t}$", "latex")


_SUPERSCRIPTS = str.maketrans("\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079",
                               "-0123456789")


def siunitx_unit(unit: str) -> str:
    """A unit as siunitx v3 literal unit input: LaTeX specials escaped, ``µ``/``μ``
    and ``°`` written with siunitx's own ``\\micro``/``\\degree`` (literal units may
    mix in unit macros), ``²``/``³`` as powers."""
    # written powers as powers: "cm-1" (an instrument export's header) and "cm⁻¹" -> cm^-1
    unit = re.sub(r"(?<![\w-])([^\W\d_]+)-(\d+)(?![\w.])", r"\1^-\2", str(unit))
    unit = re.sub("[\u207b\u2070\u00b9\u00b2\u00b3\u2074-\u2079]+",
                  lambda m: "^" + m.group(0).translate(_SUPERSCRIPTS), unit)
    # powers as groups: s^(1/2) -> s^{1/2}, x^10 -> x^{10} (a bare ^ takes one token)
    unit = re.sub(r"\^\((-?\d+/\d+)\)|\^(-?\w+)", lambda m: f"\x00{m.group(1) or m.group(2)}\x01",
                  unit)
    out = []
    for c in unit:
        if c == "\x00":
            out.append("^{")
            continue
        if c == "\x01":
            out.append("}")
            continue
        if c in "µμ":
            out.append(r"\micro ")
        elif c == "°":
            out.append(r"\degree ")
        elif c == "²":
            out.append("^{2}")
        elif c == "³":
            out.append("^{3}")
        elif c == "·":
            out.append(".")
        else:
            out.append(_LATEX_SPECIAL.get(c, c))
    return "".join(out).strip()


def _siunitx(rows, meth, caution, pct, fp):
    def cell(r):
        if r.assumed:
            num = _full(r.value) if fp else held_value_text(r.value)
        elif fp:
            num = f"{_full(r.value)} +- {_full(r.u)}"
        elif not (math.isfinite(r.u) and r.u > 0):
            num = _full(r.value)
        else:
            num = format_value(r.value, r.u)  # e.g. 4.213(25) or 6.67430(15)e-11
        unit = siunitx_unit(r.unit)
        body = rf"\qty{{{num}}}{{{unit}}}" if unit else rf"\num{{{num}}}"
        if r.held:
            body = "held at " + body
        elif r.from_held:
            body += f" ({FROM_HELD})"
        elif r.u == 0.0:
            body += " (exact)"
        elif not math.isfinite(r.u):
            body += " (u unknown)"
        return body, (rf"\unit{{{unit}}}" if unit else "")

    def limit(t):  # \num{} reads "e5" and sets the minus itself
        return rf"\num{{{t}}}"

    return _latex_table(rows, meth, caution, pct, fp, cell, limit, False)


def _html(rows, meth, caution, pct, fp):
    out = ["<table>",
           f"<tr><th>Quantity</th><th>Estimate</th><th>Unit</th><th>{_h(pct)} CI</th></tr>"]
    for r in rows:
        lo, hi = _ci_pair(r, fp, rich="html")  # markup of our own: not escaped below
        ci = f"{lo} to {hi}" if lo else _h(_no_interval(r))
        if fp:
            est = _h(_estimate(r, full=True))
        elif r.assumed:
            est = _estimate(r, rich="html")  # our own markup (a <sup> at most)
        else:
            est = format_value(r.value, r.u, rich="html")
        name = _h(r.name) + (" (derived)" if r.derived else "")
        out.append(f"<tr><td>{name}</td><td>{est}</td><td>{_h(r.unit)}</td>"
                   f"<td>{ci}</td></tr>")
    out += ["</table>", "<p><b>Method</b></p>", "<ul>"]
    out += [f"<li>{_h(k)}: {_h(v)}</li>" for k, v in meth]
    out.append("</ul>")
    if caution:
        out.append(f"<p><i>{_h(caution)}</i></p>")
    return "\n".join(out) + "\n"


# ============================================================================ correlation
def correlation_text(res, fmt: str = "plain") -> str:
    """The correlation matrix of the estimates, three decimals per coefficient.

    Held parameters have no correlation and show ``held``. ``fmt`` is one of
    :data:`FORMATS` (``"siunitx"`` gives the same table as ``"latex"``).
    """
    if fmt not in FORMATS:
        raise ValueError(f"unknown report format {fmt!r}; choose one of {', '.join(FORMATS)}")
    names = list(res.param_names)
    r = np.asarray(res.correlation, dtype=float)
    held = [n in res.fixed for n in names]

    def cell(i, j):
        if held[i] or held[j]:
            return "held"
        return format_correlation(r[i, j])

    cells = [[cell(i, j) for j in range(len(names))] for i in range(len(names))]
    if fmt == "plain":
        w = max([len(n) for n in names] + [6])
        lines = ["Correlation of the estimates", " " * w + "".join(f" {n:>8}" for n in names)]
        for n, row in zip(names, cells):
            lines.append(n.ljust(w) + "".join(f" {c:>8}" for c in row))
        return "\n".join(lines) + "\n"
    if fmt == "tsv":
        lines = ["\t".join([""] + names)]
        lines += ["\t".join([n] + row) for n, row in zip(names, cells)]
        return "\n".join(lines) + "\n"
    if fmt == "markdown":
        lines = ["| | " + " | ".join(_md(n) for n in names) + " |",
                 "|---" * (len(names) + 1) + "|"]
        lines += ["| " + _md(n) + " | " + " | ".join(row) + " |" for n, row in zip(names, cells)]
        return "\n".join(lines) + "\n"
    if fmt in ("latex", "siunitx"):
        lines = [r"\begin{tabular}{l" + "r" * len(names) + "}", r"\hline",
                 " & ".join([""] + [_tex(n) for n in names]) + r" \\", r"\hline"]
        lines += [" & ".join([_tex(n)] + [c.replace("-", "$-$") for c in row]) + r" \\"
                  for n, row in zip(names, cells)]
        lines += [r"\hline", r"\end{tabular}"]
        return "\n".join(lines) + "\n"
    lines = ["<table>", "<tr><th></th>" + "".join(f"<th>{_h(n)}</th>" for n in names) + "</tr>"]
    lines += ["<tr><th>" + _h(n) + "</th>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>"
              for n, row in zip(names, cells)]
    lines.append("</table>")
    return "\n".join(lines) + "\n"


# ============================================================================ CSV
def _head(label: str, unit: str) -> str:
    return f"{label} ({unit})" if unit else label


def point_status(res) -> list[str]:
    """Per point: ``"excluded"`` (by the analyst), ``"down-weighted"`` (weight < 0.5,
    the threshold of ``FitResult.n_downweighted``) or ``"used"``."""
    excl = np.asarray(res.excluded, dtype=bool)
    w = np.asarray(res.weights, dtype=float)
    out = []
    for e, wi in zip(excl, w):
        if e:
            out.append("excluded")
        elif np.isfinite(wi) and wi < 0.5:
            out.append("down-weighted")
        else:
            out.append("used")
    return out


def points_csv(
    res,
    reasons: Mapping[int, str] | None = None,
    *,
    x_unit: str = "",
    y_unit: str = "",
    rows: Sequence[int] | None = None,
) -> str:
    """The per-point table as CSV text, at full precision.

    Columns: file row (only when ``rows``, the file row of every point, is given), x,
    y, sigma, fitted, residual, std residual, weight, status, exclusion reason.
    ``reasons`` maps a point index (0-based, as in the fit) to the analyst's reason for
    excluding it; an excluded point without one says :data:`NO_REASON` when
    ``reasons`` is given. Blank sigma cells mean no sigma was given.
    """
    given = reasons is not None
    reasons = dict(reasons or {})
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    lead = ["file row"] if rows is not None else []
    w.writerow(lead + [_head("x", x_unit), _head("y", y_unit), _head("sigma", y_unit),
                       _head("fitted", y_unit), _head("residual", y_unit), "std residual",
                       "weight", "status", "exclusion reason"])
    status = point_status(res)
    n = len(res.x)
    sig = res.sigma if res.sigma is not None else [None] * n
    for i in range(n):
        reason = ""
        if status[i] == "excluded":
            reason = reasons.get(i, "") or (NO_REASON if given else "")
        w.writerow(([int(rows[i])] if rows is not None else []) + [
            _full(res.x[i]), _full(res.y[i]), "" if sig[i] is None else _full(sig[i]),
            _full(res.fitted[i]), _full(res.residuals[i]), _full(res.std_residuals[i]),
            _full(res.weights[i]), status[i], reason,
        ])
    return buf.getvalue()


def curve_csv(
    res,
    x_grid: Sequence[float],
    level: float = 0.95,
    *,
    x_unit: str = "",
    y_unit: str = "",
) -> str:
    """The fitted curve and its pointwise confidence band on ``x_grid`` as CSV text.

    Columns: x, fitted, band low, band high (``level`` two-sided, Student t with the
    fit's degrees of freedom; see :meth:`FitResult.band`).
    """
    xg = np.asarray(x_grid, dtype=float).ravel()
    fitted = res.predict(xg)
    low, high = res.band(xg, level=level)
    pct = f"{100 * float(level):.6g}%"
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([_head("x", x_unit), _head("fitted", y_unit),
                _head(f"band low {pct}", y_unit), _head(f"band high {pct}", y_unit)])
    for row in zip(xg, fitted, low, high):
        w.writerow([_full(v) for v in row])
    return buf.getvalue()


# ============================================================================ sign-off
#: a blank line to sign or fill in by hand
BLANK = "_" * 28


def signoff_lines(analyst: str = "", reviewer: str = "",
                  review_date: str = "") -> list[tuple[str, str]]:
    """The sign-off block of a report as ``(label, text)`` pairs: analyst, signature
    and date, reviewer, signature, date of review. A field not given is a blank line
    (:data:`BLANK`) to fill in by hand on the printed record."""
    def v(s):
        s = _one_line(s or "")
        return s or BLANK

    return [("Analyst", v(analyst)), ("Analyst's signature and date", BLANK),
            ("Reviewer", v(reviewer)), ("Reviewer's signature", BLANK),
            ("Date of review", v(review_date))]


def signoff_html(analyst: str = "", reviewer: str = "", review_date: str = "") -> str:
    """:func:`signoff_lines` as an HTML table (for the report)."""
    rows = "".join(f'<tr><th align="left">{_h(k)}</th><td>{_h(t)}</td></tr>'
                   for k, t in signoff_lines(analyst, reviewer, review_date))
    return f'<table class="signoff" border="0" cellpadding="6">{rows}</table>'
