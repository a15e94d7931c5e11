"""``mappings/codes.toml``: the code of each emitted quantity, the panel code, the code systems (pure).

A code may carry the standard code of the same concept beside it (``[codes.x.standard]``: a
SNOMED CT code beside a local one) and the technique it was measured by (``method``, a name in
``[methods]``: FHIR ``Observation.method``, HL7 v2 OBX-17); the methods are kept by name too, for
results whose technique the record names (the lung volumes' ``method``).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from types import MappingProxyType

from bridge.errors import MappingError
from bridge.science.table_values import Code, CodeTable
from bridge.tables.toml import read_toml

# A quantity key becomes part of observation identifiers and FHIR search URLs as it is written,
# so it is limited to characters that need no escaping in either.
_KEY = re.compile(r"[a-z][a-z0-9_]*")


# The published code systems a table may name (besides "local", whose URI the site's settings give).
KNOWN_SYSTEMS = ("loinc", "snomed")


def code_table(text: str, name: str = "codes.toml") -> CodeTable:
    """Parse ``codes.toml`` (raises MappingError naming the key)."""
    data = read_toml(text, name)
    systems = dict(data.get("systems", {}))
    if "local" in systems:
        raise MappingError(name, "systems.local", "no entry (emit.local_code_system or emit.system_base names it)")
    if "loinc" not in systems or not set(systems) <= set(KNOWN_SYSTEMS):
        raise MappingError(name, "systems", f"the key loinc, and of {', '.join(KNOWN_SYSTEMS[1:])} those codes name")
    names = (*systems, "local")  # a local code's URI comes from the site's settings
    published = tuple(systems)  # a standard code is never local
    # A method is published where one was found (SNOMED CT), else local, saying where it was looked for.
    methods = {key: _code(name, f"methods.{key}", entry, names) for key, entry in data.get("methods", {}).items()}
    codes = {}
    for key, entry in data.get("codes", {}).items():
        where = f"codes.{key}"
        if not _KEY.fullmatch(key):
            raise MappingError(name, where, "a key of lower-case letters, digits and underscores")
        standard = entry.get("standard")
        method = entry.get("method")
        if method is not None and method not in methods:
            raise MappingError(name, f"{where}.method", f"a name in [methods] ({', '.join(methods) or 'none'})")
        codes[key] = _code(
            name,
            where,
            entry,
            names,
            standard=_code(name, f"{where}.standard", standard, published) if standard is not None else None,
            method=methods[method] if method is not None else None,
        )
    return CodeTable(codes, _code(name, "panel", data.get("panel", {}), names), systems, MappingProxyType(methods))


def _code(
    name: str,
    where: str,
    entry: Mapping[str, object],
    systems: tuple[str, ...],
    *,
    standard: Code | None = None,
    method: Code | None = None,
) -> Code:
    if not isinstance(entry, Mapping):
        raise MappingError(name, where, f"a table of system ({' or '.join(systems)}), code and display")
    system, code, display = entry.get("system"), entry.get("code"), entry.get("display")
    if system not in systems or not isinstance(code, str) or not code or not isinstance(display, str):
        raise MappingError(name, where, f"system ({' or '.join(systems)}), code and display")
    return Code(str(system), code, display, standard, method)
