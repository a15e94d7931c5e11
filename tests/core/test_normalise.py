"""Normalisation: canonical units, originals kept, idempotent."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.model import Measure, Quantity
from bridge.science.normalise import express, normalise, normalise_quantity
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
    """normalise(normalise(x)) == normalise(x) on every sample."""
    for outcome in sample_outcomes.values():
        assert outcome.session == normalise(outcome.session, UNITS)


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
