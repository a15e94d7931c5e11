"""MLLP: framing, ACK parsing, and the client against python-hl7's asyncio receiver."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from bridge.errors import (
    ConfigError,
    ConnectFailed,
    DeliveryError,
    DeliveryTimeout,
    Rejected,
)
from bridge.service.transports.base import HL7_V2_ER7, OutgoingMessage, TlsOptions
from bridge.service.transports.mllp import (
    Ack,
    FrameReader,
    MllpTransport,
    frame,
    parse_ack,
    read_control_id,
)

if TYPE_CHECKING:
    from tests.shell.conftest import CertPair, MllpReceiver

MakeOru = Callable[..., bytes]


def outgoing(make_oru: MakeOru, control: str) -> OutgoingMessage:
    return OutgoingMessage("ward", control, make_oru(control), HL7_V2_ER7, "T-1")


def client(receiver: MllpReceiver, **options: Any) -> MllpTransport:
    """A client for the receiver; short timeouts keep failing tests fast."""
    settings: dict[str, Any] = {"connect_timeout": 1.0, "read_timeout": 1.0}
    return MllpTransport("127.0.0.1", receiver.port, **(settings | options))


# ---- framing and parsing (pure) -----------------------------------------------------


def test_frame_wraps_in_vt_fs_cr() -> None:
    """A block is <VT> message <FS><CR>."""
    # source: HL7 MLLP release 2 transport spec (block format)
    assert b"\x0bMSH|x\r\x1c\x0d" == frame(b"MSH|x\r")


def test_frame_reader_joins_chunks_and_splits_blocks() -> None:
    """Blocks split over reads are joined; two blocks in one read come out as two."""
    reader = FrameReader()
    stream = frame(b"first") + frame(b"second") + frame(b"thi")[:-1]

    got = reader.feed(stream[:3]) + reader.feed(stream[3:])
    rest = reader.feed(b"\x0d")

    assert [b"first", b"second"] == got
    assert [b"thi"] == rest
    assert 0 == reader.pending


def test_frame_reader_drops_noise_between_blocks() -> None:
    """Bytes outside any block are dropped and counted."""
    reader = FrameReader()

    got = reader.feed(b"\r\n" + frame(b"one") + b"xx")

    assert ([b"one"], 4) == (got, reader.dropped)


def test_parse_ack_reads_msa_and_err() -> None:
    """MSA-1, MSA-2 and the error texts (MSA-3, ERR-8) are read from an ACK."""
    # source: HL7 v2.5.1 ch. 2 MSA segment and ERR segment (ERR-8 user message)
    data = (
        b"MSH|^~\\&|R|F|S|F|20240101||ACK|9|P|2.5.1\r"
        b"MSA|AE|CTRL-1|unknown code\r"
        b"ERR||OBX^1^3|103^Table value not found^HL70357|E||||check OBX-3\r"
    )

    assert Ack("AE", "CTRL-1", "unknown code; check OBX-3") == parse_ack(data)


def test_parse_ack_uses_err_3_text_without_err_8() -> None:
    """Without ERR-8 the text component of ERR-3 is reported."""
    data = b"MSH|^~\\&|R\rMSA|AR|C9\rERR|||207^Application internal error^HL70357|E"

    assert Ack("AR", "C9", "Application internal error") == parse_ack(data)


@pytest.mark.parametrize(
    "data",
    [b"", b"garbage", b"MSH|^~\\&|R\rPID|1", b"MSH|^~\\&|R\rMSA||C1"],
    ids=["empty", "not-hl7", "no-msa", "no-code"],
)
def test_parse_ack_refuses_what_is_not_an_ack(data: bytes) -> None:
    """Anything without an MSH and an MSA with a code is not an ACK."""
    assert None is parse_ack(data)


def test_read_control_id_is_msh_10(make_oru: MakeOru) -> None:
    """The control id is MSH-10 (MSH-1 is the field separator itself)."""
    # source: HL7 v2.5.1 ch. 2 MSH segment field numbering
    assert "C-42" == read_control_id(make_oru("C-42"))
    assert None is read_control_id(b"{}")


# ---- the client against a real receiver -----------------------------------------------


def test_aa_is_delivered(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """AA from the receiver gives a receipt; the receiver got our MSH-10."""
    # source: HL7 v2.5.1 ch. 2 table 0008: AA = application accept
    transport = client(mllp_receiver)

    receipt = transport.deliver(outgoing(make_oru, "C-1"))
    transport.close()

    assert "AA" == receipt.code
    assert ["C-1"] == mllp_receiver.received


def test_connection_is_kept_for_the_next_message(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """Several messages travel over one connection."""
    transport = client(mllp_receiver)

    for n in range(3):
        transport.deliver(outgoing(make_oru, f"C-{n}"))
    transport.close()

    assert (1, 1) == (transport.connections_opened, mllp_receiver.connections)
    assert ["C-0", "C-1", "C-2"] == mllp_receiver.received


def test_ae_is_rejected_with_the_receivers_text(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """AE raises Rejected carrying MSA-3; the next message still goes on that link."""
    # source: HL7 v2.5.1 ch. 2 table 0008: AE = application error
    transport = client(mllp_receiver)
    mllp_receiver.answer, mllp_receiver.text = "AE", "OBX-3 code not on file"

    with pytest.raises(Rejected) as caught:
        transport.deliver(outgoing(make_oru, "C-1"))
    mllp_receiver.answer, mllp_receiver.text = "AA", ""
    receipt = transport.deliver(outgoing(make_oru, "C-2"))
    transport.close()

    assert "ward: AE OBX-3 code not on file" == str(caught.value)
    assert ("AA", 1) == (receipt.code, transport.connections_opened)


def test_receiver_down_then_up(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """A receiver that is down gives ConnectFailed; once back, delivery works again."""
    transport = client(mllp_receiver, connect_timeout=0.5)
    mllp_receiver.stop()

    with pytest.raises(ConnectFailed):
        transport.deliver(outgoing(make_oru, "C-1"))
    mllp_receiver.start()
    receipt = transport.deliver(outgoing(make_oru, "C-1"))
    transport.close()

    assert "AA" == receipt.code
    assert ["C-1"] == mllp_receiver.received


def test_connection_closed_by_receiver_is_reopened(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """A kept connection the receiver closed while idle is replaced, without an error."""
    transport = client(mllp_receiver)
    transport.deliver(outgoing(make_oru, "C-1"))
    mllp_receiver.stop()
    mllp_receiver.start()

    receipt = transport.deliver(outgoing(make_oru, "C-2"))
    transport.close()

    assert ("AA", 2) == (receipt.code, transport.connections_opened)


def test_slow_receiver_times_out(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """No ACK within the read timeout is DeliveryTimeout; the next try reconnects."""
    transport = client(mllp_receiver, read_timeout=0.2)
    mllp_receiver.delay = 0.5

    with pytest.raises(DeliveryTimeout):
        transport.deliver(outgoing(make_oru, "C-1"))
    mllp_receiver.delay = 0.0
    receipt = transport.deliver(outgoing(make_oru, "C-1"))
    transport.close()

    assert ("AA", 2) == (receipt.code, transport.connections_opened)


def test_ack_for_another_message_is_retryable(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """An ACK whose MSA-2 is not our MSH-10 is a retryable error and drops the link."""
    # source: HL7 v2.5.1 ch. 2 MSA-2 message control id echoes MSH-10 of the message
    transport = client(mllp_receiver)
    mllp_receiver.ack_control_id = "SOMEONE-ELSE"

    with pytest.raises(DeliveryError) as caught:
        transport.deliver(outgoing(make_oru, "C-1"))
    mllp_receiver.ack_control_id = None
    transport.deliver(outgoing(make_oru, "C-2"))
    transport.close()

    assert not isinstance(caught.value, Rejected)
    assert 2 == transport.connections_opened


def test_payload_without_msh_is_rejected(mllp_receiver: MllpReceiver) -> None:
    """A payload that is not ER7 is dead-lettered without being sent."""
    transport = client(mllp_receiver)
    message = OutgoingMessage("ward", "X-1", b'{"resourceType": "Bundle"}', HL7_V2_ER7)

    with pytest.raises(Rejected):
        transport.deliver(message)

    assert [] == mllp_receiver.received


def test_payload_with_block_characters_is_rejected(mllp_receiver: MllpReceiver, make_oru: MakeOru) -> None:
    """A payload holding <FS> would break its own frame, so it is never sent."""
    # source: HL7 MLLP release 2 transport spec (content must not contain <VT> or <FS>)
    payload = make_oru("C-1").replace(b"21.4", b"21\x1c4")
    transport = client(mllp_receiver)

    with pytest.raises(Rejected, match="block characters"):
        transport.deliver(OutgoingMessage("ward", "C-1", payload, HL7_V2_ER7))

    assert [] == mllp_receiver.received


# ---- TLS --------------------------------------------------------------------------------


def test_tls_delivery_with_a_trusted_certificate(
    tls_receiver: MllpReceiver, tls_pair: CertPair, make_oru: MakeOru
) -> None:
    """Over TLS with the receiver's certificate as CA, the message is acknowledged."""
    transport = client(tls_receiver, tls=TlsOptions(ca_file=tls_pair.cert))

    receipt = transport.deliver(outgoing(make_oru, "C-1"))
    transport.close()

    assert "AA" == receipt.code
    assert ["C-1"] == tls_receiver.received


def test_tls_refuses_an_untrusted_certificate(
    tls_receiver: MllpReceiver,
    make_cert: Callable[[str], CertPair],
    make_oru: MakeOru,
) -> None:
    """A receiver whose certificate is not trusted is never sent the message."""
    stranger = make_cert("other-ca")
    transport = client(tls_receiver, tls=TlsOptions(ca_file=stranger.cert))

    with pytest.raises(ConnectFailed, match="certificate"):
        transport.deliver(outgoing(make_oru, "C-1"))

    assert [] == tls_receiver.received


def test_mutual_tls_presents_the_client_certificate(
    mutual_tls_receiver: MllpReceiver, tls_pair: CertPair, client_pair: CertPair, make_oru: MakeOru
) -> None:
    """With a client certificate and key configured, a receiver requiring one accepts us."""
    options = TlsOptions(ca_file=tls_pair.cert, cert_file=client_pair.cert, key_file=client_pair.key)
    transport = client(mutual_tls_receiver, tls=options)

    receipt = transport.deliver(outgoing(make_oru, "C-1"))
    transport.close()

    assert "AA" == receipt.code


def test_mutual_tls_without_client_certificate_fails(
    mutual_tls_receiver: MllpReceiver, tls_pair: CertPair, make_oru: MakeOru
) -> None:
    """Without the client certificate the receiver hangs up, which is retryable."""
    transport = client(mutual_tls_receiver, tls=TlsOptions(ca_file=tls_pair.cert))

    with pytest.raises(DeliveryError) as caught:
        transport.deliver(outgoing(make_oru, "C-1"))
    transport.close()

    assert not isinstance(caught.value, Rejected)
    assert [] == mutual_tls_receiver.received


def test_unreadable_ca_file_is_a_config_error(tmp_path: Path) -> None:
    """A CA file that cannot be read fails at construction, as configuration."""
    with pytest.raises(ConfigError):
        MllpTransport("127.0.0.1", 1, tls=TlsOptions(ca_file=tmp_path / "none.pem"))
