"""Tests for fitcore.report: GUM value formatting and report text.

Sources are named beside each check. GUM = JCGM 100:2008 "Evaluation of measurement
data - Guide to the expression of uncertainty in measurement"; the section numbers and
examples are as quoted in tests/reference/data/check-values.md, section 3.3 and row 23 of
section 6.
"""
from __future__ import annotations

import csv
import io
import math
import re
from decimal import Decimal

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import fitcore
from fitcore import report, report_text
from fitcore.model import Derived, linear_model
from fitcore.report import format_correlation, format_value
from fitcore.result import FitResult


# ============================================================================ GUM / CODATA
def test_gum_722_concise_form():
    # GUM 7.2.2: m_S = 100.021 47 g with u_c = 0.35 mg is written 100.021 47(35) g
    # (check-values.md 3.3, verified there against NIST's uncertainty-statement page).
    assert format_value(100.02147, 0.00035) == "100.02147(35)"
    assert format_value(100.02147, 0.00035, group_digits=True) == "100.021 47(35)"
    # GUM 7.2.2 form 3: value ± u
    assert format_value(100.02147, 0.00035, "pm") == "100.02147 ± 0.00035"


def test_nist_expanded_uncertainty_example():
    # NIST example (check-values.md 3.3): (100.021 47 ± 0.000 70) g with k = 2.
    U = 2 * 0.00035
    assert format_value(100.02147, U, "pm") == "100.02147 ± 0.00070"
    assert format_value(100.02147, U, "pm", group_digits=True) == "100.021 47 ± 0.000 70"


def test_gum_726_rounding_examples():
    # GUM 7.2.6: y = 10.057 62 ohm with u_c = 27 mohm -> 10.058(27) ohm
    assert format_value(10.05762, 0.027) == "10.058(27)"
    # GUM 7.2.6: u_c = 10.47 mohm may be rounded up to 11 mohm ...
    assert format_value(5.0, 10.47, rounding="up") == "5(11)"
    assert format_value(5.0, 10.47) == "5(10)"  # nearest rounding keeps 10
    # ... but common sense says 28.05 kHz becomes 28 kHz, also when rounding up.
    assert format_value(5.0, 28.05, rounding="up") == "5(28)"
    assert format_value(5.0, 28.05) == "5(28)"


def test_codata_examples():
    # CODATA 2018 values as listed in check-values.md 3.3 (marked there as from
    # memory [M]): G = 6.674 30(15) x 10^-11 m^3 kg^-1 s^-2,
    # m_e = 9.109 383 7015(28) x 10^-31 kg.
    assert format_value(6.67430e-11, 0.00015e-11) == "6.67430(15)e-11"
    assert format_value(6.67430e-11, 0.00015e-11, rich=True) == "6.67430(15) × 10⁻¹¹"
    assert (format_value(6.67430e-11, 0.00015e-11, rich=True, group_digits=True)
            == "6.674 30(15) × 10⁻¹¹")
    assert format_value(6.67430e-11, 1.5e-15, rich="html") == "6.67430(15) × 10<sup>-11</sup>"
    assert format_value(9.1093837015e-31, 0.0000000028e-31) == "9.1093837015(28)e-31"
    assert (format_value(9.1093837015e-31, 2.8e-40, rich=True, group_digits=True)
            == "9.109 383 7015(28) × 10⁻³¹")


def test_uncertainty_wider_than_last_digit():
    # check-values.md 3.3 edge case: 123.4 with u = 1.3 -> "123.4(13)" (GUM/CODATA style)
    assert format_value(123.4, 1.3) == "123.4(13)"
    assert format_value(123.4, 1.3, "pm") == "123.4 ± 1.3"
    # common practice: the digits in parentheses count units of the last quoted digit
    assert format_value(12345.0, 250.0) == "12350(250)"
    assert format_value(12345.0, 250.0, "pm") == "12350 ± 250"


# ============================================================================ rules
def test_exponent_rule():
    # Ballast's documented rule: exponent notation when |n| >= 5 for the rounded value
    assert format_value(98765.4, 1.2) == "98765.4(12)"
    assert format_value(123456.7, 1.2) == "1.234567(12)e5"
    assert format_value(0.0001234, 0.0000056) == "0.0001234(56)"
    assert format_value(0.00001234, 0.00000056) == "1.234(56)e-5"
    assert format_value(123456.7, 1.2, "pm") == "(1.234567 ± 0.000012)e5"
    assert format_value(123456.7, 1.2, "pm", rich=True) == "(1.234567 ± 0.000012) × 10⁵"
    assert (format_value(6.67430e-11, 1.5e-15, "pm", rich="latex")
            == r"(6.67430 \pm 0.00015) \times 10^{-11}")
    # a forced exponent, and exponent=0 for positional notation
    assert format_value(6.67430e-11, 1.5e-15, exponent=-12) == "66.7430(15)e-12"
    assert format_value(123456.7, 1.2, exponent=0) == "123456.7(12)"
    # rounding up across a power of ten moves the value to the next exponent
    assert format_value(99999.96, 0.12) == "99999.96(12)"
    assert format_value(99999.96, 1.2) == "1.000000(12)e5"


def test_carry_in_uncertainty():
    # 0.0996 to two significant digits is 0.10: still two digits in parentheses
    assert format_value(1.0, 0.0996) == "1.00(10)"
    assert format_value(1.0, 0.0996, digits=1) == "1.0(1)"


def test_round_half_modes():
    # u = 0.125 is an exact decimal tie (as its shortest repr)
    assert format_value(1.0, 0.125) == "1.00(13)"
    assert format_value(1.0, 0.125, rounding="even") == "1.00(12)"
    # the float 0.00035 is 3.4999...e-4 in binary; its shortest decimal is used
    assert format_value(1.0, 0.00035, digits=1) == "1.0000(4)"


def test_special_values():
    assert format_value(2.5, 0.0) == "2.5 (exact)"
    assert format_value(2.5, 0.0, held=True) == "2.5 (held)"
    assert format_value(0.1 + 0.2, 0) == "0.30000000000000004 (exact)"
    assert format_value(6.6743e-11, 0.0, rich=True) == "6.6743 × 10⁻¹¹ (exact)"
    assert format_value(2.5, float("nan")) == "2.5 (u unknown)"
    assert format_value(2.5, float("inf")) == "2.5 (u unknown)"
    assert format_value(float("nan"), 0.1) == "nan"
    assert format_value(float("inf"), 0.1) == "inf"
    assert format_value(-float("inf"), 0.1) == "-inf"


def test_negative_values():
    assert format_value(-10.05762, 0.027) == "-10.058(27)"
    assert format_value(-10.05762, 0.027, "pm") == "-10.058 ± 0.027"
    assert format_value(-6.67430e-11, 1.5e-15) == "-6.67430(15)e-11"
    # a value that rounds to zero never shows as "-0.00"
    assert format_value(-0.0001, 0.05) == "0.000(50)"


def test_bad_arguments_have_plain_messages():
    with pytest.raises(ValueError, match="cannot be negative"):
        format_value(1.0, -0.1)
    with pytest.raises(ValueError, match="style"):
        format_value(1.0, 0.1, style="brackets")
    with pytest.raises(ValueError, match="digits"):
        format_value(1.0, 0.1, digits=0)
    with pytest.raises(ValueError, match="rich"):
        format_value(1.0, 0.1, rich="rtf")
    with pytest.raises(TypeError, match="two numbers"):
        format_value("abc", 0.1)


def test_public_reexport():
    assert fitcore.format_value is format_value


def _parse_paren(s: str):
    m = re.fullmatch(r"(-?\d+(?:\.(\d+))?)\((\d+)\)(?:e(-?\d+))?", s)
    assert m, s
    mant, frac, paren, exp = m.groups()
    n = int(exp) if exp else 0
    last = -len(frac) if frac else 0
    value = Decimal(mant).scaleb(n)
    u = Decimal(paren).scaleb(last + n)
    return value, u, Decimal(1).scaleb(last + n)


@settings(max_examples=300, deadline=None)
@given(
    st.floats(min_value=-1e12, max_value=1e12, allow_nan=False).filter(lambda v: v != 0),
    st.floats(min_value=1e-9, max_value=1e9),
)
def test_paren_form_reads_back(value, u):
    # property (common practice): reading the text back gives u to two significant
    # digits and a value within half a last digit of the input
    s = format_value(value, u)
    v, ur, q = _parse_paren(s)
    # the rounding step is the second significant digit of the rounded u (it is
    # coarser than the last printed digit for forms like "12350(250)")
    step = Decimal(1).scaleb(ur.adjusted() - 1)
    assert step >= q
    assert abs(v - Decimal(repr(value))) <= step / 2
    assert abs(ur - Decimal(repr(u))) <= step / 2
    assert 10 <= ur / step < 100 and ur / step == int(ur / step)  # two digits


def test_format_correlation():
    # GUM 7.2.6 (check-values.md 3.3): correlation coefficients near +-1 get three digits
    assert format_correlation(0.98765) == "0.988"
    assert format_correlation(-0.9996) == "-1.000"
    assert format_correlation(-0.0001) == "0.000"
    assert format_correlation(float("nan")) == "nan"


# ============================================================================ fits built by hand
def _line_model():
    def xint(p):
        return -p[0] / p[1]

    def xint_grad(p):
        return np.array([-1.0 / p[1], p[0] / p[1] ** 2])

    return linear_model(
        "line", ("a", "b"), lambda x: np.column_stack([np.ones_like(x), x]),
        formula="y = a + b*x", title="Straight line",
        units={"a": "y", "b": "y/x"},
        descriptions={"a": "intercept", "b": "slope"},
        derived=(Derived("x_0", xint, xint_grad, "x where the line crosses zero", "x"),),
    )


def line_fit(x, y, excluded=None, *, loss="l2", fixed=None, model=None):
    """A straight-line least-squares FitResult computed by hand: numpy lstsq and the
    covariance s^2 (X^T X)^-1 (NIST StRD convention; check-values.md 3.1 item 1)."""
    model = model or _line_model()
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    excl = np.zeros(x.size, bool) if excluded is None else np.asarray(excluded, bool)
    use = ~excl
    X = model.basis(x)
    p, *_ = np.linalg.lstsq(X[use], y[use], rcond=None)
    fitted = X @ p
    r = y - fitted
    n = int(use.sum())
    dof = n - 2
    rss = float(r[use] @ r[use])
    s = math.sqrt(rss / dof)
    cov = s**2 * np.linalg.inv(X[use].T @ X[use])
    w = use.astype(float)
    return FitResult(
        model=model, loss=loss, param_names=model.param_names, values=p,
        stderr=np.sqrt(np.diag(cov)), covariance=cov, weights=w, residuals=r,
        std_residuals=r / s, fitted=fitted, x=x, y=y, sigma=None, excluded=excl,
        scale=s, scale_method="residual standard deviation", alpha=None, tuning=None,
        covariance_recipe="s^2 (J^T J)^-1 (least squares)", converged=True,
        message="exact linear least-squares solution", n_used=n,
        n_excluded=int(excl.sum()), n_downweighted=0, dof=dof, fixed=dict(fixed or {}),
        rss=rss,
    )


def read_nist_linear(path):
    lines = path.read_text().splitlines()
    cert = {}
    for ln in lines:
        m = re.match(r"\s+(B\d+)\s+(\S+)\s+(\S+)\s*$", ln)
        if m:
            cert[m.group(1)] = (float(m.group(2)), float(m.group(3)))
    start = next(i for i, ln in enumerate(lines)
                 if re.match(r"\s*Data:\s+y\s+x\s*$", ln)) + 1
    data = np.array([[float(v) for v in ln.split()] for ln in lines[start:] if ln.strip()])
    return cert, data[:, 1], data[:, 0]


def test_norris_report_matches_certified_values(reference_dir):
    # NIST StRD Norris (linear, lower difficulty): certified B0 = -0.262323073774029
    # (sd 0.232818234301152), B1 = 1.00211681802045 (sd 0.429796848199937E-03).
    cert, x, y = read_nist_linear(reference_dir / "nist-strd" / "Norris.dat")
    res = line_fit(x, y)
    assert res.values[0] == pytest.approx(cert["B0"][0], rel=1e-9)
    assert res.stderr[1] == pytest.approx(cert["B1"][1], rel=1e-9)
    text = report.estimates_text(res)
    # the GUM-rounded certified values: u to 2 digits, value to the same place
    assert re.search(r"a += -0\.26\(23\)", text)
    assert re.search(r"b += 1\.00212\(43\)", text)
    assert format_value(*cert["B0"]) == "-0.26(23)"
    assert format_value(*cert["B1"]) == "1.00212(43)"


# invented demo data: a calibration-like line with one gross outlier (index 6)
X_DEMO = np.array([0.0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10])
Y_DEMO = np.array([0.11, 2.07, 3.96, 6.10, 8.02, 9.95, 17.5, 14.04, 15.93, 18.1, 19.96])


@pytest.fixture
def demo():
    excl = np.zeros(X_DEMO.size, bool)
    excl[6] = True
    return line_fit(X_DEMO, Y_DEMO, excl)


def test_plain_report_lines_and_method(demo):
    text = report.estimates_text(demo, x_unit="s", y_unit="mV")
    u_b = demo.stderr[1]
    assert re.search(rf"b += {re.escape(format_value(demo['b'], u_b))} mV/s", text)
    assert re.search(rf"a += {re.escape(format_value(demo['a'], demo.stderr[0]))} mV ", text)
    assert "x_0 = " in text and "Derived quantities" in text
    # method block
    assert "Straight line: y = a + b*x" in text
    assert "10 used, 1 excluded by the analyst, 0 down-weighted" in text
    assert "degrees of freedom  8" in text
    assert "s^2 (J^T J)^-1 (least squares)" in text
    # t_0.975(8) = 2.306004 (check-values.md 3.3 [C]; scipy.stats.t also gives it)
    assert "t = 2.306 " in text
    assert f"Ballast {fitcore.__version__}" in text
    # a point was excluded by hand: the caution line must be there
    assert report.CAUTION in text


def test_no_caution_for_plain_least_squares():
    res = line_fit(X_DEMO[:6], Y_DEMO[:6])
    text = report.estimates_text(res)
    assert report.CAUTION not in text
    assert "0 excluded" in text


def test_intervals_match_statsmodels(demo):
    # outside reference: statsmodels OLS on the kept points, run side by side
    import statsmodels.api as sm
    keep = ~demo.excluded
    ols = sm.OLS(Y_DEMO[keep], sm.add_constant(X_DEMO[keep])).fit()
    ci = ols.conf_int(0.05)
    tsv = report.estimates_text(demo, "tsv", full_precision=True)
    rows = list(csv.reader(io.StringIO(tsv), delimiter="\t"))
    head = rows[0]
    assert head[:4] == ["parameter", "value", "standard uncertainty", "unit"]
    by = {r[0]: r for r in rows[1:4]}
    for i, name in enumerate("ab"):
        r = by[name]
        assert float(r[1]) == pytest.approx(ols.params[i], rel=1e-10)
        assert float(r[2]) == pytest.approx(ols.bse[i], rel=1e-10)
        assert float(r[4]) == pytest.approx(ci[i, 0], rel=1e-10)
        assert float(r[5]) == pytest.approx(ci[i, 1], rel=1e-10)


def test_derived_uncertainty_by_delta_method(demo):
    # x_0 = -a/b; independent first-order propagation written out (GUM 5.2.2)
    a, b = demo.values
    C = demo.covariance
    var = C[0, 0] / b**2 + a**2 * C[1, 1] / b**4 - 2 * a * C[0, 1] / b**3
    tsv = report.estimates_text(demo, "tsv", full_precision=True)
    row = next(r for r in csv.reader(io.StringIO(tsv), delimiter="\t") if r and r[0] == "x_0")
    assert float(row[1]) == pytest.approx(-a / b, rel=1e-12)
    assert float(row[2]) == pytest.approx(math.sqrt(var), rel=1e-10)
    assert row[6].startswith("derived")


def test_tsv_rounded_cells_agree_with_paren_form(demo):
    tsv = report.estimates_text(demo, "tsv")
    rows = list(csv.reader(io.StringIO(tsv), delimiter="\t"))
    assert all(len(r) == 7 for r in rows[:4])
    b = rows[2]
    assert b[0] == "b"
    assert format_value(demo["b"], demo.stderr[1], "pm") == f"{b[1]} ± {b[2]}"
    assert any(r[:1] == ["covariance"] for r in rows)
    assert any(r[:1] == ["caution"] for r in rows)


def test_markdown_table(demo):
    md = report.estimates_text(demo, "markdown", units={"a": "mV", "b": "mV/s"})
    table = [ln for ln in md.splitlines() if ln.startswith("|")]
    assert len(table) == 2 + 3
    assert all(ln.count("|") - ln.count(r"\|") == 5 for ln in table)
    assert "| mV/s |" in md
    assert "**Method**" in md and "x\\_0" in md


def test_latex_escapes_and_siunitx():
    model = linear_model("line", ("a_0", "b%"), lambda x: np.column_stack([np.ones_like(x), x]),
                         title="Line & co")
    res = line_fit(X_DEMO, Y_DEMO, model=model)
    tex = report.estimates_text(res, "latex", units={"a_0": "mV", "b%": "mV/s"})
    assert r"a\_0" in tex and r"b\%" in tex and r"Line \& co" in tex
    assert r"\begin{tabular}" in tex and r"\end{tabular}" in tex
    assert "$" + format_value(res.values[0], res.stderr[0], rich="latex") + "$" in tex
    si = report.estimates_text(res, "siunitx", units={"a_0": "mV", "b%": ""})
    assert rf"\qty{{{format_value(res.values[0], res.stderr[0])}}}{{mV}}" in si
    assert rf"\num{{{format_value(res.values[1], res.stderr[1])}}}" in si
    # an unescaped underscore or percent outside math would break the document
    body = re.sub(r"\$[^$]*\$", "", tex)
    assert not re.search(r"(?<!\\)[_%#]", body)
    # every data row has exactly three column separators
    rows = [ln for ln in body.splitlines() if ln.endswith(r"\\")]
    assert len(rows) == 3 and all(ln.count("&") - ln.count(r"\&") == 3 for ln in rows)


def test_html_report_is_escaped(demo):
    model = linear_model("line", ("a", "<b>"), lambda x: np.column_stack([np.ones_like(x), x]))
    res = line_fit(X_DEMO * 1e-6, Y_DEMO, model=model)
    h = report.estimates_text(res, "html")
    assert h.startswith("<table>")
    assert "&lt;b&gt;" in h and "<b>Method</b>" in h
    assert "× 10<sup>" in h  # the slope is ~2e6
    assert h.count("<tr>") == 1 + 2


def test_held_parameter():
    res = line_fit(X_DEMO[:5], Y_DEMO[:5])
    held = FitResult(**{**res.__dict__, "fixed": {"a": float(res.values[0])},
                        "stderr": np.array([0.0, res.stderr[1]])})
    text = report.estimates_text(held)
    assert "held at " in text and "held parameters" in text
    assert "(exact)" not in text and "conditional on them" in text
    corr = report.correlation_text(held)
    assert "held" in corr


def test_correlation_text_formats(demo):
    r = demo.correlation[0, 1]
    # independent check: corr(a, b) = -xbar / sqrt(mean(x^2)) for a straight line
    xs = X_DEMO[~demo.excluded]
    assert r == pytest.approx(-xs.mean() / math.sqrt(np.mean(xs**2)), rel=1e-10)
    for fmt in report.FORMATS:
        t = report.correlation_text(demo, fmt)
        assert format_correlation(r) in t.replace("$-$", "-")
        assert "1.000" in t
    with pytest.raises(ValueError, match="unknown report format"):
        report.correlation_text(demo, "rtf")


def test_bad_format_and_level(demo):
    with pytest.raises(ValueError, match="unknown report format"):
        report.estimates_text(demo, "docx")
    with pytest.raises(ValueError, match="between 0 and 1"):
        report.estimates_text(demo, level=95)


def test_points_csv(demo):
    text = report.points_csv(demo, {6: "bubble in the cell", 2: "not excluded"}, y_unit="mV")
    rows = list(csv.reader(io.StringIO(text)))
    assert rows[0] == ["x", "y (mV)", "sigma (mV)", "fitted (mV)", "residual (mV)",
                       "std residual", "weight", "status", "exclusion reason"]
    body = rows[1:]
    assert len(body) == X_DEMO.size
    assert body[6][7] == "excluded" and body[6][8] == "bubble in the cell"
    assert body[2][7] == "used" and body[2][8] == ""
    # full precision: every float reads back exactly
    assert [float(r[1]) for r in body] == list(Y_DEMO)
    assert [float(r[4]) for r in body] == list(demo.residuals)
    assert body[0][2] == ""  # no sigma given


def test_curve_csv_band_matches_statsmodels(demo):
    # outside reference: statsmodels mean confidence interval on the same points
    import statsmodels.api as sm
    keep = ~demo.excluded
    ols = sm.OLS(Y_DEMO[keep], sm.add_constant(X_DEMO[keep])).fit()
    grid = np.linspace(-1, 11, 7)
    pred = ols.get_prediction(sm.add_constant(grid)).summary_frame(alpha=0.05)
    rows = list(csv.reader(io.StringIO(report.curve_csv(demo, grid, 0.95))))
    assert rows[0][0] == "x" and rows[0][2].startswith("band low 95%")
    vals = np.array([[float(v) for v in r] for r in rows[1:]])
    np.testing.assert_allclose(vals[:, 0], grid, rtol=0, atol=0)
    np.testing.assert_allclose(vals[:, 1], pred["mean"], rtol=1e-10)
    np.testing.assert_allclose(vals[:, 2], pred["mean_ci_lower"], rtol=1e-10)
    np.testing.assert_allclose(vals[:, 3], pred["mean_ci_upper"], rtol=1e-10)


# ============================================================================ with fitcore.fit
def _fit():
    return fitcore.fit


def test_norris_through_fit(reference_dir):
    # NIST StRD Norris through the engine: the report quotes the certified values
    # rounded per GUM 7.2.6 (B0 = -0.262323073774029 (0.232818234301152),
    # B1 = 1.00211681802045 (0.429796848199937E-03)).
    fit = _fit()
    cert, x, y = read_nist_linear(reference_dir / "nist-strd" / "Norris.dat")
    res = fit("line", x, y)
    text = report.estimates_text(res)
    names = res.param_names
    assert re.search(rf"{names[0]} += -0\.26\(23\)", text)
    assert re.search(rf"{names[1]} += 1\.00212\(43\)", text)
    assert report.CAUTION not in text  # least squares, nothing excluded
    # 36 observations, 2 parameters: t_0.975(34); scipy.stats.t as the outside check
    from scipy import stats

    assert f"t = {stats.t.ppf(0.975, 34):.6g} (Student, 34 degrees" in text


def test_robust_fit_method_block():
    fit = _fit()
    # invented demo data: a line with two gross outliers and one point excluded
    x = np.arange(15.0)
    y = 0.5 + 1.5 * x + 0.05 * np.sin(3 * x)
    y[[3, 11]] += [6.0, -5.0]
    excl = np.zeros(x.size, bool)
    excl[0] = True
    res = fit("line", x, y, loss="huber", excluded=excl)
    text = report.estimates_text(res, x_unit="s", y_unit="mV")
    # Huber k = 1.345 for 95% efficiency at the normal (check-values.md 6, row 2;
    # Holland & Welsch 1977)
    assert "tuning constant 1.345" in text
    assert res.scale_method in text and res.covariance_recipe in text
    n_low = int(np.sum((res.weights < 0.5) & ~excl))
    assert n_low == res.n_downweighted >= 2
    assert f"{res.n_used} used, 1 excluded by the analyst, {n_low} down-weighted" in text
    assert report.CAUTION in text
    rows = list(csv.reader(io.StringIO(report.points_csv(res, {0: "warm-up reading"}))))
    status = [r[7] for r in rows[1:]]
    assert status.count("down-weighted") == n_low and status[0] == "excluded"
    assert rows[1][8] == "warm-up reading"
    for fmt in report.FORMATS:
        assert "Robust weights are not a licence to discard data" in \
            report.estimates_text(res, fmt)


# ============================================================================ one rule for
# uncertainties and intervals beside a rounded estimate
def test_uncertainty_column_keeps_two_digits_and_the_estimates_decimal():
    # GUM 7.2.6: u is given to (at most) two significant digits and the value to the
    # same decimal place, so a separate uncertainty column shows those digits, trailing
    # zeros included (the paren form beside it carries the same two digits).
    cases = [  # (value, u, concise form, u column)
        (0.00538, 0.0009, "0.00538(90)", "0.00090"),
        (6.0, 2.0, "6.0(20)", "2.0"),
        (1.521, 0.03, "1.521(30)", "0.030"),
        (0.004822, 2e-5, "0.004822(20)", "0.000020"),
        (12480.0, 160.0, "12480(160)", "160"),
        (100.02147, 0.00035, "100.02147(35)", "0.00035"),  # GUM 7.2.2's own example
    ]
    for v, u, concise, column in cases:
        assert format_value(v, u) == concise
        assert report.format_uncertainty(v, u) == column, (v, u)
        # and it is exactly the "± u" part of GUM 7.2.2's third form
        assert format_value(v, u, "pm").split(" ± ")[1] == column


def test_uncertainty_column_shares_the_estimates_power_of_ten():
    # where the estimate is written with a power of ten, u is written with the same
    # one, as in the "pm" form (1.234567 ± 0.000012)e5 (Ballast's exponent rule)
    assert format_value(1.2e5, 2.6e5) == "1.2(26)e5"
    assert report.format_uncertainty(1.2e5, 2.6e5) == "2.6e5"
    assert report.format_uncertainty(123456.7, 1.2) == "0.000012e5"
    assert report.format_uncertainty(6.67430e-11, 1.5e-15, rich=True) == "0.00015 × 10⁻¹¹"
    assert report.format_uncertainty(1.0, 0.0) == "0"
    assert report.format_uncertainty(1.0, float("nan")) == "unknown"
    with pytest.raises(ValueError, match="negative"):
        report.format_uncertainty(1.0, -1.0)


def test_interval_limits_follow_the_estimates_last_decimal():
    # the reviewer's case: 1001.537(32) has limits to the thousandth, 1001.600 with its
    # trailing zero (GUM 7.2.6: the value to the decimal of the uncertainty's last digit)
    assert format_value(1001.5372, 0.0318) == "1001.537(32)"
    assert report.interval_limits(1001.4738, 1001.60004, 1001.5372, 0.0318) == \
        ("1001.474", "1001.600")
    assert report.format_interval(1001.4738, 1001.60004, 1001.5372, 0.0318) == \
        "[1001.474, 1001.600]"
    # A = 1842(12): limits to units, never to six significant digits
    assert format_value(1841.6, 11.8) == "1842(12)"
    assert report.format_interval(1817.47, 1865.73, 1841.6, 11.8) == "[1817, 1866]"
    # 1.2(26)e5: the same power of ten as the estimate, not [-393581, 640125]
    assert report.format_interval(-393581.0, 640125.0, 1.2327e5, 2.6e5) == "[-3.9e5, 6.4e5]"
    assert report.interval_limits(-393581.0, 640125.0, 1.2327e5, 2.6e5, rich="latex") == \
        (r"-3.9 \times 10^{5}", r"6.4 \times 10^{5}")
    # a forced positional form (the TSV cells) and a limit that rounds to zero
    assert report.interval_limits(-393581.0, 640125.0, 1.2327e5, 2.6e5, exponent=0) == \
        ("-390000", "640000")
    assert format_value(0.015, 0.071) == "0.015(71)"
    assert report.interval_limits(-0.0004, 0.031, 0.015, 0.071) == ("0.000", "0.031")
    # no usable u: the limits at full precision
    assert report.interval_limits(1.25, 2.5, 2.0, 0.0) == ("1.25", "2.5")


def _decimals(text: str) -> int:
    m = re.fullmatch(r"-?\d+(?:\.(\d*))?", text)
    assert m, text
    return len(m.group(1) or "")


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=-1e4, max_value=1e4, allow_nan=False),
       st.floats(min_value=1e-3, max_value=1e3), st.floats(min_value=0.5, max_value=5.0))
def test_interval_limits_have_the_decimals_of_the_estimate(value, u, t):
    # property (GUM 7.2.6 applied to the limits): each limit has exactly as many
    # decimals as the rounded estimate, and lies within half a last digit of the limit
    lo, hi = value - t * u, value + t * u
    est = format_value(value, u, exponent=0)
    mant = est.split("(")[0]
    limits = report.interval_limits(lo, hi, value, u, exponent=0)
    # the rounding step: the second significant digit of the two-digit u (coarser
    # than the last printed digit for forms like "12350(250)")
    step = Decimal(1).scaleb(Decimal(report.format_uncertainty(value, u, exponent=0))
                             .adjusted() - 1)
    for limit, exact in zip(limits, (lo, hi)):
        assert _decimals(limit) == _decimals(mant)
        assert abs(Decimal(limit) - Decimal(repr(exact))) <= step / 2


def test_every_report_format_quotes_intervals_by_the_one_rule(demo):
    rows = {r.name: r for r in report_text._rows(demo, 0.95, None, "", "")}
    plain = report.estimates_text(demo)
    for r in rows.values():
        lo, hi = report.interval_limits(r.low, r.high, r.value, r.u)
        mant = format_value(r.value, r.u).split("(")[0]
        assert _decimals(lo) == _decimals(hi) == _decimals(mant)
        assert f"CI {lo} to {hi}" in plain
    tsv = list(csv.reader(io.StringIO(report.estimates_text(demo, "tsv")), delimiter="\t"))
    for row in tsv[1:4]:
        assert _decimals(row[4]) == _decimals(row[5]) == _decimals(row[1])


def test_latex_intervals_are_in_math_mode():
    # a text-mode "-" prints as a hyphen: the limits go in math mode (common practice),
    # where "-" is the minus sign; siunitx's \num sets its own minus
    res = line_fit(X_DEMO, -3.0 - Y_DEMO)  # negative intercept and slope
    tex = report.estimates_text(res, "latex")
    rows = [ln for ln in tex.splitlines() if ln.endswith(r"\\") and "&" in ln][1:]
    assert len(rows) == 3
    for ln in rows:
        ci = ln.split("&")[3].rstrip("\\ ").strip()
        assert re.fullmatch(r"\$-?[\d.]+(?: \\times 10\^\{-?\d+\})?\$ to "
                            r"\$-?[\d.]+(?: \\times 10\^\{-?\d+\})?\$", ci), ci
        assert "-" in ci
        assert "-" not in re.sub(r"\$[^$]*\$", "", ci)  # no minus outside math
    si = report.estimates_text(res, "siunitx")
    rows = [ln for ln in si.splitlines() if ln.endswith(r"\\") and "&" in ln][1:]
    for ln in rows:
        assert re.fullmatch(r"\\num\{-?[\d.]+(?:e-?\d+)?\} to \\num\{-?[\d.]+(?:e-?\d+)?\}",
                            ln.split("&")[3].rstrip("\\ ").strip())


# ============================================================================ method words
def test_method_block_reads_without_internal_names():
    fit = _fit()
    x = np.arange(12.0)
    y = 1.0 + 2.0 * x + 0.03 * np.cos(5 * x)  # invented demo data
    res = fit("line", x, y, loss="pseudo_huber")
    text = report.estimates_text(res)
    assert "pseudo_huber" not in text and "(huber)" not in text
    loss_line = next(ln for ln in text.splitlines() if ln.strip().startswith("loss"))
    assert "pseudo-Huber" in loss_line and "tuning constant" in loss_line
    conv = next(ln for ln in text.splitlines() if ln.strip().startswith("converged"))
    assert "(converged)" not in conv and "yes" in conv


def test_convergence_text():
    class R:
        converged, message = True, "converged"

    assert report.convergence_text(R) == "yes"
    R.message = "converged (exact fit)"
    assert report.convergence_text(R) == "yes (exact fit)"
    R.message = "exact linear least-squares solution"
    assert report.convergence_text(R) == "yes (exact linear least-squares solution)"
    R.converged, R.message = False, "did not converge in 200 iterations"
    assert report.convergence_text(R) == "NO (did not converge in 200 iterations)"


def test_excluded_points_are_listed_with_reasons(demo):
    # point index 6 of the invented demo data is excluded: point 7 of the data, named
    # so when the file rows are not known
    text = report.estimates_text(demo, reasons={6: "bubble\nin the cell"})
    assert "point 7 (x = 6, y = 17.5): bubble in the cell" in text
    assert report.NO_REASON not in text
    # without reasons (library use) the point is still named, with x and y
    assert "point 7 (x = 6, y = 17.5)" in report.estimates_text(demo)
    # many exclusions: 20 listed, then a count; one a line in the plain text
    x = np.arange(40.0)
    y = 2.0 + 0.5 * x + 0.1 * np.sin(x)
    excl = np.zeros(40, bool)
    excl[:25] = True
    res = line_fit(x, y, excl)
    lines = report.estimates_text(res, reasons={0: "first"}).splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.strip().startswith("excluded points"))
    listed = lines[start:start + 21]
    assert listed[0].split("excluded points")[1].strip() == "point 1 (x = 0, y = 2): first"
    # y = 2.5 + 0.1 sin(1) = 2.58414709848... to 10 significant digits
    assert listed[1].strip() == "point 2 (x = 1, y = 2.584147098): NO REASON GIVEN"
    assert listed[19].strip().startswith("point 20 ")
    assert listed[20].strip() == "and 5 more"
    for fmt in ("tsv", "markdown", "latex", "html"):
        assert "and 5 more" in report.estimates_text(res, fmt)


def test_bare_data_unit_is_written_without_parentheses():
    # a parameter in y units is simply "mg/L"; a compound unit needs its brackets
    assert report.resolve_unit("y", "s", "mg/L") == "mg/L"
    assert report.resolve_unit("y/x", "s", "mg/L") == "(mg/L)/s"
    assert report.resolve_unit("y/x", "min", "µM") == "µM/min"
    assert report.resolve_unit("1/x", "", "mg/L") == ""
