"""Typed value objects for the tables in ``mappings/``, parsed from their text.

Owns: :class:`Plausibility` bounds and the :class:`Tables` bundle every core step receives.
Reading the files is the shell's job (``bridge.resources``); here only text becomes values.
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from dataclasses import dataclass

from bridge.errors import MappingError
from bridge.quality import GradeTable
from bridge.units import UnitCatalogue


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
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise MappingError(name, "file", f"valid TOML ({exc})") from exc
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


@dataclass(frozen=True, slots=True)
class Code:
    """One coded concept: ``system`` is "loinc" or "local" (resolved per destination)."""

    system: str
    code: str
    display: str


@dataclass(frozen=True, slots=True)
class CodeTable:
    """Observation codes per quantity key, the panel code and the code-system URIs."""

    codes: Mapping[str, Code]
    panel: Code
    systems: Mapping[str, str]

    @classmethod
    def from_toml(cls, text: str, name: str = "codes.toml") -> CodeTable:
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise MappingError(name, "file", f"valid TOML ({exc})") from exc
        systems = dict(data.get("systems", {}))
        if set(systems) != {"loinc", "local"}:
            raise MappingError(name, "systems", "exactly the keys loinc and local")
        codes = {key: _code(name, f"codes.{key}", entry, systems) for key, entry in data.get("codes", {}).items()}
        return cls(codes, _code(name, "panel", data.get("panel", {}), systems), systems)


def _code(name: str, where: str, entry: Mapping[str, object], systems: Mapping[str, str]) -> Code:
    system, code, display = entry.get("system"), entry.get("code"), entry.get("display")
    if system not in systems or not isinstance(code, str) or not code or not isinstance(display, str):
        raise MappingError(name, where, f"system ({' or '.join(systems)}), code and display")
    return Code(str(system), code, display)


@dataclass(frozen=True, slots=True)
class Tables:
    """Every code table and rule table the pure core needs, parsed once by the shell."""

    units: UnitCatalogue
    grades: GradeTable
    plausibility: Plausibility
    codes: CodeTable
