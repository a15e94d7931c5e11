"""The fast reading paths give exactly what the reference paths give.

Reference: ``json.loads(text, parse_float=Decimal)``, then ``_with_decimals`` (which builds a
new tree), then ``Session.model_validate``. The reader now converts the parsed tree in place.
And ``read_normalised`` gives exactly ``normalise(read_export(...))``: the same session (values,
types, set fields) or the same error (class, field, expected, source, text).
"""

from __future__ import annotations

import copy
import json
import sys
from decimal import Decimal
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import BaseModel, ValidationError

from bridge.errors import BridgeError
from bridge.model import Session
from bridge.normalise import normalise
from bridge.readers.common import decode_text, first_validation_error
from bridge.readers.json_export import (
    _decimals_in_place,
    _decimals_of,
    _normalised_in_place,
    _parse,
    _reported_decimals,
    read_export,
    read_normalised,
)
from bridge.resources import load_tables

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = sorted(ROOT.glob("samples/*.json"))
sys.path.insert(0, str(ROOT / "benchmarks"))


def _with_decimals(node: Any) -> Any:
    """Turn parsed decimals into floats, recording reported decimals on quantity objects."""
    if isinstance(node, dict):
        out = {key: _with_decimals(value) for key, value in node.items()}
        value = node.get("value")
        if "unit" in node and isinstance(value, Decimal | int) and not isinstance(value, bool):
            out.setdefault("decimals", _decimals_of(value))
        return out
    if isinstance(node, list):
        return [_with_decimals(item) for item in node]
    if isinstance(node, Decimal):
        return float(node)
    return node


def reference_read(data: bytes, source: str = "") -> Session:
    """The reader as it was before the in-place conversion (same checks, same order)."""
    text = decode_text(data, source)
    tree = json.loads(text, parse_float=Decimal)
    if not isinstance(tree, dict) or tree.get("format") != "dlco-result/1":
        return read_export(data, source)  # the early refusals did not change
    try:
        return Session.model_validate(_with_decimals(tree))
    except ValidationError as exc:
        raise first_validation_error(exc, source) from None


def outcome_of(read: Any, data: bytes) -> str:
    """A session's full dump (types included), or the error it raised."""
    try:
        session = read(data, "x.json")
    except BridgeError as exc:
        return f"{type(exc).__name__}: {exc}"
    return repr(session) + session.model_dump_json()


# ---------- the tree conversion itself ----------

NUMBERS = st.one_of(
    st.integers(min_value=-(10**20), max_value=10**20),
    st.decimals(min_value=Decimal("-1e9"), max_value=Decimal("1e9"), allow_nan=False, allow_infinity=False),
    st.sampled_from([Decimal("7.460"), Decimal("1E+2"), Decimal("1.50E-3"), Decimal("-0.0"), Decimal("100")]),
)
SCALARS = st.one_of(NUMBERS, st.booleans(), st.none(), st.text(max_size=5), st.just(float("nan")))
KEYS = st.sampled_from(["value", "unit", "decimals", "original", "a", "b", "results"])
TREES = st.recursive(
    SCALARS,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(KEYS, inner, max_size=5),
    max_leaves=12,
)


@settings(max_examples=200, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(KEYS, TREES, max_size=6))
def test_in_place_conversion_equals_reference(tree: dict[str, Any]):
    """Same keys in the same order, same types, same values, same recorded decimals."""
    expected = repr(_with_decimals(tree))

    assert expected == repr(_decimals_in_place(copy.deepcopy(tree)))


@settings(max_examples=500)
@given(NUMBERS | st.decimals(allow_nan=True, allow_infinity=True) | st.sampled_from([Decimal("0E-7"), Decimal("1E-7")]))
def test_reported_decimals_from_text_equal_the_tuple(value: Decimal | int):
    """Reading the decimals off the Decimal's text gives what its exponent gives."""
    assert _decimals_of(value) == _reported_decimals(value)


def test_reported_digits_are_kept():
    """7.460 keeps its three decimals; an integer has none; an exponent counts as Decimal does."""
    tree = json.loads(
        '{"a": {"value": 7.460, "unit": "L"}, "b": {"value": 7, "unit": "L"}, "c": {"value": 1.5E-3, "unit": "L"}}',
        parse_float=Decimal,
    )

    assert [3, 0, 4] == [_decimals_in_place(tree)[k]["decimals"] for k in "abc"]


# ---------- whole documents ----------


@pytest.mark.parametrize("path", SAMPLES, ids=lambda p: p.name)
def test_samples_read_identically(path: Path):
    """Every bundled sample (good or broken) gives the same session or the same error."""
    data = path.read_bytes()

    assert outcome_of(reference_read, data) == outcome_of(read_export, data)


def test_generated_sessions_read_identically():
    """The benchmark's generated sessions give the same sessions."""
    from bench_convert import generate

    for data in generate(300, seed=99):
        assert outcome_of(reference_read, data) == outcome_of(read_export, data)


def _number_text(draw: st.DrawFn) -> str:
    whole = draw(st.integers(min_value=-999, max_value=99999))
    decimals = draw(st.integers(min_value=0, max_value=14))
    text = str(whole)
    if decimals:
        text += "." + "".join(draw(st.sampled_from("0123456789")) for _ in range(decimals))
    if draw(st.booleans()) and draw(st.booleans()):
        text += draw(st.sampled_from(["e2", "E-3", "e+1", "E0"]))
    return text


@st.composite
def documents(draw: st.DrawFn) -> bytes:
    """A sample with its numbers rewritten as varied JSON number texts, sometimes broken."""
    base = json.loads(draw(st.sampled_from(SAMPLES[:7])).read_text(), parse_float=Decimal)
    if not isinstance(base, dict):
        return b"[]"
    doc = _rewrite(base, draw)
    if draw(st.integers(0, 9)) == 0:
        doc[draw(st.sampled_from(["extra", "test_id", "results"]))] = draw(st.sampled_from([1.5, "x", None, {}]))
    return _dumps(doc).encode()


def _rewrite(node: Any, draw: st.DrawFn) -> Any:
    if isinstance(node, dict):
        return {k: _rewrite(v, draw) for k, v in node.items()}
    if isinstance(node, list):
        return [_rewrite(v, draw) for v in node]
    if isinstance(node, Decimal | int) and not isinstance(node, bool) and draw(st.booleans()):
        return _Raw(_number_text(draw))
    return node


class _Raw(str):
    """A number written verbatim into the JSON text."""


def _dumps(node: Any) -> str:
    if isinstance(node, _Raw):
        return str(node)
    if isinstance(node, dict):
        return "{" + ", ".join(f"{json.dumps(k)}: {_dumps(v)}" for k, v in node.items()) + "}"
    if isinstance(node, list):
        return "[" + ",".join(_dumps(v) for v in node) + "]"
    if isinstance(node, Decimal):
        return str(node)
    return json.dumps(node)


@settings(max_examples=150, suppress_health_check=[HealthCheck.too_slow])
@given(documents())
def test_generated_documents_read_identically(data: bytes):
    """Documents with numbers in every JSON spelling give the same session or the same error."""
    assert outcome_of(reference_read, data) == outcome_of(read_export, data)


# ---------- reading and normalising in one build ----------
#
# Reference: ``normalise(read_export(data), catalogue)``. ``read_normalised`` puts each quantity
# of the parsed tree in its canonical form before the one ``Session.model_validate``.

UNITS = load_tables().units
UNIT_SPELLINGS = st.sampled_from(
    [
        "mL/min/mm[Hg]",
        "ml/min/mm Hg",
        "mmol/min/kPa",
        "mmol/(min.kPa)",
        "mmol/min/kPa/L",
        "mL/min/mmHg/L",
        "L",
        "mL",
        " L ",
        "s",
        "ms",
        "kPa",
        "mm[Hg]",
        "mmHg",
        "g/L",
        "g/dL",
        "mmol/L",
        "%",
        "cm",
        "m",
        "kg",
        "Cel",
        "furlong",
        "",
        " ",
    ]
)


def _fields_set(value: Any) -> Any:
    """Which fields were set, model by model (``==`` on models does not compare it)."""
    if isinstance(value, BaseModel):
        return (
            type(value).__name__,
            sorted(value.model_fields_set),
            {k: _fields_set(getattr(value, k)) for k in type(value).model_fields},
        )
    if isinstance(value, tuple):
        return [_fields_set(v) for v in value]
    return None


def normalised_outcome(read: Any, data: bytes) -> tuple[str, ...]:
    """A session (dump, repr, set fields), or the error (class, field, expected, source, text)."""
    try:
        session = read(data)
    except BridgeError as exc:
        fields = tuple(str(getattr(exc, name, "")) for name in ("field", "expected", "source"))
        return (type(exc).__name__, *fields, str(exc))
    except (ValidationError, ArithmeticError) as exc:  # not an InputError: must match as well
        return (type(exc).__name__, str(exc))
    return (repr(session), session.model_dump_json(), repr(_fields_set(session)))


def reference_normalised(data: bytes) -> Session:
    return normalise(read_export(data, "x.json"), UNITS)


def fast_normalised(data: bytes) -> Session:
    return read_normalised(data, UNITS, "x.json")


@pytest.mark.parametrize("path", SAMPLES, ids=lambda p: p.name)
def test_samples_normalise_identically_while_read(path: Path):
    """Every bundled sample gives the same normalised session, or the same error."""
    data = path.read_bytes()

    assert normalised_outcome(reference_normalised, data) == normalised_outcome(fast_normalised, data)


def test_generated_sessions_normalise_identically_while_read():
    """The benchmark's generated sessions, in every unit spelling it writes, give the same sessions."""
    from bench_convert import generate

    for data in generate(300, seed=7):
        assert normalised_outcome(reference_normalised, data) == normalised_outcome(fast_normalised, data)


def test_clean_documents_take_the_one_build_path():
    """The comparison above is not vacuous: clean documents never fall back to the reference path."""
    from bench_convert import generate

    clean = [p.read_bytes() for p in SAMPLES if "malformed" not in p.name] + generate(100, seed=3)

    assert all(_normalised_in_place(_parse(data, ""), Session, UNITS) for data in clean)


def test_reading_normalised_keeps_the_reported_digits():
    """7.460 mmol/min/kPa keeps its text as the original and its significant digits converted."""
    data = (ROOT / "samples" / "01-healthy-adult.json").read_bytes()
    tree = json.loads(data)
    tree["results"]["dlco"] = {"value": "@", "unit": "mmol/min/kPa"}
    data = json.dumps(tree).replace('"@"', "7.460").encode()

    dlco = read_normalised(data, UNITS).results.dlco

    assert dlco is not None
    assert ("7.460", "mmol/min/kPa", "mL/min/mm[Hg]", 2) == (
        dlco.original.value if dlco.original else None,
        dlco.original.unit if dlco.original else None,
        dlco.unit,
        dlco.decimals,
    )


def test_normalise_after_reading_normalised_changes_nothing():
    """``normalise`` stays idempotent on what the one-build path returns (same objects back)."""
    for path in SAMPLES:
        if "malformed" in path.name:
            continue
        session = read_normalised(path.read_bytes(), UNITS)

        assert session is normalise(session, UNITS)


def _quantity_paths(node: Any, path: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    if isinstance(node, dict):
        if "unit" in node and "value" in node:
            return [path]
        return [p for k, v in node.items() for p in _quantity_paths(v, (*path, k))]
    if isinstance(node, list):
        return [p for i, v in enumerate(node) for p in _quantity_paths(v, (*path, i))]
    return []


@st.composite
def unit_documents(draw: st.DrawFn) -> bytes:
    """A sample with some quantities re-spelt, mis-dimensioned, negative, odd-typed or with extra keys."""
    base = json.loads(draw(st.sampled_from(SAMPLES[:7])).read_text(), parse_float=Decimal)
    if not isinstance(base, dict):
        return b"[]"
    doc = _rewrite(base, draw) if draw(st.booleans()) else base
    paths = _quantity_paths(doc)
    for path in draw(st.lists(st.sampled_from(paths), max_size=4)) if paths else []:
        node = doc
        for part in path:
            node = node[part]
        change = draw(st.integers(0, 9))
        if change <= 4:
            node["unit"] = draw(UNIT_SPELLINGS)
        elif change == 5:
            node["value"] = _Raw("-" + _number_text(draw).lstrip("-"))
        elif change == 6:
            node["value"] = draw(st.sampled_from(["7.4", True, None, [1], 1e308, 10**400]))
        elif change == 7:
            node[draw(st.sampled_from(["decimals", "original", "units"]))] = draw(
                st.sampled_from([2, 13, -1, {"value": "7.460", "unit": "mmol/min/kPa"}, "x"])
            )
        elif change == 8:
            node["value"] = _Raw(draw(st.sampled_from(["1e400", "1.0000000000000", "0.0000000001", "1e-320"])))
        else:
            node.pop(draw(st.sampled_from(["value", "unit"])), None)
    return _dumps(doc).encode()


@settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(unit_documents())
def test_unit_documents_normalise_identically_while_read(data: bytes):
    """Any spelling, dimension, sign, type or extra key gives the same session or the same error."""
    assert normalised_outcome(reference_normalised, data) == normalised_outcome(fast_normalised, data)


@settings(max_examples=150, suppress_health_check=[HealthCheck.too_slow])
@given(documents())
def test_generated_documents_normalise_identically_while_read(data: bytes):
    """Documents with numbers in every JSON spelling give the same normalised session or error."""
    assert normalised_outcome(reference_normalised, data) == normalised_outcome(fast_normalised, data)
