"""The convergence verdict, the start strategy and the refusals of issue 11.

Sources: scipy.optimize.minimize run side by side as the independent minimiser; the
formula cases are invented demo data (formula_cases.py). The NIST runs made to fail
are in tests/reference/test_nist_verdict.py.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize

import fitcore
from fitcore.formula import parse_formula

sys.path.insert(0, str(Path(__file__).parent))
from formula_cases import CASES, data

def _objective(res, loss_obj, theta_full_to_r, p):
    r = theta_full_to_r(p)
    if res.loss == "l2":
        return float(r @ r)
    return float(np.sum(loss_obj.rho(r / res.scale)))


_CATALOGUE_LIKE = ["A*exp(-x/tau) + C", "Bmax*x/(Kd + x)", "H*exp(-(x - mu)**2/(2*w**2)) + B"]
# curves that are not in the catalogue (fitted through the searches of solvers/start.py)
_OTHERS = ["A*exp(-(x - 1)/tau) + C", "Bmax*x/(Kd + x) + NS*x", "B + (T - B)/(1 + exp(-(x - mu)/w))"]


@pytest.mark.parametrize("seed", range(24))
def test_converged_means_no_lower_objective_nearby(seed):
    """Property (seeded random problems): whenever converged is True, scipy's
    minimiser started at the returned point finds no lower objective (1e-9 relative).
    Seeds 0-11: formulas that are catalogue curves; 12-23: formulas that are not, each
    under the four losses, from a blank and from a random start."""
    rng = np.random.default_rng(seed)
    formula = (_CATALOGUE_LIKE if seed < 12 else _OTHERS)[seed % 3]
    loss = ["l2", "huber", "cauchy", "tukey"][seed % 4]
    m = parse_formula(formula)
    x = np.sort(rng.uniform(0.1, 10, 40))
    true = {"A": 3, "tau": 2, "C": 0.5, "Bmax": 5, "Kd": 1.5, "H": 2, "mu": 5, "w": 1, "B": 0.3,
            "NS": 0.2, "T": 4}
    p = np.array([true[n] for n in m.param_names], dtype=float)
    y = m.f(x, p) + rng.normal(0, 0.05, x.size)
    y[rng.choice(x.size, 3, replace=False)] += rng.uniform(0.5, 2, 3)
    p0 = p * rng.uniform(0.3, 3.0, p.size) if seed % 2 else None
    res = fitcore.fit(formula, x, y, loss=loss, p0=None if p0 is None else list(p0))
    if not res.converged:
        return  # the property is about what is called converged
    loss_obj = fitcore.get_loss(loss)

    def obj(q):
        with np.errstate(all="ignore"):
            v = _objective(res, loss_obj, lambda pp: y - m.f(x, pp), q)
        return v if np.isfinite(v) else 1e300

    here = obj(res.values)
    found = min(optimize.minimize(obj, res.values, method=meth,
                                  options={"xatol": 1e-12, "fatol": 1e-15, "maxiter": 4000}
                                  if meth == "Nelder-Mead" else {"gtol": 1e-12}).fun
                for meth in ("BFGS", "Nelder-Mead"))
    assert found >= here * (1 - 1e-9), (formula, loss, here, found)


@pytest.mark.parametrize("i", range(len(CASES)))
def test_formula_from_blank_start_reaches_the_optimum_from_the_true_values(i):
    """Formulas written unlike the catalogue, with outliers and x far from 0, fitted
    from blank start values (all 1) under L2, Huber, Cauchy and L1: the same objective
    as the fit started at the true values (invented data, formula_cases.py)."""
    formula, true, x, y = data(i)
    for loss in ("l2", "huber", "cauchy", "l1"):
        blank = fitcore.fit(formula, x, y, loss=loss)
        ref = fitcore.fit(formula, x, y, loss=loss, p0=true)
        assert ref.converged, (formula, loss, ref.message)
        assert blank.converged, (formula, loss, blank.message)
        assert blank.objective <= ref.objective * (1 + 1e-7) + 1e-12, (formula, loss)


def test_a_refused_newton_step_does_not_make_the_robust_loop_creep():
    # invented peak data (the property test's generator, seed 8, Huber, a start off the
    # peak); a refused Newton step re-armed by the next small reweighted step made every
    # inner solve of the MAD loop run its 2000 iterations: 132 145 in all (~100 s)
    rng = np.random.default_rng(8)
    formula = "H*exp(-(x - mu)**2/(2*w**2)) + B"
    m = parse_formula(formula)
    x = np.sort(rng.uniform(0.1, 10, 40))
    p = np.array([2.0, 5.0, 1.0, 0.3])
    y = m.f(x, p) + rng.normal(0, 0.05, x.size)
    y[rng.choice(x.size, 3, replace=False)] += rng.uniform(0.5, 2, 3)
    p0 = list(p * rng.uniform(0.3, 3.0, p.size))
    res = fitcore.fit(formula, x, y, loss="huber", p0=p0)
    assert res.converged, res.message
    assert res.n_iter < 5000  # 352 before the Newton steps, 691 with this fix


@pytest.mark.parametrize("seed", range(4))
def test_l1_of_a_nonlinear_model_reaches_the_l1_optimum(seed):
    """L1 on a nonlinear model starts from a converged robust fit, not the raw start
    (the issue measured an exp_decay L1 fit ending 0.7 SE from the best). Reference:
    scipy Nelder-Mead on sum |r| from the true values and from the returned point."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, 30)
    y = 3 * np.exp(-x / 2.5) + 0.5 + rng.normal(0, 0.05, x.size)
    bad = rng.choice(x.size, 5, replace=False)
    y[bad] += rng.uniform(0.5, 2, 5) * rng.choice([-1, 1], 5)
    res = fitcore.fit("exp_decay", x, y, loss="l1")
    assert res.converged, res.message
    m = res.model
    obj = lambda p: float(np.sum(np.abs(y - m.f(x, p))))  # noqa: E731
    best = min(optimize.minimize(obj, p0, method="Nelder-Mead",
                                 options=dict(xatol=1e-12, fatol=1e-14, maxiter=20000)).fun
               for p0 in ([3.0, 2.5, 0.5], res.values))
    assert obj(res.values) <= best * (1 + 1e-9)


# ---------------------------------------------------------------- silent fallbacks
X = np.linspace(0, 10, 30)
Y = 2 * np.exp(-X / 3) + 1


@pytest.mark.parametrize("name,suggestion", [("lien", "'line'"), ("exp_decy", "'exp_decay'")])
def test_misspelt_model_name_is_refused_with_a_suggestion(name, suggestion):
    with pytest.raises(fitcore.FitError, match=f"is not a built-in model; did you mean {suggestion}"):
        fitcore.fit(name, X, Y)


def test_single_unknown_name_without_close_match_is_refused():
    with pytest.raises(fitcore.FitError, match="the built-in models are line"):
        fitcore.fit("tau", X, Y)


@pytest.mark.parametrize("loss", ["huber", "tukey", "cauchy"])
def test_all_zero_y_under_a_robust_loss_is_an_exact_fit(loss):
    res = fitcore.fit("line", X, np.zeros(X.size), loss=loss)
    assert res.converged
    assert np.all(res.values == 0.0)
    assert "lie exactly on the curve" in res.message
    assert np.all(np.isnan(res.stderr))


@pytest.mark.parametrize("n_off", [1, 2, 3, 5])
def test_adaptive_loss_on_an_exact_majority_is_an_exact_fit(n_off):
    """An exact line with a few points moved (synthetic data; common practice: an exact
    majority has zero robust scale). The adaptive loss's pseudo-Huber start used to let
    its proposal-2 scale collapse to ~1e-167 with one point off, then refuse with an
    overflow message asking for a fixed scale (which the adaptive loss refuses); with 5
    off it reported uncertainties of 1e-13. Now it is the fit through the majority with
    no uncertainties, as every other robust loss with the automatic scale."""
    x = np.linspace(0.0, 10.0, 20)
    y = 2.0 * x + 1.0
    y[7:7 + n_off] += 5.0
    res = fitcore.fit("line", x, y, loss="adaptive")
    assert res.converged
    np.testing.assert_allclose(res.values, [1.0, 2.0], rtol=1e-9)
    assert np.all(np.isnan(res.stderr))
    assert "robust scale is zero" in res.message
    huber = fitcore.fit("line", x, y, loss="huber")
    np.testing.assert_allclose(res.values, huber.values, rtol=1e-9)
    assert "fixed scale" not in res.message  # the adaptive loss refuses one


@pytest.mark.parametrize("n_off", [1, 3, 9])
def test_l1_on_an_exact_majority_gives_no_uncertainties(n_off):
    """Same data under L1: the MAD of the residuals is zero; its fallback (the residuals'
    standard deviation) used to price one point off an exact line at u(intercept) = 1.08.
    Common practice: the scatter of the majority is zero, and one point off says nothing
    about it. (All points exact: u = 0, test_l1.py.)"""
    x = np.linspace(0.0, 10.0, 20)
    y = 2.0 * x + 1.0
    y[5:5 + n_off] += 5.0
    res = fitcore.fit("line", x, y, loss="l1")
    assert res.converged
    np.testing.assert_allclose(res.values, [1.0, 2.0], rtol=1e-9)
    assert np.all(np.isnan(res.stderr))
    assert "lie exactly on the curve" in res.message
    assert res.scale < 1e-9


@pytest.mark.parametrize("scale", [1e-170, 1e200])
def test_fixed_scale_outside_double_range_is_refused(scale):
    with pytest.raises(fitcore.FitError, match="outside what double precision can square"):
        fitcore.fit("line", X, Y, loss="huber", scale=scale)


def test_fixed_scale_far_from_the_data_is_refused():
    with pytest.raises(fitcore.FitError, match="times the largest \\|y\\|.*negligible against it"):
        fitcore.fit("line", X, Y, loss="huber", scale=1e120)


def test_constant_y_under_exp_decay_names_the_undetermined_time_constant():
    res = fitcore.fit("exp_decay", X, np.full(X.size, 2.0))
    assert not res.converged
    assert "tau" in res.message.split("no longer affect")[0]
    assert np.isnan(res.stderr[res.param_names.index("tau")])


@pytest.mark.parametrize("loss", ["l2", "l1", "huber", "tukey", "adaptive"])
def test_alpha_with_a_loss_that_has_no_fixed_alpha_is_refused(loss):
    # only the general loss takes a shape; the adaptive loss fits it (common practice:
    # a meaningless option combination is an error, not silently ignored)
    with pytest.raises(fitcore.FitError, match=f"^alpha is the shape of the general loss; "
                                               f"the {loss} loss"):
        fitcore.fit("line", X, Y, loss=loss, alpha=0.5)
    assert fitcore.fit("line", X, Y, loss=loss, alpha=None).converged


@pytest.mark.parametrize("loss", ["l2", "l1", "adaptive"])
def test_scale_or_tuning_with_a_loss_that_takes_neither_is_refused(loss):
    # least squares and L1 do not depend on a scale, the adaptive loss fits its own:
    # a fixed scale or a tuning constant was silently ignored, while the result still
    # recorded the scale as "fixed by the analyst" (common practice: refuse it)
    with pytest.raises(fitcore.FitError, match="^a fixed scale has no effect on the "):
        fitcore.fit("line", X, Y, loss=loss, scale=0.5)
    with pytest.raises(fitcore.FitError, match="^a tuning constant has no effect on the "):
        fitcore.fit("line", X, Y, loss=loss, tuning=2.0)
    res = fitcore.fit("line", X, Y, loss=loss)
    assert res.converged and not res.info["scale_fixed"]


@pytest.mark.parametrize("kw,message", [
    # a held value that is not a finite number (inf was fitted as rank-deficient, NaN
    # was blamed on the model's start values)
    (dict(fixed={"tau": float("inf")}), "^the held value of tau must be a finite number"),
    (dict(fixed={"tau": float("nan")}), "^the held value of tau must be a finite number"),
    (dict(fixed={"tau": "abc"}), "^the held value of tau must be a finite number"),
    # an iteration limit that is no count ('did not converge in -1 iterations'; 2.5 was
    # a raw TypeError)
    (dict(max_iter=0), "^max_iter must be a whole number of at least 1"),
    (dict(max_iter=-1), "^max_iter must be a whole number of at least 1"),
    (dict(max_iter=2.5), "^max_iter must be a whole number of at least 1"),
    (dict(max_iter="many"), "^max_iter must be a whole number of at least 1"),
    # a scale that is no number is named as such, whatever the loss
    (dict(scale="fixed"), "^scale must be 'auto' or a positive number, not 'fixed'"),
    (dict(scale="fixed", loss="huber"), "^scale must be 'auto' or a positive number, not 'fixed'"),
    (dict(scale=True, loss="huber"), "^scale must be 'auto' or a positive number, not True"),
    (dict(tuning=True, loss="huber"), "^the tuning constant must be a positive number, not True"),
])
def test_meaningless_option_values_are_refused_in_one_sentence(kw, message):
    with pytest.raises(fitcore.FitError, match=message):
        fitcore.fit("exp_decay", X, Y, **kw)


def test_an_iteration_limit_given_as_a_whole_float_is_taken():
    assert fitcore.fit("exp_decay", X, Y, max_iter=500.0).converged


def test_the_losses_that_take_no_scale_are_read_from_the_registry():
    from fitcore.losses import LOSSES, OWN_SCALE

    assert set(OWN_SCALE) == {"l2", "l1", "adaptive"}
    for name in LOSSES:
        if name in OWN_SCALE:
            continue
        kw = {"alpha": 0.5} if name == "general" else {}
        res = fitcore.fit("line", X, Y + 0.01 * np.sin(5 * X), loss=name, scale=0.3, tuning=2.0, **kw)
        assert res.scale == 0.3 and res.tuning == 2.0 and res.info["scale_fixed"], name


def test_alpha_is_taken_by_the_general_loss():
    res = fitcore.fit("line", X, Y, loss="general", alpha=0.5)
    assert res.alpha == 0.5


@pytest.mark.parametrize("which", ["x", "y"])
def test_complex_input_is_refused(which):
    args = {"x": X, "y": Y}
    args[which] = args[which] + 1j
    with pytest.raises(fitcore.FitError, match=f"^{which} holds complex numbers"):
        fitcore.fit("line", args["x"], args["y"])


def test_timestamps_far_from_zero_get_a_hint_to_subtract_an_origin():
    t = 1.7e9 + np.linspace(0, 600, 40)
    y = 2 * np.exp(-(t - t[0]) / 100) + 1 + np.random.default_rng(1).normal(0, 0.01, t.size)
    res = fitcore.fit("exp_decay", t, y)
    assert not res.converged
    assert "subtract an origin (e.g. x - 1700000000)" in res.message
    shifted = fitcore.fit("exp_decay", t - t[0], y)
    assert shifted.converged and shifted.values[1] == pytest.approx(100, rel=0.05)


# ---------------------------------------------------------------- one-sided pull
def _one_sided(n, frac, seed):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 8, n)
    y = 3 * np.exp(-x / 2) + 0.5 + rng.normal(0, 0.05, n)
    bad = rng.random(n) < frac
    y[bad] += rng.uniform(0.5, 3.0, bad.sum())
    return x, y


def test_monotone_loss_under_one_sided_outliers_warns_and_suggests_a_redescending_loss():
    # invented data: 10 % of 1000 points pushed up (the README's coverage case)
    x, y = _one_sided(1000, 0.10, 0)
    huber = fitcore.fit("exp_decay", x, y, loss="huber")
    assert any("monotone loss (Huber)" in w and "redescending loss (Tukey biweight, Welsch)" in w
               for w in huber.warnings)
    tukey = fitcore.fit("exp_decay", x, y, loss="tukey")
    assert not any("monotone loss" in w for w in tukey.warnings)
    # every monotone loss of the registry warns (a new row gets the check without a list
    # to update), the redescending and shape families do not (common practice: their
    # psi falls off, so far points have no pull)
    from fitcore.losses import LOSSES

    for name, entry in LOSSES.items():
        if name in ("l2", "adaptive", "general"):
            continue
        res = fitcore.fit("exp_decay", x, y, loss=name)
        warned = any("monotone loss" in w for w in res.warnings)
        assert warned == (entry.family == "monotone"), name


def test_few_one_sided_outliers_give_no_bias_warning():
    # 8 % of 60 points: an excess below sqrt(n), a bias well under one standard error
    x, y = _one_sided(60, 0.08, 1)
    res = fitcore.fit("exp_decay", x, y, loss="huber")
    assert not any("monotone loss" in w for w in res.warnings)
