"""The delivery policy: take due outbox rows, hand them to transports, record the outcome.

Owns the mapping from outcome to ledger state: a receipt marks the row delivered,
``Rejected`` dead-letters it (the other messages go on), any other ``DeliveryError``
schedules a retry with capped, jittered back-off, for as long as it takes. A receiver's
``Retry-After`` (``RetryLater``) is waited out when it is within the back-off cap, the longest
the service ever waits between two attempts; a longer one counts as a failed attempt that waits
the cap. It must not
sleep, read the clock or draw random numbers itself (``now`` and ``rand`` are passed in),
and it must not catch what is not a ``DeliveryError``: a ``LedgerError`` or a bug stops
the service loudly rather than losing track of a message.

Each call of :func:`deliver_one` finishes one message completely (sent, answered and
recorded), so a service that checks its stop flag between calls never leaves a message
half-done.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Literal

from bridge.errors import DeliveryError, Rejected, RetryLater
from bridge.service.backoff import DEFAULT_BASE, DEFAULT_CAP, next_delay
from bridge.service.ledger import Ledger, OutboxRow
from bridge.service.transports.base import OutgoingMessage, Transport

# What became of one attempt (not bridge.model.Outcome, what became of one input file).
DeliveryResult = Literal["delivered", "rejected", "retry"]
log = logging.getLogger("dlco_bridge.delivery")


@dataclass(frozen=True, slots=True)
class Backoff:
    """Retry delays in seconds: the first ceiling, and the cap it doubles up to."""

    base: float = DEFAULT_BASE
    cap: float = DEFAULT_CAP


def to_outgoing(row: OutboxRow) -> OutgoingMessage:
    """The transport's view of an outbox row."""
    return OutgoingMessage(
        destination=row.destination,
        message_id=row.message_id,
        payload=row.payload,
        content_type=row.content_type,
        test_id=row.test_id,
    )


def deliver_one(
    ledger: Ledger,
    destination: str,
    transport: Transport,
    now: Callable[[], float],
    rand: Callable[[], float],
    backoff: Backoff = Backoff(),
    address: str = "",
) -> DeliveryResult | None:
    """Send the next due message of ``destination``; None when nothing is due.

    ``address`` (host:port, URL or folder) is named in the log lines; a receiver's Retry-After
    up to ``backoff.cap`` is waited out even when the back-off would try sooner.
    """
    row = ledger.next_due(destination, now())
    if row is None:
        return None
    try:
        receipt = transport.deliver(to_outgoing(row))
    except Rejected as exc:
        ledger.mark_rejected(row.id, exc.detail)
        # The receiver's text can quote message content: the log names the row, not the text.
        log.warning("message refused: dead-lettered", extra={"event": "rejected", **_where(row), "address": address})
        return "rejected"
    except DeliveryError as exc:
        delay = next_delay(row.attempts + 1, backoff.base, backoff.cap, rand=rand)
        error = f"{type(exc).__name__}: {exc.detail}"
        if isinstance(exc, RetryLater):
            if exc.after <= backoff.cap:
                delay = max(delay, exc.after)
            else:
                # source: RFC 9110 §10.2.3 leaves what to do with a long Retry-After to the client
                delay = backoff.cap
                error += f" (over the maximum of {backoff.cap:g} s: counted as a failure)"
        ledger.mark_retry(row.id, error, now() + delay)
        log.info(
            "delivery failed: will retry",
            extra={
                "event": "retry",
                **_where(row),
                "address": address,
                "error": type(exc).__name__,
                "retry_in_s": round(delay, 1),
            },
        )
        return "retry"
    ledger.mark_delivered(row.id, receipt.line())
    return "delivered"


def _where(row: OutboxRow) -> dict[str, object]:
    return {
        "outbox_id": row.id,
        "destination": row.destination,
        "message_id": row.message_id,
        "attempt": row.attempts + 1,
    }


def _never() -> bool:
    return False


def deliver_due(
    ledger: Ledger,
    transports: Mapping[str, Transport],
    now: Callable[[], float],
    rand: Callable[[], float],
    *,
    backoff: Backoff = Backoff(),
    should_stop: Callable[[], bool] = _never,
    addresses: Mapping[str, str] | None = None,
) -> int:
    """Deliver what is due, one message per destination in turn; return how many finished.

    "Finished" counts messages delivered or dead-lettered. A destination leaves the round
    when nothing more is due or an attempt failed: the failed message now waits for its
    back-off, and the link is likely down for the others too. ``should_stop`` is checked
    before every message.
    """
    active = list(transports)
    finished = 0
    while active:
        for destination in list(active):
            if should_stop():
                return finished
            address = (addresses or {}).get(destination, "")
            result = deliver_one(ledger, destination, transports[destination], now, rand, backoff, address)
            if result is None or result == "retry":
                active.remove(destination)
            else:
                finished += 1
    return finished
