"""Formulas that are catalogue curves written another way get the catalogue's robust
start values (fitcore.solvers.recognise).

Sources: the curve identities are algebra (renaming, reordering, rate = 1/time
constant, (c/x)**b = 1/(x/c)**b); the least-squares optimum is checked against
scipy.optimize.least_squares started at the true values; the data are invented.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

import fitcore
from fitcore.formula import parse_formula
from fitcore.solvers.recognise import recognise


@pytest.mark.parametrize("formula,name,carried", [
    # catalogue parameters (A, tau, C) = (2, 5, 1) etc. and the formula's values for them
    ("A*exp(-x/tau) + C", "exp_decay", {"A": 2.0, "tau": 5.0, "C": 1.0}),
    ("C + A*exp(-k*x)", "exp_decay", {"A": 2.0, "k": 0.2, "C": 1.0}),
    ("amp*exp(-x/T) + offset", "exp_decay", {"amp": 2.0, "T": 5.0, "offset": 1.0}),
    ("Vmax*x/(Km + x)", "michaelis_menten", {"Vmax": 2.0, "Km": 5.0}),
    ("ymax*(1 - exp(-x/T))", "exp_rise", {"ymax": 2.0, "T": 0.2}),
    ("d + (a - d)/(1 + (x/c)**b)", "logistic4", {"d": 2.0, "a": 5.0, "b": 1.0, "c": 3.0}),
    ("a + (d - a)/(1 + (c/x)**b)", "logistic4", {"d": 2.0, "a": 5.0, "b": 1.0, "c": 3.0}),
    ("H*exp(-(x - mu)**2/(2*w**2)) + B", "gauss_peak", {"H": 2.0, "mu": 5.0, "w": 1.0, "B": 3.0}),
])
def test_catalogue_curves_written_another_way_are_recognised(formula, name, carried):
    m = parse_formula(formula)
    match = recognise(m)
    assert match is not None and match.name == name
    cat = fitcore.get_model(name)
    p_cat = {"exp_decay": [2.0, 5.0, 1.0], "michaelis_menten": [2.0, 5.0], "exp_rise": [2.0, 5.0],
             "logistic4": [2.0, 5.0, 1.0, 3.0], "gauss_peak": [2.0, 5.0, 1.0, 3.0]}[name]
    q = match.carry(np.array(p_cat))
    assert dict(zip(m.param_names, q)) == pytest.approx(carried)
    x = np.linspace(0.5, 20.0, 9)
    assert np.allclose(m.f(x, q), cat.f(x, np.array(p_cat)), rtol=1e-12)


@pytest.mark.parametrize("formula,name,param,factor", [
    # t_half = ln 2 tau; FWHM = 2 sqrt(2 ln 2) sigma (algebra)
    ("y0 + A*exp(-0.6931471805599453*x/t_half)", "exp_decay", "t_half", np.log(2.0)),
    ("A*exp(-x*log(2)/T12) + C", "exp_decay", "T12", np.log(2.0)),
    ("H*exp(-4*log(2)*(x - x0)**2/fwhm**2) + B", "gauss_peak", "fwhm", 2 * np.sqrt(2 * np.log(2.0))),
])
def test_a_constant_factor_is_recognised(formula, name, param, factor):
    m = parse_formula(formula)
    match = recognise(m)
    assert match is not None and match.name == name
    j = m.param_names.index(param)
    assert match.factor[j] == pytest.approx(factor, rel=1e-9)


def test_a_half_life_formula_fits_as_the_decay():
    x, y = _decay_data()
    res = fitcore.fit("y0 + A*exp(-0.6931471805599453*x/t_half)", x, y, loss="huber")
    cat = fitcore.fit("exp_decay", x, y, loss="huber")
    assert res.info["start_like"] == "exp_decay" and res.converged
    assert res["t_half"] == pytest.approx(np.log(2.0) * cat["tau"], rel=1e-6)


@pytest.mark.parametrize("formula", [
    "A1*exp(-x/t1) + A2*exp(-x/t2)",  # two exponentials: no catalogue curve
    "Bmax*x/(Kd + x) + NS*x",  # binding with a non-specific term
    "Bottom + (Top - Bottom)/(1 + 10**((logEC50 - x)*h))",  # 4PL on a log-dose axis
    "A*exp(-0.5*((x - mu)/s)**2)",  # a peak without a baseline (3 parameters)
    "A*exp(-(x - 60)/tau) + C",  # a decay from x = 60: A means something else
    "B + (T - B)/(1 + exp(-(x - x50)/s))",  # a logistic in x, not in log x
    "A*exp(-x/tau) + B*x",  # a decay on a slope
])
def test_other_curves_are_not_taken_for_catalogue_ones(formula):
    assert recognise(parse_formula(formula)) is None


def test_catalogue_models_and_code_models_keep_their_own_start():
    assert recognise(fitcore.get_model("exp_decay")) is None
    mine = fitcore.Model("mine", ("a", "b"), lambda x, p: p[0] * x / (p[1] + x),
                         lambda x, p: np.column_stack([x / (p[1] + x), -p[0] * x / (p[1] + x) ** 2]))
    assert recognise(mine) is None


def _decay_data():
    # invented: a decay at x far from 0 with four outliers
    rng = np.random.default_rng(11)
    x = np.linspace(60.0, 180.0, 40)
    y = 3.0 * np.exp(-x / 40.0) + 0.5 + rng.normal(0, 0.01, x.size)
    y[[3, 11, 25, 33]] += [0.4, 0.3, -0.35, 0.5]
    return x, y


@pytest.mark.parametrize("loss", ["l2", "huber", "tukey"])
def test_recognised_formula_fits_as_its_catalogue_model(loss):
    x, y = _decay_data()
    res = fitcore.fit("C + A*exp(-k*x)", x, y, loss=loss)
    cat = fitcore.fit("exp_decay", x, y, loss=loss)
    assert res.info["start_like"] == "exp_decay" and "start_like" not in cat.info
    assert res.converged and cat.converged
    got = dict(zip(res.param_names, res.values))
    want = dict(zip(cat.param_names, cat.values))
    assert got["A"] == pytest.approx(want["A"], rel=1e-6)
    assert got["k"] == pytest.approx(1.0 / want["tau"], rel=1e-6)
    assert got["C"] == pytest.approx(want["C"], rel=1e-6)
    if loss == "l2":  # outside reference: scipy from the true values
        ref = optimize.least_squares(lambda p: y - p[0] - p[1] * np.exp(-p[2] * x),
                                     [0.5, 3.0, 1 / 40.0], xtol=1e-15, ftol=1e-15, gtol=1e-15)
        assert [got["C"], got["A"], got["k"]] == pytest.approx(ref.x, rel=1e-7)


def test_start_values_given_for_every_parameter_are_kept():
    x, y = _decay_data()
    res = fitcore.fit("C + A*exp(-k*x)", x, y, p0={"C": 0.5, "A": 3.0, "k": 0.025})
    assert "start_like" not in res.info
    part = fitcore.fit("C + A*exp(-k*x)", x, y, p0={"C": 0.5})
    assert part.info["start_like"] == "exp_decay" and part.converged
