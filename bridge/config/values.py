"""Checking one setting's value where the file is known: a path, a choice, words, an HL7 name, a URL (shell).

Owns :class:`ValueChecker`: the checks ``bridge.config.reader`` runs itself (those that need the
configuration's folder, the tables or more than one key), each raising :class:`bridge.errors.ConfigError`
with the configuration file and the key, the variable or the flag. The check of each kind of value is
written once, in ``bridge.emit.setting_values``, where pydantic runs it on the settings' fields.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from bridge.emit import setting_values as kind
from bridge.errors import ConfigError


class ValueChecker:
    """Checkers of single values; each error names where the value came from.

    ``origins`` maps a key set by an environment variable or a flag to that variable's or flag's
    name: its errors name it (``--blocking: ...``, ``DLCO_BRIDGE_BLOCKING: ...``); a key of the
    configuration file is named with the file (``bridge.toml: blocking: ...``).
    """

    def __init__(self, source: str, base: Path, origins: Mapping[str, str] | None = None) -> None:
        self.source, self.base = source, base
        self.origins: Mapping[str, str] = origins or {}

    def fail(self, key: str, expected: str) -> ConfigError:
        parts = key.split(".")
        for end in range(len(parts), 0, -1):  # emit.lab_facilities.A lab: set as emit.lab_facilities
            origin = self.origins.get(".".join(parts[:end]))
            if origin:
                return ConfigError(origin, expected)
        return ConfigError(key, expected, self.source)

    def checked(self, key: str, check: Callable[..., Any], value: Any, *args: Any) -> Any:
        """``check(value, *args)`` of ``bridge.emit.setting_values``, its refusal naming ``key``."""
        try:
            return check(value, *args)
        except ValueError as exc:
            raise self.fail(key, str(exc)) from None

    def path(self, key: str, value: Any) -> Path:
        """A path as written, relative to the configuration file's folder."""
        if not isinstance(value, str | Path) or not str(value):
            raise self.fail(key, "a folder path")
        path = Path(value).expanduser()
        return path if path.is_absolute() else self.base / path

    def choice(self, key: str, value: Any, options: tuple[str, ...]) -> str:
        return str(self.checked(key, kind.choice, value, options))

    def words(self, key: str, value: Any, what: str = "a list of finding codes") -> tuple[str, ...]:
        return tuple(self.checked(key, kind.words, value, what))

    def hl7_namespace(self, key: str, value: Any) -> None:
        self.checked(key, kind.hl7_name, value)

    def url(self, key: str, value: str) -> None:
        self.checked(key, kind.url, value)
