r"""Robust losses as functions of the standardised residual ``u = r / s``.

Every loss provides, for an array ``u``:

* ``rho(u)``: the loss, with ``rho(u) ~ u**2 / 2`` for small ``u``;
* ``psi(u) = rho'(u)``;
* ``weight(u) = psi(u) / u``: the IRLS weight, normalised so that ``weight(0) = 1``
  (this is the weight Ballast shows per point);
* ``dpsi(u) = psi'(u)``: used by the covariance recipes.

Tuning constants
----------------
The tuning constant ``k`` sits inside the loss (statsmodels' convention): Huber's
``rho`` is quadratic for ``|u| <= k``. The defaults give 95 % asymptotic efficiency
at the normal distribution for the location model (Holland & Welsch 1977; values in
``tests/reference/data/check-values.md`` section 2): Huber 1.345, Cauchy 2.3849
(``w = 1/(1 + (u/k)^2)``), Welsch 2.9846 (``w = exp(-(u/k)^2)``), Tukey biweight
4.685. Pseudo-Huber and Geman-McClure are the general loss at alpha = 1 and -2, whose
95 % constants in Barron's parametrisation are 1.28710 and 1.89371. For the general
loss at any other alpha the 95 % constant is computed numerically
(:func:`tuning_for_efficiency`).

The general loss
----------------
Barron (CVPR 2019), with ``z = (u/k)^2`` and ``b = |alpha - 2|``::

    rho_B(u) = (b / alpha) * ((z / b + 1)^(alpha / 2) - 1)

evaluated as ``(b/alpha) * expm1(alpha/2 * log1p(z/b))`` (stable near alpha = 0 and 2),
with the exact limits alpha = 2 (``z/2``), 0 (``log1p(z/2)``), -inf
(``1 - exp(-z/2)``) and +inf (``expm1(z/2)``). Ballast uses ``rho = k^2 rho_B`` so that
``rho ~ u^2/2`` near zero like the other losses. The normalised weight is
``(z/b + 1)^(alpha/2 - 1)``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Callable

import numpy as np
from ._lazy import LazyModule

optimize = LazyModule("scipy.optimize", globals())  # lazy: 0.4 s to import, needed once a fit runs


def _as_array(u):
    return np.asarray(u, dtype=float)


@dataclass(frozen=True)
class Loss:
    """Base class. Subclasses implement ``rho``, ``weight`` and ``dpsi``."""

    name: str = "l2"
    tuning: float | None = None
    alpha: float | None = None

    @property
    def title(self) -> str:
        return loss_title(self.name)

    @property
    def redescending(self) -> bool:
        """True when psi returns towards zero for large residuals (non-convex rho)."""
        return False

    @property
    def convex(self) -> bool:
        return not self.redescending

    def rho(self, u):
        u = _as_array(u)
        return 0.5 * u * u

    def weight(self, u):
        return np.ones_like(_as_array(u))

    def psi(self, u):
        u = _as_array(u)
        return u * self.weight(u)

    def dpsi(self, u):
        return np.ones_like(_as_array(u))

    def sum_rho(self, u, psi=None) -> float:
        """``sum rho(u)``; ``psi = psi(u)`` may be passed where a loss can use it."""
        return float(np.sum(self.rho(u)))

    def psi_dpsi(self, u, out=None):
        """``(psi(u), dpsi(u))``, sharing work where a loss can (equal to the two).

        ``out``: optionally three float arrays shaped like ``u`` (psi, psi', scratch)
        that a loss may write into instead of allocating; the returned arrays may then
        be the first two. Losses without an in-place form ignore it.
        """
        return self.psi(u), self.dpsi(u)

    def describe(self) -> str:
        """Loss with its shape and tuning constant, for reports."""
        parts = [self.title]
        if self.alpha is not None and self.name in ("general", "adaptive"):
            parts.append(f"alpha = {_fmt_alpha(self.alpha)}")
        if self.tuning is not None:
            parts.append(f"tuning constant k = {self.tuning:.6g} (in units of the scale)")
        return ", ".join(parts)


def _fmt_alpha(a: float) -> str:
    if math.isinf(a):
        return "-inf" if a < 0 else "inf"
    return f"{a:.6g}"


class L2(Loss):
    pass


@dataclass(frozen=True)
class L1(Loss):
    """Least absolute deviations. ``rho = |u|``.

    The displayed weight is ``min(1, 1/|u|)``: the IRLS weight ``1/|u|`` relative to a
    point one scale unit away (the fit itself is solved exactly, not by IRLS).
    """

    def rho(self, u):
        return np.abs(_as_array(u))

    def psi(self, u):
        return np.sign(_as_array(u))

    def weight(self, u):
        a = np.abs(_as_array(u))
        with np.errstate(divide="ignore"):
            return np.where(a > 1.0, 1.0 / np.maximum(a, 1e-300), 1.0)

    def dpsi(self, u):
        return np.zeros_like(_as_array(u))


@dataclass(frozen=True)
class Huber(Loss):
    # (in-place arithmetic on fresh arrays: these run over every point in each pass)
    def rho(self, u):
        u = np.abs(_as_array(u))
        k = self.tuning
        return np.where(u <= k, 0.5 * u * u, k * u - 0.5 * k * k)

    def psi(self, u):
        return np.clip(_as_array(u), -self.tuning, self.tuning)

    def weight(self, u):
        u = _as_array(u)
        w = np.abs(u, out=np.empty_like(u))
        with np.errstate(divide="ignore"):
            np.divide(self.tuning, w, out=w)  # k/0 = inf, then min(1, inf) = 1
        return np.minimum(w, 1.0, out=w)

    def dpsi(self, u):
        u = _as_array(u)
        a = np.abs(u, out=np.empty_like(u))
        return np.less_equal(a, self.tuning, out=a)  # 1.0 inside, 0.0 outside

    def psi_dpsi(self, u, out=None):
        u = _as_array(u)
        if out is None:
            psi = self.psi(u)
            d = np.empty_like(psi)
        else:
            psi = np.clip(u, -self.tuning, self.tuning, out=out[0])
            d = out[1]
        # psi' = 1 exactly where the clip left u alone (|u| <= k), else 0
        return psi, np.equal(psi, u, out=d)

    def sum_rho(self, u, psi=None) -> float:
        # rho = psi (u - psi/2) on both pieces, so the sum is two dot products
        if psi is None:
            return super().sum_rho(u)
        u = _as_array(u)
        return float(psi @ u - 0.5 * (psi @ psi))


@dataclass(frozen=True)
class Tukey(Loss):
    @property
    def redescending(self):
        return True

    def rho(self, u):
        k = self.tuning
        t = np.minimum((_as_array(u) / k) ** 2, 1.0)
        return (k * k / 6.0) * (1.0 - (1.0 - t) ** 3)

    def weight(self, u):
        t = (_as_array(u) / self.tuning) ** 2
        return np.where(t < 1.0, (1.0 - t) ** 2, 0.0)

    def dpsi(self, u):
        t = (_as_array(u) / self.tuning) ** 2
        return np.where(t < 1.0, (1.0 - t) * (1.0 - 5.0 * t), 0.0)


@dataclass(frozen=True)
class Cauchy(Loss):
    """Cauchy (Lorentzian) loss in the ``w = 1/(1 + (u/k)^2)`` convention."""

    @property
    def redescending(self):
        return True

    def rho(self, u):
        k = self.tuning
        return 0.5 * k * k * np.log1p((_as_array(u) / k) ** 2)

    def weight(self, u):
        u = _as_array(u)
        w = np.divide(u, self.tuning, out=np.empty_like(u))
        np.multiply(w, w, out=w)
        w += 1.0
        return np.reciprocal(w, out=w)

    def dpsi(self, u):
        u = _as_array(u)
        t = np.divide(u, self.tuning, out=np.empty_like(u))
        np.multiply(t, t, out=t)
        d = np.add(t, 1.0, out=np.empty_like(t))
        np.multiply(d, d, out=d)
        np.subtract(1.0, t, out=t)
        return np.divide(t, d, out=t)

    def psi_dpsi(self, u, out=None):
        # the same arithmetic as psi (= u * weight) and dpsi, sharing t = (u/k)^2
        u = _as_array(u)
        P, D, T = (None, None, None) if out is None else out
        t = np.divide(u, self.tuning, out=np.empty_like(u) if T is None else T)
        np.multiply(t, t, out=t)
        d = np.add(t, 1.0, out=np.empty_like(t) if D is None else D)
        psi = np.reciprocal(d, out=P)
        np.multiply(u, psi, out=psi)
        np.multiply(d, d, out=d)
        np.subtract(1.0, t, out=t)
        return psi, np.divide(t, d, out=t if D is None else d)


@dataclass(frozen=True)
class Welsch(Loss):
    """Welsch (Leclerc) loss in the ``w = exp(-(u/k)^2)`` convention."""

    @property
    def redescending(self):
        return True

    def rho(self, u):
        k = self.tuning
        return 0.5 * k * k * (-np.expm1(-((_as_array(u) / k) ** 2)))

    def weight(self, u):
        return np.exp(-((_as_array(u) / self.tuning) ** 2))

    def dpsi(self, u):
        t = (_as_array(u) / self.tuning) ** 2
        return np.exp(-t) * (1.0 - 2.0 * t)


def barron_rho(x, alpha: float, c: float = 1.0):
    """Barron's general loss ``rho(x, alpha, c)`` (his normalisation, ``~ (x/c)^2/2``)."""
    x = _as_array(x)
    z = (x / c) ** 2
    if alpha == 2.0:
        return 0.5 * z
    if alpha == 0.0:
        return np.log1p(0.5 * z)
    if math.isinf(alpha):
        return -np.expm1(-0.5 * z) if alpha < 0 else np.expm1(0.5 * z)
    b = abs(alpha - 2.0)
    with np.errstate(over="ignore"):
        return (b / alpha) * np.expm1(0.5 * alpha * np.log1p(z / b))


def barron_weight(x, alpha: float, c: float = 1.0):
    """Normalised IRLS weight ``c^2 psi(x)/x`` of the general loss, in (0, 1] for alpha <= 2."""
    x = _as_array(x)
    z = (x / c) ** 2
    if alpha == 2.0:
        return np.ones_like(z)
    if alpha == 0.0:
        return 1.0 / (1.0 + 0.5 * z)
    if math.isinf(alpha):
        with np.errstate(over="ignore"):
            return np.exp(-0.5 * z) if alpha < 0 else np.exp(0.5 * z)
    b = abs(alpha - 2.0)
    with np.errstate(over="ignore"):
        return np.exp((0.5 * alpha - 1.0) * np.log1p(z / b))


def barron_dpsi(x, alpha: float, c: float = 1.0):
    """``c^2 d psi / dx`` of the general loss."""
    x = _as_array(x)
    z = (x / c) ** 2
    if alpha == 2.0:
        return np.ones_like(z)
    if math.isinf(alpha):
        with np.errstate(over="ignore"):
            if alpha < 0:
                return np.exp(-0.5 * z) * (1.0 - z)
            return np.exp(0.5 * z) * (1.0 + z)
    b = abs(alpha - 2.0)
    with np.errstate(over="ignore"):
        base = np.log1p(z / b)
        return np.exp((0.5 * alpha - 2.0) * base) * (1.0 + z / b + (alpha - 2.0) / b * z)


@dataclass(frozen=True)
class General(Loss):
    """Barron's general loss with shape ``alpha`` and width ``k`` (``rho = k^2 rho_B(u, alpha, k)``)."""

    @property
    def redescending(self):
        return self.alpha < 1.0

    @property
    def convex(self):
        return 1.0 <= self.alpha <= 2.0 or self.alpha >= 2.0

    def rho(self, u):
        k = self.tuning
        return k * k * barron_rho(u, self.alpha, k)

    def weight(self, u):
        return barron_weight(u, self.alpha, self.tuning)

    def dpsi(self, u):
        return barron_dpsi(u, self.alpha, self.tuning)


def efficiency(loss: Loss) -> float:
    """Asymptotic efficiency at the normal, location model: ``E[psi']^2 / E[psi^2]``.

    Computed by quadrature against the standard normal density.
    """
    phi = lambda t: math.exp(-0.5 * t * t) / math.sqrt(2 * math.pi)  # noqa: E731
    psi = lambda t: float(loss.psi(np.array([t]))[0])  # noqa: E731
    dpsi = lambda t: float(loss.dpsi(np.array([t]))[0])  # noqa: E731
    pts = [loss.tuning] if loss.tuning else None
    lim = 40.0
    if loss.name == "l1":
        return 2.0 / math.pi
    from scipy import integrate  # lazy: 0.3 s to import, seldom needed

    a = integrate.quad(lambda t: 2 * dpsi(t) * phi(t), 0, lim, points=pts, epsabs=1e-13, epsrel=1e-12, limit=200)[0]
    b = integrate.quad(lambda t: 2 * psi(t) ** 2 * phi(t), 0, lim, points=pts, epsabs=1e-13, epsrel=1e-12, limit=200)[0]
    return a * a / b


@lru_cache(maxsize=256)
def tuning_for_efficiency(name: str, target: float = 0.95, alpha: float | None = None) -> float:
    """Tuning constant that gives ``target`` Gaussian efficiency (location model)."""

    def f(k):
        return efficiency(_make(name, k, alpha)) - target

    lo, hi = 0.05, 50.0
    return float(optimize.brentq(f, lo, hi, xtol=1e-12))


# ============================================================================ registry
@dataclass(frozen=True)
class LossEntry:
    """One row of the loss registry: everything the engine, the reports and the views
    know about a loss.

    Attributes
    ----------
    name
        The internal name (``fit(..., loss=name)``).
    make
        ``make(name, tuning, alpha) -> Loss``: builds the loss (the class, or a shape
        fixed for a named member of the general family).
    title
        The full title, for reports, tooltips and the method statement.
    short
        A short title for table headers and plot legends.
    menu
        The label in the window's loss list (where the full title is too wide).
    default_tuning
        The tuning constant giving 95 % Gaussian efficiency (None where none is used or
        where it is computed from the shape).
    family
        ``"monotone"`` (psi never falls: every point keeps some pull),
        ``"redescending"`` (far points get weight towards 0), or ``"shape"`` (the
        general and adaptive losses: redescending for alpha < 1).
    colour, dash
        The loss's pen in plots: RGB and dash pattern (``"solid"``, ``"dash"``,
        ``"dot"``, ``"dashdot"``, ``"dashdotdot"``); dash as well as hue, for readers
        who do not tell the colours apart. Our own choice of pens.
    own_scale
        True where no scale or tuning constant the analyst gives changes the estimate:
        least squares and L1 (scale-free) and the adaptive loss (it fits its own scale,
        Barron's c). ``fit()`` refuses a fixed scale or a tuning constant for them, and
        their scale stays estimated when sigma are absolute.
    """

    name: str
    make: Callable[[str, "float | None", "float | None"], Loss]
    title: str
    short: str
    menu: str
    default_tuning: float | None
    family: str
    colour: tuple[int, int, int]
    dash: str
    own_scale: bool = False

    @property
    def redescending(self) -> bool:
        return self.family == "redescending"


def _plain(cls):
    return lambda name, tuning, alpha: cls(name)


def _tuned(cls):
    return lambda name, tuning, alpha: cls(name, tuning)


def _shaped(alpha_fixed: float | None):
    if alpha_fixed is None:
        return lambda name, tuning, alpha: General(name, tuning, alpha)
    return lambda name, tuning, alpha: General(name, tuning, alpha_fixed)


#: the loss registry, in menu order. To add a loss: write its class above (rho,
#: weight, dpsi) and add ONE row here; tests in tests/fitcore/test_losses.py check
#: every row (efficiency of the default tuning, weight(0) = 1, psi = rho').
#: Default tunings: 95 % Gaussian efficiency (check-values.md sections 1.7 and 2).
LOSSES: dict[str, LossEntry] = {e.name: e for e in (
    LossEntry("l2", _plain(L2), "least squares (L2)", "least squares", "least squares (L2)",
              None, "monotone", (70, 70, 70), "dash", own_scale=True),
    LossEntry("l1", _plain(L1), "least absolute deviations (L1)", "L1", "least absolute (L1)",
              None, "monotone", (130, 85, 30), "dashdot", own_scale=True),
    LossEntry("huber", _tuned(Huber), "Huber", "Huber", "Huber",
              1.345, "monotone", (31, 92, 170), "solid"),
    LossEntry("pseudo_huber", _shaped(1.0), "pseudo-Huber", "pseudo-Huber", "pseudo-Huber",
              1.28710, "monotone", (95, 160, 215), "dot"),
    LossEntry("cauchy", _tuned(Cauchy), "Cauchy", "Cauchy", "Cauchy",
              2.3849, "redescending", (214, 120, 0), "solid"),
    LossEntry("geman_mcclure", _shaped(-2.0), "Geman-McClure", "Geman-McClure",
              "Geman-McClure", 1.89371, "redescending", (150, 150, 20), "dashdot"),
    LossEntry("welsch", _tuned(Welsch), "Welsch", "Welsch", "Welsch",
              2.9846, "redescending", (190, 55, 55), "dot"),
    LossEntry("tukey", _tuned(Tukey), "Tukey biweight", "Tukey", "Tukey biweight",
              4.685, "redescending", (0, 135, 105), "dash"),
    LossEntry("general", _shaped(None), "general robust loss (Barron)", "general",
              "general (Barron)", None, "shape", (105, 60, 175), "dashdotdot"),
    LossEntry("adaptive", _shaped(None),
              "adaptive robust loss (Barron, alpha and scale by maximum likelihood)",
              "adaptive", "adaptive (Barron)", None, "shape", (165, 35, 140), "solid",
              own_scale=True),
)}

LOSS_NAMES = tuple(LOSSES)
LOSS_TITLES = {n: e.title for n, e in LOSSES.items()}
DEFAULT_TUNING = {n: e.default_tuning for n, e in LOSSES.items() if e.default_tuning is not None}
REDESCENDING = {n for n, e in LOSSES.items() if e.family == "redescending"}
#: the losses that take no fixed scale or tuning constant (``LossEntry.own_scale``)
OWN_SCALE = tuple(n for n, e in LOSSES.items() if e.own_scale)


def loss_entry(name: str) -> LossEntry:
    """The registry row of ``name`` (ValueError for an unknown loss)."""
    try:
        return LOSSES[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown loss {name!r}; choose one of {', '.join(LOSS_NAMES)}") \
            from None


def loss_title(name: str) -> str:
    """The full title of a loss (its name when unknown): what reports and every view
    print."""
    e = LOSSES.get(name) if isinstance(name, str) else None
    return e.title if e is not None else str(name)


def loss_short_title(name: str) -> str:
    """The short title for table headers and legends (its name when unknown)."""
    e = LOSSES.get(name) if isinstance(name, str) else None
    return e.short if e is not None else str(name)


def loss_phrase(name: str) -> str:
    """The loss in running text: ``"the Huber loss"``, ``"the general robust loss
    (Barron)"`` (the word "loss" once)."""
    title = loss_title(name)
    return f"the {title}" if "loss" in title.split(" (")[0] else f"the {title} loss"


def _make(name: str, tuning: float | None, alpha: float | None) -> Loss:
    return loss_entry(name).make(name, tuning, alpha)


_GENERAL_ALWAYS_EFFICIENT = 1.0  # width where every width is 95 % efficient


def default_general_tuning(alpha: float) -> float:
    """95 %-efficiency width of the general loss at shape ``alpha``.

    From about alpha = 1.55 up to 2 the loss is more than 95 % efficient at every
    width (its tails grow like ``|u|^alpha``, nearly quadratic), so the convention
    has no solution; the width is then 1 scale unit, as for alpha >= 2 (Barron's
    ``c`` equal to the scale).
    """
    if alpha >= 2.0:
        return 1.0
    alpha = float(alpha)
    if efficiency(_make("general", 0.05, alpha)) >= 0.95:
        return _GENERAL_ALWAYS_EFFICIENT
    return tuning_for_efficiency("general", 0.95, alpha)


def get_loss(name: str, tuning: float | None = None, alpha: float | None = None) -> Loss:
    """Return the loss object for ``name``.

    Parameters
    ----------
    name
        One of :data:`LOSS_NAMES`.
    tuning
        Tuning constant in units of the scale; default gives 95 % Gaussian efficiency.
    alpha
        Shape of the general loss (any real number or +-inf; required for
        ``"general"``). For ``"adaptive"`` it is the current shape (default 1) and the
        width is 1: the scale itself is Barron's ``c``, fitted by maximum likelihood.
    """
    if not isinstance(name, str) or name not in LOSS_NAMES:
        raise ValueError(f"unknown loss {name!r}; choose one of {', '.join(LOSS_NAMES)}")
    if tuning is not None:
        if isinstance(tuning, bool):  # True is no constant, though float() reads it as 1
            raise ValueError(f"the tuning constant must be a positive number, not {tuning!r}")
        tuning = float(tuning)
        if not (tuning > 0 and math.isfinite(tuning)):
            raise ValueError(f"the tuning constant must be a positive number, not {tuning!r}")
    if name == "general":
        if alpha is None:
            raise ValueError("the general loss needs a shape parameter alpha (e.g. alpha=1)")
        alpha = float(alpha)
        if math.isnan(alpha):
            raise ValueError("alpha must be a number (it may be -inf or inf), not NaN")
        if tuning is None:
            tuning = default_general_tuning(alpha)
    elif name == "adaptive":
        alpha = 1.0 if alpha is None else float(alpha)
        if not 0.0 <= alpha <= 2.0:
            raise ValueError("the adaptive loss keeps alpha in [0, 2]")
        tuning = 1.0
    elif name in DEFAULT_TUNING:
        tuning = DEFAULT_TUNING[name] if tuning is None else tuning
    else:
        tuning = None
    return _make(name, tuning, alpha)
