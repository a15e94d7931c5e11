"""Payloads in the ledger: stored compressed, read back byte for byte, older uncompressed rows still readable."""

from __future__ import annotations

import sqlite3
import zlib
from contextlib import closing
from pathlib import Path
from typing import TYPE_CHECKING

from bridge.service.ledger import Ledger, NewInput, NewMessage
from bridge.service.ledger.schema import MIGRATIONS, SCHEMA_VERSION

if TYPE_CHECKING:
    from tests.shell.conftest import Clock

FHIR = "application/fhir+json"


def bundle_bytes(n: int) -> bytes:
    """An invented, compact transaction-Bundle-like document of about 40 kB (repetitive, as Bundles are)."""
    entry = (
        '{"fullUrl":"urn:uuid:%08d-0000-5000-8000-000000000000","resource":{"resourceType":"Observation",'
        '"status":"final","code":{"coding":[{"system":"http://loinc.org","code":"19911-7"}]},'
        '"valueQuantity":{"value":%d.40,"unit":"mL/min/mm[Hg]","system":"http://unitsofmeasure.org"}},'
        '"request":{"method":"POST","url":"Observation"}}'
    )
    entries = ",".join(entry % (i, 20 + i % 7) for i in range(n))
    return ('{"resourceType":"Bundle","type":"transaction","entry":[' + entries + "]}").encode()


def new_message(message_id: str, payload: bytes) -> NewMessage:
    return NewMessage("store", message_id, f"T-{message_id}", "p1", payload, FHIR)


def test_a_payload_is_stored_zlib_compressed_and_read_back_unchanged(ledger: Ledger) -> None:
    """The stored blob is an RFC 1950 zlib stream of the payload, much smaller; the row reads back the payload."""
    payload = bundle_bytes(120)
    [row_id] = ledger.record_input_and_enqueue(NewInput("a" * 64, "a.json", "T-1"), [new_message("M1", payload)])
    with closing(sqlite3.connect(ledger.path)) as conn:
        query = "SELECT payload, payload_encoding FROM outbox WHERE id = ?"
        stored, encoding = conn.execute(query, (row_id,)).fetchone()
    row = ledger.get(row_id)

    # source: RFC 1950 (zlib format), read by the standard library's zlib, not by the ledger's code
    assert ("zlib", payload, payload) == (encoding, zlib.decompress(stored), row.payload if row else None)
    assert len(stored) < len(payload) / 5


def test_a_ledger_from_before_compression_is_migrated_and_its_payloads_read_as_they_were(tmp_path: Path) -> None:
    """Rows written before payload_encoding existed keep their plain payloads; new rows are compressed beside them."""
    path = tmp_path / "ledger.sqlite3"
    step = next(n for n, statements in enumerate(MIGRATIONS) if any("payload_encoding" in s for s in statements))
    old = b"MSH|^~\\&|DLCO-BRIDGE|OLD|||20250101000000||ORU^R01^ORU_R01|OLD-1|P|2.5.1\r"
    with closing(sqlite3.connect(path, isolation_level=None)) as conn:
        conn.execute("PRAGMA journal_mode = WAL")
        for statements in MIGRATIONS[:step]:
            for statement in statements:
                conn.execute(statement)
        conn.execute(f"PRAGMA user_version = {step}")
        conn.execute("INSERT INTO inputs VALUES (?, 'old.json', 'T-OLD', 1.0, 'processed', '')", ("o" * 64,))
        conn.execute(
            "INSERT INTO outbox (destination, message_id, test_id, patient_key, content_sha256, input_sha256, "
            "payload, content_type, next_attempt_at, created_at) VALUES "
            "('records', 'OLD-1', 'T-OLD', 'p0', ?, ?, ?, 'x-application/hl7-v2+er7', 1.0, 1.0)",
            ("c" * 64, "o" * 64, old),
        )

    with Ledger.open(path) as ledger:
        fresh = new_message("NEW-1", bundle_bytes(3))
        ledger.record_input_and_enqueue(NewInput("n" * 64, "new.json", "T-NEW"), [fresh])
        rows = {r.message_id: r.payload for r in ledger.rows("pending")}
    with closing(sqlite3.connect(path)) as conn:
        encodings = dict(conn.execute("SELECT message_id, payload_encoding FROM outbox").fetchall())
        version = conn.execute("PRAGMA user_version").fetchone()[0]

    assert (SCHEMA_VERSION, {"OLD-1": old, "NEW-1": bundle_bytes(3)}) == (version, rows)
    assert {"OLD-1": "identity", "NEW-1": "zlib"} == encodings


def test_a_pruned_compressed_payload_reads_as_empty(ledger: Ledger, clock: Clock) -> None:
    """Retention empties a delivered payload; the row still reads (an empty payload), not a zlib error."""
    sent = new_message("M1", bundle_bytes(5))
    [row_id] = ledger.record_input_and_enqueue(NewInput("a" * 64, "a.json", "T-1"), [sent])
    ledger.mark_delivered(row_id, "200")
    clock.advance(31 * 86_400)
    result = ledger.prune(30, 3650)
    row = ledger.get(row_id)

    assert (1, b"", "delivered") == (result.payloads, row.payload if row else None, row.state if row else None)
