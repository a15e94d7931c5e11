"""The lab's own status of each value (HL7 v2.5.1 table 0085, OBX-11): honoured per value, in both outputs."""

from __future__ import annotations

import json
from datetime import UTC, datetime

import hl7
import pytest
from hl7apy.v2_5_1.tables import TABLES as HL7APY_TABLES

from bridge.emit.fhir import to_bundle
from bridge.emit.hl7v2 import to_oru
from bridge.emit.settings import EmitContext, EmitSettings
from bridge.errors import InputError
from bridge.model import Outcome, Severity
from bridge.pipeline import process
from bridge.tables import Tables
from bridge.tables.files import mappings_dir
from tests.conftest import SAMPLES

NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
FHIR = EmitContext(now=NOW, units="si", site=EmitSettings(patient_reference="conditional-create"))
HL7_CONTEXT = EmitContext(now=NOW, units="si")
DLCO_LOINC = "19911-7"  # source: LOINC 19911-7 "Diffusion capacity.carbon monoxide" (mappings/codes.toml)


def _sample(stem: str = "01-healthy-adult", **lab_status: str) -> bytes:
    document = json.loads((SAMPLES / f"{stem}.json").read_bytes())
    if lab_status:
        document["lab_status"] = {path.replace("__", "."): code for path, code in lab_status.items()}
    return json.dumps(document).encode()


def _observations(outcome: Outcome, tables: Tables) -> dict[str, dict]:
    """The Bundle's Observations by their identifier's key (the part after the test id)."""
    bundle = to_bundle(outcome, tables, FHIR)
    found = {}
    for entry in bundle["entry"]:
        resource = entry["resource"]
        if resource["resourceType"] == "Observation":
            found[resource["identifier"][0]["value"].rsplit(".", 1)[1]] = resource
    return found


def _obx_statuses(outcome: Outcome, tables: Tables) -> dict[str, str]:
    """OBX-3.1 (the code) -> OBX-11 of the ORU, read back with python-hl7."""
    message = hl7.parse(to_oru(outcome, tables, HL7_CONTEXT))
    return {str(obx(3)(1)(1)): str(obx(11)) for obx in message.segments("OBX")}


# ---------- the table ----------


def test_the_table_has_exactly_the_codes_of_hl7_v251_table_0085(tables: Tables) -> None:
    """mappings/result_status.toml lists every code of table 0085 in v2.5.1, and no other."""
    # source: hl7apy's HL7 v2.5.1 tables, HL70085 "Observation result status codes interpretation"
    expected = set(HL7APY_TABLES["HL70085"][1])

    assert {"C", "D", "F", "I", "N", "O", "P", "R", "S", "U", "W", "X"} == expected
    assert expected == set(tables.result_status.statuses)


def test_each_code_does_what_its_meaning_says(tables: Tables) -> None:
    """F, C, U are sent final; P, R, S preliminary; I, N, O, X not sent; D and W withdraw what was sent."""
    # source: HL7 v2.5.1 table 0085 (C "replaces a final result", D "deletes the OBX record",
    # W "post original as wrong", X "results cannot be obtained", I "results pending", N "not
    # asked", O "no result", R "not verified", S "partial"); HL7 Version 2 to FHIR IG, ConceptMap
    # table-hl70085-to-observation-status (D and W -> entered-in-error, P -> preliminary, F -> final)
    expected = {
        "C": "final", "D": "withdraw", "F": "final", "I": "not_sent", "N": "not_sent", "O": "not_sent",
        "P": "preliminary", "R": "preliminary", "S": "preliminary", "U": "final", "W": "withdraw", "X": "not_sent",
    }  # fmt: skip

    assert expected == {code: status.action for code, status in tables.result_status.statuses.items()}


def test_meanings_are_the_tables_own_words(tables: Tables) -> None:
    """Each meaning is the text of table 0085 (as the HL7 Terminology code system v2-0085 words it)."""
    # source: HL7 v2.5.1 table 0085, as printed by HL7 Terminology CodeSystem v2-0085
    statuses = tables.result_status.statuses

    assert "Post original as wrong, e.g., transmitted for wrong patient" == statuses["W"].meaning
    assert "Deletes the OBX record" == statuses["D"].meaning
    assert "Results cannot be obtained for this observation" == statuses["X"].meaning
    assert (mappings_dir() / "result_status.toml").is_file()


# ---------- dlco-result/1 ----------


def test_a_dlco_marked_w_is_not_sent_at_all(tables: Tables) -> None:
    """A DLCO the lab marked W goes out in neither output; VA (marked F) stays final; a warning says why."""
    # source: HL7 v2.5.1 table 0085 W "Post original as wrong"
    outcome = process(_sample(results__dlco="W", results__va="F"), "w.json", tables)
    observations = _observations(outcome, tables)
    codes = {c["code"] for o in observations.values() for c in o["code"]["coding"]}
    findings = [(f.code, f.severity, f.path) for f in outcome.findings if f.code.startswith("LAB_STATUS")]

    assert DLCO_LOINC not in codes
    assert DLCO_LOINC not in _obx_statuses(outcome, tables)
    assert "final" == observations["va"]["status"]
    assert [("LAB_STATUS_WITHDRAWN", Severity.WARNING, "results.dlco")] == findings
    assert outcome.derived.dlco_hb_adjusted is None  # nothing is computed from a value the lab withdrew


def test_a_preliminary_dlco_and_what_is_computed_from_it_go_out_preliminary(tables: Tables) -> None:
    """DLCO P: its Observation, its Hb-adjusted value and per cent predicted are preliminary; VA stays final."""
    # source: FHIR R4 CodeSystem observation-status "preliminary" (data may be incomplete or
    # unverified); HL7 v2.5.1 table 0085 P, table 0123 P (OBR-25)
    outcome = process(_sample(results__dlco="P"), "p.json", tables)
    observations = _observations(outcome, tables)
    statuses = _obx_statuses(outcome, tables)
    oru = hl7.parse(to_oru(outcome, tables, HL7_CONTEXT))

    assert "preliminary" == observations["dlco"]["status"]
    assert "preliminary" == observations["dlco_hb_adjusted"]["status"]
    assert "preliminary" == observations["dlco_percent_predicted"]["status"]  # GLI-2017, charted by default
    assert ("final", "final") == (observations["va"]["status"], observations["kco"]["status"])
    assert ("P", "F") == (statuses[DLCO_LOINC], statuses["VA"])
    assert "P" == str(oru.segment("OBR")(25))


def test_statuses_that_send_nothing(tables: Tables) -> None:
    """VA marked X (cannot be obtained) is not sent, with an info finding; the rest is final."""
    outcome = process(_sample(results__va="X"), "x.json", tables)
    observations = _observations(outcome, tables)
    findings = [(f.code, f.severity) for f in outcome.findings if f.code.startswith("LAB_STATUS")]

    assert "va" not in observations
    assert [("LAB_STATUS_NOT_SENT", Severity.INFO)] == findings
    assert {"final"} == {o["status"] for o in observations.values()}


def test_a_code_outside_table_0085_refuses_the_record(tables: Tables) -> None:
    """A status Q is not in table 0085: the record is refused naming the value's path."""
    with pytest.raises(InputError) as caught:
        process(_sample(results__dlco="Q"), "q.json", tables)

    assert str(caught.value).startswith("q.json: lab_status.results.dlco: a result status of HL7 table 0085")


def test_a_required_value_marked_wrong_refuses_the_record(tables: Tables) -> None:
    """Height is required: marked W, the record cannot be read without it and is refused."""
    with pytest.raises(InputError) as caught:
        process(_sample(patient__height="W"), "h.json", tables)

    assert "lab_status.patient.height" in str(caught.value)
