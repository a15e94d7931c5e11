"""The inputs the service has read, by the SHA-256 of their content.

Owns the ``inputs`` and ``repeated_drops`` rows: what became of each content (processed,
correction, quarantined) and each time the same content was dropped again. It must not touch
the outbox: recording an input together with its messages is one transaction of the
:class:`Ledger`, and so is finding the latest input of a test id (to recognise a correction).
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from typing import Literal

from bridge.service.ledger.database import Database

InputState = Literal["processed", "duplicate", "quarantined", "correction"]


@dataclass(frozen=True, slots=True)
class NewInput:
    """An input file that was read; ``state`` says what became of it."""

    sha256: str
    source: str
    test_id: str
    state: InputState = "processed"
    reason: str = ""


@dataclass(frozen=True, slots=True)
class InputRecord:
    """An input as the ledger remembers it."""

    sha256: str
    source: str
    test_id: str | None
    first_seen: float
    state: InputState
    reason: str


class InputLedger(Database):
    """The inputs part of the :class:`Ledger`."""

    def seen(self, sha256: str) -> InputRecord | None:
        """The input with this content hash, if it was ever recorded."""
        row = self._one("SELECT * FROM inputs WHERE sha256 = ?", (sha256,))
        return None if row is None else input_record(row)

    def record_quarantine(self, sha256: str, source: str, reason: str) -> None:
        """Remember that this input was quarantined, and why."""
        with self._write() as conn:
            conn.execute(
                "INSERT INTO inputs (sha256, source, test_id, first_seen, state, "
                "reason) VALUES (?, ?, NULL, ?, 'quarantined', ?) "
                "ON CONFLICT (sha256) DO NOTHING",
                (sha256, source, self._now(), reason),
            )

    def record_duplicate(self, sha256: str, source: str) -> None:
        """Remember that content already recorded was dropped again (nothing is sent)."""
        with self._write() as conn:
            conn.execute(
                "INSERT INTO repeated_drops (sha256, source, at) VALUES (?, ?, ?)",
                (sha256, source, self._now()),
            )


def insert_input(conn: sqlite3.Connection, new: NewInput, now: float) -> bool:
    """Record ``new`` inside the caller's transaction; False when its content was recorded before."""
    inserted = conn.execute(
        "INSERT INTO inputs (sha256, source, test_id, first_seen, state, "
        "reason) VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (sha256) DO NOTHING",
        (new.sha256, new.source, new.test_id, now, new.state, new.reason),
    ).rowcount
    return bool(inserted)


def input_counts(conn: sqlite3.Connection) -> dict[str, int]:
    """Inputs per state, with every repeated drop counted as a ``duplicate``."""
    counts: dict[str, int] = dict(conn.execute("SELECT state, count(*) FROM inputs GROUP BY state").fetchall())
    repeated = int(conn.execute("SELECT count(*) FROM repeated_drops").fetchone()[0])
    counts["duplicate"] = counts.get("duplicate", 0) + repeated
    return counts


def input_record(row: sqlite3.Row) -> InputRecord:
    return InputRecord(
        sha256=row["sha256"],
        source=row["source"],
        test_id=row["test_id"],
        first_seen=row["first_seen"],
        state=row["state"],
        reason=row["reason"],
    )
