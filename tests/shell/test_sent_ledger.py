"""The ledger's record of what was sent, resource by resource: written with the message, kept through prune."""

from __future__ import annotations

import sqlite3
from contextlib import closing
from datetime import UTC, datetime
from pathlib import Path

from bridge.model import Carried
from bridge.service.ledger import Ledger, NewInput, NewMessage, SentResource
from bridge.service.ledger.schema import MIGRATIONS, migrate
from tests.shell.conftest import Clock

DAY = 86_400.0
SYSTEM = "https://fenwick-hollow.example/dlco-bridge/observation-id"
LOINC = "http://loinc.org"
LAB = "Lowmarsh Respiratory Physiology Lab (fictional)"


def _carried(key: str, value: str, status: str = "final", digest: str = "a" * 64) -> Carried:
    return Carried(
        resource_type="Observation",
        identifier_system=SYSTEM,
        identifier_value=f"lowmarsh.T-1.{key}",
        code_system=LOINC,
        code="19911-7",
        value=value,
        unit="mmol/min/kPa",
        status=status,
        digest=digest,
    )


def _message(name: str, *carried: Carried, destination: str = "store", kind: str = "fhir") -> NewMessage:
    return NewMessage(
        destination=destination,
        message_id=name,
        test_id="T-1",
        patient_key="p1",
        payload=f"payload {name}".encode(),
        content_type="application/fhir+json",
        kind=kind,
        lab=LAB,
        carried=carried,
    )


def _enqueue(ledger: Ledger, sha: str, *messages: NewMessage) -> list[int]:
    return ledger.record_input_and_enqueue(NewInput(sha, f"{sha}.json", "T-1"), messages)


def test_a_record_is_listed_once_its_message_is_delivered(ledger: Ledger, clock: Clock) -> None:
    """Recorded with the message, listed by sent_resources only after the receiver acknowledged it."""
    (row,) = _enqueue(ledger, "s1", _message("m1", _carried("dlco", "9.84")))
    before = list(ledger.sent_resources())
    clock.advance(30)
    ledger.mark_delivered(row, "200")

    expected = SentResource(
        destination="store", kind="fhir", lab=LAB, test_id="T-1", resource_type="Observation",
        identifier_system=SYSTEM, identifier_value="lowmarsh.T-1.dlco", code_system=LOINC, code="19911-7",
        value="9.84", unit="mmol/min/kPa", status="final", digest="a" * 64, message_id=row,
        sent_at=datetime.fromtimestamp(clock.now, UTC),
    )  # fmt: skip
    assert [] == before
    assert [expected] == list(ledger.sent_resources())


def test_the_latest_delivered_record_per_destination_and_identifier(ledger: Ledger, clock: Clock) -> None:
    """Original then correction: the correction's record per destination; another destination keeps its own."""
    hl7 = _message("h1", _carried("dlco", "9.84", "F"), destination="records", kind="hl7")
    first = _enqueue(ledger, "s1", _message("m1", _carried("dlco", "9.84")), hl7)
    for row in first:
        ledger.mark_delivered(row, "ok")
    clock.advance(DAY)
    (second,) = _enqueue(ledger, "s2", _message("m2", _carried("dlco", "9.91", "corrected")))
    ledger.mark_delivered(second, "ok")

    latest = {(r.destination, r.value, r.status) for r in ledger.sent_resources()}
    assert {("store", "9.91", "corrected"), ("records", "9.84", "F")} == latest
    assert [("records", "F")] == [(r.destination, r.status) for r in ledger.sent_resources(destination="records")]
    since = datetime.fromtimestamp(clock.now - 60, UTC)
    assert ["9.91"] == [r.value for r in ledger.sent_resources(since=since)]


def test_an_undelivered_correction_leaves_the_delivered_record_listed(ledger: Ledger) -> None:
    """A correction still pending does not hide what the receiver acknowledged before."""
    (first,) = _enqueue(ledger, "s1", _message("m1", _carried("dlco", "9.84")))
    ledger.mark_delivered(first, "ok")
    _enqueue(ledger, "s2", _message("m2", _carried("dlco", "9.91", "corrected")))

    assert ["9.84"] == [r.value for r in ledger.sent_resources()]


def test_records_survive_prune_and_only_superseded_ones_go(ledger: Ledger, clock: Clock) -> None:
    """prune removes payloads and outbox rows; the latest record of each identifier stays, older ones go."""
    (first,) = _enqueue(ledger, "s1", _message("m1", _carried("dlco", "9.84"), _carried("va", "6.52")))
    ledger.mark_delivered(first, "ok")
    clock.advance(DAY)
    (second,) = _enqueue(ledger, "s2", _message("m2", _carried("dlco", "9.91", "corrected")))
    ledger.mark_delivered(second, "ok")
    clock.advance(800 * DAY)
    result = ledger.prune(payload_days=30, memory_days=365)
    with closing(sqlite3.connect(ledger.path)) as conn:
        outbox = conn.execute("SELECT count(*) FROM outbox").fetchone()[0]
        records = conn.execute("SELECT count(*) FROM sent_resources").fetchone()[0]

    assert (0, 2, 1) == (outbox, result.messages, result.sent_records)
    assert 2 == records  # the correction's DLCO and the original's VA (no later record replaces it)
    assert {("lowmarsh.T-1.dlco", "9.91"), ("lowmarsh.T-1.va", "6.52")} == {
        (r.identifier_value, r.value) for r in ledger.sent_resources()
    }
    assert {("lowmarsh.T-1.dlco", "corrected"), ("lowmarsh.T-1.va", "final")} == set(ledger.sent_before("T-1"))


def test_sent_before_counts_what_is_on_its_way_but_not_what_was_refused(ledger: Ledger) -> None:
    """A pending message's records count (it leaves first); a dead-lettered one's do not."""
    (first,) = _enqueue(ledger, "s1", _message("m1", _carried("dlco", "9.84")))
    (second,) = _enqueue(ledger, "s2", _message("m2", _carried("dlco", "9.91", "corrected"), _carried("va", "6.5")))
    pending = dict(ledger.sent_before("T-1"))
    ledger.mark_rejected(second, "AR")

    assert {"lowmarsh.T-1.dlco": "corrected", "lowmarsh.T-1.va": "final"} == pending
    assert {"lowmarsh.T-1.dlco": "final"} == dict(ledger.sent_before("T-1"))
    assert () == ledger.sent_before("T-2")
    assert first != second


def test_a_message_enqueued_again_is_recorded_once(ledger: Ledger) -> None:
    """The same message (destination, id, content) enqueued twice adds no second record."""
    _enqueue(ledger, "s1", _message("m1", _carried("dlco", "9.84")))
    _enqueue(ledger, "s1b", _message("m1", _carried("dlco", "9.84")))
    with closing(sqlite3.connect(ledger.path)) as conn:
        records = conn.execute("SELECT count(*) FROM sent_resources").fetchone()[0]

    assert 1 == records


def test_a_ledger_of_the_previous_schema_gains_the_record(tmp_path: Path) -> None:
    """A file at the previous schema version is migrated: its outbox rows stay, the record table is added."""
    path = tmp_path / "ledger.sqlite3"
    with closing(sqlite3.connect(path, isolation_level=None)) as conn:
        for number, step in enumerate(MIGRATIONS[:-1], start=1):
            for statement in step:
                conn.execute(statement)
            conn.execute(f"PRAGMA user_version = {number}")
        conn.execute(
            "INSERT INTO outbox (destination, message_id, test_id, patient_key, content_sha256, input_sha256, "
            "payload, content_type, next_attempt_at, created_at) VALUES ('store', 'm0', 'T-0', 'p', 'c', 's', "
            "X'00', 'text/plain', 0, 0)"
        )
        migrate(conn, path)
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        rows = conn.execute("SELECT count(*) FROM outbox").fetchone()[0]

    assert "sent_resources" in tables
    assert 1 == rows
