"""The service's durable state: the inputs seen, and the outbox of messages to deliver.

Owns the SQLite file in the state folder (schema, migrations, transactions) and the
single-instance lock. It must not read inputs, build messages, talk to receivers or log:
the watcher and the delivery loop call it, and it only records what they tell it.

Durability choices:

* WAL journal, so ``dlco-bridge status`` can read while the service writes.
* ``synchronous=FULL``. With WAL, NORMAL never corrupts the database, but the last
  commits may be rolled back after a power cut. The caller archives the input file as
  soon as :meth:`Ledger.record_input_and_enqueue` returns, so a rolled-back commit would
  lose those messages for good. FULL syncs the WAL on every commit; at a lab's volume
  one fsync per input costs nothing that matters.
* Outbox ids come from ``AUTOINCREMENT`` so they are never reused and their order is the
  enqueue order, which delivery keeps per destination and patient.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Literal

from bridge.errors import LedgerError

InputState = Literal["processed", "duplicate", "quarantined", "correction"]
OutboxState = Literal["pending", "delivered", "rejected"]

LOCK_NAME = "service.lock"
BUSY_TIMEOUT_MS = 5000

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
)
SCHEMA_VERSION = len(MIGRATIONS)


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


@dataclass(frozen=True, slots=True)
class NewMessage:
    """A message to put in the outbox.

    ``patient_key`` is an opaque key (a hash of the patient identifier, say) that only
    serves to keep one patient's messages in order. ``content_sha256`` identifies the
    content for de-duplication; leave it empty to use the hash of ``payload``, or pass
    the hash of the stable content when the payload carries a send-time stamp.
    """

    destination: str
    message_id: str
    test_id: str
    patient_key: str
    payload: bytes
    content_type: str
    content_sha256: str = ""

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


_OUTBOX_COLUMNS = (
    "id, destination, message_id, test_id, patient_key, content_sha256, input_sha256, payload, "
    "content_type, state, attempts, next_attempt_at, last_error, created_at, "
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


@contextmanager
def _translated(path: Path) -> Iterator[None]:
    """Turn every sqlite3 error into LedgerError naming the file."""
    try:
        yield
    except sqlite3.Error as exc:
        raise LedgerError(f"{path}: {exc}") from exc


class Ledger:
    """The SQLite state of one service; calls are serialised, threads may share it."""

    def __init__(self, conn: sqlite3.Connection, path: Path, now: Callable[[], float]) -> None:
        self._conn = conn
        self._path = path
        self._now = now
        self._lock = threading.Lock()

    @classmethod
    def open(
        cls,
        path: Path,
        now: Callable[[], float] = time.time,
        *,
        read_only: bool = False,
    ) -> Ledger:
        """Open (and create or migrate, unless ``read_only``) the ledger at ``path``."""
        with _translated(path):
            conn = _connect(path, read_only)
            try:
                if read_only:
                    _check_version(conn, path)
                else:
                    _configure(conn)
                    _migrate(conn, path)
            except BaseException:
                conn.close()
                raise
        return cls(conn, path, now)

    @property
    def path(self) -> Path:
        return self._path

    def close(self) -> None:
        with self._lock:
            self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- inputs ----------------------------------------------------------------------

    def seen(self, sha256: str) -> InputRecord | None:
        """The input with this content hash, if it was ever recorded."""
        row = self._one("SELECT * FROM inputs WHERE sha256 = ?", (sha256,))
        return None if row is None else _input(row)

    def last_for_test(self, test_id: str) -> InputRecord | None:
        """The latest accepted input for ``test_id``, to recognise a correction."""
        row = self._one(
            "SELECT * FROM inputs WHERE test_id = ? AND state <> 'quarantined' "
            "ORDER BY first_seen DESC, rowid DESC LIMIT 1",
            (test_id,),
        )
        return None if row is None else _input(row)

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
            inserted = conn.execute(
                "INSERT INTO inputs (sha256, source, test_id, first_seen, state, "
                "reason) VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (sha256) DO NOTHING",
                (new.sha256, new.source, new.test_id, now, new.state, new.reason),
            ).rowcount
            if not inserted:
                return _ids_of_input(conn, new.sha256)
            return [_enqueue(conn, message, new.sha256, now) for message in messages]

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

    # ---- outbox ----------------------------------------------------------------------

    def get(self, outbox_id: int) -> OutboxRow | None:
        """The outbox row with this id."""
        row = self._one(f"SELECT {_OUTBOX_COLUMNS} FROM outbox WHERE id = ?", (outbox_id,))
        return None if row is None else _outbox(row)

    def next_due(self, destination: str, now: float) -> OutboxRow | None:
        """The next message to send to ``destination`` at ``now``, if one is due."""
        row = self._one(_NEXT_DUE, (destination, now))
        return None if row is None else _outbox(row)

    def mark_delivered(self, outbox_id: int, ack_text: str) -> None:
        """The receiver acknowledged the message."""
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

    def rows(self, state: OutboxState, limit: int = 100) -> list[OutboxRow]:
        """Outbox rows in one state, oldest first (for ``status``: the dead letters, say)."""
        with self._lock, _translated(self._path):
            found = self._conn.execute(
                f"SELECT {_OUTBOX_COLUMNS} FROM outbox WHERE state = ? ORDER BY id LIMIT ?", (state, limit)
            ).fetchall()
        return [_outbox(row) for row in found]

    def requeue(self, outbox_id: int) -> None:
        """Make a delivered or rejected message pending again, due now (``resend``)."""
        with self._write() as conn:
            now = self._now()
            cursor = conn.execute(
                "UPDATE outbox SET state = 'pending', next_attempt_at = ? WHERE id = ?",
                (now, outbox_id),
            )
            if cursor.rowcount != 1:
                raise LedgerError(f"{self._path}: no outbox row {outbox_id}")
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

    def history(self, outbox_id: int) -> list[Attempt]:
        """Every attempt and operator action on one outbox row, oldest first."""
        with self._lock, _translated(self._path):
            rows = self._conn.execute(
                "SELECT outbox_id, at, outcome, detail FROM attempts WHERE outbox_id = ? ORDER BY id",
                (outbox_id,),
            ).fetchall()
        return [Attempt(r["outbox_id"], r["at"], r["outcome"], r["detail"]) for r in rows]

    def summary(self) -> LedgerSummary:
        """Inputs and outbox rows counted, and the age of the oldest pending message."""
        now = self._now()
        with self._lock, _translated(self._path):
            inputs = dict(self._conn.execute("SELECT state, count(*) FROM inputs GROUP BY state").fetchall())
            repeated = self._conn.execute("SELECT count(*) FROM repeated_drops").fetchone()[0]
            rows = self._conn.execute(
                "SELECT destination, state, count(*) AS n, min(created_at) AS oldest "
                "FROM outbox GROUP BY destination, state"
            ).fetchall()
        return LedgerSummary(
            processed=inputs.get("processed", 0),
            corrections=inputs.get("correction", 0),
            duplicates=inputs.get("duplicate", 0) + repeated,
            quarantined=inputs.get("quarantined", 0),
            destinations=_by_destination(rows, now),
        )

    # ---- plumbing --------------------------------------------------------------------

    def _one(self, sql: str, params: tuple[object, ...]) -> sqlite3.Row | None:
        with self._lock, _translated(self._path):
            row: sqlite3.Row | None = self._conn.execute(sql, params).fetchone()
            return row

    @contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One IMMEDIATE transaction: all of it is committed, or none of it."""
        with self._lock, _translated(self._path):
            self._conn.execute("BEGIN IMMEDIATE")
            try:
                yield self._conn
                self._conn.execute("COMMIT")
            except BaseException:
                # A failed COMMIT (disk full, I/O error) leaves the transaction open.
                if self._conn.in_transaction:
                    self._conn.execute("ROLLBACK")
                raise

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


class ServiceLock:
    """An OS lock on ``<state_dir>/service.lock``, held while the service runs.

    ``flock`` is released by the kernel when the process dies, even by kill -9, so a
    crashed service never leaves a stale lock behind.
    """

    def __init__(self, path: Path, handle: IO[str]) -> None:
        self.path = path
        self._handle = handle

    @classmethod
    def acquire(cls, state_dir: Path) -> ServiceLock:
        """Take the lock, or raise LedgerError when another service holds it."""
        path = state_dir / LOCK_NAME
        try:
            state_dir.mkdir(parents=True, exist_ok=True)
            handle = path.open("a+", encoding="ascii")
        except OSError as exc:
            raise LedgerError(f"cannot open {path}: {exc}") from exc
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            handle.close()
            raise LedgerError(f"another dlco-bridge service holds {path}") from exc
        # The pid is for the operator's eyes only; the lock is the flock itself.
        handle.truncate(0)
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        return cls(path, handle)

    def release(self) -> None:
        if not self._handle.closed:
            fcntl.flock(self._handle.fileno(), fcntl.LOCK_UN)
            self._handle.close()

    def __enter__(self) -> ServiceLock:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def _connect(path: Path, read_only: bool) -> sqlite3.Connection:
    if read_only:
        if not path.exists():
            raise LedgerError(f"no ledger at {path}")
        uri = f"{path.resolve().as_uri()}?mode=ro"
        conn = sqlite3.connect(uri, uri=True, isolation_level=None, check_same_thread=False)
    else:
        path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    conn.row_factory = sqlite3.Row
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    return conn


def _configure(conn: sqlite3.Connection) -> None:
    mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
    if mode != "wal":
        raise sqlite3.OperationalError(f"journal mode is {mode}, WAL is required")
    conn.execute("PRAGMA synchronous = FULL")
    conn.execute("PRAGMA foreign_keys = ON")


def _version(conn: sqlite3.Connection) -> int:
    return int(conn.execute("PRAGMA user_version").fetchone()[0])


def _check_version(conn: sqlite3.Connection, path: Path) -> None:
    version = _version(conn)
    if version != SCHEMA_VERSION:
        raise LedgerError(f"{path}: schema v{version}, this dlco-bridge reads v{SCHEMA_VERSION}")


def _migrate(conn: sqlite3.Connection, path: Path) -> None:
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


def _ids_of_input(conn: sqlite3.Connection, input_sha256: str) -> list[int]:
    rows = conn.execute("SELECT id FROM outbox WHERE input_sha256 = ? ORDER BY id", (input_sha256,)).fetchall()
    return [int(r["id"]) for r in rows]


def _enqueue(conn: sqlite3.Connection, message: NewMessage, input_sha256: str, now: float) -> int:
    content = message.content_hash()
    conn.execute(
        "INSERT INTO outbox (destination, message_id, test_id, patient_key, "
        "content_sha256, input_sha256, payload, content_type, next_attempt_at, "
        "created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?) "
        "ON CONFLICT (destination, message_id, content_sha256) DO NOTHING",
        (
            message.destination,
            message.message_id,
            message.test_id,
            message.patient_key,
            content,
            input_sha256,
            message.payload,
            message.content_type,
            now,
            now,
        ),
    )
    row = conn.execute(
        "SELECT id FROM outbox WHERE destination = ? AND message_id = ? AND content_sha256 = ?",
        (message.destination, message.message_id, content),
    ).fetchone()
    return int(row["id"])


def _log_attempt(conn: sqlite3.Connection, outbox_id: int, at: float, outcome: str, detail: str) -> None:
    conn.execute(
        "INSERT INTO attempts (outbox_id, at, outcome, detail) VALUES (?, ?, ?, ?)",
        (outbox_id, at, outcome, detail),
    )


def _input(row: sqlite3.Row) -> InputRecord:
    return InputRecord(
        sha256=row["sha256"],
        source=row["source"],
        test_id=row["test_id"],
        first_seen=row["first_seen"],
        state=row["state"],
        reason=row["reason"],
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
        payload=bytes(row["payload"]),
        content_type=row["content_type"],
        state=row["state"],
        attempts=row["attempts"],
        next_attempt_at=row["next_attempt_at"],
        last_error=row["last_error"],
        created_at=row["created_at"],
        delivered_at=row["delivered_at"],
        ack_text=row["ack_text"],
    )


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
