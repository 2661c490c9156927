"""fitcore.solvers.small_la without numpy's private LAPACK ufunc module.

small_la calls ``numpy.linalg._umath_linalg`` directly; another numpy build may not
have it, and then each helper falls back to the public numpy.linalg function with the
same contract (same numbers, NaN instead of LinAlgError). This runs that fallback by
hiding the module. Reference: numpy.linalg itself.
"""
import numpy as np
import pytest

from fitcore.solvers import small_la


@pytest.fixture
def no_private_module(monkeypatch):
    monkeypatch.setattr(small_la, "_ufuncs", None)


def test_fallback_gives_numpys_numbers(no_private_module):
    rng = np.random.default_rng(11)
    for _ in range(50):
        k = int(rng.integers(1, 6))
        A = rng.standard_normal((k + 7, k))
        M, b = A.T @ A, rng.standard_normal(k)
        assert np.array_equal(small_la.solve(M, b), np.linalg.solve(M, b))
        assert np.array_equal(small_la.inv(M), np.linalg.inv(M))
        assert np.array_equal(small_la.qr_r(A), np.linalg.qr(A, mode="r"))
        for got, ref in zip(small_la.svd_thin(A), np.linalg.svd(A, full_matrices=False)):
            assert np.array_equal(got, ref)


def test_fallback_singular_is_nan_not_an_exception(no_private_module):
    M = np.zeros((3, 3))
    assert np.all(np.isnan(small_la.solve(M, np.ones(3))))
    assert np.all(np.isnan(small_la.inv(M)))
