"""A readable listing of an HL7 v2 message (ER7 text in, text out): one line per non-empty field.

Owns: naming each field from hl7apy's reference tables for the message's own version (MSH-12,
falling back to 2.5.1) and laying the listing out. Splitting (any of CR, LF or CRLF between
segments, MLLP block characters dropped; the delimiters each message declares in MSH-1/MSH-2)
and unescaping values are ``bridge.hl7.text``'s, shared with the emitter and the legacy reader.
Works on messages that do not validate, from other versions, or with Z-segments: a field
hl7apy does not know is shown with its position only.

Must not: validate, change or re-encode the message, do I/O or read settings. The FHIR
counterpart (``describe_bundle``) lives elsewhere. hl7apy is the only dependency; without it
installed every field is shown by position.
"""

from __future__ import annotations

from functools import cache
from types import MappingProxyType
from typing import Any

from bridge.hl7.text import delimiters, msh_field, msh_fields, split_fields, split_segments, unescape

DEFAULT_VERSION = "2.5.1"
_LABEL_WIDTH = 8
_NAME_WIDTH = 36
_ACRONYMS = MappingProxyType(
    {"Id": "ID", "Pid": "PID", "Obr": "OBR", "Obx": "OBX", "Nte": "NTE", "Orc": "ORC", "Msh": "MSH"}
)


def describe_er7(text: str) -> str:
    """One header line per segment, then ``PID-5   Patient Name   Fictive^Alder`` per field."""
    segments = split_segments(text)
    if not segments:
        return ""
    field_sep, encoding = delimiters(segments[0])
    version = _version(segments[0])
    lines: list[str] = []
    for segment in segments:
        lines.extend(_describe_segment(segment, field_sep, encoding, version))
    return "\n".join(lines) + "\n"


def _version(first: str) -> str:
    fields = msh_fields(first)
    if fields is None or len(fields) < 12:
        return DEFAULT_VERSION
    declared = msh_field(fields, 12).split("^")[0].strip()
    return declared if _library(declared) else DEFAULT_VERSION


def _describe_segment(segment: str, field_sep: str, encoding: str, version: str) -> list[str]:
    name = segment[:3]
    parts = split_fields(segment, field_sep)
    if name == "MSH":
        # MSH-1 is the field separator itself; MSH-2 holds the encoding characters verbatim.
        numbered = [(1, field_sep), (2, parts[1] if len(parts) > 1 else "")]
        numbered += [(n, value) for n, value in enumerate(parts[2:], start=3)]
    else:
        numbered = list(enumerate(parts[1:], start=1))
    lines = [name]
    for position, raw in numbered:
        if raw == "":
            continue
        shown = raw if name == "MSH" and position <= 2 else unescape(raw, encoding)
        lines.append(_line(f"{name}-{position}", field_name(name, position, version), shown))
    return lines


def _line(label: str, long_name: str, value: str) -> str:
    head = f"  {label.ljust(_LABEL_WIDTH)} {long_name.ljust(_NAME_WIDTH)} "
    first, *rest = value.split("\n")
    indent = " " * len(head)
    return "\n".join([head + first, *(indent + more for more in rest)]).rstrip()


def field_name(segment: str, position: int, version: str = DEFAULT_VERSION) -> str:
    """hl7apy's long name of a field, readable (``PATIENT_NAME`` -> ``Patient Name``); "" if unknown."""
    raw = _long_names(segment, version).get(position)
    if raw is None:
        return ""
    words = (word.capitalize() for word in raw.split("_") if word)
    return " ".join(_ACRONYMS.get(word, word) for word in words)


@cache
def _long_names(segment: str, version: str) -> dict[int, str]:
    library = _library(version)
    if library is None:
        return {}
    structure = library.segments.SEGMENTS.get(segment)
    if structure is None:
        return {}
    names: dict[int, str] = {}
    for child in structure[1]:
        child_name, reference = child[0], child[1]
        _, _, number = child_name.rpartition("_")
        if number.isdigit() and len(reference) > 3 and isinstance(reference[3], str):
            names[int(number)] = reference[3]
    return names


@cache
def _library(version: str) -> Any:
    """hl7apy's reference tables for ``version`` (a module), or None."""
    try:
        from hl7apy import load_library
        from hl7apy.exceptions import UnsupportedVersion
    except ImportError:  # hl7apy is optional: positions only
        return None
    try:
        return load_library(version)
    except (UnsupportedVersion, ImportError, ValueError):
        return None
