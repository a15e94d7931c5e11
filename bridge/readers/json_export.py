"""Reader for the neutral export format ``dlco-result/1`` (JSON), documented in docs/format.md.

Owns: bytes -> :class:`bridge.model.Session`, every quantity in its canonical unit with the
value and unit the source wrote kept. One pass: parse, count the reported digits, normalise
the tree (:func:`bridge.science.normalise.normalise_tree`), validate the session once.
Numbers are parsed as decimals first so that the digits a lab reported (7.460) are kept.
Every failure is one :class:`bridge.errors.InputError` naming the field.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import fields
from decimal import Decimal
from typing import Any

from pydantic import ValidationError

from bridge.errors import InputError, InvalidField, MissingField, UnknownFormat, UnreadableInput
from bridge.model import Quantity, Results, Session, filled_fields, read_as
from bridge.readers.common import Record, decode_text, field_path, first_validation_error, shown
from bridge.science.normalise import normalise_tree
from bridge.science.units import MAX_DECIMALS, UnitCatalogue

FORMAT = "dlco-result/1"
_FILLED = tuple(sorted(filled_fields(Quantity)))  # decimals, original: the bridge's own record
_NOT_IN_AN_EXPORT = "no such field in an export: the bridge records it itself (docs/format.md)"


def read_export(data: bytes, source: str, catalogue: UnitCatalogue) -> Session:
    """Parse one ``dlco-result/1`` document into a session, every quantity in its canonical unit."""
    return session_from_tree(_parse(data, source), catalogue, source)


def read_records(data: bytes, source: str, catalogue: UnitCatalogue) -> Iterator[Record]:
    """The one record of a ``dlco-result/1`` document: its session, or the InputError (naming the file) refusing it."""
    try:
        session = read_export(data, source, catalogue)
    except InputError as exc:
        yield Record(error=exc if exc.source else exc.with_source(source))
        return
    yield Record(session=session)


def session_from_tree(tree: dict[str, Any], catalogue: UnitCatalogue, source: str = "") -> Session:
    """A parsed ``dlco-result/1`` tree (numbers as Decimal) -> Session; every reader ends here.

    The field-map readers (``csv_export``, ``hl7v2_legacy``) build the same tree, so every
    source goes through the same reported-digits rule, the same normalisation on the tree and
    the same one model validation.
    """
    try:
        session = read_as(Session, normalise_tree(_decimals_in_place(tree), catalogue))
    except ValidationError as exc:
        raise first_validation_error(exc, source) from None
    except InputError as exc:
        raise exc.with_source(source) from None
    refuse_impossible(session, source)
    return session


# What a session reports: every result but the lab's predicted values (read from the model).
RESULT_FIELDS = tuple(f.name for f in fields(Results) if f.name != "predicted")


def refuse_impossible(session: Session, source: str = "") -> None:
    """Refuse a record no lab can have made: born after the test, or with nothing measured.

    The JSON Schema cannot say either (each compares two fields, or needs one of several), so the
    reader says it for every source; docs/format.md lists these rules beside the schema. A test
    dated in the future is refused by the pipeline, which is given the time the input was read.
    """
    tested = session.performed_at.date()  # the day of the test where it was done (its own offset)
    if session.patient.birth_date > tested:
        got = session.patient.birth_date.isoformat()
        raise InvalidField("patient.birth_date", f"a date on or before the test date {tested}, got {got}", source)
    if not session.manoeuvres and all(getattr(session.results, name) is None for name in RESULT_FIELDS):
        expected = f"at least one result ({', '.join(RESULT_FIELDS)}) or a manoeuvre; the record has none"
        raise MissingField("results", expected, source)


def _parse(data: bytes, source: str) -> dict[str, Any]:
    """The parsed document (numbers as Decimal) after the top-level checks."""
    first = data.removeprefix(b"\xef\xbb\xbf").lstrip()[:1]
    if first and first not in (b"{", b"["):  # a CSV or HL7 file, say: never guessed at
        expected = f"{FORMAT} JSON, or a field map that claims the file (--map; map or [maps])"
        raise UnknownFormat("(file)", expected, source)
    text = decode_text(data, source)
    try:
        tree = json.loads(text, parse_float=Decimal)
    except json.JSONDecodeError as exc:
        where = f"line {exc.lineno} column {exc.colno}"
        raise UnreadableInput(where, f"valid JSON ({exc.msg})", source) from exc
    except RecursionError:  # the decoder recurses per level; an export is a few levels deep
        raise UnreadableInput("(top level)", "JSON nested no deeper than the format", source) from None
    except ValueError as exc:  # an integer of more than 4,300 digits, say
        raise UnreadableInput("(file)", f"JSON numbers Python can read ({exc})", source) from None
    if not isinstance(tree, dict):
        raise InvalidField("(top level)", "a JSON object", source)
    if tree.get("format") != FORMAT:
        got = tree.get("format")
        if got is None:
            raise MissingField("format", f'"{FORMAT}"', source)
        raise UnknownFormat("format", f'"{FORMAT}", got {shown(got)}', source)
    return tree


def _decimals_in_place(node: dict[str, Any], loc: tuple[int | str, ...] = ()) -> dict[str, Any]:
    """Parsed decimals as floats, with each quantity object's reported ``decimals``, in place.

    The tree comes from ``json.loads(..., parse_float=Decimal)`` (or a field map's reader): every
    value is exactly a dict, list, str, int, bool, None, float (NaN, Infinity) or Decimal, so
    exact type tests are enough (and keep ``True`` from counting as a number). A quantity object
    carrying a field the bridge fills itself (``decimals``, ``original``) is refused: an export
    says a value and its unit, never what the bridge records of them.
    """
    decimals = None
    if "unit" in node or "value" in node:
        for key in _FILLED:
            if key in node:
                raise InvalidField(field_path((*loc, key)), _NOT_IN_AN_EXPORT)
        value = node.get("value")
        if type(value) is Decimal:
            decimals = _decimals_of(value)
        elif type(value) is int:
            decimals = 0
    for key, value in node.items():
        kind = type(value)
        if kind is Decimal:
            node[key] = float(value)
        elif kind is dict:
            _decimals_in_place(value, (*loc, key))
        elif kind is list:
            _list_in_place(value, (*loc, key))
    if decimals is not None:
        node["decimals"] = decimals
    return node


def _list_in_place(items: list[Any], loc: tuple[int | str, ...]) -> None:
    for i, value in enumerate(items):
        kind = type(value)
        if kind is Decimal:
            items[i] = float(value)
        elif kind is dict:
            _decimals_in_place(value, (*loc, i))
        elif kind is list:
            _list_in_place(value, (*loc, i))


def _decimals_of(value: Decimal) -> int | None:
    """Digits after the point as written: ``7.460`` -> 3, ``1.5E-3`` -> 4, ``1E+2`` -> 0.

    More than :data:`MAX_DECIMALS` is a number a program printed in full (``6.619999999999999``),
    not a precision a lab reports: the value is read as it is, its precision taken as unknown
    (None: shown with 6 significant digits, like a value the bridge computed).
    """
    exponent = value.as_tuple().exponent
    written = -exponent if isinstance(exponent, int) and exponent < 0 else 0
    return written if written <= MAX_DECIMALS else None
