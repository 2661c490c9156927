"""The large-data path and the fast primitives under it.

Above 20 000 used points a robust fit is warm-started from subsamples and finished by
Newton's method with the scale tied to the MAD (fitcore.solve). These tests check that
path against the plain one and its building blocks against plain references: numpy's
median, finite differences, each built-in model's own f and jac, and the single
(unbatched) start-value routine. The outside checks of the estimates themselves (NIST,
statsmodels, scipy) live in tests/reference; they run through the same code.
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import fitcore
import fitcore.models as models
import fitcore.solve as solve
from fitcore.losses import LOSS_NAMES, get_loss
from fitcore import scale
from fitcore.scale import MAD_CONSTANT, mad, median


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(-1e6, 1e6), min_size=1, max_size=60))
def test_median_equals_numpy(values):
    v = np.array(values)
    assert median(v) == np.median(v)
    w = v.copy()
    assert median(w, overwrite=True) == np.median(v)
    assert scale.median(v) == np.median(v)


def test_row_medians_equal_numpy():
    rng = np.random.default_rng(3)
    for n in (1, 2, 3, 10, 11, 300):
        v = rng.normal(size=(7, n))
        assert np.array_equal(scale.row_medians(v), np.median(v, axis=1))


def test_mad_value_and_slopes():
    rng = np.random.default_rng(4)
    n = 200_001
    x = rng.uniform(0, 10, n)
    J = np.column_stack([np.ones(n), x])
    theta = np.array([1.0, 2.0])
    y = J @ theta + rng.standard_t(3, n) * 0.5 + (rng.random(n) < 0.1) * 4.0
    r = y - J @ theta
    value, g_exact = solve._mad_and_gradient(r, J, smooth=False)
    value_s, g_smooth = solve._mad_and_gradient(r, J, smooth=True)
    assert value == value_s == pytest.approx(MAD_CONSTANT * np.median(np.abs(r)), rel=1e-15)
    assert value == pytest.approx(mad(r), rel=1e-15)
    # within one piece the MAD is linear: a tiny step (far below the ~1e-5 gap between
    # neighbouring order statistics) agrees with the one-point slope
    h = 1e-9
    for j in range(2):
        e = np.zeros(2)
        e[j] = h
        fd = (mad(y - J @ (theta + e)) - mad(y - J @ (theta - e))) / (2 * h)
        assert fd == pytest.approx(g_exact[j], rel=1e-3, abs=1e-3)
    # over many pieces the smoothed slope is the one that matters (central difference
    # over a step that crosses some thousands of order statistics)
    h = 2e-3
    for j in range(2):
        e = np.zeros(2)
        e[j] = h
        fd = (mad(y - J @ (theta + e)) - mad(y - J @ (theta - e))) / (2 * h)
        assert fd == pytest.approx(g_smooth[j], abs=0.05 * (1 + abs(fd)))


def test_batched_start_fit_equals_the_single_one():
    rng = np.random.default_rng(5)
    for trial in range(60):
        n = int(rng.integers(4, 200))
        x = np.sort(rng.uniform(0, 10, n))
        y = rng.uniform(-3, 3) * np.exp(-x / rng.uniform(0.3, 8)) + rng.normal(0, 0.2, n)
        if trial % 3 == 0:
            bad = rng.random(n) < 0.2
            y[bad] += rng.uniform(-5, 5, bad.sum())
        if trial % 13 == 0:
            y[:] = 1.0  # zero scale: the iterations stop at once
        taus = np.geomspace(0.05, 50, 12)
        As = np.stack([np.column_stack([np.exp(-x / t), np.ones_like(x)]) for t in taus])
        if trial % 7 == 0:
            As[2][:, 0] = 0.0  # an all-zero column goes to the single routine
        coefs, res = models._robust_lstsq_many(As, y, 5, 3)
        for g in range(taus.size):
            c1, r1 = models._robust_lstsq(As[g], y, 5, 3)
            assert np.allclose(coefs[g], c1, rtol=1e-9, atol=1e-12)
            assert np.allclose(res[g], r1, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("name", [m for m in fitcore.builtin_models()
                                  if fitcore.get_model(m).f_jac is not None])
def test_models_f_jac_agree_with_f_and_jac(name):
    m = fitcore.get_model(name)
    rng = np.random.default_rng(6)
    x = np.linspace(0.01, 12, 501)
    p = np.asarray(m.guess(x, m.f(x, m.start_values(x, x))), dtype=float)
    p = p * (1 + 0.1 * rng.standard_normal(p.size))
    f, J = m.f_jac(x, p)
    assert np.allclose(f, m.f(x, p), rtol=1e-15, atol=0)
    assert np.allclose(J, m.jac(x, p), rtol=1e-15, atol=0)
    # central differences (a relative step on each parameter)
    for j in range(p.size):
        h = 1e-6 * max(abs(p[j]), 1e-3)
        e = np.zeros(p.size)
        e[j] = h
        fd = (m.f(x, p + e) - m.f(x, p - e)) / (2 * h)
        assert np.allclose(J[:, j], fd, rtol=1e-5, atol=1e-7 * np.max(np.abs(fd)) + 1e-12)


@pytest.mark.parametrize("name", [m for m in fitcore.builtin_models()
                                  if fitcore.get_model(m).f_jac is not None])
def test_models_f_jac_into_given_arrays_equals_fresh(name):
    m = fitcore.get_model(name)
    x = np.linspace(0.01, 12, 301)
    p = np.asarray(m.guess(x, m.f(x, m.start_values(x, x))), dtype=float)
    f0, J0 = m.f_jac(x, p)
    fb, Jb = np.full(x.size, np.nan), np.full((x.size, p.size), np.nan, order="F")
    f1, J1 = m.f_jac(x, p, out=(fb, Jb))
    assert f1 is fb and J1 is Jb
    assert np.array_equal(f1, f0) and np.array_equal(J1, J0)


@pytest.mark.parametrize("name", [n for n in LOSS_NAMES if n != "adaptive"])
def test_psi_dpsi_into_given_arrays_equals_fresh(name):
    loss = get_loss(name, alpha=0.7 if name == "general" else None)
    u = np.random.default_rng(5).standard_cauchy(1001)
    psi, dpsi = loss.psi(u), loss.dpsi(u)
    p0, d0 = loss.psi_dpsi(u)
    out = tuple(np.full(u.size, np.nan) for _ in range(3))
    p1, d1 = loss.psi_dpsi(u, out=out)
    for a, b in ((p0, psi), (d0, dpsi), (p1, psi), (d1, dpsi)):
        assert np.array_equal(a, b)


def _decay_data(n, seed):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 8, n)
    y = 3.0 * np.exp(-x / 2.0) + 0.5 + rng.normal(0, 0.05, n)
    y[rng.random(n) < 0.08] += 2.0
    return x, y


def test_kept_scratch_arrays_never_leak_into_results():
    """The Newton passes write into per-thread scratch arrays kept between fits: a
    later fit of the same size must not change an earlier result, and a fit with the
    scratch kept must equal one with a fresh scratch exactly."""
    x, y1 = _decay_data(60_000, 21)
    _, y2 = _decay_data(60_000, 22)
    solve._release_scratch()
    first = fitcore.fit("exp_decay", x, y1, loss="cauchy")
    snapshot = {k: np.copy(getattr(first, k)) for k in
                ("values", "stderr", "covariance", "weights", "residuals", "std_residuals", "fitted")}
    second = fitcore.fit("exp_decay", x, y2, loss="cauchy")
    for k, v in snapshot.items():
        assert np.array_equal(getattr(first, k), v), k
    again = fitcore.fit("exp_decay", x, y1, loss="cauchy")  # scratch now holds y2's passes
    solve._release_scratch()
    fresh = fitcore.fit("exp_decay", x, y1, loss="cauchy")
    for k in snapshot:
        assert np.array_equal(getattr(again, k), getattr(fresh, k)), k
    assert not np.allclose(second.values, first.values, rtol=1e-9)
    # the fitted values handed on from the last pass are the model's own
    assert np.array_equal(first.fitted, first.model.f(x, first.values))


def test_a_kept_jacobian_is_not_reused_once_its_scratch_is_overwritten():
    x, y1 = _decay_data(5000, 23)
    _, y2 = _decay_data(5000, 24)
    m = fitcore.get_model("exp_decay")
    free, fixed = np.ones(3, bool), np.zeros(3)
    a = solve._Problem(m, x, y1, np.ones_like(x), free, fixed, unit=True)
    b = solve._Problem(m, x, y2, np.ones_like(x), free, fixed, unit=True)
    work = solve._scratch_for(x.size)
    ta, tb = np.array([3.0, 2.0, 0.5]), np.array([2.0, 1.0, 0.1])
    a.resid(ta, with_jac=True, scratch=work)
    assert np.array_equal(a.jac(ta), m.jac(x, ta))
    assert a.kept_f(ta) is not None
    b.resid(tb, with_jac=True, scratch=work)  # the same arrays, now b's
    assert np.array_equal(a.jac(ta), m.jac(x, ta))  # evaluated afresh, not b's
    assert a.kept_f(ta) is None
    assert np.array_equal(b.jac(tb), m.jac(x, tb))


def test_fits_in_parallel_threads_equal_sequential_ones():
    from concurrent.futures import ThreadPoolExecutor

    data = [_decay_data(40_000, 30 + i) for i in range(4)]
    seq = [fitcore.fit("exp_decay", x, y, loss="cauchy").values for x, y in data]
    with ThreadPoolExecutor(max_workers=4) as ex:
        par = list(ex.map(lambda d: fitcore.fit("exp_decay", d[0], d[1], loss="cauchy").values,
                          data))
    for a, b in zip(seq, par):
        assert np.array_equal(a, b)


def test_scratch_pool_is_bounded():
    solve._release_scratch()
    for n in (100, 200, 300, 400, 500):
        solve._scratch_for(n)
    assert list(solve._POOL.by_n) == [300, 400, 500]
    big = solve._POOL_MAX_POINTS + 1
    solve._scratch_for(big)
    assert big not in solve._POOL.by_n


def test_exp_decay_jacobian_stays_finite_where_exp_underflows():
    m = fitcore.get_model("exp_decay")
    J = m.jac(np.array([0.0, 1e300, np.inf]), np.array([1.0, 1e-300, 0.0]))
    assert np.all(np.isfinite(J))


@pytest.mark.parametrize("name", [n for n in LOSS_NAMES if n != "adaptive"])
def test_loss_functions_leave_their_input_alone(name):
    loss = get_loss(name, alpha=0.7 if name == "general" else None)
    u = np.array([-7.3, -1.2, 0.0, 0.3, 2.2, 5.5])
    keep = u.copy()
    for fn in (loss.rho, loss.psi, loss.weight, loss.dpsi):
        out = fn(u)
        assert np.array_equal(u, keep)
        assert out is not u
        # scalars and lists work as well as arrays
        assert np.allclose(np.asarray(fn(2.2)), out[4])
        assert np.allclose(fn([2.2, 5.5]), out[4:])
    assert loss.sum_rho(u, loss.psi(u)) == pytest.approx(float(np.sum(loss.rho(u))), rel=1e-14)


def test_stage_sizes():
    assert solve._stage_sizes(30_000, 2000) == [2000]
    assert solve._stage_sizes(1_000_000, 2000) == [2000, 24000]
    assert solve._stage_sizes(100_000, 1000) == [1000, 12000]


@pytest.mark.parametrize("loss,model,n", [("huber", "line", 160_000), ("cauchy", "exp_decay", 80_000),
                                          ("tukey", "exp_decay", 80_000), ("huber", "line", 250_000),
                                          ("cauchy", "exp_decay", 210_000)])
def test_staged_large_data_path_equals_the_plain_path(monkeypatch, loss, model, n):
    """With two warm-start stages (n above 72 000 / 144 000), and with the subset Newton
    matrix (n from 200 000), the estimate, scale and standard errors still equal the
    plain loop's."""
    rng = np.random.default_rng(11)
    x = np.linspace(0, 8, n)
    y = (1.0 + 0.5 * x) if model == "line" else (3.0 * np.exp(-x / 2.0) + 0.5)
    y = y + rng.normal(0, 0.05, n)
    out = rng.random(n) < 0.08
    y[out] += rng.uniform(0.5, 3.0, out.sum())
    fast = fitcore.fit(model, x, y, loss=loss)
    monkeypatch.setattr(fitcore.solvers.large, "_LARGE", 10**9)
    plain = fitcore.fit(model, x, y, loss=loss)
    assert fast.converged and plain.converged
    # both stop once Newton's step to the root is below 1e-5 standard errors, so they
    # agree to that order (the same root; a different one would differ by far more)
    assert np.all(np.abs(fast.values - plain.values) <= 1e-4 * plain.stderr)
    assert fast.scale == pytest.approx(plain.scale, rel=1e-6)
    assert np.allclose(fast.stderr, plain.stderr, rtol=1e-5)
    # the MAD scale is exactly the MAD of the final residuals
    assert fast.scale == pytest.approx(mad(fast.residuals), rel=1e-14)


def test_newton_solution_solves_the_estimating_equations():
    rng = np.random.default_rng(12)
    n = 50_000
    x = rng.uniform(0, 5, n)
    y = 2.0 - 0.7 * x + rng.normal(0, 0.3, n)
    y[rng.random(n) < 0.1] += 5.0
    res = fitcore.fit("line", x, y, loss="huber")
    u = res.residuals / res.scale
    J = np.column_stack([np.ones(n), x])
    F = get_loss("huber").psi(u) @ J
    # the gradient in units of its own standard deviation: the iteration stops after a
    # step below 1e-4 standard errors and contracts some 50-fold per step, so what is
    # left is of order 1e-6 standard errors
    sd = np.sqrt(np.sum(J ** 2, axis=0))
    assert np.all(np.abs(F) / sd < 1e-5)


def test_batched_criteria_equal_one_by_one():
    """The start-value scans (logistic, peaks) score candidates in one batch; each score
    equals the single robust fit's capped sum of squares."""
    rng = np.random.default_rng(13)
    x = np.geomspace(0.01, 100, 80)
    y = 1 + 3 / (1 + (x / 5.0) ** 1.3) + rng.normal(0, 0.05, x.size)
    y[::9] += 2.0
    pairs = [(h, e) for h in (-2.0, 0.7, 1.3, 3.0) for e in (0.1, 5.0, 80.0)]
    stack = np.stack([models._logistic_design(x, h, e) for h, e in pairs])
    stack[3, 0, 0] = np.nan  # a candidate that cannot be evaluated scores inf
    crit, coefs = models._criteria(stack, y, 0.05, finite_only=True)
    for g, _pair in enumerate(pairs):
        if g == 3:
            assert crit[g] == np.inf
            continue
        c1, r1 = models._robust_lstsq(stack[g], y, n_huber=5, n_tukey=3)
        assert crit[g] == pytest.approx(models._criterion(r1, 0.05), rel=1e-9)
        assert np.allclose(coefs[g], c1, rtol=1e-9, atol=1e-12)
    assert models._first_better(np.array([3.0, 1.0, 1.0]), 2.0) == 1
    assert models._first_better(np.array([3.0, 2.5]), 2.0) is None


def test_smoothed_takes_the_median_of_repeated_x():
    x = np.array([3.0, 1.0, 1.0, 2.0, 1.0, 3.0])
    y = np.array([5.0, 1.0, 9.0, 4.0, 2.0, 7.0])
    ux, _ = models._smoothed(x, y)
    assert np.array_equal(ux, [1.0, 2.0, 3.0])
    # group medians 2 (of 1, 9, 2), 4, 6 (of 5, 7); then a running median of width 3
    # with shrinking ends: median(2, 4) = 3, median(2, 4, 6) = 4, median(4, 6) = 5
    assert np.array_equal(models._smoothed(x, y)[1], [3.0, 4.0, 5.0])
