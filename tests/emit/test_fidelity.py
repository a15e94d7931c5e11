"""Issue 8, the numbers: what reaches a chart is as precise, adjusted and checked as the lab meant.

Every session goes through the one pipeline (``process`` with routes), as ``convert`` and the
service run it; both outputs are parsed back with independent readers (json, python-hl7).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import hl7
import pytest

from bridge.display.check_report import outcome_json, outcome_text
from bridge.emit.settings import EmitSettings
from bridge.errors import BlockedByFinding
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables import Tables

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
BOTH = (Route("fhir", "traditional"), Route("hl7", "traditional"))


def _outputs(name: str, tables: Tables, settings: PipelineSettings, routes=BOTH) -> tuple[dict[str, Any], Any]:
    """(Bundle as JSON, ORU parsed by python-hl7) of one sample."""
    outcome = process((SAMPLES / name).read_bytes(), name, tables, settings, now=NOW, routes=routes)
    by_kind = {p.kind: p.data for p in outcome.payloads}
    return json.loads(by_kind["fhir"]), hl7.parse(by_kind["hl7"].decode("utf-8"))


def _observation(bundle: dict[str, Any], loinc: str, which: int | None = None) -> dict[str, Any]:
    """The one Observation with this code; with ``which``, the which-th of several (GLI-2017's, then the lab's)."""
    found = [
        e["resource"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation" and e["resource"]["code"]["coding"][0]["code"] == loinc
    ]
    if which is not None:
        return found[which]
    assert 1 == len(found)
    return found[0]


def _obx_and_ntes(message: Any, code: str, which: int = 0) -> tuple[Any, list[str]]:
    """The (which-th) OBX whose OBX-3 identifier is ``code`` and the NTE-3 texts that follow it."""
    segments = list(message)
    i = [i for i, s in enumerate(segments) if str(s[0]) == "OBX" and str(s[3]).startswith(code + "^")][which]
    notes = []
    for s in segments[i + 1 :]:
        if str(s[0]) != "NTE":
            break
        notes.append(str(s[3]))
    return segments[i], notes


def _full_url(bundle: dict[str, Any], loinc: str) -> str:
    return next(
        e["fullUrl"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation" and e["resource"]["code"]["coding"][0]["code"] == loinc
    )


def test_wrong_direction_session_is_refused_by_default(tables: Tables):
    """Sample 09 carries an ERROR finding: with the default settings nothing is emitted for it."""
    with pytest.raises(BlockedByFinding, match="HB_ADJUSTMENT_WRONG_DIRECTION"):
        _outputs("09-legacy-hb-wrong-direction.json", tables, PipelineSettings())


def test_bridge_hb_adjusted_dlco_replaces_the_labs_wrong_value(tables: Tables):
    """Sample 09 allowed through: 19913-3 is the bridge's 19.6, derived from DLCO and Hb, never the lab's 15.5."""
    # source: Cotes adjustment as adopted by the ERS/ATS 2017 DLCO standard, men from 15 y:
    #   DLCO x (10.22 + Hb) / (1.7 x Hb). Hand computation: male, 67 y, Hb 11.2 g/dL, DLCO 17.4:
    #   (10.22 + 11.2) / (1.7 x 11.2) = 21.42 / 19.04 = 1.12500; 17.4 x 1.125 = 19.575 -> 19.6
    #   (the lab's 15.5 is 17.4 / 1.125 = 15.47: the factor applied the wrong way round)
    settings = PipelineSettings(allow=frozenset({"HB_ADJUSTMENT_WRONG_DIRECTION"}))
    bundle, message = _outputs("09-legacy-hb-wrong-direction.json", tables, settings)
    adjusted = _observation(bundle, "19913-3")  # source: LOINC 19913-3, DLCO adjusted for hemoglobin
    obx, ntes = _obx_and_ntes(message, "19913-3")

    assert 19.6 == adjusted["valueQuantity"]["value"]
    # Hb is a blood result the adjustment used, contained in the adjusted value and named in its
    # derivedFrom beside the DLCO Observation (FHIR R4 Resource.contained, references "#id").
    assert {_full_url(bundle, "19911-7"), "#hb"} == {r["reference"] for r in adjusted["derivedFrom"]}
    hb = [c for c in adjusted["contained"] if c["code"]["coding"][0]["code"] == "718-7"]  # source: LOINC 718-7
    assert [11.2] == [c["valueQuantity"]["value"] for c in hb]
    assert any("dlco-bridge" in n["text"] and "15.5" in n["text"] for n in adjusted["note"])
    assert any("HB_ADJUSTMENT_WRONG_DIRECTION" in n["text"] for n in adjusted["note"])
    # source: HL7 v2.5.1 ch. 7, OBX-5 observation value
    assert "19.6" == str(obx[5])
    assert any("dlco-bridge" in text for text in ntes)
    assert "15.5" not in [str(s[5]) for s in message if str(s[0]) == "OBX"]


def test_bridge_hb_adjusted_dlco_is_emitted_whenever_hb_is_known(tables: Tables):
    """Sample 01 reports Hb but no Hb-adjusted DLCO: the bridge's own value goes out as 19913-3."""
    # source: LOINC 19913-3; Cotes form of the ERS/ATS 2017 standard (hand value in the test above)
    bundle, message = _outputs("01-healthy-adult.json", tables, PipelineSettings())
    adjusted = _observation(bundle, "19913-3")

    assert "final" == adjusted["status"]
    assert any("dlco-bridge" in n["text"] for n in adjusted["note"])
    assert _obx_and_ntes(message, "19913-3")[0] is not None


def test_altitude_percent_predicted_in_both_outputs(tables: Tables):
    """Sample 03 at 615 mmHg, the lab's values charted: DLCO and KCO 100 and 97 % (at sea level), not 110 and 107."""
    # source: ERS/ATS 2017 DLCO standard (measured value adjusted to sea level before comparison;
    #   PIO2 = 0.21 (PB - 47)). Hand computation: 1 + 0.0031 x (0.21 x 568 - 150) = 0.904768;
    #   DLCO 36.4 x 0.904768 / 33.0 = 99.8 % -> 100; KCO 5.13 x 0.904768 / 4.79 = 96.9 % -> 97
    settings = PipelineSettings(emit=EmitSettings(charted_predicted="lab"))
    bundle, message = _outputs("03-high-altitude.json", tables, settings)

    # source: LOINC 98130-8 (DLCO/predicted) and 98203-3 (KCO/predicted): one of each, the lab's
    assert 100 == _observation(bundle, "98130-8")["valueQuantity"]["value"]
    assert 97 == _observation(bundle, "98203-3")["valueQuantity"]["value"]
    assert "100" == str(_obx_and_ntes(message, "98130-8")[0][5])
    assert "97" == str(_obx_and_ntes(message, "98203-3")[0][5])


def test_si_dlco_keeps_its_resolution_in_traditional_outputs(tables: Tables):
    """Sample 04's 6.1 mmol/min/kPa goes out as 18.2 mL/min/mm[Hg] in both outputs, not 18."""
    # source: NIST SP 811 (2008) B.7.2; 6.1 x 2.987 = 18.2207 -> 18.2
    bundle, message = _outputs("04-raised-cohb.json", tables, PipelineSettings())

    assert 18.2 == _observation(bundle, "19911-7")["valueQuantity"]["value"]
    assert "18.2" == str(_obx_and_ntes(message, "19911-7")[0][5])


SI = (Route("fhir", "si"), Route("hl7", "si"))


def test_si_destination_gets_its_finding_notes_in_si(tables: Tables):
    """Sample 04 to an SI destination: the COHb note names the adjusted DLCO in mmol/min/kPa, in FHIR and in NTE."""
    # source: ATS/ERS 2005 DLCO standard, COHb adjustment to a 2 % baseline (from memory); hand computation:
    #   6.1 mmol/min/kPa x 100 / (102 - 8.5) = 6.524 -> 6.52 mmol/min/kPa (not 19.5 mL/min/mmHg)
    bundle, message = _outputs("04-raised-cohb.json", tables, PipelineSettings(), SI)
    # COHb is a blood value carried with the test, not an Observation of it: its finding is a
    # report-level note (FHIR R4 DiagnosticReport.conclusion) and an NTE of the message.
    report = next(e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "DiagnosticReport")
    cohb_notes = [line for line in report["conclusion"].splitlines() if "COHB_RAISED" in line]
    ntes = [str(s[3]) for s in message if str(s[0]) == "NTE" and "COHB_RAISED" in str(s[3])]

    assert 1 == len(cohb_notes) == len(ntes)
    assert any("6.52 mmol/min/kPa" in text for text in cohb_notes)
    assert any("6.52 mmol/min/kPa" in text for text in ntes)
    assert not any("mm[Hg]" in text or "mmHg" in text for text in cohb_notes + ntes)


@pytest.mark.parametrize(("unit", "expected"), [("g/L", 152), ("g/dL", 15.2)])
def test_haemoglobin_goes_out_in_the_unit_the_site_chose(tables: Tables, unit: str, expected: float):
    """Hb 152 g/L is sent as 152 g/L or 15.2 g/dL, as [emit] hemoglobin_unit says, in both outputs."""
    # source: 1 g/dL = 10 g/L (SI prefixes); LOINC 718-7 haemoglobin mass/volume; UCUM g/L, g/dL
    settings = PipelineSettings(emit=EmitSettings(hemoglobin_unit=unit))
    bundle, message = _outputs("04-raised-cohb.json", tables, settings, SI)
    # Hb travels contained in the DLCO adjusted with it (FHIR R4 Resource.contained) and as the
    # NTE after that value's OBX in HL7, in the unit the site chose.
    adjusted = _observation(bundle, "19913-3")  # source: LOINC 19913-3 DLCO adjusted for hemoglobin
    hb = [c["valueQuantity"] for c in adjusted["contained"] if c["code"]["coding"][0]["code"] == "718-7"]
    _, ntes = _obx_and_ntes(message, "19913-3")

    assert [(expected, unit)] == [(q["value"], q["code"]) for q in hb]
    assert any(f"{expected} {unit} (718-7)" in text for text in ntes)


def test_check_shows_findings_in_the_chosen_units(tables: Tables):
    """check --units si says the COHb-adjusted DLCO of sample 04 in mmol/min/kPa, in text and JSON."""
    # hand computation as above: 6.1 x 100 / 93.5 = 6.52 mmol/min/kPa
    outcome = process((SAMPLES / "04-raised-cohb.json").read_bytes(), "04-raised-cohb.json", tables)
    text = outcome_text(outcome, tables, "si")
    cohb = next(f for f in outcome_json(outcome, tables, "si")["findings"] if f["code"] == "COHB_RAISED")

    assert "6.52 mmol/min/kPa" in text
    assert "6.52 mmol/min/kPa" in cohb["message"]
