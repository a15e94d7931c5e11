"""The one seam between the delivery loop and the network: the ``Transport`` protocol.

Owns the value types every transport speaks (``OutgoingMessage``, ``DeliveryReceipt``,
``TlsOptions``) and the client TLS context they share. It must not know the ledger:
the delivery loop turns outbox rows into ``OutgoingMessage`` values and receipts back
into ledger marks. A transport raises only ``DeliveryError`` subclasses; each translates
foreign exceptions in a single context manager of its own.
"""

from __future__ import annotations

import ssl
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

from bridge.emit.outputs import FHIR_JSON, HL7_V2_ER7  # one definition, where payloads are made
from bridge.errors import ConfigError

__all__ = ["FHIR_JSON", "HL7_V2_ER7", "DeliveryReceipt", "OutgoingMessage", "TlsOptions", "Transport"]


@dataclass(frozen=True, slots=True)
class OutgoingMessage:
    """One message to hand to a receiver; ``message_id`` is its stable control id."""

    destination: str
    message_id: str
    payload: bytes
    content_type: str
    test_id: str = ""


@dataclass(frozen=True, slots=True)
class DeliveryReceipt:
    """The receiver's yes: an ACK code (``AA``, ``CA``) or HTTP status, and its text."""

    code: str
    text: str = ""

    def line(self) -> str:
        """One line for the ledger's ``ack_text``."""
        return f"{self.code} {self.text}".strip()


class Transport(Protocol):
    """Delivers messages to one destination.

    ``deliver`` returns a receipt when the receiver accepted the message, raises
    ``Rejected`` when it refused it, and another ``DeliveryError`` when it is worth trying
    again later. It never raises anything else.
    """

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt: ...

    def close(self) -> None: ...


@dataclass(frozen=True, slots=True)
class TlsOptions:
    """Client TLS: trust ``ca_file`` (else the system store), optionally prove our name.

    ``server_hostname`` overrides the name checked against the receiver's certificate
    (default: the host we connect to).
    """

    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    server_hostname: str | None = None


def client_tls_context(options: TlsOptions) -> ssl.SSLContext:
    """A verifying client context: certificate and host name checked, TLS 1.2 or newer.

    Unreadable CA, certificate or key files are a configuration error, found at start-up.
    """
    try:
        context = ssl.create_default_context(
            ssl.Purpose.SERVER_AUTH,
            cafile=None if options.ca_file is None else str(options.ca_file),
        )
        context.minimum_version = ssl.TLSVersion.TLSv1_2
        if options.cert_file is not None:
            context.load_cert_chain(options.cert_file, options.key_file)
    except (OSError, ssl.SSLError) as exc:
        raise ConfigError("tls", f"readable CA, certificate and key files ({exc})") from exc
    return context
