"""The ledger's tables: their DDL, and the migrations that bring any older file up to date.

Owns ``MIGRATIONS`` (append only), ``SCHEMA_VERSION`` and the two checks made when a file is
opened: a writer migrates it in one transaction, a reader refuses a version it does not know.
It must not read or write rows.

Outbox ids come from ``AUTOINCREMENT`` so they are never reused and their order is the
enqueue order, which delivery keeps per destination and patient.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

from bridge.errors import LedgerError

# Each step moves the schema from version N to N+1 (PRAGMA user_version). Append only:
# a released step is never edited, because databases in the field already ran it.
MIGRATIONS: tuple[tuple[str, ...], ...] = (
    (
        """CREATE TABLE inputs (
            sha256      TEXT PRIMARY KEY,
            source      TEXT NOT NULL,
            test_id     TEXT,
            first_seen  REAL NOT NULL,
            state       TEXT NOT NULL CHECK (state IN
                ('processed', 'duplicate', 'quarantined', 'correction')),
            reason      TEXT NOT NULL DEFAULT ''
        )""",
        "CREATE INDEX inputs_by_test ON inputs (test_id, first_seen)",
        """CREATE TABLE outbox (
            id              INTEGER PRIMARY KEY AUTOINCREMENT,
            destination     TEXT NOT NULL CHECK (destination <> ''),
            message_id      TEXT NOT NULL CHECK (message_id <> ''),
            test_id         TEXT NOT NULL,
            patient_key     TEXT NOT NULL,
            content_sha256  TEXT NOT NULL,
            input_sha256    TEXT NOT NULL,
            payload         BLOB NOT NULL CHECK (typeof(payload) = 'blob'),
            content_type    TEXT NOT NULL,
            state           TEXT NOT NULL DEFAULT 'pending'
                CHECK (state IN ('pending', 'delivered', 'rejected')),
            attempts        INTEGER NOT NULL DEFAULT 0,
            next_attempt_at REAL NOT NULL,
            last_error      TEXT NOT NULL DEFAULT '',
            created_at      REAL NOT NULL,
            delivered_at    REAL,
            ack_text        TEXT NOT NULL DEFAULT '',
            UNIQUE (destination, message_id, content_sha256)
        )""",
        "CREATE INDEX outbox_due ON outbox (destination, state, patient_key, id)",
        "CREATE INDEX outbox_by_input ON outbox (input_sha256, id)",
        """CREATE TABLE attempts (
            id          INTEGER PRIMARY KEY,
            outbox_id   INTEGER NOT NULL REFERENCES outbox (id),
            at          REAL NOT NULL,
            outcome     TEXT NOT NULL,
            detail      TEXT NOT NULL DEFAULT ''
        )""",
        "CREATE INDEX attempts_by_row ON attempts (outbox_id, id)",
    ),
    (
        # The same content dropped again: an input row exists already (sha256 is its key),
        # so each repeated drop is remembered here, for `status` and the audit trail.
        """CREATE TABLE repeated_drops (
            id      INTEGER PRIMARY KEY,
            sha256  TEXT NOT NULL REFERENCES inputs (sha256),
            source  TEXT NOT NULL,
            at      REAL NOT NULL
        )""",
    ),
    (
        # summary() counts per destination and state on every /metrics scrape: an index it
        # can answer from keeps that cheap as delivered rows pile up.
        "CREATE INDEX outbox_by_state ON outbox (destination, state, created_at)",
    ),
    (
        # Retention: a delivered row keeps its control id and content hash (so a resend is
        # recognised) after its payload is removed; pruned_at says when, and resend refuses it.
        "ALTER TABLE outbox ADD COLUMN pruned_at REAL",
        "CREATE INDEX outbox_by_delivery ON outbox (state, delivered_at)",
        "CREATE INDEX inputs_by_age ON inputs (first_seen)",
        "CREATE INDEX repeated_drops_by_age ON repeated_drops (at)",
    ),
    (
        # A file of many sessions (a field map's CSV or HL7 batch) is one input row under its
        # first test id; its messages carry every test id. Correction detection looks there.
        "CREATE INDEX outbox_by_test ON outbox (test_id, input_sha256)",
    ),
    (
        # What each message carried, resource by resource (identifiers, value as sent, status,
        # digest): a correction replaces what was final and withdraws what it no longer gives,
        # and reconciliation knows what to look for, after payloads (and outbox rows) are pruned.
        # No foreign key to outbox: these rows outlive the outbox rows they came from.
        """CREATE TABLE sent_resources (
            id                INTEGER PRIMARY KEY,
            outbox_id         INTEGER NOT NULL,
            destination       TEXT NOT NULL,
            kind              TEXT NOT NULL CHECK (kind IN ('fhir', 'hl7')),
            lab               TEXT NOT NULL,
            test_id           TEXT NOT NULL,
            resource_type     TEXT NOT NULL,
            identifier_system TEXT NOT NULL,
            identifier_value  TEXT NOT NULL,
            code_system       TEXT,
            code              TEXT,
            value             TEXT,
            unit              TEXT,
            status            TEXT NOT NULL,
            digest            TEXT NOT NULL,
            enqueued_at       REAL NOT NULL,
            delivered_at      REAL
        )""",
        "CREATE INDEX sent_by_test ON sent_resources (test_id, id)",
        "CREATE INDEX sent_by_identifier ON sent_resources (destination, identifier_system, identifier_value, id)",
        "CREATE INDEX sent_by_outbox ON sent_resources (outbox_id)",
    ),
    (
        # Payloads are stored compressed (zlib, RFC 1950) from this version on: a compact FHIR
        # Bundle of about 40 kB keeps about 3.3 kB. Rows written before stay as they are,
        # 'identity', and are read as they are; nothing is rewritten.
        "ALTER TABLE outbox ADD COLUMN payload_encoding TEXT NOT NULL DEFAULT 'identity' "
        "CHECK (payload_encoding IN ('identity', 'zlib'))",
    ),
)
SCHEMA_VERSION = len(MIGRATIONS)


def _version(conn: sqlite3.Connection) -> int:
    return int(conn.execute("PRAGMA user_version").fetchone()[0])


def check_version(conn: sqlite3.Connection, path: Path) -> None:
    """Refuse to read a file of another schema version (a reader never migrates)."""
    version = _version(conn)
    if version != SCHEMA_VERSION:
        raise LedgerError(f"{path}: schema v{version}, this dlco-bridge reads v{SCHEMA_VERSION}")


def migrate(conn: sqlite3.Connection, path: Path) -> None:
    """Run the missing migration steps and their version bumps in one transaction."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        version = _version(conn)
        if version > SCHEMA_VERSION:
            raise LedgerError(f"{path}: schema v{version} is newer than this dlco-bridge (v{SCHEMA_VERSION})")
        for number, step in enumerate(MIGRATIONS[version:], start=version + 1):
            for statement in step:
                conn.execute(statement)
            conn.execute(f"PRAGMA user_version = {number}")
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")
