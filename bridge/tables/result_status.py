"""``mappings/result_status.toml`` -> :class:`bridge.science.lab_status.ResultStatusTable` (pure)."""

from __future__ import annotations

from types import MappingProxyType
from typing import cast

from bridge.errors import MappingError
from bridge.science.lab_status import STATUS_ACTIONS, ResultStatus, ResultStatusTable, StatusAction
from bridge.tables.toml import read_toml


def result_status_table(text: str, name: str = "result_status.toml") -> ResultStatusTable:
    """Each status code with its meaning and action; a broken table is a MappingError naming the entry."""
    data = read_toml(text, name)
    entries = data.get("status")
    if not isinstance(entries, dict) or not entries:
        raise MappingError(name, "status", "a [status.<code>] entry per code of HL7 table 0085")
    statuses: dict[str, ResultStatus] = {}
    for code, entry in entries.items():
        if len(code) != 1 or not code.isupper() or not isinstance(entry, dict):
            raise MappingError(name, f"status.{code}", "one upper-case letter of HL7 table 0085, with its entry")
        meaning, action = entry.get("meaning"), entry.get("action")
        if not isinstance(meaning, str) or not meaning.strip():
            raise MappingError(name, f"status.{code}.meaning", "the table's text for the code")
        if action not in STATUS_ACTIONS:
            raise MappingError(name, f"status.{code}.action", f"one of {', '.join(STATUS_ACTIONS)}")
        statuses[code] = ResultStatus(code, meaning, cast(StatusAction, action))
    return ResultStatusTable(MappingProxyType(statuses))
