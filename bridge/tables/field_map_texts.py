"""How a field's text is built and read: several columns or locations joined, date formats, an assumed time (pure).

Owns: the keys of a ``[fields]`` entry that say how its text is made and read -- ``column`` or
``at`` given as a list (their texts joined with ``join``: a date and a time, a name from two
columns, a code from a prefix and a number), a date's own ``format`` (one strptime format or a
list tried in order, as ``[values]`` date formats may be too) and ``assume_time`` -- and the
rule that a date-time read with a date-only format is a map error unless the map says which
time of day to assume (never a silent midnight). ``bridge.tables.field_map_parser`` calls it
with its checker, so every error names the map file, line and key. docs/field-maps.md describes it.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from datetime import time
from typing import Any, Protocol

from bridge.errors import MappingError
from bridge.tables.canonical_fields import CanonicalField
from bridge.tables.field_map_model import DEFAULT_JOIN, FieldMap, FieldSource, has_time

HL7_LOCATION = re.compile(r"(?P<segment>[A-Z][A-Z0-9]{2})-(?P<field>[1-9][0-9]*)(?:\.(?P<component>[1-9][0-9]*))?")
JOINABLE = ("text", "date", "datetime")  # the kinds of field a map may build from several sources


class Checker(Protocol):
    """What these checks need of the parser's checker: an error naming file, line and key."""

    def fail(self, key: str, expected: str) -> MappingError: ...


def joined_sources(check: Checker, where: str, spec: Mapping[str, Any], target: CanonicalField) -> dict[str, Any]:
    """``column`` or ``at`` as a list: the :class:`FieldSource` arguments of a field built from several sources.

    Empty for a field read from one source (its ``column`` or ``at`` is then text, checked by the parser).
    """
    found = {key: spec[key] for key in ("column", "at") if isinstance(spec.get(key), list)}
    for key, names in found.items():
        if len(names) < 2 or not all(isinstance(n, str) and n for n in names):
            raise check.fail(f"{where}.{key}", "non-empty text, or a list of two or more (their texts are joined)")
        if target.kind not in JOINABLE:
            raise check.fail(f"{where}.{key}", "one source (only text, date and date-time fields are joined)")
    for at in found.get("at", ()):
        check_location(check, f"{where}.at", at)
    join = spec.get("join", DEFAULT_JOIN)
    if "join" in spec and (not found or not isinstance(join, str)):
        raise check.fail(f"{where}.join", "text, beside a list of columns or locations (their texts are joined)")
    if not found:
        return {}
    return {
        "joined_columns": tuple(found.get("column", ())),
        "joined_locations": tuple(found.get("at", ())),
        "join": join,
    }


def check_location(check: Checker, where: str, at: str) -> None:
    """An HL7 location such as ``PID-5.2`` in a segment other than OBX (OBX values are mapped by code)."""
    if not HL7_LOCATION.fullmatch(at):
        raise check.fail(where, f"a location such as PID-5.2 (segment-field.component), got {at!r}")
    if at.startswith("OBX"):
        raise check.fail(where, "a segment other than OBX (OBX values are mapped by code)")


def date_reading(check: Checker, where: str, spec: Mapping[str, Any], target: CanonicalField) -> dict[str, Any]:
    """``format`` and ``assume_time`` of a date or date-time field: its :class:`FieldSource` arguments."""
    read: dict[str, Any] = {}
    if "format" in spec:
        if target.kind not in ("date", "datetime"):
            raise check.fail(f"{where}.format", f"no format ({target.path} is not a date or date-time)")
        read["formats"] = formats(check, spec, "format", f"{where}.format", ())
    if "assume_time" in spec:
        raw = spec["assume_time"]
        try:
            if target.kind != "datetime" or not isinstance(raw, str) or len(raw) not in (5, 8):
                raise ValueError(raw)
            read["assume_time"] = time.fromisoformat(raw)
        except ValueError:
            expected = f'a time of day "HH:MM" on a date-time field, got {raw!r}'
            raise check.fail(f"{where}.assume_time", expected) from None
    return read


def formats(
    check: Checker, table: Mapping[str, Any], key: str, where: str, default: tuple[str, ...]
) -> tuple[str, ...]:
    """A strptime format, or a list tried in order (a feed that writes times with and without an offset)."""
    raw = table.get(key, list(default))
    found = raw if isinstance(raw, list) else [raw]
    if not found or not all(isinstance(f, str) and "%" in f for f in found):
        raise check.fail(where, f"a strptime format such as %d.%m.%Y, or a list of them, got {raw!r}")
    return tuple(found)


def check_times_of_day(check: Checker, built: FieldMap) -> None:
    """Every date-time field reads a time of day, or says which to assume (never a silent midnight)."""
    for source in built.fields:
        if source.target.kind == "datetime":
            _time_of_day(check, built, source)


def _time_of_day(check: Checker, built: FieldMap, source: FieldSource) -> None:
    where = f'fields."{source.target.path}"'
    origin = f"{where}.format" if source.formats else "values.datetime_format"
    date_only = [f for f in built.formats_for(source) if not has_time(f)]
    if date_only and source.assume_time is None:
        raise check.fail(
            where,
            f"a time of day: {origin} {date_only[0]!r} reads a date only; read the time too "
            '(column = ["date column", "time column"], format = "%d.%m.%Y %H:%M") '
            'or say the time to assume (assume_time = "00:00")',
        )
    if not date_only and source.assume_time is not None:
        raise check.fail(f"{where}.assume_time", f"a date-only format to apply it to ({origin} reads a time)")
