"""FHIR R4 JSON: the datatypes every resource is written with, and byte-stable serialisation (pure).

Owns: :func:`dumps` (insertion order, :class:`decimal.Decimal` values written with exactly their
digits, so a reported 7.460 stays 7.460), :func:`indented` (the same document laid out for people),
and the small datatypes the emitters share: a valueQuantity in UCUM, a Coding, an instant (never
naive). ``bridge.emit.fhir`` builds the resources with them.
"""

from __future__ import annotations

import json
from datetime import datetime
from decimal import Decimal
from typing import Any

import orjson

from bridge.model import Quantity

Resource = dict[str, Any]

UCUM = "http://unitsofmeasure.org"


def indented(data: bytes) -> bytes:
    """A JSON document laid out with two-space indentation, every number written with the digits it had.

    Numbers are read as decimals and written back verbatim, so a compact Bundle and its indented form
    differ in whitespace only.
    """
    return dumps(json.loads(data, parse_float=Decimal), indent=True)


def dumps(value: Any, *, indent: bool) -> bytes:
    """JSON bytes in insertion order; Decimal values written with exactly their digits."""
    option = orjson.OPT_INDENT_2 if indent else 0
    return orjson.dumps(value, default=_raw_decimal, option=option)


def _raw_decimal(value: object) -> orjson.Fragment:
    if isinstance(value, Decimal) and value.is_finite():
        return orjson.Fragment(str(value).encode("ascii"))
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def quantity(quantity: Quantity) -> Resource:
    """A valueQuantity; the value is a Decimal with the reported digits (7.460 stays 7.460)."""
    return {
        "value": Decimal(quantity.text()),
        "unit": quantity.unit,
        "system": UCUM,
        "code": quantity.unit,
    }


def coding(system: str, code: str, display: str) -> Resource:
    """A Coding."""
    return {"system": system, "code": code, "display": display}


def instant(moment: datetime) -> str:
    """A FHIR instant: seconds, or milliseconds when there are any."""
    require_aware(moment)
    return moment.isoformat(timespec="milliseconds" if moment.microsecond else "seconds")


def require_aware(moment: datetime) -> None:
    """Refuse a naive date-time: a FHIR instant needs its offset."""
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError(f"FHIR instants need a time zone offset, got naive {moment.isoformat()}")
