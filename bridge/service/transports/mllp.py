"""MLLP delivery of HL7 v2 messages: one persistent connection, and what each ACK means.

Owns the client (:class:`MllpTransport`) and what an ACK means to it (:func:`judge`). The
framing (``frame``, ``FrameReader``) and ACK parsing (``parse_ack``) are ``bridge.hl7``'s,
shared with the stand-in's listener; the ACK codes are table 0008 of ``mappings/hl7_tables.toml``.
It must not touch the ledger: it returns a receipt or raises a ``DeliveryError`` subclass
(``Rejected`` for AE/AR unless the destination's response policy says to retry them), and the
delivery loop records it.

One connection is kept open and reused for every message, as receivers expect; it is
dropped after any failure or out-of-step answer and opened again for the next message.
"""

from __future__ import annotations

import select
import socket
import ssl
import time
from collections.abc import Iterator
from contextlib import contextmanager, suppress

from bridge.errors import ConnectFailed, DeliveryError, DeliveryTimeout, Rejected
from bridge.hl7.ack import Ack, parse_ack
from bridge.hl7.mllp import END_BLOCK, START_BLOCK, FrameReader, can_be_framed, frame
from bridge.hl7.text import control_id_of
from bridge.service.settings import CONNECT_TIMEOUT, READ_TIMEOUTS
from bridge.service.transports.base import (
    DeliveryReceipt,
    OutgoingMessage,
    TlsOptions,
    client_tls_context,
)
from bridge.tables.files import load_hl7_tables

# Framing and ACKs are bridge.hl7's; named here too for the transport's callers and tests.
__all__ = [
    "END_BLOCK",
    "START_BLOCK",
    "Ack",
    "FrameReader",
    "MllpTransport",
    "frame",
    "judge",
    "parse_ack",
    "read_control_id",
]

# source: HL7 v2.5.1 ch. 2, table 0008 (acknowledgment codes), MSA-1: mappings/hl7_tables.toml
ACCEPTED = load_hl7_tables().answered_with("accept")
REFUSED = frozenset(load_hl7_tables().acknowledgments) - ACCEPTED

DEFAULT_CONNECT_TIMEOUT = CONNECT_TIMEOUT
DEFAULT_READ_TIMEOUT = READ_TIMEOUTS["mllp"]
MAX_ACK_BYTES = 1 << 20  # an ACK is a few hundred bytes; anything huge is not one
_CHUNK = 65536


def read_control_id(payload: bytes) -> str | None:
    """MSH-10 read back from an ER7 payload, or None when it does not start with MSH.

    The reverse of :func:`bridge.emit.hl7v2.control_id`, which builds MSH-10 from an outcome.
    """
    return control_id_of(payload.decode("utf-8", errors="replace"))


def judge(
    ack: Ack | None, sent_control_id: str, destination: str, retried: frozenset[str] = frozenset()
) -> DeliveryReceipt:
    """Turn an ACK into a receipt, or the DeliveryError it amounts to.

    ``retried``: refusal codes (AE, AR) this destination wants retried with back-off rather
    than dead-lettered; the commit-level CE/CR follow AE/AR.
    """
    if ack is None:
        raise DeliveryError(destination, "answer is not a readable HL7 ACK")
    if ack.control_id != sent_control_id:
        raise DeliveryError(
            destination,
            f"ACK is for control id {ack.control_id!r}, sent {sent_control_id!r}",
        )
    if ack.code in ACCEPTED:
        return DeliveryReceipt(ack.code, ack.text)
    if ack.code in REFUSED:
        # source: HL7 v2.5.1 ch. 2 table 0008: AE/CE application/commit error, AR/CR reject
        kind = "A" + ack.code[1]
        if kind in retried:
            raise DeliveryError(destination, f"{ack.code} {ack.text}".strip())
        raise Rejected(destination, f"{ack.code} {ack.text}".strip())
    raise DeliveryError(destination, f"ACK has unknown MSA-1 code {ack.code!r}")


class MllpTransport:
    """Sends ER7 messages over one kept-open MLLP connection and reads each ACK.

    Not thread-safe: one delivery thread owns one transport.
    """

    def __init__(
        self,
        host: str,
        port: int,
        *,
        connect_timeout: float = DEFAULT_CONNECT_TIMEOUT,
        read_timeout: float = DEFAULT_READ_TIMEOUT,
        tls: TlsOptions | None = None,
        max_ack_bytes: int = MAX_ACK_BYTES,
        retried: frozenset[str] = frozenset(),
    ) -> None:
        self.retried = retried  # AE and/or AR: retried with back-off instead of dead-lettered
        self.host = host
        self.port = port
        self.connect_timeout = connect_timeout
        self.read_timeout = read_timeout
        self.max_ack_bytes = max_ack_bytes
        self.connections_opened = 0
        self._context = None if tls is None else client_tls_context(tls)
        self._server_hostname = (tls and tls.server_hostname) or host
        self._sock: socket.socket | None = None

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        destination = message.destination
        sent = read_control_id(message.payload)
        if sent is None:
            raise Rejected(destination, "payload is not an HL7 v2 message (no MSH-10)")
        if not can_be_framed(message.payload):
            # Such a message would end its own block early; no retry can fix it.
            raise Rejected(destination, "payload contains MLLP block characters")
        with self._guarded(destination, connecting=True):
            sock = self._connection()
        with self._guarded(destination, connecting=False):
            sock.settimeout(self.read_timeout)  # bounds the send; the read has a deadline
            sock.sendall(frame(message.payload))
            answer = self._read_ack(sock, destination)
            return judge(parse_ack(answer), sent, destination, self.retried)

    def close(self) -> None:
        if self._sock is not None:
            sock, self._sock = self._sock, None
            _quietly_close(sock)

    @contextmanager
    def _guarded(self, destination: str, *, connecting: bool) -> Iterator[None]:
        """The one translation of socket and TLS errors; any failure drops the connection.

        A refusal (AE/AR) leaves the stream in step, so the connection is kept for it.
        """
        try:
            yield
        except Rejected:
            raise
        except DeliveryError:
            self.close()
            raise
        except TimeoutError as exc:
            self.close()
            if connecting:
                raise ConnectFailed(destination, "connect timed out") from exc
            raise DeliveryTimeout(destination, "no ACK in time") from exc
        except ssl.SSLCertVerificationError as exc:
            self.close()
            raise ConnectFailed(destination, f"certificate not trusted: {exc.verify_message}") from exc
        except (OSError, ssl.SSLError) as exc:
            self.close()
            kind = ConnectFailed if connecting else DeliveryError
            raise kind(destination, _describe(exc)) from exc

    def _connection(self) -> socket.socket:
        if self._sock is not None and _is_stale(self._sock):
            self.close()
        if self._sock is None:
            self._sock = self._open()
        return self._sock

    def _open(self) -> socket.socket:
        sock = socket.create_connection((self.host, self.port), timeout=self.connect_timeout)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_KEEPALIVE, 1)
            if self._context is not None:
                sock = self._context.wrap_socket(sock, server_hostname=self._server_hostname)
        except BaseException:
            sock.close()
            raise
        self.connections_opened += 1
        return sock

    def _read_ack(self, sock: socket.socket, destination: str) -> bytes:
        """The first complete block, within ``read_timeout`` for the whole answer."""
        reader = FrameReader()
        deadline = time.monotonic() + self.read_timeout
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise DeliveryTimeout(destination, "no ACK in time")
            sock.settimeout(remaining)
            chunk = sock.recv(_CHUNK)
            if not chunk:
                raise DeliveryError(destination, "receiver closed before the ACK")
            frames = reader.feed(chunk)
            if frames:
                if len(frames) > 1 or reader.pending:
                    # More than one answer: the stream is out of step; start afresh.
                    self.close()
                return frames[0]
            if reader.pending > self.max_ack_bytes:
                raise DeliveryError(destination, "answer too large to be an ACK")


def _is_stale(sock: socket.socket) -> bool:
    """Whether a kept connection was closed by the peer (or has unexpected bytes).

    Checked before reuse so that a receiver's idle timeout costs a reconnect, not a
    failed attempt: sending on a closed connection could look like a lost ACK.
    """
    try:
        readable, _, _ = select.select([sock], [], [], 0)
    except (OSError, ValueError):
        return True
    if not readable:
        return False
    try:
        sock.settimeout(0.0)
        sock.recv(1)  # b"": closed by the peer; any byte: a stray answer
    except (BlockingIOError, ssl.SSLWantReadError):
        return False  # only TLS housekeeping (a session ticket) was waiting
    except OSError:
        pass
    return True


def _describe(exc: BaseException) -> str:
    if isinstance(exc, OSError) and exc.strerror:
        return exc.strerror
    return str(exc) or type(exc).__name__


def _quietly_close(sock: socket.socket) -> None:
    with suppress(OSError):
        sock.close()
