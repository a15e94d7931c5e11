"""What the checks across an archive need of every session, kept on disk (shell).

Owns a temporary SQLite file in the report folder: per readable row its content hash under
(source, test id) and its :class:`~bridge.audit.reduce.Visit` under its patient; per row, in
the walk's order, what the hand-over needs (file, record, test id, the gate's verdict, the
record's NDJSON when asked for). Memory stays flat whatever the archive's size; SQLite sorts on
disk. At the end it hands the first two back sorted, one test id or one patient at a time, to
:meth:`bridge.audit.reduce.ArchiveReduce.finish`, then the rows in the walk's order to the
hand-over (written after the checks across records), and the file is removed.
"""

from __future__ import annotations

import itertools
import os
import sqlite3
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, fields
from operator import attrgetter
from pathlib import Path

from bridge.audit.reduce import Visit, visit_of
from bridge.audit.rows import SERIES, Row

# A visit's columns: the patient, Visit's fields, its series one column per entry of SERIES (a
# quantity added there is a column here)
_TEXTS = ("patient", "performed_at", "file", "record", "source", "test_id", "sex", "birth_date")
_VISIT = ", ".join((*_TEXTS, *(s.key for s in SERIES)))
_COLUMNS = ", ".join((*(f"{c} TEXT" for c in _TEXTS), *(f"{s.key} REAL" for s in SERIES)))
# A Visit's fields but its series, as a tuple in order (dataclasses.astuple copies each value
# recursively: 40 times slower).
_VISIT_TEXTS = attrgetter(*(f.name for f in fields(Visit) if f.name != "series"))

_SCHEMA = (
    "CREATE TABLE contents (source TEXT, test_id TEXT, sha256 TEXT, file TEXT)",
    f"CREATE TABLE visits ({_COLUMNS})",
    "CREATE TABLE records (seq INTEGER PRIMARY KEY, file TEXT, record TEXT, source TEXT, test_id TEXT, "
    "readable INTEGER, held TEXT, ndjson BLOB)",
)
_CACHE_KIB = 16 * 1024  # SQLite's page cache; beyond it, sorting spills to temporary files


class ArchiveIndex:
    """A temporary index of the rows of one audit; use it as a context manager (the file is removed)."""

    def __init__(self, folder: Path) -> None:
        handle, name = tempfile.mkstemp(prefix=".audit-index-", suffix=".sqlite", dir=folder)
        os.close(handle)
        self.path = Path(name)
        self._conn = sqlite3.connect(self.path)
        # A scratch file, rebuilt by the next run: no journal, no syncs.
        for pragma in ("journal_mode = OFF", "synchronous = OFF", "temp_store = FILE", f"cache_size = -{_CACHE_KIB}"):
            self._conn.execute(f"PRAGMA {pragma}")
        for statement in _SCHEMA:
            self._conn.execute(statement)
        self._seq = 0

    def __enter__(self) -> ArchiveIndex:
        return self

    def __exit__(self, *_: object) -> None:
        self.close()

    def close(self) -> None:
        self._conn.close()
        self.path.unlink(missing_ok=True)

    def add(self, rows: Sequence[Row]) -> None:
        """Index the rows of one chunk (chunks in the walk's order)."""
        readable = [row for row in rows if row.readable]
        first, self._seq = self._seq, self._seq + len(rows)
        with self._conn:
            self._conn.executemany(
                "INSERT INTO records VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                [
                    (first + i, row.file, row.record, row.source, row.test_id, row.readable, " ".join(row.held),
                     row.ndjson or None)
                    for i, row in enumerate(rows)
                ],
            )  # fmt: skip
            self._conn.executemany(
                "INSERT INTO contents VALUES (?, ?, ?, ?)",
                [(row.source, row.test_id, row.sha256, row.file) for row in readable],
            )
            self._conn.executemany(
                f"INSERT INTO visits VALUES ({', '.join('?' * (len(_TEXTS) + len(SERIES)))})",
                [(row.patient, *_VISIT_TEXTS(visit), *visit.series) for row in readable for visit in [visit_of(row)]],
            )

    def contents(self) -> Iterator[tuple[str, str, dict[str, str]]]:
        """Per (source, test id), in order: each content hash with the first file (by name) that carried it."""
        cursor = self._conn.execute(
            "SELECT source, test_id, sha256, min(file) FROM contents "
            "GROUP BY source, test_id, sha256 ORDER BY source, test_id, sha256"
        )
        for (source, test_id), group in itertools.groupby(cursor, key=lambda r: (r[0], r[1])):
            yield source, test_id, {sha: file for _, _, sha, file in group}

    def patients(self) -> Iterator[tuple[str, list[Visit]]]:
        """Per patient, in order: every visit, ordered as :class:`Visit` orders (time, then file)."""
        # the columns after patient are Visit's fields, in order, its series spread over the last ones
        cursor = self._conn.execute(f"SELECT {_VISIT} FROM visits ORDER BY {_VISIT}")  # our own column names
        for patient, group in itertools.groupby(cursor, key=lambda r: r[0]):
            texts = len(_TEXTS)
            yield patient, [Visit(*(*fields[1:texts], tuple(fields[texts:]))) for fields in group]

    def records(self) -> Iterator[IndexedRecord]:
        """Every row in the walk's order, each saying whether it is the first of its (source, test id)."""
        cursor = self._conn.execute(
            "SELECT file, record, source, test_id, readable, held, ndjson, "
            "seq = min(seq) OVER (PARTITION BY source, test_id) FROM records ORDER BY seq"
        )
        for file, record, source, test_id, readable, held, ndjson, first in cursor:
            yield IndexedRecord(file, record, source, test_id, bool(readable), tuple(held.split()), ndjson or b"",
                                bool(first))  # fmt: skip


@dataclass(frozen=True, slots=True)
class IndexedRecord:
    """One row as the hand-over needs it."""

    file: str
    record: str
    source: str
    test_id: str
    readable: bool
    held: tuple[str, ...]  # the gate's codes
    ndjson: bytes
    first: bool  # the first row (in the walk's order) of its source and test id
