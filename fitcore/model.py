"""The :class:`Model` type: a function of x with named parameters.

A model bundles everything the solvers need:

* ``f(x, p)``: model values for a 1-D array ``x`` and a parameter vector ``p``;
* ``jac(x, p)``: the exact Jacobian, shape ``(len(x), n_params)``;
* ``guess(x, y)``: data-driven (and outlier-resistant) start values;
* ``basis(x)``: for models that are linear in their parameters, the design matrix
  ``A`` with ``f(x, p) = A @ p``. Such models are solved by IRLS on a QR step.
* bounds, parameter descriptions and derived quantities (half-life, FWHM, ...).

Nothing here imports Qt.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import numpy as np

ArrayFunc = Callable[[np.ndarray, np.ndarray], np.ndarray]


@dataclass(frozen=True)
class Derived:
    """A quantity computed from the parameters, e.g. a half-life ``ln 2 / k``.

    ``func(p)`` returns the value and ``grad(p)`` its exact gradient with respect to the
    full parameter vector; the uncertainty follows by the delta method
    ``u^2 = g^T C g``.
    """

    name: str
    func: Callable[[np.ndarray], float]
    grad: Callable[[np.ndarray], np.ndarray]
    description: str = ""
    unit: str = ""  # e.g. "x", "y", "x/y", "1/x": in terms of the data units


@dataclass(frozen=True)
class Model:
    """A fit model.

    Parameters
    ----------
    name
        Short identifier (``"line"``, ``"exp_decay"`` or the formula text).
    param_names
        Names in parameter order.
    f, jac
        ``f(x, p) -> (n,)`` and ``jac(x, p) -> (n, k)``; both take a float array ``x``
        and a float parameter vector ``p``.
    guess
        ``guess(x, y) -> (k,)`` start values, or None (then ``p0`` is required,
        except for linear models).
    basis
        ``basis(x) -> (n, k)`` design matrix for models linear in the parameters.
    lower, upper
        Bounds per parameter (``-inf``/``inf`` for none).
    formula
        Human-readable formula, e.g. ``"y = A*exp(-x/tau) + C"``.
    descriptions
        Per-parameter description, e.g. ``{"tau": "time constant (x units)"}``.
    units
        Per-parameter unit expressed in data units: ``"y"``, ``"x"``, ``"y/x"``,
        ``"1/x"``, ``""`` (dimensionless) ... The window substitutes real units.
    derived
        Quantities computed from the parameters, reported with propagated uncertainty.
    f_jac
        Optional ``f_jac(x, p, out=None) -> (f, J)``: both at once, sharing the
        work (the large-data solver calls it once per pass). It must agree with ``f``
        and ``jac``. ``out``, when given, is ``(f, J)``: a float array of ``x``'s size
        and a column-major ``(n, n_params)`` one to write the results into (the solver
        reuses them across passes).
    hess_w
        Optional ``hess_w(x, p, w) -> (n_params, n_params)``: the weighted sum of the
        model's second derivatives, ``sum_i w_i d^2 f(x_i, p) / dp dp^T``. Where given,
        the robust solvers' Newton steps include this curvature term (without it they
        are Gauss-Newton steps, which converge only linearly when the residuals
        are not small).
    monotone_in_x
        True when, for any parameters at which ``f`` is finite at every data point, the
        curve is continuous and monotone in x between the smallest and the largest of
        them (the 4PL). The check for a pole or a non-finite value between the points
        then needs only the points themselves (the curve lies between its values at
        the two ends).
    guess_search
        Optional ``guess_search(x, y) -> (k,)``: a slower, wider search for start
        values, for a model whose ``guess`` is a quick one. A fit that started from
        ``guess`` and fails the convergence verdict is tried again from here first.
    """

    name: str
    param_names: tuple[str, ...]
    f: ArrayFunc
    jac: ArrayFunc
    guess: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None
    basis: Callable[[np.ndarray], np.ndarray] | None = None
    lower: tuple[float, ...] | None = None
    upper: tuple[float, ...] | None = None
    formula: str = ""
    title: str = ""
    descriptions: Mapping[str, str] = field(default_factory=dict)
    units: Mapping[str, str] = field(default_factory=dict)
    derived: tuple[Derived, ...] = ()
    f_jac: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]] | None = None
    hess_w: Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray] | None = None
    guess_search: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None
    monotone_in_x: bool = False

    def __post_init__(self):
        names = tuple(self.param_names)
        object.__setattr__(self, "param_names", names)
        k = len(names)
        if len(set(names)) != k:
            raise ValueError(f"model {self.name!r}: duplicate parameter names {names}")
        lo = (-np.inf,) * k if self.lower is None else tuple(float(v) for v in self.lower)
        hi = (np.inf,) * k if self.upper is None else tuple(float(v) for v in self.upper)
        if len(lo) != k or len(hi) != k:
            raise ValueError(f"model {self.name!r}: bounds do not match {k} parameters")
        object.__setattr__(self, "lower", lo)
        object.__setattr__(self, "upper", hi)

    @property
    def n_params(self) -> int:
        return len(self.param_names)

    @property
    def is_linear(self) -> bool:
        """True when the model is linear in its parameters (``basis`` is given)."""
        return self.basis is not None

    @property
    def has_bounds(self) -> bool:
        return bool(np.any(np.isfinite(self.lower)) or np.any(np.isfinite(self.upper)))

    def __call__(self, x, p) -> np.ndarray:
        return self.f(np.asarray(x, dtype=float), np.asarray(p, dtype=float))

    def start_values(self, x: np.ndarray, y: np.ndarray, p0=None,
                     search: bool = False) -> np.ndarray:
        """Start values: ``p0`` (dict by name or sequence) where given, else the guess.

        A dict may give only some parameters; the rest come from the model's guess
        (``search=True``: from ``guess_search`` where the model has one).
        """
        k = self.n_params
        guess = None
        guess_fn = self.guess_search if search and self.guess_search is not None else self.guess

        def _guess():
            nonlocal guess
            if guess is None:
                if guess_fn is not None:
                    guess = np.asarray(guess_fn(x, y), dtype=float)
                elif self.is_linear:
                    guess = np.zeros(k)
                else:
                    raise ValueError(
                        f"model {self.name!r} has no automatic start values; "
                        f"give start values for {', '.join(self.param_names)}"
                    )
            return guess

        if p0 is None:
            p = _guess().copy()
        elif isinstance(p0, Mapping):
            unknown = set(p0) - set(self.param_names)
            if unknown:
                raise ValueError(
                    f"start values given for unknown parameter(s) {sorted(unknown)}; "
                    f"the model has {', '.join(self.param_names)}"
                )
            if len(p0) == k:
                p = np.array([float(p0[n]) for n in self.param_names])
            else:
                p = _guess().copy()
                for i, n in enumerate(self.param_names):
                    if n in p0:
                        p[i] = float(p0[n])
        else:
            p = np.asarray(p0, dtype=float).ravel()
            if p.size != k:
                raise ValueError(
                    f"model {self.name!r} has {k} parameters "
                    f"({', '.join(self.param_names)}), but {p.size} start values were given"
                )
        # keep the start strictly inside the bounds
        lo, hi = np.asarray(self.lower), np.asarray(self.upper)
        if np.any(np.isfinite(lo) | np.isfinite(hi)):
            p = np.clip(p, lo, hi)
            span = np.where(np.isfinite(hi - lo), hi - lo, np.maximum(np.abs(p), 1.0))
            eps = 1e-10 * span
            p = np.where(p <= lo, lo + eps, p)
            p = np.where(p >= hi, hi - eps, p)
        return p


def linear_model(
    name: str,
    param_names: Sequence[str],
    basis: Callable[[np.ndarray], np.ndarray],
    **kw,
) -> Model:
    """Build a model that is linear in its parameters from its design matrix."""

    def f(x, p):
        return basis(np.asarray(x, dtype=float)) @ np.asarray(p, dtype=float)

    def jac(x, p):
        return basis(np.asarray(x, dtype=float))

    return Model(name=name, param_names=tuple(param_names), f=f, jac=jac, basis=basis, **kw)


def design_model(A, param_names: Sequence[str] | None = None, name: str = "design") -> Model:
    """A linear model over a fixed design matrix ``A`` (several predictors).

    ``x`` is then the row index (0, 1, ..., n-1) into ``A``: ``fit(design_model(A),
    np.arange(n), y)`` is multiple linear regression through the linear path.
    """
    A = np.asarray(A, dtype=float)
    if A.ndim != 2:
        raise ValueError("the design matrix must be two-dimensional")
    names = tuple(param_names) if param_names is not None else tuple(f"b{j}" for j in range(A.shape[1]))
    if len(names) != A.shape[1]:
        raise ValueError(f"{len(names)} names given for {A.shape[1]} design columns")

    def basis(x):
        idx = np.asarray(x, dtype=float)
        if np.any(idx != np.round(idx)) or np.any(idx < 0) or np.any(idx >= A.shape[0]):
            raise ValueError("x must hold row indices into the design matrix")
        return A[idx.astype(np.intp)]

    return linear_model(name, names, basis, title="multiple linear regression")
