"""Values ready for a lab report, and report text built from a :class:`FitResult`.

Two layers live here:

* :func:`format_value` and :func:`format_correlation` turn numbers into text following
  the GUM (JCGM 100:2008, 7.2.2 and 7.2.6): the standard uncertainty is rounded to two
  significant digits and the value is rounded to the same decimal place.
* :func:`estimates_text`, :func:`correlation_text`, :func:`points_csv` and
  :func:`curve_csv` write a fit's estimates, correlations, per-point table and fitted
  curve as plain text, TSV, Markdown, LaTeX (plain or siunitx) or HTML. Every estimates
  report carries a *method* block that states how the numbers were obtained.

Nothing here imports Qt; every function returns a ``str``.
"""
from __future__ import annotations

import csv
import html
import io
import math
import re
from decimal import (
    ROUND_CEILING,
    ROUND_FLOOR,
    ROUND_HALF_EVEN,
    ROUND_HALF_UP,
    Context,
    Decimal,
    localcontext,
)
from typing import Mapping, Sequence

import numpy as np

from .losses import loss_title

__all__ = [
    "CAUTION",
    "FORMATS",
    "format_value",
    "format_uncertainty",
    "interval_limits",
    "format_interval",
    "format_correlation",
    "estimates_text",
    "correlation_text",
    "method_lines",
    "loss_label",
    "convergence_text",
    "excluded_points_text",
    "resolve_unit",
    "point_status",
    "points_csv",
    "curve_csv",
]

#: Output formats understood by :func:`estimates_text` and :func:`correlation_text`.
FORMATS = ("plain", "tsv", "markdown", "latex", "siunitx", "html")

#: Printed whenever the fit down-weighted or excluded points, or used a robust loss.
CAUTION = (
    "Robust weights are not a licence to discard data; follow your laboratory's "
    "documented procedures and the applicable standard for regulated or clinical work."
)

# Exponent notation is used when the decimal exponent of the rounded value is at least
# this large in magnitude (|n| >= 5, i.e. below 1e-4 or at or above 1e5).
_EXPONENT_THRESHOLD = 5

_SUPERSCRIPT = str.maketrans("0123456789-+", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻⁺")
_RICH_KINDS = {False: "text", None: "text", "text": "text", True: "unicode",
               "unicode": "unicode", "html": "html", "latex": "latex"}
_ROUNDINGS = ("nearest", "even", "up")

# Decimal context wide enough for any pair of doubles (1e308 quoted to 1e-308 digits).
_CTX = Context(prec=1300, Emax=999999, Emin=-999999)


# ============================================================================ numbers
def _decimal(x: float) -> Decimal:
    """The shortest decimal that round-trips to the float ``x`` (``repr`` digits)."""
    return Decimal(repr(float(x)))


def _quantum(exp: int) -> Decimal:
    return Decimal(1).scaleb(exp, _CTX)


def _round_uncertainty(u: Decimal, digits: int, rounding: str) -> tuple[Decimal, int]:
    """Round ``u`` to ``digits`` significant digits; return it and its last exponent."""
    e = u.adjusted()
    qexp = e - digits + 1
    q = _quantum(qexp)
    if rounding == "nearest":
        ur = u.quantize(q, rounding=ROUND_HALF_UP, context=_CTX)
    elif rounding == "even":
        ur = u.quantize(q, rounding=ROUND_HALF_EVEN, context=_CTX)
    else:  # "up": round up unless what is dropped is under a tenth of the last digit
        floor = u.quantize(q, rounding=ROUND_FLOOR, context=_CTX)
        dropped = _CTX.subtract(u, floor)
        if _CTX.compare(dropped, _CTX.multiply(q, Decimal("0.1"))) < 0:
            ur = floor
        else:
            ur = u.quantize(q, rounding=ROUND_CEILING, context=_CTX)
    if ur.adjusted() > e:  # carried into a new digit, e.g. 0.0996 -> 0.10
        qexp += 1
        ur = ur.quantize(_quantum(qexp), context=_CTX)
    return ur, qexp


def _group(digits: str, from_left: bool) -> str:
    """Digits in groups of three separated by spaces (SI practice); a lone final digit
    joins its neighbour group (``"109 383 7015"``). Four digits or fewer stay whole."""
    if len(digits) <= 4:
        return digits
    s = digits if from_left else digits[::-1]
    groups = [s[i:i + 3] for i in range(0, len(s), 3)]
    if len(groups[-1]) == 1:
        lone = groups.pop()
        groups[-1] += lone
    if not from_left:
        groups = [g[::-1] for g in reversed(groups)]
    return " ".join(groups)


def _fixed(d: Decimal, group: bool) -> str:
    """Decimal in positional notation, exactly its digits (no exponent)."""
    s = format(d, "f")
    if not group:
        return s
    sign = "-" if s.startswith("-") else ""
    s = s.lstrip("-")
    whole, _, frac = s.partition(".")
    out = _group(whole, from_left=False)
    if frac:
        out += "." + _group(frac, from_left=True)
    return sign + out


def _times_ten(n: int, kind: str) -> str:
    """The exponent suffix for ``kind``: ``e-11``, ``× 10⁻¹¹``, HTML or LaTeX."""
    if kind == "text":
        return f"e{n}"
    if kind == "unicode":
        return " × 10" + str(n).translate(_SUPERSCRIPT)
    if kind == "html":
        return f" × 10<sup>{n}</sup>"
    return rf" \times 10^{{{n}}}"


def _choose_exponent(n_value: int, exponent) -> int:
    if exponent is None or exponent == "auto":
        return n_value if abs(n_value) >= _EXPONENT_THRESHOLD else 0
    if isinstance(exponent, bool) or not isinstance(exponent, (int, np.integer)):
        raise ValueError(f"exponent must be None ('auto') or an integer, not {exponent!r}")
    return int(exponent)


def _exact_text(value: float, exponent, kind: str, group: bool) -> str:
    """A value at full (round-trip) precision, for u = 0 or an unknown u."""
    d = _decimal(value)
    if d == 0:
        d = abs(d)  # "0.0", never "-0.0"
    n = _choose_exponent(d.adjusted() if d != 0 else 0, exponent)
    if n == 0:
        return _fixed(d, group)
    return _fixed(d.scaleb(-n, _CTX), group) + _times_ten(n, kind)


def _plan(value: float, u: float, digits: int, rounding: str, exponent):
    """How ``value(u)`` is quoted: ``(rounded value, rounded u, exponent of the last
    quoted digit, power of ten written)``. The one place the GUM 7.2.6 rounding and the
    exponent rule are decided; ``u`` must be finite and positive."""
    with localcontext(_CTX):
        ur, qexp = _round_uncertainty(_decimal(u), int(digits), rounding)
        vr = _decimal(value).quantize(_quantum(qexp), rounding=ROUND_HALF_UP)
        if vr == 0:
            vr = abs(vr)  # never print "-0.00"
        n_value = vr.adjusted() if vr != 0 else ur.adjusted()
        return vr, ur, qexp, _choose_exponent(n_value, exponent)


def _check_common(rich, rounding, digits) -> str:
    try:
        kind = _RICH_KINDS[rich]
    except (KeyError, TypeError):
        raise ValueError(
            f"rich must be False, True, 'unicode', 'html' or 'latex', not {rich!r}"
        ) from None
    if rounding not in _ROUNDINGS:
        raise ValueError(f"rounding must be one of {', '.join(_ROUNDINGS)}, not {rounding!r}")
    if isinstance(digits, bool) or not isinstance(digits, (int, np.integer)) or digits < 1:
        raise ValueError(f"digits must be a whole number of at least 1, not {digits!r}")
    return kind


def format_value(
    value,
    u,
    style: str = "paren",
    *,
    digits: int = 2,
    exponent=None,
    rich=False,
    rounding: str = "nearest",
    group_digits: bool = False,
    held: bool = False,
) -> str:
    """Quote a value with its standard uncertainty as in a lab report (GUM style).

    Parameters
    ----------
    value : float
        The estimate.
    u : float
        Its standard uncertainty (not an expanded one), >= 0.
    style : {"paren", "pm"}
        ``"paren"``: the concise form of GUM 7.2.2, ``100.02147(35)``, where the number
        in parentheses is the uncertainty in units of the last quoted digit.
        ``"pm"``: ``100.02147 ± 0.00035``.
    digits : int
        Significant digits kept in the uncertainty (GUM 7.2.6: "at most two"); >= 1.
    exponent : None, "auto" or int
        ``None``/``"auto"`` picks the rule below; an integer forces that power of ten
        (``0`` forces positional notation).
    rich : bool or {"unicode", "html", "latex"}
        How a power of ten is written: ``False`` gives ``6.67430(15)e-11``; ``True`` or
        ``"unicode"`` gives ``6.67430(15) × 10⁻¹¹``; ``"html"`` gives
        ``6.67430(15) × 10<sup>-11</sup>``; ``"latex"`` gives
        ``6.67430(15) \\times 10^{-11}`` (and ``\\pm`` for the ``"pm"`` style).
    rounding : {"nearest", "even", "up"}
        How the uncertainty is rounded. ``"nearest"`` rounds halves away from zero
        (common practice), ``"even"`` rounds halves to even, ``"up"`` rounds up as GUM
        7.2.6 allows (10.47 -> 11) except when what is dropped is less than a tenth of
        the last kept digit (28.05 -> 28, the GUM's own counter-example); that tenth is
        Ballast's rule, the GUM leaves it to judgement. The value itself is always
        rounded to nearest (halves away from zero).
    group_digits : bool
        Group digits in threes with spaces, SI/CODATA style: ``100.021 47(35)``.
    held : bool
        With ``u == 0``, mark the value ``(held)`` rather than ``(exact)``.

    Returns
    -------
    str

    Notes
    -----
    *Rounding.* ``u`` is rounded to ``digits`` significant digits, working on the
    shortest decimal that reproduces the float (so 0.00035 is treated as exactly
    0.00035, not as its binary neighbour). The value is rounded to the same decimal
    place. When the uncertainty spans the decimal point its digits are still written
    in units of the last quoted digit: ``123.4`` with ``u = 1.3`` is ``123.4(13)``
    (GUM/CODATA style; some authors write ``123.4(1.3)``), and ``12345`` with
    ``u = 250`` is ``12350(250)``.

    *Exponent rule.* Let n be the decimal exponent of the rounded value (of the
    rounded uncertainty if the value rounds to zero). When ``|n| >= 5`` the result is
    written as mantissa × 10^n with the mantissa in [1, 10); otherwise positional
    notation is used. Examples: ``6.67430(15)e-11``, ``0.0001234(56)``,
    ``98765.4(12)`` stays positional and ``123456.7(12)`` becomes ``1.234567(12)e5``.

    *Special cases.* ``u == 0`` gives the value at full round-trip precision followed
    by ``(exact)`` (or ``(held)``); a NaN or infinite ``u`` gives the value at full
    precision followed by ``(u unknown)``; a NaN value gives ``"nan"`` and an infinite
    value ``"inf"``/``"-inf"``. A negative ``u`` is an error.

    Examples
    --------
    >>> format_value(100.02147, 0.00035)
    '100.02147(35)'
    >>> format_value(100.02147, 0.00035, "pm")
    '100.02147 ± 0.00035'
    >>> format_value(6.67430e-11, 1.5e-15, rich=True)
    '6.67430(15) × 10⁻¹¹'
    """
    if style not in ("paren", "pm"):
        raise ValueError(f"style must be 'paren' or 'pm', not {style!r}")
    kind = _check_common(rich, rounding, digits)
    try:
        value = float(value)
        u = float(u)
    except (TypeError, ValueError):
        raise TypeError(
            f"format_value needs two numbers (value and standard uncertainty), "
            f"got {value!r} and {u!r}"
        ) from None

    if math.isnan(value):
        return "nan"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    if u < 0:
        raise ValueError(f"a standard uncertainty cannot be negative (got u = {u!r})")
    if not math.isfinite(u):
        return _exact_text(value, exponent, kind, group_digits) + " (u unknown)"
    if u == 0:
        marker = "(held)" if held else "(exact)"
        return _exact_text(value, exponent, kind, group_digits) + " " + marker

    with localcontext(_CTX):
        vr, ur, qexp, n = _plan(value, u, int(digits), rounding, exponent)
        mant = vr.scaleb(-n)
        um = ur.scaleb(-n)
        vtext = _fixed(mant, group_digits)
        suffix = _times_ten(n, kind) if n != 0 else ""
        if style == "paren":
            last = min(mant.as_tuple().exponent, 0)  # exponent of the last printed digit
            paren = format(um.scaleb(-last), "f")
            return f"{vtext}({paren}){suffix}"
        pm = r" \pm " if kind == "latex" else " ± "
        body = f"{vtext}{pm}{_fixed(um, group_digits)}"
        return f"({body}){suffix}" if suffix else body


def _number(x) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        raise TypeError(f"expected a number, got {x!r}") from None


def format_uncertainty(
    value,
    u,
    *,
    digits: int = 2,
    exponent=None,
    rich=False,
    rounding: str = "nearest",
    group_digits: bool = False,
) -> str:
    """The standard uncertainty alone, as it stands beside ``format_value(value, u)``.

    ``u`` is rounded to ``digits`` significant digits (GUM 7.2.6), written to the same
    last decimal as the rounded value and with the same power of ten, so that a table
    column of uncertainties reads like the ``"pm"`` form: ``0.00538(90)`` gives
    ``0.00090``, ``6.0(20)`` gives ``2.0``, ``12480(160)`` gives ``160`` and
    ``1.2(26)e5`` gives ``2.6e5``. Trailing zeros are kept; no exponent is used where
    the value has none.

    ``u == 0`` gives ``"0"``; a NaN or infinite ``u`` gives ``"unknown"``; a NaN or
    infinite value gives ``u`` to ``digits`` significant digits on its own.

    Examples
    --------
    >>> format_uncertainty(0.00538, 0.0009)
    '0.00090'
    >>> format_uncertainty(6.674301e-11, 1.5e-15)
    '0.00015e-11'
    """
    kind = _check_common(rich, rounding, digits)
    value, u = _number(value), _number(u)
    if u < 0:
        raise ValueError(f"a standard uncertainty cannot be negative (got u = {u!r})")
    if not math.isfinite(u):
        return "unknown"
    if u == 0:
        return "0"
    if not math.isfinite(value):
        value = 0.0  # only the uncertainty's own digits are meaningful then
    with localcontext(_CTX):
        _vr, ur, _qexp, n = _plan(value, u, int(digits), rounding, exponent)
        text = _fixed(ur.scaleb(-n), group_digits)
    return text + (_times_ten(n, kind) if n != 0 else "")


def interval_limits(
    low,
    high,
    value,
    u,
    *,
    digits: int = 2,
    exponent=None,
    rich=False,
    rounding: str = "nearest",
    group_digits: bool = False,
) -> tuple[str, str]:
    """The two limits of an interval about ``value``, quoted like ``value(u)`` itself.

    The rule, used for every interval Ballast prints (analytic, derived, bootstrap):
    each limit is rounded (to nearest, halves away from zero) to the same last decimal
    as the estimate rounded by :func:`format_value` with the same ``u``, ``digits`` and
    ``rounding`` (GUM 7.2.6: the value is given to the decimal of the last digit of its
    two-digit uncertainty), and written in the same notation: positional where the
    estimate is, with the estimate's power of ten where it has one. Trailing zeros are
    kept (``1001.537(32)`` has limits ``1001.474`` and ``1001.600``).

    With ``rich="latex"`` the limits are math-mode text (minus ``-`` and
    ``\\times 10^{n}``): the caller puts them between ``$``. Without a usable ``u``
    (zero, NaN or infinite) the limits are given at full round-trip precision; a NaN
    or infinite limit gives ``"nan"``/``"inf"``/``"-inf"``.

    Examples
    --------
    >>> interval_limits(1001.4738, 1001.60021, 1001.537, 0.032)
    ('1001.474', '1001.600')
    >>> interval_limits(-393581.0, 640125.0, 123272.0, 260000.0)
    ('-3.9e5', '6.4e5')
    """
    kind = _check_common(rich, rounding, digits)
    low, high, value, u = _number(low), _number(high), _number(value), _number(u)
    if u < 0:
        raise ValueError(f"a standard uncertainty cannot be negative (got u = {u!r})")

    if not (math.isfinite(u) and u > 0 and math.isfinite(value)):
        return tuple(_full(x) if not math.isfinite(x)
                     else _exact_text(x, exponent, kind, group_digits) for x in (low, high))
    with localcontext(_CTX):
        _vr, _ur, qexp, n = _plan(value, u, int(digits), rounding, exponent)
        out = []
        for x in (low, high):
            if not math.isfinite(x):
                out.append(_full(x))
                continue
            d = _decimal(x).quantize(_quantum(qexp), rounding=ROUND_HALF_UP)
            if d == 0:
                d = abs(d)  # "0.000", never "-0.000" (as format_value)
            out.append(_fixed(d.scaleb(-n), group_digits) + (_times_ten(n, kind) if n else ""))
    return out[0], out[1]


def format_interval(low, high, value, u, **kw) -> str:
    """``"[low, high]"`` with the limits of :func:`interval_limits` (same keywords).

    >>> format_interval(1001.4738, 1001.60021, 1001.537, 0.032)
    '[1001.474, 1001.600]'
    """
    lo, hi = interval_limits(low, high, value, u, **kw)
    return f"[{lo}, {hi}]"


def format_correlation(r) -> str:
    """A correlation coefficient to three decimal places (``"-0.987"``).

    Three digits keep coefficients near ±1 distinguishable, as GUM 7.2.6 asks.
    NaN (e.g. for a held parameter) gives ``"nan"``; ``-0.000`` is written ``0.000``.
    """
    r = float(r)
    if math.isnan(r):
        return "nan"
    s = f"{r:.3f}"
    return "0.000" if s == "-0.000" else s


# ============================================================================ pieces
def _full(x) -> str:
    """Full round-trip precision for a cell (``repr`` digits)."""
    x = float(x)
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(x)


def resolve_unit(expr: str, x_unit: str, y_unit: str) -> str:
    """Turn a unit written in data units (``"y/x"``, ``"1/x"``) into real unit text.

    A bare ``"x"`` or ``"y"`` is the data unit as it is (``"mg/L"``, no parentheses);
    a compound unit brackets a data unit only where it must (``"(mg/L)/s"``). Returns ``""``
    when a needed data unit is unknown (blank), so that no half-made
    unit is printed. A unit that is neither ``x`` nor ``y`` based is kept as given.
    """
    expr = (expr or "").strip()
    if not expr:
        return ""
    tokens = set(re.findall(r"\b[xy]\b", expr))
    if not tokens:
        return expr
    subs = {"x": x_unit.strip(), "y": y_unit.strip()}
    if any(not subs[t] for t in tokens):
        return ""
    if expr in ("x", "y"):
        return subs[expr]

    def rep(m):
        u = subs[m.group(0)]
        return f"({u})" if re.search(r"[/\s*]", u) else u

    return re.sub(r"\b[xy]\b", rep, expr)


def loss_label(res) -> str:
    """The loss in words: its title, tuning constant and shape (``"Huber; tuning
    constant 1.345 × scale"``), never its internal name."""
    name = str(res.loss)
    parts = [loss_title(name)]  # the title only: the internal name adds nothing for a reader
    if res.tuning is not None and math.isfinite(float(res.tuning)):
        parts.append(f"tuning constant {float(res.tuning):.6g} × scale")
    if res.alpha is not None:
        a = f"shape alpha = {float(res.alpha):.6g}"
        if res.alpha_stderr is not None and math.isfinite(float(res.alpha_stderr)):
            a = f"shape alpha = {format_value(res.alpha, res.alpha_stderr)}"
        if name == "adaptive":
            a += " (fitted)"
        parts.append(a)
    return "; ".join(parts)


def _version() -> str:
    from . import __version__

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


def excluded_points_text(res, reasons: Mapping[int, str] | None = None,
                         limit: int = MAX_LISTED_EXCLUSIONS) -> str:
    """The excluded points, compactly: ``"#7 (x = 3.0, y = 17.5): pipette bubble; ..."``.

    ``#`` is the point number as in the points table (index + 1); x and y are given to
    10 significant digits (as in the report's exclusion record). ``reasons`` maps a
    point index (0-based) to the analyst's reason; with ``reasons`` given a point
    without one says "no reason given", without it no reason part is written. At most
    ``limit`` points are listed, then ``"and N more"``. Returns ``"none"`` when no point
    is excluded. The result is a ``str`` whose ``items`` attribute holds the entries.
    """
    idx = [int(i) for i in np.flatnonzero(np.asarray(res.excluded, dtype=bool))]
    if not idx:
        return _Items(["none"])
    items = []
    for i in idx[: max(int(limit), 0)]:
        item = f"#{i + 1} (x = {_g10(res.x[i])}, y = {_g10(res.y[i])})"
        if reasons is not None:
            reason = _one_line(reasons.get(i, "") or "")
            item += f": {reason or 'no reason given'}"
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


def method_lines(res, level: float = 0.95, *, y_unit: str = "",
                 reasons: Mapping[int, str] | None = None) -> list[tuple[str, str]]:
    """The method block as ``(label, text)`` pairs, in the order printed.

    States the model, loss (with tuning constant and shape), scale and how it was
    obtained, points used/excluded/down-weighted, degrees of freedom, covariance
    recipe, confidence level with the t quantile, held parameters, the excluded points
    (:func:`excluded_points_text`, with the analyst's ``reasons`` when given),
    convergence, any warnings (:attr:`FitResult.warnings`) and the Ballast version.
    """
    m = res.model
    title = m.title or m.name
    model = f"{title}: {m.formula}" if m.formula and m.formula != title else title
    out = [("model", model), ("loss", loss_label(res))]
    scale_unit = ""
    if res.sigma is None or res.sigma_mode == "none":
        scale_unit = f" {y_unit}" if y_unit else ""
    elif res.sigma_mode == "absolute":
        scale_unit = " (in units of sigma)"
    scale = f"{float(res.scale):.6g}{scale_unit}"
    if res.scale_method:
        scale += f", {res.scale_method}"
    out.append(("scale", scale))
    if res.sigma is not None and res.sigma_mode != "none":
        meaning = {"absolute": "absolute standard uncertainties of y",
                   "relative": "relative weights only (scaled by the fit)"}.get(
            res.sigma_mode, res.sigma_mode)
        out.append(("sigma", meaning))
    rule = (getattr(res, "info", None) or {}).get("weighting")
    if rule:  # a weighting rule of fitcore.weighting (issue 14)
        from .weighting import rule_text

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
        out.append(("held parameters", held))
    if res.n_excluded:
        out.append(("excluded points", excluded_points_text(res, reasons)))
    out.append(("converged", convergence_text(res)))
    for w in getattr(res, "warnings", ()):
        out.append(("warning", w))
    out.append(("software", f"Ballast {_version()} (fitcore)"))
    return out


class _Row:
    __slots__ = ("name", "value", "u", "low", "high", "unit", "held", "derived", "note")

    def __init__(self, name, value, u, low, high, unit, held=False, derived=False, note=""):
        self.name, self.value, self.u = name, float(value), float(u)
        self.low, self.high, self.unit = float(low), float(high), unit
        self.held, self.derived, self.note = held, derived, note


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
        rows.append(_Row(name, v, u, v - t * u, v + t * u, unit, derived=True,
                         note=d.description))
    return rows


def _estimate(row: _Row, style="paren", rich=False, full=False) -> str:
    if full:
        if row.held:
            return f"{_full(row.value)} (held)"
        return f"{_full(row.value)} ± {_full(row.u)}"
    return format_value(row.value, row.u, style, rich=rich, held=row.held)


def _ci_pair(row: _Row, full=False, rich=False, exponent=None) -> tuple[str, str]:
    """The interval limits of a row, by the one rule of :func:`interval_limits`."""
    if row.held or not (math.isfinite(row.low) and math.isfinite(row.high)):
        return "", ""
    if full:
        return _full(row.low), _full(row.high)
    return interval_limits(row.low, row.high, row.value, row.u, rich=rich, exponent=exponent)


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
) -> str:
    """The estimates of a fit, with a method block, ready to paste into a report.

    Parameters
    ----------
    res : FitResult
        The fit.
    fmt : {"plain", "tsv", "markdown", "latex", "siunitx", "html"}
        ``"plain"``: one estimate a line (``tau = 4.213(25) s``). ``"tsv"``: a header
        row, then value, standard uncertainty, unit and interval in separate cells (for
        spreadsheets), then the method as label/text rows. ``"markdown"``: a table.
        ``"latex"``: a plain ``tabular``; ``"siunitx"``: the same with ``\\num{}`` and
        ``\\SI{value(unc)}{unit}``. ``"html"``: a ``<table>`` for rich-text editors.
    level : float
        Confidence level of the two-sided intervals (Student t with ``res.dof``).
    units : dict, optional
        Unit text per parameter (or derived quantity) name; overrides the model's.
    full_precision : bool
        Print values and uncertainties at full round-trip precision instead of
        rounding them per GUM (the rounded form is the default).
    x_unit, y_unit : str
        Units of the data, substituted into the model's parameter units (``"y/x"``).
    reasons : dict, optional
        The analyst's reason per excluded point (0-based index), listed with the
        excluded points in the method block.

    Returns
    -------
    str

    Notes
    -----
    Values are rounded with :func:`format_value`; interval limits by
    :func:`interval_limits` (the last decimal and power of ten of their estimate). Held
    parameters are marked ``(held)`` and get no
    interval. Derived quantities carry uncertainties propagated by the delta method
    from the full covariance, and intervals ``value ± t·u`` with the same t.
    """
    if fmt not in FORMATS:
        raise ValueError(f"unknown report format {fmt!r}; choose one of {', '.join(FORMATS)}")
    if not (0.0 < float(level) < 1.0):
        raise ValueError(f"confidence level must lie between 0 and 1 (got {level!r})")
    rows = _rows(res, float(level), units, x_unit, y_unit)
    meth = method_lines(res, float(level), y_unit=y_unit, reasons=reasons)
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
            lines.append(f"  {r.name.ljust(width)} = {est}{unit}{ci}")
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


def _tsv(rows, meth, caution, pct, fp):
    head = ["parameter", "value", "standard uncertainty", "unit",
            f"{pct} CI low", f"{pct} CI high", "note"]
    out = ["\t".join(head)]
    for r in rows:
        if fp:
            v, u = _full(r.value), _full(r.u)
        elif r.held:
            v, u = _full(r.value), "0"
        else:
            # the rounded pair: the same digits as the paren form, in two cells
            pm = format_value(r.value, r.u, "pm", exponent=0)
            v, _, u = pm.partition(" ± ")
        lo, hi = _ci_pair(r, fp, exponent=0)  # positional, as the value cell beside it
        note = "held" if r.held else ("derived" if r.derived else "")
        if r.note:
            note = f"{note}; {r.note}" if note else r.note
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
        ci = f"{lo} to {hi}" if lo else ("held" if r.held else "")
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
        ci = f"{limit(lo)} to {limit(hi)}" if lo else ("held" if r.held else "")
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
        if fp:
            est = _tex(_estimate(r, full=True)).replace("±", r"$\pm$")
        elif r.held:
            est = _tex(_estimate(r))
        else:
            est = "$" + format_value(r.value, r.u, rich="latex") + "$"
        return est, _tex(r.unit)

    return _latex_table(rows, meth, caution, pct, fp, cell, lambda t: f"${t}$", "latex")


def _siunitx(rows, meth, caution, pct, fp):
    def cell(r):
        if fp:
            num = _full(r.value) if r.held else f"{_full(r.value)} +- {_full(r.u)}"
        elif r.held:
            num = _full(r.value)
        else:
            num = format_value(r.value, r.u)  # e.g. 4.213(25) or 6.67430(15)e-11
        unit = _tex(r.unit)
        body = rf"\SI{{{num}}}{{{unit}}}" if r.unit else rf"\num{{{num}}}"
        if r.held:
            body += " (held)"
        return body, ""

    def limit(t):  # \num{} reads "e5" and sets the minus itself
        return rf"\num{{{t}}}"

    return _latex_table(rows, meth, caution, pct, fp, cell, limit, False)


def _html(rows, meth, caution, pct, fp):
    out = ["<table>",
           f"<tr><th>Quantity</th><th>Estimate</th><th>Unit</th><th>{_h(pct)} CI</th></tr>"]
    for r in rows:
        lo, hi = _ci_pair(r, fp, rich="html")  # markup of our own: not escaped below
        ci = f"{lo} to {hi}" if lo else ("held" if r.held else "")
        est = _h(_estimate(r, full=True)) if fp else (
            _h(_estimate(r)) if r.held else format_value(r.value, r.u, rich="html"))
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
) -> str:
    """The per-point table as CSV text, at full precision.

    Columns: x, y, sigma, fitted, residual, std residual, weight, status, exclusion
    reason. ``reasons`` maps a point index (0-based, as in the fit) to the analyst's
    reason for excluding it. Blank sigma cells mean no sigma was given.
    """
    reasons = dict(reasons or {})
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([_head("x", x_unit), _head("y", y_unit), _head("sigma", y_unit),
                _head("fitted", y_unit), _head("residual", y_unit), "std residual",
                "weight", "status", "exclusion reason"])
    status = point_status(res)
    n = len(res.x)
    sig = res.sigma if res.sigma is not None else [None] * n
    for i in range(n):
        w.writerow([
            _full(res.x[i]), _full(res.y[i]), "" if sig[i] is None else _full(sig[i]),
            _full(res.fitted[i]), _full(res.residuals[i]), _full(res.std_residuals[i]),
            _full(res.weights[i]), status[i],
            reasons.get(i, "") if status[i] == "excluded" else "",
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
