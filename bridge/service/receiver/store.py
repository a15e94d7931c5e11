"""What the stand-in FHIR endpoint created: one SQLite file, one row per resource.

Owns finding a resource by the search its creator used (``Observation?identifier=s|v``) and
creating or updating it; version ids count updates. It must not parse HTTP or Bundles.
"""

from __future__ import annotations

import json
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

_SCHEMA = """CREATE TABLE IF NOT EXISTS resources (
    id          INTEGER PRIMARY KEY,
    type        TEXT NOT NULL,
    criteria    TEXT NOT NULL,
    version     INTEGER NOT NULL,
    body        TEXT NOT NULL,
    created_at  REAL NOT NULL,
    updated_at  REAL NOT NULL,
    UNIQUE (type, criteria)
)"""


@dataclass(frozen=True, slots=True)
class StoredResource:
    """One resource as the stand-in keeps it."""

    type: str
    id: int
    version: int
    criteria: str
    body: dict[str, Any]

    @property
    def reference(self) -> str:
        return f"{self.type}/{self.id}"


class ResourceStore:
    """The resources one stand-in created; threads may share it."""

    def __init__(self, path: Path) -> None:
        path.parent.mkdir(parents=True, exist_ok=True)
        self.path = path
        self._conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        self._conn.execute(_SCHEMA)
        self._lock = threading.Lock()

    def close(self) -> None:
        self._conn.close()

    def transaction(self) -> _Transaction:
        """A write transaction: a Bundle's entries all succeed or none does."""
        return _Transaction(self)

    def find(self, kind: str, criteria: str) -> StoredResource | None:
        row = self._conn.execute(
            "SELECT type, id, version, criteria, body FROM resources WHERE type = ? AND criteria = ?", (kind, criteria)
        ).fetchone()
        return None if row is None else _stored(row)

    def create(self, kind: str, criteria: str, body: dict[str, Any]) -> StoredResource:
        now = time.time()
        cursor = self._conn.execute(
            "INSERT INTO resources (type, criteria, version, body, created_at, updated_at) "
            "VALUES (?, ?, 1, '{}', ?, ?)",
            (kind, criteria, now, now),
        )
        return self._write_body(kind, int(cursor.lastrowid or 0), 1, criteria, body)

    def update(self, found: StoredResource, body: dict[str, Any]) -> StoredResource:
        self._conn.execute(
            "UPDATE resources SET version = version + 1, updated_at = ? WHERE id = ?", (time.time(), found.id)
        )
        return self._write_body(found.type, found.id, found.version + 1, found.criteria, body)

    def set_body(self, item: StoredResource, body: dict[str, Any]) -> StoredResource:
        """Replace the body of ``item`` (same id and version)."""
        return self._write_body(item.type, item.id, item.version, item.criteria, body)

    def _write_body(self, kind: str, rid: int, version: int, criteria: str, body: dict[str, Any]) -> StoredResource:
        stored = {**body, "id": str(rid), "meta": {"versionId": str(version)}}
        self._conn.execute("UPDATE resources SET body = ? WHERE id = ?", (json.dumps(stored), rid))
        return StoredResource(kind, rid, version, criteria, stored)

    def all(self) -> list[StoredResource]:
        """Every resource, in the order created."""
        with self._lock:
            rows = self._conn.execute("SELECT type, id, version, criteria, body FROM resources ORDER BY id").fetchall()
        return [_stored(r) for r in rows]


class _Transaction:
    def __init__(self, store: ResourceStore) -> None:
        self.store = store

    def __enter__(self) -> ResourceStore:
        self.store._lock.acquire()
        self.store._conn.execute("BEGIN IMMEDIATE")
        return self.store

    def __exit__(self, kind: object, *rest: object) -> None:
        try:
            self.store._conn.execute("ROLLBACK" if kind is not None else "COMMIT")
        finally:
            self.store._lock.release()


def _stored(row: tuple[Any, ...]) -> StoredResource:
    return StoredResource(row[0], int(row[1]), int(row[2]), row[3], json.loads(row[4]))
