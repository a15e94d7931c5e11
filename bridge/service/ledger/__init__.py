"""The service's durable state: the inputs seen, the outbox of messages to deliver, the lock.

Callers import from here: ``from bridge.service.ledger import Ledger, ServiceLock, ...``.
The modules behind it: :mod:`.database` (the SQLite file, its durability settings, the one
lock), :mod:`.schema` (tables and migrations), :mod:`.inputs` (inputs by SHA-256, repeated
drops, quarantines), :mod:`.outbox` (messages, attempts, their state machine), :mod:`.sent`
(what each message carried, resource by resource, kept through pruning),
:mod:`.retention` (pruning, size), :mod:`.facade` (the :class:`Ledger` that joins them) and
:mod:`.lock` (one service per state folder). Nothing here imports a transport, and no transport imports this.
"""

from bridge.service.ledger.facade import Ledger, LedgerSummary
from bridge.service.ledger.inputs import InputRecord, InputState, NewInput
from bridge.service.ledger.lock import ServiceLock
from bridge.service.ledger.outbox import Attempt, DestinationSummary, NewMessage, OutboxRow, OutboxState
from bridge.service.ledger.retention import LedgerSize, PruneResult
from bridge.service.ledger.schema import SCHEMA_VERSION
from bridge.service.ledger.sent import SentResource

__all__ = [
    "SCHEMA_VERSION",
    "Attempt",
    "DestinationSummary",
    "InputRecord",
    "InputState",
    "Ledger",
    "LedgerSize",
    "LedgerSummary",
    "NewInput",
    "NewMessage",
    "OutboxRow",
    "OutboxState",
    "PruneResult",
    "SentResource",
    "ServiceLock",
]
