"""The ``Ledger``: the one object the intake, the delivery loop and the CLI hold.

Owns opening the file (create and migrate it, or only check its version for a reader) and
what spans inputs and outbox: recording an input together with its messages in one
transaction, the latest accepted input of a test id (to recognise a correction), and the
summary ``status`` and ``/metrics`` report. Everything else it inherits
from :class:`.inputs.InputLedger`, :class:`.outbox.OutboxLedger`,
:class:`.retention.RetentionLedger` and :class:`.sent.SentLedger` (what was sent, resource by
resource). It must not read inputs, build messages, talk to receivers or log.
"""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from bridge.service.ledger.database import configure, connect, translated
from bridge.service.ledger.inputs import InputLedger, InputRecord, NewInput, input_counts, input_record, insert_input
from bridge.service.ledger.outbox import (
    DestinationSummary,
    NewMessage,
    OutboxLedger,
    destination_summaries,
    enqueue,
    ids_of_input,
)
from bridge.service.ledger.retention import RetentionLedger
from bridge.service.ledger.schema import check_version, migrate
from bridge.service.ledger.sent import SentLedger


@dataclass(frozen=True, slots=True)
class LedgerSummary:
    """What ``status`` and ``/metrics`` report."""

    processed: int = 0
    corrections: int = 0
    duplicates: int = 0
    quarantined: int = 0
    destinations: dict[str, DestinationSummary] = field(default_factory=dict)

    @property
    def pending(self) -> int:
        return sum(d.pending for d in self.destinations.values())

    @property
    def delivered(self) -> int:
        return sum(d.delivered for d in self.destinations.values())

    @property
    def rejected(self) -> int:
        return sum(d.rejected for d in self.destinations.values())


class Ledger(InputLedger, OutboxLedger, RetentionLedger, SentLedger):
    """The SQLite state of one service; calls are serialised, threads may share it."""

    @classmethod
    def open(
        cls,
        path: Path,
        now: Callable[[], float] = time.time,
        *,
        read_only: bool = False,
        factory: type[sqlite3.Connection] = sqlite3.Connection,
    ) -> Ledger:
        """Open (and create or migrate, unless ``read_only``) the ledger at ``path``.

        ``factory``: the SQLite connection class, a seam for tests (one that fails writes as a full disk).
        """
        with translated(path):
            conn = connect(path, read_only, factory)
            try:
                if read_only:
                    check_version(conn, path)
                else:
                    configure(conn)
                    migrate(conn, path)
            except BaseException:
                conn.close()
                raise
        return cls(conn, path, now)

    def record_input_and_enqueue(self, new: NewInput, messages: Sequence[NewMessage]) -> list[int]:
        """Record the input and enqueue its messages in one transaction; return row ids.

        Committed before it returns, so the caller may archive the input afterwards. A
        message already in the outbox (same destination, message id and content) is not
        added again; its existing id is returned. An input recorded before (a restart
        after a crash between this call and the archiving) enqueues nothing new: the ids
        of the messages it enqueued then come back.
        """
        now = self._now()
        with self._write() as conn:
            if not insert_input(conn, new, now):
                return ids_of_input(conn, new.sha256)
            return [enqueue(conn, message, new.sha256, now) for message in messages]

    def last_for_test(self, test_id: str) -> InputRecord | None:
        """The latest accepted input that carried ``test_id``, to recognise a correction.

        A one-session input names its test id in its own row; a file of many sessions names
        only its first there, and every test id in its messages.
        """
        row = self._one(
            "SELECT * FROM inputs WHERE state <> 'quarantined' AND (test_id = ? OR sha256 IN "
            "(SELECT input_sha256 FROM outbox WHERE test_id = ?)) ORDER BY first_seen DESC, rowid DESC LIMIT 1",
            (test_id, test_id),
        )
        return None if row is None else input_record(row)

    def summary(self) -> LedgerSummary:
        """Inputs and outbox rows counted, and the age of the oldest pending message."""
        now = self._now()
        with self._lock, translated(self._path):
            inputs = input_counts(self._conn)
            destinations = destination_summaries(self._conn, now)
        return LedgerSummary(
            processed=inputs.get("processed", 0),
            corrections=inputs.get("correction", 0),
            duplicates=inputs.get("duplicate", 0),
            quarantined=inputs.get("quarantined", 0),
            destinations=destinations,
        )
