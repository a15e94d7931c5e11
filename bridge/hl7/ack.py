"""HL7 v2 acknowledgments (ACK): reading the answer to a message and building one (pure).

Owns: the parts of an ACK a sender acts on (:class:`Ack`: MSA-1, MSA-2 and the error texts of
MSA-3 and ERR), read with python-hl7 (:func:`parse_ack`), and the ACK a receiver sends back
(:func:`build_ack`: the stand-in's answer). What each MSA-1 code asks of the sender is table
0008 in ``mappings/hl7_tables.toml`` (:class:`bridge.hl7.tables.Hl7Tables`).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

import hl7

from bridge.hl7.text import (
    ENCODING_CHARACTERS,
    FIELD_SEPARATOR,
    SEGMENT_SEPARATOR,
    escape,
    msh_field,
    msh_fields,
    split_segments,
)

# source: HL7 v2.5.1 ch. 2, the general acknowledgment message ACK^<event>^ACK
ACK_TYPE = "ACK^R01^ACK"
ACK_VERSION = "2.5.1"
ACK_PROCESSING_ID = "P"  # table 0103: production


@dataclass(frozen=True, slots=True)
class Ack:
    """The parts of an ACK the sender acts on."""

    code: str  # MSA-1
    control_id: str  # MSA-2: the MSH-10 of the message it answers
    text: str  # MSA-3 and the ERR segments' messages, joined


def parse_ack(data: bytes) -> Ack | None:
    """The MSA (and ERR) of an ACK block, or None when it is not a readable ACK."""
    segments = split_segments(data.decode("utf-8", errors="replace"))
    if not segments or not segments[0].startswith("MSH") or len(segments[0]) < 5:
        return None
    component = segments[0][4]
    try:
        message = hl7.parse(SEGMENT_SEPARATOR.join(segments))
        msa = message.segment("MSA")
    except (KeyError, IndexError, ValueError, hl7.exceptions.ParseException):
        return None
    code, answered = _field(msa, 1), _field(msa, 2)
    if not code:
        return None
    errors = [_err_text(err, component) for err in message if str(err[0]) == "ERR"]
    details = [t for t in (_field(msa, 3), *errors) if t]
    return Ack(code, answered, "; ".join(details))


def _field(segment: hl7.Segment, index: int) -> str:
    return str(segment[index]) if index < len(segment) else ""


def _err_text(segment: hl7.Segment, component: str) -> str:
    """ERR-8 (user message) if given, else the text of ERR-3, else ERR-1 (v2.3 style)."""
    # source: HL7 v2.5.1 ch. 2 ERR segment (ERR-3 HL7 error code CWE, ERR-8 user message)
    user_message = _field(segment, 8)
    if user_message:
        return user_message
    error_code = _field(segment, 3).split(component)
    if len(error_code) > 1 and error_code[1]:
        return error_code[1]
    return error_code[0] or _field(segment, 1)


def build_ack(message: bytes, code: str, control_id: str, at: datetime, text: str = "") -> bytes:
    """An ACK to ``message``: MSH with sender and receiver swapped, MSA-1 ``code``, MSA-2 its MSH-10.

    ``message`` is read with the field separator its MSH declares; the ACK is written with the
    standard delimiters. ``text`` (escaped) is MSA-3, left out when empty.
    """
    fields = msh_fields(message.decode("utf-8", errors="replace")) or ["MSH", ENCODING_CHARACTERS]

    def field(n: int) -> str:
        return msh_field(fields, n)

    # source: HL7 v2.5.1 ch. 2: ACK MSH-3..6 answer MSH-5, 6, 3, 4; MSA-2 echoes MSH-10
    msh = FIELD_SEPARATOR.join(
        ["MSH", ENCODING_CHARACTERS, field(5), field(6), field(3), field(4), at.strftime("%Y%m%d%H%M%S"), "",
         ACK_TYPE, control_id, ACK_PROCESSING_ID, ACK_VERSION]
    )  # fmt: skip
    msa = FIELD_SEPARATOR.join(["MSA", code, field(10)] + ([escape(text)] if text else []))
    return f"{msh}{SEGMENT_SEPARATOR}{msa}{SEGMENT_SEPARATOR}".encode()
