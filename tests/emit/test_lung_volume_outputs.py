"""Static lung volumes in both outputs: a FHIR panel (hasMember) and an HL7 order group of their own (issue 25).

Checked with the official FHIR R4 JSON schema, hl7apy STRICT and python-hl7, all outside the project.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import hl7
import pytest

from bridge.emit.fhir import bundle_json
from bridge.emit.hl7v2 import to_oru
from bridge.emit.manifest import carried
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.errors import BlockedByFinding
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables.files import load_tables
from tests.core.test_codes_whole_report import loinc_check_digit
from tests.emit.test_spirometry_outputs import _resources, strict_order_codes

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
DOCUMENT = SAMPLES / "11-whole-report.json"  # the invented demo report: spirometry, lung volumes and DLCO
NOW = datetime(2026, 3, 10, 12, 0, 0, tzinfo=UTC)
LATER = datetime(2026, 3, 11, 9, 30, tzinfo=UTC)
TABLES = load_tables()
LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"
ROUTES = (Route("fhir", "si"), Route("hl7", "si"))

SYSTEM = EmitSettings().observation_system  # the identifier system of the default settings


@pytest.fixture(scope="module")
def outcome() -> Outcome:
    return process(DOCUMENT.read_bytes(), DOCUMENT.name, TABLES)


@pytest.fixture(scope="module")
def bundle(outcome: Outcome) -> dict[str, Any]:
    return json.loads(bundle_json(outcome, TABLES, EmitContext(now=NOW, units="si")))


def _by_code(bundle: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {r["code"]["coding"][0]["code"]: r for r in _resources(bundle, "Observation")}


# Every resource of this report valid R4: tests/emit/test_spirometry_outputs.py checks samples 10 and 11.


def test_the_lung_volumes_are_a_panel_the_report_lists(bundle):
    """DiagnosticReport.result lists the lung-volume panel beside the spirometry panels; it hasMember its results."""
    # source: FHIR R4 Observation.hasMember ("a reference to another resource ... that is a member of a group")
    panels = {r["code"]["text"]: r for r in _resources(bundle, "Observation") if "hasMember" in r}
    expected = {"Spirometry before bronchodilator", "Spirometry after bronchodilator", "Static lung volumes"}
    assert expected == set(panels)
    by_url = {e["fullUrl"]: e["resource"] for e in bundle["entry"]}
    listed = {r["reference"] for r in _resources(bundle, "DiagnosticReport")[0]["result"]}
    members = [by_url[m["reference"]] for m in panels["Static lung volumes"]["hasMember"]]
    assert 7 * 4 == len(members)  # seven volumes, each with predicted, per cent predicted and z-score
    assert not any(m["reference"] in listed for m in panels["Static lung volumes"]["hasMember"])


def test_published_codes_units_ranges_and_the_coded_method(bundle):
    """TLC: LOINC 19862-2 in litres with the GLI-2021 range; the method body plethysmography as SNOMED CT 28275007."""
    observations = _by_code(bundle)
    tlc = observations["19862-2"]
    # source: MII Lungenfunktion ValueSet mii-vs-lufu-lnc-tlc (LOINC 19862-2 "Total lung capacity")
    assert {"system": LOINC, "code": "19862-2", "display": "Total lung capacity"} == tlc["code"]["coding"][0]
    # source: UCUM (unitsofmeasure.org): L is the litre; 7.60 L as the lab sent it
    assert {"value": 7.60, "unit": "L", "system": "http://unitsofmeasure.org", "code": "L"} == tlc["valueQuantity"]
    assert tlc["referenceRange"][0]["low"]["value"] < 7.60 < tlc["referenceRange"][0]["high"]["value"]
    # source: MII profile mii-pr-lungenfunktion-bodyplethysmographie (SNOMED CT 28275007 Total body plethysmography)
    assert {"system": SNOMED, "code": "28275007"} == {
        k: v for k, v in tlc["method"]["coding"][0].items() if k in ("system", "code")
    }
    # RV 4.20 L above a GLI-2021 ULN near 3.5 L for this 66-year-old man: flagged high
    rv = observations["20146-7"]
    assert "H" == rv["interpretation"][0]["coding"][0]["code"]
    assert "method" not in observations["20145-9"]  # the predicted value is computed, not measured by a method


def test_every_lung_volume_loinc_code_is_well_formed_and_none_repeats(bundle):
    """Each LOINC code of the lung-volume items passes the LOINC mod 10 check digit; no code repeats in the report."""
    # source: LOINC Users' Guide, "Calculating Mod 10 check digits" (via tests/core/test_codes_whole_report.py)
    lv = [c for k, c in TABLES.codes.codes.items() if k.startswith("lv_") and c.system == "loinc"]
    assert len(lv) >= 10
    for code in lv:
        number, digit = code.code.split("-")
        assert int(digit) == loinc_check_digit(number), code.code
    codes = [c["code"] for r in _resources(bundle, "Observation") for c in r["code"]["coding"]]
    assert len(codes) == len(set(codes))


def test_the_oru_has_a_lung_volume_order_group_and_is_strict_valid(outcome, tmp_path):
    """One ORU: DLCO, spirometry before and after, then the lung volumes, each an order group; STRICT-valid."""
    # source: HL7 v2.5.1 message structure ORU_R01 as encoded in hl7apy (ORDER_OBSERVATION repeats)
    er7 = to_oru(outcome, TABLES, EmitContext(now=NOW))
    assert ["81458-2", "SPIRO-PRE", "SPIRO-POST", "LUNG-VOL"] == strict_order_codes(er7, tmp_path)
    # source: python-hl7, an independent parser: the TLC OBX carries the method in OBX-17 as SCT
    parsed = hl7.parse(er7)
    tlc = next(s for s in parsed.segments("OBX") if str(s[3][0][0]) == "19862-2")
    assert ("7.60", "L", "28275007", "SCT") == (str(tlc[5]), str(tlc[6][0][0]), str(tlc[17][0][0]), str(tlc[17][0][2]))


@pytest.mark.parametrize(("method", "code"), [("nitrogen_washout", "N2-WASHOUT"), ("helium_dilution", "HE-DILUTION")])
def test_the_other_methods_go_out_as_local_codes(method, code):
    """No SNOMED CT code was found for nitrogen washout or helium dilution: the local code, coding system L."""
    # source: HL7 v2.5.1 table 0396 (L: local general code)
    doc = json.loads(DOCUMENT.read_text())
    doc["lung_volumes"]["method"] = method
    changed = process(json.dumps(doc).encode(), "x.json", TABLES)
    parsed = hl7.parse(to_oru(changed, TABLES, EmitContext(now=NOW)))
    tlc = next(s for s in parsed.segments("OBX") if str(s[3][0][0]) == "19862-2")
    assert (code, "L") == (str(tlc[17][0][0]), str(tlc[17][0][2]))


def test_an_allowed_lung_volume_error_sends_the_group_preliminary():
    """RV above TLC allowed by the site: RV, the lung-volume panel and the report go out preliminary, never final."""
    # source: FHIR R4 ValueSet observation-status ("preliminary"); HL7 v2.5.1 tables 0085 and 0123 (P)
    doc = json.loads(DOCUMENT.read_text())
    doc["lung_volumes"]["rv"] = {"value": 7.90, "unit": "L"}  # above the TLC of 7.60 L
    with pytest.raises(BlockedByFinding, match="LUNG_VOLUMES_IMPOSSIBLE"):  # blocking by default: nothing is sent
        process(json.dumps(doc).encode(), "x.json", TABLES, now=NOW, routes=ROUTES)
    settings = PipelineSettings(allow=frozenset({"LUNG_VOLUMES_IMPOSSIBLE"}))
    allowed = process(json.dumps(doc).encode(), "x.json", TABLES, settings, now=NOW, routes=ROUTES)
    fhir = json.loads(next(p.data for p in allowed.payloads if p.kind == "fhir"))
    observations = {r["code"]["text"]: r for r in _resources(fhir, "Observation")}
    assert "preliminary" == observations["Residual volume"]["status"]
    assert "preliminary" == observations["Static lung volumes"]["status"]
    assert "preliminary" == _resources(fhir, "DiagnosticReport")[0]["status"]
    parsed = hl7.parse(next(p.data for p in allowed.payloads if p.kind == "hl7").decode())
    assert "P" == str(parsed.segments("OBR")[3][25])


def test_a_correction_without_erv_withdraws_it():
    """The lab's correction drops ERV: its result sent before goes out entered-in-error (FHIR) and D (HL7)."""
    # source: FHIR R4 CodeSystem observation-status ("entered-in-error"); HL7 v2.5.1 table 0085 (D deletes the OBX)
    original = process(DOCUMENT.read_bytes(), "first.json", TABLES, now=NOW, routes=ROUTES)
    sent = tuple((c.identifier_value, c.status) for p in original.payloads for c in carried(p, SYSTEM))
    doc = json.loads(DOCUMENT.read_text())
    del doc["lung_volumes"]["erv"]
    correction = process(json.dumps(doc).encode(), "second.json", TABLES)
    context = EmitContext(now=LATER, units="si", correction=True, earlier=sent)
    fhir = json.loads(bundle_json(correction, TABLES, context))
    erv = next(r for r in _resources(fhir, "Observation") if r["identifier"][0]["value"].endswith(".lv_erv"))
    assert "entered-in-error" == erv["status"] and "valueQuantity" not in erv
    parsed = hl7.parse(to_oru(correction, TABLES, context))
    erv_obx = next(s for s in parsed.segments("OBX") if str(s[3][0][0]) == "ERV")
    assert ("D", "") == (str(erv_obx[11]), str(erv_obx[5]))
