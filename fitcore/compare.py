r"""Loss comparison and the adaptive reading: help the analyst choose a loss.

:func:`compare_losses` fits one data set and model under several losses (default
``l2, huber, cauchy, tukey, adaptive``) with the same points, sigma, held parameters and
scale setting, and returns the fits side by side. :func:`adaptive_reading` turns the
adaptive loss's fitted shape alpha (Barron's general loss; alpha = 2 is least squares,
alpha = 0 Cauchy-like) into a plain-language suggestion.

Differences between losses
--------------------------
Two losses "differ" on a parameter when ``|v_a - v_b| > 2 sqrt(u_a^2 + u_b^2)`` with
``u`` the standard uncertainties of the two fits (:data:`DIFFERENCE_FACTOR` = 2). This
is the E_n > 1 rule of proficiency testing (ISO 13528; E_n = difference over the root
sum of squares of expanded uncertainties U = 2u): for two independent estimates of the
same value it fires about 5 % of the time by chance (a normal tail beyond 1.96). Both
fits use the same data, so their estimates are positively correlated and the true
uncertainty of the difference is smaller than this combined value: the flag is
conservative (it fires late, not early). :data:`DIFFERENCE_RULE` states it for views.

The adaptive reading
--------------------
The shape alpha comes with the standard uncertainty from the curvature of the profile
negative log-likelihood (None when alpha sits at a bound of [0, 2]) and a 95 %
likelihood-ratio interval from the profile (:func:`fitcore.solve.alpha_profile`): the
alphas where ``nll - min(nll) <= chi2(0.95, 1)/2 = 1.92`` (Wilks' theorem; at the
bounds of [0, 2] the interval is cut there). "Close to Gaussian" means alpha = 2 lies
inside that interval. The change of the answer is the largest
``|v_adaptive - v_l2| / sqrt(u_adaptive^2 + u_l2^2)`` over the fitted parameters: the
shift the robust (adaptive) fit makes, in the same combined standard uncertainty and
against the same rule as :meth:`LossComparison.differences`, so the reading says
"differ" exactly when the l2/adaptive pair is highlighted. Every number in the text is
computed from the two fits, and one yardstick is used throughout.

When the two agree by that rule although least squares is much less precise (its
standard uncertainty at least twice the adaptive fit's) and its value lies outside
the adaptive fit's own ``+- 2u``, the reading says so with both numbers: the combined
uncertainty is then mostly that of least squares (outliers inflate its scatter), and
the agreement says little.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from .losses import LOSS_NAMES, LOSS_TITLES, OWN_SCALE, loss_short_title
from .models import resolve_model
from .numbers import format_value
from .result import FitResult
from .solve import FitError, alpha_profile, fit
from .threads import small_problem

DEFAULT_LOSSES = ("l2", "huber", "cauchy", "tukey", "adaptive")

#: keyword arguments passed on to :func:`fitcore.fit` unchanged
FIT_KWARGS = ("sigma", "excluded", "p0", "fixed", "scale", "sigma_mode", "max_iter")

#: two estimates differ when |delta| > DIFFERENCE_FACTOR * sqrt(u_a^2 + u_b^2) (E_n > 1
#: with k = 2, the proficiency-testing rule of ISO 13528; see the module text)
DIFFERENCE_FACTOR = 2.0
#: the rule in words, for the views that highlight differences
DIFFERENCE_RULE = ("|\u0394| > 2\u00b7\u221a(u\u2081\u00b2 + u\u2082\u00b2), i.e. E_n > 1 with "
                   "k = 2 (the proficiency-testing rule of ISO 13528)")

#: chi-square(1) 95 % quantile / 2: the likelihood-ratio cut for a 95 % interval
LR_CUT_95 = 1.920729410347062


def _check_kwargs(kwargs: dict, allowed: Sequence[str], where: str) -> None:
    unknown = sorted(set(kwargs) - set(allowed))
    if unknown:
        raise FitError(
            f"{where} does not take {', '.join(unknown)}; it passes on only "
            f"{', '.join(allowed)}"
        )


def _resolve(model):
    try:
        return resolve_model(model)
    except (TypeError, ValueError) as e:
        raise FitError(str(e)) from e


def _shared_guess(mdl):
    """``mdl`` with its start-value guess remembered for the last data it saw.

    Every loss of a comparison fits the same points, so the (costly) automatic start
    values are the same for all of them: computed once, handed out as copies. The fits
    take exactly the path they take without it (the guess is only reused, never
    changed). Models without a guess are returned as they are.
    """
    if mdl.guess is None:
        return mdl
    inner = mdl.guess
    memo: dict = {}

    def guess(x, y):
        xa, ya = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
        key = (xa.shape, xa.tobytes(), ya.tobytes())
        if memo.get("key") != key:
            memo["key"], memo["value"] = key, np.array(inner(x, y), dtype=float)
        return memo["value"].copy()

    return dataclasses.replace(mdl, guess=guess)


def _for_loss(loss, kwargs) -> dict:
    """The shared fit options for one loss: a fixed scale goes to the losses that take
    one (least squares, L1 and the adaptive loss estimate their own; fit() refuses it)."""
    return {k: v for k, v in kwargs.items() if not (k == "scale" and loss in OWN_SCALE)}


def _safe_fit(model, x, y, loss, kwargs):
    """One fit; returns (result, None) or (None, message). Never raises for bad data."""
    try:
        return fit(model, x, y, loss=loss, **_for_loss(loss, kwargs)), None
    except FitError as e:
        return None, str(e)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as e:
        return None, f"the {loss} fit failed: {e}"


@dataclass
class LossComparison:
    """Fits of the same data under several losses.

    Attributes
    ----------
    losses
        The losses asked for, in order.
    results
        ``loss -> FitResult``, or ``None`` for a loss whose fit failed (the reason is in
        ``errors[loss]``) or that was not reached before a cancel.
    errors
        ``loss -> message`` for the failed fits.
    cancelled
        True when ``cancel()`` stopped the comparison early; ``results`` then holds
        the fits done so far.
    """

    losses: tuple[str, ...]
    param_names: tuple[str, ...]
    results: dict[str, FitResult | None] = field(default_factory=dict)
    errors: dict[str, str] = field(default_factory=dict)
    cancelled: bool = False

    def fitted(self) -> list[tuple[str, FitResult]]:
        """The successful fits, in the order of ``losses``."""
        return [(lo, self.results[lo]) for lo in self.losses if self.results.get(lo) is not None]

    def table(self) -> list[tuple]:
        """Rows ``(loss, param, value, stderr, scale, alpha, n_down)`` as plain data.

        One row per successful loss and parameter; failed losses are left out (their
        messages are in ``errors``). ``alpha`` is None for losses without a shape;
        ``n_down`` counts the points used with a robust weight below 0.5.
        """
        rows = []
        for loss, res in self.fitted():
            for j, name in enumerate(res.param_names):
                rows.append((loss, name, float(res.values[j]), float(res.stderr[j]),
                             float(res.scale), None if res.alpha is None else float(res.alpha),
                             int(res.n_downweighted)))
        return rows

    def differences(self, factor: float = DIFFERENCE_FACTOR) -> list[tuple[str, str, str, float, float]]:
        """Estimates that differ by more than ``factor`` times their combined uncertainty
        (default 2, :data:`DIFFERENCE_RULE`).

        Returns ``(param, loss_a, loss_b, delta, combined_u)`` with ``delta = v_b - v_a``
        and ``combined_u = sqrt(u_a^2 + u_b^2)``, for every pair of successful losses
        (``loss_a`` before ``loss_b`` in ``losses``) and every fitted parameter where
        ``|delta| > factor * combined_u``. Held parameters and parameters without a
        finite uncertainty are skipped. The combined uncertainty ignores the positive
        correlation of the two estimates, so the test is conservative.
        """
        fits = self.fitted()
        out = []
        for j, name in enumerate(self.param_names):
            for ia in range(len(fits)):
                for ib in range(ia + 1, len(fits)):
                    (la, ra), (lb, rb) = fits[ia], fits[ib]
                    if name in ra.fixed or name in rb.fixed:
                        continue
                    ua, ub = float(ra.stderr[j]), float(rb.stderr[j])
                    delta = float(rb.values[j] - ra.values[j])
                    cu = math.hypot(ua, ub)
                    if not (math.isfinite(cu) and cu > 0 and math.isfinite(delta)):
                        continue
                    if abs(delta) > factor * cu:
                        out.append((name, la, lb, delta, cu))
        return out

    def text_rows(self) -> list[list[str]]:
        """The comparison as text cells, as the window's table shows them and the report
        and copies print them: a header row (blank, then each loss's short title), one
        row per parameter (``value(u)`` GUM-rounded, " (held)" for a held one), then
        scale, alpha, n down-weighted and converged; a failed loss reads "failed"."""
        fits = dict(self.fitted())
        names: list[str] = []
        for r in fits.values():
            for n in r.param_names:
                if n not in names:
                    names.append(n)
        extra = ["scale", "alpha", "n down-weighted", "converged"]
        rows = [[""] + [loss_short_title(lo) for lo in self.losses]]
        for i, label in enumerate(names + extra):
            row = [label]
            for lo in self.losses:
                r = fits.get(lo)
                if r is None:
                    row.append("failed" if i == 0 else "")
                elif i < len(names):
                    if label not in r.param_names:
                        row.append("")
                        continue
                    k = r.param_names.index(label)
                    row.append(format_value(float(r.values[k]), float(r.stderr[k]), style="paren")
                               + (" (held)" if label in r.fixed else ""))
                else:
                    row.append([f"{r.scale:.4g}",
                                "-" if r.alpha is None else f"{r.alpha:.3g}",
                                str(r.n_downweighted),
                                "yes" if r.converged else "NO"][i - len(names)])
            rows.append(row)
        return rows

    def highlighted(self, factor: float = DIFFERENCE_FACTOR) -> dict[str, set[str]]:
        """``loss -> {params}`` taking part in any difference (for highlighting cells)."""
        marks: dict[str, set[str]] = {lo: set() for lo, _ in self.fitted()}
        for name, la, lb, _, _ in self.differences(factor):
            marks[la].add(name)
            marks[lb].add(name)
        return marks


def compare_losses(model, x, y, losses: Sequence[str] = DEFAULT_LOSSES, *,
                   progress: Callable[[int, int], None] | None = None,
                   cancel: Callable[[], bool] | None = None, alpha: float | None = None,
                   **fit_kwargs) -> LossComparison:
    """Fit the same data and model under several losses.

    Parameters
    ----------
    model, x, y
        As for :func:`fitcore.fit`. A formula is parsed once for all losses.
    losses
        Loss names (see :data:`fitcore.losses.LOSS_NAMES`); default
        ``l2, huber, cauchy, tukey, adaptive``. ``"general"`` needs ``alpha``.
    progress
        ``progress(i, total)`` is called after each loss (``i`` losses done).
    cancel
        ``cancel() -> True`` stops before the next loss; the fits done so far are
        returned with ``cancelled = True``.
    alpha
        Shape for the ``"general"`` loss only.
    **fit_kwargs
        ``sigma, excluded, p0, fixed, scale, sigma_mode`` (and ``max_iter``), passed to
        every fit. A fixed ``scale`` applies to the M-losses; least squares, L1 and
        the adaptive loss estimate their own scale.

    A loss whose fit fails maps to None in ``results`` with the message in ``errors``;
    the other losses are still fitted.
    """
    _check_kwargs(fit_kwargs, FIT_KWARGS, "compare_losses")
    losses = tuple(losses)
    if not losses:
        raise FitError("choose at least one loss to compare")
    bad = [lo for lo in losses if lo not in LOSS_NAMES]
    if bad:
        raise FitError(f"unknown loss {bad[0]!r}; choose from {', '.join(LOSS_NAMES)}")
    if len(set(losses)) != len(losses):
        raise FitError("each loss may appear only once in a comparison")
    if "general" in losses and alpha is None:
        raise FitError("the general loss needs a shape alpha for the comparison")
    mdl = _resolve(model)
    out = LossComparison(losses=losses, param_names=mdl.param_names,
                         results={lo: None for lo in losses})
    total = len(losses)
    shared = _shared_guess(mdl)
    with small_problem(np.size(x) * len(mdl.param_names)):
        for i, loss in enumerate(losses):
            if cancel is not None and cancel():
                out.cancelled = True
                break
            kw = dict(fit_kwargs)
            if loss == "general":
                kw["alpha"] = alpha
            res, err = _safe_fit(shared, x, y, loss, kw)
            if res is not None and res.model is not mdl:
                res = dataclasses.replace(res, model=mdl)  # the analyst's model, not the wrapper
            out.results[loss] = res
            if err is not None:
                out.errors[loss] = err
            if progress is not None:
                progress(i + 1, total)
    return out


# --------------------------------------------------------------------------- reading
@dataclass
class AdaptiveReading:
    """What the adaptive loss says about the tails of the residuals.

    Attributes
    ----------
    alpha, alpha_u
        Fitted shape in [0, 2] and its standard uncertainty (None at a bound).
    interval
        ``(low, high)`` 95 % likelihood-ratio interval from the profile, cut at 0 and 2.
    profile
        ``(alphas, nll)``: the profile negative log-likelihood
        (:func:`fitcore.solve.alpha_profile`), for drawing.
    close_to_gaussian
        True when alpha = 2 (least squares) lies inside ``interval``.
    shift, shift_param
        Largest ``|v_adaptive - v_l2| / sqrt(u_adaptive^2 + u_l2^2)`` over the fitted
        parameters and the parameter where it occurs (NaN / None when the
        least-squares fit failed).
    shifts
        ``param -> shift`` for every fitted parameter.
    text
        The plain-language reading.
    fits
        ``{"l2": FitResult or None, "adaptive": FitResult}``.
    """

    alpha: float
    alpha_u: float | None
    interval: tuple[float, float]
    profile: tuple[np.ndarray, np.ndarray]
    close_to_gaussian: bool
    shift: float
    shift_param: str | None
    shifts: dict[str, float]
    text: str
    fits: dict[str, FitResult | None]


def lr_interval(alphas, nll, alpha_hat: float | None = None, nll_hat: float | None = None,
                cut: float = LR_CUT_95) -> tuple[float, float]:
    """Likelihood-ratio interval ``{alpha: nll(alpha) - min nll <= cut}`` from a profile.

    The profile points (plus the optimum ``(alpha_hat, nll_hat)`` when given) are
    sorted, and each end is found by linear interpolation between the last point inside
    and the first point outside, walking outward from the minimum. Where the profile
    stays inside up to an end of the grid, that end is returned.
    """
    a = np.asarray(alphas, dtype=float)
    v = np.asarray(nll, dtype=float)
    keep = np.isfinite(a) & np.isfinite(v)
    a, v = a[keep], v[keep]
    if alpha_hat is not None and nll_hat is not None and math.isfinite(nll_hat):
        a = np.append(a, alpha_hat)
        v = np.append(v, nll_hat)
    if a.size == 0:
        raise FitError("the profile has no finite values")
    order = np.argsort(a, kind="stable")
    a, v = a[order], v[order]
    i0 = int(np.argmin(v))
    d = v - v[i0] - cut

    def walk(step):
        i = i0
        while 0 <= i + step < a.size:
            j = i + step
            if d[j] > 0:
                # d[i] <= 0 < d[j]
                t = -d[i] / (d[j] - d[i]) if d[j] != d[i] else 0.0
                return float(a[i] + t * (a[j] - a[i]))
            i = j
        return float(a[i])

    return walk(-1), walk(+1)


def _fmt2(v: float) -> str:
    return f"{v:.2f}"


def _alpha_phrase(alpha, alpha_u, interval) -> str:
    if alpha_u is not None and math.isfinite(alpha_u):
        return f"alpha = {_fmt2(alpha)} ± {_fmt2(alpha_u)}"
    lo, hi = interval
    side = "upper" if alpha > 1.0 else "lower"
    return (f"alpha = {_fmt2(alpha)}, at the {side} end of its range; "
            f"95 % interval {_fmt2(lo)} to {_fmt2(hi)}")


def _fmt_against(v: float, limit: float) -> str:
    """``v`` to one decimal, or more where one decimal would round it across ``limit``
    (1.96 against 2 is written 1.96, never "2.0")."""
    for digits in (1, 2, 3):
        text = f"{v:.{digits}f}"
        if (float(text) > limit) == (v > limit) and (float(text) == limit) == (v == limit):
            return text
    return f"{v:.4g}"


def _imprecise_l2(detail, factor: float):
    """``(param, u_l2, u_ad, in_ad)`` for the parameter where least squares is the
    least precise (u_l2 >= 2 u_ad) and its value lies beyond ``factor`` of the adaptive
    fit's own standard uncertainties from the adaptive value; None when there is none."""
    best = None
    for name, (delta, u_l2, u_ad) in (detail or {}).items():
        if not (math.isfinite(delta) and math.isfinite(u_l2) and math.isfinite(u_ad) and u_ad > 0):
            continue
        in_ad = abs(delta) / u_ad
        if u_l2 >= 2.0 * u_ad and in_ad > factor and (best is None or in_ad > best[3]):
            best = (name, u_l2, u_ad, in_ad)
    return best


def reading_text(alpha, alpha_u, interval, shift, shift_param, detail=None,
                 factor: float = DIFFERENCE_FACTOR) -> str:
    """The plain-language reading (see the module docstring for the rules).

    ``shift`` is the largest ``|v_adaptive - v_l2| / sqrt(u_adaptive^2 + u_l2^2)``
    (at ``shift_param``); the fits "differ" when it exceeds ``factor`` (the rule of
    :meth:`LossComparison.differences`). ``detail`` (``param -> (delta, u_l2,
    u_adaptive)``) lets the text say when agreement only reflects an imprecise
    least-squares fit.
    """
    phrase = _alpha_phrase(alpha, alpha_u, interval)
    gaussian = interval[1] >= 2.0 - 1e-9
    has_shift = shift_param is not None and math.isfinite(shift)
    k = f"{factor:g}"
    differ = has_shift and shift > factor
    if has_shift:
        size = _fmt_against(shift, factor)
        if differ:
            compared = (f"least squares and the adaptive fit differ by {size} combined standard "
                        f"uncertainties ({shift_param}), more than the {k} that chance explains")
        else:
            compared = (f"least squares and the adaptive fit agree within {k} combined standard "
                        f"uncertainties (largest difference {size}, for {shift_param})")
    weak = None if differ or not has_shift else _imprecise_l2(detail, factor)
    tail = ""
    if weak is not None:
        name, u_l2, u_ad, in_ad = weak
        tail = (f" Least squares is much less precise here: u({name}) = {u_l2:.2g} against "
                f"{u_ad:.2g} by the adaptive fit, and the least-squares {name} lies "
                f"{in_ad:.3g} of the adaptive fit's standard uncertainties from the adaptive value.")
    if gaussian:
        head = f"Tails close to Gaussian ({phrase})"
        if not has_shift:
            return f"{head}: least squares is adequate."
        if not differ:
            return f"{head}; {compared}: least squares is adequate.{tail}"
        return f"{head}, yet {compared}: compare the fits before relying on least squares."
    head = "Heavy tails" if alpha < 1.0 else "Tails heavier than Gaussian"
    head = f"{head} ({phrase})"
    if not has_shift:
        return f"{head}: a robust loss is advisable (the least-squares fit failed)."
    if not differ:
        return (f"{head}; {compared}, but the robust estimates are the more reliable with "
                f"such tails.{tail}")
    return f"{head}; {compared}: a robust loss changes the answer."


def _detail(l2: FitResult | None, ad: FitResult) -> dict[str, tuple[float, float, float]]:
    """``param -> (v_adaptive - v_l2, u_l2, u_adaptive)`` over the free parameters."""
    if l2 is None:
        return {}
    out = {}
    for j, name in enumerate(ad.param_names):
        if name in ad.fixed:
            continue
        out[name] = (float(ad.values[j] - l2.values[j]), float(l2.stderr[j]), float(ad.stderr[j]))
    return out


def _shifts(l2: FitResult | None, ad: FitResult) -> dict[str, float]:
    out = {}
    for name, (delta, u_l2, u_ad) in _detail(l2, ad).items():
        u = math.hypot(u_l2, u_ad)
        if math.isfinite(u) and u > 0:
            out[name] = abs(delta) / u
    return out


def adaptive_reading(model, x, y, *, fits: dict | None = None, alphas=None,
                     progress: Callable[[int, int], None] | None = None,
                     cancel: Callable[[], bool] | None = None,
                     **fit_kwargs) -> AdaptiveReading:
    """Fit the adaptive loss and read its shape alpha in plain language.

    Parameters
    ----------
    model, x, y, **fit_kwargs
        As for :func:`compare_losses` (``sigma, excluded, p0, fixed, scale,
        sigma_mode``).
    fits
        Optional ``{"l2": FitResult, "adaptive": FitResult}`` already made with the
        same data and settings (e.g. ``LossComparison.results``); missing ones are fitted.
    alphas
        Grid for the profile (default 41 points from 0 to 2).
    progress
        ``progress(i, 3)`` after each stage (adaptive fit, least-squares fit, profile).
    cancel
        ``cancel() -> True`` is checked between the stages; a cancelled reading raises
        :class:`FitError`.

    Raises
    ------
    FitError
        When the adaptive fit itself fails, or on cancel.
    """
    _check_kwargs(fit_kwargs, FIT_KWARGS, "adaptive_reading")
    mdl = _resolve(model)
    fits = dict(fits or {})

    def stage(i):
        if progress is not None:
            progress(i, 3)
        if cancel is not None and cancel():
            raise FitError("the adaptive reading was cancelled")

    stage(0)
    ad = fits.get("adaptive")
    if ad is None:
        ad = fit(mdl, x, y, loss="adaptive", **_for_loss("adaptive", fit_kwargs))
    stage(1)
    l2 = fits.get("l2")
    if l2 is None:
        l2, _ = _safe_fit(mdl, x, y, "l2", fit_kwargs)
    stage(2)
    grid = np.linspace(0.0, 2.0, 41) if alphas is None else np.asarray(alphas, dtype=float)
    prof_kw = {k: fit_kwargs[k] for k in ("sigma", "excluded", "p0", "fixed") if k in fit_kwargs}
    a_grid, nll, _ = alpha_profile(mdl, x, y, grid, **prof_kw)
    if progress is not None:
        progress(3, 3)
    alpha = float(ad.alpha)
    interval = lr_interval(a_grid, nll, alpha, float(ad.info.get("nll", float("nan"))))
    shifts = _shifts(l2, ad)
    if shifts:
        shift_param = max(shifts, key=shifts.get)
        shift = shifts[shift_param]
    else:
        shift_param, shift = None, float("nan")
    text = reading_text(alpha, ad.alpha_stderr, interval, shift, shift_param, _detail(l2, ad))
    return AdaptiveReading(alpha=alpha, alpha_u=ad.alpha_stderr, interval=interval,
                           profile=(np.asarray(a_grid), np.asarray(nll)),
                           close_to_gaussian=interval[1] >= 2.0 - 1e-9, shift=shift,
                           shift_param=shift_param, shifts=shifts, text=text,
                           fits={"l2": l2, "adaptive": ad})


__all__ = ["compare_losses", "adaptive_reading", "LossComparison", "AdaptiveReading",
           "lr_interval", "reading_text", "DEFAULT_LOSSES", "DIFFERENCE_FACTOR", "DIFFERENCE_RULE",
           "LOSS_TITLES"]
