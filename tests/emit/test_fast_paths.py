"""The emitters' shortcuts give exactly what the plain computation gives."""

from __future__ import annotations

import re
from decimal import Decimal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.emit.fhir import bundle_json
from bridge.emit.hl7v2 import (
    _CONTROL,
    _ESCAPES,
    _LINE_BREAK,
    escape,
    escape_formatted,
    numeric_text,
    to_oru,
)
from bridge.emit.observations import EmitContext, build_content
from bridge.emit.outputs import payloads
from bridge.mapping import Tables
from bridge.model import Outcome
from tests.emit.test_hl7v2 import NOW

# Text that exercises every branch: delimiters, line breaks, control characters, non-ASCII, surrogate-free.
TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=40) | st.sampled_from(
    ["", "plain", "A|b^c&d~e\\f", "a\r\nb\rc\nd", "tab\there\x01\x7f", "Ünïcode", "a,b$c|d", "x y/z:1"]
)


def _slow_escape(text: str) -> str:
    return _CONTROL.sub(" ", _LINE_BREAK.sub(" ", text)).translate(_ESCAPES)


def _slow_escape_formatted(text: str) -> str:
    return "\\.br\\".join(_CONTROL.sub(" ", line).translate(_ESCAPES) for line in _LINE_BREAK.split(text))


@settings(max_examples=500)
@given(TEXT)
def test_hl7_escape_fast_path_is_exact(text: str):
    """escape and escape_formatted return the same text as the full regex-and-translate path."""
    assert (_slow_escape(text), _slow_escape_formatted(text)) == (escape(text), escape_formatted(text))


def test_payloads_share_one_content(sample_outcomes: dict[str, Outcome], tables: Tables):
    """Building the content once for both outputs gives the bytes each emitter gives alone."""
    for correction in (False, True):
        context = EmitContext(now=NOW, units="si", correction=correction, patient_reference="conditional-create")
        for outcome in sample_outcomes.values():
            fhir, hl7 = payloads(outcome, tables, context, ("fhir", "hl7"))
            content = build_content(outcome, tables, context.units)

            assert bundle_json(outcome, tables, context) == fhir.data
            assert to_oru(outcome, tables, context).encode("utf-8") == hl7.data
            assert bundle_json(outcome, tables, context, content) == fhir.data
            assert re.fullmatch(r"[0-9a-f]{20}", hl7.message_id)


@pytest.mark.parametrize("text", ["1.5", "0.00001", "1e-05", "-2.5E-07", "12", "-0.000"])
def test_numeric_text_writes_exponents_out(text: str):
    """Exponent notation in either case becomes fixed point; other text is unchanged."""
    expected = format(Decimal(text), "f") if "e" in text.lower() else text

    assert expected == numeric_text(text)
