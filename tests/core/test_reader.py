"""The dlco-result/1 reader and the pipeline on bad input: one clear line, never a traceback."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
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
    # common practice: a misspelt key is named with the field of the same object it most resembles
    "section not an object": (
        _mutated(lambda d: d.update(patient="P-1")),
        "patient",
        "an object, got 'P-1'",
    ),
    "misspelt section": (
        _mutated(lambda d: d.update(lung_volume={})),
        "lung_volume",
        "no such field; did you mean 'lung_volumes'?",
    ),
    "misspelt field of a section": (
        _mutated(lambda d: d["patient"].update(birth_dat="1980-01-01")),
        "patient.birth_dat",
        "no such field; did you mean 'birth_date'?",
    ),
    # common practice: no lung or lab gives a DLCO above 1000 mL/min/mmHg (adults are 10-50); such
    # a number is corrupt and must be refused before any arithmetic overflows on it
    # The limit is said in the unit the file used: 1000 mL/min/mmHg / 2.987 = 334.8 mmol/min/kPa
    # (source: ATS/ERS 2017 DLCO standard, 1 mmol/min/kPa = 2.987 mL/min/mmHg)
    "huge DLCO (1e308)": (
        _mutated(lambda d: d["results"]["dlco"].update(value=1e308)),
        "results.dlco.value",
        "at most 334.8 mmol/min/kPa in magnitude, got 1e+308 mmol/min/kPa",
    ),
    "huge DLCO in traditional units": (
        _mutated(lambda d: d["results"]["dlco"].update(value=1e307, unit="mL/min/mmHg")),
        "results.dlco.value",
        "at most 1000 mL/min/mmHg in magnitude, got 1e+307 mL/min/mmHg",
    ),
    # Issue 19.8: a pressure labelled kPa is not compared with 2000 mmHg; 2000 mmHg x 0.133322 kPa/mmHg
    # = 266.6 kPa (source: NIST SP 811 (2008) B.8, 1 mmHg = 133.3224 Pa)
    "pressure beyond the limit in kPa": (
        _mutated(lambda d: d.update(conditions={"barometric_pressure": {"value": 760, "unit": "kPa"}})),
        "conditions.barometric_pressure.value",
        "at most 266.6 kPa in magnitude, got 760 kPa",
    ),
    "unknown unit said as people write them": (
        _mutated(lambda d: d.update(conditions={"barometric_pressure": {"value": 760, "unit": "torrs"}})),
        "conditions.barometric_pressure.unit",
        "is not a known unit for pressure (e.g. mmHg)",
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
    # Issue 19.2: what the published schema refuses, the reader refuses (JSON Schema draft 2020-12:
    # true is a boolean, not a number; "9.84" is a string; an offset-less or space-separated
    # date-time and a number are not RFC 3339 date-times).
    "true as a value": (_mutated(lambda d: d["results"]["dlco"].update(value=True)), "results.dlco.value", "a number"),
    "a number as text": (
        _mutated(lambda d: d["results"]["dlco"].update(value="9.84")),
        "results.dlco.value",
        "a number, got '9.84'",
    ),
    "true as a gas fraction": (
        _mutated(lambda d: d.update(conditions={"inspired_o2_fraction": True})),
        "conditions.inspired_o2_fraction",
        "a number",
    ),
    "original in an export": (
        _mutated(lambda d: d["results"]["dlco"].update(original={"value": "1", "unit": "L"})),
        "results.dlco.original",
        "no such field in an export",
    ),
    "decimals in an export": (
        _mutated(lambda d: d["results"]["va"].update(decimals=3)),
        "results.va.decimals",
        "no such field in an export",
    ),
    "decimals in a manoeuvre's quantity": (
        _mutated(
            lambda d: d.update(
                manoeuvres=[
                    {
                        "inspired_volume": {"value": 4, "unit": "L", "decimals": 0},
                        "breath_hold_time": {"value": 10, "unit": "s"},
                        "inspired_co_fraction": 0.003,
                        "inspired_tracer_fraction": 0.003,
                        "alveolar_co_fraction": 0.001,
                        "alveolar_tracer_fraction": 0.002,
                    }
                ]
            )
        ),
        "manoeuvres[0].inspired_volume.decimals",
        "no such field in an export",
    ),
    "birth date as a number": (
        _mutated(lambda d: d["patient"].update(birth_date=0)),
        "patient.birth_date",
        "a date YYYY-MM-DD, got 0",
    ),
    "birth date as a date-time": (
        _mutated(lambda d: d["patient"].update(birth_date="1981-01-15T00:00:00")),
        "patient.birth_date",
        "a date YYYY-MM-DD",
    ),
    "date-time as a number": (
        _mutated(lambda d: d.update(performed_at=1772442900)),
        "performed_at",
        "UTC offset",
    ),
    "date-time as digits": (_mutated(lambda d: d.update(performed_at="1772442900")), "performed_at", "UTC offset"),
    "date-time with a space": (
        _mutated(lambda d: d.update(performed_at="2026-03-02 09:15:00+00:00")),
        "performed_at",
        "UTC offset",
    ),
    "date-time without seconds": (
        _mutated(lambda d: d.update(performed_at="2026-03-02T09:15+00:00")),
        "performed_at",
        "UTC offset",
    ),
    "offset beyond 14 hours": (
        _mutated(lambda d: d.update(performed_at="2026-03-02T09:15:00+14:30")),
        "performed_at",
        "between -14:00 and +14:00",
    ),
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
    [("7.460", 3), ("7", 0), ("746.0E-2", 3), ("1.5E-3", 4), ("1E+2", 0), ("0.000", 3), ("6.123456789012", 12)],
)
def test_reported_decimals_count_the_digits_as_written(text: str, decimals: int, tables: Tables):
    """The digits after the point as the lab wrote them, also in exponent notation."""
    # source: Python decimal module, Decimal(text).as_tuple().exponent is minus the digits after the point
    raw = _mutated(lambda d: d["results"]["va"].update(value=1.0)).replace(b'"value": 1.0', f'"value": {text}'.encode())

    va = read_export(raw, "x.json", tables.units).results.va  # VA in L, its canonical unit

    assert va is not None
    assert decimals == va.decimals


@pytest.mark.parametrize(
    ("text", "value", "shown"),
    [
        # a float a program printed in full (IEEE 754 double nearest 6.62, one ulp below)
        ("6.619999999999999", 6.619999999999999, "6.62"),
        ("1.0000000000000", 1.0, "1"),  # 13 digits after the point
        ("5.4400000000000004", 5.44, "5.44"),  # 16 digits: Python's float() rounds it to 5.44
    ],
)
def test_a_number_printed_in_full_is_read_with_its_precision_unknown(text: str, value: float, shown: str, tables):
    """More than 12 digits after the point: accepted (the schema allows any JSON number), shown with 6 significant."""
    # source: JSON Schema draft 2020-12, "number" is any JSON number; Python float() for the value
    raw = _mutated(lambda d: d["results"]["va"].update(value=1.0)).replace(b'"value": 1.0', f'"value": {text}'.encode())

    va = read_export(raw, "x.json", tables.units).results.va

    assert va is not None
    assert (value, None, shown) == (va.value, va.decimals, va.text())


# ---------- impossible records (issue 19.3): refused, never sent final in silence ----------


def test_a_birth_date_after_the_test_is_refused(tables: Tables):
    """Born 2027-05-01, tested 2026-03-02: one line naming the field and the test date."""
    error = _error(_mutated(lambda d: d["patient"].update(birth_date="2027-05-01")), tables)

    assert ("patient.birth_date", "a date on or before the test date 2026-03-02, got 2027-05-01") == (
        error.field,
        error.expected,
    )


def test_born_on_the_test_day_is_possible(tables: Tables):
    """A test on the day of birth (a newborn's) is not refused by this rule: the dates may be equal."""
    outcome = process(_mutated(lambda d: d["patient"].update(birth_date="2026-03-02")), "x.json", tables)

    assert "2026-03-02" == outcome.session.patient.birth_date.isoformat()


def test_the_test_date_is_the_day_where_the_test_was_done(tables: Tables):
    """23:30 at UTC-05:00 on 1 March is 2 March in UTC; born 2 March is still after that test (its own day)."""
    data = _mutated(
        lambda d: (d.update(performed_at="2026-03-01T23:30:00-05:00"), d["patient"].update(birth_date="2026-03-02"))
    )

    assert "a date on or before the test date 2026-03-01, got 2026-03-02" == _error(data, tables).expected


def test_a_record_with_no_result_and_no_manoeuvre_is_refused(tables: Tables):
    """No results (only the lab's predicted values) and no manoeuvre: nothing was measured; refused, naming results."""
    error = _error(_mutated(lambda d: d.update(results={"predicted": d["results"]["predicted"]})), tables)

    assert isinstance(error, MissingField)
    assert ("results", True) == (error.field, error.expected.startswith("at least one result (dlco, va, kco"))


def test_a_record_without_results_key_is_refused_too(tables: Tables):
    """The results object left out altogether: the same refusal."""
    assert "results" == _error(_mutated(lambda d: d.pop("results")), tables).field


@pytest.mark.parametrize(("ahead", "refused"), [(timedelta(minutes=59), False), (timedelta(minutes=61), True)])
def test_a_test_dated_in_the_future_beyond_an_hour_is_refused(tables: Tables, ahead, refused):
    """performed_at later than the time the input was read (now, given by the shell) by more than an hour: refused."""
    now = datetime(2026, 3, 2, 9, 15, tzinfo=UTC) - ahead  # the sample was performed at 2026-03-02T09:15:00+00:00

    try:
        process(GOOD, "x.json", tables, now=now)
        outcome = "read"
    except InputError as exc:
        outcome = exc.field

    assert ("performed_at" if refused else "read") == outcome


def test_without_a_time_given_no_future_check_is_made(tables: Tables):
    """The core never reads the clock: process() without now takes a 2099 test as it is."""
    outcome = process(_mutated(lambda d: d.update(performed_at="2099-01-01T00:00:00+00:00")), "x.json", tables)

    assert 2099 == outcome.session.performed_at.year
