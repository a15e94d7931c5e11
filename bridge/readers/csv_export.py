"""Reader for delimited lab exports (CSV) through a field map: text lines -> one record per session (pure).

Owns: decoding (UTF-8 with or without a byte-order mark, or Latin-1, as the map says), the
dialect (the map's delimiter, or the stdlib ``csv.Sniffer`` when it says ``auto``), the header
(the last of the map's header rows; every column the map reads must be there, else the file is
not this map's format), and grouping rows into sessions: one row per session, or one row per
manoeuvre with the rows of one session consecutive and sharing the test id column. Streams:
one session's rows are held at a time. Quoting is the stdlib ``csv`` module's (RFC 4180).
"""

from __future__ import annotations

import csv
import difflib
import io
import itertools
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

from bridge.errors import InvalidField, UnknownFormat, UnreadableInput
from bridge.readers.mapped import Cell, MappedRecord, encoding_error, is_missing, joined_text, mapped_record
from bridge.science.units import UnitCatalogue
from bridge.tables.field_map_model import FieldMap, FieldSource

SNIFF_LINES = 20  # lines shown to csv.Sniffer when the map says delimiter = "auto"
SNIFF_DELIMITERS = ",;\t|"


def read_csv(data: bytes, source: str, fmap: FieldMap, catalogue: UnitCatalogue) -> Iterator[MappedRecord]:
    """Every session of a delimited export held in memory (see :func:`read_csv_lines`)."""
    if not data.strip():
        raise UnreadableInput("(file)", "a non-empty export, got an empty file", source)
    try:
        text = data.decode(text_encoding(fmap))
    except UnicodeDecodeError as exc:  # decoded whole, so the error names the byte in the file
        raise encoding_error(data, exc, fmap, "csv.encoding", source) from None
    return read_csv_lines(io.StringIO(text, newline=""), source, fmap, catalogue)


def text_encoding(fmap: FieldMap) -> str:
    """The codec that reads the map's encoding (UTF-8 drops a byte-order mark)."""
    return "utf-8-sig" if fmap.encoding == "utf-8" else fmap.encoding


def read_csv_lines(
    lines: Iterable[str], source: str, fmap: FieldMap, catalogue: UnitCatalogue
) -> Iterator[MappedRecord]:
    """Every session of the export whose text lines (newlines kept) are ``lines``, one at a time."""
    lines = _decoded(lines, source, fmap)
    head = list(itertools.islice(lines, SNIFF_LINES))
    delimiter = _delimiter(head, fmap, source)
    reader = csv.reader(itertools.chain(head, lines), delimiter=delimiter, strict=True)
    header = _header(reader, fmap, source)
    rows = _rows(reader, source)
    plans = (_plan(header, fmap, False), _plan(header, fmap, True), len(header))
    used = set(fmap.columns())
    unused = tuple(f"column {c!r}" for c in header if c not in used)
    if fmap.rows == "session":
        for line, row in rows:
            yield _session([(line, row)], plans, fmap, catalogue, source, unused)
        return
    assert fmap.group_by is not None  # checked by the map parser
    key = header.index(fmap.group_by)
    for _, group in itertools.groupby(rows, key=lambda item: item[1][key].strip()):
        yield _session(list(group), plans, fmap, catalogue, source, unused)


def _decoded(lines: Iterable[str], source: str, fmap: FieldMap) -> Iterator[str]:
    """The lines; a decoding failure refuses the file naming the encoding the map expects."""
    iterator = iter(lines)
    while True:
        try:
            line = next(iterator)
        except StopIteration:
            return
        except UnicodeDecodeError:
            expected = f"{fmap.encoding} text as the map says (csv.encoding)"
            raise UnreadableInput("(file)", expected, source) from None
        yield line


def _delimiter(head: Sequence[str], fmap: FieldMap, source: str) -> str:
    if fmap.delimiter != "auto":
        return fmap.delimiter
    try:
        return csv.Sniffer().sniff("".join(head), delimiters=SNIFF_DELIMITERS).delimiter
    except csv.Error:
        raise UnreadableInput("(file)", "a delimited file (or set csv.delimiter in the map)", source) from None


def _header(reader: Iterator[list[str]], fmap: FieldMap, source: str) -> list[str]:
    try:
        for _ in range(fmap.header_rows - 1):
            next(reader)
        header = [name.strip() for name in next(reader)]
    except StopIteration:
        raise UnknownFormat("(header)", f"{fmap.header_rows} header row(s) as map {fmap.name} says", source) from None
    except csv.Error as exc:
        raise UnreadableInput("(header)", f"a delimited header ({exc})", source) from None
    missing = [c for c in fmap.columns() if c not in header]
    if missing:
        raise UnknownFormat("(header)", _not_in_header(missing[0], header, fmap), source)
    return header


def _not_in_header(column: str, header: Sequence[str], fmap: FieldMap) -> str:
    """What the header lacks: the column, the map line and field that name it, and the closest column there is."""
    named = next((f for f in fmap.fields if column in (*f.columns, f.unit_column)), None)
    where = ""
    if named is not None:
        where = f' (map line {named.line}, fields."{named.target.path}")' if named.line else f" ({named.target.path})"
    by_lower = {name.lower(): name for name in reversed(header) if name}
    close = difflib.get_close_matches(column.lower(), list(by_lower), n=1)
    nearest = f"closest in the header: {by_lower[close[0]]!r}" if close else "no column of the header is close"
    return f"the columns of map {fmap.name}; missing {column!r}{where}; {nearest}"


def _rows(reader: Iterator[list[str]], source: str) -> Iterator[tuple[int, list[str]]]:
    """(first line, row) of every non-blank row (a quoted line break makes a row span lines)."""
    while True:
        start = getattr(reader, "line_num", 0) + 1
        try:
            row = next(reader)
        except StopIteration:
            return
        except csv.Error as exc:
            line = getattr(reader, "line_num", 0)
            raise UnreadableInput(f"line {line}", f"RFC 4180 quoting ({exc})", source) from None
        if not any(cell.strip() for cell in row):
            continue
        yield start, row


@dataclass(frozen=True, slots=True)
class _Column:
    """Where one field source sits in this file's rows (worked out once per file from the header)."""

    source: FieldSource
    indices: tuple[int, ...]  # the column or columns (joined); (): a constant
    unit_index: int | None
    label: str
    status_index: int | None = None  # the column with the lab's status of this value


def _plan(header: list[str], fmap: FieldMap, per_manoeuvre: bool) -> tuple[_Column, ...]:
    return tuple(
        _Column(
            source,
            tuple(header.index(column) for column in source.columns),
            header.index(source.unit_column) if source.unit_column is not None else None,
            source.origin,
            header.index(source.status_column) if source.status_column is not None else None,
        )
        for source in fmap.fields
        if source.target.per_manoeuvre == per_manoeuvre
    )


def _cells(
    plan: tuple[_Column, ...], width: int, row: Sequence[str], line: int, manoeuvre: int | None, fmap: FieldMap
) -> list[Cell]:
    """The cells of one row the plan reads (session fields, or one manoeuvre's)."""
    if len(row) != width:
        raise InvalidField(f"line {line}", f"{width} columns as in the header, got {len(row)}")
    return [
        Cell(
            c.source,
            joined_text([row[i] for i in c.indices], c.source, fmap) if c.indices else str(c.source.value),
            f"line {line}, {c.label}",
            row[c.unit_index] if c.unit_index is not None else c.source.unit,
            manoeuvre if c.source.item is None else c.source.item - 1,  # a numbered column: that manoeuvre
            row[c.status_index] if c.status_index is not None else None,
        )
        for c in plan
    ]


def _session(
    group: list[tuple[int, list[str]]],
    plans: tuple[tuple[_Column, ...], tuple[_Column, ...], int],
    fmap: FieldMap,
    catalogue: UnitCatalogue,
    source: str,
    unused: tuple[str, ...],
) -> MappedRecord:
    """One session from its rows: session fields from the first row, one manoeuvre per row that has any.

    With one row per session, the row's manoeuvre columns (if the map has any) are its one manoeuvre.
    """
    first, last = group[0][0], group[-1][0]
    where = f"line {first}" if first == last else f"lines {first}-{last}"
    try:
        session_plan, manoeuvre_plan, width = plans
        cells = _cells(session_plan, width, group[0][1], first, None, fmap)
        index = 0
        for line, row in group:
            mine = _cells(manoeuvre_plan, width, row, line, index, fmap)
            if any(not is_missing(c.text, fmap) for c in mine):
                cells.extend(mine)
                index += 1
    except InvalidField as exc:
        return MappedRecord(where, (), error=exc.with_source(source), unused=unused)
    return mapped_record(where, cells, fmap, catalogue, source, unused=unused)
