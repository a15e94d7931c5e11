"""The emitters' shortcuts give exactly what the plain computation gives."""

from __future__ import annotations

import re
import uuid
from datetime import datetime, timedelta, timezone
from decimal import Decimal
from urllib.parse import quote

import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.emit.fhir import (
    _NAMESPACE_BYTES,
    _decimal,
    _escape,
    _fragment,
    _full_url,
    _instant,
    _Parts,
    _raw_decimal,
    _token_part,
    _token_query,
    bundle_json,
    dumps,
    to_bundle,
    uuid5_text,
)
from bridge.emit.hl7v2 import (
    _CONTROL,
    _ESCAPES,
    _LINE_BREAK,
    escape,
    escape_formatted,
    hl7_date,
    hl7_timestamp,
    numeric_text,
    to_oru,
)
from bridge.emit.observations import EmitContext, build_content
from bridge.emit.outputs import payloads
from bridge.mapping import Tables
from bridge.model import Outcome, Quantity
from bridge.pipeline import process
from tests.emit.test_hl7v2 import NOW

# Text that exercises every branch: delimiters, line breaks, control characters, non-ASCII, surrogate-free.
TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=40) | st.sampled_from(
    ["", "plain", "A|b^c&d~e\\f", "a\r\nb\rc\nd", "tab\there\x01\x7f", "Ünïcode", "a,b$c|d", "x y/z:1"]
)


@settings(max_examples=500)
@given(namespace=st.binary(min_size=16, max_size=16), name=TEXT)
def test_uuid5_text_equals_uuid5(namespace: bytes, name: str):
    """The direct SHA-1 computation gives the same text as uuid.uuid5."""
    expected = str(uuid.uuid5(uuid.UUID(bytes=namespace), name))

    assert expected == uuid5_text(namespace, name)


def test_uuid5_text_equals_uuid5_on_identifier_like_names():
    """Also on many names shaped like the fullUrl names we hash."""
    namespace = uuid.uuid5(uuid.NAMESPACE_URL, "urn:dlco-bridge:fhir")
    names = [f"urn:dlco-bridge:observation-id|lab-{i % 7}.GEN-{i:06d}.key{i % 13}" for i in range(3000)]

    assert [str(uuid.uuid5(namespace, n)) for n in names] == [uuid5_text(namespace.bytes, n) for n in names]


@settings(max_examples=500)
@given(TEXT)
def test_token_part_equals_escape_then_quote(text: str):
    """The fast path of a token part changes nothing the full escape-and-encode would not."""
    assert quote(_escape(text), safe=":/") == _token_part(text)


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


QUANTITY_VALUES = st.floats(allow_nan=False, allow_infinity=False) | st.floats(
    min_value=-1e-3, max_value=1e-3, allow_nan=False
)


@settings(max_examples=1000)
@given(value=QUANTITY_VALUES, decimals=st.none() | st.integers(min_value=0, max_value=12))
def test_json_fragment_equals_the_decimal_written_by_dumps(value: float, decimals: int | None):
    """bundle_json's value fragments are the bytes dumps() writes for to_bundle's Decimal."""
    quantity = Quantity(value=value, unit="L", decimals=decimals)

    assert orjson.dumps([_raw_decimal(_decimal(quantity))]) == orjson.dumps([_fragment(quantity)])


def test_json_fragment_on_edge_values():
    """Zeros with many decimals, tiny values and exponents go through the Decimal."""
    for value, decimals in [(0.0, 7), (0.0, 6), (-0.0, 3), (1e-7, 8), (1e-7, None), (1234567.0, None), (5e-6, 6)]:
        quantity = Quantity(value=value, unit="L", decimals=decimals)

        assert orjson.dumps([_raw_decimal(_decimal(quantity))]) == orjson.dumps([_fragment(quantity)])


# ---------- bundle_json's shared sub-values ----------

FHIR_CONTEXTS = [
    EmitContext(now=NOW),
    EmitContext(now=NOW, units="si", correction=True, patient_reference="conditional-create"),
    EmitContext(now=NOW, local_code_system="urn:example:local-codes", identifier_system="urn:x|y,z$ é"),
]


def _generated_outcomes(tables: Tables, count: int) -> list[Outcome]:
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))
    from bench_convert import generate

    return [process(data, f"gen-{i}.json", tables) for i, data in enumerate(generate(count, seed=11))]


def test_bundle_json_equals_to_bundle_written_by_dumps(sample_outcomes: dict[str, Outcome], tables: Tables):
    """Sharing sub-values inside bundle_json changes no byte: same as dumps(to_bundle(...))."""
    outcomes = list(sample_outcomes.values()) + _generated_outcomes(tables, 150)
    for context in FHIR_CONTEXTS:
        for outcome in outcomes:
            assert dumps(to_bundle(outcome, tables, context), indent=True) == bundle_json(outcome, tables, context)


def _containers(node: object, seen: list[int]) -> None:
    if isinstance(node, dict | list):
        seen.append(id(node))
        for value in node.values() if isinstance(node, dict) else node:
            _containers(value, seen)


def test_to_bundle_returns_independent_dicts(sample_outcomes: dict[str, Outcome], tables: Tables):
    """No dict or list appears twice in a to_bundle result, nor in two results: callers may mutate."""
    context = EmitContext(now=NOW, patient_reference="conditional-create")
    outcome = sample_outcomes["01-healthy-adult"]
    first: list[int] = []
    second: list[int] = []
    one, two = to_bundle(outcome, tables, context), to_bundle(outcome, tables, context)  # both alive
    _containers(one, first)
    _containers(two, second)

    assert (len(first), set()) == (len(set(first)), set(first) & set(second))


@settings(max_examples=300)
@given(system=TEXT, prefix=TEXT, key=st.sampled_from(["dlco", "va", "kco_predicted", "report", "x y|z"]))
def test_bundle_parts_prefixes_equal_the_plain_computation(system: str, prefix: str, key: str):
    """The token query and fullUrl from per-Bundle prefixes equal those of the whole identifier."""
    parts = _Parts(
        id_prefix=prefix,
        identifier_system=system,
        status="final",
        effective="",
        issued="",
        performer="",
        correction=False,
        number=_fragment,
        shared=True,
        query_prefix="identifier=" + _token_part(system) + "|" + _token_part(prefix),
        name_prefix=_NAMESPACE_BYTES + f"{system}|{prefix}".encode(),
        performers=[],
    )
    entry = parts.entry("u", {}, "Observation", key)

    assert (_token_query(system, prefix + key), _full_url(system, prefix + key)) == (
        entry["request"]["ifNoneExist"],
        parts.full_url(key),
    )


OFFSETS = st.one_of(
    st.integers(min_value=-1439, max_value=1439).map(lambda m: timedelta(minutes=m)),
    st.integers(min_value=-86399, max_value=86399).map(lambda s: timedelta(seconds=s)),
)


@settings(max_examples=1000)
@given(moment=st.datetimes(min_value=datetime(1, 1, 1), max_value=datetime(9999, 12, 30)), offset=OFFSETS)
def test_hl7_timestamp_equals_strftime(moment: datetime, offset: timedelta):
    """The formatted TS and date are what strftime writes (unpadded years and odd offsets included)."""
    aware = moment.replace(tzinfo=timezone(offset))

    assert aware.strftime("%Y%m%d%H%M%S%z") == hl7_timestamp(aware)
    assert aware.date().strftime("%Y%m%d") == hl7_date(aware.date())


@pytest.mark.parametrize("text", ["1.5", "0.00001", "1e-05", "-2.5E-07", "12", "-0.000"])
def test_numeric_text_writes_exponents_out(text: str):
    """Exponent notation in either case becomes fixed point; other text is unchanged."""
    expected = format(Decimal(text), "f") if "e" in text.lower() else text

    assert expected == numeric_text(text)


@settings(max_examples=500)
@given(moment=st.datetimes(min_value=datetime(1, 1, 1), max_value=datetime(9999, 12, 30)), offset=OFFSETS)
def test_fhir_instant_equals_isoformat_with_its_timespec(moment: datetime, offset: timedelta):
    """Seconds, or milliseconds when there are microseconds: as isoformat with that timespec."""
    aware = moment.replace(tzinfo=timezone(offset))

    assert aware.isoformat(timespec="milliseconds" if aware.microsecond else "seconds") == _instant(aware)
