"""Normalisation: canonical units, originals kept, idempotent."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.errors import UnitError
from bridge.model import Measure, Quantity, Session
from bridge.science.normalise import express, normalise_quantity, normalise_tree
from bridge.tables.files import load_tables

UNITS = load_tables().units
DLCO = Measure("diffusing_capacity", "mL/min/mm[Hg]")


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


def test_converted_value_keeps_significant_digits():
    """7.460 mmol/min/kPa (4 significant digits) is shown as 22.28 mL/min/mm[Hg]."""
    q = normalise_quantity(Quantity(value=7.46, unit="mmol/min/kPa", decimals=3), DLCO, UNITS, "results.dlco")

    assert q.text() == "22.28"


def test_normalising_twice_changes_nothing(sample_outcomes):
    """A read session's own tree, normalised again and validated, is the same session (every sample)."""
    for outcome in sample_outcomes.values():
        again = Session.model_validate(normalise_tree(outcome.session.model_dump(), UNITS))

        assert outcome.session == again


def test_tree_quantities_are_normalised_and_the_tree_is_left_alone():
    """A DLCO object in the tree becomes mL/min/mm[Hg] with the lab's value and unit; the input is unchanged."""
    tree = {"results": {"dlco": {"value": 7.46, "unit": "mmol/min/kPa", "decimals": 3}}}

    normalised = normalise_tree(tree, UNITS)

    dlco = normalised["results"]["dlco"]
    # 7.460 x 2.987 = 22.283 (4 significant digits kept: 2 decimals); source: GLI 2017 factor (test_units)
    assert (22.28, 2) == (round(dlco["value"], 2), dlco["decimals"])
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
