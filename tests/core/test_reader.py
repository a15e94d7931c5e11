"""The dlco-result/1 reader and the pipeline on bad input: one clear line, never a traceback."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from bridge.errors import InputError, MissingField, UnitError, UnreadableInput
from bridge.pipeline import PipelineSettings, process
from bridge.readers.json_export import read_export
from bridge.tables import Tables

GOOD = (Path(__file__).resolve().parents[2] / "samples" / "01-healthy-adult.json").read_bytes()


def _doc() -> dict:
    return json.loads(GOOD)


def _bytes(doc: dict) -> bytes:
    return json.dumps(doc).encode()


def _error(data: bytes, tables: Tables, settings: PipelineSettings = PipelineSettings()) -> InputError:
    with pytest.raises(InputError) as caught:
        process(data, "lab/export.json", tables, settings)
    return caught.value


def _mutated(change) -> bytes:
    doc = _doc()
    change(doc)
    return _bytes(doc)


CASES = {
    "malformed JSON": (b'{"format": "dlco-result/1",', "line 1 column 28", "valid JSON"),
    "empty file": (b"", "(file)", "empty"),
    "not UTF-8": ('{"x": "caf\u00e9"}'.encode("latin-1"), "byte 10", "UTF-8"),
    "missing field": (_mutated(lambda d: d["patient"].pop("birth_date")), "patient.birth_date", "required"),
    "wrong type": (
        _mutated(lambda d: d["results"]["dlco"].update(value="high")),
        "results.dlco.value",
        "a number",
    ),
    "unknown unit": (
        _mutated(lambda d: d["results"]["dlco"].update(unit="furlong")),
        "results.dlco.unit",
        "'furlong'",
    ),
    "wrong dimension": (
        _mutated(lambda d: d["results"]["dlco"].update(unit="L")),
        "results.dlco.unit",
        "volume unit",
    ),
    "negative volume": (
        _mutated(lambda d: d["results"]["va"].update(value=-1.2)),
        "results.va.value",
        ">= 0",
    ),
    "gas fraction above 1": (
        _mutated(
            lambda d: d.update(
                manoeuvres=[
                    {
                        "inspired_volume": {"value": 4, "unit": "L"},
                        "breath_hold_time": {"value": 10, "unit": "s"},
                        "inspired_co_fraction": 3.0,
                        "inspired_tracer_fraction": 0.003,
                        "alveolar_co_fraction": 0.001,
                        "alveolar_tracer_fraction": 0.002,
                    }
                ]
            )
        ),
        "manoeuvres[0].inspired_co_fraction",
        "<= 1",
    ),
    "date-time without offset": (
        _mutated(lambda d: d.update(performed_at="2026-03-02T09:15:00")),
        "performed_at",
        "UTC offset",
    ),
    "unknown field": (
        _mutated(lambda d: d["results"].update(dlco_pred=1)),
        "results.dlco_pred",
        "no such field",
    ),
    # common practice: no lung or lab gives a DLCO above 1000 mL/min/mmHg (adults are 10-50); such
    # a number is corrupt and must be refused before any arithmetic overflows on it
    "huge DLCO (1e308)": (
        _mutated(lambda d: d["results"]["dlco"].update(value=1e308)),
        "results.dlco.value",
        "at most 1000",
    ),
    "huge DLCO in SI units": (
        _mutated(lambda d: d["results"]["dlco"].update(value=1e307, unit="mmol/min/kPa")),
        "results.dlco.value",
        "at most 1000",
    ),
    "infinite value (1e400)": (
        _mutated(lambda d: d["results"]["va"].update(value=1.0)).replace(b'"value": 1.0', b'"value": 1e400'),
        "results.va.value",
        "finite",
    ),
    "NaN value": (
        _mutated(lambda d: d["results"]["va"].update(value=float("nan"))),
        "results.va.value",
        "finite",
    ),
    "tiny value with 320 decimals": (
        _mutated(lambda d: d["results"]["va"].update(value=1.0)).replace(b'"value": 1.0', b'"value": 1e-320'),
        "results.va.value",
        "at most 12 digits",
    ),
    "value with 13 decimals": (
        _mutated(lambda d: d["results"]["va"].update(value=1.0)).replace(b'"value": 1.0', b'"value": 1.0000000000000'),
        "results.va.value",
        "at most 12 digits",
    ),
    "integer with 401 digits": (
        _mutated(lambda d: d["results"]["va"].update(value=10**400)),
        "results.va.value",
        "a number",
    ),
    "misspelt key in a quantity": (
        _mutated(lambda d: d["results"]["va"].update(units="L")),
        "results.va.units",
        "no such field",
    ),
    "empty unit": (
        _mutated(lambda d: d["results"]["va"].update(unit="")),
        "results.va.unit",
        "non-empty text",
    ),
    "wrong format tag": (_mutated(lambda d: d.update(format="other/2")), "format", "dlco-result/1"),
    "top level not an object": (b"[1, 2]", "(top level)", "object"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_input_gives_one_line_naming_file_and_field(tables: Tables, case):
    """Each kind of bad input is one line: file, field, what was expected."""
    data, field, expected_text = CASES[case]

    error = _error(data, tables)
    line = str(error)

    assert "\n" not in line
    assert line.startswith("lab/export.json: ")
    assert field == error.field
    assert expected_text in error.expected


def test_file_over_the_size_limit(tables: Tables):
    """An input over the configured limit is refused before parsing."""
    error = _error(GOOD, tables, PipelineSettings(max_input_bytes=100))

    assert isinstance(error, UnreadableInput)
    assert f"at most 100 bytes, got {len(GOOD)}" == error.expected


def test_error_classes_map_to_actions(tables: Tables):
    """Missing fields and units get their own error class (callers branch on class, not text)."""
    missing = _error(_mutated(lambda d: d.pop("test_id")), tables)
    unit = _error(_mutated(lambda d: d["results"]["dlco"].update(unit="furlong")), tables)

    assert isinstance(missing, MissingField)
    assert isinstance(unit, UnitError)
    assert unit.unit == "furlong"


def test_reported_decimals_are_kept(tables: Tables):
    """7.460 arrives with three decimals and keeps them as its original text."""
    doc = _doc()
    doc["results"]["dlco"] = {"value": 7.460, "unit": "mmol/min/kPa"}
    raw = json.dumps(doc).replace("7.46,", "7.460,").encode()

    outcome = process(raw, "x.json", tables)

    assert outcome.session.results.dlco.original.value == "7.460"
    assert outcome.session.results.dlco.original.value.partition(".")[2].__len__() == 3


@pytest.mark.parametrize(
    ("text", "decimals"),
    [("7.460", 3), ("7", 0), ("746.0E-2", 3), ("1.5E-3", 4), ("1E+2", 0), ("0.000", 3)],
)
def test_reported_decimals_count_the_digits_as_written(text: str, decimals: int, tables: Tables):
    """The digits after the point as the lab wrote them, also in exponent notation."""
    # source: Python decimal module, Decimal(text).as_tuple().exponent is minus the digits after the point
    raw = _mutated(lambda d: d["results"]["va"].update(value=1.0)).replace(b'"value": 1.0', f'"value": {text}'.encode())

    va = read_export(raw, "x.json", tables.units).results.va  # VA in L, its canonical unit

    assert va is not None
    assert decimals == va.decimals
