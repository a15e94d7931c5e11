"""``mappings/finding_codes.toml``: every finding code the bridge can report, with its severity (pure).

Owns :class:`FindingCodes`, what the settings ``allow`` and ``blocking`` are checked against
(a misspelt code is refused at start, naming the closest known one), and its parser.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

from bridge.errors import MappingError
from bridge.model import Severity
from bridge.tables.toml import read_toml

TABLE = "finding_codes.toml"


@dataclass(frozen=True, slots=True)
class FindingCodes:
    """Code -> severity, for every code the rules, the field-map readers and the audit emit."""

    severities: Mapping[str, Severity]

    def closest(self, word: str) -> str | None:
        """The known code nearest to ``word`` (case aside), or None when none is near."""
        near = difflib.get_close_matches(word.upper(), sorted(self.severities), n=1, cutoff=0.6)
        return near[0] if near else None

    @classmethod
    def from_toml(cls, text: str) -> FindingCodes:
        data = read_toml(text, TABLE)
        severities: dict[str, Severity] = {}
        for group, codes in data.items():
            if not isinstance(codes, dict):
                raise MappingError(TABLE, group, "a table of CODE = severity")
            for code, severity in codes.items():
                if severity not in tuple(Severity) or code in severities:
                    raise MappingError(TABLE, f"{group}.{code}", "one severity (info, warning, error), once")
                severities[code] = Severity(severity)
        return cls(MappingProxyType(severities))
