"""Retention: what the ledger forgets, and when, so that it can run for years.

Owns pruning and the ledger's size. Two periods: after ``payload_days`` a delivered
message loses its payload and its attempt history (and repeated drops are forgotten); after
the longer ``memory_days`` the delivered row itself goes, and so does an input none of whose
messages remain. Until then the input's SHA-256 and each message's control id and content hash
stay, which is what makes a resend recognisable as a duplicate. A pending or rejected message is
never touched, nor its input. The record of what each message carried (``sent``) outlives both
periods: only a record that a later delivered one of the same identifier replaces goes, after
``memory_days``. It must not read inputs, talk to receivers or log.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass

from bridge.service.ledger.database import Database, translated
from bridge.service.ledger.sent import prune_superseded

DAY = 86_400.0
# VACUUM rewrites the whole file: worth it only when much of it is free pages.
VACUUM_FREE_FRACTION = 0.25
VACUUM_MIN_FREE_BYTES = 1 << 20


@dataclass(frozen=True, slots=True)
class PruneResult:
    """What one prune removed, and the file's size in bytes before and after."""

    payloads: int = 0
    attempts: int = 0
    repeated_drops: int = 0
    messages: int = 0
    inputs: int = 0
    sent_records: int = 0  # records of sent resources a later delivered one of the same identifier replaces
    vacuumed: bool = False
    bytes_before: int = 0
    bytes_after: int = 0


@dataclass(frozen=True, slots=True)
class LedgerSize:
    """The ledger file in bytes (with its WAL), and how much of it is free pages."""

    bytes: int
    free_bytes: int
    payload_bytes: int


class RetentionLedger(Database):
    """The retention part of the :class:`Ledger`."""

    def size(self) -> LedgerSize:
        """The file's size, its free pages, and the bytes of payloads it still holds."""
        with self._lock, translated(self._path):
            return _size(self._conn)

    def prune(self, payload_days: float, memory_days: float, *, vacuum: bool = False) -> PruneResult:
        """Forget what retention allows (see the module); VACUUM afterwards if ``vacuum`` and it pays."""
        now = self._now()
        payload_cutoff = now - payload_days * DAY
        memory_cutoff = now - max(memory_days, payload_days) * DAY
        before = self.size()
        with self._write() as conn:
            attempts = conn.execute(
                "DELETE FROM attempts WHERE outbox_id IN (SELECT id FROM outbox "
                "WHERE state = 'delivered' AND delivered_at < ?)",
                (payload_cutoff,),
            ).rowcount
            payloads = conn.execute(
                "UPDATE outbox SET payload = X'', payload_encoding = 'identity', ack_text = '', pruned_at = ? "
                "WHERE state = 'delivered' AND delivered_at < ? AND pruned_at IS NULL",
                (now, payload_cutoff),
            ).rowcount
            drops = conn.execute("DELETE FROM repeated_drops WHERE at < ?", (payload_cutoff,)).rowcount
            messages = conn.execute(
                "DELETE FROM outbox WHERE state = 'delivered' AND delivered_at < ?", (memory_cutoff,)
            ).rowcount
            # An input goes only when none of its messages is left (a pending or rejected one never goes).
            inputs = conn.execute(
                "DELETE FROM inputs WHERE first_seen < ? AND NOT EXISTS "
                "(SELECT 1 FROM outbox WHERE outbox.input_sha256 = inputs.sha256) AND NOT EXISTS "
                "(SELECT 1 FROM repeated_drops WHERE repeated_drops.sha256 = inputs.sha256)",
                (memory_cutoff,),
            ).rowcount
            sent = prune_superseded(conn, memory_cutoff)  # the latest record of an identifier always stays
        vacuumed = vacuum and self._vacuum_if_it_pays(before)
        after = self.size().bytes
        return PruneResult(payloads, attempts, drops, messages, inputs, sent, vacuumed, before.bytes, after)

    def _vacuum_if_it_pays(self, before: LedgerSize) -> bool:
        # Emptied payloads leave pages half full rather than free: count the bytes released too.
        size = self.size()
        reclaimable = size.free_bytes + max(0, before.payload_bytes - size.payload_bytes)
        if reclaimable < max(VACUUM_MIN_FREE_BYTES, VACUUM_FREE_FRACTION * size.bytes):
            return False
        with self._lock, translated(self._path):
            self._conn.execute("VACUUM")
            self._conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        return True


def _size(conn: sqlite3.Connection) -> LedgerSize:
    page_size = int(conn.execute("PRAGMA page_size").fetchone()[0])
    pages = int(conn.execute("PRAGMA page_count").fetchone()[0])
    free = int(conn.execute("PRAGMA freelist_count").fetchone()[0])
    payload = int(conn.execute("SELECT coalesce(sum(length(payload)), 0) FROM outbox").fetchone()[0])
    return LedgerSize(pages * page_size, free * page_size, payload)
