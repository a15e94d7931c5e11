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
UNIT_SYSTEMS: tuple[UnitSystem, ...] = ("si", "traditional")
DEFAULT_UNITS: UnitSystem = "traditional"  # what check shows, convert writes and a destination gets, unless set
TRADITIONAL_PER_SI_CHOICES = (TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE)  # what traditional_per_si may be


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


def decimals_after_conversion(source_decimals: int | None, factor: float) -> int | None:
    """Decimals of a value converted with ``factor`` whose rounding step is no coarser than the source's.

    NIST Special Publication 811 (2008), Appendix B.7.2: keep enough digits that the converted
    value's rounding step is no larger than the original's (36 ft -> 11.0 m, not 11). The source
    step is 10**-d; in the new unit it is 10**-d x factor, so the decimals are the smallest d'
    with 10**-d' <= 10**-d x factor: 8.4 mmol/min/kPa -> 25.1 mL/min/mm[Hg]; 152 g/L -> 15.2 g/dL.
    """
    if source_decimals is None:
        return None
    if not (math.isfinite(factor) and factor > 0):
        return source_decimals  # nothing to scale a step by; such a value is refused elsewhere
    # The tolerance keeps an exact power of ten (g/L -> g/dL) from gaining a digit by rounding.
    needed = math.ceil(source_decimals - math.log10(factor) - 1e-9)
    return min(MAX_DECIMALS, max(0, needed))
