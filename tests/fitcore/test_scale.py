"""fitcore.scale: medians, the normalised MAD, Huber/Tukey weights, expectations at the
normal and Huber's proposal 2 scale, each checked against an outside implementation
(numpy, statsmodels.robust, scipy.stats) or a closed form from the literature.

Data are drawn from seeded distributions (heavy-tailed, with ties and even sizes);
the references decide the numbers.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.robust import norms
from statsmodels.robust import scale as sm_scale

from fitcore import scale
from fitcore.losses import get_loss


def _samples():
    rng = np.random.default_rng(20)
    yield rng.standard_t(3, size=61)            # odd size, heavy tails
    yield rng.standard_t(2, size=200)           # even size
    yield np.round(rng.normal(0, 1, 40), 1)     # many ties
    yield np.array([5.0])
    yield np.array([2.0, -1.0])


@pytest.mark.parametrize("k", range(5))
def test_median_and_row_medians_equal_numpy(k):
    v = list(_samples())[k]
    # numpy.median is the reference; ours uses one selection
    assert scale.median(v) == np.median(v)
    w = v.copy()
    assert scale.median(w, overwrite=True) == np.median(v)
    m = np.vstack([v, -2 * v, v + 3])
    np.testing.assert_array_equal(scale.row_medians(m), np.median(m, axis=1))
    assert math.isnan(scale.median(np.array([])))


def test_mad_equals_statsmodels():
    for v in _samples():
        # statsmodels.robust.scale.mad: normalised by 1/Phi^-1(3/4), centre given
        assert scale.mad(v) == pytest.approx(sm_scale.mad(v, center=0.0), rel=1e-14)
        assert scale.mad(v, center=None) == pytest.approx(sm_scale.mad(v), rel=1e-14)
        assert scale.mad_about_median(v) == pytest.approx(sm_scale.mad(v), rel=1e-14)
    # the constant is 1 / Phi^-1(3/4) (scipy.stats.norm.ppf)
    assert scale.MAD_CONSTANT == pytest.approx(1.0 / stats.norm.ppf(0.75), rel=1e-15)
    # non-finite residuals are left out of the MAD; nothing left gives NaN
    v = np.array([1.0, -2.0, np.nan, 3.0, np.inf])
    assert scale.mad(v) == pytest.approx(sm_scale.mad(np.array([1.0, -2.0, 3.0]), center=0.0))
    assert math.isnan(scale.mad(np.array([np.nan])))
    assert scale.mad_about_median(np.array([])) == 0.0


def test_irls_weights_equal_statsmodels_norms():
    u = np.linspace(-9, 9, 181)
    # statsmodels.robust.norms.HuberT(t=1.345) and TukeyBiweight(c=4.685) weights
    np.testing.assert_allclose(scale.huber_weights(np.abs(u)), norms.HuberT(1.345).weights(u),
                               rtol=1e-14)
    np.testing.assert_allclose(scale.tukey_weights(np.abs(u)),
                               norms.TukeyBiweight(4.685).weights(u), rtol=1e-14, atol=1e-300)
    assert scale.huber_weights(np.array([0.0]))[0] == 1.0


def test_expectations_at_the_normal_equal_closed_forms():
    # Huber's psi at a standard normal Z (Huber 1981, 4.5): E[psi'] = 2 Phi(k) - 1 and
    # E[psi^2] = (2 Phi(k) - 1) - 2 k phi(k) + 2 k^2 (1 - Phi(k)), values by scipy.stats
    for k in (0.5, 1.0, 1.345, 2.0):
        h = get_loss("huber", tuning=k)
        phi, Phi = stats.norm.pdf(k), stats.norm.cdf(k)
        assert scale.psi_slope_at_normal(h) == pytest.approx(2 * Phi - 1, rel=1e-10)
        beta = (2 * Phi - 1) - 2 * k * phi + 2 * k * k * (1 - Phi)
        assert scale.psi_variance_at_normal(h) == pytest.approx(beta, rel=1e-10)
    # least squares: psi(u) = u, E[psi'] = E[Z^2] = 1
    l2 = get_loss("l2")
    assert scale.psi_slope_at_normal(l2) == pytest.approx(1.0, rel=1e-12)
    assert scale.psi_variance_at_normal(l2) == pytest.approx(1.0, rel=1e-12)


def test_proposal2_scale_equals_statsmodels_huber_scale():
    rng = np.random.default_rng(5)
    h = get_loss("huber")
    for n, p in ((60, 2), (200, 3), (25, 1)):
        r = rng.standard_t(3, size=n)
        ours = scale.proposal2_scale(r, h, scale.mad(r), p)
        # statsmodels.robust.scale.HuberScale (Huber's proposal 2) with d = 1.345, run
        # to a tight tolerance (its default 1e-8 stops 5e-7 short at n = 25)
        ref = sm_scale.HuberScale(d=1.345, tol=1e-14, maxiter=10000)(n - p, n, r)
        assert ours == pytest.approx(ref, rel=1e-10)
    # the equation it solves holds at the answer: sum psi(r/s)^2 = (n - p) beta
    s = scale.proposal2_scale(r, h, 1.0, 1)
    assert np.sum(h.psi(r / s) ** 2) == pytest.approx((r.size - 1) * scale.psi_variance_at_normal(h),
                                                      rel=1e-9)
    # no degrees of freedom or no start: the start is returned as it is
    assert scale.proposal2_scale(r[:1], h, 0.7, 1) == 0.7


def _large_arrays():
    rng = np.random.default_rng(21)
    yield np.abs(rng.standard_t(3, size=100_000))            # MAD-like, heavy tails
    yield rng.normal(size=100_001)                            # odd size
    yield np.round(rng.normal(size=50_000), 1)                # many ties
    yield np.sort(rng.normal(size=30_000))[::-1].copy()       # ordered
    v = rng.normal(size=80_000)
    v[rng.random(v.size) < 0.1] = np.nan                      # NaN sorts last
    v[:7] = np.inf
    v[7:14] = -np.inf
    yield v
    # period of the sample's stride: the strided sample sees one value only, its
    # bracket misses, and the plain selection must answer
    yield np.tile(np.arange(24.0), 4_167)  # (100 008 values: stride 24)
    yield np.where(rng.random(40_000) < 0.7, 0.0, 1.0)       # two values
    yield rng.normal(size=5_000)                              # below the bracket's size


@pytest.mark.parametrize("k", range(8))
def test_order_stats_equal_numpy_partition(k):
    # numpy's partition (and sort) is the reference: the values of the wanted ranks,
    # exactly, NaN last; the input is left as it was
    v = list(_large_arrays())[k]
    n = v.size
    ref = np.sort(v)
    before = v.copy()
    for ranks in ([n // 2], [n // 2 - 1, n // 2], [0], [n - 1], [n // 3, n // 2 + 700],
                  [n // 2 - n // 40, n // 2 + n // 40], [int(0.9 * n)]):
        got = scale.order_stats(v, ranks)
        np.testing.assert_array_equal(got, ref[ranks])
    np.testing.assert_array_equal(v, before)
    if not np.isnan(v).any():
        assert scale.median(v) == np.median(v)
        assert scale.median(v.copy(), overwrite=True) == np.median(v)
