"""HL7 v2 ER7 text: delimiters, escaping and unescaping of data, splitting into segments, messages and fields.

Owns the character-level rules of HL7 v2.5.1 chapter 2 that the emitter (``bridge.emit.hl7v2``), the
legacy reader, the listing (``bridge.display.hl7_fields``), ACKs (``bridge.hl7.ack``) and the MLLP
transport and stand-in share, so that writing and reading agree. Pure: text in, text out.

* Escaping (HL7 v2.5.1 chapter 2.7): ``\\ | ^ & ~`` in data become ``\\E\\ \\F\\ \\S\\ \\T\\ \\R\\``.
  A line break in free text (data type FT) becomes the formatting command ``\\.br\\``; in every
  other field line breaks and other control characters become one space, because formatting
  commands are only allowed in FT fields.  # common practice
* Splitting is lenient: HL7 v2.5.1 chapter 2 ends a segment with CR; LF and CRLF are
  tolerated, as many systems write them  # common practice; the MLLP block characters
  (``bridge.hl7.mllp``) end a segment too, so framed messages read like unframed ones, and
  segments of white space alone are dropped.
"""

from __future__ import annotations

import re
from types import MappingProxyType

from bridge.hl7.mllp import END_BLOCK, START_BLOCK

SEGMENT_SEPARATOR = "\r"
FIELD_SEPARATOR = "|"
ENCODING_CHARACTERS = "^~\\&"  # component, repetition, escape, subcomponent
IS_LENGTH = 20  # hl7apy base data type IS (HD namespace ids)

# source: HL7 v2.5.1 appendix C (MLLP): a message is framed by <VT> ... <FS><CR>, so neither is data
_SEGMENT = re.compile("[^\r\n" + re.escape((START_BLOCK + END_BLOCK).decode("ascii")) + "]+")
_MSH = "MSH"
# What escaping changes in data: a line break (CRLF is one), any other control character, a delimiter.
_SPECIAL = re.compile(r"\r\n|[\x00-\x1f\x7f\\|^&~]")
_DELIMITERS = MappingProxyType({"\\": "\\E\\", "|": "\\F\\", "^": "\\S\\", "&": "\\T\\", "~": "\\R\\"})
_FORMATTED = MappingProxyType({**_DELIMITERS, "\r\n": "\\.br\\", "\r": "\\.br\\", "\n": "\\.br\\"})


def delimiters(first_segment: str) -> tuple[str, str]:
    """Field separator and encoding characters a message declares in MSH-1 and MSH-2.

    The defaults (``|`` and ``^~\\&``) when the segment is not an MSH or declares none.
    """
    if first_segment.startswith("MSH") and len(first_segment) > 3:
        field_sep = first_segment[3]
        encoding = first_segment[4:].split(field_sep, 1)[0]
        return field_sep, encoding or ENCODING_CHARACTERS
    return FIELD_SEPARATOR, ENCODING_CHARACTERS


def escape(text: str) -> str:
    """Data text for any field except FT: delimiters escaped, line breaks and controls as a space."""
    return _SPECIAL.sub(_data_escape, text)


def escape_formatted(text: str) -> str:
    """Data text for an FT field: delimiters escaped, line breaks as ``\\.br\\``, controls as a space."""
    return _SPECIAL.sub(_formatted_escape, text)


def _data_escape(match: re.Match[str]) -> str:
    return _DELIMITERS.get(match.group(), " ")


def _formatted_escape(match: re.Match[str]) -> str:
    return _FORMATTED.get(match.group(), " ")


def unescape(value: str, encoding: str = ENCODING_CHARACTERS) -> str:
    """The text an escaped ER7 value stands for (``\\F\\`` -> ``|``, ``\\.br\\`` -> newline).

    Unknown escape sequences are kept as written.
    """
    escape_char = encoding[2] if len(encoding) > 2 else "\\"
    if escape_char not in value:
        return value
    component, repetition = encoding[0:1] or "^", encoding[1:2] or "~"
    subcomponent = encoding[3:4] or "&"
    meaning = {"F": "|", "S": component, "T": subcomponent, "R": repetition, "E": escape_char, ".br": "\n"}
    pattern = re.compile(re.escape(escape_char) + r"([^" + re.escape(escape_char) + r"]*)" + re.escape(escape_char))

    def replace(match: re.Match[str]) -> str:
        code = match.group(1)
        if code in meaning:
            return meaning[code]
        if code.startswith("X") and len(code) > 1:
            try:
                return bytes.fromhex(code[1:]).decode("utf-8")
            except ValueError:
                return match.group(0)
        return match.group(0)

    return pattern.sub(replace, value)


def split_segments(text: str) -> list[str]:
    """The segments of ER7 text, split at CR, LF, CRLF or an MLLP block character; blank ones dropped."""
    return [segment for segment in _SEGMENT.findall(text) if segment.strip()]


def split_messages(text: str) -> list[list[str]]:
    """The segments of each message in ``text``, a message starting at each MSH.

    Segments before the first MSH are one message of their own (which its reader refuses).
    """
    found: list[list[str]] = []
    for segment in split_segments(text):
        if not found or segment.startswith(_MSH):
            found.append([])
        found[-1].append(segment)
    return found


def split_fields(segment: str, separator: str = FIELD_SEPARATOR) -> list[str]:
    """The fields of a segment; index 0 is the segment name (for MSH, index n is MSH-(n+1))."""
    return segment.split(separator)


def msh_fields(text: str) -> list[str] | None:
    """The fields of the MSH that starts ``text``, split at the separator it declares (MSH-n is index n-1).

    None when ``text`` does not start with an MSH segment.
    """
    if not text.startswith(_MSH) or len(text) < 4:
        return None
    first = split_segments(text)[0]
    return split_fields(first, first[3])


def msh_field(fields: list[str], number: int) -> str:
    """MSH-``number`` of :func:`msh_fields`' list ("" when the message has fewer fields)."""
    return fields[number - 1] if len(fields) >= number else ""


def control_id_of(text: str) -> str | None:
    """MSH-10, the message control id, of ER7 text; None when it has no MSH or an empty MSH-10."""
    fields = msh_fields(text)
    return (msh_field(fields, 10) or None) if fields is not None else None
