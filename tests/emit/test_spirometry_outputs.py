"""Spirometry in both outputs: a FHIR panel per phase (hasMember) and an HL7 order group per phase (24.3).

Checked with the official FHIR R4 JSON schema, hl7apy STRICT and python-hl7, all outside the project.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import hl7
import pytest
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message

from bridge.emit.fhir import bundle_json
from bridge.emit.hl7v2 import to_oru
from bridge.emit.settings import EmitContext
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables.files import load_tables
from tests.fhir_schema import ResourceValidators, load_fhir_schema
from tests.fhir_schema import errors as schema_errors

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
DOCUMENT = SAMPLES / "10-spirometry-and-dlco.json"  # the invented demo report: spirometry and DLCO
DLCO_ONLY = SAMPLES / "01-healthy-adult.json"
NOW = datetime(2026, 3, 10, 12, 0, 0, tzinfo=UTC)
TABLES = load_tables()
LOINC = "http://loinc.org"
# hl7apy's copy of table 0396 lacks UCUM (OBX-6 by convention) and SCT (the DLCO items' standard code
# and method), which the HL7-maintained table lists  # from memory, as tests/emit/test_hl7v2.py
ALLOWED_WARNINGS = {
    "Warning: Value UCUM not in table HL70396 in element OBX_6.CE_3",
    "Warning: Value SCT not in table HL70396 in element OBX_3.CE_6",
    "Warning: Value SCT not in table HL70396 in element OBX_17.CE_3",
}


@pytest.fixture(scope="module")
def outcome() -> Outcome:
    return process(DOCUMENT.read_bytes(), DOCUMENT.name, TABLES)


@pytest.fixture(scope="module")
def bundle(outcome: Outcome) -> dict[str, Any]:
    return json.loads(bundle_json(outcome, TABLES, EmitContext(now=NOW, units="si")))


def _resources(bundle: dict[str, Any], kind: str) -> list[dict[str, Any]]:
    return [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == kind]


def strict_order_codes(er7: str, tmp_path: Path) -> list[str]:
    """OBR-4 of each order group, once hl7apy STRICT has validated the message with no warning but the known ones."""
    # source: HL7 v2.5.1 message structure ORU_R01 as encoded in hl7apy (ORDER_OBSERVATION repeats)
    report = tmp_path / "report.txt"
    message = parse_message(er7, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    assert message.validate(report_file=str(report))
    assert set() == {line for line in report.read_text().splitlines() if line} - ALLOWED_WARNINGS
    return [o.obr.obr_4.obr_4_1.value for o in message.oru_r01_patient_result.oru_r01_order_observation]


def _by_text(bundle: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {r["code"]["text"]: r for r in _resources(bundle, "Observation")}


@pytest.mark.parametrize("units", ["si", "traditional"])
@pytest.mark.parametrize("correction", [False, True])
@pytest.mark.parametrize("sample", ["10-spirometry-and-dlco.json", "11-whole-report.json"])
def test_every_resource_is_valid_r4(sample, units, correction):
    """Each resource of the Bundle, panels included, validates against the official FHIR R4 JSON schema."""
    # source: HL7 FHIR R4 fhir.schema.json (official JSON schema), via its discriminator mapping
    validators = ResourceValidators(load_fhir_schema())
    outcome = process((DOCUMENT.parent / sample).read_bytes(), sample, TABLES)
    data = json.loads(bundle_json(outcome, TABLES, EmitContext(now=NOW, units=units, correction=correction)))
    found = [m for e in data["entry"] for m in schema_errors(validators[e["resource"]["resourceType"]], e["resource"])]
    assert [] == found


def test_each_phase_is_a_panel_the_report_lists(bundle):
    """DiagnosticReport.result: the DLCO results and one panel per phase, each panel hasMember its results."""
    # source: FHIR R4 Observation.hasMember ("a reference to another resource ... that is a member of a group")
    panels = {r["code"]["text"]: r for r in _resources(bundle, "Observation") if "hasMember" in r}
    assert {"Spirometry before bronchodilator", "Spirometry after bronchodilator"} == set(panels)
    urls = {
        e["resource"]["identifier"][0]["value"]: e["fullUrl"] for e in bundle["entry"] if "identifier" in e["resource"]
    }
    listed = {r["reference"] for r in _resources(bundle, "DiagnosticReport")[0]["result"]}
    by_url = {e["fullUrl"]: e["resource"] for e in bundle["entry"]}
    for panel in panels.values():
        panel_url = urls[panel["identifier"][0]["value"]]
        assert panel_url in listed
        members = [by_url[m["reference"]] for m in panel["hasMember"]]
        assert members and all("valueQuantity" in m or "dataAbsentReason" in m for m in members)
        assert not any(m["reference"] in listed for m in panel["hasMember"])  # members are reached through the panel
        assert "valueQuantity" not in panel


def test_verified_loinc_codes_units_ranges_and_z_scores(bundle):
    """FEV1 before the bronchodilator: LOINC 20157-4, litres in UCUM, the GLI Global range, its z-score beside it."""
    observations = _by_text(bundle)
    fev1 = observations["FEV1 --pre bronchodilation"]
    # source: PFT IG, profile ForcedExpiratoryVolume1SecPreBronchodilator; LOINC 20157-4
    assert {"system": LOINC, "code": "20157-4", "display": "FEV1 --pre bronchodilation"} == fev1["code"]["coding"][0]
    # source: UCUM (unitsofmeasure.org): L is the litre
    assert {"value": 1.92, "unit": "L", "system": "http://unitsofmeasure.org", "code": "L"} == fev1["valueQuantity"]
    assert fev1["referenceRange"][0]["low"]["value"] < 1.92 < fev1["referenceRange"][0]["high"]["value"]
    z = observations["FEV1 z-score, before bronchodilator"]
    assert "{Zscore}" == z["valueQuantity"]["code"]
    # source: PFT IG, ForcedVitalCapacityPostBronchodilator_PercentOfPredicted; LOINC 19873-9
    assert "19873-9" == observations["FVC post bronchodilation measured/predicted"]["code"]["coding"][0]["code"]


def test_no_code_repeats_under_the_report(bundle):
    """A concept charted twice would be overwritten by receivers: every Observation code differs."""
    codes = [c["code"] for r in _resources(bundle, "Observation") for c in r["code"]["coding"]]
    assert len(codes) == len(set(codes))


def test_the_oru_has_an_order_group_per_test_group_and_is_strict_valid(outcome, tmp_path):
    """One ORU: the DLCO OBR first, then an OBR per phase with its OBX, valid under hl7apy STRICT."""
    # source: HL7 v2.5.1 message structure ORU_R01 as encoded in hl7apy (ORDER_OBSERVATION repeats)
    er7 = to_oru(outcome, TABLES, EmitContext(now=NOW))
    assert ["81458-2", "SPIRO-PRE", "SPIRO-POST"] == strict_order_codes(er7, tmp_path)
    # source: python-hl7, an independent parser: set ids restart at 1 in each order group
    parsed = hl7.parse(er7)
    obr_set_ids = [str(s[1]) for s in parsed.segments("OBR")]
    assert ["1", "2", "3"] == obr_set_ids


def test_a_dlco_only_outcome_has_one_order_group_and_no_panel():
    """Without spirometry the outputs keep their one OBR and list every result in the report, as before."""
    plain = process(DLCO_ONLY.read_bytes(), DLCO_ONLY.name, TABLES)
    parsed = hl7.parse(to_oru(plain, TABLES, EmitContext(now=NOW)))
    data = json.loads(bundle_json(plain, TABLES, EmitContext(now=NOW)))
    assert 1 == len(parsed.segments("OBR"))
    assert [] == [r for r in _resources(data, "Observation") if "hasMember" in r]


def test_an_allowed_error_sends_the_phase_preliminary():
    """FEV1 above FVC allowed by the site: that value, its panel and the report go out preliminary, never final."""
    # source: FHIR R4 ValueSet observation-status ("preliminary"); HL7 v2.5.1 tables 0085 and 0123 (P)
    doc = json.loads(DOCUMENT.read_text())
    doc["spirometry"]["pre"]["results"]["fev1"] = {"value": 3.25, "unit": "L"}  # above the FVC of 3.05 L
    settings = PipelineSettings(allow=frozenset({"SPIROMETRY_IMPOSSIBLE_VOLUMES"}))
    routes = (Route("fhir", "si"), Route("hl7", "si"))
    outcome = process(json.dumps(doc).encode(), "x.json", TABLES, settings, now=NOW, routes=routes)
    fhir = json.loads(next(p.data for p in outcome.payloads if p.kind == "fhir"))
    observations = _by_text(fhir)
    assert "preliminary" == observations["FEV1 --pre bronchodilation"]["status"]
    assert "preliminary" == observations["Spirometry before bronchodilator"]["status"]
    assert "preliminary" == _resources(fhir, "DiagnosticReport")[0]["status"]
    parsed = hl7.parse(next(p.data for p in outcome.payloads if p.kind == "hl7").decode())
    assert "P" == str(parsed.segments("OBR")[1][25])


@pytest.mark.parametrize(("code", "status"), [("P", "preliminary"), ("X", None)])
def test_the_labs_status_of_a_spirometry_value(code, status):
    """lab_status on spirometry.post.results.fev1: P sends it preliminary, X leaves it out (HL7 table 0085)."""
    # source: HL7 v2.5.1 table 0085: P preliminary results, X results cannot be obtained for this observation
    doc = json.loads(DOCUMENT.read_text())
    doc["lab_status"] = {"spirometry.post.results.fev1": code}
    outcome = process(json.dumps(doc).encode(), "x.json", TABLES, now=NOW, routes=(Route("fhir", "si"),))
    observations = _by_text(json.loads(outcome.payloads[0].data))
    fev1 = observations.get("FEV1 --post bronchodilation")
    assert status == (fev1["status"] if fev1 is not None else None)
