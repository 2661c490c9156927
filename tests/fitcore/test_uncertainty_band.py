"""Prediction bands with and without sigma, against statsmodels' OLS/WLS prediction
intervals (statsmodels.regression.linear_model, get_prediction(...).summary_frame)."""
from __future__ import annotations

import numpy as np
import pytest

import fitcore

import statsmodels.api as sm


def _data():
    rng = np.random.default_rng(0)
    x = np.linspace(0, 10, 20)
    sig = np.linspace(0.01, 0.03, 20)
    return x, 1 + 2 * x + rng.normal(0, 1, 20) * sig, sig


def test_prediction_band_without_sigma_matches_statsmodels_ols():
    x, y, _ = _data()
    res = fitcore.fit("line", x, y, "l2")
    x0 = np.array([2.5, 5.0, 12.0])
    lo, hi = res.band(x0, kind="prediction")
    X = sm.add_constant(x)
    frame = sm.OLS(y, X).fit().get_prediction(sm.add_constant(x0)).summary_frame(alpha=0.05)
    assert np.allclose(lo, frame["obs_ci_lower"], rtol=1e-9)
    assert np.allclose(hi, frame["obs_ci_upper"], rtol=1e-9)


def test_prediction_band_with_relative_sigma_matches_statsmodels_wls():
    x, y, sig = _data()
    res = fitcore.fit("line", x, y, "l2", sigma=sig, sigma_mode="relative")
    x0 = np.array([2.5, 5.0, 12.0])
    s_new = np.array([0.015, 0.02, 0.04])
    lo, hi = res.band(x0, kind="prediction", sigma_new=s_new)
    X = sm.add_constant(x)
    wls = sm.WLS(y, X, weights=1 / sig**2).fit()
    frame = wls.get_prediction(sm.add_constant(x0), weights=1 / s_new**2).summary_frame(alpha=0.05)
    assert np.allclose(lo, frame["obs_ci_lower"], rtol=1e-9)
    assert np.allclose(hi, frame["obs_ci_upper"], rtol=1e-9)


def test_prediction_band_with_absolute_sigma_uses_the_given_sigma():
    # absolute sigma (curve_fit's absolute_sigma=True convention): the new point's
    # variance is sigma_new^2 itself, not rescaled by the observed scatter; the band's
    # half-width is t * sqrt(var(f) + sigma_new^2), in y units (the earlier code added
    # the scale, a number in units of sigma, to a variance in y units)
    x, y, sig = _data()
    res = fitcore.fit("line", x, y, "l2", sigma=sig)
    x0 = np.array([5.0])
    lo_c, hi_c = res.band(x0)
    lo, hi = res.band(x0, kind="prediction", sigma_new=0.02)
    t = res.t_quantile(0.95)
    half_c = (hi_c - lo_c) / 2
    assert (hi - lo) / 2 == pytest.approx(np.sqrt(half_c**2 + (t * 0.02) ** 2), rel=1e-12)
    # default sigma_new: the median sigma of the used points
    lo_d, hi_d = res.band(x0, kind="prediction")
    assert (hi_d - lo_d) / 2 == pytest.approx(np.sqrt(half_c**2 + (t * np.median(sig)) ** 2),
                                              rel=1e-12)
