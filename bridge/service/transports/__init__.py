"""Delivery transports: one narrow seam (``Transport.deliver``), several implementations.

Each transport turns an ``OutgoingMessage`` into a ``DeliveryReceipt`` or raises a
``DeliveryError`` subclass; none of them knows the ledger or retries by itself.
"""

from bridge.service.transports.base import (
    FHIR_JSON,
    HL7_V2_ER7,
    DeliveryReceipt,
    OutgoingMessage,
    TlsOptions,
    Transport,
)
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.file import FileTransport
from bridge.service.transports.memory import InMemoryTransport
from bridge.service.transports.mllp import MllpTransport

__all__ = [
    "FHIR_JSON",
    "HL7_V2_ER7",
    "DeliveryReceipt",
    "FhirRestTransport",
    "FileTransport",
    "InMemoryTransport",
    "MllpTransport",
    "OutgoingMessage",
    "TlsOptions",
    "Transport",
]
