"""/healthz of an in-process service: a delivery loop busy with a long backlog is healthy, not stale."""

from __future__ import annotations

import threading
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import TYPE_CHECKING

from bridge.config import parse_settings
from bridge.service.ledger import Ledger
from bridge.service.metrics import HealthServer
from bridge.service.runner import Service
from bridge.service.transports.mllp import MllpTransport
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables
from tests.service.conftest import make_input, mllp_destination, wait_until
from tests.shell.conftest import LOOPBACK, Clock

if TYPE_CHECKING:
    from tests.service.conftest import RecordingReceiver


def healthz(port: int) -> int:
    try:
        with urllib.request.urlopen(f"http://{LOOPBACK}:{port}/healthz", timeout=2) as answer:
            return int(answer.status)
    except urllib.error.HTTPError as error:
        return int(error.code)


def test_healthz_stays_ok_while_delivery_works_through_a_backlog(tmp_path: Path, receiver: RecordingReceiver) -> None:
    """The delivery loop beats its heartbeat per message, so a backlog longer than stale_after is still ok."""
    receiver.delay = 0.1
    settings = parse_settings(
        'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\nmetrics_port = 0\nstable_seconds = 0\n'
        + mllp_destination(receiver.port),
        {},
        base=tmp_path,
    )
    clock = Clock(start=time.time() + 3600.0)  # every enqueued row is due at once
    monotonic = Clock(start=1000.0)  # heartbeats are on the monotonic clock
    full, settings = settings, settings.require_service()
    settings.inbox.mkdir(parents=True)
    with Ledger.open(settings.ledger_path) as ledger:
        service = Service(
            settings,
            full.pipeline,
            MapChoice(),
            load_tables(),
            ledger,
            {"records": MllpTransport(LOOPBACK, receiver.port)},
            clock,
            monotonic=monotonic,
        )
        # metrics_port = 0 turns the service's own endpoint off; this one listens on a free port.
        service.health = HealthServer(LOOPBACK, 0, service.metrics, ledger.summary, stale_after=30.0)
        service.health.start()
        runner = threading.Thread(target=service.run)
        runner.start()
        try:
            wait_until(lambda: service.metrics.heartbeat_ages(), "the loops running")
            for n in range(40):  # written in place: each close event says the file is complete
                (settings.inbox / f"b-{n:02d}.json").write_bytes(make_input(f"HB-{n:02d}", f"FICT-05{n:02d}"))
            wait_until(lambda: len(receiver.accepted()) >= 3, "delivery under way")
            monotonic.advance(60.0)  # longer than stale_after: only fresh heartbeats make it ok
            status = wait_until(lambda: healthz(service.health.port) == 200 and 200, "healthz ok", timeout=3)  # type: ignore[union-attr]
            busy = len(receiver.accepted()) < 40
        finally:
            service.request_stop()
            runner.join(timeout=30)

    assert (200, True) == (status, busy)
