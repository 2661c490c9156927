"""Units of parameters and derived quantities (fitcore.units).

Every expected unit below was worked out by hand by dimensional analysis of the model's
formula (common practice: a quantity's unit is the one that makes each term of the
formula carry y's unit; a data column without a unit is dimensionless, e.g. an
absorbance).
"""
from __future__ import annotations

import pytest

import fitcore
from fitcore.formula import parse_formula
from fitcore.models import builtin_models, get_model
from fitcore.report import estimate_cells
from fitcore.units import resolve_unit

# (parameter or derived name) -> (unit with x in s and y in mV, unit with x in mg/L and
# y without a unit); by hand from each catalogue formula
CATALOGUE = {
    "line": {"a": ("mV", ""), "b": ("mV/s", "1/(mg/L)"), "x_intercept": ("s", "mg/L")},
    "line_origin": {"b": ("mV/s", "1/(mg/L)")},
    "poly2": {"c0": ("mV", ""), "c1": ("mV/s", "1/(mg/L)"), "c2": ("mV/s^2", "1/(mg/L)^2")},
    "poly3": {"c0": ("mV", ""), "c1": ("mV/s", "1/(mg/L)"), "c2": ("mV/s^2", "1/(mg/L)^2"),
              "c3": ("mV/s^3", "1/(mg/L)^3")},
    "poly4": {"c0": ("mV", ""), "c1": ("mV/s", "1/(mg/L)"), "c2": ("mV/s^2", "1/(mg/L)^2"),
              "c3": ("mV/s^3", "1/(mg/L)^3"), "c4": ("mV/s^4", "1/(mg/L)^4")},
    "poly5": {"c0": ("mV", ""), "c1": ("mV/s", "1/(mg/L)"), "c2": ("mV/s^2", "1/(mg/L)^2"),
              "c3": ("mV/s^3", "1/(mg/L)^3"), "c4": ("mV/s^4", "1/(mg/L)^4"),
              "c5": ("mV/s^5", "1/(mg/L)^5")},
    "exp_decay": {"A": ("mV", ""), "tau": ("s", "mg/L"), "C": ("mV", ""),
                  "half_life": ("s", "mg/L"), "rate": ("1/s", "1/(mg/L)")},
    "exp_decay_rate": {"A": ("mV", ""), "k": ("1/s", "1/(mg/L)"), "C": ("mV", ""),
                       "half_life": ("s", "mg/L"), "tau": ("s", "mg/L")},
    "exp_rise": {"ymax": ("mV", ""), "k": ("1/s", "1/(mg/L)"), "half_rise": ("s", "mg/L"),
                 "initial_slope": ("mV/s", "1/(mg/L)")},
    # y = a x^b: a in y/x^b
    "power_law": {"a": ("mV/s^b", "1/(mg/L)^b"), "b": ("", "")},
    "michaelis_menten": {"Vmax": ("mV", ""), "Km": ("s", "mg/L"),
                         "initial_slope": ("mV/s", "1/(mg/L)")},
    "logistic4": {"bottom": ("mV", ""), "top": ("mV", ""), "hill": ("", ""), "EC50": ("s", "mg/L"),
                  "log10_EC50": ("", ""), "range": ("mV", "")},
    "logistic5": {"bottom": ("mV", ""), "top": ("mV", ""), "hill": ("", ""), "EC50": ("s", "mg/L"),
                  "s": ("", ""), "x_mid": ("s", "mg/L")},
    # x is a temperature in K by the model's definition; Ea's unit is fixed by R
    "arrhenius": {"lnA": ("", ""), "Ea": ("J/mol", "J/mol"), "A": ("mV", ""),
                  "Ea_kJ": ("kJ/mol", "kJ/mol")},
    "gauss_peak": {"A": ("mV", ""), "x0": ("s", "mg/L"), "sigma": ("s", "mg/L"), "base": ("mV", ""),
                   "FWHM": ("s", "mg/L"), "area": ("s·mV", "mg/L")},
    "lorentz_peak": {"A": ("mV", ""), "x0": ("s", "mg/L"), "gamma": ("s", "mg/L"),
                     "base": ("mV", ""), "FWHM": ("s", "mg/L"), "area": ("s·mV", "mg/L")},
}


def _hints(model):
    return ([(p, model.units.get(p, "")) for p in model.param_names]
            + [(d.name, d.unit) for d in model.derived])


def test_table_covers_every_catalogue_model():
    assert set(CATALOGUE) == set(builtin_models())


@pytest.mark.parametrize("name", sorted(CATALOGUE))
def test_catalogue_units_with_and_without_data_units(name):
    m = get_model(name)
    hints = _hints(m)
    assert {n for n, _h in hints} == set(CATALOGUE[name])
    for n, hint in hints:
        with_units, no_y_unit = CATALOGUE[name][n]
        assert resolve_unit(hint, "s", "mV") == with_units, (name, n)
        assert resolve_unit(hint, "mg/L", "") == no_y_unit, (name, n)


def test_data_unit_blank_means_dimensionless():
    # the case: x in mg/L, y an absorbance without a unit -> slope per mg/L
    assert resolve_unit("y/x", "mg/L", "") == "1/(mg/L)"
    assert resolve_unit("y/x", "", "mV") == "mV"
    assert resolve_unit("y/x", "", "") == ""
    assert resolve_unit("1/x", "", "mg/L") == ""
    assert resolve_unit("1/x", "min", "") == "1/min"
    assert resolve_unit("x*y", "", "counts") == "counts"
    assert resolve_unit("y/x^b", "", "mV") == "mV"
    # equal units cancel: a slope of mV against mV is a pure number
    assert resolve_unit("y/x", "mV", "mV") == ""
    # a bare data unit is written as it is, a compound one bracketed inside a compound
    assert resolve_unit("y", "s", "mg/L") == "mg/L"
    assert resolve_unit("y/x", "s", "mg/L") == "(mg/L)/s"
    assert resolve_unit("y/x^2", "mg/L", "") == "1/(mg/L)^2"
    # literal units stay; an unreadable expression gives no half-made unit
    assert resolve_unit("J/mol", "s", "mV") == "J/mol"
    assert resolve_unit("y/x)", "s", "mV") == ""


def test_unit_products_and_written_powers():
    # one convention for every text (window, copies, report): a product of units with
    # the half-high dot, a quotient with '/', a power as '^n' (SI brochure, 9th ed.,
    # 5.4.6: products of units by a half-high dot or a space; common practice in plain
    # text for the rest). A data unit written with its own power ('cm-1' in a Raman
    # export's header, 'cm^-1', 'cm⁻¹', 'm²') is that power: the Raman band's area
    # (x*y) in cm-1 times counts is counts/cm, never 'cm-1*counts'
    assert resolve_unit("x*y", "s", "mV") == "s·mV"
    for cm in ("cm-1", "cm^-1", "cm^(-1)", "cm⁻¹"):
        assert resolve_unit("x*y", cm, "counts") == "counts/cm", cm
        assert resolve_unit("1/x", cm, "") == "cm", cm
        assert resolve_unit("y/x", cm, "counts") == "counts·cm", cm
        # a bare data unit is written as the file wrote it
        assert resolve_unit("x", cm, "counts") == cm
    assert resolve_unit("x*y", "m²", "N") == "m^2·N"
    assert resolve_unit("y/x^2", "s-1", "mV") == "mV·s^2"
    # a hyphen inside a name is no power ('mg-N', a trailing letter): kept whole
    assert resolve_unit("x*y", "mg-N", "mV") == "mg-N·mV"
    # no product sign other than the dot in any catalogue unit
    for name in builtin_models():
        for _n, hint in _hints(get_model(name)):
            for xu, yu in (("s", "mV"), ("cm-1", "counts"), ("mg/L", "")):
                assert "*" not in resolve_unit(hint, xu, yu), (name, hint)


@pytest.mark.parametrize("name", sorted(CATALOGUE))
def test_formula_analysis_agrees_with_the_catalogue(name):
    """The catalogue's hand-written units and the dimensional analysis of the same
    formula typed by a user are two independent routes: where the analysis fixes a
    unit, it must be the catalogue's."""
    m = get_model(name)
    text = m.formula.split(",")[0]
    try:
        user = parse_formula(text)
    except ValueError:
        pytest.skip(f"{name}'s formula text is not a plain formula ({text!r})")
    for p in m.param_names:
        if p in user.units:
            assert resolve_unit(user.units[p], "s", "mV") == CATALOGUE[name][p][0], (name, p)
            assert resolve_unit(user.units[p], "mg/L", "") == CATALOGUE[name][p][1], (name, p)


@pytest.mark.parametrize("text,expected", [
    # by hand: each term of a sum in y; exp's argument dimensionless
    ("A*exp(-x/tau) + C", {"A": "mV", "tau": "s", "C": "mV"}),
    ("m*x + b", {"m": "mV/s", "b": "mV"}),
    ("A*exp(-k*x) + C", {"A": "mV", "k": "1/s", "C": "mV"}),
    ("a*sin(w*x + phi) + c", {"a": "mV", "w": "1/s", "phi": "", "c": "mV"}),
    ("Vmax*x/(Km + x)", {"Vmax": "mV", "Km": "s"}),
    ("a*sqrt(x)", {"a": "mV/s^(1/2)"}),
    ("bottom + (top - bottom)/(1 + (x/EC50)**hill)",
     {"bottom": "mV", "top": "mV", "EC50": "s", "hill": ""}),
    ("A*exp(-(x/tau)**beta)", {"A": "mV", "tau": "s", "beta": ""}),
    ("a + b*log(x)", {"a": "mV", "b": "mV"}),
    # not fixed by the formula: left blank, never guessed
    ("a*x**b", {"a": "", "b": ""}),
    ("Vmax*x**n/(K**n + x**n)", {"Vmax": "", "K": "", "n": ""}),
    # a number beside x in a sum is in x's unit (the thermistor sample's formula)
    ("a*(x - 20) + c", {"a": "mV/s", "c": "mV"}),
    ("R25*exp(B*(1/x - 1/298.15))", {"R25": "mV", "B": "s"}),
    # a rule without parameters (x dimensionless in exp(-x)) fixes nothing, costs nothing
    ("a*exp(-x) + c", {"a": "mV", "c": "mV"}),
    # pure numbers arrive worked out (2*pi = 6.283..., 1/sqrt(2*pi)): still pure
    ("a*sin(2*pi*f*x)", {"a": "mV", "f": "1/s"}),
    ("A*exp(-x/tau)/sqrt(2*pi)", {"A": "mV", "tau": "s"}),
    ("y0 + A*exp(-log(2)*x/t_half)", {"y0": "mV", "A": "mV", "t_half": "s"}),
    ("H*exp(-0.5*((x - mu)/w)**2)", {"H": "mV", "mu": "s", "w": "s"}),
    # another number may carry a unit (the gas constant in J/(mol K), a factor 1000
    # between ms and s): what it touches stays blank, never Ea in K or tau in s
    ("A*exp(-Ea/(8.314462618*x))", {"A": "mV", "Ea": ""}),
    ("A*exp(-1000*x/tau)", {"A": "mV", "tau": ""}),
    # contradictions leave everything blank: a sum of x and x^2 has no single unit;
    # x/(1 + x/K) is in x's unit, never in y's mV
    ("a*(x + x**2) + c", {"a": "", "c": ""}),
    ("x/(1 + x/K)", {"K": ""}),
])
def test_formula_parameters_get_units(text, expected):
    m = parse_formula(text)
    got = {p: resolve_unit(m.units.get(p, ""), "s", "mV") for p in m.param_names}
    assert got == expected


def test_formula_units_reach_the_estimates():
    x = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]
    y = [3.0, 5.1, 6.9, 9.2, 11.0, 12.9]
    res = fitcore.fit("m*x + b", x, y)
    cells = {c["name"]: c["unit"] for c in estimate_cells(res, 0.95, x_unit="s", y_unit="mV")}
    assert cells == {"m": "mV/s", "b": "mV"}
    cells = {c["name"]: c["unit"] for c in estimate_cells(res, 0.95, x_unit="mg/L", y_unit="")}
    assert cells == {"m": "1/(mg/L)", "b": ""}


def test_derived_units_as_siunitx_literal_units():
    # siunitx v3 literal units read ^{...} as a power (from memory of its manual; the
    # compile test in test_report_record.py runs where pdflatex is installed); a bare ^
    # would take one token only, and a caret escaped as text printed "s^2" literally
    from fitcore.report_text import siunitx_unit

    assert siunitx_unit(resolve_unit("y/x^2", "mg/L", "")) == "1/(mg/L)^{2}"
    assert siunitx_unit(resolve_unit("y/x^(1/2)", "s", "mV")) == "mV/s^{1/2}"
    assert siunitx_unit(resolve_unit("y/x^b", "s", "mV")) == "mV/s^{b}"
    assert siunitx_unit("m²") == "m^{2}"
    # the product dot is siunitx's own product separator '.'
    assert siunitx_unit(resolve_unit("x*y", "s", "mV")) == "s.mV"
    # a data unit with a written power is a power in siunitx too (else "cm-1" printed
    # with a hyphen); a hyphen between names stays
    assert siunitx_unit("cm-1") == "cm^{-1}"
    assert siunitx_unit("cm⁻¹") == "cm^{-1}"
    assert siunitx_unit("counts/cm-2") == "counts/cm^{-2}"
    assert siunitx_unit("mg-N") == "mg-N"


def _exponents(hint: str) -> tuple[float, float]:
    from fitcore.units import _HintParser

    ex = ey = 0.0
    for atom, e in (_HintParser(hint).parse() if hint else []):
        ex += float(e) if atom == "x" else 0.0
        ey += float(e) if atom == "y" else 0.0
    return ex, ey


def test_derived_units_make_every_formula_unit_invariant():
    """Dimensional homogeneity (common practice, Buckingham): a formula whose parameters
    carry the derived units gives mu*y when x is rescaled by lam and every parameter by
    lam^ex mu^ey. Checked on 400 random formulas of plain numbers (log is left out: the
    logarithm of a value in a unit is not invariant, so the rules leave its argument
    free), wherever every parameter got a unit."""
    import random

    import numpy as np
    import sympy

    from fitcore.formula import FormulaError, analyse_formula
    from fitcore.units import _plain_number

    rnd = random.Random(7)
    leaves = ["x", "x", "a", "b", "c", "k", "2", "0.5", "pi", "3"]
    funcs = ["exp", "sin", "sqrt", "abs", "tanh", "arctan", "cos"]

    def gen(d):
        if d == 0 or rnd.random() < 0.3:
            return rnd.choice(leaves)
        r = rnd.random()
        if r < 0.55:
            return f"({gen(d - 1)} {rnd.choice('+-*/')} {gen(d - 1)})"
        if r < 0.75:
            return f"{rnd.choice(funcs)}({gen(d - 1)})"
        return f"({gen(d - 1)})**{rnd.choice(['2', '0.5', '-1', '3'])}"

    x = np.linspace(0.3, 2.0, 7)
    lam, mu = 1.7, 0.6
    checked = 0
    for _ in range(400):
        text = gen(4)
        try:
            m = parse_formula(text)
        except FormulaError:
            continue
        if len(m.units) < len(m.param_names):
            continue
        expr = analyse_formula(text).expr
        if not _plain_number(expr) or any(any(a.is_number for a in add.args)
                                          for add in expr.atoms(sympy.Add)):
            # a number that may carry a unit (pi + arctan(3) arrives as 4.39...) or one
            # in a sum, which takes the sum's unit (x - 2): not invariant by design
            continue
        p = np.array([rnd.uniform(0.5, 1.5) for _ in m.param_names])
        scaled = np.array([v * lam ** ex * mu ** ey
                           for v, (ex, ey) in zip(p, (_exponents(m.units[n]) for n in m.param_names))])
        with np.errstate(all="ignore"):
            y1, y2 = m.f(x, p), m.f(lam * x, scaled)
        ok = np.isfinite(y1) & np.isfinite(y2)
        if not ok.any():
            continue
        np.testing.assert_allclose(y2[ok], mu * y1[ok], rtol=1e-9, atol=1e-12, err_msg=text)
        checked += 1
    assert checked >= 40, checked  # enough formulas got a unit for every parameter
