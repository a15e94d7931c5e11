"""Checking one setting's value: a path, a number, a port, a choice, codes, an HL7 name, a URI (shell).

Owns: one checker per kind of value, each raising :class:`bridge.errors.ConfigError` with the
configuration file, the key and what was expected. ``bridge.config.reader`` calls them while it
builds the settings from the merged TOML, environment and flags.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from bridge.emit.hl7v2 import IS_LENGTH
from bridge.errors import ConfigError
from bridge.model import OUTPUT_KINDS, OutputKind

_HL7_DELIMITERS = re.compile(r"[|^~\\&\x00-\x1f\x7f]")
# Systems the site names: a URL it controls, or a registered URN namespace that needs no owner
# (source: RFC 3001 urn:oid:, RFC 4122 urn:uuid:); never an unregistered urn:<name>: (RFC 8141
# section 5.1: NIDs are registered with IANA).
_SYSTEM_URI = re.compile(
    r"https?://[A-Za-z0-9.-]+(:[0-9]+)?(/\S*)?"
    r"|urn:oid:[0-2](\.(0|[1-9][0-9]*))+"
    r"|urn:uuid:[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}"
)


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

    def path(self, key: str, value: Any) -> Path:
        if not isinstance(value, str | Path) or not str(value):
            raise self.fail(key, "a folder path")
        path = Path(value).expanduser()
        return path if path.is_absolute() else self.base / path

    def number(self, key: str, value: Any, low: float | None = None) -> float:
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise self.fail(key, f"a number, got {value!r}") from None
        if number != number or (low is not None and number < low):  # NaN, or below the floor
            raise self.fail(
                key, f"a number >= {low:g}, got {value!r}" if low is not None else f"a number, got {value!r}"
            )
        return number

    def whole(self, key: str, value: Any, low: int, high: int) -> int:
        """A whole number from ``low`` to ``high`` (1.5 is not silently 1)."""
        number = self.number(key, value)
        if not (math.isfinite(number) and number == int(number) and low <= number <= high):
            raise self.fail(key, f"a whole number from {low} to {high}, got {value!r}")
        return int(number)

    def count(self, key: str, value: Any, low: int = 1, high: int = 1_000) -> int:
        """A whole number of things from ``low`` to ``high`` (a TOML integer, or its text from the environment)."""
        return self.whole(key, value, low, high)

    def port(self, key: str, value: Any, allow_zero: bool) -> int:
        number = self.number(key, value)
        if number != int(number) or not (0 if allow_zero else 1) <= number <= 65535:
            raise self.fail(key, f"a port number 1-65535, got {value!r}")
        return int(number)

    def loopback(self, key: str, value: Any) -> str:
        # Health and metrics carry operational data only; they stay on this machine.
        if value not in ("127.0.0.1", "localhost", "::1"):
            raise self.fail(key, f"a loopback address (127.0.0.1, localhost or ::1), got {value!r}")
        return str(value)

    def choice(self, key: str, value: Any, options: tuple[str, ...]) -> str:
        if value not in options:
            raise self.fail(key, f"one of {', '.join(options)}, got {value!r}")
        return str(value)

    def flag(self, key: str, value: Any) -> bool:
        if isinstance(value, bool):
            return value
        if isinstance(value, str) and value.lower() in ("true", "false", "1", "0", "yes", "no"):
            return value.lower() in ("true", "1", "yes")
        raise self.fail(key, f"true or false, got {value!r}")

    def words(self, key: str, value: Any, what: str = "a list of finding codes") -> tuple[str, ...]:
        """A list setting: a TOML list, or text separated by commas; a repeated flag gives a list (all kept)."""
        if isinstance(value, str):
            return tuple(w.strip() for w in value.split(",") if w.strip())
        if isinstance(value, list | tuple) and all(isinstance(w, str) for w in value):
            return tuple(w for item in value for w in self.words(key, item, what))
        raise self.fail(key, what)

    def kinds(self, key: str, value: Any) -> tuple[OutputKind, ...]:
        words = self.words(key, value, "fhir, hl7 or fhir,hl7")
        unknown = [w for w in words if w not in OUTPUT_KINDS]
        if unknown or not words:  # name the word that is wrong, as the user typed it (not a list's repr)
            got = ", ".join(repr(w) for w in unknown) if unknown else "nothing"
            raise self.fail(key, f"fhir, hl7 or fhir,hl7, got {got}")
        return tuple(k for k in OUTPUT_KINDS if k in words)

    def hl7_namespace(self, key: str, value: str) -> None:
        # source: HL7 v2.5.1 ch. 2, HD.1 namespace id is an IS of at most 20 characters; the
        # delimiters (| ^ ~ \ &) are refused rather than escaped, so every receiver sees the name as set
        if not 1 <= len(value) <= IS_LENGTH or _HL7_DELIMITERS.search(value):
            raise self.fail(key, f"1 to {IS_LENGTH} characters without | ^ ~ \\ & or control characters, got {value!r}")

    def uri(self, key: str, value: str) -> None:
        # source: FHIR R4 datatypes, Identifier.system and Coding.system are of type uri
        if not _SYSTEM_URI.fullmatch(value):
            raise self.fail(
                key, f"an absolute URI: https://... the site controls, urn:oid:... or urn:uuid:..., got {value!r}"
            )

    def system_base(self, key: str, value: str) -> None:
        parts = urlsplit(value)
        if parts.scheme not in ("http", "https") or not parts.netloc or value.endswith("/") or parts.query:
            raise self.fail(key, f"an https:// URL the site controls, without a trailing / or query, got {value!r}")

    def url(self, key: str, value: str) -> None:
        parts = urlsplit(value)
        if parts.scheme not in ("http", "https") or not parts.netloc:
            raise self.fail(key, f"an http:// or https:// URL, got {value!r}")
