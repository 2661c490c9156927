"""Loss comparison and the adaptive reading.

Data are invented (seeded) except where said. Outside references: fitcore.fit called
directly side by side; scipy's chi-square quantile for the likelihood-ratio cut.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import fitcore
from fitcore import compare as cmpmod
from fitcore.compare import adaptive_reading, compare_losses, lr_interval


@pytest.fixture(scope="module")
def decay_with_outliers():
    rng = np.random.default_rng(21)
    x = np.linspace(0, 10, 60)
    y = 3.0 * np.exp(-x / 2.5) + 0.5 + rng.normal(0, 0.05, x.size)
    y[[6, 7, 8]] += [0.9, 0.8, 1.0]  # a run of high points early on: drags l2's amplitude
    return x, y


@pytest.fixture(scope="module")
def comparison(decay_with_outliers):
    x, y = decay_with_outliers
    return compare_losses("exp_decay", x, y)


def test_results_equal_direct_fits(comparison, decay_with_outliers):
    x, y = decay_with_outliers
    assert comparison.losses == ("l2", "huber", "cauchy", "tukey", "adaptive")
    assert not comparison.errors and not comparison.cancelled
    for loss in comparison.losses:
        direct = fitcore.fit("exp_decay", x, y, loss=loss)
        np.testing.assert_allclose(comparison.results[loss].values, direct.values, rtol=1e-12)


def test_table_rows(comparison):
    rows = comparison.table()
    assert len(rows) == 5 * 3
    for loss, param, value, stderr, scale, alpha, n_down in rows:
        res = comparison.results[loss]
        assert value == res[param]
        assert stderr == res.stderr[res.param_names.index(param)]
        assert scale == res.scale and n_down == res.n_downweighted
        assert (alpha is None) == (loss != "adaptive")
    robust_down = [r[6] for r in rows if r[0] == "tukey"]
    assert robust_down[0] >= 3  # the three planted outliers are down-weighted


def test_text_rows_print_every_fit(comparison):
    rows = comparison.text_rows()
    assert rows[0] == ["", "L2", "Huber", "Cauchy", "Tukey", "adaptive"] or len(rows[0]) == 6
    labels = [r[0] for r in rows[1:]]
    assert labels == ["A", "tau", "C", "scale", "alpha", "n down-weighted", "converged"]
    for c, loss in enumerate(comparison.losses, start=1):
        res = comparison.results[loss]
        for k, _name in enumerate(res.param_names):
            assert rows[1 + k][c] == fitcore.format_value(res.values[k], res.stderr[k])
        assert rows[4][c] == f"{res.scale:.4g}"
        assert rows[7][c] == ("yes" if res.converged else "NO")
    assert rows[5][1] == "-" and rows[5][5] != "-"  # alpha only for the adaptive loss


def test_difference_rule_is_en_above_one_with_k_2():
    """The highlight rule is E_n > 1 with expanded uncertainties U = 2u (ISO 13528's E_n
    number, from memory): |d| / sqrt(U_a^2 + U_b^2) > 1, i.e. |d| > 2 sqrt(u_a^2 + u_b^2);
    by chance a normal difference exceeds it with probability 2(1 - Phi(2)) = 4.6 %."""
    assert cmpmod.DIFFERENCE_FACTOR == 2.0
    assert "E_n > 1" in cmpmod.DIFFERENCE_RULE and "2" in cmpmod.DIFFERENCE_RULE
    assert 2 * stats.norm.sf(cmpmod.DIFFERENCE_FACTOR) == pytest.approx(0.0455, abs=1e-3)


def test_differences_flag_l2_against_robust(comparison):
    diffs = comparison.differences()
    flagged = {(p, a, b) for p, a, b, _, _ in diffs}
    # the redescending losses reject the run of high points; least squares follows it
    for robust in ("cauchy", "tukey", "adaptive"):
        assert ("A", "l2", robust) in flagged
    # the robust losses agree with each other (no pair among them is flagged)
    assert all("l2" in (a, b) for _p, a, b, _, _ in diffs)
    # every pair is checked against the rule, both ways
    fits = comparison.fitted()
    for j, name in enumerate(comparison.param_names):
        for ia in range(len(fits)):
            for ib in range(ia + 1, len(fits)):
                (la, ra), (lb, rb) = fits[ia], fits[ib]
                delta = rb.values[j] - ra.values[j]
                cu = math.hypot(ra.stderr[j], rb.stderr[j])
                assert ((name, la, lb) in flagged) == (abs(delta) / math.hypot(2 * ra.stderr[j], 2 * rb.stderr[j]) > 1)
    for _p, _a, _b, delta, cu in diffs:
        assert abs(delta) > 2 * cu > 0
    marks = comparison.highlighted()
    assert "A" in marks["l2"] and "A" in marks["tukey"]


def test_clean_data_show_no_differences():
    rng = np.random.default_rng(5)
    x = np.linspace(0, 10, 40)
    y = 2 + 0.5 * x + rng.normal(0, 0.2, x.size)
    cmp = compare_losses("line", x, y, losses=("l2", "huber"))
    assert cmp.differences() == []


def test_settings_are_passed_to_every_fit(decay_with_outliers):
    x, y = decay_with_outliers
    excl = np.zeros(x.size, bool)
    excl[[6, 7, 8]] = True
    cmp = compare_losses("exp_decay", x, y, losses=("l2", "huber"), excluded=excl,
                         fixed={"C": 0.5}, scale=0.05)
    for _loss, res in cmp.fitted():
        assert res.n_excluded == 3 and res.fixed == {"C": 0.5}
    assert cmp.results["huber"].scale == 0.05
    direct = fitcore.fit("exp_decay", x, y, loss="huber", excluded=excl, fixed={"C": 0.5},
                         scale=0.05)
    np.testing.assert_allclose(cmp.results["huber"].values, direct.values, rtol=1e-12)
    # nothing flagged once the outliers are excluded
    assert cmp.differences() == []


def test_failed_loss_maps_to_none(monkeypatch, decay_with_outliers):
    x, y = decay_with_outliers
    real = cmpmod.fit

    def fake(model, x, y, loss="l2", **kw):
        if loss == "cauchy":
            raise fitcore.FitError("invented failure")
        return real(model, x, y, loss=loss, **kw)

    monkeypatch.setattr(cmpmod, "fit", fake)
    cmp = compare_losses("exp_decay", x, y, losses=("l2", "cauchy", "tukey"))
    assert cmp.results["cauchy"] is None
    assert cmp.errors == {"cauchy": "invented failure"}
    assert cmp.results["tukey"] is not None
    assert {r[0] for r in cmp.table()} == {"l2", "tukey"}
    cmp.differences()  # still works with a gap


def test_progress_and_cancel(decay_with_outliers):
    x, y = decay_with_outliers
    calls = []
    compare_losses("exp_decay", x, y, losses=("l2", "huber", "tukey"),
                   progress=lambda i, n: calls.append((i, n)))
    assert calls == [(1, 3), (2, 3), (3, 3)]
    asked = {"n": 0}

    def cancel():
        asked["n"] += 1
        return asked["n"] > 2

    cmp = compare_losses("exp_decay", x, y, cancel=cancel)
    assert cmp.cancelled
    assert [lo for lo, r in cmp.results.items() if r is not None] == ["l2", "huber"]
    assert cmp.results["adaptive"] is None and not cmp.errors


def test_bad_arguments(decay_with_outliers):
    x, y = decay_with_outliers
    with pytest.raises(fitcore.FitError, match="does not take"):
        compare_losses("exp_decay", x, y, tuning=2.0)
    with pytest.raises(fitcore.FitError, match="unknown loss"):
        compare_losses("exp_decay", x, y, losses=("l2", "lorentzian"))
    with pytest.raises(fitcore.FitError, match="alpha"):
        compare_losses("exp_decay", x, y, losses=("general",))
    with pytest.raises(fitcore.FitError):
        compare_losses("no such model ((", x, y)
    cmp = compare_losses("exp_decay", x, y, losses=("l2", "general"), alpha=0.5)
    assert cmp.results["general"].alpha == 0.5


# --------------------------------------------------------------------------- reading
def test_lr_cut_is_the_chi_square_quantile():
    assert cmpmod.LR_CUT_95 == pytest.approx(stats.chi2.ppf(0.95, 1) / 2, rel=1e-12)


def test_lr_interval_of_a_quadratic_profile():
    a = np.linspace(0, 2, 401)
    nll = (a - 1.2) ** 2 / (2 * 0.1**2) + 7.0
    lo, hi = lr_interval(a, nll)
    half = stats.norm.ppf(0.975) * 0.1
    assert lo == pytest.approx(1.2 - half, abs=1e-4)
    assert hi == pytest.approx(1.2 + half, abs=1e-4)
    # cut at the end of the range
    lo, hi = lr_interval(a, (a - 1.95) ** 2 / (2 * 0.1**2))
    assert hi == 2.0 and lo == pytest.approx(1.95 - half, abs=1e-4)


@pytest.mark.parametrize("seed", [0, 1])
def test_reading_close_to_gaussian_on_gaussian_noise(seed):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, 100)
    y = 1 + 2 * x + 0.5 * rng.normal(size=x.size)
    r = adaptive_reading("line", x, y)
    assert r.close_to_gaussian and r.interval[1] == 2.0
    assert r.text.startswith("Tails close to Gaussian")
    assert r.text.endswith("least squares is adequate.")
    assert r.interval[0] <= r.alpha <= r.interval[1]
    alphas, nll = r.profile
    assert alphas.size == 41 and np.all(np.isfinite(nll))


@pytest.mark.parametrize("seed", [0, 1])
def test_reading_heavy_tails_on_student_t_noise(seed):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, 100)
    y = 1 + 2 * x + 0.5 * rng.standard_t(1.5, size=x.size)
    r = adaptive_reading("line", x, y)
    assert not r.close_to_gaussian
    assert r.text.startswith("Heavy tails (alpha = ")
    assert "standard uncertaint" in r.text
    assert r.interval[1] < 2.0 and r.interval[0] <= r.alpha <= r.interval[1]
    # the shift is |adaptive - l2| / sqrt(u_ad^2 + u_l2^2), computed side by side
    l2 = fitcore.fit("line", x, y)
    ad = fitcore.fit("line", x, y, loss="adaptive")
    expect = np.abs(ad.values - l2.values) / np.hypot(l2.stderr, ad.stderr)
    assert r.shift == pytest.approx(float(expect.max()), rel=1e-9)
    assert r.shift_param == l2.param_names[int(np.argmax(expect))]
    assert f"{r.shift:.1f}" in r.text and r.shift_param in r.text
    if r.alpha_u is not None:
        assert f"± {r.alpha_u:.2f}" in r.text


def test_reading_reuses_comparison_fits(comparison, decay_with_outliers):
    x, y = decay_with_outliers
    r = adaptive_reading("exp_decay", x, y, fits=comparison.results,
                         alphas=np.linspace(0, 2, 11))
    assert r.fits["adaptive"] is comparison.results["adaptive"]
    assert r.alpha == comparison.results["adaptive"].alpha
    assert r.profile[0].size == 11


def test_reading_text_rules():
    t = cmpmod.reading_text(1.93, 0.05, (1.83, 2.0), 0.3, "b")
    assert t == ("Tails close to Gaussian (alpha = 1.93 ± 0.05); least squares and the adaptive "
                 "fit agree within 2 combined standard uncertainties (largest difference 0.3, "
                 "for b): least squares is adequate.")
    t = cmpmod.reading_text(0.21, 0.12, (0.0, 0.45), 3.4, "tau")
    assert t == ("Heavy tails (alpha = 0.21 ± 0.12); least squares and the adaptive fit differ "
                 "by 3.4 combined standard uncertainties (tau), more than the 2 that chance "
                 "explains: a robust loss changes the answer.")
    t = cmpmod.reading_text(2.0, None, (1.6, 2.0), 0.2, "a")
    assert "at the upper end of its range; 95 % interval 1.60 to 2.00" in t
    t = cmpmod.reading_text(1.4, 0.2, (1.0, 1.8), 0.5, "a")
    assert t.startswith("Tails heavier than Gaussian") and "agree within 2" in t
    t = cmpmod.reading_text(2.0, None, (1.5, 2.0), 2.5, "a")
    assert "yet least squares and the adaptive fit differ by 2.5" in t
    # a shift just below / above the rule is never rounded across it
    assert "largest difference 1.96" in cmpmod.reading_text(1.4, 0.2, (1.0, 1.8), 1.96, "a")
    assert "differ by 2.04" in cmpmod.reading_text(1.4, 0.2, (1.0, 1.8), 2.04, "a")
    assert "differ by" not in cmpmod.reading_text(1.4, 0.2, (1.0, 1.8), 2.0, "a")
    # agreement although least squares is imprecise: said with both yardsticks named
    detail = {"a": (5.0, 20.0, 1.0), "b": (0.1, 1.0, 1.0)}
    t = cmpmod.reading_text(0.0, None, (0.0, 0.2), 5.0 / math.hypot(20.0, 1.0), "a", detail)
    assert "agree within 2 combined standard uncertainties (largest difference 0.2, for a)" in t
    assert ("Least squares is much less precise here: u(a) = 20 against 1 by the adaptive "
            "fit, and the least-squares a lies 5 of the adaptive fit's standard "
            "uncertainties from the adaptive value.") in t
    # no such sentence when least squares is about as precise, or when the fits differ
    assert "less precise" not in cmpmod.reading_text(0.0, None, (0.0, 0.2), 1.0, "b",
                                                    {"b": (1.5, 1.2, 1.0)})
    assert "less precise" not in cmpmod.reading_text(0.0, None, (0.0, 0.2), 2.4, "a",
                                                    {"a": (50.0, 20.0, 1.0)})


def _reading_claims_hold(r):
    """Every number the reading states, recomputed from its two fits (one yardstick for
    'agree'/'differ': the combined u of the rule; the other sentence names its own)."""
    l2, ad = r.fits["l2"], r.fits["adaptive"]
    comb = {}
    for j, name in enumerate(ad.param_names):
        comb[name] = abs(ad.values[j] - l2.values[j]) / math.hypot(ad.stderr[j], l2.stderr[j])
    worst = max(comb, key=comb.get)
    assert r.shift_param == worst and r.shift == pytest.approx(comb[worst], rel=1e-12)
    import re

    if comb[worst] > 2:
        said = re.search(rf"differ by ([0-9.]+) combined standard uncertainties \({worst}\)", r.text)
        assert said and float(said.group(1)) > 2 and "agree" not in r.text
    else:
        said = re.search(rf"largest difference ([0-9.]+), for {worst}\)", r.text)
        assert said and float(said.group(1)) <= 2 and "differ by" not in r.text
    assert float(said.group(1)) == pytest.approx(comb[worst], abs=0.051)
    return l2, ad


def test_reading_on_data_where_least_squares_moves_beyond_the_rule():
    """Invented decay with a run of four high points early on: least squares follows them,
    l2 and adaptive differ in A by more than twice the combined standard uncertainty,
    and the reading says so (with the pair highlighted by the same rule)."""
    rng = np.random.default_rng(21)
    x = np.linspace(0, 10, 60)
    y = 3.0 * np.exp(-x / 2.5) + 0.5 + rng.normal(0, 0.05, x.size)
    y[[5, 6, 7, 8]] += 1.5
    cmp = compare_losses("exp_decay", x, y, losses=("l2", "adaptive"))
    r = adaptive_reading("exp_decay", x, y, fits=cmp.results, alphas=np.linspace(0, 2, 9))
    _reading_claims_hold(r)
    assert r.shift > 3 and "a robust loss changes the answer" in r.text
    assert (r.shift_param, "l2", "adaptive") in {(p, a, b) for p, a, b, _, _ in cmp.differences()}


def test_reading_on_the_dose_response_sample_agrees_and_names_the_imprecise_least_squares():
    """Sample set 05 (invented dose-response data with gross outliers): least squares and
    the adaptive fit agree within the rule only because least squares' uncertainty is
    inflated; the reading says both, with numbers computed from the fits, never 'less than
    one standard uncertainty' beside a shift of several."""
    from pathlib import Path

    from fitcore.io import read_table

    t = read_table(Path(__file__).resolve().parents[2] / "sample_sets" / "05_dose_response.ods")
    x, y = (np.asarray(t.column(c), float) for c in t.numeric_columns()[:2])
    cmp = compare_losses("logistic4", x, y, losses=("l2", "adaptive"))
    r = adaptive_reading("logistic4", x, y, fits=cmp.results, alphas=np.linspace(0, 2, 9))
    l2, ad = _reading_claims_hold(r)
    assert r.shift <= 2 and cmp.differences() == []
    own = {n: abs(ad.values[j] - l2.values[j]) / ad.stderr[j] for j, n in enumerate(ad.param_names)
           if l2.stderr[j] >= 2 * ad.stderr[j]}
    name = max(own, key=own.get)
    assert own[name] > 2
    j = ad.param_names.index(name)
    assert (f"u({name}) = {l2.stderr[j]:.2g} against {ad.stderr[j]:.2g} by the adaptive fit, "
            f"and the least-squares {name} lies {own[name]:.3g} of the adaptive fit's") in r.text


def test_reading_progress_and_cancel(decay_with_outliers):
    x, y = decay_with_outliers
    calls = []
    adaptive_reading("exp_decay", x, y, alphas=np.linspace(0, 2, 5),
                     progress=lambda i, n: calls.append((i, n)))
    assert calls == [(0, 3), (1, 3), (2, 3), (3, 3)]
    with pytest.raises(fitcore.FitError, match="cancelled"):
        adaptive_reading("exp_decay", x, y, cancel=lambda: True)


def test_reading_shift_agrees_with_highlighting(comparison, decay_with_outliers):
    """A shift above the rule (2 combined u) goes with a highlighted l2/adaptive pair."""
    x, y = decay_with_outliers
    r = adaptive_reading("exp_decay", x, y, fits=comparison.results,
                         alphas=np.linspace(0, 2, 11))
    pairs = {p for p, a, b, _, _ in comparison.differences() if (a, b) == ("l2", "adaptive")}
    for name, shift in r.shifts.items():
        assert (shift > cmpmod.DIFFERENCE_FACTOR) == (name in pairs)
