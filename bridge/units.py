"""UCUM catalogue, spelling aliases and conversions.

Owns: resolving a unit as labs write it to a valid UCUM code, and converting values between
units of one dimension. The catalogue is data (``mappings/units.toml``) parsed from text here;
reading the file is the shell's job. The SI <-> traditional factor for DLCO and KCO lives in
exactly one place, :data:`TRADITIONAL_PER_SI`, and a catalogue may be built with the
alternative :data:`TRADITIONAL_PER_SI_ALTERNATIVE`.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

from bridge.errors import MappingError

# source: GLI 2017 TLCO equations (Stanojevic et al., ERJ 2017) -- the traditional and SI
# intercepts differ by ln(2.987); also the factor quoted for 1 mmol/min/kPa in mL/min/mmHg.
TRADITIONAL_PER_SI = 2.987
# 22.4 mL/mmol / 7.5 mmHg/kPa: also circulates; legacy archives may have used it.
TRADITIONAL_PER_SI_ALTERNATIVE = 2.986

UnitSystem = Literal["si", "traditional"]

# The unit each dimension is shown in, per unit system (dimensions not listed keep their base).
DISPLAY_UNITS: Mapping[UnitSystem, Mapping[str, str]] = {
    "si": {
        "diffusing_capacity": "mmol/min/kPa",
        "transfer_coefficient": "mmol/min/kPa/L",
        "pressure": "kPa",
    },
    "traditional": {
        "diffusing_capacity": "mL/min/mm[Hg]",
        "transfer_coefficient": "mL/min/mm[Hg]/L",
        "pressure": "mm[Hg]",
    },
}


@dataclass(frozen=True, slots=True)
class UnitDef:
    code: str
    dimension: str
    factor: float  # value_in_base = value * factor


def _alias_key(text: str) -> str:
    return "".join(text.split()).lower()


@dataclass(frozen=True, slots=True)
class UnitCatalogue:
    """The known UCUM units, their dimensions and factors, and the aliases labs write."""

    units: Mapping[str, UnitDef]
    aliases: Mapping[str, str]
    dimensions: Mapping[str, str]
    limits: Mapping[str, float]  # dimension -> largest magnitude accepted, in its base unit
    traditional_per_si: float = TRADITIONAL_PER_SI

    @classmethod
    def from_toml(
        cls, text: str, traditional_per_si: float = TRADITIONAL_PER_SI, name: str = "units.toml"
    ) -> UnitCatalogue:
        """Parse the catalogue text; a broken table raises MappingError naming the entry."""
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise MappingError(name, "file", f"valid TOML ({exc})") from exc
        dimensions = dict(data.get("dimensions", {}))
        units: dict[str, UnitDef] = {}
        for code, entry in data.get("units", {}).items():
            units[code] = _unit_def(name, code, entry, dimensions, traditional_per_si)
        aliases: dict[str, str] = {}
        for alias, code in data.get("aliases", {}).items():
            if code not in units:
                raise MappingError(name, f"aliases.{alias}", f"a known unit code, not {code!r}")
            aliases[_alias_key(alias)] = code
        for dimension, base in dimensions.items():
            if base not in units or units[base].factor != 1.0:
                raise MappingError(name, f"dimensions.{dimension}", "a unit with factor 1.0")
        limits = {dimension: _limit(name, dimension, data.get("limits", {})) for dimension in dimensions}
        return cls(units, aliases, dimensions, limits, traditional_per_si)

    def resolve(self, unit: str) -> UnitDef | None:
        """The catalogue entry for a unit as written (UCUM code first, then alias)."""
        found = self.units.get(unit.strip())
        if found is not None:
            return found
        code = self.aliases.get(_alias_key(unit))
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
        return DISPLAY_UNITS[system].get(dimension, self.dimensions[dimension])


def _unit_def(name: str, code: str, entry: Mapping[str, object], dimensions: Mapping[str, str], k: float) -> UnitDef:
    dimension = entry.get("dimension")
    if not isinstance(dimension, str) or dimension not in dimensions:
        raise MappingError(name, f"units.{code}.dimension", f"one of {sorted(dimensions)}")
    raw = entry.get("factor")
    if raw == "traditional_per_si":
        factor = k
    elif isinstance(raw, int | float) and not isinstance(raw, bool) and raw > 0:
        factor = float(raw)
    else:
        raise MappingError(name, f"units.{code}.factor", 'a positive number or "traditional_per_si"')
    return UnitDef(code, dimension, factor)


def _limit(name: str, dimension: str, limits: Mapping[str, object]) -> float:
    raw = limits.get(dimension)
    if not isinstance(raw, int | float) or isinstance(raw, bool) or not 0 < raw < math.inf:
        raise MappingError(name, f"limits.{dimension}", "a positive number (largest magnitude accepted)")
    return float(raw)


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
