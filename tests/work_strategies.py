"""Hypothesis strategies for the model of the work (fitcore.work), shared by the
library's and the window's round-trip tests. Invented values only."""
from __future__ import annotations

import math

from hypothesis import strategies as st

import fitcore
from fitcore.losses import LOSS_NAMES
from fitcore.work import Method

finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
positive = st.floats(min_value=1e-300, max_value=1e300, allow_nan=False)
names = st.sampled_from(["A", "tau", "C", "k", "x0", "base"])

OPTION_STRATEGIES = {
    "loss": st.sampled_from(LOSS_NAMES),
    "scale": st.one_of(st.just("auto"), positive),
    "alpha": st.one_of(st.none(), finite, st.sampled_from([math.inf, -math.inf])),
    "p0": st.one_of(st.none(), st.dictionaries(names, finite, max_size=4),
                    st.lists(finite, max_size=5)),
    "fixed": st.dictionaries(names, finite, max_size=3),
    "tuning": st.one_of(st.none(), positive),
    "sigma_mode": st.sampled_from(["absolute", "relative"]),
    "max_iter": st.integers(1, 10**6),
    "weighting": st.one_of(st.none(), st.sampled_from(["1/x", "1/x^2", "1/y", "1/y^2", "power"])),
}


models = st.one_of(
    st.tuples(st.sampled_from(fitcore.builtin_models()), st.just("builtin"), st.just({})),
    st.tuples(st.just("polynomial"), st.just("builtin"),
              st.fixed_dictionaries({"degree": st.integers(1, 10)})),
    st.tuples(st.sampled_from(["A*exp(-x/tau) + C", "k*x + base", "A/(1 + (x/x0)**2)"]),
              st.just("formula"), st.just({})),
)
methods = st.builds(
    lambda m, opts: Method(model=m[0], model_kind=m[1], model_options=m[2], **opts),
    models, st.fixed_dictionaries(OPTION_STRATEGIES))


