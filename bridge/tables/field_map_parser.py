"""Field maps (``mappings/maps/*.toml``) -> :class:`FieldMap`: parsing and checking a map's text (pure).

Owns: :func:`field_map`, which checks every section, key, canonical field, unit and value
transform of a map, each error a :class:`bridge.errors.MappingError` naming the map file, the
line when it can be found, and the key at fault. The data model it builds is
``bridge.tables.field_map_model``; the fields a map may fill are ``bridge.tables.canonical_fields``.
docs/field-maps.md describes the format.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Collection, Mapping
from datetime import tzinfo
from types import MappingProxyType
from typing import Any

from bridge.errors import MappingError
from bridge.model import Sex
from bridge.science.units import UnitCatalogue
from bridge.tables.canonical_fields import CanonicalField, canonical_fields
from bridge.tables.field_map_model import (
    DEFAULT_DATE_FORMAT,
    DEFAULT_DATETIME_FORMAT,
    DEFAULT_DELIMITER,
    DEFAULT_HL7_DATE_FORMAT,
    DEFAULT_HL7_DATETIME_FORMAT,
    DEFAULT_HL7_VERSIONS,
    DEFAULT_MISSING,
    DEFAULT_TIME_ZONE,
    ENCODINGS,
    FORMATS,
    ON_BAD_RECORD,
    ROWS,
    FieldMap,
    FieldSource,
)
from bridge.tables.field_map_texts import check_location, check_times_of_day, date_reading, formats, joined_sources
from bridge.tables.toml import read_toml

OBX_UNIT = "OBX-6"  # ``unit_from`` of an HL7 code: the unit is in the OBX's own units field

_MAP_KEYS = frozenset({"name", "source", "format", "on_bad_record", "repeatability"})
_VALUE_KEYS = frozenset({"missing", "decimal", "date_format", "datetime_format", "time_zone"})
_CSV_KEYS = frozenset({"delimiter", "encoding", "header_rows", "rows", "group_by"})
_HL7_KEYS = frozenset({"versions", "encoding"})
_SOURCE_KEYS = frozenset(
    {"column", "at", "code", "value", "unit", "unit_column", "unit_from", "percent", "status_column"}
)
_TEXT_KEYS = frozenset({"join", "format", "assume_time"})  # bridge.tables.field_map_texts
_SECTIONS = frozenset({"map", "values", "sex", "status", "units", "csv", "hl7", "fields"})
_STATUS_CODE = re.compile(r"[A-Z]")  # HL7 table 0085 codes are one letter (the pipeline checks the table's)
# A numbered item of a list inside an object: spirometry.pre.manoeuvres[2].fev1 (the lab's number, from 1)
_NUMBERED = re.compile(r"(?P<list>[a-z_.]+)\[(?P<number>[1-9]\d?)\]\.(?P<rest>[a-z0-9_.]+)")


class _Checker:
    """Typed access to one map's parsed text; every error names the file, line and key."""

    def __init__(self, text: str, name: str) -> None:
        self.lines = text.splitlines()
        self.name = name

    def fail(self, key: str, expected: str) -> MappingError:
        line = self.line_of(key)
        return MappingError(self.name, f"line {line}: {key}" if line else key, expected)

    def line_of(self, key: str) -> int | None:
        """The line that sets ``key`` (``values.decimal``, ``fields."patient.height".unit``), else its section's."""
        if '."' in key:
            section, rest = key.split('."', 1)
            last = rest.split('"', 1)[0]
        else:
            section, _, last = key.partition(".")
            section, last = (section, last.split(".")[0]) if last else ("", section)
        start = 0
        if section:
            header = re.compile(rf"^\s*\[{re.escape(section)}\]\s*(#.*)?$")
            found = next((i for i, t in enumerate(self.lines) if header.match(t)), None)
            if found is None:
                return None
            start = found
        target = re.compile(rf'^\s*"?{re.escape(last)}"?\s*=')
        for i in range(start, len(self.lines)):
            if i > start and section and self.lines[i].lstrip().startswith("["):
                break
            if target.match(self.lines[i]):
                return i + 1
        return start + 1 if section else None

    def table(self, data: Mapping[str, Any], key: str) -> Mapping[str, Any]:
        value = data.get(key, {})
        if not isinstance(value, dict):
            raise self.fail(key, "a table")
        return value

    def known(self, table: Mapping[str, Any], allowed: frozenset[str], prefix: str) -> None:
        unknown = sorted(set(table) - allowed)
        if unknown:
            raise self.fail(f"{prefix}.{unknown[0]}" if prefix else unknown[0], f"one of {', '.join(sorted(allowed))}")

    def text(self, table: Mapping[str, Any], key: str, where: str, default: str | None = None) -> str:
        value = table.get(key, default)
        if not isinstance(value, str) or (not value and default is None):
            raise self.fail(where, "text" if default is not None else "non-empty text")
        return value

    def choice(self, table: Mapping[str, Any], key: str, where: str, options: tuple[str, ...], default: str) -> str:
        value = table.get(key, default)
        if value not in options:
            raise self.fail(where, f"one of {', '.join(options)}, got {value!r}")
        return str(value)


def field_map(
    text: str,
    name: str,
    catalogue: UnitCatalogue,
    zone_of: Callable[[str], tzinfo],
    criteria: Collection[str] = (),
    *,
    sex_codes: Mapping[str, str],
) -> FieldMap:
    """The map in ``text`` (the file ``name``), checked against the canonical fields and the unit catalogue.

    ``zone_of`` resolves an IANA time-zone name (the shell passes ``zoneinfo.ZoneInfo``: reading the
    time-zone database is I/O the core leaves to it); it raises LookupError or ValueError for a
    name it does not know. ``criteria``: the repeatability criteria a map may name in ``[map]
    repeatability`` (``GradeTable.criterion_names``, passed by the shell); a map naming another is refused.
    ``sex_codes``: the codes a map without ``[sex]`` reads, HL7 table 0001 (``Tables.hl7.sex_of_code``).
    """
    data = read_toml(text, name)
    check = _Checker(text, name)
    check.known(data, _SECTIONS, "")
    head = check.table(data, "map")
    check.known(head, _MAP_KEYS, "map")
    fmt = check.choice(head, "format", "map.format", FORMATS, "")
    values = check.table(data, "values")
    check.known(values, _VALUE_KEYS, "values")
    csv_part, hl7_part = check.table(data, "csv"), check.table(data, "hl7")
    check.known(csv_part, _CSV_KEYS, "csv")
    check.known(hl7_part, _HL7_KEYS, "hl7")
    hl7 = fmt == "hl7v2"
    aliases = _unit_aliases(check, check.table(data, "units"), catalogue)
    fields = tuple(
        _field_source(check, path, spec, fmt, aliases, catalogue) for path, spec in check.table(data, "fields").items()
    )
    if not fields:
        raise check.fail("fields", "at least one canonical field")
    zone = check.text(values, "time_zone", "values.time_zone", DEFAULT_TIME_ZONE)
    try:
        resolved = zone_of(zone)
    except (LookupError, ValueError):
        raise check.fail("values.time_zone", f"an IANA time zone such as Europe/London, got {zone!r}") from None
    rows = check.choice(csv_part, "rows", "csv.rows", ROWS, "session")
    group_by = csv_part.get("group_by")
    if rows == "manoeuvre" and not isinstance(group_by, str):
        raise check.fail("csv.group_by", 'the column holding the test id (needed with rows = "manoeuvre")')
    built = FieldMap(
        name=name,
        source=check.text(head, "source", "map.source"),
        format=fmt,  # type: ignore[arg-type]
        fields=fields,
        on_bad_record=check.choice(head, "on_bad_record", "map.on_bad_record", ON_BAD_RECORD, "skip"),  # type: ignore[arg-type]
        repeatability=_repeatability(check, head, criteria),
        missing=frozenset(_missing(check, values)),
        decimal=check.choice(values, "decimal", "values.decimal", (".", ","), "."),
        date_format=formats(
            check, values, "date_format", "values.date_format", DEFAULT_HL7_DATE_FORMAT if hl7 else DEFAULT_DATE_FORMAT
        ),
        datetime_format=formats(
            check,
            values,
            "datetime_format",
            "values.datetime_format",
            DEFAULT_HL7_DATETIME_FORMAT if hl7 else DEFAULT_DATETIME_FORMAT,
        ),
        time_zone=zone,
        zone=resolved,
        sex_codes=_sex_codes(check, check.table(data, "sex"), sex_codes),
        status_codes=_status_codes(check, check.table(data, "status")),
        unit_aliases=aliases,
        delimiter=_delimiter(check, csv_part),
        encoding=check.choice(hl7_part, "encoding", "hl7.encoding", ENCODINGS, "utf-8")
        if hl7
        else check.choice(csv_part, "encoding", "csv.encoding", ENCODINGS, "utf-8"),
        header_rows=_count(check, csv_part, "header_rows", 1),
        rows=rows,  # type: ignore[arg-type]
        group_by=group_by if rows == "manoeuvre" else None,
        versions=_versions(check, hl7_part),
    )
    _check_whole(check, built)
    return built


def _field_source(
    check: _Checker, path: str, spec: Any, fmt: str, aliases: Mapping[str, str], catalogue: UnitCatalogue
) -> FieldSource:
    where = f'fields."{path}"'
    target, item = _target(check, where, path, fmt)
    if isinstance(spec, str):  # shorthand: "column name" or "LOCALCODE"
        spec = {"column": spec} if fmt == "csv" else {"code": spec}
    if not isinstance(spec, dict):
        raise check.fail(where, 'a table such as { column = "..." }')
    check.known(spec, _SOURCE_KEYS | _TEXT_KEYS, where)
    allowed = ("column", "value") if fmt == "csv" else ("at", "code", "value")
    given = [k for k in ("column", "at", "code", "value") if k in spec]
    if len(given) != 1 or given[0] not in allowed:
        raise check.fail(where, f"exactly one of {', '.join(allowed)} for a {fmt} map")
    joined = joined_sources(check, where, spec, target)  # column = ["Date", "Time"]: several sources, joined
    for key in (*([] if joined else given), "unit", "unit_column", "unit_from", "status_column"):
        if key in spec and (not isinstance(spec[key], str) or (key != "value" and not spec[key])):
            raise check.fail(f"{where}.{key}", "non-empty text")
    at = None if joined else spec.get("at")
    if at is not None:
        check_location(check, f"{where}.at", at)
    if target.per_manoeuvre and fmt == "csv" and "value" in spec:
        raise check.fail(where, "a column (a manoeuvre field cannot be a constant)")
    unit_from = spec.get("unit_from")
    if unit_from is not None and (fmt != "hl7v2" or unit_from != OBX_UNIT or "code" not in spec):
        raise check.fail(f"{where}.unit_from", f'"{OBX_UNIT}" on an HL7 code')
    if "unit_column" in spec and fmt != "csv":
        raise check.fail(f"{where}.unit_column", "only in a csv map (HL7 codes use unit_from)")
    if "status_column" in spec and (fmt != "csv" or "column" not in spec):
        raise check.fail(f"{where}.status_column", "only on a column of a csv map (HL7 values carry OBX-11)")
    unit_ways = [k for k in ("unit", "unit_column", "unit_from") if k in spec]
    if target.kind == "quantity" and len(unit_ways) != 1:
        raise check.fail(where, "its unit: one of unit, unit_column or unit_from (a quantity needs a unit)")
    if target.kind != "quantity" and unit_ways:
        raise check.fail(f"{where}.{unit_ways[0]}", f"no unit ({path} is not a quantity)")
    if "unit" in spec:
        _check_unit(check, f"{where}.unit", spec["unit"], target, aliases, catalogue)
    percent = spec.get("percent", False)
    if not isinstance(percent, bool) or (percent and target.kind != "number"):
        raise check.fail(f"{where}.percent", "true or false, and true only on a gas fraction")
    if "value" in spec and target.kind == "quantity":
        raise check.fail(f"{where}.value", "a column or code (quantities are read from the source)")
    return FieldSource(
        target=target,
        column=None if joined else spec.get("column"),
        at=at,
        code=spec.get("code"),
        value=spec.get("value"),
        unit=spec.get("unit"),
        unit_column=spec.get("unit_column"),
        unit_from_obx=unit_from is not None,
        percent=percent,
        status_column=spec.get("status_column"),
        item=item,
        line=check.line_of(where),
        **joined,
        **date_reading(check, where, spec, target),
    )


def _target(check: _Checker, where: str, path: str, fmt: str) -> tuple[CanonicalField, int | None]:
    """The canonical field a map key names, and the item number it gives (``spirometry.pre.manoeuvres[2].fev1``).

    The DLCO test's manoeuvres come one per row (CSV) or by OBX-4 (HL7), never by number; the
    items of a list inside an object (spirometry's manoeuvres) come by number (numbered columns,
    or one code per manoeuvre) or, in HL7, by OBX-4 as well.
    """
    numbered = _NUMBERED.fullmatch(path)
    base = f"{numbered['list']}.{numbered['rest']}" if numbered else path
    target = canonical_fields().get(base)
    if target is None:
        raise check.fail(where, "a canonical field of dlco-result/1 (docs/field-maps.md lists them)")
    nested = target.item_of is not None and not target.per_manoeuvre
    if numbered is not None and (not nested or numbered["list"] != target.item_of):
        raise check.fail(
            where, "a number only on an item of a list inside an object, such as spirometry.pre.manoeuvres[1].fev1"
        )
    if numbered is None and nested and fmt == "csv":
        raise check.fail(
            where, f"the manoeuvre's number, such as {target.item_of}[1].{path.rsplit('.', 1)[1]} (one column each)"
        )
    return target, int(numbered["number"]) if numbered else None


def _repeatability(check: _Checker, head: Mapping[str, Any], criteria: Collection[str]) -> str | None:
    """``[map] repeatability``: a criterion of mappings/quality_grades.toml for this source's inputs, or none."""
    if "repeatability" not in head:
        return None
    return check.choice(head, "repeatability", "map.repeatability", tuple(criteria), "")


def _check_unit(
    check: _Checker, where: str, unit: str, target: CanonicalField, aliases: Mapping[str, str], catalogue: UnitCatalogue
) -> None:
    found = catalogue.resolve(aliases.get(unit, unit))
    if found is None:
        raise check.fail(where, f"a unit in mappings/units.toml or in [units] of this map, got {unit!r}")
    if found.dimension != target.dimension:
        raise check.fail(where, f"a {str(target.dimension).replace('_', ' ')} unit, got {unit!r} ({found.dimension})")


def _unit_aliases(check: _Checker, table: Mapping[str, Any], catalogue: UnitCatalogue) -> Mapping[str, str]:
    for alias, code in table.items():
        if not isinstance(code, str) or catalogue.resolve(code) is None:
            raise check.fail(f'units."{alias}"', f"a unit of mappings/units.toml, got {code!r}")
    return MappingProxyType(dict(table))


def _sex_codes(check: _Checker, table: Mapping[str, Any], default: Mapping[str, str]) -> Mapping[str, str]:
    if not table:
        return MappingProxyType(dict(default))
    allowed = tuple(s.value for s in Sex)
    for code, sex in table.items():
        if sex not in allowed:
            raise check.fail(f'sex."{code}"', f"one of {', '.join(allowed)}, got {sex!r}")
    return MappingProxyType(dict(table))


def _status_codes(check: _Checker, table: Mapping[str, Any]) -> Mapping[str, str]:
    """``[status]``: the lab's words for a value's status -> HL7 table 0085 codes."""
    for word, code in table.items():
        if not isinstance(code, str) or not _STATUS_CODE.fullmatch(code):
            raise check.fail(f'status."{word}"', f"a code of HL7 table 0085 (one letter such as F, P, W), got {code!r}")
    return MappingProxyType(dict(table))


def _missing(check: _Checker, values: Mapping[str, Any]) -> tuple[str, ...]:
    raw = values.get("missing", list(DEFAULT_MISSING))
    if not isinstance(raw, list) or not all(isinstance(m, str) for m in raw):
        raise check.fail("values.missing", 'a list of texts that mean "no value", such as ["", "-", "n/a"]')
    return tuple(raw)


def _delimiter(check: _Checker, table: Mapping[str, Any]) -> str:
    value = table.get("delimiter", DEFAULT_DELIMITER)
    if value != DEFAULT_DELIMITER and (not isinstance(value, str) or len(value) != 1 or value in '"\r\n'):
        raise check.fail("csv.delimiter", f'"auto" or one character other than a quote or line break, got {value!r}')
    return str(value)


def _count(check: _Checker, table: Mapping[str, Any], key: str, default: int) -> int:
    value = table.get(key, default)
    if not isinstance(value, int) or isinstance(value, bool) or not 1 <= value <= 20:
        raise check.fail(f"csv.{key}", f"a whole number from 1 to 20, got {value!r}")
    return value


def _versions(check: _Checker, table: Mapping[str, Any]) -> tuple[str, ...]:
    raw = table.get("versions", list(DEFAULT_HL7_VERSIONS))
    if not isinstance(raw, list) or not raw or not all(v in DEFAULT_HL7_VERSIONS for v in raw):
        raise check.fail("hl7.versions", f"a list from {', '.join(DEFAULT_HL7_VERSIONS)}")
    return tuple(raw)


def _check_whole(check: _Checker, built: FieldMap) -> None:
    """What only the whole map can show: required fields and the session key."""
    mapped = {f.target.path for f in built.fields}
    for required in ("test_id", "performed_at", "lab.name", "patient.id", "patient.id_system", "patient.sex",
                     "patient.birth_date", "patient.height"):  # fmt: skip
        if required not in mapped:
            raise check.fail("fields", f'a source for the required field "{required}"')
    if built.rows == "manoeuvre":
        test_id = next(f for f in built.fields if f.target.path == "test_id")
        if built.group_by not in test_id.columns:
            named = " or ".join(repr(c) for c in test_id.columns) or "none: it is a constant"
            raise check.fail("csv.group_by", f'a column of "test_id" ({named})')
    check_times_of_day(check, built)
