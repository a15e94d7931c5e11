"""UCUM catalogue, spelling aliases and conversions.

Owns: resolving a unit as labs write it to a valid UCUM code, and converting values between
units of one dimension. The catalogue is data (``mappings/units.toml``), parsed by
``bridge.tables.units``. The SI <-> traditional factor for DLCO and KCO lives in
exactly one place, :data:`TRADITIONAL_PER_SI`, and a catalogue may be built with the
alternative :data:`TRADITIONAL_PER_SI_ALTERNATIVE`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

# source: GLI 2017 TLCO equations (Stanojevic et al., ERJ 2017) -- the traditional and SI
# intercepts differ by ln(2.987); also the factor quoted for 1 mmol/min/kPa in mL/min/mmHg.
TRADITIONAL_PER_SI = 2.987
# 22.4 mL/mmol / 7.5 mmHg/kPa: also circulates; legacy archives may have used it.
TRADITIONAL_PER_SI_ALTERNATIVE = 2.986

UnitSystem = Literal["si", "traditional"]


@dataclass(frozen=True, slots=True)
class UnitDef:
    code: str
    dimension: str
    factor: float  # value_in_base = value * factor


def alias_key(text: str) -> str:
    """How a unit's spelling is compared: white space removed, lower case."""
    return "".join(text.split()).lower()


@dataclass(frozen=True, slots=True)
class UnitCatalogue:
    """The known UCUM units, their dimensions and factors, and the aliases labs write."""

    units: Mapping[str, UnitDef]
    aliases: Mapping[str, str]
    dimensions: Mapping[str, str]
    limits: Mapping[str, float]  # dimension -> largest magnitude accepted, in its base unit
    display: Mapping[str, Mapping[str, str]]  # unit system -> dimension -> the unit it is shown in
    traditional_per_si: float = TRADITIONAL_PER_SI

    def resolve(self, unit: str) -> UnitDef | None:
        """The catalogue entry for a unit as written (UCUM code first, then alias)."""
        found = self.units.get(unit.strip())
        if found is not None:
            return found
        code = self.aliases.get(alias_key(unit))
        return self.units[code] if code is not None else None

    def within_limits(self, value: float, unit: UnitDef) -> bool:
        """Whether a value in ``unit`` is finite and no larger than its dimension's limit."""
        in_base = value * unit.factor
        return math.isfinite(in_base) and abs(in_base) <= self.limits[unit.dimension]

    def factor_between(self, source: str, target: str) -> float:
        """Multiplier taking a value in ``source`` to ``target`` (both UCUM codes, one dimension)."""
        a, b = self.units[source], self.units[target]
        if a.dimension != b.dimension:
            raise ValueError(f"cannot convert {source} ({a.dimension}) to {target} ({b.dimension})")
        return a.factor / b.factor

    def convert(self, value: float, source: str, target: str) -> float:
        if source == target:
            return value
        return value * self.factor_between(source, target)

    def display_unit(self, dimension: str, system: UnitSystem) -> str:
        """The unit a dimension is shown in for a unit system."""
        return self.display[system].get(dimension, self.dimensions[dimension])


MAX_DECIMALS = 12  # the most digits after the point a quantity carries (bridge.model.Quantity)


def decimals_after_conversion(value: float, source_decimals: int | None, source_value: float) -> int | None:
    """Decimals that keep the significant digits the source reported (at most MAX_DECIMALS).

    7.460 mmol/min/kPa (4 significant digits) becomes 22.28 mL/min/mm[Hg], not 22.283020.
    """
    if source_decimals is None or source_value == 0 or value == 0:
        return source_decimals
    if not (math.isfinite(value) and math.isfinite(source_value)):
        return source_decimals  # nothing to count digits of; the value is refused elsewhere
    significant = _significant_digits(source_value, source_decimals)
    magnitude = math.floor(math.log10(abs(value)))
    return min(MAX_DECIMALS, max(0, significant - 1 - magnitude))


def _significant_digits(value: float, decimals: int) -> int:
    magnitude = math.floor(math.log10(abs(value)))
    return max(1, magnitude + 1 + decimals)
