"""The SQLite file under the ledger: how it is opened, and the one lock every call takes.

Owns the connection settings, the translation of every ``sqlite3`` error into ``LedgerError``
(or ``DiskFull`` when SQLite says the disk is full: the transaction rolled back, nothing is lost),
and :class:`Database`: one connection shared by the service's threads, one call at a time,
with reads (``_one``, ``_all``) and ``IMMEDIATE`` write transactions (``_write``). It must not
know what the tables mean (:mod:`.inputs`, :mod:`.outbox`) nor how they are made
(:mod:`.schema`), read inputs, talk to receivers or log.

Durability choices:

* WAL journal, so ``dlco-bridge status`` can read while the service writes.
* ``synchronous=FULL``. With WAL, NORMAL never corrupts the database, but the last
  commits may be rolled back after a power cut. The caller archives the input file as
  soon as :meth:`Ledger.record_input_and_enqueue` returns, so a rolled-back commit would
  lose those messages for good. FULL syncs the WAL on every commit; at a lab's volume
  one fsync per input costs nothing that matters.
"""

from __future__ import annotations

import sqlite3
import threading
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Self

from bridge.errors import DiskFull, LedgerError
from bridge.service.files import ROOM_BYTES, free_bytes

BUSY_TIMEOUT_MS = 5000


def is_disk_full(exc: sqlite3.Error, folder: Path) -> bool:
    """Whether SQLite failed for want of space in ``folder``, the database's.

    SQLITE_FULL says so; an I/O error (growing the WAL index, a write, an fsync) says so when the
    folder has under :data:`ROOM_BYTES` free, and is a broken disk otherwise.
    """
    # source: SQLite result codes (sqlite.org/rescode.html): SQLITE_FULL = 13, SQLITE_IOERR = 10;
    # an extended code keeps its primary code in the low byte
    code = getattr(exc, "sqlite_errorcode", None)
    if not isinstance(code, int) or code & 0xFF not in (sqlite3.SQLITE_FULL, sqlite3.SQLITE_IOERR):
        return False
    if code & 0xFF == sqlite3.SQLITE_FULL:
        return True
    try:
        return free_bytes(folder) < ROOM_BYTES
    except OSError:
        return False


@contextmanager
def translated(path: Path) -> Iterator[None]:
    """Turn every sqlite3 error into LedgerError naming the file; a full disk into DiskFull."""
    try:
        yield
    except sqlite3.Error as exc:
        if is_disk_full(exc, path.parent):
            raise DiskFull("ledger", str(path.parent), str(exc)) from exc
        raise LedgerError(f"{path}: {exc}") from exc


def connect(path: Path, read_only: bool, factory: type[sqlite3.Connection] = sqlite3.Connection) -> sqlite3.Connection:
    """A connection in autocommit mode (transactions are explicit), rows by column name.

    ``factory``: the connection class (a test's subclass fails writes as a full disk does).
    """
    if read_only:
        if not path.exists():
            raise LedgerError(f"no ledger at {path}")
        uri = f"{path.resolve().as_uri()}?mode=ro"
        conn = sqlite3.connect(uri, uri=True, isolation_level=None, check_same_thread=False, factory=factory)
    else:
        path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False, factory=factory)
    conn.row_factory = sqlite3.Row
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    return conn


def configure(conn: sqlite3.Connection) -> None:
    """WAL, ``synchronous=FULL`` and foreign keys, for a connection that writes."""
    mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
    if mode != "wal":
        raise sqlite3.OperationalError(f"journal mode is {mode}, WAL is required")
    conn.execute("PRAGMA synchronous = FULL")
    conn.execute("PRAGMA foreign_keys = ON")


class Database:
    """One open ledger file; calls are serialised, threads may share it."""

    def __init__(self, conn: sqlite3.Connection, path: Path, now: Callable[[], float]) -> None:
        self._conn = conn
        self._path = path
        self._now = now
        self._lock = threading.Lock()

    @property
    def path(self) -> Path:
        return self._path

    def close(self) -> None:
        with self._lock:
            self._conn.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _one(self, sql: str, params: tuple[object, ...]) -> sqlite3.Row | None:
        with self._lock, translated(self._path):
            row: sqlite3.Row | None = self._conn.execute(sql, params).fetchone()
            return row

    def _all(self, sql: str, params: tuple[object, ...] | Mapping[str, object]) -> list[sqlite3.Row]:
        with self._lock, translated(self._path):
            return self._conn.execute(sql, params).fetchall()

    @contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One IMMEDIATE transaction: all of it is committed, or none of it."""
        with self._lock, translated(self._path):
            self._conn.execute("BEGIN IMMEDIATE")
            try:
                yield self._conn
                self._conn.execute("COMMIT")
            except BaseException:
                # A failed COMMIT (disk full, I/O error) leaves the transaction open.
                if self._conn.in_transaction:
                    self._conn.execute("ROLLBACK")
                raise
