"""Corrections of a report with spirometry: a withdrawn result goes under the OBR of its own test group.

What was sent before reaches the emitter as the ledger keeps it (identifier, status as sent),
taken from what the original payloads carried. All data is invented (samples/10).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import hl7
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message

from bridge.emit.hl7v2 import to_oru
from bridge.emit.manifest import carried
from bridge.emit.settings import EmitSettings
from bridge.model import Outcome
from bridge.pipeline import Route, process
from bridge.tables import Tables
from tests.conftest import SAMPLES
from tests.emit.test_corrections import _correction_context, _sent
from tests.emit.test_hl7v2 import ALLOWED_WARNINGS

NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
ROUTES = (Route("fhir", "si"), Route("hl7", "si"))

SYSTEM = EmitSettings().observation_system  # the identifier system of the default settings


def _document() -> dict[str, Any]:
    document: dict[str, Any] = json.loads((SAMPLES / "10-spirometry-and-dlco.json").read_bytes())
    return document


def _original(tables: Tables) -> Outcome:
    return process(json.dumps(_document()).encode(), "first.json", tables, now=NOW, routes=ROUTES)


def _order_groups(er7: str) -> dict[str, list[hl7.Segment]]:
    """OBR-4.1 -> the OBX that follow that OBR, as python-hl7 reads the segments in order."""
    groups: dict[str, list[hl7.Segment]] = {}
    current: list[hl7.Segment] = []
    for segment in hl7.parse(er7):
        if str(segment[0]) == "OBR":
            current = groups.setdefault(str(segment(4)(1)(1)), [])
        elif str(segment[0]) == "OBX":
            current.append(segment)
    return groups


def _strict_errors(er7: str, tmp_path: Path) -> set[str]:
    report = tmp_path / "report.txt"
    parsed = parse_message(er7, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    assert parsed.validate(report_file=str(report))
    return {line for line in report.read_text().splitlines() if line} - ALLOWED_WARNINGS


def test_a_withdrawn_post_bronchodilator_pef_sits_under_the_post_bronchodilator_obr(
    tables: Tables, tmp_path: Path
) -> None:
    """The lab removes the PEF after the bronchodilator: its OBX-11 D follows the other post values, not the DLCO."""
    # source: HL7 v2.5.1 ch. 7, ORU^R01 (each OBSERVATION belongs to the ORDER_OBSERVATION of the OBR
    # above it), table 0085 (D "Deletes the OBX record"); message structure as hl7apy STRICT reads it
    original = _original(tables)
    document = _document()
    del document["spirometry"]["post"]["results"]["pef"]
    correction = process(json.dumps(document).encode(), "second.json", tables)
    er7 = to_oru(correction, tables, _correction_context(_sent(original)))
    groups = _order_groups(er7)
    codes = tables.codes.codes
    pef_post, dlco_panel = codes["pef_post"].code, tables.codes.panel.code
    post = groups[codes["spirometry_post"].code]

    assert [] == [obx for obx in groups[dlco_panel] if str(obx(3)(1)(1)) == pef_post]
    assert [] == [obx for obx in groups[codes["spirometry_pre"].code] if str(obx(3)(1)(1)) == pef_post]
    deleted = [obx for obx in post if str(obx(3)(1)(1)) == pef_post]
    assert 1 == len(deleted)
    assert ("D", "") == (str(deleted[0](11)), str(deleted[0](5)))
    assert post[-1] is deleted[0]  # after the group's results, set id one past them
    assert str(len(post)) == str(deleted[0](1))
    assert {"C"} == {str(obx(11)) for obx in post[:-1]}
    assert set() == _strict_errors(er7, tmp_path)


def test_a_correction_without_the_post_bronchodilator_phase_keeps_its_obr_for_the_withdrawals(
    tables: Tables, tmp_path: Path
) -> None:
    """The whole post phase removed: its OBR comes once more (C) carrying only OBX-11 D, none under the others."""
    # source: HL7 v2.5.1 ch. 7 (an OBX belongs to the OBR above it), table 0085 D, table 0123 C
    # ("Correction to results")
    original = _original(tables)
    document = _document()
    del document["spirometry"]["post"]
    correction = process(json.dumps(document).encode(), "second.json", tables)
    er7 = to_oru(correction, tables, _correction_context(_sent(original)))
    groups = _order_groups(er7)
    codes = tables.codes.codes
    post_code = codes["spirometry_post"].code
    obrs = {str(obr(4)(1)(1)): obr for obr in hl7.parse(er7).segments("OBR")}
    sent_post = {str(c.code) for c in (codes[k] for k in ("fev1_post", "fvc_post", "pef_post"))}

    assert "C" == str(obrs[post_code](25))
    assert {"D"} == {str(obx(11)) for obx in groups[post_code]}
    assert sent_post <= {str(obx(3)(1)(1)) for obx in groups[post_code]}
    assert post_code not in {str(obx(3)(1)(1)) for obx in groups[post_code]}  # the panel is the OBR, not an OBX
    assert [] == [obx for key, group in groups.items() if key != post_code for obx in group if str(obx(11)) == "D"]
    assert ["1", "2", "3"] == [str(obr(1)) for obr in hl7.parse(er7).segments("OBR")]
    assert set() == _strict_errors(er7, tmp_path)


def test_the_record_of_a_correction_follows_its_obx_order(tables: Tables) -> None:
    """The ledger's record of the correction names each OBX, the withdrawn ones included, in message order."""
    # source: python-hl7 reads the OBX order; the record's identifiers end with each result's key
    original = _original(tables)
    document = _document()
    del document["spirometry"]["post"]["results"]["pef"]
    routes = (Route("hl7", "si"),)
    correction = process(
        json.dumps(document).encode(),
        "second.json",
        tables,
        now=NOW,
        routes=routes,
        is_correction=lambda test_id, sha: True,
        sent_before=lambda test_id: _sent(original),
    )
    oru = correction.payloads[0]
    codes = {str(obx(3)(1)(1)) for obx in hl7.parse(oru.data.decode()).segments("OBX")}

    assert len(list(hl7.parse(oru.data.decode()).segments("OBX"))) == len(carried(oru, SYSTEM))
    assert any(c.identifier_value.endswith(".pef_post") and c.status == "D" for c in carried(oru, SYSTEM))
    assert tables.codes.codes["pef_post"].code in codes
