"""The legacy HL7 v2 reader against hl7apy's parse of the same messages, framings, manoeuvres and bad messages."""

from __future__ import annotations

import pytest
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message

from bridge.errors import InputError
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from tests.maps.conftest import HL7_SAMPLE

TEXT = HL7_SAMPLE.read_text(encoding="utf-8")


def _messages(text: str) -> list[str]:
    return ["MSH" + part.strip("\n") for part in text.split("MSH")[1:]]


def _by_hl7apy(message: str, codes: set[str]) -> list[tuple[str, str, str]]:
    """(OBX-3.1, OBX-5, OBX-6.1) of every OBX with a mapped code, as hl7apy parses the message."""
    parsed = parse_message(message.replace("\n", "\r"), validation_level=VALIDATION_LEVEL.TOLERANT, find_groups=False)
    return [
        (obx.obx_3.obx_3_1.value, obx.obx_5.value, obx.obx_6.obx_6_1.value if obx.obx_6.value else "")
        for obx in parsed.obx
        if obx.obx_3.obx_3_1.value in codes
    ]


def test_every_mapped_obx_agrees_with_hl7apy(hl7_map: FieldMap, tables: Tables):
    """Code, value and unit of each mapped OBX are those hl7apy reads from the same message."""
    # source: HL7 v2.5.1 ch. 7.4.2 (OBX-3 observation identifier, OBX-5 value, OBX-6 units); hl7apy as second parser
    codes = set(hl7_map.codes())
    records = list(read_hl7(TEXT.encode(), "feed.hl7", hl7_map, tables.units))
    for record, message in zip(records, _messages(TEXT), strict=True):
        ours = [(c.source.code, c.text, c.unit or "") for c in record.cells if c.source.code is not None]
        assert _by_hl7apy(message, codes) == ours


def test_session_fields_agree_with_hl7apy(hl7_map: FieldMap, tables: Tables):
    """Test id (OBR-3), patient id (PID-3.1), names (PID-5) and birth date (PID-7) as hl7apy reads them."""
    records = list(read_hl7(TEXT.encode(), "feed.hl7", hl7_map, tables.units))
    for record, message in zip(records, _messages(TEXT), strict=True):
        parsed = parse_message(message.replace("\n", "\r"), validation_level=VALIDATION_LEVEL.TOLERANT,
                               find_groups=False)  # fmt: skip
        expected = (parsed.obr.obr_3.value, parsed.pid.pid_3.pid_3_1.value, parsed.pid.pid_5.pid_5_1.value,
                    parsed.pid.pid_5.pid_5_2.value, parsed.pid.pid_7.value)  # fmt: skip
        s = record.session
        assert s is not None
        assert expected == (s.test_id, s.patient.id, s.patient.family, s.patient.given,
                            s.patient.birth_date.strftime("%Y%m%d"))  # fmt: skip


@pytest.mark.parametrize(
    "framed",
    [
        TEXT.replace("\n", "\r"),  # source: HL7 v2.5.1 ch. 2.5.2 (segments end with a carriage return)
        TEXT.replace("\n", "\r\n"),
        "".join(f"\x0b{m}\r\x1c\r" for m in (x.replace("\n", "\r") for x in _messages(TEXT))),  # MLLP (appendix C)
    ],
    ids=["cr", "crlf", "mllp"],
)
def test_line_ends_and_mllp_framing_give_the_same_sessions(framed: str, hl7_map: FieldMap, tables: Tables):
    """\\r, \\r\\n and MLLP-framed files read to the sessions of the \\n file."""
    expected = [r.session for r in read_hl7(TEXT.encode(), "feed.hl7", hl7_map, tables.units)]
    assert expected == [r.session for r in read_hl7(framed.encode(), "feed.hl7", hl7_map, tables.units)]


MANOEUVRES = """MSH|^~\\&|HCPFT|HIGHCAIRN|||202603031440||ORU^R01|X1|P|2.3
PID|1||FICT-1002^^^HCMRN||Fictive^Bryony||19740630|F
OBR|1||HC-26-0199|HCDLCO^x^L|||202603031440-0700
OBX|1|NM|HCHT^Height^L||163|cm|||||F
OBX|2|NM|HCVI^VI^L|1|3.90|L|||||F
OBX|3|NM|HCBHT^BHT^L|1|10.0|s|||||F
OBX|4|NM|HCFICO^FICO^L|1|0.30||||||F
OBX|5|NM|HCFITR^FITr^L|1|10.0||||||F
OBX|6|NM|HCFACO^FACO^L|1|0.11||||||F
OBX|7|NM|HCFATR^FATr^L|1|7.2||||||F
OBX|8|NM|HCVI^VI^L|2|3.85|L|||||F
OBX|9|NM|HCBHT^BHT^L|2|9.5|s|||||F
OBX|10|NM|HCFICO^FICO^L|2|0.30||||||F
OBX|11|NM|HCFITR^FITr^L|2|10.0||||||F
OBX|12|NM|HCFACO^FACO^L|2|0.12||||||F
OBX|13|NM|HCFATR^FATr^L|2|7.1||||||F
"""


def test_obx_4_sub_ids_make_the_manoeuvres(hl7_map: FieldMap, tables: Tables):
    """OBX-4 1 and 2 are manoeuvres 1 and 2; percentages become fractions (0.30 % = 0.003)."""
    # source: HL7 v2.5.1 ch. 7.4.2.4 (OBX-4 observation sub-ID groups related OBX segments)
    record = next(read_hl7(MANOEUVRES.encode(), "m.hl7", hl7_map, tables.units))
    assert record.session is not None
    got = [
        (m.inspired_volume.value, m.breath_hold_time.value, m.inspired_co_fraction) for m in record.session.manoeuvres
    ]
    assert [(3.90, 10.0, 0.003), (3.85, 9.5, 0.003)] == got


def _results(text: str, fmap: FieldMap, tables: Tables) -> list[Outcome | InputError]:
    return list(process_all(text.encode(), "lab/feed.hl7", tables, PipelineSettings(field_map=fmap)))


def test_a_broken_msh_is_one_line_and_the_other_messages_go_on(hl7_map: FieldMap, tables: Tables):
    """A message whose MSH lost its delimiters names file and message; the next message is read."""
    messages = _messages(TEXT)
    broken = "MSH" + messages[1][len("MSH|^~\\&") :]  # the field separator and encoding characters are gone
    results = _results("\n".join([messages[0], broken, messages[2]]), hl7_map, tables)
    assert 2 == sum(isinstance(r, Outcome) for r in results)
    errors = [str(r) for r in results if isinstance(r, InputError)]
    assert ["lab/feed.hl7: message 2: MSH-2: the encoding characters (such as ^~\\&), got 'HCPFT'"] == errors


def test_a_message_of_another_type_is_not_the_maps_format(hl7_map: FieldMap, tables: Tables):
    """An ADT message in an ORU feed is UnknownFormat naming MSH-9, never guessed at."""
    adt = _messages(TEXT)[0].replace("ORU^R01", "ADT^A01")
    (result,) = _results(adt, hl7_map, tables)
    assert "lab/feed.hl7: message 1: MSH-9: ORU^R01 (map mappings/maps/highcairn-hl7v23.toml), got 'ADT^A01'" == str(
        result
    )


def test_an_unparseable_value_names_message_obx_and_code(hl7_map: FieldMap, tables: Tables):
    """A height of 'tall' names the message, the OBX and its local code."""
    bad = _messages(TEXT)[0].replace("HCHT^Height^L||163", "HCHT^Height^L||tall")
    (result,) = _results(bad, hl7_map, tables)
    assert "lab/feed.hl7: message 1, OBX 1 (code 'HCHT'): a number with a decimal point, got 'tall'" == str(result)
