"""The MLLP client and the stand-in agree on table 0008 and on MSH-10 (both now read bridge.hl7)."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from bridge.errors import Rejected
from bridge.service.receiver import ANSWERS
from bridge.service.receiver.mllp_peer import ack_for
from bridge.service.transports.mllp import judge, parse_ack, read_control_id

MESSAGE = b"MSH#^~\\&#LAB#FAC#REC#HOSP#20260310120000+0000##ORU^R01^ORU_R01#CTRL-7#P#2.5.1\rPID#1\r"


def test_every_answer_the_stand_in_gives_is_one_the_client_understands() -> None:
    """Formerly two lists of table 0008 (the transport's ACCEPTED/REFUSED, the stand-in's ANSWERS)."""
    # source: HL7 v2.5.1 ch. 2 table 0008: AA application accept; AE error and AR reject refuse
    at = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
    outcomes = {}
    for code in ANSWERS:
        ack = parse_ack(ack_for(MESSAGE, code, "SI000001", at))
        try:
            outcomes[code] = judge(ack, "CTRL-7", "ward").code
        except Rejected as refused:
            outcomes[code] = str(refused)

    assert ("AA", "AE", "AR") == ANSWERS
    assert "AA" == outcomes["AA"]
    assert outcomes["AE"].endswith("AE stand-in: rehearsed application error")
    assert outcomes["AR"].endswith("AR stand-in: rehearsed reject")


@pytest.mark.parametrize("separator", ["|", "#"])
def test_the_client_and_the_stand_in_read_the_same_control_id(separator: str) -> None:
    """The id the client waits for is the one the stand-in's ACK echoes, whatever MSH-1 is."""
    # source: HL7 v2.5.1 ch. 2, MSH-1 field separator, MSH-10, MSA-2
    message = MESSAGE.replace(b"#", separator.encode())
    ack = parse_ack(ack_for(message, "AA", "SI000002", datetime(2026, 3, 10, tzinfo=UTC)))

    assert ack is not None
    assert "CTRL-7" == read_control_id(message) == ack.control_id
