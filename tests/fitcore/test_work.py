"""The one model of the work (fitcore.work): data set, method, exclusion record.

The checks here are round trips (a method written to a session and read back is the
same method, for every option of ``fitcore.fit``) and agreement with ``fitcore.fit``
itself: its signature names the options, and a fit through the method gives the
same numbers (``==``) as the direct call. The data are invented for the tests.
"""
from __future__ import annotations

import inspect
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import fitcore
from fitcore.diagnostics import refit_settings
from fitcore.losses import OWN_SCALE
from fitcore.session import Session, session_from_json, session_to_json
from fitcore.work import DATA_ARGUMENTS, FIT_OPTIONS, DataSet, Exclusion, Method


def _fit_keywords() -> dict:
    sig = inspect.signature(fitcore.fit)
    return {n: p.default for n, p in sig.parameters.items() if n not in DATA_ARGUMENTS}


def test_method_has_one_field_per_fit_option_with_the_same_default():
    # a new keyword of fit() must be carried by Method (one field line), or sessions
    # and the window would drop it silently
    keywords = _fit_keywords()
    assert set(FIT_OPTIONS) == set(keywords)
    m = Method()
    for name, default in keywords.items():
        held = getattr(m, name)
        if default is None and name == "fixed":
            assert held == {}
        else:
            assert held == default, name


def test_every_fit_option_has_a_strategy(work_strategies):
    # the round-trip properties draw every option; a new one needs a strategy
    assert set(work_strategies.OPTION_STRATEGIES) == set(FIT_OPTIONS)


def _session(draw, ws):
    finite, positive = ws.finite, ws.positive
    n = draw(st.integers(1, 12))
    x = draw(st.lists(finite, min_size=n, max_size=n))
    y = draw(st.lists(st.one_of(finite, st.just(math.nan)), min_size=n, max_size=n))
    sigma = draw(st.one_of(st.none(), st.lists(positive, min_size=n, max_size=n)))
    rows = draw(st.one_of(st.none(), st.lists(st.integers(1, 10**6), min_size=n, max_size=n)))
    notes = draw(st.lists(st.text(max_size=20), max_size=3))
    data = DataSet(x, y, sigma, x_name=draw(st.text(max_size=8)), y_name="Signal",
                   sigma_name="u" if sigma is not None else "", x_unit="s", y_unit="mV",
                   source=draw(st.text(max_size=12)), notes=notes, source_rows=rows,
                   source_sha256="ab" * 32)
    picked = draw(st.sets(st.integers(0, n - 1)))
    ex = [Exclusion(i, draw(st.text(max_size=15)), "2026-12-04T18:00:00+00:00")
          for i in sorted(picked)]
    return Session(data=data, method=draw(ws.methods), exclusions=ex)


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_every_option_survives_a_save_and_a_reopen(work_strategies, data):
    s = _session(data.draw, work_strategies)
    t = session_from_json(session_to_json(s))
    assert t.method == s.method
    assert t.data == s.data
    assert t.exclusions == s.exclusions


@settings(max_examples=100, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_fit_kwargs_round_trip(work_strategies, data):
    m = data.draw(work_strategies.methods)
    kw = m.to_fit_kwargs()
    # alpha is passed only with the general loss, a fixed scale and a tuning constant
    # only with the losses that take them (fit() refuses them with any other)
    own = m.loss in OWN_SCALE
    assert set(kw) == (set(FIT_OPTIONS) - ({"alpha"} if m.loss != "general" else set())
                       - ({"scale", "tuning"} if own else set()))
    back = Method.from_fit_kwargs(m.model, model_kind=m.model_kind,
                                  model_options=m.model_options, **kw)
    expected = m if m.loss == "general" else m.with_(alpha=None)
    assert back == (expected.with_(scale="auto", tuning=None) if own else expected)


def test_fit_through_the_method_equals_the_direct_call():
    # invented data: an exponential decay with one gross outlier
    x = np.linspace(0.0, 10.0, 25)
    y = 5.0 * np.exp(-x / 3.0) + 0.5 + 0.01 * np.sin(7 * x)
    y[6] += 2.0
    sigma = np.full(x.size, 0.05)
    kw = dict(loss="tukey", tuning=4.0, p0={"A": 4.0}, fixed={"C": 0.5},
              sigma_mode="relative", max_iter=500)
    direct = fitcore.fit("exp_decay", x, y, sigma=sigma, **kw)
    m = Method.from_fit_kwargs("exp_decay", **kw)
    via = fitcore.fit(m.model_spec(), x, y, sigma=sigma, **m.to_fit_kwargs())
    assert np.array_equal(direct.values, via.values)
    assert np.array_equal(direct.covariance, via.covariance)
    s = Session(data=DataSet(x, y, sigma), method=m)
    assert np.array_equal(s.refit().values, direct.values)


def test_model_options_reach_the_fit():
    x = np.linspace(-1.0, 1.0, 30)
    y = 1.0 + x - 2.0 * x**3
    m = Method(model="polynomial", model_options={"degree": 3}, loss="l2")
    res = fitcore.fit(m.model_spec(), x, y, **m.to_fit_kwargs())
    assert len(res.values) == 4
    assert np.allclose(res.values, [1.0, 1.0, 0.0, -2.0], atol=1e-9)


def test_method_from_result_repeats_the_fit():
    x = np.linspace(0.0, 10.0, 30)
    y = 2.0 * x + 1.0 + 0.1 * np.cos(3 * x)
    y[[4, 17]] += [5.0, -4.0]
    for kw in (dict(loss="huber", tuning=2.0, fixed={"b": 1.0}),
               dict(loss="general", alpha=0.5, scale=0.3),
               dict(loss="cauchy")):
        res = fitcore.fit("line", x, y, **kw)
        m = Method.from_result(res)
        assert m.model == "line" and m.loss == kw["loss"]
        assert (m.scale == 0.3) == ("scale" in kw)
        again = fitcore.fit(m.model_spec(), x, y, **m.to_fit_kwargs())
        assert np.array_equal(again.values, res.values)


def test_refit_settings_knows_a_fixed_scale_from_the_fit_not_from_its_wording():
    x = np.linspace(0.0, 5.0, 20)
    y = 3.0 * x + 0.2 * np.sin(5 * x)
    sigma = np.full(x.size, 0.1)
    # sigma absolute and scale automatic: the fit holds the scale at 1 and says
    # "fixed at 1 ...", but the analyst fixed nothing
    auto = fitcore.fit("line", x, y, loss="huber", sigma=sigma)
    assert "scale" not in refit_settings(auto)
    fixed = fitcore.fit("line", x, y, loss="huber", scale=0.7)
    assert refit_settings(fixed)["scale"] == 0.7
    assert "scale" not in refit_settings(fitcore.fit("line", x, y, loss="huber"))


def test_data_set_checks_lengths_and_fills_the_column_choice():
    with pytest.raises(ValueError, match="must match"):
        DataSet([1.0, 2.0], [1.0])
    d = DataSet([1.0, 2.0], [3.0, 4.0], x_name="Time", y_name="Signal", source_rows=[2, 3])
    assert d.columns == {"x": "Time", "y": "Signal", "sigma": None}
    assert d.file_row(1) == 3 and d.names["x"] == "Time"
    assert DataSet([1.0], [2.0], source_rows=[1, 2]).source_rows is None  # wrong length


def test_one_curve_grid_for_plot_comparison_and_csv():
    from fitcore.work import curve_grid

    x = np.array([-1.0, 0.0, 2.0, np.nan, 10.0])
    assert np.array_equal(curve_grid(x, 5), np.linspace(-1.0, 10.0, 5))
    assert np.allclose(curve_grid(x, 3, log_x=True), [2.0, np.sqrt(20.0), 10.0])
    assert curve_grid([-1.0, 0.0], log_x=True).size == 0  # nothing a log axis can show
    assert curve_grid([3.0], 4).tolist() == [3.0] * 4
