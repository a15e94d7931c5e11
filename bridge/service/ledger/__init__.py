"""The service's durable state: ``from bridge.service.ledger import Ledger, ServiceLock, ...``."""

from bridge.service.ledger.outbox import (
    SCHEMA_VERSION,
    Attempt,
    DestinationSummary,
    InputRecord,
    InputState,
    Ledger,
    LedgerSummary,
    NewInput,
    NewMessage,
    OutboxRow,
    OutboxState,
    ServiceLock,
)

__all__ = [
    "SCHEMA_VERSION",
    "Attempt",
    "DestinationSummary",
    "InputRecord",
    "InputState",
    "Ledger",
    "LedgerSummary",
    "NewInput",
    "NewMessage",
    "OutboxRow",
    "OutboxState",
    "ServiceLock",
]
