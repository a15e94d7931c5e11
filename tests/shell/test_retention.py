"""Retention on a ledger of 100,000 outbox rows: payloads go, duplicates stay recognisable, nothing undelivered goes."""

from __future__ import annotations

import hashlib
import sqlite3
from pathlib import Path

import pytest

from bridge.errors import LedgerError
from bridge.service.ledger import Ledger, NewInput, NewMessage
from tests.shell.conftest import Clock

DAY = 86_400.0
INPUTS = 50_000  # two messages each (HL7 and FHIR): 100,000 outbox rows
PAYLOAD = b"MSH|^~\\&|FH|FENWICK-HOLLOW|||20260101||ORU^R01|X|P|2.5.1\r" + b"OBX|1|NM|19911-7||15.1\r" * 20


def _sha(n: int) -> str:
    return hashlib.sha256(f"input {n}".encode()).hexdigest()


def _fill(path: Path, now: float) -> dict[str, list[int]]:
    """Write the rows with plain sqlite3 (one transaction): 90 % delivered 400 days ago, the rest as listed."""
    kinds: dict[str, list[int]] = {"old_delivered": [], "recent_delivered": [], "old_pending": [], "old_rejected": []}
    inputs, rows = [], []
    for n in range(INPUTS):
        kind = (
            "old_pending" if n % 100 == 1 else
            "old_rejected" if n % 100 == 2 else
            "recent_delivered" if n % 10 == 3 else
            "old_delivered"
        )  # fmt: skip
        kinds[kind].append(n)
        age = 2 * DAY if kind == "recent_delivered" else 400 * DAY
        inputs.append((_sha(n), f"export-{n}.json", f"T-{n}", now - age, "processed", ""))
        state = kind.split("_")[1]
        for dest in ("records", "store"):
            delivered_at = now - age + 5 if state == "delivered" else None
            rows.append((dest, f"M-{n}", f"T-{n}", f"P-{n % 977}", f"c-{n}", _sha(n), PAYLOAD, "text/plain",
                         state, 1, now - age, now - age, delivered_at))  # fmt: skip
    conn = sqlite3.connect(path)
    with conn:
        conn.executemany("INSERT INTO inputs VALUES (?, ?, ?, ?, ?, ?)", inputs)
        conn.executemany(
            "INSERT INTO outbox (destination, message_id, test_id, patient_key, content_sha256, input_sha256, "
            "payload, content_type, state, attempts, next_attempt_at, created_at, delivered_at) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            rows,
        )
        conn.execute("INSERT INTO attempts (outbox_id, at, outcome) SELECT id, created_at, state FROM outbox")
    conn.close()
    return kinds


@pytest.fixture(scope="module")
def big(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, list[int]], Clock]:
    path = tmp_path_factory.mktemp("retention") / "ledger.sqlite3"
    clock = Clock()
    Ledger.open(path, now=clock).close()  # create and migrate
    return path, _fill(path, clock()), clock


def _counts(path: Path) -> dict[str, int]:
    conn = sqlite3.connect(path)
    query = "SELECT state || ':' || (length(payload) > 0), count(*) FROM outbox GROUP BY 1"
    counts = dict(conn.execute(query).fetchall())
    counts["inputs"] = conn.execute("SELECT count(*) FROM inputs").fetchone()[0]
    conn.close()
    return counts


def test_prune_keeps_what_recognises_a_duplicate_and_every_undelivered_message(big):
    """prune --older-than 30 on 100,000 rows: old payloads gone, rows, hashes and control ids kept, file smaller."""
    path, kinds, clock = big
    with Ledger.open(path, now=clock) as ledger:
        before = ledger.size()
        result = ledger.prune(30, 3650, vacuum=True)
        after = ledger.size()
        old = kinds["old_delivered"][0]
        resent = ledger.record_input_and_enqueue(
            NewInput(_sha(old), "export-again.json", f"T-{old}"),
            [NewMessage("records", f"M-{old}", f"T-{old}", "P", PAYLOAD, "x-application/hl7-v2+er7")],
        )
        seen = ledger.seen(_sha(old))

    # Hand count: 2 rows per input, one attempt each; pending and rejected are 1 % of inputs each, recent 10 %.
    old_delivered, recent = 2 * len(kinds["old_delivered"]), 2 * len(kinds["recent_delivered"])
    assert (2 * 44_000, old_delivered, old_delivered) == (old_delivered, result.payloads, result.attempts)
    assert {
        "delivered:0": old_delivered,
        "delivered:1": recent,
        "pending:1": 2 * len(kinds["old_pending"]),
        "rejected:1": 2 * len(kinds["old_rejected"]),
        "inputs": INPUTS,
    } == _counts(path)
    assert seen is not None and "processed" == seen.state
    assert 2 == len(resent)  # the ids enqueued the first time come back: nothing new is sent
    # The file shrinks by at least most of the payload bytes removed (88,000 x len(PAYLOAD)).
    assert old_delivered * len(PAYLOAD) == before.payload_bytes - after.payload_bytes
    assert result.vacuumed and after.bytes < before.bytes - 0.8 * old_delivered * len(PAYLOAD)


def test_after_the_memory_period_delivered_rows_and_their_inputs_go_but_not_undelivered_ones(big):
    """prune with a 60-day memory: 400-day-old delivered rows and inputs go; pending and rejected stay, with inputs."""
    path, kinds, clock = big
    with Ledger.open(path, now=clock) as ledger:
        result = ledger.prune(30, 60)
        pending = ledger.rows("pending", limit=INPUTS)

    undelivered = len(kinds["old_pending"]) + len(kinds["old_rejected"])
    assert (2 * len(kinds["old_delivered"]), len(kinds["old_delivered"])) == (result.messages, result.inputs)
    assert {
        "delivered:1": 2 * len(kinds["recent_delivered"]),
        "pending:1": 2 * len(kinds["old_pending"]),
        "rejected:1": 2 * len(kinds["old_rejected"]),
        "inputs": len(kinds["recent_delivered"]) + undelivered,
    } == _counts(path)
    assert all(row.payload == PAYLOAD for row in pending)


def test_a_pruned_message_cannot_be_resent(ledger: Ledger, clock: Clock):
    """resend of a message whose payload was pruned is refused rather than sending nothing."""
    ids = ledger.record_input_and_enqueue(
        NewInput("a" * 64, "x.json", "T-1"), [NewMessage("records", "M-1", "T-1", "P", PAYLOAD, "text/plain")]
    )
    ledger.mark_delivered(ids[0], "AA")
    clock.advance(31 * DAY)
    ledger.prune(30, 3650)

    with pytest.raises(LedgerError, match="pruned"):
        ledger.requeue(ids[0])
