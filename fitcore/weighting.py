r"""Weighting rules for calibrations: relative sigma from a rule instead of a column.

A rule says how the variance of a reading grows along the curve; ``fit(...,
weighting=RULE)`` turns it into relative sigma (``sigma_mode="relative"``: only the
ratios matter, the scale is estimated from the scatter as usual):

==============  ============================  ====================================
rule            weight ``1/sigma^2``          sigma (relative)
==============  ============================  ====================================
``"1/x"``       ``1/|x|``                     ``sqrt(|x|)``
``"1/x^2"``     ``1/x^2``                     ``|x|``
``"1/y"``       ``1/|y|``                     ``sqrt(|y|)``
``"1/y^2"``     ``1/y^2``                     ``|y|``
``"power"``     ``1/|mean|^theta``            ``|mean|^(theta/2)``
==============  ============================  ====================================

``1/x``, ``1/x^2``, ``1/y``, ``1/y^2`` are the usual choices in bioanalytical
calibration (common practice; e.g. the 1/x^2 weighting of chromatographic
calibrations); the y rules use the measured y of each standard. ``"power"``
estimates the exponent from replicate standards: ``log s_j^2 = c + theta log |ybar_j|``
fitted by least squares over the x levels with at least two readings (the variance
function "proportional to a power of the mean", common practice in immunoassay
calibration); each standard then gets ``|ybar_j|^(theta/2)`` with ``ybar_j`` the mean
of its level (its own y when it has no replicates).

A read-back at x0 uses the same rule for the unknown's reading
(:func:`reading_sigma`): ``x0`` for the x rules, the curve value ``f(x0)`` for the
y and power rules.

Everything here is plain data in and out, so a session can store the rule
(``rule_info`` is a JSON-ready dict).
"""
from __future__ import annotations

import math

import numpy as np

RULES = ("none", "1/x", "1/x^2", "1/y", "1/y^2", "power")
TITLES = {
    "none": "none",
    "1/x": "1/x",
    "1/x^2": "1/x\u00b2",
    "1/y": "1/y",
    "1/y^2": "1/y\u00b2",
    "power": "variance \u221d |mean|^\u03b8 (\u03b8 from replicates)",
}
_ALIASES = {"1/x2": "1/x^2", "1/x**2": "1/x^2", "1/x\u00b2": "1/x^2",
            "1/y2": "1/y^2", "1/y**2": "1/y^2", "1/y\u00b2": "1/y^2",
            "": "none", "equal": "none", "power of the mean": "power"}


class WeightingError(ValueError):
    """A weighting rule that cannot be applied to these data (plain message)."""


def normalise_rule(rule) -> str:
    """The canonical rule name; raises WeightingError for an unknown rule."""
    if rule is None:
        return "none"
    if isinstance(rule, dict):
        rule = rule.get("rule", "none")
    text = str(rule).strip().lower().replace(" ", "")
    text = _ALIASES.get(text, text)
    if text not in RULES:
        raise WeightingError(f"unknown weighting rule {rule!r}; choose one of "
                             f"{', '.join(RULES)}")
    return text


def rule_text(info) -> str:
    """One line naming the rule (for the method block of reports)."""
    if not info:
        return "none"
    r = info.get("rule", "none")
    if r == "power":
        return (f"variance proportional to |mean|^theta, theta = {info['exponent']:.4g} "
                f"estimated from {info.get('levels', '?')} replicate levels; "
                f"relative sigma |mean|^(theta/2)")
    return f"{r} (relative sigma {_SIGMA_TEXT[r]})"


_SIGMA_TEXT = {"1/x": "sqrt(|x|)", "1/x^2": "|x|", "1/y": "sqrt(|y|)", "1/y^2": "|y|"}


def estimate_power(x, y) -> tuple[float, int]:
    """theta in ``var ~ |mean|^theta`` from replicate levels: (theta, number of levels)."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    _ux, inv, counts = np.unique(x, return_inverse=True, return_counts=True)
    lm, lv = [], []
    for j in np.flatnonzero(counts >= 2):
        yy = y[inv == j]
        m, v = float(np.mean(yy)), float(np.var(yy, ddof=1))
        if m != 0.0 and v > 0.0:
            lm.append(math.log(abs(m)))
            lv.append(math.log(v))
    if len(lm) < 3:
        raise WeightingError(
            f"the power-of-the-mean rule needs at least three x levels with replicate "
            f"standards that scatter (found {len(lm)}); measure standards in replicate "
            f"or choose 1/x, 1/x\u00b2, 1/y or 1/y\u00b2")
    lm_a, lv_a = np.asarray(lm), np.asarray(lv)
    if np.ptp(lm_a) == 0:
        raise WeightingError("the replicate levels all have the same mean: the power of "
                             "the mean cannot be estimated")
    theta = float(np.polyfit(lm_a, lv_a, 1)[0])
    return theta, len(lm)


def rule_sigma(rule, x, y, excluded=None) -> tuple[np.ndarray, dict]:
    """Relative sigma per point for ``rule`` and the rule's JSON-ready description.

    Points that are excluded or not finite get sigma 1 (they are not fitted). A used
    standard whose rule sigma is zero (x = 0 under 1/x, y = 0 under 1/y) would get an
    infinite weight: refused with a message.
    """
    name = normalise_rule(rule)
    x = np.asarray(x, float).ravel()
    y = np.asarray(y, float).ravel()
    if x.shape != y.shape:
        raise WeightingError("x and y differ in length")
    excl = (np.zeros(x.size, bool) if excluded is None
            else np.asarray(excluded, bool).ravel())
    if excl.size != x.size:  # fit() itself says what is wrong with the mask
        excl = np.zeros(x.size, bool)
    used = np.isfinite(x) & np.isfinite(y) & ~excl
    info: dict = {"rule": name}
    if name == "none":
        return np.ones(x.size), info
    if name in ("1/x", "1/x^2"):
        base, what = np.abs(x), "x"
    elif name in ("1/y", "1/y^2"):
        base, what = np.abs(y), "y"
    else:
        theta, levels = estimate_power(x[used], y[used])
        info.update(exponent=theta, levels=levels)
        _ux, inv = np.unique(x[used], return_inverse=True)
        means = np.bincount(inv, weights=y[used]) / np.bincount(inv)
        base = np.ones(x.size)
        base[used] = np.abs(means[inv])
        what = "the level mean"
    if name == "power":
        power = info["exponent"] / 2.0
    else:
        power = 1.0 if name.endswith("^2") else 0.5
    sig = np.ones(x.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        sig[used] = base[used] ** power
    bad = used & ~(np.isfinite(sig) & (sig > 0))
    if np.any(bad):
        idx = ", ".join(str(i + 1) for i in np.flatnonzero(bad)[:5])
        raise WeightingError(
            f"the {name} rule gives point(s) {idx} infinite weight ({what} is zero there); "
            f"exclude the blank from the weighted fit or choose another rule")
    return sig, info


def reading_sigma(info, x0: float, y0: float) -> float:
    """Relative sigma of a new reading at x0 whose expected response is y0."""
    name = normalise_rule(info)
    if name == "none":
        return 1.0
    if name in ("1/x", "1/x^2"):
        base = abs(float(x0))
    else:
        base = abs(float(y0))
    if name == "power":
        power = float(info["exponent"]) / 2.0
    else:
        power = 1.0 if name.endswith("^2") else 0.5
    return base ** power


def prepare(weighting, x, y, sigma, sigma_mode: str, excluded=None):
    """What ``fit()`` does with its ``weighting`` option, in one call.

    Returns ``(sigma, sigma_mode, info)``: without a rule (None / "none") the inputs
    unchanged and ``info`` None; with a rule the rule's relative sigma,
    ``"relative"`` and the rule's description (to be stored in ``result.info
    ["weighting"]``). A rule together with a sigma column is refused: the two say
    different things about the spread of y.
    """
    name = normalise_rule(weighting)
    if name == "none":
        return sigma, sigma_mode, None
    if sigma is not None:
        raise WeightingError("give either a sigma column or a weighting rule, not both")
    try:
        xa = np.asarray(x, dtype=float).ravel()
        ya = np.asarray(y, dtype=float).ravel()
    except (TypeError, ValueError):
        raise WeightingError("x and y must be numbers") from None
    sig, info = rule_sigma(name, xa, ya, excluded)
    return sig, "relative", info


def prepare_for_fit(weighting, x, y, sigma, sigma_mode: str, excluded=None):
    """:func:`prepare` with its refusals as ``fitcore.FitError`` (what fit() raises)."""
    # here, not at the top: this module stays numpy-only (fitcore.report reads its
    # rules without loading scipy and the solvers)
    from .solvers.problem import FitError

    try:
        return prepare(weighting, x, y, sigma, sigma_mode, excluded)
    except WeightingError as e:
        raise FitError(str(e)) from e
