"""What the stand-in FHIR endpoint created: one SQLite file, one row per resource.

Owns finding a resource by the search its creator used (``Observation?identifier=s|v``) and
creating or updating it; version ids count updates. Every resource is also indexed by what a
search finds it by (``identifier``; a Provenance's ``entity`` identifier), for searches with
OR-lists and pages (:meth:`ResourceStore.search`), and the index serves the damage an acceptance
test plants (:meth:`ResourceStore.by_token`, ``delete``, ``copy``). It must not parse HTTP or Bundles.
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
# What each resource is found by: (param, system, value), refreshed whenever its body is written.
_INDEX = (
    "CREATE TABLE IF NOT EXISTS search_index (resource INTEGER NOT NULL, param TEXT NOT NULL, "
    "system TEXT NOT NULL, value TEXT NOT NULL)",
    "CREATE INDEX IF NOT EXISTS search_by_token ON search_index (param, value, system, resource)",
    "CREATE INDEX IF NOT EXISTS search_by_system ON search_index (param, system, resource)",
    "CREATE INDEX IF NOT EXISTS search_by_resource ON search_index (resource)",
)
Token = tuple[str | None, str | None]  # (system, value); None: any (``system|`` or a bare value)


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
        fresh = self._conn.execute("SELECT 1 FROM sqlite_master WHERE name = 'search_index'").fetchone() is None
        for statement in _INDEX:
            self._conn.execute(statement)
        if fresh:  # a folder from before the index: index what it holds
            for rid, body in self._conn.execute("SELECT id, body FROM resources").fetchall():
                self._index(int(rid), json.loads(body))

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
        self._index(rid, stored)
        return StoredResource(kind, rid, version, criteria, stored)

    def _index(self, rid: int, body: dict[str, Any]) -> None:
        self._conn.execute("DELETE FROM search_index WHERE resource = ?", (rid,))
        self._conn.executemany(
            "INSERT INTO search_index (resource, param, system, value) VALUES (?, ?, ?, ?)",
            [(rid, param, system, value) for param, system, value in search_tokens(body)],
        )

    def search(
        self, kind: str, param: str, tokens: list[Token], after: int, count: int
    ) -> tuple[list[tuple[int, str]], bool]:
        """(id, body as JSON text) of the ``kind`` resources whose ``param`` matches any token, in id order
        after the id ``after``: at most ``count``, and whether more follow.

        Each token is one indexed lookup of at most ``count + 1`` ids; the page is the first of their union.
        """
        ids: set[int] = set()
        with self._lock:
            for system, value in tokens:
                terms = [("i.system = ?", system), ("i.value = ?", value)]
                where = " AND ".join(c for c, v in terms if v is not None)
                found = self._conn.execute(
                    "SELECT i.resource FROM search_index AS i JOIN resources AS r ON r.id = i.resource "
                    f"WHERE i.param = ? AND {where} AND r.type = ? AND i.resource > ? ORDER BY i.resource LIMIT ?",
                    (param, *(v for _, v in terms if v is not None), kind, after, count + 1),
                )
                ids.update(row[0] for row in found)
            page = sorted(ids)[: count + 1]
            marks = ",".join("?" * len(page))
            rows = self._conn.execute(f"SELECT id, body FROM resources WHERE id IN ({marks}) ORDER BY id", page)
            bodies = [(int(row[0]), row[1]) for row in rows]
        return bodies[:count], len(page) > count

    def by_token(self, value: str) -> list[StoredResource]:
        """Every resource found by an identifier (any system, any parameter) of this value."""
        with self._lock:
            rows = self._conn.execute(
                "SELECT type, id, version, criteria, body FROM resources WHERE id IN "
                "(SELECT resource FROM search_index WHERE value = ?) ORDER BY id",
                (value,),
            ).fetchall()
        return [_stored(r) for r in rows]

    def delete(self, item: StoredResource) -> None:
        """Forget a resource (a receiver that lost it)."""
        with self.transaction():
            self._conn.execute("DELETE FROM search_index WHERE resource = ?", (item.id,))
            self._conn.execute("DELETE FROM resources WHERE id = ?", (item.id,))

    def copy(self, item: StoredResource, criteria: str, body: dict[str, Any]) -> StoredResource:
        """A new resource of ``item``'s type with ``body`` under another criteria (a duplicate, an extra)."""
        with self.transaction():
            return self.create(item.type, criteria, body)

    def change(self, item: StoredResource, body: dict[str, Any]) -> StoredResource:
        """A new version of ``item`` with ``body`` (an edit made at the receiver)."""
        with self.transaction():
            return self.update(item, body)

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


def search_tokens(body: dict[str, Any]) -> list[tuple[str, str, str]]:
    """(param, system, value) a resource is found by: each ``identifier``; a Provenance's ``entity`` identifiers."""
    found = []
    for identifier in body.get("identifier") or []:
        if isinstance(identifier, dict) and identifier.get("value"):
            found.append(("identifier", str(identifier.get("system", "")), str(identifier["value"])))
    if body.get("resourceType") == "Provenance":
        for entity in body.get("entity") or []:
            what = entity.get("what") if isinstance(entity, dict) else None
            identifier = what.get("identifier") if isinstance(what, dict) else None
            if isinstance(identifier, dict) and identifier.get("value"):
                found.append(("entity", str(identifier.get("system", "")), str(identifier["value"])))
    return found
