"""The value types of the record's fields: texts and URIs any output can carry, dates, quantities (pure).

Owns :class:`Quantity` (value, UCUM unit, reported decimals, the :class:`Original` value and
unit), the :class:`Measure` annotation a quantity field declares its dimension and canonical
unit with, :data:`Text` and :data:`Uri` (refusing what no output can carry), :data:`IsoDate` and
:data:`IsoDateTime` (RFC 3339 text, as the published schema says), the :class:`Filled` annotation
of what the bridge fills itself, and :func:`record`, which makes a class a part of the record
(plain immutable data) with :func:`read_as`, the one validation at the edge. ``bridge.model``
builds the record from these and re-exports them. Imports only the stdlib and pydantic.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import date
from functools import partial
from typing import Annotated, Any, Literal, TypeVar, dataclass_transform, get_args, get_origin, get_type_hints

from pydantic import (
    AfterValidator,
    AwareDatetime,
    BeforeValidator,
    ConfigDict,
    Field,
    GetJsonSchemaHandler,
    TypeAdapter,
)
from pydantic.json_schema import JsonSchemaValue
from pydantic_core import CoreSchema, PydanticOmit

# Characters no output may carry in text: FHIR R4 strings match ^[ \r\n\t\S]+$ (ECMA-262 \s), so
# control characters and white space other than space, tab and line breaks are refused, and so
# are unpaired surrogates (not UTF-8).  # source: HL7 FHIR R4 datatypes, "string" regex
# The settings' models (``bridge.emit.settings``, ``bridge.pipeline``, ``bridge.service.settings``):
# frozen pydantic dataclasses, their field types and bounds checked by pydantic; ``bridge.config``
# adds the site's own checks and reads them from the file, the environment and flags.
SETTINGS_MODEL = ConfigDict(extra="forbid", arbitrary_types_allowed=True)

_NOT_CARRIED = re.compile(
    "[\x00-\x08\x0b\x0c\x0e-\x1f\x7f\u00a0\u1680\u2000-\u200a\u2028\u2029\u202f\u205f\u3000\ufeff\ud800-\udfff]"
)


def _carried_text(value: str) -> str:
    if not value.strip():
        raise ValueError("text with at least one visible character")
    found = _NOT_CARRIED.search(value)
    if found:
        raise ValueError(f"text without control or special white-space characters (found U+{ord(found[0]):04X})")
    return value


_WHITE_SPACE = re.compile(r"\s")


def _uri(value: str) -> str:
    if not value or _WHITE_SPACE.search(value) or _NOT_CARRIED.search(value):
        raise ValueError("a URI or OID without white space")
    return value


# The same rules as JSON Schema patterns (ECMA-262); U+0085 is white space to Python, not to ECMA-262: named.
_TEXT_PATTERN = (
    r"^[ \t\r\n]*[^\s\x00-\x1f\x7f\x85][^\x00-\x08\x0b\x0c\x0e-\x1f\x7f"
    r"\u00a0\u1680\u2000-\u200a\u2028\u2029\u202f\u205f\u3000\ufeff]*$"
)
_URI_PATTERN = r"^[^\s\x00-\x1f\x7f\x85]+$"
Text = Annotated[str, Field(min_length=1, json_schema_extra={"pattern": _TEXT_PATTERN}), AfterValidator(_carried_text)]
Uri = Annotated[str, Field(min_length=1, json_schema_extra={"pattern": _URI_PATTERN}), AfterValidator(_uri)]
# Dates, date-times: text as RFC 3339 5.6 writes them, offsets within 14 h (source: HL7 FHIR R4 dateTime regex)
_DATE = r"[0-9]{4}-(0[1-9]|1[0-2])-(0[1-9]|[12][0-9]|3[01])"
_TIME = r"([01][0-9]|2[0-3]):[0-5][0-9]:[0-5][0-9](\.[0-9]+)?"
DATE_PATTERN = f"^{_DATE}$"
DATE_TIME_PATTERN = f"^{_DATE}[Tt]{_TIME}([Zz]|[+-]((0[0-9]|1[0-3]):[0-5][0-9]|14:00))$"
_DATE_TIME_EXPECTED = "a date-time with a UTC offset between -14:00 and +14:00 (e.g. 2026-03-02T09:15:00+01:00)"


def _text_in(pattern: re.Pattern[str], expected: str, value: object) -> object:
    """Text in ``pattern``, or a date built in Python; never a number (pydantic takes seconds since 1970)."""
    if isinstance(value, date) or (isinstance(value, str) and pattern.fullmatch(value)):
        return value
    raise ValueError(expected)


_DATE_RULE = BeforeValidator(partial(_text_in, re.compile(DATE_PATTERN), "a date YYYY-MM-DD"))
IsoDate = Annotated[date, _DATE_RULE, Field(json_schema_extra={"pattern": DATE_PATTERN})]
_DATE_TIME_RULE = BeforeValidator(partial(_text_in, re.compile(DATE_TIME_PATTERN), _DATE_TIME_EXPECTED))
IsoDateTime = Annotated[AwareDatetime, _DATE_TIME_RULE, Field(json_schema_extra={"pattern": DATE_TIME_PATTERN})]


@dataclass(frozen=True, slots=True)
class Filled:
    """Annotation: a field the bridge fills while it reads (left out of the schema, refused in an export)."""

    def __get_pydantic_json_schema__(self, schema: CoreSchema, handler: GetJsonSchemaHandler) -> JsonSchemaValue:
        raise PydanticOmit  # the field is left out of the schema, as pydantic's SkipJsonSchema does


def filled_fields(cls: type[Any]) -> frozenset[str]:
    """The fields of the record type ``cls`` marked :class:`Filled`."""
    hints = field_types(cls)
    return frozenset(name for name, hint in hints.items() if any(isinstance(m, Filled) for m in _metadata(hint)))


def _metadata(hint: Any) -> tuple[Any, ...]:
    return tuple(getattr(hint, "__metadata__", ()))


_RECORD_CONFIG = ConfigDict(extra="forbid")  # what pydantic refuses when it reads a record at the edge
T = TypeVar("T")
R = TypeVar("R")


@dataclass_transform(frozen_default=True, kw_only_default=True, field_specifiers=(field,))
def record(cls: type[T]) -> type[T]:
    """Make ``cls`` a part of the record: plain immutable data (a frozen dataclass with slots).

    Inside the core a record is built and read as plain data, never validated again; the edge
    reads one with :func:`read_as`, which checks every field's type and bounds (pydantic) and
    refuses unknown keys.
    """
    cls.__pydantic_config__ = _RECORD_CONFIG  # type: ignore[attr-defined]
    return dataclass(frozen=True, slots=True, kw_only=True)(cls)


def once_per_type(build: Callable[[type[Any]], R]) -> Callable[[type[Any]], R]:
    """``build`` run once per record type, its result kept (``functools.cache``, which mypy refuses a class for)."""
    kept: dict[type[Any], R] = {}

    def once(cls: type[Any]) -> R:
        if cls not in kept:
            kept[cls] = build(cls)
        return kept[cls]

    return once


@once_per_type
def _adapter(cls: type[Any]) -> TypeAdapter[Any]:
    return TypeAdapter(cls)


def read_as(cls: type[T], data: object) -> T:
    """``data`` (plain dicts and lists) read as a record of type ``cls``; raises pydantic's ValidationError."""
    read: T = _adapter(cls).validate_python(data)
    return read


def plain(value: object, mode: Literal["python", "json"] = "python") -> Any:
    """A record (or a part of one) as plain dicts and lists, in field order; ``json``: JSON-ready values."""
    return _adapter(type(value)).dump_python(value, mode=mode)


def compact_json(value: object) -> str:
    """A record (or a part of one) as compact JSON text, as pydantic writes it."""
    return _adapter(type(value)).dump_json(value).decode()


def record_schema(cls: type[Any]) -> dict[str, Any]:
    """The JSON Schema (validation mode) of what :func:`read_as` accepts for ``cls``."""
    return _adapter(cls).json_schema(mode="validation")


@once_per_type
def field_types(cls: type[Any]) -> dict[str, Any]:
    """The type of each field of a record type, with its annotations (``Annotated``), in field order."""
    return get_type_hints(cls, include_extras=True)


def measure_of(hint: Any) -> Measure | None:
    """The :class:`Measure` of a field's type, also where it sits inside ``Optional[Annotated[...]]``."""
    for item in getattr(hint, "__metadata__", ()):
        if isinstance(item, Measure):
            return item
    for arg in get_args(hint):
        found = measure_of(arg) if get_origin(arg) is Annotated else None
        if found is not None:
            return found
    return None


@dataclass(frozen=True, slots=True)
class Measure:
    """Annotation on a quantity field: which dimension it has and the unit it is kept in."""

    dimension: str
    canonical_unit: str
    signed: bool = False  # may the value be negative (altitude below sea level, temperature)


@record
class Original:
    """The value and unit exactly as the source wrote them (the value as text keeps its digits)."""

    value: str
    unit: str


@record
class Quantity:
    """A value with its UCUM unit; an export writes ``{"value": 21.4, "unit": "mL/min/mm[Hg]"}``.

    The bridge fills (:class:`Filled`) ``decimals``, the digits the source reported after the point (7.460
    is emitted as 7.460; ``None`` when computed here), and ``original``, the value and unit as written.
    """

    value: Annotated[float, Field(allow_inf_nan=False, strict=True)]  # a JSON number only: not true, not "9.84"
    unit: Annotated[str, Field(min_length=1)]
    decimals: Annotated[int | None, Filled(), Field(ge=0, le=12)] = None
    original: Annotated[Original | None, Filled()] = None

    def text(self) -> str:
        """The value as text with the reported number of decimals (6 significant digits if unknown)."""
        return number_text(self.value, self.decimals)


def number_text(value: float, decimals: int | None) -> str:
    """A number with ``decimals`` digits after the point, or 6 significant digits when None."""
    return format(value, ".6g") if decimals is None else f"{value:.{decimals}f}"
