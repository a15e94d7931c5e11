"""``mappings/units.toml`` -> :class:`bridge.science.units.UnitCatalogue` (pure).

Owns: checking every unit, alias, dimension and limit of the catalogue text, each error a
:class:`bridge.errors.MappingError` naming the entry.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from types import MappingProxyType

from bridge.errors import MappingError
from bridge.science.units import TRADITIONAL_PER_SI, UNIT_SYSTEMS, UnitCatalogue, UnitDef, alias_key
from bridge.tables.toml import read_toml


def unit_catalogue(
    text: str, traditional_per_si: float = TRADITIONAL_PER_SI, name: str = "units.toml"
) -> UnitCatalogue:
    """The catalogue, with DLCO and KCO factors built on ``traditional_per_si``."""
    data = read_toml(text, name)
    dimensions = dict(data.get("dimensions", {}))
    units = {
        code: _unit_def(name, code, entry, dimensions, traditional_per_si)
        for code, entry in data.get("units", {}).items()
    }
    aliases: dict[str, str] = {}
    for alias, code in data.get("aliases", {}).items():
        if code not in units:
            raise MappingError(name, f"aliases.{alias}", f"a known unit code, not {code!r}")
        aliases[alias_key(alias)] = code
    for dimension, base in dimensions.items():
        if base not in units or units[base].factor != 1.0:
            raise MappingError(name, f"dimensions.{dimension}", "a unit with factor 1.0")
    limits = {dimension: _limit(name, dimension, data.get("limits", {})) for dimension in dimensions}
    display: dict[str, Mapping[str, str]] = {
        system: _display(name, system, data.get("display", {}), units) for system in UNIT_SYSTEMS
    }
    return UnitCatalogue(units, aliases, dimensions, limits, display, traditional_per_si)


def _display(name: str, system: str, tables: Mapping[str, object], units: Mapping[str, UnitDef]) -> Mapping[str, str]:
    table = tables.get(system)
    if not isinstance(table, dict):
        raise MappingError(name, f"display.{system}", "a table of dimension = unit")
    for dimension, code in table.items():
        if code not in units or units[code].dimension != dimension:
            raise MappingError(name, f"display.{system}.{dimension}", "a catalogued unit of that dimension")
    return MappingProxyType(dict(table))


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
