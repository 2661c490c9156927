"""fitcore.model_choice: is the model on screen right for new data, and if not, which
catalogue model is (invented data; the runs test checked against statsmodels)."""
from __future__ import annotations

import numpy as np
import pytest
from statsmodels.sandbox.stats.runs import runstest_1samp

import fitcore
from fitcore.model_choice import choose_model, fit_problem, runs_test_p

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")


def test_runs_test_matches_statsmodels():
    """One-sided p for too few runs = Phi(z), z as statsmodels' runstest_1samp
    (Wald-Wolfowitz, normal approximation without continuity correction)."""
    rng = np.random.default_rng(1)
    for signs in (rng.normal(size=40), np.r_[np.ones(12), -np.ones(10), np.ones(9)] + 0.0 * rng.normal(size=31)):
        z, _ = runstest_1samp(signs, cutoff=0.0, correction=False)
        from scipy.stats import norm

        assert runs_test_p(signs, np.arange(signs.size)) == pytest.approx(norm.cdf(z), rel=1e-12)


def _line(n=16, seed=5):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 30.0, n)
    y = 0.004 + 0.0985 * x + rng.normal(0, 0.002, n)
    y[9] += 0.05
    return x, y


def _decay(n=26, seed=11):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 50.0, n)
    y = 800.0 * np.exp(-x / 12.5) + 40.0 + rng.normal(0, 6.0, n)
    y[7] += 160.0
    return x, y


def test_a_fitting_model_has_no_problem():
    x, y = _line()
    assert fit_problem("line", x, fitcore.fit("line", x, y, loss="huber")) == ""
    x, y = _decay()
    assert fit_problem("exp_decay", x, fitcore.fit("exp_decay", x, y, loss="huber")) == ""


def test_an_undetermined_time_constant_is_a_problem_an_insignificant_intercept_is_not():
    x, y = _line()
    res = fitcore.fit("exp_decay", x, y, loss="huber")
    i = res.param_names.index("tau")
    assert 2 * res.stderr[i] > abs(res.values[i])
    assert fit_problem("exp_decay", x, res).startswith("parameter tau is not determined")
    # a line through (nearly) the origin: intercept within its uncertainty of 0 is fine
    rng = np.random.default_rng(2)
    y0 = 0.0985 * x + rng.normal(0, 0.002, x.size)
    line = fitcore.fit("line", x, y0, loss="huber")
    assert abs(line.values[0]) < 2 * line.stderr[0]
    assert fit_problem("line", x, line) == ""


def test_systematic_misfit_is_a_problem():
    x, y = _decay()
    res = fitcore.fit("line", x, y, loss="huber")
    assert "systematically" in fit_problem("line", x, res)


def test_choose_model_keeps_a_good_model_and_replaces_a_bad_one():
    x, y = _decay()
    keep = choose_model(x, y, None, "exp_decay")
    assert keep.keep and keep.current.model == "exp_decay"
    swap = choose_model(x, y, None, "line")
    assert not swap.keep and swap.best.model == "exp_decay"
    assert "misses the data systematically" in swap.reason()
    # the simplest model as good as the best: a calibration line stays a line
    x, y = _line()
    choice = choose_model(x, y, None, "exp_decay")
    assert not choice.keep and choice.best.model == "line"
    # monotone data: the peak models are not tried
    assert not {"gauss_peak", "lorentz_peak"} & {s.model for s in choice.scores}


def test_choose_model_stops_when_cancelled():
    x, y = _decay()
    calls = []
    choice = choose_model(x, y, None, "line", progress=lambda d, t: calls.append(d),
                          cancel=lambda: len(calls) >= 2)
    assert len(choice.scores) == 2
