"""The fast reading path gives exactly what the reference reading path gives.

Reference: ``json.loads(text, parse_float=Decimal)``, then ``_with_decimals`` (which builds a
new tree), then ``Session.model_validate``. The reader now converts the parsed tree in place.
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
from pydantic import ValidationError

from bridge.errors import BridgeError
from bridge.model import Session
from bridge.readers.common import decode_text, first_validation_error
from bridge.readers.json_export import _decimals_in_place, _with_decimals, read_export

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = sorted(ROOT.glob("samples/*.json"))
sys.path.insert(0, str(ROOT / "benchmarks"))


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
