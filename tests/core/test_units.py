"""Units: the UCUM catalogue, aliases and the SI <-> traditional factor, against outside sources."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from lark.exceptions import LarkError
from ucumvert import PintUcumRegistry, get_ucum_parser

from bridge.science.units import TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE
from bridge.tables import Tables

# source: GLI 2017 TLCO/KCO coefficients (corrected 2020) as carried by the rspiro and PySpiro
# libraries (Stanojevic et al., Eur Respir J 2017;50:1700010): intercept a0 per sex, traditional vs SI.
GLI_INTERCEPTS = {
    "TLCO male": (-7.034920, -8.129189),
    "TLCO female": (-5.159451, -6.253720),
    "KCO male": (4.088408, 2.994137),
    "KCO female": (5.131492, 4.037222),
}

UCUM = get_ucum_parser()


@pytest.mark.parametrize("name", sorted(GLI_INTERCEPTS))
def test_factor_matches_gli_intercepts(name):
    """The traditional and SI GLI intercepts differ by ln(2.987), the factor the bridge uses."""
    traditional, si = GLI_INTERCEPTS[name]

    assert math.exp(traditional - si) == pytest.approx(TRADITIONAL_PER_SI, abs=5e-6)


def test_catalogue_uses_the_named_factor(tables: Tables):
    """1 mmol/min/kPa is 2.987 mL/min/mm[Hg], and the same factor holds per litre for KCO."""
    # source: GLI 2017 intercepts (above): the KCO intercepts differ by the same ln(2.987), VA in litres
    assert tables.units.convert(1.0, "mmol/min/kPa", "mL/min/mm[Hg]") == pytest.approx(2.987)
    assert tables.units.convert(1.0, "mmol/min/kPa/L", "mL/min/mm[Hg]/L") == pytest.approx(2.987)


def test_alternative_factor_is_selectable():
    """A catalogue built with 2.986 converts with 2.986 everywhere."""
    from bridge.tables.files import load_tables

    alt = load_tables(traditional_per_si=TRADITIONAL_PER_SI_ALTERNATIVE)

    assert alt.units.convert(10.0, "mmol/min/kPa", "mL/min/mm[Hg]") == pytest.approx(29.86)
    assert alt.units.convert(1.0, "mmol/min/kPa/L", "mL/min/mm[Hg]/L") == pytest.approx(2.986)


def test_every_catalogued_code_is_valid_ucum(tables: Tables):
    """Every unit code the bridge can produce parses with the independent ucumvert parser."""
    # source: UCUM grammar as implemented by ucumvert (PyPI)
    for code in tables.units.units:
        assert UCUM.parse(code) is not None, code


@pytest.mark.parametrize("written", ["mL/min/mmHg", "ml/min/mm Hg", "mmHg", "mL/min/mmHg/L"])
def test_common_spellings_are_not_ucum_but_are_normalised(tables: Tables, written):
    """mmHg is not a UCUM atom: ucumvert rejects it; the catalogue maps it to mm[Hg]."""
    # source: UCUM (mm[Hg] is the atom; "mmHg" is invalid), checked with ucumvert
    with pytest.raises(LarkError):  # ucumvert's grammar is a lark parser
        UCUM.parse(written)

    resolved = tables.units.resolve(written)

    assert resolved is not None
    assert UCUM.parse(resolved.code) is not None
    assert "mm[Hg]" in resolved.code


@pytest.mark.parametrize(
    ("written", "code"),
    [
        ("mmol/min/kPa", "mmol/min/kPa"),
        ("mmol/(min.kPa)", "mmol/min/kPa"),
        ("mmol/(min.kPa.L)", "mmol/min/kPa/L"),
        ("g/dl", "g/dL"),
        ("kpa", "kPa"),
        ("%", "%"),
        ("l", "L"),
    ],
)
def test_aliases_resolve(tables: Tables, written, code):
    """Spellings labs write resolve to one UCUM code."""
    # common practice: these spellings occur in lab exports
    resolved = tables.units.resolve(written)

    assert resolved is not None
    assert code == resolved.code


def test_unknown_unit_resolves_to_nothing(tables: Tables):
    """A unit outside the catalogue is not guessed."""
    assert tables.units.resolve("furlong/fortnight") is None


@pytest.mark.parametrize(
    ("source", "target"),
    [
        ("kPa", "mm[Hg]"),
        ("hPa", "mm[Hg]"),
        ("g/L", "g/dL"),
        ("[in_i]", "cm"),
        ("[lb_av]", "kg"),
        ("mL", "L"),
        ("[ft_i]", "m"),
        ("ms", "s"),
    ],
)
def test_physical_factors_agree_with_ucum_registry(tables: Tables, source, target):
    """Every physical conversion equals the one the UCUM definitions give (via ucumvert/pint)."""
    # source: UCUM unit definitions as loaded by ucumvert's PintUcumRegistry
    registry = PintUcumRegistry()
    expected = registry.from_ucum(source).to(registry.from_ucum(target)).magnitude

    assert tables.units.convert(1.0, source, target) == pytest.approx(expected, rel=1e-9)


def test_hb_mmol_per_litre_factor(tables: Tables):
    """Hb 1 mmol/L (monomer) is 1.61145 g/dL."""
    # from memory: Hb monomer molar mass 16 114.5 g/mol
    assert tables.units.convert(9.06, "mmol/L", "g/dL") == pytest.approx(14.6, abs=0.01)


@given(st.floats(min_value=0.01, max_value=100.0, allow_nan=False))
def test_si_traditional_round_trip(value):
    """SI -> traditional -> SI returns the value within floating-point rounding."""
    from bridge.tables.files import load_tables

    units = load_tables().units
    there = units.convert(value, "mmol/min/kPa", "mL/min/mm[Hg]")
    back = units.convert(there, "mL/min/mm[Hg]", "mmol/min/kPa")

    assert back == pytest.approx(value, rel=1e-12)
