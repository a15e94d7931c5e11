"""The outbox: messages waiting for their receivers, and every attempt to deliver them.

Owns the ``outbox`` and ``attempts`` rows and their state machine: a row is enqueued
``pending``; an attempt marks it ``delivered``, ``rejected`` (dead-lettered) or leaves it
pending with the time of its next try; an operator's ``resend`` makes it pending again. Rows
of one patient leave in enqueue order. It must not read inputs, build messages, talk to
receivers or log: the intake and the delivery loop call it, and it only records what they
tell it.
"""

from __future__ import annotations

import hashlib
import sqlite3
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from bridge.errors import LedgerError
from bridge.model import Carried
from bridge.service.ledger.database import Database
from bridge.service.ledger.sent import mark_sent_delivered, record_sent

OutboxState = Literal["pending", "delivered", "rejected"]
# How a payload is stored: "zlib" (RFC 1950) since the migration that added ``payload_encoding``;
# "identity" for rows written before it, and once pruned.
# zlib rather than zstandard: within 4 % of its size at level 3 for these Bundles, in the standard
# library, and 0.3 ms per Bundle is nothing at a lab's volume (benchmarks/bench_ledger.py).
PAYLOAD_ENCODING = "zlib"
ZLIB_LEVEL = 6  # zlib's default; level 9 saves under 1 % more on a Bundle


@dataclass(frozen=True, slots=True)
class NewMessage:
    """A message to put in the outbox.

    ``patient_key`` is an opaque key (a hash of the patient identifier, say) that only
    serves to keep one patient's messages in order. ``content_sha256`` identifies the
    content for de-duplication; leave it empty to use the hash of ``payload``, or pass
    the hash of the stable content when the payload carries a send-time stamp. ``carried``:
    each resource (or OBX) the payload carries, recorded with the message (``kind`` "fhir" or
    "hl7", ``lab`` the lab's name) and kept when the payload is pruned.
    """

    destination: str
    message_id: str
    test_id: str
    patient_key: str
    payload: bytes
    content_type: str
    content_sha256: str = ""
    kind: str = ""
    lab: str = ""
    carried: tuple[Carried, ...] = ()

    def content_hash(self) -> str:
        return self.content_sha256 or hashlib.sha256(self.payload).hexdigest()


@dataclass(frozen=True, slots=True)
class OutboxRow:
    """One outbox row, as stored."""

    id: int
    destination: str
    message_id: str
    test_id: str
    patient_key: str
    content_sha256: str
    input_sha256: str
    payload: bytes
    content_type: str
    state: OutboxState
    attempts: int
    next_attempt_at: float
    last_error: str
    created_at: float
    delivered_at: float | None
    ack_text: str


@dataclass(frozen=True, slots=True)
class Attempt:
    """One delivery attempt or operator action on an outbox row."""

    outbox_id: int
    at: float
    outcome: str
    detail: str


@dataclass(frozen=True, slots=True)
class DestinationSummary:
    """Outbox counts of one destination; ``oldest_pending_age`` in seconds (0: none)."""

    pending: int = 0
    delivered: int = 0
    rejected: int = 0
    oldest_pending_age: float = 0.0


_OUTBOX_COLUMNS = (
    "id, destination, message_id, test_id, patient_key, content_sha256, input_sha256, payload, "
    "payload_encoding, content_type, state, attempts, next_attempt_at, last_error, created_at, "
    "delivered_at, ack_text"
)

# The oldest pending row of the destination whose patient has no older pending row.
# Rows of one patient therefore leave strictly in enqueue order; a patient whose message
# is backing off does not hold up the others.
_NEXT_DUE = f"""
SELECT {_OUTBOX_COLUMNS} FROM outbox AS o
WHERE o.destination = ? AND o.state = 'pending' AND o.next_attempt_at <= ?
  AND NOT EXISTS (
    SELECT 1 FROM outbox AS p
    WHERE p.destination = o.destination AND p.patient_key = o.patient_key
      AND p.state = 'pending' AND p.id < o.id)
ORDER BY o.id LIMIT 1
"""


class OutboxLedger(Database):
    """The outbox part of the :class:`Ledger`."""

    def get(self, outbox_id: int) -> OutboxRow | None:
        """The outbox row with this id."""
        row = self._one(f"SELECT {_OUTBOX_COLUMNS} FROM outbox WHERE id = ?", (outbox_id,))
        return None if row is None else _outbox(row)

    def next_due(self, destination: str, now: float) -> OutboxRow | None:
        """The next message to send to ``destination`` at ``now``, if one is due."""
        row = self._one(_NEXT_DUE, (destination, now))
        return None if row is None else _outbox(row)

    def mark_delivered(self, outbox_id: int, ack_text: str) -> None:
        """The receiver acknowledged the message (and so each resource it carried)."""
        self._finish(
            outbox_id,
            "delivered",
            "state = 'delivered', delivered_at = :now, ack_text = :detail",
            ack_text,
        )

    def mark_rejected(self, outbox_id: int, reason: str) -> None:
        """The receiver refused the message: dead-letter it (no more retries)."""
        self._finish(outbox_id, "rejected", "state = 'rejected', last_error = :detail", reason)

    def mark_retry(self, outbox_id: int, error: str, next_attempt_at: float) -> None:
        """The attempt failed in a way worth retrying at ``next_attempt_at``."""
        self._finish(
            outbox_id,
            "retry",
            "last_error = :detail, next_attempt_at = :next",
            error,
            next_attempt_at,
        )

    def shift_due(self, seconds: float, after: float, until: float) -> int:
        """Move every pending due time in (``after``, ``until``] by ``seconds``; how many moved.

        For a step of the wall clock seen while the service runs: each message keeps the wait it had.
        """
        with self._write() as conn:
            return conn.execute(
                "UPDATE outbox SET next_attempt_at = next_attempt_at + ? "
                "WHERE state = 'pending' AND next_attempt_at > ? AND next_attempt_at <= ?",
                (seconds, after, until),
            ).rowcount

    def clamp_due(self, latest: float) -> int:
        """Bring every pending due time later than ``latest`` back to ``latest``; how many were.

        No wait the service sets is longer than its back-off cap, so a due time further away can
        only come from a wall clock that was set back (or a cap made shorter).
        """
        with self._write() as conn:
            return conn.execute(
                "UPDATE outbox SET next_attempt_at = ? WHERE state = 'pending' AND next_attempt_at > ?",
                (latest, latest),
            ).rowcount

    def rows(self, state: OutboxState, limit: int = 100) -> list[OutboxRow]:
        """Outbox rows in one state, oldest first (for ``status``: the dead letters, say)."""
        found = self._all(f"SELECT {_OUTBOX_COLUMNS} FROM outbox WHERE state = ? ORDER BY id LIMIT ?", (state, limit))
        return [_outbox(row) for row in found]

    def requeue(self, outbox_id: int) -> None:
        """Make a delivered or rejected message pending again, due now (``resend``)."""
        with self._write() as conn:
            now = self._now()
            cursor = conn.execute(
                "UPDATE outbox SET state = 'pending', next_attempt_at = ? WHERE id = ? AND pruned_at IS NULL",
                (now, outbox_id),
            )
            if cursor.rowcount != 1:
                raise LedgerError(f"{self._path}: no outbox row {outbox_id} with its payload (pruned, or never there)")
            _log_attempt(conn, outbox_id, now, "requeued", "")

    def requeue_rejected(self) -> int:
        """Make every dead-lettered message pending again; return how many."""
        with self._write() as conn:
            now = self._now()
            ids = [int(r["id"]) for r in conn.execute("SELECT id FROM outbox WHERE state = 'rejected'")]
            for outbox_id in ids:
                conn.execute(
                    "UPDATE outbox SET state = 'pending', next_attempt_at = ? WHERE id = ?",
                    (now, outbox_id),
                )
                _log_attempt(conn, outbox_id, now, "requeued", "")
            return len(ids)

    def latest_per_test(
        self, destination: str, *, since: float = 0.0, delivered_only: bool, after_id: int = 0, limit: int = 200
    ) -> list[OutboxRow]:
        """One page of the latest row per test id of ``destination`` (the latest delivered one with
        ``delivered_only``), sent or queued at ``since`` or later, in id order after ``after_id``.

        What ``reconcile`` checks: a correction replaces the row before it. Paged, so that a caller
        holds one page of payloads at a time.
        """
        # "+o.destination": walk the ids from after_id (the rowid), not the destination's index, which
        # would sort every row of the destination again for each page (quadratic over a large feed).
        found = self._all(
            f"SELECT {_OUTBOX_COLUMNS} FROM outbox AS o WHERE +o.destination = ? AND o.id > ? "
            "AND (? = 0 OR o.state = 'delivered') AND coalesce(o.delivered_at, o.created_at) >= ? "
            "AND NOT EXISTS (SELECT 1 FROM outbox AS l WHERE l.test_id = o.test_id "
            "AND l.destination = o.destination AND l.id > o.id AND (? = 0 OR l.state = 'delivered')) "
            "ORDER BY o.id LIMIT ?",
            (destination, after_id, int(delivered_only), since, int(delivered_only), limit),
        )
        return [_outbox(row) for row in found]

    def delivered_message(self, destination: str, message_id: str) -> OutboxRow | None:
        """The latest delivered row of ``destination`` with this message id (what ``reconcile --resend`` rebuilds)."""
        query = f"SELECT {_OUTBOX_COLUMNS} FROM outbox WHERE destination = ? AND message_id = ? AND state = 'delivered'"
        row = self._one(query + " ORDER BY id DESC LIMIT 1", (destination, message_id))
        return None if row is None else _outbox(row)

    def enqueue_again(self, message: NewMessage, input_sha256: str) -> tuple[int, str]:
        """Queue ``message`` for the input of an earlier one (``reconcile --resend``), once.

        The same destination, message id and content queued before is not added again: a pending
        row stays as it is ("pending"), a delivered or rejected one is made pending again
        ("requeued"); otherwise a new row ("queued"). The row id and which of the three.
        """
        content = message.content_hash()
        with self._write() as conn:
            now = self._now()
            row = conn.execute(
                "SELECT id, state FROM outbox WHERE destination = ? AND message_id = ? AND content_sha256 = ?",
                (message.destination, message.message_id, content),
            ).fetchone()
            if row is None:
                return enqueue(conn, message, input_sha256, now), "queued"
            if row["state"] == "pending":
                return int(row["id"]), "pending"
            conn.execute("UPDATE outbox SET state = 'pending', next_attempt_at = ? WHERE id = ?", (now, row["id"]))
            _log_attempt(conn, int(row["id"]), now, "requeued", "reconcile --resend")
            return int(row["id"]), "requeued"

    def history(self, outbox_id: int) -> list[Attempt]:
        """Every attempt and operator action on one outbox row, oldest first."""
        rows = self._all(
            "SELECT outbox_id, at, outcome, detail FROM attempts WHERE outbox_id = ? ORDER BY id",
            (outbox_id,),
        )
        return [Attempt(r["outbox_id"], r["at"], r["outcome"], r["detail"]) for r in rows]

    def _finish(
        self,
        outbox_id: int,
        outcome: str,
        assignments: str,
        detail: str,
        next_attempt_at: float = 0.0,
    ) -> None:
        """Apply an attempt's outcome to a pending row and log the attempt."""
        with self._write() as conn:
            now = self._now()
            cursor = conn.execute(
                f"UPDATE outbox SET {assignments}, attempts = attempts + 1 WHERE id = :id AND state = 'pending'",
                {
                    "id": outbox_id,
                    "now": now,
                    "detail": detail,
                    "next": next_attempt_at,
                },
            )
            if cursor.rowcount != 1:
                raise LedgerError(f"{self._path}: no pending outbox row {outbox_id}")
            _log_attempt(conn, outbox_id, now, outcome, detail)
            if outcome == "delivered":
                mark_sent_delivered(conn, outbox_id, now)


def enqueue(conn: sqlite3.Connection, message: NewMessage, input_sha256: str, now: float) -> int:
    """Add ``message`` inside the caller's transaction (once: same destination, id and content); its row id.

    What it carries is recorded with it, once (not again for a message already there).
    """
    content = message.content_hash()
    added = conn.execute(
        "INSERT INTO outbox (destination, message_id, test_id, patient_key, "
        "content_sha256, input_sha256, payload, payload_encoding, content_type, next_attempt_at, "
        "created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) "
        "ON CONFLICT (destination, message_id, content_sha256) DO NOTHING",
        (
            message.destination,
            message.message_id,
            message.test_id,
            message.patient_key,
            content,
            input_sha256,
            zlib.compress(message.payload, ZLIB_LEVEL),
            PAYLOAD_ENCODING,
            message.content_type,
            now,
            now,
        ),
    )
    row = conn.execute(
        "SELECT id FROM outbox WHERE destination = ? AND message_id = ? AND content_sha256 = ?",
        (message.destination, message.message_id, content),
    ).fetchone()
    outbox_id = int(row["id"])
    if added.rowcount == 1 and message.carried:
        where = (message.destination, message.kind, message.lab, message.test_id)
        record_sent(conn, outbox_id, where, message.carried, now)
    return outbox_id


def ids_of_input(conn: sqlite3.Connection, input_sha256: str) -> list[int]:
    """The outbox ids enqueued for one input, in enqueue order."""
    rows = conn.execute("SELECT id FROM outbox WHERE input_sha256 = ? ORDER BY id", (input_sha256,)).fetchall()
    return [int(r["id"]) for r in rows]


def destination_summaries(conn: sqlite3.Connection, now: float) -> dict[str, DestinationSummary]:
    """Outbox rows counted per destination and state, with the age of the oldest pending one."""
    rows = conn.execute(
        "SELECT destination, state, count(*) AS n, min(created_at) AS oldest FROM outbox GROUP BY destination, state"
    ).fetchall()
    return _by_destination(rows, now)


def _log_attempt(conn: sqlite3.Connection, outbox_id: int, at: float, outcome: str, detail: str) -> None:
    conn.execute(
        "INSERT INTO attempts (outbox_id, at, outcome, detail) VALUES (?, ?, ?, ?)",
        (outbox_id, at, outcome, detail),
    )


def _outbox(row: sqlite3.Row) -> OutboxRow:
    return OutboxRow(
        id=row["id"],
        destination=row["destination"],
        message_id=row["message_id"],
        test_id=row["test_id"],
        patient_key=row["patient_key"],
        content_sha256=row["content_sha256"],
        input_sha256=row["input_sha256"],
        payload=stored_payload(bytes(row["payload"]), row["payload_encoding"]),
        content_type=row["content_type"],
        state=row["state"],
        attempts=row["attempts"],
        next_attempt_at=row["next_attempt_at"],
        last_error=row["last_error"],
        created_at=row["created_at"],
        delivered_at=row["delivered_at"],
        ack_text=row["ack_text"],
    )


def stored_payload(data: bytes, encoding: str) -> bytes:
    """A payload as it was enqueued, from its stored bytes (zlib-compressed, or as they were before)."""
    if encoding == "zlib":
        return zlib.decompress(data)
    if encoding == "identity":
        return data
    raise LedgerError(f"outbox payload stored as {encoding!r}, which this dlco-bridge cannot read")


def _by_destination(rows: Sequence[sqlite3.Row], now: float) -> dict[str, DestinationSummary]:
    counts: dict[str, dict[str, float]] = {}
    for row in rows:
        entry = counts.setdefault(row["destination"], {})
        entry[row["state"]] = row["n"]
        if row["state"] == "pending":
            entry["age"] = max(0.0, now - row["oldest"])
    return {
        name: DestinationSummary(
            pending=int(c.get("pending", 0)),
            delivered=int(c.get("delivered", 0)),
            rejected=int(c.get("rejected", 0)),
            oldest_pending_age=c.get("age", 0.0),
        )
        for name, c in sorted(counts.items())
    }
