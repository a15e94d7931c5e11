"""Derivation's shortcuts give what the plain computation gives, and keep Quantity's guarantees."""

from __future__ import annotations

import math

import pytest
from pydantic import ValidationError

from bridge.derive import _q, age_in_years, derive, hb_factor
from bridge.mapping import Tables
from bridge.model import Outcome, Quantity


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf])
def test_computed_quantity_is_never_nan_or_infinite(value: float):
    """A computed value that is not finite is an error, as ``Quantity(...)`` makes it."""
    with pytest.raises(ValidationError):
        _q(value, "L", 2)


def test_computed_quantity_equals_the_model_built_by_its_constructor():
    """Same fields, same fields-set, same dump as ``Quantity(value=, unit=, decimals=)``."""
    built, expected = _q(4.125, "mL/min/mm[Hg]", 2), Quantity(value=4.125, unit="mL/min/mm[Hg]", decimals=2)

    assert expected == built
    assert expected.model_fields_set == built.model_fields_set
    assert expected.model_dump_json() == built.model_dump_json()


def test_hb_factor_with_the_age_given_equals_hb_factor_alone(sample_outcomes: dict[str, Outcome]):
    """Passing the age the caller computed changes nothing."""
    for outcome in sample_outcomes.values():
        session = outcome.session
        assert hb_factor(session) == hb_factor(session, age_in_years(session))


def test_sessions_without_manoeuvres_have_no_manoeuvre_values(sample_outcomes: dict[str, Outcome], tables: Tables):
    """No grades, no session grade, no means: what grading and selecting nothing would give."""
    plain = [o.session for o in sample_outcomes.values() if not o.session.manoeuvres]
    assert plain
    for session in plain:
        derived = derive(session, tables)
        assert derived.manoeuvres == ()
        assert derived.session_grade is None
        assert derived.dlco_from_manoeuvres is None
        assert derived.va_from_manoeuvres is None
