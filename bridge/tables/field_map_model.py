"""What a field map says: :class:`FieldMap`, its :class:`FieldSource` per field, and :class:`MapChoice` (pure).

Owns: the frozen data model of a map (format, how its text is read, where each canonical field
comes from) and the defaults of every map setting, written once. Parsing and checking a map's
TOML is ``bridge.tables.field_map_parser``; the readers (``bridge.readers.csv_export``,
``bridge.readers.hl7v2_legacy``, ``bridge.readers.mapped``) apply a map.
docs/field-maps.md describes the format.
"""

from __future__ import annotations

import fnmatch
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, time, tzinfo
from types import MappingProxyType
from typing import Literal

from bridge.tables.canonical_fields import CanonicalField

MapFormat = Literal["csv", "hl7v2"]
FORMATS: tuple[MapFormat, ...] = ("csv", "hl7v2")

# Defaults of a map, written once.
DEFAULT_MISSING = ("", "-", "n/a")  # common practice: how lab exports write "not measured"
DEFAULT_DATE_FORMAT = ("%Y-%m-%d",)
DEFAULT_DATETIME_FORMAT = ("%Y-%m-%dT%H:%M",)
DEFAULT_HL7_DATE_FORMAT = ("%Y%m%d",)  # source: HL7 v2.5.1 ch. 2, DT/TS formats (YYYYMMDD[HHMM[SS]][+/-ZZZZ])
DEFAULT_HL7_DATETIME_FORMAT = ("%Y%m%d%H%M%z",)
DEFAULT_JOIN = " "  # what stands between the texts of a field read from several columns or locations
DEFAULT_TIME_ZONE = "UTC"
DEFAULT_HL7_VERSIONS = ("2.3", "2.3.1", "2.4", "2.5", "2.5.1")
DEFAULT_DELIMITER = "auto"  # sniffed by the stdlib csv module among , ; tab |
ENCODINGS = ("utf-8", "latin-1", "cp1252")  # utf-8 drops a byte-order mark; cp1252: Windows Western European
ON_BAD_RECORD = ("skip", "refuse")
ROWS = ("session", "manoeuvre")
# source: Python documentation, datetime "strftime() and strptime() Format Codes" (the codes that read a time of day)
TIME_DIRECTIVES = frozenset("HIMSXc")


def has_time(fmt: str) -> bool:
    """Whether a strptime format reads a time of day (``%d.%m.%Y`` does not; ``%d.%m.%Y %H:%M`` does)."""
    return not TIME_DIRECTIVES.isdisjoint(re.findall(r"%(.)", fmt.replace("%%", "")))


@dataclass(frozen=True, slots=True)
class FieldSource:
    """Where one canonical field comes from, and how its text becomes a value."""

    target: CanonicalField
    column: str | None = None  # CSV: the column header
    at: str | None = None  # HL7: a segment location such as PID-5.2
    joined_columns: tuple[str, ...] = ()  # CSV: several columns whose texts are joined (column is None)
    joined_locations: tuple[str, ...] = ()  # HL7: several locations whose texts are joined (at is None)
    join: str = DEFAULT_JOIN  # what stands between the joined texts
    code: str | None = None  # HL7: the local code in OBX-3.1
    value: str | None = None  # the same value for every record
    unit: str | None = None  # a fixed unit, as the source means it
    unit_column: str | None = None  # CSV: the column that carries the unit
    unit_from_obx: bool = False  # HL7: the unit is in OBX-6
    percent: bool = False  # a gas fraction written as a percentage (0.3 means 0.003)
    status_column: str | None = None  # CSV: the column with the lab's status of this value (HL7 table 0085)
    formats: tuple[str, ...] = ()  # dates and date-times: the field's own strptime formats (): the map's
    assume_time: time | None = None  # a date-time read with a date-only format: the time of day it takes
    item: int | None = None  # an item of a list inside an object: its number as the map gives it (from 1)
    line: int | None = None  # the line of the map that names this field (errors point to it)

    @property
    def columns(self) -> tuple[str, ...]:
        """CSV: the column or columns the value is read from (several are joined); () for a constant."""
        return self.joined_columns or ((self.column,) if self.column is not None else ())

    @property
    def locations(self) -> tuple[str, ...]:
        """HL7: the segment location or locations the value is read from (several are joined)."""
        return self.joined_locations or ((self.at,) if self.at is not None else ())

    @property
    def origin(self) -> str:
        """How reports name the source of the field: a column, a code, a location or a constant."""
        if self.joined_columns:
            return "columns " + " + ".join(repr(c) for c in self.joined_columns)
        if self.joined_locations:
            return " + ".join(self.joined_locations)
        if self.column is not None:
            return f"column {self.column!r}"
        if self.code is not None:
            return f"code {self.code!r}"
        if self.at is not None:
            return self.at
        return "(constant)"


@dataclass(frozen=True, slots=True)
class FieldMap:
    """One source layout: its format, how its text is read, and the source of each field."""

    name: str  # the map file, as errors name it
    source: str  # the lab or system whose exports it reads
    format: MapFormat
    fields: tuple[FieldSource, ...]
    on_bad_record: Literal["skip", "refuse"] = "skip"
    repeatability: str | None = None  # the repeatability criterion for this source; None: the site's
    missing: frozenset[str] = frozenset(DEFAULT_MISSING)
    decimal: str = "."
    date_format: tuple[str, ...] = DEFAULT_DATE_FORMAT  # strptime formats, tried in order
    datetime_format: tuple[str, ...] = DEFAULT_DATETIME_FORMAT
    time_zone: str = DEFAULT_TIME_ZONE
    zone: tzinfo = UTC  # time_zone resolved by the shell's zone lookup (the core reads no tz database)
    # source code -> the record's sex; without [sex]: HL7 table 0001 (mappings/hl7_tables.toml)
    sex_codes: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))
    unit_aliases: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))  # spelling -> unit
    # The lab's words for a value's status -> HL7 table 0085 codes ([status]); a word not listed is read as a code.
    status_codes: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))
    # csv
    delimiter: str = DEFAULT_DELIMITER
    encoding: str = "utf-8"
    header_rows: int = 1  # the column names are on the last of these rows
    rows: Literal["session", "manoeuvre"] = "session"
    group_by: str | None = None  # rows = "manoeuvre": the column holding the test id
    # hl7v2
    versions: tuple[str, ...] = DEFAULT_HL7_VERSIONS

    def columns(self) -> tuple[str, ...]:
        """Every CSV column the map reads (values, units and statuses), in map order."""
        named = [c for f in self.fields for c in (*f.columns, f.unit_column, f.status_column) if c is not None]
        if self.group_by is not None:
            named.append(self.group_by)
        return tuple(dict.fromkeys(named))

    def formats_for(self, source: FieldSource) -> tuple[str, ...]:
        """The strptime formats that read a date or date-time field, in order: its own, else the map's."""
        if source.formats:
            return source.formats
        return self.datetime_format if source.target.kind == "datetime" else self.date_format

    def codes(self) -> Mapping[str, tuple[FieldSource, ...]]:
        """HL7 local code -> the field sources it feeds."""
        found: dict[str, list[FieldSource]] = {}
        for source in self.fields:
            if source.code is not None:
                found.setdefault(source.code, []).append(source)
        return MappingProxyType({code: tuple(sources) for code, sources in found.items()})


@dataclass(frozen=True, slots=True)
class MapChoice:
    """Which map reads which input: the first file-name pattern that matches, else the default.

    No map at all means the input is ``dlco-result/1`` JSON; nothing is guessed from the content.
    """

    default: FieldMap | None = None
    by_pattern: tuple[tuple[str, FieldMap], ...] = ()

    def for_file(self, name: str) -> FieldMap | None:
        matched = self.by_name(name)
        return matched if matched is not None else self.default

    def by_name(self, name: str) -> FieldMap | None:
        """The map of the first pattern that matches ``name`` (None: no pattern does)."""
        return next((m for pattern, m in self.by_pattern if fnmatch.fnmatchcase(name, pattern)), None)
