"""The value types of the record's fields: texts and URIs any output can carry, quantities (pure).

Owns :class:`Quantity` (value, UCUM unit, reported decimals, the :class:`Original` value and
unit), the :class:`Measure` annotation a quantity field declares its dimension and canonical
unit with, :data:`Text` and :data:`Uri` (refusing what no output can carry), and the frozen
base of every record model. ``bridge.model`` builds the record from these and re-exports them.
Imports only the stdlib and pydantic.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Annotated

from pydantic import AfterValidator, BaseModel, ConfigDict, Field

# Characters no output may carry in text: FHIR R4 strings match ^[ \r\n\t\S]+$ (ECMA-262 \s), so
# control characters and white space other than space, tab and line breaks are refused, and so
# are unpaired surrogates (not UTF-8).  # source: HL7 FHIR R4 datatypes, "string" regex
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


# The same rules as JSON Schema patterns (ECMA-262), for the published schema of the format.
_TEXT_PATTERN = (
    r"^[ \t\r\n]*[^\s\x00-\x1f\x7f][^\x00-\x08\x0b\x0c\x0e-\x1f\x7f"
    r"\u00a0\u1680\u2000-\u200a\u2028\u2029\u202f\u205f\u3000\ufeff]*$"
)
_URI_PATTERN = r"^[^\s\x00-\x1f\x7f]+$"
Text = Annotated[str, Field(min_length=1, json_schema_extra={"pattern": _TEXT_PATTERN}), AfterValidator(_carried_text)]
Uri = Annotated[str, Field(min_length=1, json_schema_extra={"pattern": _URI_PATTERN}), AfterValidator(_uri)]


class Frozen(BaseModel):
    """Base for every record model: immutable, strict about unknown keys."""

    model_config = ConfigDict(frozen=True, extra="forbid")


@dataclass(frozen=True, slots=True)
class Measure:
    """Annotation on a quantity field: which dimension it has and the unit it is kept in."""

    dimension: str
    canonical_unit: str
    signed: bool = False  # may the value be negative (altitude below sea level, temperature)


class Original(Frozen):
    """The value and unit exactly as the source wrote them (the value as text keeps its digits)."""

    value: str
    unit: str


class Quantity(Frozen):
    """A value with its UCUM unit.

    ``decimals`` is the number of digits after the decimal point the source reported, so that
    7.460 is emitted as 7.460; ``None`` for values computed here. ``original`` is set by
    normalisation when the source spelled or scaled the quantity differently.
    """

    value: float = Field(allow_inf_nan=False)
    unit: str = Field(min_length=1)
    decimals: int | None = Field(default=None, ge=0, le=12)
    original: Original | None = None

    def text(self) -> str:
        """The value as text with the reported number of decimals (6 significant digits if unknown)."""
        return number_text(self.value, self.decimals)


def number_text(value: float, decimals: int | None) -> str:
    """A number with ``decimals`` digits after the point, or 6 significant digits when None."""
    return format(value, ".6g") if decimals is None else f"{value:.{decimals}f}"
