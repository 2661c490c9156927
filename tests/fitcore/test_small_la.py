"""fitcore.solvers.small_la: numpy.linalg's solve, inv, QR (mode "r") and thin SVD
without the wrappers, for the k x k work of small fits.

Reference: numpy.linalg itself (the helpers must give its numbers bit for bit, on
seeded random matrices of the sizes the solvers use, badly scaled columns included);
where numpy.linalg raises LinAlgError for a singular matrix the helpers return NaN
(the solvers test finiteness instead of catching).
"""
import numpy as np
import pytest

from fitcore.solvers import small_la


def _cases(count=300, seed=20261205):
    rng = np.random.default_rng(seed)
    for _ in range(count):
        k = int(rng.integers(1, 7))
        n = int(rng.integers(k, 60))
        # columns from 1e-6 to 1e6 in size, as unscaled Jacobians have them
        A = rng.standard_normal((n, k)) * np.exp(rng.uniform(-14, 14, k))
        yield A, rng.standard_normal(k)


def test_solve_and_inv_are_numpys():
    # reference: numpy.linalg.solve and numpy.linalg.inv
    for A, b in _cases():
        M = A.T @ A + np.diag(np.abs(A[0]))  # (a non-symmetric one too, below)
        for mat in (M, M + np.triu(M, 1)):
            assert np.array_equal(small_la.solve(mat, b), np.linalg.solve(mat, b))
            assert np.array_equal(small_la.inv(mat), np.linalg.inv(mat))


def test_qr_r_and_svd_are_numpys():
    # reference: numpy.linalg.qr(mode="r") and numpy.linalg.svd(full_matrices=False)
    for A, _ in _cases():
        keep = A.copy()
        assert np.array_equal(small_la.qr_r(A), np.linalg.qr(A, mode="r"))
        assert np.array_equal(A, keep)  # (the input is not overwritten)
        u, s, vt = small_la.svd_thin(A)
        ur, sr, vtr = np.linalg.svd(A, full_matrices=False)
        assert np.array_equal(u, ur) and np.array_equal(s, sr) and np.array_equal(vt, vtr)


def test_inverse_of_a_triangle_is_numpys_solve_against_the_identity():
    # reference: numpy.linalg.solve(R, I), which the verdict's step test used
    for A, _ in _cases(100):
        R = np.linalg.qr(A, mode="r")
        if np.all(np.abs(np.diag(R)) > 0):
            assert np.array_equal(small_la.inv(R), np.linalg.solve(R, np.eye(R.shape[0])))


@pytest.mark.parametrize("k", [1, 2, 4])
def test_singular_gives_nan_where_numpy_raises(k):
    # reference: numpy.linalg raises LinAlgError ("Singular matrix") for these
    M = np.zeros((k, k))
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.solve(M, np.ones(k))
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.inv(M)
    with np.errstate(invalid="ignore"):  # (the flag numpy raises with the NaN)
        assert np.isnan(small_la.solve(M, np.ones(k))).all()
        assert np.isnan(small_la.inv(M)).all()
