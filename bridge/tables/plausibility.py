"""``mappings/plausibility.toml``: the bounds outside which a value gets an OUT_OF_RANGE finding (pure)."""

from __future__ import annotations

from bridge.errors import MappingError
from bridge.science.table_values import Bound, Plausibility
from bridge.science.units import UnitCatalogue
from bridge.tables.toml import read_toml


def plausibility(text: str, catalogue: UnitCatalogue, name: str = "plausibility.toml") -> Plausibility:
    """Parse ``plausibility.toml``; every bound's unit must be in the catalogue (raises MappingError)."""
    data = read_toml(text, name)
    bounds: dict[str, Bound] = {}
    for path, entry in data.get("bounds", {}).items():
        try:
            bound = Bound(float(entry["low"]), float(entry["high"]), str(entry["unit"]))
        except (KeyError, TypeError, ValueError) as exc:
            raise MappingError(name, f"bounds.{path}", "low, high and unit") from exc
        if bound.unit not in catalogue.units or bound.low > bound.high:
            raise MappingError(name, f"bounds.{path}", "a catalogued UCUM unit and low <= high")
        bounds[path] = bound
    tolerance = data.get("mislabel", {}).get("factor_tolerance", 0.12)
    return Plausibility(bounds, float(tolerance))
