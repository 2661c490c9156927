"""Robust losses with sigma taken as absolute: the uncertainties follow the stated
sigma, as least squares' do (scipy's curve_fit absolute_sigma=True convention), and
do not shrink when the data scatter less than the sigma claim."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import fitcore
from fitcore.scale import psi_slope_at_normal, psi_variance_at_normal


def test_huber_psi_moments_at_the_normal():
    # E psi'(Z) = P(|Z| <= k) for Huber (textbook; Huber 1981); E psi'^2 / E psi^2 is
    # the Gaussian efficiency, 0.95 at the default constants (Holland & Welsch 1977)
    h = fitcore.get_loss("huber")
    assert psi_slope_at_normal(h) == pytest.approx(2 * stats.norm.cdf(1.345) - 1, rel=1e-10)
    for name in ("huber", "tukey", "cauchy", "welsch", "pseudo_huber", "geman_mcclure"):
        loss = fitcore.get_loss(name)
        eff = psi_slope_at_normal(loss) ** 2 / psi_variance_at_normal(loss)
        assert eff == pytest.approx(0.95, abs=1e-5), name


@pytest.mark.parametrize("loss", ["huber", "tukey", "cauchy"])
def test_absolute_sigma_gives_model_based_uncertainties(loss):
    rng = np.random.default_rng(0)
    x = np.linspace(0, 10, 40)
    for true_sd in (0.01, 0.1, 0.3):  # scatter below, at and above the stated sigma
        y = 1 + 2 * x + rng.normal(0, true_sd, 40)
        sig = np.full(40, 0.1)
        ls = fitcore.fit("line", x, y, "l2", sigma=sig)
        rob = fitcore.fit("line", x, y, loss, sigma=sig)
        eff = 0.95
        assert np.allclose(rob.stderr, ls.stderr / np.sqrt(eff), rtol=1e-4)
        assert rob.covariance_recipe.startswith("model-based, absolute sigma")
    # relative sigma: the observed scatter counts again
    rel = fitcore.fit("line", x, y, loss, sigma=sig, sigma_mode="relative")
    assert rel.stderr[1] > 2 * rob.stderr[1]
