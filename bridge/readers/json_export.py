"""Reader for the neutral export format ``dlco-result/1`` (JSON), documented in docs/format.md.

Owns: bytes -> :class:`bridge.model.Session` with units as the source wrote them (``normalise``
resolves them). Numbers are parsed as decimals first so that the digits a lab reported
(7.460) are kept. Every failure is one :class:`bridge.errors.InputError` naming the field.

:func:`read_normalised` is ``normalise(read_export(...))`` in one model build: it puts each
quantity of the parsed tree in its canonical form (with ``bridge.normalise``'s plan and
conversion) before pydantic sees it, and takes the plain path for anything unusual.
"""

from __future__ import annotations

import json
import math
from decimal import Decimal
from functools import cache
from typing import Any

from pydantic import BaseModel, ValidationError

from bridge.errors import BridgeError, InvalidField, MissingField, UnreadableInput
from bridge.model import Measure, Session
from bridge.normalise import checked_unit, format_number, in_canonical_unit, normalise, plan_of
from bridge.readers.common import decode_text, first_validation_error
from bridge.units import UnitCatalogue

FORMAT = "dlco-result/1"
_MAX_DECIMALS = 12  # Quantity.decimals: le=12


def read_export(data: bytes, source: str = "") -> Session:
    """Parse one ``dlco-result/1`` document into a session (units not yet normalised)."""
    tree = _parse(data, source)
    try:
        return Session.model_validate(_decimals_in_place(tree))
    except ValidationError as exc:
        raise first_validation_error(exc, source) from None


def read_normalised(data: bytes, catalogue: UnitCatalogue, source: str = "") -> Session:
    """``normalise(read_export(data, source), catalogue)``, building each model once.

    Each ``{value, unit}`` object at a quantity field of the parsed tree becomes the canonical
    form ``normalise`` gives (value converted, canonical unit, decimals, ``original``) before
    the single ``Session.model_validate``. Whatever the walk does not handle exactly as that
    expression does (an unknown or wrong unit, a negative volume, an unexpected key, type or
    number, a document pydantic refuses) is read again by the expression itself, which raises
    its own error: errors are the reference's by construction, not by imitation.
    """
    tree = _parse(data, source)
    try:
        ready = _normalised_in_place(tree, Session, catalogue)
    except (BridgeError, ArithmeticError, ValueError):  # refused or out of range: see below
        ready = False
    if ready:
        try:
            return Session.model_validate(tree)
        except ValidationError:
            pass  # the reference path reports it (the tree has been changed in place)
    return normalise(read_export(data, source), catalogue)


def _parse(data: bytes, source: str) -> dict[str, Any]:
    """The parsed document (numbers as Decimal) after the top-level checks."""
    text = decode_text(data, source)
    try:
        tree = json.loads(text, parse_float=Decimal)
    except json.JSONDecodeError as exc:
        where = f"line {exc.lineno} column {exc.colno}"
        raise UnreadableInput(where, f"valid JSON ({exc.msg})", source) from exc
    if not isinstance(tree, dict):
        raise InvalidField("(top level)", "a JSON object", source)
    if tree.get("format") != FORMAT:
        got = tree.get("format")
        if got is None:
            raise MissingField("format", f'"{FORMAT}"', source)
        raise InvalidField("format", f'"{FORMAT}", got {got!r}', source)
    return tree


# What each field of a model holds, for the tree walk: a Measure, or (nested model, is a tuple).
_TreeStep = Measure | tuple[type[BaseModel], bool]


@cache
def _tree_plan(cls: type[BaseModel]) -> dict[str, _TreeStep]:
    """``bridge.normalise.plan_of`` keyed by field name (computed once per class)."""
    return {name: kind if isinstance(kind, Measure) else (kind, is_tuple) for name, kind, is_tuple in plan_of(cls)}


def _normalised_in_place(node: dict[str, Any], cls: type[BaseModel], catalogue: UnitCatalogue) -> bool:
    """Quantities of ``node`` (an object for ``cls``) in canonical form, other decimals as floats.

    False as soon as something is not a plain well-formed value (the caller then takes the
    reference path); may raise the errors of ``checked_unit`` and of the arithmetic.
    """
    plan = _tree_plan(cls)
    for key, value in node.items():
        kind = type(value)
        step = plan.get(key)
        if step is None:
            if kind is Decimal:
                node[key] = float(value)
            elif kind is dict or kind is list:
                return False  # no field of a model takes an object or list except those planned
        elif value is None:
            continue
        elif isinstance(step, Measure):
            canonical = _canonical_quantity(value, step, catalogue) if kind is dict else None
            if canonical is None:
                return False
            node[key] = canonical
        elif step[1]:
            if kind is not list:
                return False
            for item in value:
                if type(item) is not dict or not _normalised_in_place(item, step[0], catalogue):
                    return False
        elif kind is not dict or not _normalised_in_place(value, step[0], catalogue):
            return False
    return True


def _canonical_quantity(node: dict[str, Any], measure: Measure, catalogue: UnitCatalogue) -> dict[str, Any] | None:
    """The object ``normalise_quantity`` would build for ``{value, unit}``; None if unusual."""
    if len(node) != 2:
        return None  # decimals or original given, or a stray key: the reference path decides
    value, unit_text = node.get("value"), node.get("unit")
    if type(unit_text) is not str or not unit_text:
        return None
    if type(value) is not Decimal and type(value) is not int:
        return None  # a float (NaN, Infinity), text, true/false, null, object or list
    decimals = _reported_decimals(value)
    number = float(value)
    if decimals > _MAX_DECIMALS or not math.isfinite(number):
        return None
    unit = checked_unit(unit_text, number, measure, catalogue, "")
    converted, new_decimals = in_canonical_unit(number, decimals, unit, measure, catalogue)
    if new_decimals is None or new_decimals > _MAX_DECIMALS or not math.isfinite(converted):
        return None
    return {
        "value": converted,
        "unit": measure.canonical_unit,
        "decimals": new_decimals,
        "original": {"value": format_number(number, decimals), "unit": unit_text},
    }


def _decimals_in_place(node: dict[str, Any]) -> dict[str, Any]:
    """Parsed decimals as floats, with each quantity object's reported ``decimals``, in place.

    The tree comes from ``json.loads(..., parse_float=Decimal)``: every value is exactly a
    dict, list, str, int, bool, None, float (NaN, Infinity) or Decimal, so exact type tests
    are enough. (tests/core/test_reader_equivalence.py keeps a rebuilding reference version.)
    """
    decimals = None
    if "unit" in node and "decimals" not in node:
        value = node.get("value")
        if type(value) is Decimal or type(value) is int:
            decimals = _reported_decimals(value)
    for key, value in node.items():
        kind = type(value)
        if kind is Decimal:
            node[key] = float(value)
        elif kind is dict:
            _decimals_in_place(value)
        elif kind is list:
            _list_in_place(value)
    if decimals is not None:
        node["decimals"] = decimals
    return node


def _list_in_place(items: list[Any]) -> None:
    for i, value in enumerate(items):
        kind = type(value)
        if kind is Decimal:
            items[i] = float(value)
        elif kind is dict:
            _decimals_in_place(value)
        elif kind is list:
            _list_in_place(value)


def _reported_decimals(value: Decimal | int) -> int:
    """:func:`_decimals_of`, read off the Decimal's text when it has no exponent (cheaper).

    ``str`` of a finite Decimal is plain exactly when its exponent is <= 0 and it is not
    tiny; then the digits after the point are minus the exponent. Otherwise ask the tuple.
    """
    if type(value) is int:
        return 0
    text = str(value)
    if "E" in text:
        return _decimals_of(value)
    point = text.find(".")
    return 0 if point < 0 else len(text) - point - 1


def _decimals_of(value: Decimal | int) -> int:
    if isinstance(value, int):
        return 0
    exponent = value.as_tuple().exponent
    return -exponent if isinstance(exponent, int) and exponent < 0 else 0
