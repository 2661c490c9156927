"""Tests of the built-in model catalogue (fitcore.models).

Sources of the checks are named beside each one. Data marked "invented" are made up for
the test (seeded); they only serve to check that known parameters come back.
"""
from __future__ import annotations

import math
import re

import numpy as np
import pytest
from scipy import optimize

import fitcore
from fitcore.model import Model
from fitcore.models import (
    GAS_CONSTANT,
    builtin_models,
    get_model,
    model_info,
    resolve_model,
)

# ----------------------------------------------------------------- invented cases
# name -> (true parameters, x values). Invented demo values, chosen to look like lab data.
CASES = {
    "line": ([2.0, 0.5], np.linspace(0.0, 10.0, 60)),
    "line_origin": ([1.7], np.linspace(0.5, 10.0, 50)),
    "poly2": ([1.0, -2.0, 0.5], np.linspace(-1.0, 6.0, 60)),
    "poly3": ([1.0, 0.3, -0.2, 0.05], np.linspace(-2.0, 8.0, 60)),
    "poly4": ([0.5, 1.0, -0.5, 0.1, -0.01], np.linspace(-2.0, 6.0, 80)),
    "poly5": ([1.0, -1.0, 0.5, 0.2, -0.1, 0.01], np.linspace(-2.0, 4.0, 80)),
    "exp_decay": ([5.0, 2.0, 1.0], np.linspace(0.0, 10.0, 60)),
    "exp_decay_rate": ([5.0, 0.5, 1.0], np.linspace(0.0, 10.0, 60)),
    "exp_rise": ([10.0, 0.3], np.linspace(0.2, 15.0, 50)),
    "power_law": ([2.0, 1.5], np.linspace(0.2, 10.0, 50)),
    "michaelis_menten": ([200.0, 0.5], np.geomspace(0.02, 5.0, 40)),
    "logistic4": ([1.0, 8.0, 2.0, 3.0], np.geomspace(0.1, 50.0, 48)),
    "logistic5": ([1.0, 8.0, 2.0, 3.0, 0.7], np.geomspace(0.1, 100.0, 80)),
    "arrhenius": ([math.log(1e10), 6.0e4], np.linspace(300.0, 400.0, 40)),
    "gauss_peak": ([5.0, 4.0, 0.8, 1.0], np.linspace(0.0, 10.0, 80)),
    "lorentz_peak": ([5.0, 4.0, 0.6, 1.0], np.linspace(0.0, 10.0, 80)),
}


def _noisy(name, seed, noise=0.02, outliers=0.15, shuffle=True):
    """Invented data: model + Gaussian noise + a share of gross outliers, shuffled."""
    rng = np.random.default_rng(seed)
    p, x = CASES[name]
    m = get_model(name)
    p = np.array(p, float)
    x = np.array(x, float)
    if shuffle:
        x = rng.permutation(x)
    y0 = m(x, p)
    spread = float(np.ptp(y0))
    y = y0 + noise * spread * rng.standard_normal(x.size)
    k = int(round(outliers * x.size))
    idx = rng.choice(x.size, k, replace=False)
    y[idx] += spread * rng.choice([-1.0, 1.0], k) * (0.5 + rng.random(k))
    return m, x, y, p, idx


def test_catalogue_lists_the_required_models():
    names = builtin_models()
    for n in ("line", "line_origin", "poly2", "poly3", "poly4", "poly5", "exp_decay",
              "exp_rise", "power_law", "michaelis_menten", "logistic4", "logistic5",
              "arrhenius", "gauss_peak", "lorentz_peak"):
        assert n in names
    assert len(names) == len(set(names))
    assert set(CASES) == set(names)  # every built-in is exercised below


@pytest.mark.parametrize("name", builtin_models())
def test_every_model_is_described(name):
    m = get_model(name)
    assert isinstance(m, Model) and m.name == name
    assert m.title and m.formula
    for p in m.param_names:
        assert m.descriptions.get(p), f"{name}: {p} lacks a description"
        assert p in m.units, f"{name}: {p} lacks a unit hint"
    info = model_info(name)
    assert [d["name"] for d in info["params"]] == list(m.param_names)
    assert info["formula"] == m.formula and info["title"] == m.title
    assert info["linear"] == m.is_linear


def test_get_model_options_and_errors():
    assert get_model("poly3").param_names == ("c0", "c1", "c2", "c3")
    assert get_model("polynomial", degree=3).param_names == ("c0", "c1", "c2", "c3")
    assert get_model("polynomial", degree=7).n_params == 8
    assert get_model("polynomial", degree=1).name == "line"
    assert get_model(" Exp_Decay ").name == "exp_decay"
    assert get_model("exp_decay", rate=True).param_names == ("A", "k", "C")
    assert get_model("exp_decay", rate=False).param_names == ("A", "tau", "C")
    with pytest.raises(ValueError, match="unknown model"):
        get_model("no_such_model")
    with pytest.raises(ValueError, match="degree"):
        get_model("polynomial")
    with pytest.raises(ValueError, match="degree"):
        get_model("polynomial", degree=2.5)
    with pytest.raises(ValueError, match="takes"):
        get_model("line", degree=2)
    with pytest.raises(ValueError, match="t_ref"):
        get_model("arrhenius", t_ref=-3)
    with pytest.raises(TypeError):
        get_model(3)


def test_linear_models_have_a_basis():
    for name in ("line", "line_origin", "poly2", "poly3", "poly4", "poly5"):
        m = get_model(name)
        assert m.is_linear
        x = np.linspace(-1, 2, 7)
        p = np.arange(1.0, m.n_params + 1)
        np.testing.assert_allclose(m(x, p), m.basis(x) @ p)
    for name in ("exp_decay", "exp_rise", "logistic4", "gauss_peak", "arrhenius"):
        assert not get_model(name).is_linear


def test_resolve_model():
    m = get_model("line")
    assert resolve_model(m) is m
    assert resolve_model("exp_rise").name == "exp_rise"
    assert resolve_model("poly7").n_params == 8
    f = resolve_model("a*exp(-x/tau) + c")  # handed to fitcore.formula
    assert isinstance(f, Model) and set(f.param_names) == {"a", "tau", "c"}
    with pytest.raises(ValueError):
        resolve_model("   ")
    with pytest.raises(ValueError):
        resolve_model("a*exp(-x/")  # the formula module's error
    with pytest.raises(TypeError):
        resolve_model(42)


def test_bounds_where_physics_demands():
    # widths, time constants, rates, Km, EC50 and the 5PL asymmetry are > 0
    wanted = {"exp_decay": "tau", "exp_decay_rate": "k", "exp_rise": "k",
              "michaelis_menten": "Km", "logistic4": "EC50", "logistic5": "EC50",
              "gauss_peak": "sigma", "lorentz_peak": "gamma"}
    for name, par in wanted.items():
        m = get_model(name)
        assert m.lower[m.param_names.index(par)] == 0.0, (name, par)
    m = get_model("logistic5")
    assert m.lower[m.param_names.index("s")] == 0.0


# ----------------------------------------------------------------- (a) Jacobians


def _fd_jacobian(m, x, p):
    """Central finite differences with a relative step (common practice)."""
    J = np.empty((x.size, p.size))
    for j in range(p.size):
        h = 1e-6 * max(abs(p[j]), 1e-300) if p[j] != 0 else 1e-6
        pp, pm = p.copy(), p.copy()
        pp[j] += h
        pm[j] -= h
        J[:, j] = (m(x, pp) - m(x, pm)) / (pp[j] - pm[j])
    return J


@pytest.mark.parametrize("name", builtin_models())
def test_jacobian_matches_central_differences(name):
    # exact Jacobian vs central finite differences (common practice)
    p, x = CASES[name]
    m = get_model(name)
    p = np.array(p, float)
    x = np.array(x, float)
    J = m.jac(x, p)
    assert J.shape == (x.size, p.size)
    Jfd = _fd_jacobian(m, x, p)
    scale = np.maximum(np.max(np.abs(Jfd), axis=0), 1e-100)  # columns that underflow
    np.testing.assert_allclose(J / scale, Jfd / scale, atol=1e-6, rtol=0)


# tiny (but positive) parameter values where naive formulas lose digits or give 0/0
TINY = {
    "exp_rise": ([10.0, 1e-9], np.linspace(0.0, 15.0, 20)),
    "exp_decay_rate": ([5.0, 1e-9, 1.0], np.linspace(0.0, 10.0, 20)),
    "exp_decay": ([5.0, 1e-3, 1.0], np.linspace(0.0, 10.0, 20)),
    "michaelis_menten": ([200.0, 1e-8], np.linspace(0.0, 5.0, 20)),
    "logistic4": ([1.0, 8.0, 1e-6, 3.0], np.linspace(0.0, 30.0, 20)),
    "gauss_peak": ([5.0, 4.0, 1e-4, 1.0], np.linspace(0.0, 10.0, 21)),
    "lorentz_peak": ([5.0, 4.0, 1e-6, 1.0], np.linspace(0.0, 10.0, 21)),
}


# independent high-precision versions of the formulas for the tiny-parameter check
# (mpmath at 50 digits; derivatives by mpmath.diff)
def _mp_formulas():
    import mpmath as mp

    return {
        "exp_rise": lambda x, p: p[0] * (1 - mp.exp(-p[1] * x)),
        "exp_decay_rate": lambda x, p: p[0] * mp.exp(-p[1] * x) + p[2],
        "exp_decay": lambda x, p: p[0] * mp.exp(-x / p[1]) + p[2],
        "michaelis_menten": lambda x, p: p[0] * x / (p[1] + x),
        "logistic4": lambda x, p: p[0] + (p[1] - p[0]) / (1 + (x / p[3]) ** p[2]),
        "gauss_peak": lambda x, p: p[0] * mp.exp(-(x - p[1]) ** 2 / (2 * p[2] ** 2)) + p[3],
        "lorentz_peak": lambda x, p: p[0] * p[2] ** 2 / ((x - p[1]) ** 2 + p[2] ** 2) + p[3],
    }


@pytest.mark.parametrize("name", sorted(TINY))
def test_jacobian_at_tiny_parameters(name):
    # at tiny parameter values a finite difference in double precision is itself
    # inaccurate, so the reference is a 50-digit derivative of the formula (mpmath)
    import mpmath as mp
    p, x = TINY[name]
    m = get_model(name)
    p = np.array(p, float)
    J = m.jac(x, p)
    assert np.all(np.isfinite(J)), f"{name}: non-finite Jacobian at tiny parameters"
    F = _mp_formulas()[name]
    ref = np.empty_like(J)
    with mp.workdps(50):
        for i in range(len(x)):
            for j in range(p.size):
                def g(t, i=i, j=j):
                    q = [mp.mpf(float(v)) for v in p]
                    q[j] = t
                    return F(mp.mpf(float(x[i])), q)
                ref[i, j] = float(mp.diff(g, mp.mpf(float(p[j]))))
    scale = np.maximum(np.max(np.abs(ref), axis=0), 1e-100)  # columns that underflow
    np.testing.assert_allclose(J / scale, ref / scale, atol=1e-9, rtol=0)


def test_exp_rise_keeps_digits_for_tiny_rates():
    # f = ymax*(1 - exp(-k x)) must equal ymax*k*x to first order (series; common practice)
    m = get_model("exp_rise")
    x = np.array([1.0, 2.0, 5.0])
    np.testing.assert_allclose(m(x, [3.0, 1e-12]), 3.0 * 1e-12 * x, rtol=1e-10)
    np.testing.assert_allclose(m.jac(x, [3.0, 1e-12])[:, 1], 3.0 * x, rtol=1e-10)


def test_logistic4_at_zero_dose():
    # (x/EC50)**hill = 0 at x = 0 for hill > 0, so y = top; for hill < 0, y = bottom
    m = get_model("logistic4")
    x = np.array([0.0, 1.0, 3.0])
    np.testing.assert_allclose(m(x, [1.0, 8.0, 2.0, 3.0])[[0, 2]], [8.0, 4.5])
    np.testing.assert_allclose(m(x, [1.0, 8.0, -2.0, 3.0])[[0, 2]], [1.0, 4.5])
    for hill in (2.0, -2.0):
        J = m.jac(x, [1.0, 8.0, hill, 3.0])
        assert np.all(np.isfinite(J))
    m5 = get_model("logistic5")
    assert np.all(np.isfinite(m5.jac(x, [1.0, 8.0, 2.0, 3.0, 0.7])))
    np.testing.assert_allclose(m5(x, [1.0, 8.0, 2.0, 3.0, 1.0]), m(x, [1.0, 8.0, 2.0, 3.0]))


def test_no_overflow_warnings():
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        x = np.array([-1e4, 0.0, 1e4])
        for name in ("exp_decay", "exp_decay_rate", "exp_rise", "gauss_peak",
                     "lorentz_peak", "arrhenius"):
            m = get_model(name)
            p = np.array(CASES[name][0], float)
            m(x if name != "arrhenius" else np.abs(x) + 1.0, p)
            m.jac(x if name != "arrhenius" else np.abs(x) + 1.0, p)


# ----------------------------------------------------------------- derived quantities


@pytest.mark.parametrize("name", [n for n in builtin_models() if get_model(n).derived]
                         + ["arrhenius_tref"])
def test_derived_gradients(name):
    if name == "arrhenius_tref":
        m, p = get_model("arrhenius", t_ref=298.15), np.array(CASES["arrhenius"][0], float)
    else:
        m, p = get_model(name), np.array(CASES[name][0], float)
    for d in m.derived:
        g = np.asarray(d.grad(p), float)
        assert g.shape == p.shape
        fd = np.empty_like(p)
        for j in range(p.size):
            h = 1e-6 * max(abs(p[j]), 1.0)
            pp, pm = p.copy(), p.copy()
            pp[j] += h
            pm[j] -= h
            fd[j] = (d.func(pp) - d.func(pm)) / (2 * h)
        np.testing.assert_allclose(g, fd, rtol=1e-6, atol=1e-9 * max(1.0, abs(d.func(p))),
                                   err_msg=f"{name}.{d.name}")


def test_derived_values():
    # FWHM/sigma = 2 sqrt(2 ln 2) = 2.3548200450 (check-values.md §6 item 29 [C])
    g = get_model("gauss_peak")
    der = {d.name: d for d in g.derived}
    p = np.array([3.0, 1.0, 0.5, 0.2])
    assert der["FWHM"].func(p) == pytest.approx(2.3548200450 * 0.5, rel=1e-10)
    # area of a Gaussian A sigma sqrt(2 pi), checked by numerical integration (scipy quad)
    from scipy import integrate
    area = integrate.quad(lambda t: g(np.array([t]), p)[0] - 0.2, -20, 20)[0]
    assert der["area"].func(p) == pytest.approx(area, rel=1e-8)
    # Lorentzian: FWHM = 2 gamma, area = pi A gamma (check-values.md §4.4), numerically
    lz = get_model("lorentz_peak")
    der = {d.name: d for d in lz.derived}
    p = np.array([3.0, 1.0, 0.5, 0.0])
    assert lz(np.array([1.5]), p)[0] == pytest.approx(1.5)  # half height at x0 + gamma
    area = integrate.quad(lambda t: lz(np.array([t]), p)[0], -np.inf, np.inf)[0]
    assert der["area"].func(p) == pytest.approx(area, rel=1e-8)
    # half-life of an exponential decay: A e^{-t/tau} halves at t = tau ln 2 (textbook)
    e = get_model("exp_decay")
    hl = {d.name: d for d in e.derived}["half_life"].func(np.array([1.0, 3.0, 0.0]))
    assert e(np.array([hl]), [1.0, 3.0, 0.0])[0] == pytest.approx(0.5)
    # 5PL midpoint lies halfway between the plateaus
    m5 = get_model("logistic5")
    p5 = np.array([1.0, 8.0, 2.0, 3.0, 0.7])
    xm = {d.name: d for d in m5.derived}["x_mid"].func(p5)
    assert m5(np.array([xm]), p5)[0] == pytest.approx(4.5)


def test_gas_constant_is_the_si_value():
    # R = N_A k_B, exact since SI 2019 (check-values.md §6 item 29)
    assert GAS_CONSTANT == 8.31446261815324
    assert GAS_CONSTANT == pytest.approx(6.02214076e23 * 1.380649e-23, rel=1e-15)
    m = get_model("arrhenius")
    T = np.array([300.0, 350.0])
    lnA, Ea = 20.0, 5.0e4
    np.testing.assert_allclose(m(T, [lnA, Ea]), math.exp(lnA) * np.exp(-Ea / (8.31446261815324 * T)))


# ----------------------------------------------------------------- (b) guesses


@pytest.mark.parametrize("name", builtin_models())
def test_guess_on_clean_data_within_factor_two(name):
    p, x = CASES[name]
    m = get_model(name)
    p = np.array(p, float)
    rng = np.random.default_rng(7)
    x = rng.permutation(np.asarray(x, float))  # unsorted on purpose
    y = m(x, p)
    g = m.guess(x, y)
    assert g.shape == p.shape and np.all(np.isfinite(g))
    if m.is_linear and m.n_params > 2:
        # polynomial coefficients: compare curves (coefficients of a smooth curve can
        # trade off); clean data must be reproduced almost exactly
        np.testing.assert_allclose(m(x, g), y, atol=1e-6 * np.ptp(y))
        return
    if name == "arrhenius":  # ln A and Ea: compare A within factor 2, Ea within factor 2
        assert abs(g[0] - p[0]) < math.log(2.0)
    ratio = g / p
    assert np.all(ratio > 0.5) and np.all(ratio < 2.0), f"{name}: guess {g} vs truth {p}"


@pytest.mark.parametrize("name", builtin_models())
def test_guess_resists_gross_outliers(name):
    # 15 % gross outliers (invented data): the guess must still be in the right basin:
    # curve within 10 % of the range of y at 90 % of the points, and never NaN
    bad = 0
    for seed in range(6):
        m, x, y, p, idx = _noisy(name, seed)
        g = m.guess(x, y)
        assert np.all(np.isfinite(g))
        dev = np.abs(m(x, g) - m(x, p)) / np.ptp(m(x, p))
        bad += np.quantile(dev, 0.9) > 0.10
    assert bad == 0, f"{name}: {bad} of 6 guesses thrown off by outliers"


@pytest.mark.parametrize("name", builtin_models())
def test_guess_survives_awkward_input(name):
    m = get_model(name)
    p, x0 = CASES[name]
    x0 = np.asarray(x0, float)
    cases = [
        (x0[:1], m(x0[:1], p)),  # one point
        (x0[:3], m(x0[:3], p)),  # three points
        (np.repeat(x0[::5], 3), m(np.repeat(x0[::5], 3), p)),  # duplicates
        (x0, np.full(x0.size, 2.5)),  # constant y
        (x0, np.zeros(x0.size)),  # all zero
        (x0, -m(x0, p)),  # negated
        (np.full(x0.size, x0[5]), m(x0, p)),  # one x value only
        (np.concatenate([x0, [np.nan]]), np.concatenate([m(x0, p), [1.0]])),  # a NaN
        (np.array([]), np.array([])),  # nothing at all
    ]
    for x, y in cases:
        g = m.guess(x, y)
        assert g.shape == (m.n_params,)
        assert np.all(np.isfinite(g)), f"{name}: guess {g} for x={x[:4]}..., y={y[:4]}..."


@pytest.mark.parametrize("name", ["exp_decay", "michaelis_menten", "logistic4",
                                  "gauss_peak", "lorentz_peak"])
def test_guess_on_dense_data(name):
    # many points with little noise (invented): a coarse scan must not settle in a
    # wrong basin, and large data are thinned for the guess (20000 points here)
    p, x = CASES[name]
    m = get_model(name)
    p = np.array(p, float)
    x = np.linspace(float(np.min(x)), float(np.max(x)), 20000)
    y = m(x, p) + 0.01 * np.ptp(m(x, p)) * np.random.default_rng(2).standard_normal(x.size)
    g = m.guess(x, y)
    ratio = g / p
    assert np.all(ratio > 0.8) and np.all(ratio < 1.25), f"{name}: {g} vs {p}"


def test_guess_handles_negative_and_falling_data():
    # a falling exponential rise (negative plateau) and a dip instead of a peak
    m = get_model("exp_rise")
    x = np.linspace(0, 10, 30)
    g = m.guess(x, m(x, [-4.0, 0.5]))
    assert 0.5 < g[0] / -4.0 < 2 and 0.5 < g[1] / 0.5 < 2
    m = get_model("gauss_peak")
    x = np.linspace(-5, 5, 61)
    g = m.guess(x, m(x, [-2.0, 1.0, 0.7, 3.0]))
    assert 0.5 < g[0] / -2.0 < 2 and abs(g[1] - 1.0) < 0.35 and 0.5 < g[2] / 0.7 < 2
    # a rising dose-response curve: the convention top >= bottom, hill < 0
    m = get_model("logistic4")
    x = np.geomspace(0.01, 100, 30)
    y = m(x, [2.0, 9.0, -1.5, 1.0])
    g = m.guess(x, y)
    assert g[1] > g[0] and g[2] < 0
    np.testing.assert_allclose(m(x, g), y, atol=0.5)


# ----------------------------------------------------------------- (c) recovery with outliers


def _robust_tol(name):
    # the five-parameter logistic is weakly determined (EC50, hill and s trade off)
    return 0.15 if name == "logistic5" else 0.05


@pytest.mark.parametrize("loss", ["huber", "cauchy", "tukey"])
@pytest.mark.parametrize("name", builtin_models())
def test_fit_recovers_parameters_despite_outliers(name, loss):
    # invented data with 15 % gross outliers, NO start values given
    m, x, y, p, idx = _noisy(name, seed=11)
    res = fitcore.fit(name, x, y, loss=loss)
    assert res.converged, res.message
    curve = m(x, res.values)
    truth = m(x, p)
    # the fitted curve follows the true one to within a fraction of the noise level
    assert np.max(np.abs(curve - truth)) < 0.02 * np.ptp(truth), f"{name}/{loss}"
    if not (m.is_linear and m.n_params > 2):
        err = np.abs(res.values - p) / np.abs(p)
        ok = (err < _robust_tol(name)) | (np.abs(res.values - p) < 4 * res.stderr)
        assert np.all(ok), f"{name}/{loss}: {res.values} vs {p} (se {res.stderr})"
    # the gross outliers get small weights
    if loss in ("cauchy", "tukey"):
        assert np.median(res.weights[idx]) < 0.2


def _scipy_robust_fit(m, x, y):
    """scipy.optimize.least_squares with loss='soft_l1' from the model's own guess.

    f_scale is the normalised MAD of the residuals, refreshed once (source: scipy
    least_squares documentation, robust example).
    """
    p = m.start_values(x, y)
    lo, hi = np.asarray(m.lower), np.asarray(m.upper)
    for _ in range(2):
        r = y - m(x, p)
        s = 1.482602218505602 * np.median(np.abs(r - np.median(r)))
        sol = optimize.least_squares(lambda q: m(x, q) - y, p, jac=lambda q: m.jac(x, q),
                                     bounds=(lo, hi), loss="soft_l1", f_scale=s,
                                     x_scale="jac", method="trf")
        p = sol.x
    return sol


@pytest.mark.parametrize("name", builtin_models())
def test_guess_serves_scipy_robust_fit_too(name):
    # side-by-side with scipy (source: scipy.optimize.least_squares): from our guess,
    # its soft_l1 fit recovers the invented truth as well, and agrees with ours
    m, x, y, p, idx = _noisy(name, seed=5)
    sol = _scipy_robust_fit(m, x, y)
    assert sol.success
    truth = m(x, p)
    # soft_l1 is not redescending, so gross outliers bias it a little more than ours
    assert np.max(np.abs(m(x, sol.x) - truth)) < 0.05 * np.ptp(truth), name
    ours = fitcore.fit(name, x, y, loss="huber")
    assert np.max(np.abs(m(x, sol.x) - m(x, ours.values))) < 0.05 * np.ptp(truth)


# ----------------------------------------------------------------- (d) outside references

_NUM = r"[-+]?\d*\.?\d+(?:[eE][-+]?\d+)?"


def _read_nist(path):
    """Tiny reader for a NIST StRD nonlinear file: certified values, SDs, RSS, data."""
    lines = path.read_text().splitlines()
    cert, sd, rss, data = [], [], None, []
    in_data = False
    for ln in lines:
        m = re.match(rf"\s*b\d+\s*=\s*({_NUM})\s+({_NUM})\s+({_NUM})\s+({_NUM})\s*$", ln)
        if m and not in_data:
            cert.append(float(m.group(3)))
            sd.append(float(m.group(4)))
        elif ln.startswith("Residual Sum of Squares"):
            rss = float(ln.split(":")[1])
        elif re.match(r"\s*Data:\s+y\s+x", ln):
            in_data = True
        elif in_data and ln.strip():
            data.append([float(v) for v in ln.split()])
    d = np.array(data)
    return np.array(cert), np.array(sd), rss, d[:, 1], d[:, 0]


def _lre(value, certified):
    """Log relative error = number of correct significant digits (NIST practice)."""
    rel = np.abs(np.asarray(value) - certified) / np.abs(certified)
    return -np.log10(np.maximum(rel, 1e-16))


def test_nist_misra1a_from_automatic_start(reference_dir):
    # NIST StRD Misra1a, y = b1*(1 - exp(-b2 x)) = exp_rise; certified values in the
    # file header (NIST/ITL StRD). No start values given: our own guess.
    cert, sd, rss, x, y = _read_nist(reference_dir / "nist-strd" / "Misra1a.dat")
    res = fitcore.fit("exp_rise", x, y, loss="l2")
    assert res.converged
    assert np.all(_lre(res.values, cert) >= 6), res.values
    assert np.all(_lre(res.stderr, sd) >= 4), res.stderr
    assert _lre(res.rss, rss) >= 6


def test_nist_misra1b_from_the_exp_rise_guess(reference_dir):
    # NIST StRD Misra1b uses the same data but the model y = b1*(1 - (1 + b2 x/2)^-2),
    # which is NOT exp_rise. It shares plateau b1 and initial slope b1*b2 with it, so
    # the exp_rise guess is a natural automatic start. Certified values: file header.
    cert, sd, rss, x, y = _read_nist(reference_dir / "nist-strd" / "Misra1b.dat")

    def f(x, p):
        return p[0] * (1.0 - (1.0 + p[1] * x / 2.0) ** -2)

    def jac(x, p):
        u = 1.0 + p[1] * x / 2.0
        return np.column_stack([1.0 - u ** -2, p[0] * x * u ** -3])

    misra1b = Model("misra1b", ("b1", "b2"), f, jac,
                    guess=lambda x, y: get_model("exp_rise").guess(x, y))
    res = fitcore.fit(misra1b, x, y, loss="l2")
    assert res.converged
    assert np.all(_lre(res.values, cert) >= 6), res.values
    assert np.all(_lre(res.stderr, sd) >= 4), res.stderr
    assert _lre(res.rss, rss) >= 6


PUROMYCIN_CONC = np.array([0.02, 0.02, 0.06, 0.06, 0.11, 0.11, 0.22, 0.22, 0.56, 0.56,
                           1.10, 1.10])
PUROMYCIN_RATE = np.array([76, 47, 97, 107, 123, 139, 159, 152, 191, 201, 207, 200.0])


def test_puromycin_michaelis_menten():
    # Puromycin, treated (Treloar 1974; Bates & Watts 1988 App. A1.3; R datasets);
    # check-values.md §6 item 20: Vmax 212.68363, Km 0.064121105, SE 6.947091 and
    # 0.008280750, s = 10.93366 (10 df). The data values are from memory [M] there and
    # the numbers reproduce R's nls example (212.7 (6.947), 0.06412 (0.008281), 10.93).
    res = fitcore.fit("michaelis_menten", PUROMYCIN_CONC, PUROMYCIN_RATE, loss="l2")
    assert res.converged
    np.testing.assert_allclose(res.values, [212.68363, 0.064121105], rtol=1e-5)
    # the standard errors agree with the check values to 2.5e-5 only: with the exact
    # Jacobian (here and in the scipy run below) they are 6.947155 and 0.00828095
    np.testing.assert_allclose(res.stderr, [6.947091, 0.008280750], rtol=5e-5)
    assert res.dof == 10
    assert math.sqrt(res.rss / res.dof) == pytest.approx(10.93366, rel=1e-5)
    # side by side: scipy curve_fit from the same automatic start (source: scipy)
    m = get_model("michaelis_menten")
    popt, pcov = optimize.curve_fit(lambda x, v, k: m(x, [v, k]), PUROMYCIN_CONC,
                                    PUROMYCIN_RATE, p0=m.guess(PUROMYCIN_CONC, PUROMYCIN_RATE),
                                    jac=lambda x, v, k: m.jac(x, [v, k]), xtol=1e-14, ftol=1e-14)
    np.testing.assert_allclose(res.values, popt, rtol=1e-6)
    np.testing.assert_allclose(res.stderr, np.sqrt(np.diag(pcov)), rtol=1e-6)


RYEGRASS = np.array([
    (7.58, 0), (8.0, 0), (8.3285714, 0), (7.25, 0), (7.375, 0), (7.9625, 0),
    (8.3555556, 0.94), (6.9142857, 0.94), (7.75, 0.94), (6.8714286, 1.88), (6.45, 1.88),
    (5.9222222, 1.88), (1.925, 3.75), (2.8857143, 3.75), (4.2333333, 3.75), (1.1875, 7.5),
    (0.8571429, 7.5), (1.0571429, 7.5), (0.6875, 15), (0.525, 15), (0.825, 15),
    (0.25, 30), (0.22, 30), (0.44, 30)])


def test_ryegrass_logistic4():
    # Ryegrass (Inderjit et al. 2002), check-values.md §6 item 21 [C]: in the form
    # f = c + (d - c)/(1 + exp(b (ln x - ln e))) = c + (d - c)/(1 + (x/e)^b), so
    # bottom = c, top = d, hill = b, EC50 = e: b 2.98222, c 0.48141, d 7.79296,
    # e 3.05795; s = 0.519626 (20 df); Gauss-Newton SEs (b, c, d, e) 0.4584, 0.2095,
    # 0.1897, 0.1858 (check-values.md §3.2 [C]). Six points at dose 0.
    y, x = RYEGRASS[:, 0], RYEGRASS[:, 1]
    res = fitcore.fit("logistic4", x, y, loss="l2")
    assert res.converged
    assert res.param_names == ("bottom", "top", "hill", "EC50")
    np.testing.assert_allclose(res.values, [0.48141, 7.79296, 2.98222, 3.05795], rtol=2e-5)
    assert math.sqrt(res.rss / res.dof) == pytest.approx(0.519626, rel=1e-5)
    assert res.dof == 20
    np.testing.assert_allclose(res.stderr, [0.2095, 0.1897, 0.4584, 0.1858], rtol=1e-3)
    # Gaussian log-likelihood -16.15514 (item 21): -n/2 (ln(2 pi RSS/n) + 1)
    n = y.size
    loglik = -0.5 * n * (math.log(2 * math.pi * res.rss / n) + 1)
    assert loglik == pytest.approx(-16.15514, abs=1e-4)


def test_arrhenius_recovers_lnA_and_Ea_from_automatic_start():
    # invented rate constants with 2 % relative noise, fitted with relative weights
    # sigma = 2 % of k; the guess is a Theil-Sen line of ln k against 1/T
    rng = np.random.default_rng(3)
    T = np.linspace(290.0, 360.0, 15)
    m = get_model("arrhenius", t_ref=298.15)
    p = np.array([math.log(3.0e12), 8.0e4])
    k = m(T, p) * (1 + 0.02 * rng.standard_normal(T.size))
    res = fitcore.fit(m, T, k, loss="l2", sigma=0.02 * k, sigma_mode="relative")
    assert res.converged
    assert abs(res.values[0] - p[0]) < 4 * res.stderr[0]
    assert abs(res.values[1] - p[1]) < 4 * res.stderr[1]
    # side by side: the same fit by scipy curve_fit from the same start (source: scipy)
    popt, pcov = optimize.curve_fit(lambda t, a, e: m(t, [a, e]), T, k, p0=m.guess(T, k),
                                    sigma=0.02 * k, xtol=1e-14, ftol=1e-14)
    np.testing.assert_allclose(res.values, popt, rtol=1e-6)
    np.testing.assert_allclose(res.stderr, np.sqrt(np.diag(pcov)), rtol=1e-4)
    # derived A = exp(lnA) and k at 298.15 K carry the propagated uncertainty
    der = {d.name: d for d in m.derived}
    assert der["A"].func(res.values) == pytest.approx(math.exp(res.values[0]))
    assert der["k_ref"].func(res.values) == pytest.approx(m(np.array([298.15]), res.values)[0])


def test_every_model_registry_row_builds_with_a_title():
    # one row per built-in model (fitcore.models.MODELS); the full title lives in the
    # built Model, the short one in the row
    from fitcore.models import MODELS, get_model, model_short_title, model_title

    assert list(MODELS) == fitcore.builtin_models()
    for name, e in MODELS.items():
        m = get_model(name)
        assert m.title and model_title(name) == m.title
        assert e.short and model_short_title(name) == e.short
    assert model_title("polynomial", degree=7) == get_model("polynomial", degree=7).title
    assert model_title("no such model") == "no such model"


def test_start_value_helpers_are_the_shared_robust_statistics():
    # the start values use fitcore.scale's median, MAD and Huber/Tukey weights (one
    # copy of each); the weights against their textbook forms (Huber 1981; Tukey's
    # biweight, e.g. statsmodels.robust.norms), the MAD against numpy
    from fitcore.scale import MAD_CONSTANT, huber_weights, mad_about_median, tukey_weights

    u = np.array([0.0, 0.5, 1.345, 2.0, 4.0, 4.685, 9.0])
    assert np.array_equal(huber_weights(u), np.where(u <= 1.345, 1.0, 1.345 / np.maximum(u, 1e-300)))
    assert np.allclose(tukey_weights(u), np.where(u < 4.685, (1 - (u / 4.685) ** 2) ** 2, 0.0))
    r = np.array([3.0, -1.0, 0.5, 10.0, 2.0, 2.5])
    assert mad_about_median(r) == pytest.approx(MAD_CONSTANT * np.median(np.abs(r - np.median(r))))
    assert mad_about_median([]) == 0.0


def test_logistic_curve_at_ec50_zero_is_not_finite_not_an_exception():
    # a step onto EC50's bound (0) must give a non-finite curve the solver refuses, never a
    # raw math-domain ValueError out of fit() (seen on bootstrap resamples)
    m = fitcore.get_model("logistic4")
    x = np.geomspace(0.01, 100, 5)
    for ec50 in (0.0, -1.0):
        assert not np.any(np.isfinite(m.f(x, np.array([2.0, 100.0, 1.1, ec50]))))
