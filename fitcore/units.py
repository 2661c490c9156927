"""Units of fitted quantities, written in data units and resolved with the data's units.

A model states each parameter's unit in terms of the data's units: ``"y"``, ``"x"``,
``"y/x"``, ``"1/x"``, ``"x*y"``, ``"y/x^2"``, ``""`` (dimensionless), or a literal unit
such as ``"J/mol"``. :func:`resolve_unit` substitutes the units of a data set:
``resolve_unit("y/x", "mg/L", "")`` is ``"1/(mg/L)"``: a data column without a unit is
taken as dimensionless (an absorbance, a ratio), so a slope of a unitless y against x
in mg/L is per mg/L.

:func:`formula_units` works out those unit expressions for the parameters of a user
formula by dimensional analysis of its expression, and leaves a parameter blank
whenever the formula does not fix its unit. The rules:

* the formula's value has the unit of y; ``x`` has the unit of x;
* the terms of a sum share one unit (``m*x + b``: ``b`` in y, ``m`` in y/x); a number
  in a sum is dimensionless (``1 + x/K``: ``K`` in x), except beside a term whose unit
  is already fixed by the data (``x - 20``, ``1/x - 1/298.15``), where it can only be
  in that unit; a factor that is a small integer or simple fraction (``2``, ``1/2``,
  ``0.5``), or such a multiple of ``pi``, ``e``, ``log(2)``, ``log(10)``, square roots
  of 2, 3 and pi or a product or quotient of two of them (``2*pi``,
  ``1/sqrt(2*pi)``), is dimensionless; any other number
  (``8.314`` in ``exp(-Ea/(8.314*x))``, ``1000`` in ``exp(-1000*x/tau)``) may carry a
  unit (a constant, a conversion), so what it touches stays blank;
* a product multiplies units, a quotient divides them, a power with a number as its
  exponent raises them (``sqrt`` is the power 1/2);
* the argument of ``exp``, ``sin``, ``cos``, ``tan``, ``arctan``, ``tanh`` and a fitted
  exponent are dimensionless, and so are these functions' values (``exp(-x/tau)``:
  ``tau`` in x; ``sin(w*x)``: ``w`` in 1/x);
* ``log`` and ``log10`` are dimensionless; their argument is left free (``log(x)`` of
  a value in mg/L is the logarithm of its number), so it fixes nothing;
* a power with a fitted exponent (``x**n``) is dimensionless when its base is, and
  otherwise of a unit that cannot be named: it fixes nothing, except that where it
  must be dimensionless (``1 + (x/K)**n``) its base must be too (``K`` in x);
* ``abs`` keeps the unit of its argument;
* a rule that involves no parameter (``exp(-x)`` with x in s: the formula's numbers
  carry units) fixes nothing and is set aside, except that the formula's value must
  be in y's unit (``x + k`` or ``exp(-x/tau)`` with y in mV: everything blank).

The parameters' units are the unique solution of the resulting linear equations in the
exponents of x's and y's units; a parameter the equations leave free is blank, and when
the equations contradict each other (``a*(x + x**2)``: the sum has no single unit, or
``x/(1 + x/K)`` with y in another unit than x) every parameter is blank: a wrong unit
is never printed.
"""
from __future__ import annotations

import functools
import math
import re
from fractions import Fraction
from typing import Mapping, Sequence

__all__ = ["resolve_unit", "formula_units", "unit_from_exponents"]


# ------------------------------------------------------------------------------ hints
_TOKEN = re.compile(r"\s*(?:(?P<num>\d+(?:\.\d+)?)|(?P<name>[^\W\d]\w*)|(?P<op>[*/^()\-]))")


class _HintError(ValueError):
    pass


def _tokens(text: str) -> list[tuple[str, str]]:
    out, pos = [], 0
    text = text.strip()
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None or m.end() == pos:
            raise _HintError(text)
        kind = m.lastgroup
        out.append((kind, m.group(kind)))
        pos = m.end()
    return out


class _HintParser:
    """``expr := term (('*' | '/') term)*``; ``term := (atom | '(' expr ')') ['^' exp]``;
    ``exp := ['-'] number | name | '(' ['-'] number '/' number ')'``. A factor is
    ``(atom, exponent)`` with a :class:`Fraction` exponent, or a name for a symbolic
    one (``x^b``)."""

    def __init__(self, text: str):
        self.toks = _tokens(text)
        self.i = 0

    def peek(self):
        return self.toks[self.i] if self.i < len(self.toks) else (None, None)

    def take(self, value=None):
        tok = self.peek()
        if tok[0] is None or (value is not None and tok[1] != value):
            raise _HintError(value)
        self.i += 1
        return tok

    def parse(self) -> list[tuple[str, object]]:
        out = self.expr()
        if self.i != len(self.toks):
            raise _HintError("trailing")
        return out

    def expr(self):
        out = self.term()
        while self.peek()[1] in ("*", "/"):
            op = self.take()[1]
            t = self.term()
            out += t if op == "*" else [(a, _neg(e)) for a, e in t]
        return out

    def term(self):
        kind, value = self.peek()
        if value == "(":
            self.take("(")
            inner = self.expr()
            self.take(")")
        elif kind == "num":
            self.take()
            if value != "1":
                raise _HintError(value)  # a number other than 1 is no unit
            inner = []
        elif kind == "name":
            self.take()
            inner = [(value, Fraction(1))]
        else:
            raise _HintError(value)
        if self.peek()[1] == "^":
            self.take("^")
            e = self.exponent()
            inner = [(a, e * p if isinstance(e, Fraction) and isinstance(p, Fraction)
                      else _symbolic(e, p)) for a, p in inner]
        return inner

    def exponent(self):
        kind, value = self.peek()
        if value == "(":
            self.take("(")
            sign = -1 if self.peek()[1] == "-" else 1
            if sign < 0:
                self.take("-")
            num = Fraction(self.take()[1])
            self.take("/")
            den = Fraction(self.take()[1])
            self.take(")")
            return sign * num / den
        if value == "-":
            self.take("-")
            return -Fraction(self.take()[1])
        if kind == "num":
            self.take()
            return Fraction(value)
        if kind == "name":
            self.take()
            return value
        raise _HintError(value)


def _symbolic(e, p):
    if isinstance(p, Fraction) and p == 1:
        return e
    if isinstance(p, Fraction) and p == -1:
        return "-" + str(e)
    raise _HintError("nested symbolic exponent")


def _neg(e):
    if isinstance(e, Fraction):
        return -e
    return e[1:] if e.startswith("-") else "-" + e


def _atom_text(unit: str) -> str:
    """A data unit as one factor: bracketed when it is itself compound."""
    return f"({unit})" if re.search(r"[/\s*^·]", unit) or _WRITTEN_POWER.match(unit) else unit


def _power_text(atom: str, e) -> str:
    if isinstance(e, Fraction):
        if e == 1:
            return atom
        if e.denominator == 1:
            return f"{atom}^{e.numerator}"
        return f"{atom}^({e.numerator}/{e.denominator})"
    return f"{atom}^{e}"


#: the product of two units in every unit text shown (window, copies, report): the
#: half-high dot (SI brochure, 9th ed., 5.4.6), ``"s·mV"``; a quotient is written with
#: ``/`` and a power as ``^n``. Unit expressions in data units (hints) keep ``*``.
PRODUCT = "\u00b7"

_SUPERSCRIPT = str.maketrans("\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079",
                             "-0123456789")
#: a data unit written with its own power: "cm-1" (instrument exports), "cm^-1",
#: "cm^(-1)", "cm⁻¹", "m²" (a plain "m2" stays a name: it may be one)
_WRITTEN_POWER = re.compile(
    r"^(?P<base>[^\W\d_]+)(?:\^\(?(?P<caret>-?\d+)\)?|(?P<minus>-\d+)"
    r"|(?P<sup>\u207b?[\u2070\u00b9\u00b2\u00b3\u2074-\u2079]+))$")


def _data_factors(unit: str) -> list[tuple[str, Fraction]]:
    """A data column's unit as factors: ``"cm-1"`` is ``[("cm", -1)]``, ``"mg/L"``
    (compound: one atom, bracketed where needed) ``[("mg/L", 1)]``."""
    m = _WRITTEN_POWER.match(unit)
    if m is None:
        return [(unit, Fraction(1))]
    power = m.group("caret") or m.group("minus") or m.group("sup").translate(_SUPERSCRIPT)
    p = Fraction(int(power))
    return [(m.group("base"), p)] if p != 0 else []


def _format(factors: Sequence[tuple[str, object]], product: str = "*") -> str:
    """``[(atom, exponent)]`` as unit text: ``"(mg/L)/s"``, ``"1/(mg/L)"``, ``"s*mV"``
    (``"s·mV"`` with ``product`` :data:`PRODUCT`)."""
    num = [_power_text(_atom_text(a), e) for a, e in factors
           if (isinstance(e, Fraction) and e > 0) or (isinstance(e, str) and not e.startswith("-"))]
    den = [_power_text(_atom_text(a), _neg(e)) for a, e in factors
           if (isinstance(e, Fraction) and e < 0) or (isinstance(e, str) and e.startswith("-"))]
    if not num and not den:
        return ""
    top = product.join(num) if num else "1"
    if not den:
        return top
    if len(den) == 1:
        return f"{top}/{den[0]}"
    return f"{top}/({product.join(den)})"


def resolve_unit(expr: str, x_unit: str, y_unit: str) -> str:
    """Turn a unit written in data units (``"y/x"``, ``"1/x"``) into real unit text.

    A bare ``"x"`` or ``"y"`` is the data unit as it is (``"mg/L"``, no parentheses);
    a compound unit brackets a data unit only where it must (``"(mg/L)/s"``). A data
    unit left blank is dimensionless: ``"y/x"`` with y blank and x in mg/L is
    ``"1/(mg/L)"``, with x blank and y in mV it is ``"mV"``, with both blank ``""``.
    Equal units of x and y cancel (``"y/x"`` with both in mV is dimensionless, ``""``).
    A unit that is neither ``x`` nor ``y`` based is kept as given; a unit expression
    that cannot be read gives ``""`` (no half-made unit is printed).
    """
    expr = (expr or "").strip()
    if not expr:
        return ""
    if not re.search(r"\b[xy]\b", expr):
        return expr
    try:
        factors = _HintParser(expr).parse()
    except (_HintError, ValueError, ZeroDivisionError):
        return ""
    subs = {"x": (x_unit or "").strip(), "y": (y_unit or "").strip()}
    if len(factors) == 1 and factors[0][1] == 1 and factors[0][0] in subs:
        return subs[factors[0][0]]  # a bare data unit, written as the file wrote it
    merged: dict[str, Fraction] = {}
    symbolic: list[tuple[str, str]] = []
    for atom, e in factors:
        unit = subs.get(atom, atom)
        if not unit:
            continue  # dimensionless: x^b of a unitless x is unitless too
        if isinstance(e, Fraction):
            parts = _data_factors(unit) if atom in subs else [(unit, Fraction(1))]
            for base, p in parts:
                merged[base] = merged.get(base, Fraction(0)) + e * p
        else:
            symbolic.append((unit, e))
    out = [(u, e) for u, e in merged.items() if e != 0] + symbolic
    if len(out) == 1 and out[0][1] == 1 and not symbolic:
        return out[0][0]  # a bare data unit, written as it is
    return _format(out, PRODUCT)


def unit_from_exponents(ex, ey) -> str:
    """The unit expression ``x^ex * y^ey`` in data units: ``(-1, 1)`` is ``"y/x"``,
    ``(0, 0)`` is ``""``."""
    factors = [(a, Fraction(e)) for a, e in (("y", ey), ("x", ex)) if Fraction(e) != 0]
    # y first in the numerator ("y/x", "x*y" reads "y*x": keep the catalogue's x*y)
    if all(e > 0 for _a, e in factors) and len(factors) == 2:
        factors = factors[::-1]
    return _format(factors)


# --------------------------------------------------------------------------- formulas
class _Unknown:
    """A unit the rules cannot name (``x**n`` of an x with a unit)."""


_UNKNOWN = _Unknown()


class _FreePower:
    """``base**p`` with a fitted exponent: dimensionless when ``base`` is."""

    def __init__(self, base):
        self.base = base


class _Form:
    """An affine unit: ``const + sum(coef[p] * unit(p))``, each unit a pair of
    exponents (of x's unit, of y's unit)."""

    __slots__ = ("const", "coef")

    def __init__(self, const=(Fraction(0), Fraction(0)), coef=None):
        self.const = (Fraction(const[0]), Fraction(const[1]))
        self.coef = {k: v for k, v in (coef or {}).items() if v != 0}

    def __add__(self, other: "_Form") -> "_Form":
        coef = dict(self.coef)
        for k, v in other.coef.items():
            coef[k] = coef.get(k, Fraction(0)) + v
        return _Form((self.const[0] + other.const[0], self.const[1] + other.const[1]), coef)

    def scaled(self, f: Fraction) -> "_Form":
        return _Form((self.const[0] * f, self.const[1] * f), {k: v * f for k, v in self.coef.items()})

    def minus(self, other: "_Form") -> "_Form":
        return self + other.scaled(Fraction(-1))

    @property
    def is_zero(self) -> bool:
        return not self.coef and self.const == (0, 0)


_ZERO = _Form()


class _Analysis:
    def __init__(self, x, params):
        import sympy

        self.sympy = sympy
        self.x = x
        self.params = {p: i for i, p in enumerate(params)}
        self.n_columns = len(params)  # parameters, then one per number of open unit
        self.equations: list[_Form] = []  # each must be zero

    def fresh(self) -> _Form:
        """The unit of a number that may carry one (``8.314``: a gas constant)."""
        self.n_columns += 1
        return _Form(coef={self.n_columns - 1: Fraction(1)})

    def equal(self, a, b, *, firm: bool = False) -> None:
        """Record that units ``a`` and ``b`` are the same (where both can be named).

        An equation that holds no parameter only says that data units must agree (x
        dimensionless in ``exp(-x)``: its numbers carry a unit, as in ``exp(-x/2)``
        with 2 in x's unit); it fixes no parameter and is dropped, unless ``firm``:
        two terms of one sum whose units disagree (``x + x**2``) leave the sum's unit
        undecided, and then nothing can be derived."""
        if isinstance(a, _Unknown) or isinstance(b, _Unknown):
            return
        if isinstance(a, _FreePower) or isinstance(b, _FreePower):
            free, other = (a, b) if isinstance(a, _FreePower) else (b, a)
            if isinstance(other, _Form) and other.is_zero:
                self.equal(free.base, _ZERO)  # dimensionless only with a dimensionless base
            return
        eq = a.minus(b)
        if eq.coef or firm:
            self.equations.append(eq)

    def unit(self, e):
        sp = self.sympy
        if e == self.x:
            return _Form((1, 0))
        if e in self.params:
            return _Form(coef={self.params[e]: Fraction(1)})
        if e.is_number:
            return _ZERO if _plain_number(e) else self.fresh()
        if isinstance(e, sp.Add):
            numbers = [a for a in e.args if a.is_number and _plain_number(a)]
            parts = [self.unit(a) for a in e.args if not a.is_number]
            known = next((p for p in parts if isinstance(p, _Form)), None)
            for p in parts:
                if known is not None and p is not known:
                    self.equal(known, p, firm=isinstance(p, _Form))
            if known is None:
                if not numbers:
                    return _UNKNOWN  # only powers with fitted exponents: no nameable unit
                known = _ZERO  # 1 + (x/K)**n: the number is dimensionless, so is the rest
                for p in parts:
                    self.equal(known, p)
            elif numbers and known.coef:
                self.equal(known, _ZERO)  # 1 + x/K: K in x's unit
            # a number beside a term of a definite unit (x - 20, 1/x - 1/298.15) can
            # only be in that unit: no equation
            return known
        if isinstance(e, sp.Mul):
            total, others = _ZERO, []
            for a in e.args:
                u = self.unit(a)
                if isinstance(u, _Form):
                    total = total + u
                else:
                    others.append(u)
            if not others:
                return total
            if len(others) == 1 and isinstance(others[0], _FreePower) and total.is_zero:
                return others[0]  # 2*(x/K)**n: dimensionless exactly when (x/K)**n is
            return _UNKNOWN
        if isinstance(e, sp.Pow):
            base, expo = e.args
            if expo.is_number:
                f = _fraction_of(expo)
                b = self.unit(base)
                if f is None or not isinstance(b, _Form):
                    if isinstance(b, _FreePower):
                        return b
                    return _UNKNOWN
                return b.scaled(f)
            self.equal(self.unit(expo), _ZERO)
            b = _ZERO if base.is_number else self.unit(base)  # 10**(h*x): h in 1/x
            if isinstance(b, _Form) and b.is_zero:
                return _ZERO
            return _FreePower(b) if isinstance(b, _Form) else _UNKNOWN
        if isinstance(e, sp.log):
            self.unit(e.args[0])  # its parts still obey the rules
            return _ZERO
        name = type(e).__name__
        if name in ("RealAbs", "Abs"):
            return self.unit(e.args[0])
        if name in ("RealSign", "sign"):
            self.unit(e.args[0])
            return _ZERO
        if isinstance(e, sp.Function) and len(e.args) == 1:
            # exp, sin, cos, tan, atan, tanh (sinh/cosh from sympy): dimensionless in, out
            self.equal(self.unit(e.args[0]), _ZERO)
            return _ZERO
        return _UNKNOWN


#: the largest numerator and denominator of a number taken as dimensionless
_PLAIN = 12


#: constants whose small rational multiples are pure numbers (a formula's constant
#: parts arrive worked out: 2*pi as 6.283185307179586, log(2) as 0.6931471805599453)
_BASE = (math.pi, math.sqrt(math.pi), math.log(2.0), math.log(10.0), math.sqrt(2.0),
         math.sqrt(3.0), math.e)
#: 1, each base constant and each product or quotient of two (1/sqrt(2*pi), pi**2, ...)
_PURE = tuple({1.0, *(a ** i for a in _BASE for i in (-1, 1)),
               *(a ** i * b ** j for a in _BASE for b in _BASE for i in (-1, 1) for j in (-1, 1))})


def _plain_number(e) -> bool:
    """True for a number that is surely a pure number: a small integer or simple
    fraction (``2``, ``-1``, ``1/2``, ``0.5``), or such a multiple of ``pi``, ``e``,
    ``log(2)``, ``log(10)``, ``sqrt(2)`` (``2*pi``, ``log(2)``). Any other number
    (``8.314``, ``1000``) may carry a unit (a gas constant, a conversion factor), so
    it fixes nothing."""
    import sympy

    for a in e.atoms(sympy.Number):
        try:
            v = float(a)
        except (TypeError, ValueError):
            return False
        if not any(_small_fraction(v / c) for c in _PURE):
            return False
    return True


def _small_fraction(v: float) -> bool:
    f = _fraction_of(v)
    return f is not None and abs(f.numerator) <= _PLAIN and f.denominator <= _PLAIN


def _fraction_of(number):
    try:
        v = float(number)
    except (TypeError, ValueError):
        return None
    if not (abs(v) < 1e6):
        return None
    f = Fraction(v).limit_denominator(1000)
    return f if abs(float(f) - v) <= 1e-12 * max(1.0, abs(v)) else None


def _solve(equations: list[_Form], k: int):
    """Unique solution per unknown of ``equations`` (each ``== 0``), as a list of
    ``(ex, ey)`` or None where not fixed; None overall when they contradict.

    Gauss-Jordan elimination in exact fractions on sparse rows (each equation holds a
    few parameters): ``({column: coefficient}, [rhs_x, rhs_y])``."""
    rows = [({j: v for j, v in eq.coef.items()}, [-eq.const[0], -eq.const[1]])
            for eq in equations]
    pivots: dict[int, int] = {}  # column -> row index
    done: list[tuple[dict, list]] = []
    for coef, rhs in rows:
        # reduce by the pivots found so far
        for c in [c for c in coef if c in pivots]:
            if c not in coef:
                continue
            f = coef[c]
            pcoef, prhs = done[pivots[c]]
            for j, v in pcoef.items():
                nv = coef.get(j, Fraction(0)) - f * v
                if nv:
                    coef[j] = nv
                else:
                    coef.pop(j, None)
            rhs = [rhs[0] - f * prhs[0], rhs[1] - f * prhs[1]]
        if not coef:
            if rhs[0] or rhs[1]:
                return None  # 0 = a unit: the formula contradicts the rules
            continue
        c = min(coef)
        lead = coef[c]
        coef = {j: v / lead for j, v in coef.items()}
        rhs = [rhs[0] / lead, rhs[1] / lead]
        # eliminate the new pivot's column from the rows found before
        for r, (pc, pr) in enumerate(done):
            f = pc.get(c)
            if f:
                for j, v in coef.items():
                    nv = pc.get(j, Fraction(0)) - f * v
                    if nv:
                        pc[j] = nv
                    else:
                        pc.pop(j, None)
                done[r] = (pc, [pr[0] - f * rhs[0], pr[1] - f * rhs[1]])
        pivots[c] = len(done)
        done.append((coef, rhs))
    out: list = [None] * k
    for c, r in pivots.items():
        coef, rhs = done[r]
        if len(coef) == 1:  # only its own column left: fixed by the equations
            out[c] = (rhs[0], rhs[1])
    return out


def formula_units(expr, x, params: Sequence) -> Mapping[str, str]:
    """Units of a formula's parameters in data units (``{"tau": "x", "A": "y"}``), by
    the rules of this module's docstring; a parameter whose unit the formula does not
    fix is left out, and so is every parameter when the formula contradicts them.

    ``expr`` is the formula's sympy expression, ``x`` its variable's symbol and
    ``params`` the parameters' symbols (:func:`fitcore.formula.analyse_formula` gives
    all three).
    """
    return dict(_formula_units(expr, x, tuple(params)))


@functools.lru_cache(maxsize=256)
def _formula_units(expr, x, params: tuple) -> tuple:
    an = _Analysis(x, list(params))
    try:
        # firm: a formula whose value has a unit of its own (x + k) other than y's
        # contradicts the data, and its parameters' units would be a guess
        an.equal(an.unit(expr), _Form((0, 1)), firm=True)
        solution = _solve(an.equations, an.n_columns)
    except RecursionError:
        return ()
    if solution is None:
        return ()
    return tuple((str(p), unit_from_exponents(*s)) for p, s in zip(params, solution)
                 if s is not None)
