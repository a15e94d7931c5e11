"""What the service sent, resource by resource: identifiers, values and digests, kept when payloads are pruned.

Owns the ``sent_resources`` rows: one per FHIR resource or HL7 OBX of each outbox message,
written in the transaction that enqueues the message (:func:`record_sent`), marked delivered
when the receiver acknowledges it (:func:`mark_sent_delivered`). Read two ways: the latest
status of each identifier of a test id, delivered or on its way (:meth:`SentLedger.sent_before`:
a correction replaces what was final and withdraws what it no longer gives), and the latest
delivered record per destination and identifier (:meth:`SentLedger.sent_resources`, what
reconciliation compares a receiver with). Retention never removes the latest record of an
identifier; it removes older ones once a newer one was delivered and the memory period has passed.
It must not read inputs, build messages, talk to receivers or log.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime

from bridge.model import Carried
from bridge.service.ledger.database import Database

PAGE = 1000  # rows read per lock hold while iterating sent_resources


@dataclass(frozen=True, slots=True)
class SentResource:
    """One resource (FHIR) or OBX (HL7 v2) as it was sent to a destination and acknowledged.

    ``value`` is the value's text exactly as sent; ``status`` as sent (``final``, ``corrected``,
    ``entered-in-error``, ``preliminary``, or the OBX-11 letter); ``digest`` the SHA-256 (hex) of
    the resource's compact JSON or the segment's text; ``message_id`` the outbox row.
    """

    destination: str
    kind: str  # "fhir" or "hl7"
    lab: str
    test_id: str
    resource_type: str  # FHIR resource type, or "OBX"
    identifier_system: str
    identifier_value: str
    code_system: str | None
    code: str | None
    value: str | None
    unit: str | None
    status: str
    digest: str
    message_id: int
    sent_at: datetime


_COLUMNS = (
    "outbox_id, destination, kind, lab, test_id, resource_type, identifier_system, identifier_value, "
    "code_system, code, value, unit, status, digest, enqueued_at"
)
# The latest delivered record of each (destination, identifier), in id order, a page at a time.
_LATEST_DELIVERED = """
SELECT s.* FROM sent_resources AS s
WHERE s.id > :after AND s.delivered_at IS NOT NULL
  AND (:destination IS NULL OR s.destination = :destination)
  AND (:since IS NULL OR s.delivered_at >= :since)
  AND NOT EXISTS (
    SELECT 1 FROM sent_resources AS n
    WHERE n.destination = s.destination AND n.identifier_system = s.identifier_system
      AND n.identifier_value = s.identifier_value AND n.delivered_at IS NOT NULL AND n.id > s.id)
ORDER BY s.id LIMIT :page
"""


class SentLedger(Database):
    """The sent-resources part of the :class:`Ledger`."""

    def sent_resources(self, destination: str | None = None, since: datetime | None = None) -> Iterator[SentResource]:
        """The latest delivered record per (destination, identifier), oldest first; ``since``: delivered from then."""
        after = 0
        stamp = since.timestamp() if since is not None else None
        while True:
            rows = self._all(
                _LATEST_DELIVERED, {"after": after, "destination": destination, "since": stamp, "page": PAGE}
            )
            for row in rows:
                yield _sent(row)
            if len(rows) < PAGE:
                return
            after = int(rows[-1]["id"])

    def sent_before(self, test_id: str) -> tuple[tuple[str, str], ...]:
        """(identifier value, status last sent) of each result sent for ``test_id``, to any destination.

        Counts messages delivered or still on their way (they leave before a later one of the
        same patient), not those a receiver refused for good; the latest record of an
        identifier wins. Empty when nothing was sent (or before this record was kept).
        """
        rows = self._all(
            "SELECT s.identifier_value, s.status FROM sent_resources AS s "
            "LEFT JOIN outbox AS o ON o.id = s.outbox_id "
            "WHERE s.test_id = ? AND (o.state IS NULL OR o.state <> 'rejected') ORDER BY s.id",
            (test_id,),
        )
        latest = {str(r["identifier_value"]): str(r["status"]) for r in rows}
        return tuple(latest.items())


def record_sent(
    conn: sqlite3.Connection,
    outbox_id: int,
    where: tuple[str, str, str, str],
    carried: Sequence[Carried],
    now: float,
) -> None:
    """Inside the enqueuing transaction: one row per resource of outbox row ``outbox_id``.

    ``where``: the message's destination, kind ("fhir" or "hl7"), lab and test id.
    """
    conn.executemany(
        f"INSERT INTO sent_resources ({_COLUMNS}) VALUES ({', '.join('?' * 15)})",
        [_row(outbox_id, where, c, now) for c in carried],
    )


def _row(outbox_id: int, where: tuple[str, str, str, str], c: Carried, now: float) -> tuple[object, ...]:
    identity = (c.resource_type, c.identifier_system, c.identifier_value)
    return (outbox_id, *where, *identity, c.code_system, c.code, c.value, c.unit, c.status, c.digest, now)


def mark_sent_delivered(conn: sqlite3.Connection, outbox_id: int, now: float) -> None:
    """Inside the transaction that marks outbox row ``outbox_id`` delivered."""
    conn.execute("UPDATE sent_resources SET delivered_at = ? WHERE outbox_id = ?", (now, outbox_id))


def prune_superseded(conn: sqlite3.Connection, before: float) -> int:
    """Remove records delivered before ``before`` that a later delivered record of the same identifier replaces."""
    return conn.execute(
        "DELETE FROM sent_resources WHERE delivered_at < ? AND EXISTS (SELECT 1 FROM sent_resources AS n "
        "WHERE n.destination = sent_resources.destination AND n.identifier_system = sent_resources.identifier_system "
        "AND n.identifier_value = sent_resources.identifier_value AND n.delivered_at IS NOT NULL "
        "AND n.id > sent_resources.id)",
        (before,),
    ).rowcount


def _sent(row: sqlite3.Row) -> SentResource:
    return SentResource(
        destination=row["destination"],
        kind=row["kind"],
        lab=row["lab"],
        test_id=row["test_id"],
        resource_type=row["resource_type"],
        identifier_system=row["identifier_system"],
        identifier_value=row["identifier_value"],
        code_system=row["code_system"],
        code=row["code"],
        value=row["value"],
        unit=row["unit"],
        status=row["status"],
        digest=row["digest"],
        message_id=int(row["outbox_id"]),
        sent_at=datetime.fromtimestamp(row["delivered_at"], UTC),
    )
