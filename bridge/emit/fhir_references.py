"""How FHIR resources of the bridge name and find each other: token search values and fullUrls.

Owns: the token search value ``system|value`` (escaped, then percent-encoded) that conditional
creates, conditional updates and conditional references use, and the deterministic
``urn:uuid`` fullUrl of an identifier (the same identifier gives the same fullUrl on every run
and machine). Pure.
"""

from __future__ import annotations

import hashlib
import uuid
from urllib.parse import quote

# Fixed namespace for uuid5 fullUrls: same identifier -> same fullUrl on every run and machine.
NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, "urn:dlco-bridge:fhir")
_NAMESPACE_BYTES = NAMESPACE.bytes


def token_query(system: str, value: str) -> str:
    """``identifier=`` + the token of ``system|value``: a search by identifier."""
    return "identifier=" + token(system, value)


def token(system: str, value: str) -> str:
    """A FHIR token search value ``system|value``, escaped and percent-encoded.

    FHIR search: ``\\``, ``|``, ``,`` and ``$`` inside a value are escaped with a backslash
    (R4 search page, "Escaping Search Parameters"; from memory); then the parts are
    percent-encoded so the only literal ``|`` left is the separator.
    """
    return token_part(system) + "|" + token_part(value)


def token_part(text: str) -> str:
    """One part of a token value, escaped, then percent-encoded.

    Both steps work character by character, so two texts may be encoded apart and joined.
    """
    return quote(_escape(text), safe=":/")


def _escape(text: str) -> str:
    for char in ("\\", "|", ",", "$"):
        text = text.replace(char, "\\" + char)
    return text


def full_url(system: str, value: str) -> str:
    """``urn:uuid:`` + the version-5 UUID of ``system|value`` in the bridge's namespace.

    RFC 4122 section 4.3, as ``uuid.uuid5`` computes it: SHA-1 of namespace + name, its first 16
    bytes with the version (5, the high nibble of octet 6) and the variant (binary 10, the top
    bits of octet 8) set, written as 8-4-4-4-12 lower-case hex digits. Done on the bytes: a
    ``uuid.UUID`` converts to and from an integer, which cost as much as the hash itself.
    """
    name = _NAMESPACE_BYTES + f"{system}|{value}".encode()
    octets = bytearray(hashlib.sha1(name, usedforsecurity=False).digest()[:16])
    octets[6] = (octets[6] & 0x0F) | 0x50
    octets[8] = (octets[8] & 0x3F) | 0x80
    h = octets.hex()
    return f"urn:uuid:{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:]}"
