"""Retry delays for the outbox: exponential back-off with full jitter, capped.

Owns the arithmetic only. It must not sleep, read the clock or draw random numbers
itself: the caller passes ``rand`` in, so the schedule is reproducible in tests.
"""

from __future__ import annotations

from collections.abc import Callable

from bridge.service.settings import RETRY_BASE_SECONDS, RETRY_CAP_SECONDS

DEFAULT_BASE, DEFAULT_CAP = RETRY_BASE_SECONDS, RETRY_CAP_SECONDS  # the service's defaults, written once there

# 2**62 seconds is far beyond any cap; stopping the exponent there avoids float overflow
# for a message that has been failing for a very long time.
_MAX_EXPONENT = 62


def ceiling(attempt: int, base: float = DEFAULT_BASE, cap: float = DEFAULT_CAP) -> float:
    """The largest delay allowed after failed attempt number ``attempt`` (1-based)."""
    exponent = min(max(attempt - 1, 0), _MAX_EXPONENT)
    return min(cap, base * 2.0**exponent)


def next_delay(
    attempt: int,
    base: float = DEFAULT_BASE,
    cap: float = DEFAULT_CAP,
    *,
    rand: Callable[[], float],
) -> float:
    """Seconds to wait after failed attempt ``attempt``: uniform in [0, ceiling).

    Full jitter spreads retries from many messages (or many services) so that a receiver
    coming back is not hit by all of them at once. ``rand`` returns a float in [0, 1).
    """
    return rand() * ceiling(attempt, base, cap)
