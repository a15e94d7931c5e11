"""Normalisation: canonical units, originals kept, idempotent."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.errors import UnitError
from bridge.model import Measure, Quantity, Session
from bridge.science.normalise import canonical_fields, express, normalise_tree
from bridge.science.units import UnitCatalogue, decimals_after_conversion
from bridge.tables.files import load_tables
from bridge.values import plain, read_as

UNITS = load_tables().units
DLCO = Measure("diffusing_capacity", "mL/min/mm[Hg]")


def normalise_quantity(quantity: Quantity, measure: Measure, catalogue: UnitCatalogue, path: str) -> Quantity:
    """One quantity in its canonical unit, as every reader's normalising step builds it."""
    return read_as(Quantity, canonical_fields(quantity, measure, catalogue, path))


def test_si_value_is_kept_as_original(sample_outcomes):
    """An SI DLCO is held in mL/min/mm[Hg] with the lab's value and unit kept."""
    dlco = sample_outcomes["01-healthy-adult"].session.results.dlco

    assert dlco.unit == "mL/min/mm[Hg]"
    assert dlco.value == pytest.approx(9.84 * 2.987)  # source: GLI 2017 factor (test_units)
    assert (dlco.original.value, dlco.original.unit) == ("9.84", "mmol/min/kPa")


def test_express_gives_back_the_labs_digits():
    """Shown in the unit the lab used, a quantity carries the lab's own text (7.460 stays 7.460)."""
    q = normalise_quantity(Quantity(value=7.46, unit="mmol/min/kPa", decimals=3), DLCO, UNITS, "results.dlco")

    back = express(q, "mmol/min/kPa", UNITS)

    assert back.text() == "7.460"


def test_converted_value_keeps_the_rounding_step():
    """7.460 mmol/min/kPa (step 0.001, i.e. 0.003 mL/min/mm[Hg]) is shown as 22.283, not 22.28."""
    # source: NIST SP 811 (2008) B.7.2 -- the converted step (0.001) is no coarser than 0.001 x 2.987
    q = normalise_quantity(Quantity(value=7.46, unit="mmol/min/kPa", decimals=3), DLCO, UNITS, "results.dlco")

    assert "22.283" == q.text()


@pytest.mark.parametrize(
    ("value", "decimals", "unit", "target", "expected"),
    [
        # source: NIST SP 811 (2008) B.7.2 rule; check values of issue 8 with 1 mmol/min/kPa = 2.987 mL/min/mm[Hg]
        (8.4, 1, "mmol/min/kPa", "mL/min/mm[Hg]", "25.1"),  # 8.4 x 2.987 = 25.0908
        (6.1, 1, "mmol/min/kPa", "mL/min/mm[Hg]", "18.2"),  # 6.1 x 2.987 = 18.2207
        (9.84, 2, "mmol/min/kPa", "mL/min/mm[Hg]", "29.39"),  # 9.84 x 2.987 = 29.3921
        (7.83, 2, "mmol/min/kPa", "mL/min/mm[Hg]", "23.39"),  # a limit: 7.83 x 2.987 = 23.3882
        (152, 0, "g/L", "g/dL", "15.2"),  # step 1 g/L = 0.1 g/dL
        (15.2, 1, "g/dL", "g/L", "152"),  # step 0.1 g/dL = 1 g/L
        (100.6, 1, "kPa", "mm[Hg]", "754.6"),  # 100.6 x 7.50062 = 754.562; step 0.75 mmHg -> 0.1
    ],
)
def test_converted_values_keep_the_source_rounding_step(value, decimals, unit, target, expected):
    """A converted value is shown with a rounding step no coarser than the source's (8.4 -> 25.1, not 25)."""
    q = Quantity(value=value, unit=UNITS.resolve(unit).code, decimals=decimals)

    assert expected == express(q, target, UNITS).text()


def test_nist_example_feet_to_metres():
    """36 ft -> 11.0 m: 0 decimals and a factor of 0.3048 give 1 decimal."""
    # source: NIST SP 811 (2008) B.7.2, its own example (1 ft = 0.3048 m exactly)
    assert 1 == decimals_after_conversion(0, 0.3048)


@settings(max_examples=300)
@given(
    st.integers(min_value=0, max_value=6),
    st.sampled_from(
        [
            ("mmol/min/kPa", "mL/min/mm[Hg]"),
            ("mL/min/mm[Hg]", "mmol/min/kPa"),
            ("mmol/min/kPa/L", "mL/min/mm[Hg]/L"),
            ("g/L", "g/dL"),
            ("g/dL", "g/L"),
            ("kPa", "mm[Hg]"),
            ("mm[Hg]", "kPa"),
            ("mL", "L"),
        ]
    ),
)
def test_converted_rounding_step_is_never_coarser(decimals, pair):
    """The converted step 10**-d' never exceeds the source step 10**-d times the factor."""
    # source: NIST SP 811 (2008) B.7.2; the factor from the catalogue, the step by definition
    source, target = pair
    factor = UNITS.factor_between(source, target)

    converted = decimals_after_conversion(decimals, factor)

    assert 10.0**-converted <= 10.0**-decimals * factor * (1 + 1e-9)
    # and not a digit more than needed (no negative decimals: 15 g/dL is 150 g/L, not 1.5e2)
    assert converted == 0 or 10.0 ** -(converted - 1) > 10.0**-decimals * factor


def test_normalising_twice_changes_nothing(sample_outcomes):
    """A read session's own tree, normalised again and validated, is the same session (every sample)."""
    for outcome in sample_outcomes.values():
        again = read_as(Session, normalise_tree(plain(outcome.session), UNITS))

        assert outcome.session == again


def test_tree_quantities_are_normalised_and_the_tree_is_left_alone():
    """A DLCO object in the tree becomes mL/min/mm[Hg] with the lab's value and unit; the input is unchanged."""
    tree = {"results": {"dlco": {"value": 7.46, "unit": "mmol/min/kPa", "decimals": 3}}}

    normalised = normalise_tree(tree, UNITS)

    dlco = normalised["results"]["dlco"]
    # 7.460 x 2.987 = 22.283; the source's step 0.001 mmol/min/kPa is 0.002987 mL/min/mmHg, so 3 decimals
    # keep the step no coarser (NIST SP 811 (2008) B.7.2); source: GLI 2017 factor (test_units)
    assert (22.283, 3) == (round(dlco["value"], 3), dlco["decimals"])
    assert ("mL/min/mm[Hg]", {"value": "7.460", "unit": "mmol/min/kPa"}) == (dlco["unit"], dlco["original"])
    assert {"results": {"dlco": {"value": 7.46, "unit": "mmol/min/kPa", "decimals": 3}}} == tree


def test_tree_step_leaves_what_it_does_not_recognise_for_validation():
    """A quantity with a stray key, a number where an object belongs, an unknown block: left as they are."""
    tree = {
        "results": {"dlco": {"value": 7.46, "unit": "mmol/min/kPa", "colour": "red"}, "va": 6.5},
        "conditions": "none",
    }

    assert tree == normalise_tree(tree, UNITS)


def test_tree_step_names_the_field_of_a_unit_it_refuses():
    """An unknown unit in the second manoeuvre is refused naming manoeuvres[1].breath_hold_time.unit."""
    good = {"inspired_volume": {"value": 4, "unit": "L"}, "breath_hold_time": {"value": 10, "unit": "s"}}
    bad = {"inspired_volume": {"value": 4, "unit": "L"}, "breath_hold_time": {"value": 10, "unit": "fortnight"}}

    with pytest.raises(UnitError) as caught:
        normalise_tree({"manoeuvres": [good, bad]}, UNITS)

    assert "manoeuvres[1].breath_hold_time.unit" == caught.value.field


@settings(max_examples=200)
@given(
    st.floats(min_value=0.001, max_value=300, allow_nan=False),
    st.sampled_from(["mmol/min/kPa", "mL/min/mmHg", "ml/min/mm Hg", "mmol/(min.kPa)", "mL/min/mm[Hg]"]),
    st.integers(min_value=0, max_value=4),
)
def test_quantity_normalisation_is_idempotent(value, unit, decimals):
    """Any DLCO in any accepted spelling normalises once and then stays put."""
    once = normalise_quantity(Quantity(value=value, unit=unit, decimals=decimals), DLCO, UNITS, "p")
    twice = normalise_quantity(once, DLCO, UNITS, "p")

    assert once == twice
    assert once.unit == "mL/min/mm[Hg]"
    assert unit == once.original.unit
