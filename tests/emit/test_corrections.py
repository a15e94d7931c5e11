"""Corrections: what a correction replaces is corrected, what it no longer gives is withdrawn, what is new is final.

What was sent before reaches the emitters as the ledger keeps it: (identifier, status as sent)
pairs, here taken from what the original payloads carried. All data is invented (samples/).
"""

from __future__ import annotations

import hashlib
import json
from datetime import UTC, datetime
from decimal import Decimal
from pathlib import Path
from typing import Any

import hl7
from fhir.resources.R4B.bundle import Bundle
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message

from bridge.emit.fhir import to_bundle
from bridge.emit.fhir_json import dumps
from bridge.emit.hl7v2 import to_oru
from bridge.emit.manifest import carried
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.model import Outcome
from bridge.pipeline import Route, process
from bridge.tables import Tables
from tests.conftest import SAMPLES
from tests.emit.test_hl7v2 import ALLOWED_WARNINGS
from tests.fhir_schema import bundle_errors, shared_validators

NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
LATER = datetime(2026, 3, 11, 9, 30, tzinfo=UTC)
ROUTES = (Route("fhir", "si"), Route("hl7", "si"))
CONDITIONAL_CREATE = EmitSettings(patient_reference="conditional-create")
SYSTEM = EmitSettings().observation_system  # the identifier system the tests' contexts use
PREFIX = "lowmarsh-respiratory-physiology-lab-fictional.LOW-2026-0001."  # lab slug and test id of sample 01


def _document(**change: Any) -> dict[str, Any]:
    document: dict[str, Any] = json.loads((SAMPLES / "01-healthy-adult.json").read_bytes())
    for key, value in change.items():
        document[key] = value
    return document


def _without_hb(document: dict[str, Any]) -> bytes:
    conditions = {k: v for k, v in document["conditions"].items() if k != "hemoglobin"}
    return json.dumps({**document, "conditions": conditions}).encode()


def _sent(outcome: Outcome) -> tuple[tuple[str, str], ...]:
    """What the original's payloads carried: (identifier, status), as the ledger records it."""
    return tuple((c.identifier_value, c.status) for p in outcome.payloads for c in carried(p, SYSTEM))


def _original(tables: Tables) -> Outcome:
    return process(json.dumps(_document()).encode(), "first.json", tables, now=NOW, routes=ROUTES)


def _by_key(bundle: dict[str, Any]) -> dict[str, dict[str, Any]]:
    found = {}
    for entry in bundle["entry"]:
        resource = entry["resource"]
        if resource["resourceType"] in ("Observation", "DiagnosticReport"):
            found[resource["identifier"][0]["value"].removeprefix(PREFIX)] = entry
    return found


def _correction_context(earlier: tuple[tuple[str, str], ...]) -> EmitContext:
    return EmitContext(now=LATER, units="si", correction=True, site=CONDITIONAL_CREATE, earlier=earlier)


def test_the_original_carries_its_identifiers_and_statuses(tables: Tables) -> None:
    """The original's payloads carry every Observation and the report as final, and each OBX as F."""
    original = _original(tables)
    fhir, oru = original.payloads
    statuses = {(c.resource_type, c.status) for c in carried(fhir, SYSTEM)}

    assert {("Observation", "final"), ("DiagnosticReport", "final"), ("Provenance", "")} == statuses
    assert {"F"} == {c.status for c in carried(oru, SYSTEM)}
    assert f"{PREFIX}dlco_hb_adjusted" in {c.identifier_value for c in carried(oru, SYSTEM)}


def test_a_correction_without_hb_withdraws_the_hb_adjusted_dlco_in_fhir(tables: Tables) -> None:
    """Hb removed: the Hb-adjusted DLCO goes out entered-in-error by conditional update, the rest corrected."""
    # source: FHIR R4 CodeSystem observation-status ("entered-in-error": withdrawn following
    # previous final release; "corrected": subsequent to being final, modified); FHIR R4
    # http.html#cond-update (PUT Type?identifier=... replaces the one match)
    original = _original(tables)
    correction = process(_without_hb(_document()), "second.json", tables)
    bundle = json.loads(dumps(to_bundle(correction, tables, _correction_context(_sent(original))), indent=False))
    entries = _by_key(bundle)
    withdrawn = entries["dlco_hb_adjusted"]
    report = entries["report"]["resource"]

    assert "entered-in-error" == withdrawn["resource"]["status"]
    assert "valueQuantity" not in withdrawn["resource"]
    assert withdrawn["request"] == {"method": "PUT", "url": f"Observation?{withdrawn['request']['url'].split('?')[1]}"}
    assert withdrawn["request"]["url"].endswith("dlco_hb_adjusted")
    assert {"corrected"} == {e["resource"]["status"] for k, e in entries.items() if k != "dlco_hb_adjusted"}
    assert withdrawn["fullUrl"] not in {r["reference"] for r in report["result"]}
    assert [] == bundle_errors(bundle, shared_validators())  # source: official FHIR R4 JSON schema
    Bundle.model_validate(bundle)  # source: fhir.resources R4B models


def test_a_correction_without_hb_deletes_the_obx_in_hl7(tables: Tables, tmp_path: Path) -> None:
    """HL7: the Hb-adjusted DLCO's OBX goes out with OBX-11 D and no value; the others C; valid ORU_R01."""
    # source: HL7 v2.5.1 table 0085 (D "Deletes the OBX record", C "replaces a final result"),
    # ch. 7 OBX; message structure ORU_R01 as hl7apy STRICT encodes it
    original = _original(tables)
    correction = process(_without_hb(_document()), "second.json", tables)
    er7 = to_oru(correction, tables, _correction_context(_sent(original)))
    report = tmp_path / "report.txt"
    parsed = parse_message(er7, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    message = hl7.parse(er7)
    by_code = {str(obx(3)(1)(1)): obx for obx in message.segments("OBX")}
    hb_adjusted = tables.codes.codes["dlco_hb_adjusted"].code

    assert parsed.validate(report_file=str(report))
    assert set() == {line for line in report.read_text().splitlines() if line} - ALLOWED_WARNINGS
    assert ("D", "") == (str(by_code[hb_adjusted](11)), str(by_code[hb_adjusted](5)))
    assert {"C"} == {str(obx(11)) for code, obx in by_code.items() if code != hb_adjusted}
    assert "C" == str(message.segment("OBR")(25))


def test_a_result_sent_for_the_first_time_in_a_correction_is_final(tables: Tables) -> None:
    """A correction that now gives a result the original did not is final there, not corrected."""
    # source: FHIR R4 CodeSystem observation-status: "corrected" is "subsequent to being final"
    original = _original(tables)
    earlier = tuple((ident, status) for ident, status in _sent(original) if not ident.endswith(".va"))
    correction = process(json.dumps(_document()).encode(), "second.json", tables)
    entries = _by_key(to_bundle(correction, tables, _correction_context(earlier)))
    notes = [n["text"] for n in entries["va"]["resource"].get("note", [])]

    assert ("final", "corrected") == (entries["va"]["resource"]["status"], entries["dlco"]["resource"]["status"])
    assert not any(note.startswith("Corrected result") for note in notes)


def test_a_result_sent_preliminary_before_becomes_final(tables: Tables) -> None:
    """A DLCO sent preliminary before and final now is final (P to F is no correction), in FHIR and HL7."""
    # source: HL7 v2.5.1 table 0085 (F final, C "replaces a final result"); FHIR R4 observation-status
    earlier = tuple(
        (ident, "preliminary" if ident.endswith(".dlco") else "final") for ident, _ in _sent(_original(tables))
    )
    correction = process(json.dumps(_document()).encode(), "second.json", tables)
    context = _correction_context(earlier)
    entries = _by_key(to_bundle(correction, tables, context))
    by_code = {
        str(obx(3)(1)(1)): str(obx(11)) for obx in hl7.parse(to_oru(correction, tables, context)).segments("OBX")
    }

    assert ("final", "corrected") == (entries["dlco"]["resource"]["status"], entries["va"]["resource"]["status"])
    assert ("F", "C") == (by_code["19911-7"], by_code["VA"])  # source: LOINC 19911-7 DLCO; local code VA


def test_without_a_record_of_what_was_sent_a_correction_corrects_everything(tables: Tables) -> None:
    """A correction with no record of the earlier send (an older ledger) replaces every result and withdraws none."""
    correction = process(_without_hb(_document()), "second.json", tables)
    entries = _by_key(to_bundle(correction, tables, _correction_context(())))

    assert {"corrected"} == {e["resource"]["status"] for e in entries.values()}
    assert "dlco_hb_adjusted" not in entries


def test_a_dlco_the_lab_now_marks_wrong_is_withdrawn(tables: Tables) -> None:
    """The lab's correction marks the DLCO W: the DLCO sent before is entered-in-error, naming the lab's status."""
    # source: HL7 v2.5.1 table 0085 W "Post original as wrong"; v2-to-FHIR ConceptMap W -> entered-in-error
    original = _original(tables)
    correction = process(json.dumps(_document(lab_status={"results.dlco": "W"})).encode(), "second.json", tables)
    entries = _by_key(to_bundle(correction, tables, _correction_context(_sent(original))))
    dlco = entries["dlco"]["resource"]

    assert "entered-in-error" == dlco["status"]
    assert "results.dlco W (Post original as wrong" in dlco["note"][0]["text"]
    assert "final" != dlco["status"]


def test_what_was_withdrawn_before_is_not_withdrawn_again(tables: Tables) -> None:
    """A result the ledger last sent as entered-in-error is not sent again while it stays gone."""
    earlier = tuple(
        (ident, "entered-in-error" if ident.endswith(".dlco_hb_adjusted") else "corrected")
        for ident, _ in _sent(_original(tables))
    )
    correction = process(_without_hb(_document()), "third.json", tables)

    assert "dlco_hb_adjusted" not in _by_key(to_bundle(correction, tables, _correction_context(earlier)))


def test_the_record_of_an_obx_is_its_segment_as_sent(tables: Tables) -> None:
    """Each HL7 record's digest is the SHA-256 of its OBX segment, its value OBX-5 exactly as sent."""
    # source: FIPS 180-4 SHA-256 via hashlib over the segment python-hl7 splits from the message
    original = _original(tables)
    oru = original.payloads[1]
    segments = [str(s) for s in hl7.parse(oru.data.decode()).segments("OBX")]

    assert [hashlib.sha256(s.encode()).hexdigest() for s in segments] == [c.digest for c in carried(oru, SYSTEM)]
    assert [s.split("|")[5] for s in segments] == [c.value for c in carried(oru, SYSTEM)]


def test_the_record_of_a_resource_keeps_the_value_text_as_sent(tables: Tables) -> None:
    """A FHIR record's value is the valueQuantity's text as sent (9.84 stays 9.84); its digest follows the resource."""
    original = _original(tables)
    fhir = original.payloads[0]
    sent = json.loads(fhir.data, parse_float=Decimal)
    values = {
        e["resource"]["identifier"][0]["value"]: str(e["resource"]["valueQuantity"]["value"])
        for e in sent["entry"]
        if "valueQuantity" in e["resource"]
    }
    recorded = {c.identifier_value: c.value for c in carried(fhir, SYSTEM) if c.value is not None}
    later = process(json.dumps(_document()).encode(), "first.json", tables, now=LATER, routes=ROUTES).payloads[0]

    assert values == recorded
    assert "9.84" == recorded[f"{PREFIX}dlco"]  # the sample's DLCO as written
    assert [c.digest for c in carried(fhir, SYSTEM)] != [c.digest for c in carried(later, SYSTEM)]  # "issued" differs


def test_the_record_of_a_resource_is_its_json_as_sent(tables: Tables) -> None:
    """Each FHIR record's digest is the SHA-256 of that resource's text exactly as it stands in the sent Bundle."""
    # source: FIPS 180-4 SHA-256 via hashlib over each entry's "resource" span, located in the sent
    # text by the standard library's JSON decoder (RFC 8259), not by the bridge's serialiser
    fhir = _original(tables).payloads[0]
    text = fhir.data.decode()
    decoder = json.JSONDecoder()
    spans, at = [], 0
    while (found := text.find('"fullUrl":', at)) >= 0:
        start = text.index('"resource":', found) + len('"resource":')
        _, at = decoder.raw_decode(text, start)
        spans.append(text[start:at])
    records = carried(fhir, SYSTEM)

    assert len(spans) == len(json.loads(text)["entry"]) == len(records)
    assert [hashlib.sha256(s.encode()).hexdigest() for s in spans] == [c.digest for c in records]
