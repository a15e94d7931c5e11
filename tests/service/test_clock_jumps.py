"""The wall clock stepped an hour forward and back mid-run: no burst of retries, no stuck message.

Waits, settle times and heartbeats are on the monotonic clock; due times in the ledger are wall
time (they must survive a restart), so the service moves them with a step it sees, and clamps any
further away than the back-off cap (a clock set back while it was stopped). The wall clock is
injected (real time plus an offset the test changes); the monotonic clock is the real one. All
data is invented.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from bridge.config import parse_settings
from bridge.errors import ConnectFailed
from bridge.service.ledger import Ledger, NewInput, NewMessage
from bridge.service.runner import Service
from bridge.service.transports.base import HL7_V2_ER7, DeliveryReceipt, OutgoingMessage
from bridge.service.watcher import Readiness
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables
from tests.service.conftest import drop, make_input, wait_until
from tests.shell.conftest import Clock, oru

HOUR = 3600.0


class SteppedClock:
    """Wall time as the service reads it: the real clock plus an offset the test steps."""

    def __init__(self) -> None:
        self.offset = 0.0

    def __call__(self) -> float:
        return time.time() + self.offset

    def step(self, seconds: float) -> None:
        self.offset += seconds


class Switchable:
    """A receiver that refuses connections until switched on; notes when (monotonic) each attempt came."""

    def __init__(self) -> None:
        self.up = False
        self.attempts: list[tuple[float, str]] = []
        self.delivered: list[str] = []

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        self.attempts.append((time.monotonic(), message.message_id))
        if not self.up:
            raise ConnectFailed(message.destination, "connection refused")
        self.delivered.append(message.message_id)
        return DeliveryReceipt("AA")

    def close(self) -> None:
        """Nothing held."""


SETTINGS = (
    'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\nmetrics_port = 0\n'
    "stable_seconds = 0.1\nrescan_seconds = 0.2\nretry_base_seconds = 8\nretry_cap_seconds = 8\n"
    '[destination.records]\npayload = "hl7"\ntransport = "file"\nfolder = "out"\n'
)


@contextmanager
def running(root: Path, clock: SteppedClock, receiver: Switchable) -> Iterator[Service]:
    settings = parse_settings(SETTINGS, {}, base=root)
    service_settings = settings.require_service()
    service_settings.inbox.mkdir(parents=True, exist_ok=True)
    (root / "out").mkdir(exist_ok=True)  # a file destination's folder must exist at start (issue 19.6)
    with Ledger.open(service_settings.ledger_path, now=clock) as ledger:
        # rand 0.9: every retry waits 0.9 x 8 s = 7.2 s, so a burst would stand out
        service = Service(
            service_settings,
            settings.pipeline,
            MapChoice(),
            load_tables(),
            ledger,
            {"records": receiver},
            clock,
            lambda: 0.9,
        )
        runner = threading.Thread(target=service.run)
        runner.start()
        try:
            yield service
        finally:
            service.request_stop()
            runner.join(timeout=30)


def test_an_hour_forward_then_two_back_makes_no_burst_and_leaves_nothing_stuck(tmp_path: Path) -> None:
    """+1 h: retries keep their 7.2 s waits (none at once); -2 h: they still come within the cap, and all arrive."""
    clock, receiver = SteppedClock(), Switchable()
    with running(tmp_path, clock, receiver) as service:
        for n in range(8):
            drop(service.settings.inbox, f"clock-{n}.json", make_input(f"CLOCK-{n:04d}", f"FICT-74{n:02d}"))
        wait_until(lambda: len({m for _, m in receiver.attempts}) == 8, "a first attempt at each message")
        first_round = len(receiver.attempts)
        clock.step(+HOUR)
        time.sleep(2.0)  # a burst would be here: without the step followed, every wait just ended
        after_forward = len(receiver.attempts) - first_round
        clock.step(-2 * HOUR)
        receiver.up = True
        stepped_back_at = time.monotonic()
        wait_until(lambda: len(receiver.delivered) == 8, "every message delivered", timeout=30)
        took = time.monotonic() - stepped_back_at
        waits = _waits(receiver.attempts)

    assert (8, 0) == (first_round, after_forward)
    assert took < 8.0 + 2.0  # within the cap (8 s) and some scheduling, not an hour
    assert all(wait > 6.0 for wait in waits)  # each retry came after about its 7.2 s, none early


def _waits(attempts: list[tuple[float, str]]) -> list[float]:
    """Seconds between successive attempts at the same message."""
    last: dict[str, float] = {}
    waits = []
    for at, message_id in attempts:
        if message_id in last:
            waits.append(at - last[message_id])
        last[message_id] = at
    return waits


def test_due_times_left_beyond_the_cap_by_a_clock_set_back_while_stopped_are_clamped_at_start(tmp_path: Path) -> None:
    """A row due an hour and more from now (the clock went back while the service was down) goes within the cap."""
    clock, receiver = SteppedClock(), Switchable()
    receiver.up = True
    settings = parse_settings(SETTINGS, {}, base=tmp_path).require_service()
    with Ledger.open(settings.ledger_path, now=clock) as ledger:
        new = NewMessage("records", "LATE-1", "T-LATE-1", "p1", oru("LATE-1"), HL7_V2_ER7)
        [row_id] = ledger.record_input_and_enqueue(NewInput("e" * 64, "late.json", "T-LATE-1"), [new])
        ledger.mark_retry(row_id, "ConnectFailed: refused", clock() + HOUR + 5.0)  # set by a clock an hour ahead
    started = time.monotonic()
    with running(tmp_path, clock, receiver):
        wait_until(lambda: receiver.delivered == ["LATE-1"], "the late message delivered", timeout=30)
    assert time.monotonic() - started < 8.0 + 2.0


def test_a_file_settles_on_the_monotonic_clock_whatever_the_wall_clock_does(tmp_path: Path) -> None:
    """An hour forward takes no file early; an hour back holds none: only unchanged monotonic seconds count."""
    (tmp_path / "a.json").write_bytes(b"{}")
    wall, monotonic = Clock(start=1_800_000_000.0), Clock(start=100.0)
    readiness = Readiness(tmp_path, 1.0, wall, threading.Event(), monotonic)

    first = readiness.ready(["a.json"])
    wall.advance(HOUR)
    monotonic.advance(0.2)
    after_forward = readiness.ready(["a.json"])
    wall.advance(-2 * HOUR)
    monotonic.advance(0.9)
    after_back = readiness.ready(["a.json"])

    assert ([], [], ["a.json"]) == (first, after_forward, [p.name for p, _ in after_back])
