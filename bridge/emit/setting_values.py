"""The kinds of setting values, each a check pydantic runs on a settings field (pure).

Owns one function per kind of value (a number with a floor, a whole number in a range, a port, a
loopback address, true or false, a list of words, the output kinds, a choice, an HL7 name, a URI,
the site's base URL, a URL, a host), each returning the checked value or raising ``ValueError``
with what was expected and what was given. The settings' models (:class:`EmitSettings`,
``PipelineSettings``, ``ServiceSettings``, ``Destination``) declare them on their fields with
:func:`check` (``Annotated[float, check(at_least, 0.05)]``); ``bridge.config`` turns a failure into
its one-line error naming the file and key, the variable or the flag.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from functools import partial
from typing import Any
from urllib.parse import urlsplit

from pydantic import BeforeValidator

from bridge.hl7.text import IS_LENGTH
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
LOOPBACK = ("127.0.0.1", "localhost", "::1")


def check(function: Callable[..., Any], *args: Any) -> BeforeValidator:
    """The field annotation that checks a value with ``function(value, *args)`` before pydantic types it."""
    return BeforeValidator(partial(_call, function, args))


def _call(function: Callable[..., Any], args: tuple[Any, ...], value: Any) -> Any:
    return function(value, *args)


def number(value: Any, low: float | None = None) -> float:
    try:
        found = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"a number, got {value!r}") from None
    if found != found or (low is not None and found < low):  # NaN, or below the floor
        raise ValueError(f"a number >= {low:g}, got {value!r}" if low is not None else f"a number, got {value!r}")
    return found


def optional_number(value: Any, low: float) -> float | None:
    return None if value is None else number(value, low)


def whole(value: Any, low: int, high: int) -> int:
    """A whole number from ``low`` to ``high`` (1.5 is not silently 1)."""
    found = number(value)
    if not (math.isfinite(found) and found == int(found) and low <= found <= high):
        raise ValueError(f"a whole number from {low} to {high}, got {value!r}")
    return int(found)


def port(value: Any, allow_zero: bool = True) -> int:
    found = number(value)
    if found != int(found) or not (0 if allow_zero else 1) <= found <= 65535:
        raise ValueError(f"a port number 1-65535, got {value!r}")
    return int(found)


def loopback(value: Any) -> str:
    # Health and metrics carry operational data only; they stay on this machine.
    if value not in LOOPBACK:
        raise ValueError(f"a loopback address (127.0.0.1, localhost or ::1), got {value!r}")
    return str(value)


def choice(value: Any, options: tuple[str, ...]) -> str:
    if value not in options:
        raise ValueError(f"one of {', '.join(options)}, got {value!r}")
    return str(value)


def optional_choice(value: Any, options: tuple[str, ...]) -> str | None:
    return None if value is None else choice(str(value), options)


def flag(value: Any) -> bool:
    if isinstance(value, bool):
        return value
    if isinstance(value, str) and value.lower() in ("true", "false", "1", "0", "yes", "no"):
        return value.lower() in ("true", "1", "yes")
    raise ValueError(f"true or false, got {value!r}")


def words(value: Any, what: str = "a list of finding codes") -> tuple[str, ...]:
    """A list setting: a TOML list, or text separated by commas; a repeated flag gives a list (all kept)."""
    if isinstance(value, str):
        return tuple(w.strip() for w in value.split(",") if w.strip())
    if isinstance(value, list | tuple | frozenset | set) and all(isinstance(w, str) for w in value):
        items = sorted(value) if isinstance(value, frozenset | set) else value
        return tuple(w for item in items for w in words(item, what))
    raise ValueError(what)


def codes(value: Any) -> frozenset[str]:
    """Finding codes (a list, or text separated by commas); which codes exist is the configuration's check."""
    return frozenset(words(value))


def kinds(value: Any) -> tuple[OutputKind, ...]:
    given = words(value, "fhir, hl7 or fhir,hl7")
    unknown = [w for w in given if w not in OUTPUT_KINDS]
    if unknown or not given:  # name the word that is wrong, as the user typed it (not a list's repr)
        got = ", ".join(repr(w) for w in unknown) if unknown else "nothing"
        raise ValueError(f"fhir, hl7 or fhir,hl7, got {got}")
    return tuple(k for k in OUTPUT_KINDS if k in given)


def text(value: Any) -> str:
    """A text setting: a TOML number or the environment's text is its text."""
    return str(value)


def hl7_name(value: Any) -> str:
    # source: HL7 v2.5.1 ch. 2, HD.1 namespace id is an IS of at most 20 characters; the
    # delimiters (| ^ ~ \ &) are refused rather than escaped, so every receiver sees the name as set
    given = str(value)
    if not 1 <= len(given) <= IS_LENGTH or _HL7_DELIMITERS.search(given):
        raise ValueError(f"1 to {IS_LENGTH} characters without | ^ ~ \\ & or control characters, got {given!r}")
    return given


def system_uri(value: Any) -> str | None:
    # source: FHIR R4 datatypes, Identifier.system and Coding.system are of type uri
    if value is None:
        return None
    if not _SYSTEM_URI.fullmatch(str(value)):
        raise ValueError(
            f"an absolute URI: https://... the site controls, urn:oid:... or urn:uuid:..., got {str(value)!r}"
        )
    return str(value)


def system_base(value: Any) -> str:
    given = str(value)
    parts = urlsplit(given)
    if parts.scheme not in ("http", "https") or not parts.netloc or given.endswith("/") or parts.query:
        raise ValueError(f"an https:// URL the site controls, without a trailing / or query, got {given!r}")
    return given


def url(value: Any) -> str:
    given = str(value)
    parts = urlsplit(given)
    if parts.scheme not in ("http", "https") or not parts.netloc:
        raise ValueError(f"an http:// or https:// URL, got {given!r}")
    return given


def host(value: Any) -> str:
    given = str(value)
    if not given or any(c.isspace() for c in given):
        raise ValueError(f"a host name or address, got {given!r}")
    return given
