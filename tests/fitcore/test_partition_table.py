"""The tabulated log Z(alpha) of the general loss (fitcore/_partition_table.py, made by
tools/make_partition_table.py) against the quadrature it replaces, an independent
30-digit mpmath quadrature, the closed forms and check-values.md 1.6.

Stated tolerance: 1e-12 absolute in log Z (the generator reaches 2.2e-13 at its check
points; the quadrature's own changes of subdivision are ~1e-13).
"""
from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from scipy.special import k1

from fitcore import _partition_table as table
from fitcore.partition import log_partition, log_partition_quad

TOL = 1e-12


def test_table_matches_the_quadrature():
    # seeded alpha over [0, 2] and geometrically towards both ends, where log Z is not
    # analytic and the pieces are short
    rng = np.random.default_rng(20261205)
    hi = table.EDGES[-1]
    alphas = np.concatenate([rng.uniform(0.0, 2.0, 150),
                             2.0 - 10.0 ** rng.uniform(math.log10(2.0 - hi), 0.0, 100),
                             10.0 ** rng.uniform(-6.0, 0.0, 100)])
    got = np.array([log_partition(float(a)) for a in alphas])
    want = np.array([log_partition_quad(float(a)) for a in alphas])
    assert np.max(np.abs(got - want)) <= TOL
    # the pieces join: no jump above the tolerance at any edge
    for e in table.EDGES[1:-1]:
        assert abs(log_partition(math.nextafter(e, 0.0)) - log_partition(e)) <= TOL


def _log_z_mpmath(alpha: float) -> float:
    # independent reference: Barron's Z(alpha) = integral of exp(-rho) by mpmath at 30
    # digits, rho from check-values.md 1.1 (power form, exact at this precision)
    with mpmath.workdps(30):
        a = mpmath.mpf(alpha)
        b = abs(a - 2)

        def f(x):
            return mpmath.exp(-(b / a) * (mpmath.power(x * x / b + 1, a / 2) - 1))

        return float(mpmath.log(2 * mpmath.quad(f, [0, 1, 5, 20, 100, 1e4, mpmath.inf])))


@pytest.mark.parametrize("alpha", [1e-7, 0.013, 0.77, 1.31, 1.999, 2.0 - 2.0 ** -25])
def test_table_matches_mpmath(alpha):
    assert log_partition(alpha) == pytest.approx(_log_z_mpmath(alpha), abs=TOL)


def test_table_check_values():
    # check-values.md 1.6 (quad column, 12 decimals) and the closed forms of Barron 2019:
    # Z(1) = 2 e K1(1); Z(0) = pi sqrt 2 and Z(2) = sqrt(2 pi) at the table's ends
    for alpha, want in ((0.5, 1.291707030992), (1.0, 1.185495232349), (1.5, 1.087188919293)):
        assert log_partition(alpha) == pytest.approx(want, abs=1e-11)
    assert log_partition(1.0) == pytest.approx(math.log(2 * math.e * k1(1.0)), abs=TOL)
    assert log_partition(1e-300) == pytest.approx(math.log(math.pi * math.sqrt(2)), abs=TOL)
    top = table.EDGES[-1]
    assert log_partition(top) == pytest.approx(0.5 * math.log(2 * math.pi), abs=1e-8)
    # outside the table: the quadrature (alpha = 4: e^(1/4) K_(1/4)(1/4), check-values 1.6)
    assert log_partition(4.0) == pytest.approx(0.742870678640, abs=1e-11)
    assert log_partition(math.nextafter(2.0, 0.0)) == log_partition_quad(math.nextafter(2.0, 0.0))


def test_table_needs_no_quadrature_inside(monkeypatch):
    # the speed of the adaptive fit rests on this: inside [0, 2 - 2**-30] no quadrature
    import fitcore.partition as part

    def refuse(alpha):
        raise AssertionError(f"quadrature asked for alpha = {alpha}")

    monkeypatch.setattr(part, "log_partition_quad", refuse)
    part._cached.cache_clear()
    assert part.log_partition(0.77) == pytest.approx(_log_z_mpmath(0.77), abs=TOL)
    part.log_partition(np.linspace(0.0, table.EDGES[-1], 11))
    with pytest.raises(AssertionError):
        part.log_partition(3.0)
    part._cached.cache_clear()
