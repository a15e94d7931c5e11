"""Issue 10, outputs: GLI-2017 predicted, limits of normal, z-scores and the reference set reach FHIR and HL7 v2.

The pft vignette man goes through the one pipeline (``process`` with routes) into both outputs;
the outputs are read back with independent readers (json, python-hl7, hl7apy STRICT, the R4 schema).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import hl7
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message

from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables import Tables
from tests.fhir_schema import bundle_errors, shared_validators

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
BOTH = (Route("fhir", "traditional"), Route("hl7", "traditional"))
# hl7apy's copy of table 0396 lacks UCUM and SCT (see tests/emit/test_hl7v2.py)
ALLOWED_WARNINGS = {
    "Warning: Value UCUM not in table HL70396 in element OBX_6.CE_3",
    "Warning: Value SCT not in table HL70396 in element OBX_3.CE_6",
    "Warning: Value SCT not in table HL70396 in element OBX_17.CE_3",
}


def _outputs(document: dict[str, Any], tables: Tables) -> tuple[dict[str, Any], str]:
    outcome = process(json.dumps(document).encode(), "variant.json", tables, PipelineSettings(), now=NOW, routes=BOTH)
    by_kind = {p.kind: p.data for p in outcome.payloads}
    return json.loads(by_kind["fhir"]), by_kind["hl7"].decode("utf-8")


def _sample(name: str) -> dict[str, Any]:
    document: dict[str, Any] = json.loads((SAMPLES / f"{name}.json").read_text(encoding="utf-8"))
    return document


def _vignette_man() -> dict[str, Any]:
    """The man of the pft vignette: 45 y (and a day), 178 cm, DLCO 22.0 mL/min/mmHg, VA 6.5 L, at sea level."""
    document = _sample("01-healthy-adult")
    document["patient"].update(sex="male", birth_date="1981-03-01", height={"value": 178, "unit": "cm"})
    document["performed_at"] = "2026-03-02T09:15:00+00:00"
    document["conditions"].pop("barometric_pressure", None)
    document["manoeuvres"] = []
    document["results"] = {"dlco": {"value": 22.0, "unit": "mL/min/mm[Hg]"}, "va": {"value": 6.5, "unit": "L"}}
    return document


def _observations(bundle: dict[str, Any], code: str) -> list[dict[str, Any]]:
    return [
        e["resource"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation" and e["resource"]["code"]["coding"][0]["code"] == code
    ]


def _obx(er7: str, code: str) -> list[Any]:
    return [obx for obx in hl7.parse(er7).segments("OBX") if str(obx[3][0][0]) == code]


def test_vignette_man_fhir_range_flag_and_items(tables: Tables):
    """FHIR: DLCO range 23.4-38.3 named GLI-2017, flag L, predicted 30.3, 73 %, z -2.01 {Zscore}."""
    bundle, _ = _outputs(_vignette_man(), tables)
    (dlco,) = _observations(bundle, "19911-7")  # source: LOINC 19911-7 DLCO

    # source: R package pft, vignette "diffusion capacity": predicted 30.3, LLN 23.4, ULN 38.3 mL/min/mmHg
    rng = dlco["referenceRange"][0]
    assert (23.4, 38.3) == (float(rng["low"]["value"]), float(rng["high"]["value"]))
    assert rng["text"].startswith("GLI-2017")
    # source: HL7 v3 ObservationInterpretation L (below the LLN: z -2.01 < -1.645)
    assert "L" == dlco["interpretation"][0]["coding"][0]["code"]
    # source: LOINC 19910-9 DLCO predicted, 98130-8 DLCO/predicted
    assert [30.3] == [float(o["valueQuantity"]["value"]) for o in _observations(bundle, "19910-9")]
    assert [73] == [int(o["valueQuantity"]["value"]) for o in _observations(bundle, "98130-8")]  # 100 x 22.0 / 30.32
    (z,) = _observations(bundle, "DLCO-Z")
    # by hand (LMS, L 0.39482, M 30.317, S 0.14972): ((22.0 / 30.317)^0.39482 - 1) / (0.39482 x 0.14972) = -2.01
    assert (-2.01, "{Zscore}") == (float(z["valueQuantity"]["value"]), z["valueQuantity"]["code"])
    assert [] == bundle_errors(bundle, shared_validators())  # source: official FHIR R4 JSON schema


def test_vignette_man_hl7_range_flag_rows_and_notes(tables: Tables, tmp_path: Path):
    """HL7: OBX-7 23.4-38.3, OBX-8 L, predicted and %pred OBX rows, an NTE naming GLI-2017 and the band; STRICT."""
    _, er7 = _outputs(_vignette_man(), tables)
    (dlco,) = _obx(er7, "19911-7")

    # source: HL7 v2.5.1 ch. 7, OBX-7 "lower-upper", OBX-8 table 0078 L  # from memory
    assert ("23.4-38.3", "L") == (str(dlco[7]), str(dlco[8]))
    assert ["30.3"] == [str(obx[5]) for obx in _obx(er7, "19910-9")]
    assert ["73"] == [str(obx[5]) for obx in _obx(er7, "98130-8")]
    notes = [str(nte[3]) for nte in hl7.parse(er7).segments("NTE")]
    assert any("GLI-2017" in n and "DLCO z -2.01 (mild)" in n for n in notes)
    # source: HL7 v2.5.1 ORU_R01 as encoded in hl7apy, STRICT validation
    report = tmp_path / "report.txt"
    message = parse_message(er7, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    assert message.validate(report_file=str(report))
    assert set() == {line for line in report.read_text().splitlines() if line} - ALLOWED_WARNINGS


def test_one_set_of_predicted_values_is_charted_the_other_is_a_note(tables: Tables):
    """Sample 01 sent its own predicted values: one 19910-9 is charted (GLI-2017 by default), the lab's is a note."""
    # source: HL7 v2.5.1 ch. 7, OBX-4: OBX segments with the same OBX-3 under one OBR are told apart
    # by OBX-4 (receivers that ignore it overwrite one with the other): one value per code instead
    bundle, er7 = _outputs(_sample("01-healthy-adult"), tables)
    (predicted,) = _observations(bundle, "19910-9")
    notes = [n["text"] for o in _observations(bundle, "DLCO-PB-ADJ") for n in o["note"]]

    assert "dlco_predicted" == predicted["identifier"][0]["value"].rsplit(".", 1)[1]
    assert "GLI-2017 (Stanojevic" in " ".join(n["text"] for n in predicted["note"])
    # the lab's 10.15 mmol/min/kPa in traditional units: 10.15 x 2.987 = 30.32  # source: ERS/ATS 2017 factor
    assert any(n.startswith("The lab's reference values (GLI 2017 (TLCO, Caucasian))") and "30.32" in n for n in notes)
    assert 1 == len(_obx(er7, "19910-9"))


def test_outside_the_equations_gli_results_are_sent_as_absent(tables: Tables):
    """A 3-year-old: GLI-2017 predicted, per cent and z-score go out without a value, saying why; no range."""
    # source: Stanojevic et al., ERJ 2017;50:1700010: equations for ages 5-85 y; FHIR R4 Observation
    # dataAbsentReason (obs-6: only without a value), CodeSystem data-absent-reason "not-applicable";
    # HL7 v2.5.1 table 0085 X "results cannot be obtained for this observation"
    document = _sample("01-healthy-adult")
    document["patient"]["birth_date"] = "2023-01-01"
    document["results"].pop("predicted")
    bundle, er7 = _outputs(document, tables)
    (dlco,) = _observations(bundle, "DLCO-PB-ADJ")
    report = next(e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "DiagnosticReport")
    absent = _observations(bundle, "DLCO-Z") + _observations(bundle, "19910-9") + _observations(bundle, "98130-8")

    assert "referenceRange" not in dlco
    assert 3 == len(absent)
    assert [("not-applicable", False)] * 3 == [
        (o["dataAbsentReason"]["coding"][0]["code"], "valueQuantity" in o) for o in absent
    ]
    assert all("age" in o["dataAbsentReason"]["text"] for o in absent)
    assert ["X", "X", "X"] == [str(obx[11]) for code in ("19910-9", "98130-8", "DLCO-Z") for obx in _obx(er7, code)]
    assert "REFERENCE_NOT_COMPUTED" in report["conclusion"]
    assert [] == bundle_errors(bundle, shared_validators())  # source: official FHIR R4 JSON schema


def test_report_summary_names_the_limit_and_its_set(tables: Tables):
    """The DiagnosticReport's first line says DLCO is below the GLI-2017 LLN (22.0 < 23.4) and names the set."""
    # source: R package pft vignette, LLN 23.4 mL/min/mmHg for this man
    bundle, _ = _outputs(_vignette_man(), tables)
    report = next(e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "DiagnosticReport")
    first = report["conclusion"].splitlines()[0]

    assert first.startswith("DLCO 22.0 mL/min/mm[Hg], below the lower limit of normal (23.4; GLI-2017")
