"""The canonical fields a field map may fill, read from the record model (pure).

Owns: :class:`CanonicalField` and :func:`canonical_fields`, every field of ``dlco-result/1``
by dotted path with its kind (and, for quantities, dimension and canonical unit), walked from
``bridge.model`` so the list never drifts from the model. ``bridge.tables.field_map_parser``
checks a map's targets against it; ``bridge.display.map_report`` lists it.
"""

from __future__ import annotations

import types
from collections.abc import Mapping
from dataclasses import dataclass, is_dataclass
from datetime import date, datetime
from functools import cache
from types import MappingProxyType
from typing import Annotated, Any, Literal, Union, get_args, get_origin

from pydantic import AwareDatetime

from bridge.model import Quantity, Session, Sex
from bridge.values import field_types, measure_of

FieldKind = Literal["quantity", "number", "date", "datetime", "sex", "text"]
MANOEUVRES = "manoeuvres"  # canonical fields under this prefix are read once per manoeuvre


@dataclass(frozen=True, slots=True)
class CanonicalField:
    """One field of ``dlco-result/1`` a map can fill, e.g. ``manoeuvres.inspired_volume``."""

    path: str
    kind: FieldKind
    dimension: str | None = None  # quantities only
    canonical_unit: str | None = None  # quantities only: the unit the core keeps it in
    per_manoeuvre: bool = False  # read once per manoeuvre (under ``manoeuvres.``)
    # The list this field is an item of: ``manoeuvres`` (the DLCO test's), or a list inside an
    # object, ``spirometry.pre.manoeuvres``; None for a field of the session itself.
    item_of: str | None = None


@cache
def canonical_fields() -> Mapping[str, CanonicalField]:
    """Every field of ``dlco-result/1`` a map may fill, by dotted path (``format`` is implied)."""
    found: dict[str, CanonicalField] = {}
    _walk(Session, "", found)
    del found["format"]  # implied
    del found["lab_status"]  # a map gives a value's status with the value (status_column, OBX-11)
    return MappingProxyType(found)


def _walk(model: type[Any], prefix: str, found: dict[str, CanonicalField], item_of: str | None = None) -> None:
    for name, hint in field_types(model).items():
        path = prefix + name
        measure = measure_of(hint)
        if measure is not None:
            found[path] = CanonicalField(
                path, "quantity", measure.dimension, measure.canonical_unit, _in_manoeuvre(path), item_of
            )
            continue
        bare = _bare(hint)
        inner = item_of
        if get_origin(bare) is tuple:  # a list: its items' fields, each read once per item
            bare, inner = _bare(get_args(bare)[0]), path
        if isinstance(bare, type) and is_dataclass(bare) and bare is not Quantity:
            _walk(bare, path + ".", found, inner)
        else:
            found[path] = CanonicalField(path, _kind(bare), per_manoeuvre=_in_manoeuvre(path), item_of=inner)


def _in_manoeuvre(path: str) -> bool:
    return path.startswith(MANOEUVRES + ".")


def _kind(bare: Any) -> FieldKind:
    if bare is Sex:
        return "sex"
    if bare is AwareDatetime or (isinstance(bare, type) and issubclass(bare, datetime)):
        return "datetime"
    if isinstance(bare, type) and issubclass(bare, date):
        return "date"
    if bare is float:
        return "number"
    return "text"


def _bare(annotation: Any) -> Any:
    """The type inside ``Optional[...]`` and ``Annotated[...]``."""
    while True:
        origin = get_origin(annotation)
        if origin is Annotated:
            annotation = get_args(annotation)[0]
        elif origin is Union or origin is types.UnionType:
            annotation = next(a for a in get_args(annotation) if a is not type(None))
        else:
            return annotation
