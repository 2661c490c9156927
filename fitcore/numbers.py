"""Numbers ready for a lab report, following the GUM (JCGM 100:2008, 7.2.2 and 7.2.6).

:func:`format_value` quotes a value with its standard uncertainty (the uncertainty
rounded to two significant digits, the value to the same decimal place);
:func:`format_uncertainty`, :func:`interval_limits` / :func:`format_interval` and
:func:`format_correlation` write the other numbers of a report by the same rule;
:func:`held_value_text` writes a value that was held (an assumption, not an estimate).

Nothing here imports Qt; every function returns a ``str``. Report text blocks built
from these numbers live in :mod:`fitcore.report_text`.
"""
from __future__ import annotations

import math
from decimal import (
    ROUND_CEILING,
    ROUND_FLOOR,
    ROUND_HALF_EVEN,
    ROUND_HALF_UP,
    Context,
    Decimal,
    localcontext,
)

import numpy as np

__all__ = [
    "format_value",
    "format_uncertainty",
    "interval_limits",
    "format_interval",
    "format_correlation",
    "full_precision",
    "held_value_text",
]


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
        return tuple(full_precision(x) if not math.isfinite(x)
                     else _exact_text(x, exponent, kind, group_digits) for x in (low, high))
    with localcontext(_CTX):
        _vr, _ur, qexp, n = _plan(value, u, int(digits), rounding, exponent)
        out = []
        for x in (low, high):
            if not math.isfinite(x):
                out.append(full_precision(x))
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


def full_precision(x) -> str:
    """Full round-trip precision for a cell (``repr`` digits)."""
    x = float(x)
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(x)




#: a held value with at most this many significant digits is printed as given
HELD_EXACT_DIGITS = 6
#: otherwise it is rounded to this many significant digits
HELD_DIGITS = 4


def held_value_text(value, *, rich=False) -> str:
    """A held (fixed) value as it stands in an estimates table: ``"28.77"``.

    A held value is an assumption of the fit, not a measured result, so it has no
    uncertainty to decide its last digit. Rule (Ballast's own): a value with at most
    :data:`HELD_EXACT_DIGITS` significant digits (a value typed by hand, ``0.5``,
    ``28.7656``) is written exactly as given; a longer one (typically copied from an
    earlier fit, ``28.76560799323773``) is rounded to :data:`HELD_DIGITS` significant
    digits (``28.77``). The full value is stated in the method block. The power of ten
    follows :func:`format_value`'s rule (``|n| >= 5``). NaN/inf as :func:`format_value`.
    """
    kind = _check_common(rich, "nearest", 2)
    v = float(value)
    if not math.isfinite(v):
        return full_precision(v)
    d = _decimal(v)
    if d == 0:
        return "0"
    sig = len(d.normalize(_CTX).as_tuple().digits)
    with localcontext(_CTX):
        if sig > HELD_EXACT_DIGITS:
            d = d.quantize(_quantum(d.adjusted() - HELD_DIGITS + 1), rounding=ROUND_HALF_UP)
        d = d.normalize(_CTX)
        n = _choose_exponent(d.adjusted(), None)
        if n == 0:
            return _fixed(d, False)
        return _fixed(d.scaleb(-n), False) + _times_ten(n, kind)
