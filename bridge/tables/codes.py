"""``mappings/codes.toml``: the code of each emitted quantity, the panel code, the code systems (pure)."""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass

from bridge.errors import MappingError
from bridge.tables.toml import read_toml

# A quantity key becomes part of observation identifiers and FHIR search URLs as it is written,
# so it is limited to characters that need no escaping in either.
_KEY = re.compile(r"[a-z][a-z0-9_]*")


@dataclass(frozen=True, slots=True)
class Code:
    """One coded concept: ``system`` is "loinc" or "local" (resolved per destination)."""

    system: str
    code: str
    display: str


@dataclass(frozen=True, slots=True)
class CodeTable:
    """Observation codes per quantity key, the panel code and the URI of each published code system.

    ``systems`` has no "local" entry: the site's settings name the system of local codes
    (``emit.local_code_system``, else under ``emit.system_base``).
    """

    codes: Mapping[str, Code]
    panel: Code
    systems: Mapping[str, str]

    @classmethod
    def from_toml(cls, text: str, name: str = "codes.toml") -> CodeTable:
        data = read_toml(text, name)
        systems = dict(data.get("systems", {}))
        if "local" in systems:
            raise MappingError(name, "systems.local", "no entry (emit.local_code_system or emit.system_base names it)")
        if set(systems) != {"loinc"}:
            raise MappingError(name, "systems", "exactly the key loinc")
        names = (*systems, "local")  # a local code's URI comes from the site's settings
        codes = {key: _code(name, f"codes.{key}", entry, names) for key, entry in data.get("codes", {}).items()}
        for key in codes:
            if not _KEY.fullmatch(key):
                raise MappingError(name, f"codes.{key}", "a key of lower-case letters, digits and underscores")
        return cls(codes, _code(name, "panel", data.get("panel", {}), names), systems)


def _code(name: str, where: str, entry: Mapping[str, object], systems: tuple[str, ...]) -> Code:
    system, code, display = entry.get("system"), entry.get("code"), entry.get("display")
    if system not in systems or not isinstance(code, str) or not code or not isinstance(display, str):
        raise MappingError(name, where, f"system ({' or '.join(systems)}), code and display")
    return Code(str(system), code, display)
