"""Loss functions, tuning constants and the partition function.

Check values: tests/reference/data/check-values.md (sections 1.5, 1.6, 1.7, 2, 6), which
gives its own sources: Barron, CVPR 2019 (general loss, closed forms of Z), Holland &
Welsch 1977 (95 % tuning constants), Huber 1981 (MAD constant, proposal-2 beta).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import k1

import fitcore

from fitcore.losses import (LOSS_NAMES, barron_rho, barron_weight, efficiency, get_loss,
                            tuning_for_efficiency)
from fitcore.partition import log_partition, log_partition_quad
from fitcore.scale import MAD_CONSTANT, mad, psi_variance_at_normal

XS = np.array([0.5, 1.0, 2.0, 3.0, 10.0])

# check-values.md 1.5: rho(x, alpha, c=1)  [C, closed forms cross-checked there]
RHO_TABLE = {
    -math.inf: [0.1175030974, 0.3934693403, 0.8646647168, 0.9888910035, 1.0000000000],
    -2.0: [0.1176470588, 0.4, 1.0, 1.384615385, 1.923076923],
    0.0: [0.1177830357, 0.4054651081, 1.098612289, 1.704748092, 3.931825633],
    1.0: [0.1180339887, 0.4142135624, 1.236067977, 2.162277660, 9.049875621],
    2.0: [0.125, 0.5, 2.0, 4.5, 50.0],
}
# check-values.md 1.5: normalised weight c^2 psi(x)/x
W_TABLE = {
    -math.inf: [0.8824969026, 0.6065306597, 0.1353352832, 0.01110899654, 1.928749848e-22],
    -2.0: [0.8858131488, 0.64, 0.25, 0.09467455621, 0.001479289941],
    0.0: [0.8888888889, 0.6666666667, 0.3333333333, 0.1818181818, 0.01960784314],
    1.0: [0.8944271910, 0.7071067812, 0.4472135955, 0.3162277660, 0.09950371902],
    2.0: [1.0, 1.0, 1.0, 1.0, 1.0],
}


@pytest.mark.parametrize("alpha", list(RHO_TABLE))
def test_barron_rho_table(alpha):
    assert np.allclose(barron_rho(XS, alpha, 1.0), RHO_TABLE[alpha], rtol=1e-9, atol=1e-10)


@pytest.mark.parametrize("alpha", list(W_TABLE))
def test_barron_weight_table(alpha):
    assert np.allclose(barron_weight(XS, alpha, 1.0), W_TABLE[alpha], rtol=1e-9, atol=1e-30)


def test_barron_psi_and_scale_checks():
    # check-values.md 1.5: psi for alpha = 1 and 0; rho(3, 1, c=2); w(3, 0, c=2)
    psi1 = XS * barron_weight(XS, 1.0)
    assert np.allclose(psi1, [0.4472135955, 0.7071067812, 0.894427191, 0.9486832981, 0.9950371902], rtol=1e-9)
    psi0 = XS * barron_weight(XS, 0.0)
    assert np.allclose(psi0, [0.4444444444, 0.6666666667, 0.6666666667, 0.5454545455, 0.1960784314], rtol=1e-9)
    assert barron_rho(np.array([3.0]), 1.0, 2.0)[0] == pytest.approx(0.8027756377, rel=1e-9)
    # w = psi/x in Barron's units (not normalised): 1/c^2 * normalised weight
    assert barron_weight(np.array([3.0]), 0.0, 2.0)[0] / 4.0 == pytest.approx(0.1176470588, rel=1e-9)


@pytest.mark.parametrize("alpha", [1e-12, 1e-8, 1e-4, 1.0, -2.0, 2 - 1e-4, 2 - 1e-8, 2 - 1e-12])
def test_barron_rho_stable_near_special_shapes(alpha):
    # check-values.md 1.1: the expm1/log1p form has relative error <= 2.4e-15 against
    # high-precision arithmetic at these shapes; reproduced here with mpmath at 50 digits
    import mpmath

    mpmath.mp.dps = 50
    x = np.array([1e-3, 0.5, 3.0, 100.0])
    a = mpmath.mpf(alpha)
    b = abs(a - 2)
    ref = [float((b / a) * ((mpmath.mpf(v) ** 2 / b + 1) ** (a / 2) - 1)) for v in x]
    assert np.allclose(barron_rho(x, alpha), ref, rtol=1e-13, atol=0)


def test_barron_scale_invariance_and_monotone_in_alpha():
    # Barron 2019 properties: rho(kx, alpha, kc) = rho(x, alpha, c); d rho/d alpha >= 0
    x = np.linspace(-7, 7, 41)
    for a in (-math.inf, -2.0, 0.0, 0.5, 1.0, 1.5, 2.0):
        assert np.allclose(barron_rho(3.7 * x, a, 3.7 * 1.3), barron_rho(x, a, 1.3), rtol=1e-12, atol=1e-15)
    alphas = [-math.inf, -4.0, -2.0, -1.0, 0.0, 0.5, 1.0, 1.5, 2.0, 4.0]
    vals = np.array([barron_rho(x, a) for a in alphas])
    assert np.all(np.diff(vals, axis=0) >= -1e-12)


@pytest.mark.parametrize("name", [n for n in LOSS_NAMES if n != "adaptive"])
def test_loss_self_consistency(name):
    # statsmodels' norm tests (robust/tests/test_norms.py) check the same identities:
    # rho(0) = 0, weight(0) = 1, weight = psi/u, psi = rho', dpsi = psi' (numerically)
    loss = get_loss(name, alpha=0.7 if name == "general" else None)
    u = np.array([-7.3, -3.1, -1.2, -0.4, 0.3, 0.9, 2.2, 5.5])
    assert loss.rho(np.array([0.0]))[0] == 0.0
    if name != "l1":
        assert loss.weight(np.array([0.0]))[0] == pytest.approx(1.0)
        assert np.allclose(loss.psi(u), u * loss.weight(u), rtol=1e-12)
    h = 1e-6
    assert np.allclose((loss.rho(u + h) - loss.rho(u - h)) / (2 * h), loss.psi(u), rtol=1e-6, atol=1e-8)
    if name not in ("l1",):
        assert np.allclose((loss.psi(u + h) - loss.psi(u - h)) / (2 * h), loss.dpsi(u), rtol=1e-5, atol=1e-7)
    # small residuals: rho ~ u^2/2 (all losses except L1 are normalised so)
    if name != "l1":
        assert loss.rho(np.array([1e-4]))[0] == pytest.approx(0.5e-8, rel=1e-3)


@pytest.mark.parametrize("name,k95", [
    ("huber", 1.3449975), ("tukey", 4.685065), ("cauchy", 2.384947), ("welsch", 2.984637),
])
def test_tuning_constants_give_95_percent_efficiency(name, k95):
    # check-values.md section 2 / 6 item 2-3: k95 [C], Holland & Welsch 1977 [P]
    assert tuning_for_efficiency(name, 0.95) == pytest.approx(k95, abs=2e-6)
    assert efficiency(get_loss(name)) == pytest.approx(0.95, abs=5e-6)


@pytest.mark.parametrize("alpha,c95", [(1.0, 1.28710), (0.0, 1.68641), (-2.0, 1.89371), (-math.inf, 2.11046)])
def test_general_loss_95_percent_widths(alpha, c95):
    # check-values.md 1.7: Barron-parametrised 95 % widths [C]; alpha = 0 and -inf are
    # 2.3849/sqrt 2 and 2.9846/sqrt 2
    assert get_loss("general", alpha=alpha).tuning == pytest.approx(c95, abs=1e-4)


def test_efficiency_at_unit_width():
    # check-values.md 1.7: efficiency at c = 1 [C]
    for alpha, eff in [(1.0, 0.92676), (0.0, 0.85705), (-2.0, 0.78224), (-math.inf, 0.64952)]:
        assert efficiency(get_loss("general", tuning=1.0, alpha=alpha)) == pytest.approx(eff, abs=1e-5)


def test_log_partition_closed_forms():
    # Barron 2019: Z(0) = pi sqrt 2, Z(1) = 2 e K1(1), Z(2) = sqrt(2 pi)
    assert log_partition(0.0) == pytest.approx(math.log(math.pi * math.sqrt(2)), abs=1e-12)
    assert log_partition(1.0) == pytest.approx(math.log(2 * math.e * k1(1.0)), abs=1e-10)
    assert log_partition(2.0) == pytest.approx(0.5 * math.log(2 * math.pi), abs=1e-12)
    # check-values.md 6 item 8 and 9 (google-research golden values [D])
    assert log_partition(1.0) == pytest.approx(1.1854952323492, abs=1e-10)
    assert math.exp(log_partition(0.5)) == pytest.approx(3.638993131, abs=1e-9)
    assert math.exp(log_partition(1.5)) == pytest.approx(2.965924889, abs=1e-9)
    assert math.exp(log_partition(4.0)) == pytest.approx(2.101960916, abs=1e-9)


def test_log_partition_continuous_at_the_ends():
    # accurate to 1e-8 over [0, 2]: the quadrature must approach the closed forms at the ends
    assert log_partition_quad(1e-10) == pytest.approx(log_partition(0.0), abs=1e-8)
    assert log_partition_quad(2 - 1e-10) == pytest.approx(log_partition(2.0), abs=1e-8)
    a = np.linspace(0, 2, 21)
    assert np.all(np.diff(log_partition(a)) < 0)  # Z decreases with alpha (check-values 1.3)
    with pytest.raises(ValueError):
        log_partition(-0.5)


def test_nll_check_values():
    # check-values.md 1.6: NLL(x=1, alpha=1, c=1) = (sqrt 2 - 1) + log Z(1); NLL at
    # c = 1.7 equals -log of the Cauchy(0, 1.7 sqrt 2) and Normal(0, 1.7) densities
    from scipy import stats

    from fitcore.solve import _nll

    assert _nll(np.array([1.0]), 1.0, 0.0) == pytest.approx(1.5997087947, abs=1e-10)
    xs = np.array([-3.0, 0.0, 0.5, 4.0])
    for x, want in zip(xs, [2.96080296, 2.02193173, 2.06427506, 3.34852016]):
        assert _nll(np.array([x]), 0.0, math.log(1.7)) == pytest.approx(want, abs=1e-8)
        assert want == pytest.approx(-stats.cauchy(0, 1.7 * math.sqrt(2)).logpdf(x), abs=1e-8)
    for x, want in zip(xs, [3.00666021, 1.44956678, 1.49281938, 4.21773287]):
        assert _nll(np.array([x]), 2.0, math.log(1.7)) == pytest.approx(want, abs=1e-8)


def test_scale_constants():
    # check-values.md 6 items 1 and 6: MAD constant, proposal-2 beta(1.345) [C; Huber 1981]
    from scipy.stats import norm

    assert MAD_CONSTANT == pytest.approx(1 / norm.ppf(0.75), rel=1e-15)
    assert psi_variance_at_normal(get_loss("huber")) == pytest.approx(0.7101645, abs=1e-7)
    assert psi_variance_at_normal(get_loss("huber", tuning=1.5)) == pytest.approx(0.7784652, abs=1e-7)
    assert psi_variance_at_normal(get_loss("huber", tuning=2.5)) == pytest.approx(0.9775600, abs=1e-7)
    assert mad([1.0, -2.0, 3.0, 100.0]) == pytest.approx(MAD_CONSTANT * 2.5)


def test_bad_loss_arguments():
    with pytest.raises(ValueError, match="unknown loss"):
        get_loss("squared")
    with pytest.raises(ValueError, match="alpha"):
        get_loss("general")
    with pytest.raises(ValueError, match="positive"):
        get_loss("huber", tuning=-1)


@pytest.mark.parametrize("alpha", [1.6, 1.8, 1.99])
def test_general_loss_near_alpha_2_has_a_default_width(alpha):
    # every width is more than 95 % efficient here (so no width gives exactly 95 %);
    # the default is then 1, as at alpha = 2, and the fit runs (it raised scipy's
    # "f(a) and f(b) must have different signs" before)
    from fitcore.losses import _make, default_general_tuning, efficiency

    assert efficiency(_make("general", 0.05, alpha)) > 0.95
    assert default_general_tuning(alpha) == 1.0
    x = np.arange(10.0)
    res = fitcore.fit("line", x, 1 + 2 * x + np.sin(x), "general", alpha=alpha)
    assert res.converged and res.tuning == 1.0


def test_general_loss_width_solves_the_efficiency_below_the_threshold():
    from fitcore.losses import _make, default_general_tuning, efficiency

    for alpha in (0.0, 1.0, 1.5):
        k = default_general_tuning(alpha)
        assert efficiency(_make("general", k, alpha)) == pytest.approx(0.95, abs=1e-9)


# ---------------------------------------------------------------------- the registry
@pytest.mark.parametrize("name", LOSS_NAMES)
def test_every_registry_row_is_complete_and_consistent(name):
    # one row per loss (fitcore.losses.LOSSES): what the engine, the reports and the
    # views read. The 95 % efficiency target is Holland & Welsch (1977), as above.
    from fitcore.losses import LOSSES, loss_phrase, loss_short_title, loss_title

    e = LOSSES[name]
    assert e.name == name and e.title and e.short and e.menu
    assert loss_title(name) == e.title and loss_short_title(name) == e.short
    assert loss_phrase(name).count("loss") == 1  # "the X loss", never "loss ... loss"
    assert e.family in ("monotone", "redescending", "shape")
    assert e.dash in ("solid", "dash", "dot", "dashdot", "dashdotdot")
    assert len(e.colour) == 3 and all(0 <= c <= 255 for c in e.colour)
    loss = get_loss(name, alpha=1.0 if name == "general" else None)
    assert float(loss.weight(np.array([0.0]))[0]) == pytest.approx(1.0)
    if e.family != "shape":
        assert loss.redescending == (e.family == "redescending")
    if e.default_tuning is not None:
        assert loss.tuning == e.default_tuning
        assert efficiency(loss) == pytest.approx(0.95, abs=5e-4)


def test_pens_differ_between_losses():
    from fitcore.losses import LOSSES

    pens = {(e.colour, e.dash) for e in LOSSES.values()}
    assert len(pens) == len(LOSSES)
