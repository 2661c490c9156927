"""Safe user formulas: ``"A*exp(-x/tau) + C"`` -> :class:`fitcore.Model`.

A formula is a Python *expression* such as ``A*exp(-x/tau) + C``. It is read with
``ast.parse(text, mode="eval")`` and then checked by a walker that only lets through a
short, explicit list of node types; everything else is refused with a
:class:`FormulaError` that quotes the offending part and gives its column. The user's
text is never executed: no ``eval``/``exec``, no compiling to code objects, and no
string-to-sympy conversion (``sympify``, ``parse_expr``, ``lambdify``).

From the checked syntax tree the module builds a sympy expression out of sympy objects
directly, differentiates it exactly with :func:`sympy.diff`, and turns the expression
and its derivatives into plain numpy closures with its own small compiler.

The rules for formulas
----------------------
* Operators ``+ - * / **`` and unary ``-``/``+``; ``^`` is refused with a hint to use
  ``**``. Numbers may be written ``2``, ``0.5``, ``1e-3``.
* Functions (one argument each): ``exp``, ``log`` (natural logarithm), ``log10``,
  ``sqrt``, ``sin``, ``cos``, ``tan``, ``arctan``, ``tanh``, ``abs``.
* The constant ``pi``. The letter ``e`` is **not** Euler's number: it is an ordinary
  parameter name (several lab models call a parameter ``e``, e.g. the EC50 of the
  log-logistic curve); write ``exp(1)`` for Euler's number.
* The independent variable is ``x`` (see ``x_name``); every other name is a parameter,
  in order of first appearance in the text. Names may not start with ``_``.
* An optional leading ``y =`` is accepted and dropped.
* At most :data:`MAX_LENGTH` characters and :data:`MAX_DEPTH` levels of nesting.
* A formula must have at least one parameter. A formula that does not use ``x`` is
  allowed; it describes a constant model.
* Parts made only of numbers are worked out once when the formula is read; a part with
  no finite real value (``log(0)``, ``1/0``, ``10**400``) is refused.

Start values
------------
A formula model has no data-driven start values. When ``p0`` is not given, every
parameter starts at 1.0 (``Model.guess`` returns ones), so a fit always starts
somewhere; give start values for models where 1.0 is far from the answer.
A formula that is linear in all its parameters (``a + b*x + c*x**2``) gets a
``basis`` so the solver uses its linear (IRLS) path, which needs no start values.
"""
from __future__ import annotations

import ast
import functools
import math
import re
import unicodedata
from dataclasses import dataclass
from typing import Callable

import numpy as np
import sympy

from .model import Model
from .units import formula_units

__all__ = [
    "FormulaError",
    "ParsedFormula",
    "analyse_formula",
    "parse_formula",
    "validate_formula",
    "FUNCTIONS",
    "CONSTANTS",
    "MAX_LENGTH",
    "MAX_DEPTH",
]

#: Longest formula accepted, in characters.
MAX_LENGTH = 500
#: Deepest nesting of operations accepted (``exp(exp(...))``, ``-(-(...))``).
MAX_DEPTH = 100
#: Nested constant powers multiply their exponents, ((c*x)**a)**b has degree a*b; the
#: product may be at most this large (sympy would otherwise expand c**(a*b) exactly).
MAX_TOTAL_EXPONENT = 1000
#: At most this many powers with a non-constant exponent inside each other (x**x**x...).
MAX_POWER_TOWER = 6

class RealAbs(sympy.Function):
    """``|u|`` of a real ``u``, with derivative ``sign(u)``.

    sympy's own ``Abs`` differentiates through ``re``/``im`` whenever it cannot prove
    its argument real (``abs(sqrt(b))``, ``abs(log(a))``); formulas live on the real
    line, so we use this plain version instead.
    """

    nargs = 1

    @classmethod
    def eval(cls, arg):  # safe: sympy Function.eval hook, not Python eval
        if arg.is_Number and arg.is_real:
            return sympy.Abs(arg)
        return None

    def fdiff(self, argindex=1):
        return RealSign(self.args[0])


class RealSign(sympy.Function):
    """``sign(u)`` of a real ``u`` (0 at 0); its derivative is taken as 0."""

    nargs = 1

    @classmethod
    def eval(cls, arg):  # safe: sympy Function.eval hook, not Python eval
        if arg.is_Number and arg.is_real:
            return sympy.sign(arg)
        return None

    def fdiff(self, argindex=1):
        return sympy.Integer(0)


# name -> (sympy builder, numpy function of the folded constant)
_FUNCTIONS: dict[str, tuple[Callable, Callable]] = {
    "exp": (sympy.exp, np.exp),
    "log": (sympy.log, np.log),
    "log10": (lambda u: sympy.log(u, 10), np.log10),
    "sqrt": (sympy.sqrt, np.sqrt),
    "sin": (sympy.sin, np.sin),
    "cos": (sympy.cos, np.cos),
    "tan": (sympy.tan, np.tan),
    "arctan": (sympy.atan, np.arctan),
    "tanh": (sympy.tanh, np.tanh),
    "abs": (RealAbs, np.abs),
}
#: The functions a formula may call (each takes one argument).
FUNCTIONS: tuple[str, ...] = tuple(_FUNCTIONS)
#: Named constants a formula may use.
CONSTANTS: dict[str, float] = {"pi": math.pi}

# Names people type from habit, with the name we use instead.
_FUNCTION_HINTS = {
    "ln": "log",
    "atan": "arctan",
    "arctg": "arctan",
    "fabs": "abs",
    "power": "the ** operator",
    "pow": "the ** operator",
}

# Characters pasted from word processors, with what to type instead.
_CHAR_HINTS = {
    "\u2212": "-",  # minus sign
    "\u2013": "-",  # en dash
    "\u00d7": "*",  # multiplication sign
    "\u00b7": "*",  # middle dot
    "\u22c5": "*",  # dot operator
    "\u00f7": "/",  # division sign
    "\u00b2": "**2",
    "\u00b3": "**3",
    "\u2019": "nothing (quotes are not allowed)",
}

_BINOPS = {
    ast.Add: "+",
    ast.Sub: "-",
    ast.Mult: "*",
    ast.Div: "/",
    ast.Pow: "**",
}
_REFUSED_BINOPS = {
    ast.FloorDiv: "//",
    ast.Mod: "%",
    ast.MatMult: "@",
    ast.LShift: "<<",
    ast.RShift: ">>",
    ast.BitAnd: "&",
    ast.BitOr: "|",
}

# Plain-language names of refused syntax, by node type.
_REFUSED_KINDS = {
    ast.Attribute: "attribute access",
    ast.Subscript: "indexing or slicing",
    ast.Lambda: "a lambda function",
    ast.ListComp: "a list comprehension",
    ast.SetComp: "a set comprehension",
    ast.DictComp: "a dict comprehension",
    ast.GeneratorExp: "a generator expression",
    ast.Compare: "a comparison",
    ast.BoolOp: "a boolean operation",
    ast.IfExp: "a conditional expression",
    ast.JoinedStr: "an f-string",
    ast.FormattedValue: "an f-string",
    ast.Starred: "unpacking with *",
    ast.NamedExpr: "assignment with :=",
    ast.Tuple: "a tuple (a comma outside a function call)",
    ast.List: "a list",
    ast.Set: "a set",
    ast.Dict: "a dict",
    ast.Await: "await",
    ast.Yield: "yield",
    ast.YieldFrom: "yield",
    ast.Slice: "a slice",
}

# integer exponents above this are kept as floats (see _Reader.binop)
_EXACT_EXPONENT = 1000

_LEADING_Y = re.compile(r"\s*y\s*=(?!=)")


class FormulaError(ValueError):
    """A formula that cannot be used, with a message that points at the problem.

    Attributes
    ----------
    message : str
        The plain-language explanation (also ``str(error)``).
    text : str
        The formula as given.
    column : int or None
        1-based column in ``text`` where the problem is, when it has a place.
    snippet : str
        The offending part of the formula ("" when there is none).
    """

    def __init__(self, message: str, *, text: str = "", column: int | None = None,
                 snippet: str = ""):
        super().__init__(message)
        self.message = message
        self.text = text
        self.column = column
        self.snippet = snippet

    def pointer(self) -> str:
        """The formula with a caret under the column, for a monospaced display.

        Returns "" when the error has no column.
        """
        if self.column is None or not self.text:
            return ""
        line = "".join(" " if ch.isspace() else ch for ch in self.text)
        return f"{line}\n{' ' * (self.column - 1)}^"


@dataclass(frozen=True)
class ParsedFormula:
    """A checked formula: the text, its parameters and its exact derivatives.

    Attributes
    ----------
    text : str
        The cleaned expression (leading ``y =`` dropped, white space tidied).
    x_name : str
        Name of the independent variable.
    param_names : tuple of str
        Parameters in order of first appearance.
    expr : sympy.Expr
        The expression, built from real-valued sympy symbols.
    derivatives : tuple of sympy.Expr
        ``d expr / d p`` for each parameter, in parameter order.
    linear : bool
        True when the expression is ``sum(p_i * g_i(x))``: linear in every parameter
        and with no part that is free of parameters.
    uses_x : bool
        False for a constant model (the formula does not contain ``x``).
    """

    text: str
    x_name: str
    param_names: tuple[str, ...]
    expr: sympy.Expr
    derivatives: tuple[sympy.Expr, ...]
    linear: bool
    uses_x: bool

    @property
    def formula(self) -> str:
        """The formula as shown to the user, ``"y = ..."``."""
        return f"y = {self.text}"


# ---------------------------------------------------------------------------
# reading the text


def _shorten(snippet: str, limit: int = 40) -> str:
    snippet = " ".join(snippet.split())
    return snippet if len(snippet) <= limit else snippet[: limit - 3] + "..."


class _Reader:
    """Walks a whitelisted syntax tree and builds the sympy expression."""

    def __init__(self, text: str, src: str, lead: int, x_name: str):
        self.text = text  # as given by the user (for messages)
        self.src = src  # the part handed to ast.parse
        self.src_bytes = src.encode("utf-8", errors="surrogatepass")
        self.lead = lead  # characters of `text` before `src`
        self.x_name = x_name
        self.x = sympy.Symbol(x_name, real=True)
        self.params: dict[str, sympy.Symbol] = {}  # insertion order = first appearance

    # -- locating ----------------------------------------------------------
    def column(self, node: ast.AST) -> int:
        """1-based column of a node in the user's text (node offsets are UTF-8 bytes)."""
        head = self.src_bytes[: node.col_offset]
        return self.lead + len(head.decode("utf-8", errors="ignore")) + 1

    def snippet(self, node: ast.AST) -> str:
        start, end = node.col_offset, getattr(node, "end_col_offset", None)
        if end is None:
            end = len(self.src_bytes)
        return self.src_bytes[start:end].decode("utf-8", errors="replace")

    def operator_column(self, node: ast.BinOp, symbol: str) -> int | None:
        """1-based column of the operator of a binary operation, if it can be found."""
        start, end = node.left.end_col_offset, node.right.col_offset
        if start is None or end is None:
            return None
        pos = self.src_bytes.find(symbol.encode(), start, end)
        if pos < 0:
            return None
        return self.lead + len(self.src_bytes[:pos].decode("utf-8", errors="ignore")) + 1

    def refuse(self, what: str, node: ast.AST, hint: str = "",
               column: int | None = None) -> FormulaError:
        snip = self.snippet(node)
        col = self.column(node) if column is None else column
        msg = f"{what}: {_shorten(snip)!r} at column {col}"
        if hint:
            msg += f"; {hint}"
        return FormulaError(msg, text=self.text, column=col, snippet=snip)

    # -- walking -----------------------------------------------------------
    def read(self, node: ast.AST, depth: int = 0):
        """Return ``(sympy expression, float value or None)`` for a node.

        The float is set when the node involves no names at all; such parts are
        worked out numerically here, so sympy never meets exact arithmetic on
        huge numbers (``9**9**9``) or complex values (``log(-1)``).
        """
        if depth > MAX_DEPTH:
            raise self.refuse(
                f"the formula is nested more than {MAX_DEPTH} levels deep", node
            )
        if isinstance(node, ast.Expression):
            return self.read(node.body, depth)
        if isinstance(node, ast.Constant):
            return self.constant(node)
        if isinstance(node, ast.Name):
            return self.name(node)
        if isinstance(node, ast.UnaryOp):
            return self.unary(node, depth)
        if isinstance(node, ast.BinOp):
            return self.binop(node, depth)
        if isinstance(node, ast.Call):
            return self.call(node, depth)
        kind = _REFUSED_KINDS.get(type(node), f"this kind of expression ({type(node).__name__})")
        raise self.refuse(f"{kind} is not allowed in a formula", node)

    def number(self, value: float, node: ast.AST):
        """A folded constant as a sympy number (integers stay exact when small)."""
        value = float(value)
        if not math.isfinite(value):
            raise self.refuse(
                "this part has no finite real value "
                "(for example log(0), 1/0, sqrt(-1) or a number too large)",
                node,
            )
        if value == int(value) and abs(value) <= 2**53:
            return sympy.Integer(int(value)), value
        return sympy.Float(value), value

    def constant(self, node: ast.Constant):
        v = node.value
        if isinstance(v, bool) or v is None or v is Ellipsis:
            raise self.refuse("only numbers are allowed as constants", node)
        if isinstance(v, (str, bytes)):
            raise self.refuse("text (strings) is not allowed in a formula", node)
        if isinstance(v, complex):
            raise self.refuse("complex numbers are not allowed", node)
        if isinstance(v, int):
            try:
                v = float(v)
            except OverflowError:
                v = math.inf
        if not isinstance(v, float):
            raise self.refuse("only numbers are allowed as constants", node)
        return self.number(v, node)

    def name(self, node: ast.Name):
        ident = node.id
        if ident.startswith("_"):
            raise self.refuse("names starting with '_' are not allowed", node)
        if ident in _FUNCTIONS:
            raise self.refuse(
                f"'{ident}' is a function and needs an argument in parentheses", node,
                hint=f"write {ident}(...)",
            )
        if ident in CONSTANTS:
            return self.number(CONSTANTS[ident], node)
        if ident == self.x_name:
            return self.x, None
        sym = self.params.get(ident)
        if sym is None:
            sym = self.params[ident] = sympy.Symbol(ident, real=True)
        return sym, None

    def unary(self, node: ast.UnaryOp, depth: int):
        if isinstance(node.op, ast.USub):
            expr, val = self.read(node.operand, depth + 1)
            if val is not None:
                return self.number(-val, node)
            return -expr, None
        if isinstance(node.op, ast.UAdd):
            return self.read(node.operand, depth + 1)
        word = {ast.Not: "'not'", ast.Invert: "'~'"}.get(type(node.op), "this operator")
        raise self.refuse(f"{word} is not allowed in a formula", node)

    def binop(self, node: ast.BinOp, depth: int):
        op = type(node.op)
        if op is ast.BitXor:
            raise self.refuse("'^' is not allowed", node, hint="use '**' for powers, e.g. x**2",
                              column=self.operator_column(node, "^"))
        if op not in _BINOPS:
            sym = _REFUSED_BINOPS.get(op, "this operator")
            raise self.refuse(f"the operator '{sym}' is not allowed", node,
                              hint="allowed operators are + - * / **",
                              column=self.operator_column(node, sym))
        left, lv = self.read(node.left, depth + 1)
        right, rv = self.read(node.right, depth + 1)
        if lv is not None and rv is not None:
            with np.errstate(all="ignore"):
                a, b = np.float64(lv), np.float64(rv)
                value = {ast.Add: np.add, ast.Sub: np.subtract, ast.Mult: np.multiply,
                         ast.Div: np.divide, ast.Pow: np.power}[op](a, b)
            return self.number(value, node)
        if op is ast.Add:
            return left + right, None
        if op is ast.Sub:
            return left - right, None
        if op is ast.Mult:
            return left * right, None
        if op is ast.Div:
            return left / right, None
        if rv is not None and abs(rv) > _EXACT_EXPONENT:
            # sympy would work out c**n exactly for (c*x)**n: keep huge n inexact
            right = sympy.Float(rv)
        return sympy.Pow(left, right), None

    def call(self, node: ast.Call, depth: int):
        func = node.func
        if not isinstance(func, ast.Name):
            # attribute access, calls of calls, ... : let the walker name the part
            self.read(func, depth + 1)
            raise self.refuse("only the listed functions can be called", node)
        fname = func.id
        if fname not in _FUNCTIONS:
            hint = f"allowed functions are {', '.join(FUNCTIONS)}"
            if fname in _FUNCTION_HINTS:
                hint = f"use {_FUNCTION_HINTS[fname]} instead"
            elif fname.startswith("_"):
                raise self.refuse("names starting with '_' are not allowed", func)
            raise self.refuse(f"calling '{fname}' is not allowed", node, hint=hint)
        if node.keywords:
            raise self.refuse(f"keyword arguments are not allowed in {fname}()", node)
        for arg in node.args:
            if isinstance(arg, ast.Starred):
                raise self.refuse("unpacking with * is not allowed", arg)
        if len(node.args) != 1:
            raise self.refuse(
                f"{fname}() takes exactly one argument, got {len(node.args)}", node
            )
        arg, val = self.read(node.args[0], depth + 1)
        build, numeric = _FUNCTIONS[fname]
        if val is not None:
            with np.errstate(all="ignore"):
                return self.number(numeric(np.float64(val)), node)
        return build(arg), None


def _syntax_error(text: str, src: str, lead: int, err: SyntaxError) -> FormulaError:
    """A FormulaError for a syntax error, with column and a hint where we have one."""
    offset = err.offset if isinstance(err.offset, int) and err.offset >= 1 else None
    if offset is None or offset > len(src) + 1:
        offset = len(src.rstrip()) + 1  # Python gives no place: point at the end
    column = lead + offset
    reason = (err.msg or "invalid syntax").split(" (")[0]
    # characters pasted from typeset text
    m = re.search(r"invalid character '(.)'", reason)
    hint = ""
    if m and m.group(1) in _CHAR_HINTS:
        hint = f"; type {_CHAR_HINTS[m.group(1)]} instead of '{m.group(1)}'"
    # a lone '=' anywhere but a leading "y ="
    lone_eq = [i for i, ch in enumerate(src)
               if ch == "=" and src[i - 1: i] not in ("=", "<", ">", "!", ":")
               and src[i + 1: i + 2] != "="]
    if lone_eq and not m:
        column = lead + lone_eq[0] + 1
        reason = "'=' is only allowed as a leading 'y ='"
        hint = ""
    elif "Maybe you meant" in reason or "==" in reason:
        reason = "invalid syntax"
    snippet = text[column - 1: column + 9] if column - 1 < len(text) else ""
    where = f" at column {column}"
    shown = f" near {_shorten(snippet)!r}" if snippet.strip() else " at the end"
    return FormulaError(f"syntax error{where}{shown}: {reason}{hint}",
                        text=text, column=column, snippet=snippet)


def _check_x_name(x_name) -> str:
    if (not isinstance(x_name, str) or not x_name.isidentifier() or x_name.startswith("_")
            or x_name in _FUNCTIONS or x_name in CONSTANTS):
        raise FormulaError(
            f"the variable name {x_name!r} cannot be used: it must be a plain name that is "
            "not a function or constant and does not start with '_'"
        )
    return x_name


def _const_of(node: ast.AST):
    """The float value of a part without names (other than constants), else None."""
    if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) and not isinstance(node.value, bool):
        try:
            return float(node.value)
        except OverflowError:
            return math.inf
    if isinstance(node, ast.Name) and node.id in CONSTANTS:
        return float(CONSTANTS[node.id])
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        v = _const_of(node.operand)
        return None if v is None else (-v if isinstance(node.op, ast.USub) else v)
    if isinstance(node, ast.BinOp) and type(node.op) in (ast.Add, ast.Sub, ast.Mult, ast.Div, ast.Pow):
        a, b = _const_of(node.left), _const_of(node.right)
        if a is None or b is None:
            return None
        with np.errstate(all="ignore"):
            return float({ast.Add: np.add, ast.Sub: np.subtract, ast.Mult: np.multiply, ast.Div: np.divide,
                          ast.Pow: np.power}[type(node.op)](np.float64(a), np.float64(b)))
    return None


def _power_bounds(node: ast.AST) -> tuple[float, int]:
    """(product of nested constant exponents, height of non-constant power towers)."""
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Pow):
        if _const_of(node) is not None:  # folded numerically by the reader
            return 1.0, 0
        size, tower = _power_bounds(node.left)
        exponent = _const_of(node.right)
        if exponent is not None:
            mag = abs(exponent) if math.isfinite(exponent) else math.inf
            return size * max(1.0, mag), tower
        rsize, rtower = _power_bounds(node.right)
        return max(size, rsize), 1 + max(tower, rtower)
    size, tower = 1.0, 0
    for child in ast.iter_child_nodes(node):
        s, t = _power_bounds(child)
        size, tower = max(size, s), max(tower, t)
    return size, tower


def _check_power_bounds(tree: ast.AST, text: str) -> None:
    size, tower = _power_bounds(tree)
    if size > MAX_TOTAL_EXPONENT:
        shown = f"{size:.3g}" if math.isfinite(size) else "an unbounded number"
        raise FormulaError(
            f"the powers in this formula reach a total exponent of {shown}; the limit is "
            f"{MAX_TOTAL_EXPONENT} (powers of powers multiply their exponents, so ((c*x)**a)**b has "
            "exponent a*b)", text=text)
    if tower > MAX_POWER_TOWER:
        raise FormulaError(
            f"the formula stacks {tower} powers with non-constant exponents (like x**x**x); the limit "
            f"is {MAX_POWER_TOWER}", text=text)


_SCRIPT_FREE = {"DIGIT", "LOW", "COMMON"}


def _letter_script(ch: str) -> str:
    """A rough script name of one identifier character ('' for digits and '_')."""
    if ch.isascii():
        return "LATIN" if ch.isalpha() else ""
    try:
        word = unicodedata.name(ch).split()[0]
    except ValueError:
        return "UNKNOWN"
    return "" if word in _SCRIPT_FREE else word


_IDENT_RE = re.compile(r"[^\W\d]\w*")


def _check_identifiers(src: str, lead: int, text: str) -> None:
    """Refuse look-alike names: a name that Unicode normalisation (NFKC, which Python
    applies to names) would turn into another one (mathematical bold a is a), and a name
    that mixes scripts (a Cyrillic a inside Latin letters). The message shows the code point."""
    seen: dict[str, tuple[str, int]] = {}  # script -> (first letter, column) over all names
    for m in _IDENT_RE.finditer(src):
        ident = m.group()
        for k, ch in enumerate(ident):
            sc = _letter_script(ch)
            if sc and sc not in seen:
                seen[sc] = (ch, lead + m.start() + k + 1)
        if ident.isascii():
            continue
        for k, ch in enumerate(ident):
            norm = unicodedata.normalize("NFKC", ch)
            if norm != ch:
                col = lead + m.start() + k + 1
                raise FormulaError(
                    f"the name {ident!r} contains {ch!r} (U+{ord(ch):04X}) at column {col}, which stands for "
                    f"{norm!r}; write {unicodedata.normalize('NFKC', ident)!r} if that is meant",
                    text=text, column=col, snippet=ch)
        scripts = {_letter_script(ch) for ch in ident} - {""}
        if len(scripts) > 1:
            odd = next(ch for ch in ident if _letter_script(ch) not in ("", "LATIN")) if "LATIN" in scripts \
                else ident[0]
            col = lead + m.start() + ident.index(odd) + 1
            raise FormulaError(
                f"the name {ident!r} mixes scripts ({', '.join(sorted(scripts)).lower()}): {odd!r} is "
                f"U+{ord(odd):04X} {unicodedata.name(odd, '')}; use letters of one script in a name",
                text=text, column=col, snippet=odd)
    # Latin names beside names in another alphabet that has Latin look-alikes (Greek is
    # allowed: mu, sigma and tau are common parameter names)
    others = [sc for sc in seen if sc not in ("LATIN", "GREEK")]
    if others and ("LATIN" in seen or len(others) > 1):
        ch, col = seen[others[0]]
        raise FormulaError(
            f"the formula mixes Latin letters with {others[0].lower()} letters: {ch!r} at column {col} is "
            f"U+{ord(ch):04X} {unicodedata.name(ch, '')}, which can look like a Latin letter; use letters of "
            "one alphabet", text=text, column=col, snippet=ch)


@functools.lru_cache(maxsize=256)
def _analyse_cached(text: str, x_name: str) -> ParsedFormula:
    if len(text) > MAX_LENGTH:
        raise FormulaError(
            f"the formula is {len(text)} characters long; the limit is {MAX_LENGTH}",
            text=text[:MAX_LENGTH],
        )
    # every kind of white space (tabs, newlines, no-break spaces) is a plain space;
    # one character for one, so columns stay those of the user's text
    flat = "".join(" " if ch.isspace() else ch for ch in text)
    for i, ch in enumerate(flat):
        if unicodedata.category(ch) in ("Cc", "Cf", "Cs", "Co", "Cn"):
            raise FormulaError(
                f"the formula contains a control character U+{ord(ch):04X} at column {i + 1}",
                text=text, column=i + 1, snippet=ch,
            )
    m = _LEADING_Y.match(flat)
    body_start = m.end() if m else 0
    body = flat[body_start:]
    lead = body_start + (len(body) - len(body.lstrip()))
    src = body.strip()
    if not src:
        raise FormulaError("the formula is empty" if not m else
                           "the formula is empty after 'y ='", text=text)
    _check_identifiers(src, lead, text)
    try:
        tree = ast.parse(src, mode="eval")
    except SyntaxError as err:
        raise _syntax_error(text, src, lead, err) from None
    except (ValueError, MemoryError, RecursionError):
        raise FormulaError("the formula cannot be read (it holds characters or nesting "
                           "that a formula cannot have)", text=text) from None
    try:
        _check_power_bounds(tree, text)
    except RecursionError:
        raise FormulaError("the formula is nested too deeply", text=text) from None

    reader = _Reader(text, src, lead, x_name)
    try:
        expr, _ = reader.read(tree)
    except RecursionError:
        raise FormulaError("the formula is nested too deeply", text=text) from None
    params = tuple(reader.params)
    cleaned = " ".join(src.split())
    if not params:
        raise FormulaError(
            f"the formula has no parameters to fit: {_shorten(cleaned)!r}; every name "
            f"other than {x_name} is a parameter (e.g. 'a*{x_name} + b')",
            text=text,
        )
    # sympy may still simplify its way to a non-real value (log(a - a), 1/(a - a))
    bad = (sympy.zoo, sympy.nan, sympy.oo, -sympy.oo, sympy.I)
    try:
        if any(expr.has(b) for b in bad):
            raise FormulaError(
                f"the formula {_shorten(cleaned)!r} simplifies to something with no finite "
                "real value (for example log(a - a) or 1/(a - a))",
                text=text,
            )
        syms = [reader.params[n] for n in params]
        derivatives = tuple(sympy.diff(expr, s) for s in syms)
        linear = all(not (d.free_symbols & set(syms)) for d in derivatives)
        if linear:
            # affine in the parameters; linear only if no part is left over when every
            # parameter is 0 (no expand(): it could take for ever on (x + 1)**100000)
            rest = expr.subs({s: 0 for s in syms})
            linear = rest == 0
        uses_x = reader.x in expr.free_symbols
    except RecursionError:
        raise FormulaError("the formula is nested too deeply", text=text) from None
    return ParsedFormula(text=cleaned, x_name=x_name, param_names=params, expr=expr,
                         derivatives=derivatives, linear=bool(linear), uses_x=uses_x)


def analyse_formula(text: str, *, x_name: str = "x") -> ParsedFormula:
    """Check a formula and work out its parameters and exact derivatives.

    Parameters
    ----------
    text : str
        The formula, e.g. ``"A*exp(-x/tau) + C"`` or ``"y = a + b*x"``.
    x_name : str, optional
        Name of the independent variable (default ``"x"``).

    Returns
    -------
    ParsedFormula

    Raises
    ------
    FormulaError
        When the text is not an allowed formula; the message quotes the offending part
        and gives its column.
    """
    if not isinstance(text, str):
        raise FormulaError(f"a formula must be text, not {type(text).__name__}")
    _check_x_name(x_name)
    return _analyse_cached(text, x_name)


# ---------------------------------------------------------------------------
# turning sympy expressions into numpy closures

Closure = Callable[[np.ndarray, np.ndarray], object]

_NUMPY_FUNCS = {
    sympy.exp: np.exp,
    sympy.log: np.log,
    sympy.sin: np.sin,
    sympy.cos: np.cos,
    sympy.tan: np.tan,
    sympy.atan: np.arctan,
    sympy.tanh: np.tanh,
    sympy.Abs: np.abs,
    sympy.sign: np.sign,
    RealAbs: np.abs,
    RealSign: np.sign,
    # sympy may bring these in while simplifying; on real values they are plain
    sympy.sinh: np.sinh,
    sympy.cosh: np.cosh,
    sympy.re: lambda v: v,
    sympy.conjugate: lambda v: v,
    sympy.im: lambda v: 0.0 * v,
}


def _float_of(number) -> float:
    """A sympy number as a float; huge values become +-inf, non-real ones an error."""
    if number in (sympy.nan, sympy.zoo):
        return math.nan
    if number == sympy.oo:
        return math.inf
    if number == -sympy.oo:
        return -math.inf
    if not number.is_real:
        return math.nan  # e.g. I from log(-1) in d/dp (-1)**p: no real value
    try:
        return float(number)
    except OverflowError:
        return math.copysign(math.inf, float(sympy.sign(number)))


class _Compiler:
    """Compiles sympy expressions to closures ``g(x, p)`` over numpy arrays."""

    def __init__(self, x: sympy.Symbol, params: tuple[sympy.Symbol, ...]):
        self.x = x
        self.index = {s: i for i, s in enumerate(params)}
        self.cache: dict[sympy.Expr, Closure] = {}

    def __call__(self, expr) -> Closure:
        got = self.cache.get(expr)
        if got is None:
            got = self.cache[expr] = self._compile(expr)
        return got

    def _compile(self, expr) -> Closure:
        if expr.is_Number or isinstance(expr, sympy.NumberSymbol) or expr in (
                sympy.zoo, sympy.nan, sympy.I):
            c = _float_of(expr)
            return lambda x, p: c
        if expr.is_Symbol:
            if expr == self.x:
                return lambda x, p: x
            if expr in self.index:
                i = self.index[expr]
                return lambda x, p: p[i]
            raise FormulaError(f"internal: unknown name {expr} in a formula expression")
        if not expr.free_symbols:
            # a constant made of functions of numbers, e.g. log(10): work it out once
            inner = self._compile_node(expr)
            with np.errstate(all="ignore"):
                c = float(inner(np.zeros(1), np.zeros(0)))
            return lambda x, p: c
        return self._compile_node(expr)

    def _compile_node(self, expr) -> Closure:
        if expr.is_Add:
            terms = tuple(self(a) for a in expr.args)

            def add(x, p):
                total = terms[0](x, p)
                for t in terms[1:]:
                    total = total + t(x, p)
                return total
            return add
        if expr.is_Mul:
            factors = tuple(self(a) for a in expr.args)

            def mul(x, p):
                prod = factors[0](x, p)
                for t in factors[1:]:
                    prod = prod * t(x, p)
                return prod
            return mul
        if expr.is_Pow:
            base, expo = expr.args
            b = self(base)
            if expo.is_Number:
                e = _float_of(expo)
                if e == 0.5:
                    return lambda x, p: np.sqrt(b(x, p))
                if e == -0.5:
                    return lambda x, p: 1.0 / np.sqrt(b(x, p))
                if e == -1.0:
                    return lambda x, p: 1.0 / b(x, p)
                if e == 2.0:
                    def square(x, p):
                        v = b(x, p)
                        return v * v
                    return square
                return lambda x, p: np.power(b(x, p), e)
            if base == sympy.E:
                ex = self(expo)
                return lambda x, p: np.exp(ex(x, p))
            ex = self(expo)
            return lambda x, p: np.power(b(x, p), ex(x, p))
        if expr.func is sympy.atan2 and len(expr.args) == 2:
            num, den = (self(a) for a in expr.args)
            return lambda x, p: np.arctan2(num(x, p), den(x, p))
        func = _NUMPY_FUNCS.get(expr.func)
        if func is not None and len(expr.args) == 1:
            arg = self(expr.args[0])
            return lambda x, p: func(arg(x, p))
        raise FormulaError(f"internal: cannot evaluate {type(expr).__name__} in a formula")


def _as_array(value, shape) -> np.ndarray:
    """A float array of the given shape (constants and scalars are broadcast)."""
    out = np.asarray(value, dtype=float)
    if out.shape != shape:
        out = np.broadcast_to(out, shape)
    return np.array(out, dtype=float)  # always a fresh, writable array


# ---------------------------------------------------------------------------
# the public functions


def parse_formula(text: str, *, x_name: str = "x", name: str | None = None) -> Model:
    """Turn a formula into a :class:`~fitcore.model.Model` with an exact Jacobian.

    Parameters
    ----------
    text : str
        The formula in Python expression syntax, e.g. ``"A*exp(-x/tau) + C"``; an
        optional leading ``"y ="`` is dropped. The rules are in the module docstring.
    x_name : str, optional
        Name of the independent variable (default ``"x"``).
    name : str, optional
        Name of the model; default: the cleaned formula text.

    Returns
    -------
    Model
        ``param_names`` in order of first appearance; ``f`` and ``jac`` evaluate the
        expression and its exact derivatives (from :func:`sympy.diff`) on numpy arrays;
        ``guess`` returns 1.0 for every parameter; ``basis`` is set when the formula
        is linear in all its parameters.

    Raises
    ------
    FormulaError
        When the text is not an allowed formula. The message quotes the offending part
        and gives its column, e.g. ``attribute access is not allowed in a formula:
        'os.system' at column 1``.

    Notes
    -----
    Non-finite intermediate values (overflow in ``exp``, ``log`` of a negative number)
    give ``inf``/``nan`` without warnings; the solver treats such values as a failed
    step.

    Examples
    --------
    >>> m = parse_formula("y = A*exp(-x/tau) + C")
    >>> m.param_names
    ('A', 'tau', 'C')
    """
    parsed = analyse_formula(text, x_name=x_name)
    syms = tuple(sympy.Symbol(n, real=True) for n in parsed.param_names)
    comp = _Compiler(sympy.Symbol(parsed.x_name, real=True), syms)
    f_c = comp(parsed.expr)
    d_c = tuple(comp(d) for d in parsed.derivatives)
    k = len(syms)
    label = parsed.text if name is None else str(name)

    def _args(x, p):
        x = np.asarray(x, dtype=float)
        p = np.asarray(p, dtype=float).ravel()
        if p.size != k:
            raise ValueError(
                f"the formula {label!r} has {k} parameter(s) "
                f"({', '.join(parsed.param_names)}), but {p.size} value(s) were given"
            )
        return x, p

    def f(x, p):
        x, p = _args(x, p)
        with np.errstate(all="ignore"):
            return _as_array(f_c(x, p), x.shape)

    def jac(x, p):
        x, p = _args(x, p)
        x = x.ravel()
        out = np.empty((x.size, k))
        with np.errstate(all="ignore"):
            for j, d in enumerate(d_c):
                out[:, j] = _as_array(d(x, p), x.shape)
        return out

    def guess(x, y):
        return np.ones(k)

    basis = None
    if parsed.linear:
        ones = np.ones(k)

        def basis(x):
            # for a linear formula the derivatives are free of parameters
            return jac(x, ones)

    return Model(
        name=label,
        param_names=parsed.param_names,
        f=f,
        jac=jac,
        guess=guess,
        basis=basis,
        formula=parsed.formula,
        title="User formula",
        # in data units ("y/x"), by dimensional analysis; blank where the formula
        # does not fix a parameter's unit (fitcore.units)
        units=formula_units(parsed.expr, sympy.Symbol(parsed.x_name, real=True), syms),
    )


def validate_formula(text: str, *, x_name: str = "x") -> tuple[bool, str, tuple[str, ...]]:
    """Check a formula for live feedback while it is typed.

    Parameters
    ----------
    text : str
        The formula being typed.
    x_name : str, optional
        Name of the independent variable (default ``"x"``).

    Returns
    -------
    ok : bool
        True when :func:`parse_formula` would accept the text.
    message : str
        For a good formula a short summary ("parameters: A, tau, C"), with a note when
        the formula is linear or does not use x; otherwise the reason it is refused.
    param_names : tuple of str
        The parameters (empty when the formula is refused).
    """
    try:
        parsed = analyse_formula(text, x_name=x_name)
    except FormulaError as err:
        return False, err.message, ()
    msg = f"parameters: {', '.join(parsed.param_names)}"
    if parsed.linear:
        msg += " (linear in its parameters: no start values needed)"
    if not parsed.uses_x:
        msg += f"; note: the formula does not use {parsed.x_name}, so the model is a constant"
    return True, msg, parsed.param_names
