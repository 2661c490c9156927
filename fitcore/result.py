"""The immutable result of one fit."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from ._lazy import LazyModule

from .losses import LOSSES
from .scale import mad
from .model import Model

special = LazyModule("scipy.special", globals())  # lazy: 0.3 s to import, needed once results are made


class _PerPoint:
    """A per-point array field of :class:`FitResult` that the fit may leave out (given
    as None) because the others determine it: it is then computed on first read from
    them, exactly as the fit would have, and kept. A fit of a million points so holds
    fewer arrays as large as the data (issue 12: a least-squares line's peak memory)."""

    def __init__(self, derive):
        self._derive = derive

    def __set_name__(self, owner, name):
        # (kept under the field's own name: a data descriptor takes precedence over the
        # instance dict, and ``FitResult(**res.__dict__)`` still rebuilds a result)
        self._key = name

    def __get__(self, obj, objtype=None):
        if obj is None:
            raise AttributeError(self._key)  # (the dataclass field has no default)
        value = obj.__dict__.get(self._key)
        if value is None:
            value = self._derive(obj)
            obj.__dict__[self._key] = value
        return value

    def __set__(self, obj, value):
        obj.__dict__[self._key] = value


def _residuals(res: "FitResult") -> np.ndarray:
    with np.errstate(all="ignore"):
        return res.y - res.fitted


def _std_residuals(res: "FitResult") -> np.ndarray:
    residuals, s = res.residuals, res.scale
    with np.errstate(all="ignore"):
        if not s > 0:
            return residuals * np.nan
        if res.sigma is None:
            return residuals / s
        return residuals / res.sigma / s


def _unit_weights(res: "FitResult") -> np.ndarray:
    """Least squares: 1 for every used point (finite x and y, not excluded), else 0."""
    used = ~res.excluded & np.isfinite(res.x) & np.isfinite(res.y)
    return used.astype(float)


@dataclass(frozen=True)
class FitResult:
    """Everything one fit produced. Arrays are in parameter order / point order.

    Attributes
    ----------
    param_names, values, stderr, covariance
        Estimates, their standard uncertainties and the covariance matrix. Held
        (fixed) parameters have stderr 0 and zero rows/columns in the covariance.
    weights
        Normalised robust weight per point, in [0, 1]; 1 = counted fully, 0 where
        excluded (or rejected outright by a redescending loss).
    residuals
        ``y - f(x)`` per point, also for excluded points (so they can be plotted).
    std_residuals
        Residuals divided by ``sigma`` (if given) and by the scale.
    scale
        The residual scale used by the loss (in units of y, or of y/sigma when sigma
        is given). For least squares it is the residual standard deviation s.
    scale_method
        How the scale was obtained ("fixed", "normalised MAD, refined", ...).
    alpha
        Shape of the general/adaptive loss, else None.
    tuning
        Tuning constant of the loss (in units of the scale), None where not used.
    covariance_recipe
        Name of the covariance recipe used (see :mod:`fitcore.uncertainty`).
    converged, message
        Whether the solver converged, and a plain-language message.
    n_used, n_excluded, n_downweighted, dof
        Points used, excluded by the analyst, used with weight < 0.5; degrees of
        freedom ``n_used - n_free_params``.

    ``residuals``, ``std_residuals`` and (least squares) ``weights`` may be given as None:
    they are then computed from ``y``, ``fitted``, ``scale``, ``sigma`` and
    ``excluded`` on first read (the same numbers; a fit of many points holds fewer
    arrays as large as the data until they are asked for).
    """

    model: Model
    loss: str
    param_names: tuple[str, ...]
    values: np.ndarray
    stderr: np.ndarray
    covariance: np.ndarray
    weights: np.ndarray = _PerPoint(_unit_weights)
    residuals: np.ndarray = _PerPoint(_residuals)
    std_residuals: np.ndarray = _PerPoint(_std_residuals)
    fitted: np.ndarray
    x: np.ndarray
    y: np.ndarray
    sigma: np.ndarray | None
    excluded: np.ndarray
    scale: float
    scale_method: str
    alpha: float | None
    tuning: float | None
    covariance_recipe: str
    converged: bool
    message: str
    n_used: int
    n_excluded: int
    n_downweighted: int
    dof: int
    fixed: dict = field(default_factory=dict)
    n_iter: int = 0
    objective: float = float("nan")
    sigma_mode: str = "none"  # "none", "absolute", "relative"
    rss: float = float("nan")
    alpha_stderr: float | None = None
    info: dict[str, Any] = field(default_factory=dict)
    #: Student t quantiles computed so far, by ``(dof, probability)`` (see :meth:`t_ppf`);
    #: they travel with a result sent between processes, so the window showing a fit its
    #: analysis process made needs no scipy.special for its intervals (issue 12)
    t_quantiles: dict = field(default_factory=dict, repr=False, compare=False)

    # ------------------------------------------------------------------ access
    def __getitem__(self, name: str) -> float:
        return float(self.values[self.param_names.index(name)])

    def as_dict(self) -> dict[str, float]:
        return {n: float(v) for n, v in zip(self.param_names, self.values)}

    @property
    def free(self) -> np.ndarray:
        """Boolean mask of parameters that were fitted (not held)."""
        return np.array([n not in self.fixed for n in self.param_names])

    @property
    def correlation(self) -> np.ndarray:
        """Correlation matrix of the estimates (NaN rows for held parameters)."""
        se = np.sqrt(np.diag(self.covariance))
        with np.errstate(invalid="ignore", divide="ignore"):
            r = self.covariance / np.outer(se, se)
        return r

    def _one_sided_pull(self) -> str:
        """A warning when a monotone robust loss (family "monotone" in the loss registry
        ``fitcore.losses.LOSSES``: Huber, pseudo-Huber, L1) down-weights points that lie
        mostly on one side of the curve, else "".

        Such a loss still pulls the fit toward every outlier with a bounded force, so
        one-sided outliers shift it by about (excess on one side) x tuning x scale / n,
        while the uncertainties shrink as 1/sqrt(n): the bias in standard errors grows
        as excess / sqrt(n). The warning is given when the excess is at least sqrt(n)
        and at least 70 % of the down-weighted points (our thresholds).
        """
        entry = LOSSES.get(self.loss)
        if self.loss == "l2" or entry is None or entry.family != "monotone":
            return ""
        used = ~self.excluded & np.isfinite(self.residuals)
        if self.loss == "l1":
            with np.errstate(all="ignore"):
                far = used & (np.abs(self.std_residuals) > 2.0)
        else:
            far = used & (self.weights < 0.5)
        m = int(far.sum())
        if m == 0:
            return ""
        above = int(np.sum(self.residuals[far] > 0))
        below = m - above
        excess = abs(above - below)
        if excess < 0.7 * m or excess < np.sqrt(max(self.n_used, 1)):
            return ""
        return (f"{m} down-weighted points lie {above} above and {below} below the curve: "
                f"a monotone loss ({entry.title}) still pulls the fit toward one-sided "
                f"outliers, a bias that grows against the uncertainties with the number of "
                f"points; a redescending loss ({LOSSES['tukey'].title}, {LOSSES['welsch'].title}) "
                f"gives them no pull")

    #: the adaptive loss's majority warning counts only points this many robust
    #: standard deviations (normalised MAD of the standardised residuals) off the curve
    FAR_MADS = 2.5

    def _majority_count(self) -> tuple[int, str]:
        """How many used points the majority warning counts, and the words that say how.

        Under the fixed-shape losses the tuning constant ties the weights to a
        consistent scale, so "weight below 0.5" means 2.4 to 3.5 scales off the curve.
        The adaptive loss has no such constant: its scale c is the shape's own width,
        and near alpha = 0 (the usual answer with a few gross outliers) points 1.4 c off
        already count less than half, which was half of a clean line with one to three
        outliers (the warning fired in 15 to 23 of 30 such fits). There a point counts
        only when it also lies beyond FAR_MADS robust standard deviations."""
        if self.loss != "adaptive":
            return int(self.n_downweighted), ""
        used = ~np.asarray(self.excluded, bool) & np.isfinite(self.std_residuals)
        z = np.abs(np.asarray(self.std_residuals, float)[used])
        w = np.asarray(self.weights, float)[used]
        spread = mad(z)
        if not np.isfinite(spread):
            return int(self.n_downweighted), ""
        far = (w < 0.5) & (z > self.FAR_MADS * spread)
        return int(far.sum()), (f" and lie beyond {self.FAR_MADS:g} robust standard deviations "
                                f"(normalised MAD of the residuals) from the curve")

    @property
    def warnings(self) -> tuple[str, ...]:
        """Plain sentences on signs that this fit should not be trusted as it stands.

        A converged fit can still be a poor one. Checked here (common practice; the
        thresholds are ours):

        * a robust loss counted more than a quarter of the used points less than half
          (for the adaptive loss, whose weights run lower, only the points that also lie
          far from the curve: :meth:`_majority_count`): a robust fit assumes most points
          follow the model;
        * two fitted parameters of a nonlinear model correlate beyond 0.999: the data
          do not tell them apart (the model may have more freedom than the data
          support, or may not suit them);
        * a fitted parameter ended on a bound of the model (e.g. a time constant at 0).
        """
        out: list[str] = []
        robust = self.loss not in ("l2",)
        if robust and self.n_used > 0:
            m, where = self._majority_count()
            share = m / self.n_used
            if share > 0.25:
                out.append(
                    f"{m} of {self.n_used} used points ({100 * share:.0f} %) "
                    f"count less than half{where}: a robust fit assumes that most points "
                    f"follow the model; check the model and the data before relying on it"
                )
        one_sided = self._one_sided_pull()
        if one_sided:
            out.append(one_sided)
        free = np.flatnonzero(self.free)
        if not self.model.is_linear and free.size >= 2:
            rho = self.correlation
            worst, pair = 0.0, None
            for a in range(free.size):
                for b in range(a + 1, free.size):
                    v = rho[free[a], free[b]]
                    if np.isfinite(v) and abs(v) > max(worst, 0.999):
                        worst, pair = abs(v), (free[a], free[b], v)
            if pair is not None:
                i, j, v = pair
                out.append(
                    f"{self.param_names[i]} and {self.param_names[j]} are almost "
                    f"interchangeable (correlation {v:+.4f}): the data do not determine "
                    f"them separately; a simpler model may suit these data better"
                )
        lo, hi = np.asarray(self.model.lower, float), np.asarray(self.model.upper, float)
        for i in free:
            v = float(self.values[i])
            for b, side in ((lo[i], "lower"), (hi[i], "upper")):
                if np.isfinite(b) and abs(v - b) <= 1e-11 * abs(b) + 1e-290:
                    out.append(
                        f"{self.param_names[i]} ended on its {side} bound ({b:g}): the best "
                        f"fit wants a value the model does not allow, so the model may not "
                        f"suit these data, or the start values were far off"
                    )
        return tuple(out)

    def t_quantile(self, level: float = 0.95) -> float:
        """Two-sided Student t quantile with ``dof`` degrees of freedom."""
        if self.dof <= 0:
            return float("nan")
        return self.t_ppf(0.5 + level / 2.0)

    def t_ppf(self, p: float) -> float:
        """The Student t quantile at probability ``p`` with ``dof`` degrees of freedom
        (what ``scipy.stats.t.ppf(p, dof)`` gives), remembered in :attr:`t_quantiles`."""
        key = (int(self.dof), float(p))
        t = self.t_quantiles.get(key)
        if t is None:
            # scipy.special.stdtrit is the quantile scipy.stats.t.ppf evaluates; importing
            # it avoids loading all of scipy.stats (about a second) on the way to a fit
            t = self.t_quantiles[key] = float(special.stdtrit(self.dof, p))
        return t

    def intervals(self, level: float = 0.95) -> np.ndarray:
        """Confidence intervals ``value -/+ t * stderr``; shape (k, 2)."""
        t = self.t_quantile(level)
        return np.column_stack([self.values - t * self.stderr, self.values + t * self.stderr])

    # ------------------------------------------------------------------ curves
    def predict(self, x) -> np.ndarray:
        """Model values at ``x`` with the fitted parameters."""
        return self.model.f(np.asarray(x, dtype=float), self.values)

    def band(self, x, level: float = 0.95, kind: str = "confidence", sigma_new=None):
        """Pointwise confidence band of the fitted curve (delta method).

        Returns ``(lower, upper)``: ``f(x) -/+ t * sqrt(g^T C g)`` with ``g`` the model
        gradient at x and t the Student quantile with ``dof`` degrees of freedom.
        ``kind="prediction"`` adds the variance of one new measurement at x, in y
        units: ``scale^2`` without sigma; with sigma, ``sigma_new^2`` when the sigma
        were absolute and ``(scale * sigma_new)^2`` when relative. ``sigma_new`` (a
        number or one per x) is the new measurement's sigma; by default the median
        sigma of the used points.
        """
        x = np.asarray(x, dtype=float)
        yhat = self.predict(x)
        J = np.asarray(self.model.jac(x, self.values), dtype=float).reshape(x.size, -1)
        var = np.einsum("ij,jk,ik->i", J, self.covariance, J)
        var = np.maximum(var, 0.0)
        if kind == "prediction":
            if self.sigma is None:
                var = var + self.scale**2
            else:
                if sigma_new is None:
                    used = ~np.asarray(self.excluded, dtype=bool)
                    sig_used = np.asarray(self.sigma, dtype=float)[used]
                    sig_used = sig_used[np.isfinite(sig_used)]
                    sigma_new = float(np.median(sig_used)) if sig_used.size else float("nan")
                sn = np.broadcast_to(np.asarray(sigma_new, dtype=float), x.shape)
                factor = 1.0 if self.sigma_mode == "absolute" else self.scale**2
                var = var + factor * sn**2
        elif kind != "confidence":
            raise ValueError("kind must be 'confidence' or 'prediction'")
        half = self.t_quantile(level) * np.sqrt(var)
        return yhat - half, yhat + half

    def derived_values(self):
        """Derived quantities: list of (name, value, standard uncertainty, Derived)."""
        out = []
        for d in self.model.derived:
            v = float(d.func(self.values))
            g = np.asarray(d.grad(self.values), dtype=float)
            u = float(np.sqrt(max(g @ self.covariance @ g, 0.0)))
            out.append((d.name, v, u, d))
        return out

    def summary(self) -> str:
        """A short plain-text summary (the report module has the full formats)."""
        lines = [f"model: {self.model.title or self.model.name}   loss: {self.loss}"]
        for n, v, s in zip(self.param_names, self.values, self.stderr):
            held = "  (held)" if n in self.fixed else ""
            lines.append(f"  {n} = {v:.10g}  (u = {s:.3g}){held}")
        lines.append(
            f"n used {self.n_used}, excluded {self.n_excluded}, down-weighted "
            f"{self.n_downweighted}, dof {self.dof}, scale {self.scale:.6g} "
            f"({self.scale_method})"
        )
        lines.append(f"covariance: {self.covariance_recipe}; {self.message}")
        return "\n".join(lines)
