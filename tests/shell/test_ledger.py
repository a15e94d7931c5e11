"""The ledger: schema, durability, outbox order, summary and the service lock."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
from collections.abc import Iterator, Sequence
from contextlib import closing
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

from bridge.errors import LedgerError
from bridge.service.ledger import (
    SCHEMA_VERSION,
    DestinationSummary,
    Ledger,
    NewInput,
    NewMessage,
    ServiceLock,
)

if TYPE_CHECKING:
    from tests.shell.conftest import Clock

HL7 = "x-application/hl7-v2+er7"


def message(
    message_id: str,
    patient: str = "p1",
    destination: str = "ward",
    payload: bytes = b"",
) -> NewMessage:
    """An invented outbox message."""
    return NewMessage(
        destination=destination,
        message_id=message_id,
        test_id=f"T-{message_id}",
        patient_key=patient,
        payload=payload or f"MSH|^~\\&|{message_id}".encode(),
        content_type=HL7,
    )


def enqueue(ledger: Ledger, sha: str, *messages: NewMessage) -> list[int]:
    return ledger.record_input_and_enqueue(NewInput(sha, f"{sha}.json", "T-1"), messages)


def raw(path: Path) -> closing[sqlite3.Connection]:
    """A second, independent connection to the same file, closed after use."""
    return closing(sqlite3.connect(path))


def test_journal_is_wal_and_sync_full(ledger: Ledger) -> None:
    """The ledger runs in WAL mode so status can read while the service writes."""
    with raw(ledger.path) as conn:
        mode = conn.execute("PRAGMA journal_mode").fetchone()[0]

    assert "wal" == mode


def test_schema_created_from_empty_and_reopen_is_idempotent(
    tmp_path: Path,
) -> None:
    """A new file gets the full schema; reopening changes nothing and keeps the data."""
    path = tmp_path / "ledger.sqlite3"
    with Ledger.open(path) as first:
        enqueue(first, "a" * 64, message("M1"))
    with Ledger.open(path) as second:
        row = second.next_due("ward", now=float("inf"))
    with raw(path) as conn:
        version = conn.execute("PRAGMA user_version").fetchone()[0]

    assert SCHEMA_VERSION == version
    assert row is not None and "M1" == row.message_id


def test_newer_schema_is_refused(tmp_path: Path) -> None:
    """A ledger written by a newer release is not touched."""
    path = tmp_path / "ledger.sqlite3"
    Ledger.open(path).close()
    with raw(path) as conn:
        conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")

    with pytest.raises(LedgerError, match="newer"):
        Ledger.open(path)


def test_seen_and_last_for_test(ledger: Ledger, clock: Clock) -> None:
    """Inputs are found by hash, and the latest accepted one per test id."""
    ledger.record_input_and_enqueue(NewInput("a" * 64, "first.json", "T-9"), [])
    clock.advance(10)
    ledger.record_input_and_enqueue(NewInput("b" * 64, "again.json", "T-9", state="correction"), [])
    clock.advance(10)
    ledger.record_quarantine("c" * 64, "broken.json", "patient.birth_date: a date")

    seen = ledger.seen("a" * 64)
    last = ledger.last_for_test("T-9")

    assert seen is not None and "first.json" == seen.source
    assert last is not None and ("b" * 64, "correction") == (last.sha256, last.state)
    assert None is ledger.seen("d" * 64)
    assert None is ledger.last_for_test("T-unknown")


def test_duplicate_enqueue_is_ignored(ledger: Ledger) -> None:
    """The same destination, message id and content is enqueued once; same id back."""
    first = enqueue(ledger, "a" * 64, message("M1"), message("M1", destination="fhir"))
    again = enqueue(ledger, "b" * 64, message("M1"))

    assert first[0] == again[0]
    assert 2 == ledger.summary().pending


def test_recording_an_input_again_enqueues_nothing(ledger: Ledger) -> None:
    """A restart that re-reads an input it already recorded gets the old ids, no new rows."""
    first = enqueue(ledger, "a" * 64, message("M1"), message("M2"))
    again = enqueue(ledger, "a" * 64, message("M1", payload=b"MSH|re-emitted"))

    assert first == again
    assert 2 == ledger.summary().pending


def test_same_message_id_new_content_is_a_new_row(ledger: Ledger) -> None:
    """A correction reuses the message id with new content and is enqueued."""
    first = enqueue(ledger, "a" * 64, message("M1", payload=b"MSH|one"))
    second = enqueue(ledger, "b" * 64, message("M1", payload=b"MSH|two"))

    assert first != second


def test_enqueue_is_all_or_nothing(ledger: Ledger) -> None:
    """When one message cannot be stored, neither the input nor any message is."""
    broken = message("")  # an empty message id breaks a CHECK constraint

    with pytest.raises(LedgerError):
        enqueue(ledger, "a" * 64, message("M1"), broken)
    with raw(ledger.path) as conn:
        counts = [conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0] for table in ("inputs", "outbox")]

    assert [0, 0] == counts
    assert None is ledger.seen("a" * 64)


class PeekingMessages(Sequence[NewMessage]):
    """Messages that, while enqueued, look at the file through another connection."""

    def __init__(self, path: Path, items: list[NewMessage]) -> None:
        self.path = path
        self.items = items
        self.seen_outside: list[int] = []

    def __len__(self) -> int:
        return len(self.items)

    def __getitem__(self, index: int) -> NewMessage:  # type: ignore[override]
        return self.items[index]

    def __iter__(self) -> Iterator[NewMessage]:
        for item in self.items:
            with raw(self.path) as conn:
                self.seen_outside.append(conn.execute("SELECT count(*) FROM outbox").fetchone()[0])
            yield item


def test_enqueue_is_invisible_until_committed(ledger: Ledger) -> None:
    """Another connection sees no message mid-transaction, and all of them after."""
    peeking = PeekingMessages(ledger.path, [message("M1"), message("M2"), message("M3")])

    ledger.record_input_and_enqueue(NewInput("a" * 64, "a.json", "T-1"), peeking)
    with raw(ledger.path) as conn:
        after = conn.execute("SELECT count(*) FROM outbox").fetchone()[0]

    assert [0, 0, 0] == peeking.seen_outside
    assert 3 == after


def test_commit_survives_immediate_process_death(tmp_path: Path) -> None:
    """Once record_input_and_enqueue returns, a kill -9 right after loses nothing."""
    path = tmp_path / "ledger.sqlite3"
    script = (
        "import os, sys\n"
        "from pathlib import Path\n"
        "from bridge.service.ledger import Ledger, NewInput, NewMessage\n"
        "ledger = Ledger.open(Path(sys.argv[1]))\n"
        "m = NewMessage('ward', 'M1', 'T-1', 'p1', b'MSH|x', 'text/plain')\n"
        "ledger.record_input_and_enqueue(NewInput('a' * 64, 'a.json', 'T-1'), [m])\n"
        "os._exit(9)\n"
    )
    root = Path(__file__).resolve().parents[2]
    subprocess.run([sys.executable, "-c", script, str(path)], cwd=root, check=False, timeout=10)

    with Ledger.open(path) as reopened:
        row = reopened.next_due("ward", now=float("inf"))

    assert row is not None and "M1" == row.message_id


def test_next_due_is_fifo_per_destination(ledger: Ledger, clock: Clock) -> None:
    """The oldest pending message of a destination goes first."""
    enqueue(ledger, "a" * 64, message("M1"), message("M2"), message("X", destination="o"))

    row = ledger.next_due("ward", clock.now)

    assert row is not None and "M1" == row.message_id


def test_backing_off_patient_blocks_only_that_patient(ledger: Ledger, clock: Clock) -> None:
    """A newer message for the same patient waits; another patient's message goes."""
    ids = enqueue(ledger, "a" * 64, message("A1", "p1"), message("A2", "p1"), message("B1", "p2"))
    ledger.mark_retry(ids[0], "connection refused", next_attempt_at=clock.now + 60)

    now_due = ledger.next_due("ward", clock.now)
    later_due = ledger.next_due("ward", clock.now + 60)

    assert now_due is not None and "B1" == now_due.message_id
    assert later_due is not None and "A1" == later_due.message_id


def test_marks_and_history(ledger: Ledger, clock: Clock) -> None:
    """Each outcome updates the row and leaves one line in the attempt history."""
    (row_id,) = enqueue(ledger, "a" * 64, message("M1"))
    ledger.mark_retry(row_id, "timed out", next_attempt_at=clock.now + 2)
    clock.advance(2)
    ledger.mark_delivered(row_id, "AA")

    row = ledger.get(row_id)
    outcomes = [a.outcome for a in ledger.history(row_id)]

    assert row is not None
    assert ("delivered", 2, "AA", clock.now) == (
        row.state,
        row.attempts,
        row.ack_text,
        row.delivered_at,
    )
    assert ["retry", "delivered"] == outcomes


def test_marking_a_finished_row_fails(ledger: Ledger) -> None:
    """A row is finished once; a second outcome for it is a bug, not a silent no-op."""
    (row_id,) = enqueue(ledger, "a" * 64, message("M1"))
    ledger.mark_delivered(row_id, "AA")

    with pytest.raises(LedgerError, match="no pending outbox row"):
        ledger.mark_rejected(row_id, "late")


def test_summary_counts_are_true(ledger: Ledger, clock: Clock) -> None:
    """Summary counts inputs by state and outbox rows by destination and state."""
    ids = enqueue(
        ledger,
        "a" * 64,
        message("M1"),
        message("M2"),
        message("M3"),
        message("F1", destination="fhir"),
    )
    ledger.record_input_and_enqueue(NewInput("b" * 64, "b.json", "T-1", state="duplicate"), [])
    ledger.record_quarantine("c" * 64, "c.json", "unknown format")
    ledger.mark_delivered(ids[0], "AA")
    ledger.mark_rejected(ids[1], "AE: unknown code")
    clock.advance(30)

    summary = ledger.summary()

    assert (1, 1, 1, 0) == (
        summary.processed,
        summary.duplicates,
        summary.quarantined,
        summary.corrections,
    )
    assert {
        "fhir": DestinationSummary(pending=1, oldest_pending_age=30.0),
        "ward": DestinationSummary(pending=1, delivered=1, rejected=1, oldest_pending_age=30.0),
    } == summary.destinations
    assert (2, 1, 1) == (summary.pending, summary.delivered, summary.rejected)


def test_requeue_rejected(ledger: Ledger, clock: Clock) -> None:
    """resend puts every dead-lettered message back in the queue, due now."""
    ids = enqueue(ledger, "a" * 64, message("M1"), message("M2"), message("M3"))
    ledger.mark_rejected(ids[0], "AE")
    ledger.mark_rejected(ids[2], "AR")
    ledger.mark_delivered(ids[1], "AA")
    clock.advance(5)

    count = ledger.requeue_rejected()
    row = ledger.next_due("ward", clock.now)

    assert 2 == count
    assert (0, 2) == (ledger.summary().rejected, ledger.summary().pending)
    assert row is not None and (ids[0], clock.now) == (row.id, row.next_attempt_at)


def test_requeue_one_delivered_message(ledger: Ledger, clock: Clock) -> None:
    """resend of one delivered message makes it pending again."""
    (row_id,) = enqueue(ledger, "a" * 64, message("M1"))
    ledger.mark_delivered(row_id, "AA")

    ledger.requeue(row_id)

    row = ledger.get(row_id)
    assert row is not None and "pending" == row.state
    with pytest.raises(LedgerError):
        ledger.requeue(999)


def test_second_service_lock_is_refused(tmp_path: Path) -> None:
    """A second service on the same state folder refuses to start."""
    with ServiceLock.acquire(tmp_path), pytest.raises(LedgerError) as caught:
        ServiceLock.acquire(tmp_path)

    assert f"another dlco-bridge service holds {tmp_path / 'service.lock'}" == str(caught.value)


def test_service_lock_is_free_after_release(tmp_path: Path) -> None:
    """Once released, the lock can be taken again."""
    ServiceLock.acquire(tmp_path).release()

    lock = ServiceLock.acquire(tmp_path)
    lock.release()

    assert (tmp_path / "service.lock").exists()


def test_status_reads_without_the_lock(tmp_path: Path) -> None:
    """A read-only ledger opens while a service holds the lock, and cannot write."""
    path = tmp_path / "ledger.sqlite3"
    with ServiceLock.acquire(tmp_path), Ledger.open(path) as service:
        enqueue(service, "a" * 64, message("M1"))
        with Ledger.open(path, read_only=True) as status:
            pending = status.summary().pending
            with pytest.raises(LedgerError):
                status.record_quarantine("b" * 64, "b.json", "x")

    assert 1 == pending


def test_read_only_open_of_missing_ledger_fails(tmp_path: Path) -> None:
    """status on a folder without a ledger says so."""
    with pytest.raises(LedgerError, match="no ledger"):
        Ledger.open(tmp_path / "absent.sqlite3", read_only=True)
