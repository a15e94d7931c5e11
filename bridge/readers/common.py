"""Helpers shared by the readers: decoding bytes and turning validation errors into one line."""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from pydantic import ValidationError

from bridge.errors import InputError, InvalidField, MissingField, UnreadableInput
from bridge.model import Session
from bridge.tables.canonical_fields import canonical_fields


@dataclass(frozen=True, slots=True)
class Record:
    """One session as a reader yields it, or the InputError that refuses it (``dlco-result/1``: one per document).

    The field-map readers yield :class:`bridge.readers.mapped.MappedRecord`, the same three
    fields and what ``map check`` shows besides.
    """

    session: Session | None = None
    error: InputError | None = None
    unmapped: tuple[str, ...] = ()  # source codes the record holds that a field map does not name


def decode_text(data: bytes, source: str) -> str:
    """UTF-8 text of an input (a byte-order mark is dropped); empty input is an error."""
    if not data.strip():
        raise UnreadableInput("(file)", "a non-empty export, got an empty file", source)
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise UnreadableInput(f"byte {exc.start}", "UTF-8 text (the file is in another encoding)", source) from exc


def field_path(loc: tuple[int | str, ...]) -> str:
    """``('manoeuvres', 0, 'inspired_volume', 'unit')`` -> ``manoeuvres[0].inspired_volume.unit``."""
    path = ""
    for part in loc:
        if isinstance(part, int):
            path += f"[{part}]"
        else:
            path += f".{part}" if path else part
    return path or "(top level)"


_EXPECTATIONS = MappingProxyType(
    {
        "missing": "a value (the field is required)",
        "float_type": "a number",
        "float_parsing": "a number",
        "finite_number": "a finite number",
        "int_type": "a whole number",
        "string_type": "text",
        "bool_type": "true or false",
        "date_type": "a date YYYY-MM-DD",
        "date_from_datetime_parsing": "a date YYYY-MM-DD",
        "date_parsing": "a date YYYY-MM-DD",
        "datetime_type": "an ISO 8601 date-time with offset",
        "datetime_parsing": "an ISO 8601 date-time with offset",
        "datetime_from_date_parsing": "an ISO 8601 date-time with offset",
        "timezone_aware": "a date-time with a UTC offset (e.g. 2026-03-02T09:15:00+01:00)",
        "unexpected_keyword_argument": "no such field (check the spelling against docs/format.md)",
        "dataclass_type": "an object",
        "dict_type": "an object",
        "tuple_type": "a list",
        "list_type": "a list",
        "string_too_short": "non-empty text",
    }
)


def first_validation_error(exc: ValidationError, source: str) -> InputError:
    """One InputError for the first problem pydantic found (the count of others is appended)."""
    errors = exc.errors(include_url=False)
    first = errors[0]
    loc = tuple(first["loc"])
    path, expected = field_path(loc), _expectation(first)
    if len(errors) > 1:
        expected += f" (+{len(errors) - 1} more problems)"
    if first["type"] == "missing":
        return MissingField(path, expected, source)
    return InvalidField(path, expected, source)


def _expectation(error: Any) -> str:
    kind = error["type"]
    ctx = error.get("ctx") or {}
    got = shown(error.get("input"))
    if kind in ("greater_than_equal", "greater_than"):
        return f"a value >= {ctx.get('ge', ctx.get('gt'))}, got {got}"
    if kind in ("less_than_equal", "less_than"):
        return f"a value <= {ctx.get('le', ctx.get('lt'))}, got {got}"
    if kind in ("enum", "literal_error"):
        return f"one of {ctx.get('expected')}, got {got}"
    if kind == "value_error":  # our own validators (bridge.model) say what they expected
        return f"{error['msg'].removeprefix('Value error, ')}, got {got}"
    base = _EXPECTATIONS.get(kind, error["msg"])
    if kind == "unexpected_keyword_argument":
        return _closest_field(tuple(error["loc"])) or base
    return base if kind == "missing" else f"{base}, got {got}"


def _closest_field(loc: tuple[int | str, ...]) -> str | None:
    """``no such field; did you mean ...?`` when a field of the same object is spelt alike."""
    *parent, name = [part for part in loc if isinstance(part, str)]
    prefix = ".".join(parent)
    siblings = {
        path[len(prefix) + 1 :].split(".")[0] if prefix else path.split(".")[0]
        for path in canonical_fields()
        if not prefix or path.startswith(prefix + ".")
    }
    close = difflib.get_close_matches(name, sorted(siblings), n=1)
    return f"no such field; did you mean {close[0]!r}? (docs/format.md)" if close else None


def shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."
