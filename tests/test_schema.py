"""The shipped JSON Schema is the one generated from the models, and the reader agrees with it both ways (issue 19.2).

One rule, written once: the models in ``bridge/model.py`` are the format. The published schema is
generated from them in their input form (the fields the bridge fills itself, marked ``Filled``, are
left out), and the reader refuses what the schema refuses. What JSON Schema cannot say (units from
the catalogue, physical limits, a birth date after the test, a record with no result) is refused
beyond it, as docs/format.md lists; the tests below check both directions against the jsonschema
library, an implementation independent of pydantic.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import jsonschema
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bridge.errors import InputError, InvalidField, MissingField, UnitError
from bridge.readers.json_export import read_export
from bridge.readers.schema import export_schema
from bridge.tables.files import load_tables
from tests.fuzz.hostile import schema_documents, structural_mutations, targeted_mutations

ROOT = Path(__file__).resolve().parent.parent
SHIPPED = ROOT / "docs" / "dlco-result-1.schema.json"
SAMPLE = json.loads((ROOT / "samples" / "01-healthy-adult.json").read_text())
TABLES = load_tables()
# source: jsonschema (Draft 2020-12 validator with its format checker: RFC 3339 date and date-time)
VALIDATOR = jsonschema.Draft202012Validator(export_schema(), format_checker=jsonschema.FormatChecker())


def test_shipped_schema_is_current():
    """docs/dlco-result-1.schema.json equals the schema generated from bridge.model."""
    assert export_schema() == json.loads(SHIPPED.read_text())


def test_schema_is_valid_draft_2020_12():
    """The schema itself is a valid JSON Schema (checked by the jsonschema library's metaschema)."""
    # source: JSON Schema draft 2020-12 metaschema, as carried by the jsonschema package
    jsonschema.Draft202012Validator.check_schema(export_schema())


@pytest.mark.parametrize("path", sorted((ROOT / "samples").glob("0*.json")), ids=lambda p: p.name)
def test_samples_follow_the_schema_but_the_malformed_one(path):
    """Every sample follows the schema; 08-malformed breaks it where the reader refuses it (no UTC offset)."""
    where = {tuple(e.path) for e in VALIDATOR.iter_errors(json.loads(path.read_text()))}

    assert ({("performed_at",)} if path.name == "08-malformed.json" else set()) == where


def _with(path: str, value: object) -> dict:
    doc = json.loads(json.dumps(SAMPLE))
    *parents, last = path.split(".")
    node = doc
    for name in parents:
        node = node[name]
    node[last] = value
    return doc


def _reader_accepts(doc: dict) -> bool:
    try:
        read_export(json.dumps(doc).encode(), "x.json", TABLES.units)
    except InputError:
        return False
    return True


def _schema_accepts(doc: dict) -> bool:
    return VALIDATOR.is_valid(doc)


@pytest.mark.parametrize(
    ("path", "value", "accepted"),
    [
        # source: JSON Schema draft 2020-12 validation, "type": a boolean is not a number, a string is not one
        ("results.dlco.value", True, False),  # read as 1 and sent as a final DLCO before
        ("results.dlco.value", "9.84", False),
        ("results.dlco.value", 6.619999999999999, True),  # refused before: "at most 12 digits after the point"
        ("results.dlco.original", {"value": "9.84", "unit": "mmol/min/kPa"}, False),  # shown "as sent" before
        ("results.dlco.decimals", 5, False),
        ("patient.birth_date", 0, False),  # read as 1970-01-01 before
        ("patient.birth_date", "1981-01-15T00:00:00", False),
        ("performed_at", 1772442900, False),  # read as seconds since 1970 before
        ("performed_at", "1772442900", False),
        ("performed_at", "2026-03-02 09:15:00+00:00", False),
        ("performed_at", "2026-03-02T09:15+00:00", False),  # RFC 3339 requires the seconds
        ("performed_at", "2026-03-02t09:15:00z", True),  # RFC 3339 5.6: T and Z may be lower case
        ("performed_at", "2026-03-02T09:15:00.25-07:00", True),
        ("conditions", {"inspired_o2_fraction": True}, False),
        ("conditions", {"inspired_o2_fraction": "0.21"}, False),
        ("conditions", {"inspired_o2_fraction": 0.21}, True),
        # U+0085 is white space to Python but not to ECMA-262's \s: a name of nothing else, or in a URI
        ("lab.name", "\x85", False),
        ("lab.name", "Lab\x85North (fictional)", True),
        ("patient.id_system", "urn:x\x85y", False),
    ],
)
def test_the_reader_and_the_schema_agree_on_each_example(path, value, accepted):
    """Each example is accepted by both, or refused by both."""
    doc = _with(path, value)

    assert (accepted, accepted) == (_schema_accepts(doc), _reader_accepts(doc))


def _as_json(data: bytes) -> object | None:
    try:
        return json.loads(data.decode("utf-8-sig"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        return None


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=st.one_of(structural_mutations(), targeted_mutations()))
def test_what_the_reader_accepts_the_schema_accepts(case):
    """Mutated samples (keys, types, numbers, units): whatever the reader takes is valid against the schema."""
    try:
        read_export(case.data, "x.json", TABLES.units)
    except InputError:
        return
    document = _as_json(case.data)

    assert [] == [f"{list(e.path)}: {e.message}" for e in VALIDATOR.iter_errors(document)]


# What the reader refuses beyond the schema (docs/format.md, "Beyond the schema"): the unit
# catalogue and each field's dimension, the physical limits, negative values of quantities that
# cannot be negative, a birth date after the test, a record with no result.
BEYOND_THE_SCHEMA = re.compile(r"in magnitude|a value >= 0|on or before the test date|at least one result")


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=st.one_of(schema_documents(catalogue=False), schema_documents(catalogue=True)))
def test_what_the_schema_accepts_the_reader_accepts_or_refuses_only_beyond_it(case):
    """Documents the schema allows: read, or refused for one of the documented rules JSON Schema cannot state."""
    document = json.loads(case.data)
    if not VALIDATOR.is_valid(document):  # the generator's formats are looser than the format checker
        return
    try:
        read_export(case.data, "x.json", TABLES.units)
    except UnitError:
        return
    except (InvalidField, MissingField) as exc:
        assert BEYOND_THE_SCHEMA.search(exc.expected), exc.line()


SPIROMETRY = json.loads((ROOT / "samples" / "10-spirometry-and-dlco.json").read_text())


def _properties(node: object) -> set[str]:
    """Every property name anywhere in a JSON Schema."""
    if isinstance(node, list):
        return set().union(*(_properties(n) for n in node))
    if not isinstance(node, dict):
        return set()
    own = set(node["properties"]) if isinstance(node.get("properties"), dict) else set()
    return own.union(*(_properties(v) for v in node.values()))


@pytest.mark.parametrize(
    ("path", "field"),
    [
        ("results.dlco", "original"),
        ("results.va", "decimals"),
        ("spirometry.pre.results.fev1", "original"),  # a quantity deeper in the record
    ],
)
def test_an_internal_field_is_refused_in_one_line_naming_file_and_field(path, field):
    """A file that writes a field the bridge fills itself (``original``, ``decimals``) is refused, not believed."""
    # source: docs/format.md (the format's fields) and JSON Schema draft 2020-12 additionalProperties false,
    # checked by the jsonschema library on the shipped schema
    doc = json.loads(json.dumps(SPIROMETRY))
    node = doc
    for name in path.split("."):
        node = node[name]
    node[field] = {"value": "9.84", "unit": "mmol/min/kPa"} if field == "original" else 5
    with pytest.raises(InvalidField) as refused:
        read_export(json.dumps(doc).encode(), "invented.json", TABLES.units)

    line = str(refused.value)
    assert "\n" not in line
    assert line.startswith(f"invented.json: {path}.{field}: ")
    shipped = jsonschema.Draft202012Validator(json.loads(SHIPPED.read_text()))
    assert not shipped.is_valid(doc)
    assert shipped.is_valid(SPIROMETRY)


def test_the_schema_names_no_field_the_bridge_fills():
    """The shipped schema describes an export: no ``original`` and no ``decimals`` property anywhere in it."""
    # source: the jsonschema library reads the same document (its metaschema check above); here its properties
    names = _properties(json.loads(SHIPPED.read_text()))

    assert {"value", "unit", "test_id", "performed_at"} <= names  # the walk reaches the quantities and the top
    assert not {"original", "decimals"} & names
