"""``InMemoryTransport``: a transport that only remembers, for tests.

Owns a scripted list of outcomes (fail, time out, reject) for the next deliveries. It must
not do any I/O.
"""

from __future__ import annotations

from collections import deque
from typing import Literal

from bridge.errors import ConnectFailed, DeliveryError, DeliveryTimeout, Rejected
from bridge.service.transports.base import DeliveryReceipt, OutgoingMessage

Scripted = tuple[Literal["fail", "timeout", "reject"], str]


class InMemoryTransport:
    """Accepts every message (``AA``) unless told to fail or reject the next ones.

    ``attempts`` holds every message it was given, ``delivered`` the accepted ones.
    """

    def __init__(self, code: str = "AA") -> None:
        self.code = code
        self.attempts: list[OutgoingMessage] = []
        self.delivered: list[OutgoingMessage] = []
        self.closed = False
        self._script: deque[Scripted] = deque()

    def fail_next(self, count: int = 1, detail: str = "connection refused") -> None:
        """The next ``count`` deliveries raise ``ConnectFailed`` (retryable)."""
        self._script.extend([("fail", detail)] * count)

    def time_out_next(self, count: int = 1, detail: str = "no answer") -> None:
        """The next ``count`` deliveries raise ``DeliveryTimeout`` (retryable)."""
        self._script.extend([("timeout", detail)] * count)

    def reject_next(self, count: int = 1, reason: str = "AE rejected") -> None:
        """The next ``count`` deliveries raise ``Rejected`` (dead-letter)."""
        self._script.extend([("reject", reason)] * count)

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        self.attempts.append(message)
        if self._script:
            kind, detail = self._script.popleft()
            raise _error(kind, message.destination, detail)
        self.delivered.append(message)
        return DeliveryReceipt(self.code, f"kept in memory as {message.message_id}")

    def close(self) -> None:
        self.closed = True


def _error(kind: str, destination: str, detail: str) -> DeliveryError:
    if kind == "reject":
        return Rejected(destination, detail)
    if kind == "timeout":
        return DeliveryTimeout(destination, detail)
    return ConnectFailed(destination, detail)
