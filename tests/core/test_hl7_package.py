"""bridge.hl7: one way to split, frame and read HL7 v2 text, and HL7 tables as data that agree with HL7's.

Each test of a former disagreement names the two modules that used to differ.
"""

from __future__ import annotations

import tomllib
from datetime import datetime

import hl7
import pytest
from hl7apy import load_library

from bridge.display.hl7_fields import describe_er7
from bridge.hl7.ack import build_ack, parse_ack
from bridge.hl7.mllp import frame, unframed
from bridge.hl7.text import control_id_of, split_messages, split_segments
from bridge.model import Sex
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.tables import Tables
from bridge.tables.files import load_field_map, mappings_dir

MESSAGE = (
    "MSH|^~\\&|LAB|FACILITY|REC|HOSP|20260310120000+0000||ORU^R01^ORU_R01|CTRL-1|P|2.5.1\r"
    "PID|1||FICT-1^^^X^MR||Fictive^Alder||19790214|F\r"
    "OBX|1|NM|19911-7^DLCO^LN||24.1|mL/min/mm[Hg]^mL/min/mm[Hg]^UCUM|||||F\r"
)


def _hl7apy_table(number: str) -> tuple[str, tuple[str, ...]]:
    """hl7apy's copy of an HL7 v2.5.1 table: (name, codes)."""
    name, codes = load_library("2.5.1").tables.TABLES[f"HL7{number}"]
    return name, tuple(codes)


@pytest.mark.parametrize("number", ["0001", "0008", "0103"])
def test_the_tables_hold_every_code_of_hl7_and_no_other(number: str) -> None:
    """mappings/hl7_tables.toml: tables 0001, 0008, 0103 have HL7 v2.5.1's name and codes."""
    # source: HL7 v2.5.1 tables 0001, 0008, 0103, as hl7apy (an independent library) carries them
    name, codes = _hl7apy_table(number)
    tree = tomllib.loads((mappings_dir() / "hl7_tables.toml").read_text(encoding="utf-8"))
    table = tree["table"][number]

    assert (name, sorted(codes)) == (table["name"], sorted(table["codes"]))


def test_the_codes_the_bridge_uses_are_codes_of_their_tables(tables: Tables) -> None:
    """PID-8, MSH-11, MSA-1 and OBR-24 codes the bridge writes or reads are in hl7apy's tables."""
    # source: HL7 v2.5.1 tables 0001, 0008, 0074, 0103 (hl7apy's copy)
    assert set(tables.hl7.sex_codes.values()) <= set(_hl7apy_table("0001")[1])
    assert set(tables.hl7.acknowledgments) == set(_hl7apy_table("0008")[1])
    assert tables.hl7.service_section in _hl7apy_table("0074")[1]
    assert set(tables.hl7.processing_ids) == set(_hl7apy_table("0103")[1])
    # source: HL7 v2.5.1 ch. 2, table 0008: AA and CA accept; AE, AR, CE, CR refuse; AA, AE, AR original mode
    assert ({"AA", "CA"}, {"AE", "CE"}, {"AR", "CR"}) == (
        tables.hl7.answered_with("accept"),
        tables.hl7.answered_with("error"),
        tables.hl7.answered_with("reject"),
    )
    assert ("AA", "AE", "AR") == tables.hl7.original_acknowledgments


def test_the_emitter_and_the_field_maps_read_sex_codes_alike(tables: Tables) -> None:
    """Formerly two copies (emit/hl7v2.py SEX_CODES, the field maps' DEFAULT_SEX_CODES): a code written is read back."""
    # source: HL7 v2.5.1 table 0001 (F female, M male, O other, U unknown)
    fmap = load_field_map(mappings_dir() / "maps" / "highcairn-hl7v23.toml", tables)
    written = {sex: tables.hl7.sex_codes[sex] for sex in Sex}

    assert {Sex.FEMALE: "F", Sex.MALE: "M", Sex.OTHER: "O", Sex.UNKNOWN: "U"} == written
    assert {code: sex.value for sex, code in written.items()} == dict(fmap.sex_codes)


def test_the_display_splits_framed_messages_as_the_reader_does(tables: Tables) -> None:
    """Formerly the display stripped MLLP bytes only around the text, the reader between messages too.

    Two framed messages in one file: both list two MSH segments, and no segment name carries <VT>.
    """
    # source: HL7 v2 MLLP release 2 (<VT> message <FS><CR>); python-hl7 parses each message
    second = MESSAGE.replace("CTRL-1", "CTRL-2")
    text = (frame(MESSAGE.encode()) + frame(second.encode())).decode()
    fmap = load_field_map(mappings_dir() / "maps" / "highcairn-hl7v23.toml", tables)

    listing = describe_er7(text)
    records = list(read_hl7(text.encode(), "two.hl7", fmap, tables.units))

    headers = [line for line in listing.splitlines() if not line.startswith(" ")]
    assert ["MSH", "PID", "OBX", "MSH", "PID", "OBX"] == headers
    assert 2 == len(records) == len(split_messages(text))
    assert [len(hl7.parse(m)) for m in (MESSAGE, second)] == [len(s) for s in split_messages(text)]
    assert "\x0b" not in listing


def test_segments_end_at_cr_lf_crlf_and_block_characters() -> None:
    """One splitter for every reader of ER7 text: CR, LF, CRLF and the MLLP bytes end a segment; blanks go."""
    # source: HL7 v2.5.1 ch. 2 (segments end with CR); LF and CRLF  # common practice
    text = "\x0bMSH|^~\\&|A\r\nPID|1\n  \rOBX|1\x1c\r"

    assert ["MSH|^~\\&|A", "PID|1", "OBX|1"] == split_segments(text)
    assert "MSH|^~\\&|A\r\nPID|1\n  \rOBX|1" == unframed(text)


def test_an_ack_echoes_the_control_id_of_a_message_with_another_field_separator() -> None:
    """Formerly the stand-in read MSH-10 with the separator the message declares but echoed it read with ``|``.

    A message whose MSH-1 is ``#`` got an ACK with an empty MSA-2, which the sender takes for an
    answer to another message.
    """
    # source: HL7 v2.5.1 ch. 2, MSH-1 (the field separator is the character after MSH) and MSA-2
    # (the MSH-10 of the message acknowledged); python-hl7 reads both independently
    message = MESSAGE.replace("|", "#").encode()
    sent = hl7.parse(message.decode()).extract_field("MSH", 1, 10, 1, 1)

    ack = build_ack(message, "AA", "SI000001", datetime(2026, 3, 10, 12, 0, 0))
    parsed = parse_ack(ack)

    assert "CTRL-1" == sent == control_id_of(message.decode())
    assert parsed is not None
    assert ("AA", sent) == (parsed.code, parsed.control_id)
    assert sent == str(hl7.parse(ack.decode()).segment("MSA")[2])


def test_an_ack_is_read_with_python_hl7_errors_and_all() -> None:
    """MSA-1, MSA-2, MSA-3 and each ERR's user message (else its error text) in the order sent."""
    # source: HL7 v2.5.1 ch. 2, MSA and ERR segments (ERR-3 HL7 error code CWE, ERR-8 user message)
    ack = (
        b"MSH|^~\\&|REC|HOSP|LAB|FACILITY|20260310120000||ACK^R01^ACK|A1|P|2.5.1\n"
        b"MSA|AE|CTRL-1|not filed\n"
        b"ERR||PID^1^3|102^Data type error^HL70357|E||||PID-3 missing\n"
        b"ERR||OBX^1|207^Application internal error^HL70357|E\n"
    )

    parsed = parse_ack(ack)

    assert parsed is not None
    assert ("AE", "CTRL-1", "not filed; PID-3 missing; Application internal error") == (
        parsed.code,
        parsed.control_id,
        parsed.text,
    )
    assert parse_ack(b"MSH|^~\\&|REC\rPID|1\r") is None  # no MSA: not an ACK
