"""``mappings/plausibility.toml``: the bounds outside which a value gets an OUT_OF_RANGE finding (pure)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from bridge.errors import MappingError
from bridge.science.units import UnitCatalogue
from bridge.tables.toml import read_toml


@dataclass(frozen=True, slots=True)
class Bound:
    low: float
    high: float
    unit: str


@dataclass(frozen=True, slots=True)
class Plausibility:
    bounds: Mapping[str, Bound]
    mislabel_tolerance: float

    @classmethod
    def from_toml(cls, text: str, catalogue: UnitCatalogue, name: str = "plausibility.toml") -> Plausibility:
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
        return cls(bounds, float(tolerance))
