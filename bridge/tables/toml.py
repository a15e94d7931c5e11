"""The one way a table in ``mappings/`` is read as TOML, and its one error (pure).

Owns: turning the text of a TOML table into a dict, or a :class:`bridge.errors.MappingError`
naming the table; and small typed accessors the table parsers share.
"""

from __future__ import annotations

import tomllib
from typing import Any

from bridge.errors import MappingError


def read_toml(text: str, name: str) -> dict[str, Any]:
    """The parsed table; broken TOML is a MappingError naming the file."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise MappingError(name, "file", f"valid TOML ({exc})") from exc
