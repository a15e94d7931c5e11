"""The export's optional spirometry section and the patient's ethnicity: read, normalised, schema agreeing (24.1)."""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import pytest

from bridge.errors import InputError, UnitError
from bridge.readers.json_export import read_export
from bridge.readers.schema import export_schema
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = json.loads((ROOT / "samples" / "01-healthy-adult.json").read_text())
TABLES = load_tables()
# source: jsonschema (Draft 2020-12 validator), an implementation independent of pydantic
VALIDATOR = jsonschema.Draft202012Validator(export_schema(), format_checker=jsonschema.FormatChecker())

SPIROMETRY = {
    "pre": {
        "results": {
            "fev1": {"value": 3210, "unit": "mL"},
            "fvc": {"value": 4.05, "unit": "L"},
            "fev1_fvc": {"value": 0.79, "unit": "1"},
            "fef25_75": {"value": 171.0, "unit": "L/min"},
            "pef": {"value": 8.4, "unit": "L/s"},
        },
        "manoeuvres": [
            {
                "fev1": {"value": 3.21, "unit": "L"},
                "fvc": {"value": 4.05, "unit": "L"},
                "fev1_status": "acceptable",
                "fvc_status": "acceptable",
            },
            {
                "fev1": {"value": 3.12, "unit": "L"},
                "fvc": {"value": 3.98, "unit": "L"},
                "fev1_status": "usable",
                "fvc_status": "not_usable",
            },
        ],
    },
    "post": {"results": {"fev1": {"value": 3.45, "unit": "L"}, "fvc": {"value": 4.11, "unit": "L"}}},
    "bronchodilator": {"drug": "salbutamol", "dose": {"value": 400, "unit": "µg"}},
}


def _doc(**changes: object) -> dict:
    doc = json.loads(json.dumps(SAMPLE))
    doc["spirometry"] = json.loads(json.dumps(SPIROMETRY))
    doc["patient"]["ethnicity"] = "north_east_asian"
    doc.update(changes)
    return doc


def _read(doc: dict):
    return read_export(json.dumps(doc).encode(), "x.json", TABLES.units)


def test_a_document_with_spirometry_follows_the_schema():
    """The published schema accepts the spirometry section and the ethnicity."""
    assert [] == [e.message for e in VALIDATOR.iter_errors(_doc())]


def test_spirometry_is_read_in_canonical_units_keeping_the_lab_values():
    """mL become L, L/min become L/s, a fraction becomes per cent, ug stay ug; the lab's value and unit kept."""
    session = _read(_doc())
    spiro = session.spirometry
    assert spiro is not None and spiro.pre is not None and spiro.post is not None
    results = spiro.pre.results
    assert results.fev1 is not None and results.fef25_75 is not None and results.fev1_fvc is not None
    # source: UCUM (unitsofmeasure.org), base units: 1 mL = 0.001 L; 1 min = 60 s; "1" is the unity, "%" 1/100
    assert (3.21, "L", "3210", "mL") == (
        pytest.approx(results.fev1.value),
        results.fev1.unit,
        results.fev1.original.value if results.fev1.original else None,
        results.fev1.original.unit if results.fev1.original else None,
    )
    assert (pytest.approx(171.0 / 60.0), "L/s") == (results.fef25_75.value, results.fef25_75.unit)
    assert (pytest.approx(79.0), "%") == (results.fev1_fvc.value, results.fev1_fvc.unit)
    assert spiro.bronchodilator is not None and spiro.bronchodilator.dose is not None
    assert ("salbutamol", 400.0, "ug") == (
        spiro.bronchodilator.drug,
        spiro.bronchodilator.dose.value,
        spiro.bronchodilator.dose.unit,
    )
    assert ("acceptable", "usable") == tuple(m.fev1_status for m in spiro.pre.manoeuvres)
    assert "north_east_asian" == session.patient.ethnicity


@pytest.mark.parametrize(
    ("path", "value"),
    [
        (("pre", "manoeuvres", 0, "fev1_status"), "good"),  # not one of the three statuses
        (("pre", "results", "fev1"), {"value": "3.2", "unit": "L"}),  # text where a number goes
        (("pre", "results", "pev"), {"value": 8.4, "unit": "L/s"}),  # unknown field (a typo)
        (("bronchodilator",), {"dose": {"value": 400, "unit": "ug"}}),  # the drug is required
    ],
)
def test_the_schema_and_the_reader_refuse_the_same_spirometry(path, value):
    """A spirometry section the schema refuses is refused by the reader too."""
    doc = _doc()
    node = doc["spirometry"]
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    with pytest.raises(InputError):
        _read(doc)
    assert not VALIDATOR.is_valid(doc)


def test_a_flow_in_litres_is_refused_naming_the_field():
    """A PEF in L (a volume) is not a flow: one line naming the field."""
    doc = _doc()
    doc["spirometry"]["pre"]["results"]["pef"] = {"value": 8.4, "unit": "L"}
    with pytest.raises(UnitError) as caught:
        _read(doc)
    assert "spirometry.pre.results.pef.unit" in str(caught.value)


def test_an_ethnicity_outside_the_gli_2012_groups_is_refused():
    """Only the five GLI-2012 groups are ethnicities the equations know."""
    doc = _doc()
    doc["patient"]["ethnicity"] = "european"
    with pytest.raises(InputError):
        _read(doc)
    assert not VALIDATOR.is_valid(doc)


def test_every_sample_without_spirometry_reads_to_a_session_without_it():
    """The samples written before the section read as before: no spirometry, no ethnicity."""
    session = _read(SAMPLE)
    assert (None, None) == (session.spirometry, session.patient.ethnicity)
