"""The ER7 pretty-printer: field names from hl7apy, unescaped values, lenient on legacy input."""

from __future__ import annotations

from pathlib import Path

from bridge.display.hl7_fields import describe_er7, field_name
from bridge.hl7.text import unescape

GOLDEN = Path(__file__).resolve().parent / "golden" / "hl7" / "01-healthy-adult.oru.hl7"
LEGACY = "MSH|^~\\&|OLDLAB|SITE|||199901011200||ORU^R01|42|P|2.3\nPID|||123||Doe\\S\\x^Jo\nZXY|1|first\\.br\\second\n"


def _line(listing: str, label: str) -> str:
    return next(line for line in listing.splitlines() if line.split()[:1] == [label])


def test_golden_message_names_pid5_patient_name():
    """PID-5 of a golden message is shown as "Patient Name" with the name value."""
    # source: hl7apy v2.5.1 reference tables, PID_5 long name PATIENT_NAME
    listing = describe_er7(GOLDEN.read_bytes().decode("utf-8"))

    assert ["PID-5", "Patient", "Name", "Fictive^Alder"] == _line(listing, "PID-5").split()


def test_every_segment_gets_a_header_line():
    """Each segment of the message opens with a line holding only its name."""
    # source: HL7 v2 ER7 encoding, one segment per CR-terminated line
    text = GOLDEN.read_bytes().decode("utf-8")
    listing = describe_er7(text)

    headers = [line for line in listing.splitlines() if line and not line.startswith(" ")]

    assert [s[:3] for s in text.split("\r") if s] == headers


def test_msh_delimiter_fields_are_shown_verbatim():
    """MSH-1 and MSH-2 show the delimiters themselves, not an unescaped form."""
    # source: HL7 v2.5.1 chapter 2: MSH-1 field separator, MSH-2 encoding characters
    listing = describe_er7(GOLDEN.read_bytes().decode("utf-8"))

    assert (["MSH-1", "Field", "Separator", "|"], "^~\\&") == (
        _line(listing, "MSH-1").split(),
        _line(listing, "MSH-2").split()[-1],
    )


def test_unescape_every_sequence():
    """Each v2.5.1 escape sequence turns back into its character; \\.br\\ into a line break."""
    # source: HL7 v2.5.1 chapter 2.7 escape sequences and formatting commands
    assert "a|b^c&d~e\\f\ng" == unescape("a\\F\\b\\S\\c\\T\\d\\R\\e\\E\\f\\.br\\g")


def test_unescape_keeps_unknown_sequences():
    """An escape sequence the printer does not know stays as written."""
    # common practice: show what cannot be interpreted rather than drop it
    assert "x\\H\\bold\\N\\y" == unescape("x\\H\\bold\\N\\y")


def test_legacy_message_uses_its_own_version_and_lf():
    """A v2.3 message split by LF is named from hl7apy's 2.3 tables and its values unescaped."""
    # source: hl7apy v2.3 reference tables (PID_3 is PATIENT_ID_INTERNAL_ID in 2.3)
    listing = describe_er7(LEGACY)

    assert ["PID-3", "Patient", "ID", "Internal", "ID", "123"] == _line(listing, "PID-3").split()
    assert ["PID-5", "Patient", "Name", "Doe^x^Jo"] == _line(listing, "PID-5").split()


def test_unknown_segment_falls_back_to_positions():
    """A Z-segment has no hl7apy name: its fields show by position, multi-line values indented."""
    # common practice: site-defined Z-segments are not in the standard tables
    listing = describe_er7(LEGACY).splitlines()
    start = listing.index("ZXY")

    assert ["ZXY-1", "1"] == listing[start + 1].split()
    assert (["ZXY-2", "first"], "second") == (listing[start + 2].split(), listing[start + 3].strip())


def test_unknown_version_falls_back_to_2_5_1():
    """A version hl7apy does not ship is named from the 2.5.1 tables."""
    # source: hl7apy ships 2.1 to 2.8.2; "9.9" is none of them
    assert "Patient Name" == field_name("PID", 5)
    listing = describe_er7("MSH|^~\\&|A|B|||20260101||ORU^R01|1|P|9.9\rPID|||7")

    assert ["PID-3", "Patient", "Identifier", "List", "7"] == _line(listing, "PID-3").split()


def test_empty_input_gives_empty_listing():
    """Blank text describes to an empty string."""
    # common practice
    assert "" == describe_er7("\r\n")
