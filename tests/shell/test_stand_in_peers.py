"""The stand-in's FHIR transaction handling and MLLP answers, without the network."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from bridge.service.receiver.fhir_peer import BundleRefused, process_transaction
from bridge.service.receiver.mllp_peer import ack_for
from bridge.service.receiver.store import ResourceStore
from bridge.service.transports.mllp import parse_ack

SYSTEM = "urn:dlco-bridge:observation-id"


def _bundle(method: str, value: float) -> dict[str, Any]:
    """An Observation and a report referring to it by urn:uuid, as a transaction."""
    obs_request = (
        {"method": "POST", "url": "Observation", "ifNoneExist": f"identifier={SYSTEM}|T-1.dlco"}
        if method == "POST"
        else {"method": "PUT", "url": f"Observation?identifier={SYSTEM}|T-1.dlco"}
    )
    return {
        "resourceType": "Bundle",
        "type": "transaction",
        "entry": [
            {
                "fullUrl": "urn:uuid:00000000-0000-0000-0000-000000000001",
                "resource": {"resourceType": "Observation", "valueQuantity": {"value": value}},
                "request": obs_request,
            },
            {
                "fullUrl": "urn:uuid:00000000-0000-0000-0000-000000000002",
                "resource": {
                    "resourceType": "DiagnosticReport",
                    "result": [{"reference": "urn:uuid:00000000-0000-0000-0000-000000000001"}],
                },
                "request": {"method": "POST", "url": "DiagnosticReport", "ifNoneExist": f"identifier={SYSTEM}|T-1"},
            },
        ],
    }


def _statuses(answer: dict[str, Any]) -> list[str]:
    return [e["response"]["status"] for e in answer["entry"]]


def test_conditional_create_then_resend_then_conditional_update(tmp_path: Path):
    """First Bundle creates both (201), the same again creates nothing (200), a PUT updates to version 2."""
    # source: FHIR R4 http.html#transaction (ifNoneExist: 200 when one match exists), #cond-update
    store = ResourceStore(tmp_path / "r.sqlite3")
    first = process_transaction(store, _bundle("POST", 15.1))
    again = process_transaction(store, _bundle("POST", 15.1))
    corrected = process_transaction(store, _bundle("PUT", 15.4))
    resources = store.all()
    store.close()

    assert (["201 Created"] * 2, ["200 OK"] * 2, ["200 OK"] * 2) == (
        _statuses(first),
        _statuses(again),
        _statuses(corrected),
    )
    observation, report = resources
    assert (2, 15.4) == (observation.version, observation.body["valueQuantity"]["value"])
    assert [{"reference": observation.reference}] == report.body["result"]


PLAIN_POST = {"resource": {"resourceType": "Observation"}, "request": {"method": "POST", "url": "Observation"}}


@pytest.mark.parametrize(
    "document",
    [
        {"resourceType": "Bundle", "type": "batch", "entry": []},
        {"resourceType": "Patient"},
        {"resourceType": "Bundle", "type": "transaction", "entry": [PLAIN_POST]},
    ],
)
def test_what_is_not_a_conditional_transaction_is_refused_and_nothing_kept(tmp_path: Path, document):
    """A batch, another resource, or a plain POST without ifNoneExist: BundleRefused, the store unchanged."""
    store = ResourceStore(tmp_path / "r.sqlite3")
    with pytest.raises(BundleRefused):
        process_transaction(store, document)
    kept = store.all()
    store.close()

    assert [] == kept


@pytest.mark.parametrize("code", ["AA", "AE", "AR"])
def test_the_ack_echoes_the_control_id_with_the_code_asked_for(code):
    """MSA-1 is the code asked for and MSA-2 the message's MSH-10, read back by the client's parser."""
    # source: HL7 v2.5.1 ch. 2, MSA-1 acknowledgment code, MSA-2 message control id
    message = b"MSH|^~\\&|DLCO-BRIDGE|FENWICK-PFT|RECORDS|FENWICK-HOLLOW|20260101120000||ORU^R01|CTRL-42|P|2.5.1\r"

    ack = parse_ack(ack_for(message, code, "SI000001", datetime(2026, 1, 1, tzinfo=UTC)))

    assert ack is not None
    assert (code, "CTRL-42") == (ack.code, ack.control_id)
