"""Extended-precision refinement of linear least squares only where the conditioning
needs it (issue 12). Outside references: statsmodels OLS (estimates and covariance) for
a well-conditioned line, which is no longer refined; NIST StRD Filip and Wampler (still
refined) are checked at their certified digits in tests/reference/test_nist_strd.py.
The data are invented (seeded)."""
from __future__ import annotations

import numpy as np
import statsmodels.api as sm

import fitcore
from fitcore.solvers.dispatch import _needs_refinement
from fitcore.solvers.setup import _prepare


def _prob(model, x, y):
    return _prepare(model, x, y, "l2", scale="auto", alpha=None, sigma=None, excluded=None,
                    p0=None, fixed=None, tuning=None, sigma_mode="absolute",
                    max_iter=2000).prob


def test_well_conditioned_line_is_not_refined_and_matches_statsmodels():
    rng = np.random.default_rng(21)
    x = rng.uniform(0, 10, 2000)
    y = 1.0 + 2.0 * x + rng.normal(0, 1.0, x.size)
    assert not _needs_refinement(_prob("line", x, y))
    res = fitcore.fit("line", x, y)
    ols = sm.OLS(y, sm.add_constant(x)).fit()
    assert "iterative refinement" not in res.message
    np.testing.assert_allclose(res.values, ols.params, rtol=1e-13)
    np.testing.assert_allclose(res.covariance, ols.cov_params(), rtol=1e-10)


def test_ill_conditioned_polynomial_is_refined():
    # a degree-10 polynomial on x in [-9, -3], like NIST Filip: cond far above 100
    x = np.linspace(-9, -3, 82)
    y = np.polyval(np.linspace(1, 2, 11), x)
    terms = " + ".join(f"b{j}*x**{j}" for j in range(1, 11))
    prob = _prob(f"b0 + {terms}", x, y)
    assert prob.model.is_linear
    assert _needs_refinement(prob)
