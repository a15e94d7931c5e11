"""Counters, delivery latency, and the loopback health/metrics endpoint (shell).

Owns: the counters the service increments and the file-close-to-acknowledgement latency of each
message (noted at enqueue, measured at delivery by :class:`MeteredTransport`), kept by
``prometheus_client`` in one registry per :class:`Metrics`; the gauges read at each scrape from
the ledger's summary and the disk-full state; and ``/healthz`` and ``/metrics`` on a loopback
address. No patient data is ever put in a label.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterable, Iterator
from http.server import BaseHTTPRequestHandler
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from prometheus_client.metrics_core import GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from bridge.service.ledger import LedgerSummary
from bridge.service.loopback import LoopbackServer
from bridge.service.space import Space
from bridge.service.transports.base import DeliveryReceipt, OutgoingMessage, Transport

PREFIX = "dlco_bridge_"
# What generate_latest writes: the text format 0.0.4 (source: Prometheus "Exposition formats").
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
# Latency buckets in seconds (Prometheus histogram "le" bounds).
LATENCY_BUCKETS = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0)
# Each counter (exposed as dlco_bridge_<name>_total) and what it counts since the service started.
COUNTERS = {
    "files_seen": "Inbox files taken.",
    "files_processed": "Inbox files processed and archived.",
    "files_quarantined": "Inbox files quarantined.",
    # Quarantined because processing raised something other than an InputError (a bug the file
    # exposed); they are counted in files_quarantined as well.
    "files_failed_internal": "Inbox files quarantined for an internal error (alert on any).",
    "files_duplicate": "Inbox files already processed (archived as duplicates).",
    "corrections": "Inbox files that corrected a test already sent.",
    # Sessions a field map refused in a file whose other sessions went on.
    "records_quarantined": "Sessions a field map refused in a file whose other sessions went on.",
    # Inbox files that are not exports (bridge.inputs, the skip rule), left in place.
    "files_skipped": "Inbox files that are not exports, left in place (counted once each).",
}


class Metrics:
    """What the service has done since it started, safe to update from several threads.

    Heartbeats are on the ``monotonic`` clock, so a step of the wall clock never makes a loop
    look stale (or fresh); latency is wall time, from when a file was complete.
    """

    def __init__(self, clock: Callable[[], float], monotonic: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._monotonic = monotonic
        self._lock = threading.Lock()
        self._started: dict[str, float] = {}  # message id -> when its input was complete
        self._heartbeats: dict[str, float] = {}
        self.registry = CollectorRegistry()
        self._counters = {name: Counter(PREFIX + name, text, registry=self.registry) for name, text in COUNTERS.items()}
        self._delivered = Counter(
            PREFIX + "delivered", "Messages the destination acknowledged.", ["destination"], registry=self.registry
        )
        self._latency = Histogram(
            PREFIX + "delivery_latency_seconds",
            "Seconds from an input file complete to the acknowledgement of its message.",
            ["destination"],
            buckets=LATENCY_BUCKETS,
            registry=self.registry,
        )

    def count(self, name: str) -> None:
        self._counters[name].inc()

    def heartbeat(self, loop: str) -> None:
        with self._lock:
            self._heartbeats[loop] = self._monotonic()

    def heartbeat_ages(self) -> dict[str, float]:
        now = self._monotonic()
        with self._lock:
            return {loop: now - at for loop, at in self._heartbeats.items()}

    def note_enqueued(self, message_id: str, input_complete_at: float) -> None:
        with self._lock:
            self._started[message_id] = input_complete_at

    def note_delivered(self, destination: str, message_id: str) -> None:
        now = self._clock()
        self._delivered.labels(destination).inc()
        with self._lock:
            started = self._started.pop(message_id, None)
        if started is not None:  # None: enqueued before a restart, no start time to measure from
            self._latency.labels(destination).observe(max(0.0, now - started))

    def render(self, summary: LedgerSummary, space: Space | None = None) -> str:
        """Prometheus text exposition format (version 0.0.4): the registry, then the ledger and disk gauges."""
        families = [*_without_created(self.registry.collect()), *_ledger_gauges(summary)]
        families += _space_gauges(space) if space is not None else []
        return generate_latest(_Families(families)).decode()


def _without_created(families: Iterable[Metric]) -> Iterator[Metric]:
    """The registry's families without prometheus_client's ``_created`` samples.

    They would add a series per counter and histogram (their creation time) that the service has
    never exposed; the library's switch for them is process-wide, so they are left out here.
    """
    for family in families:
        family.samples = [s for s in family.samples if not s.name.endswith("_created")]
        yield family


def _ledger_gauges(summary: LedgerSummary) -> list[Metric]:
    rows = sorted(summary.destinations.items())
    per_destination = (
        ("outbox_depth", "Messages waiting for delivery.", [(n, d.pending) for n, d in rows]),
        ("dead_letters", "Messages refused for good (dead letters).", [(n, d.rejected) for n, d in rows]),
        (
            "oldest_pending_seconds",
            "Age of the oldest message waiting.",
            [(n, d.oldest_pending_age or 0.0) for n, d in rows],
        ),
    )
    families: list[Metric] = []
    for name, text, values in per_destination:
        family = GaugeMetricFamily(PREFIX + name, text, labels=["destination"])
        for destination, value in values:
            family.add_metric([destination], value)
        families.append(family)
    quarantined = "Inputs the ledger holds as quarantined, since the ledger began."
    return [*families, GaugeMetricFamily(PREFIX + "inputs_quarantined", quarantined, value=summary.quarantined)]


def _space_gauges(space: Space) -> list[Metric]:
    """1 for each full place, 0 for the others; whether intake and delivery are paused."""
    full = GaugeMetricFamily(PREFIX + "disk_full", "1 while the place has no room.", labels=["where"])
    out_of_space = space.full_places()
    for where in sorted(space.folders):
        full.add_metric([where], int(where in out_of_space))
    return [
        full,
        GaugeMetricFamily(
            PREFIX + "intake_paused", "1 while a full place pauses the intake.", int(space.intake_paused)
        ),
        GaugeMetricFamily(
            PREFIX + "delivery_paused", "1 while a full ledger pauses delivery.", int(space.delivery_paused)
        ),
    ]


class _Families(Collector):
    """Families already collected, for the library's text writer."""

    def __init__(self, families: list[Metric]) -> None:
        self.families = families

    def collect(self) -> list[Metric]:
        return self.families


class MeteredTransport:
    """A transport that tells the metrics when a message was acknowledged."""

    def __init__(self, inner: Transport, metrics: Metrics) -> None:
        self.inner = inner
        self.metrics = metrics

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        receipt = self.inner.deliver(message)
        self.metrics.note_delivered(message.destination, message.message_id)
        return receipt

    def close(self) -> None:
        self.inner.close()


class HealthServer(LoopbackServer):
    """``/healthz`` and ``/metrics`` on a loopback address, in a daemon thread.

    ``/healthz`` is 503 while a loop is stale or a place the service writes is full (``space``).
    """

    def __init__(
        self,
        host: str,
        port: int,
        metrics: Metrics,
        summary: Callable[[], LedgerSummary],
        stale_after: float,
        space: Space | None = None,
    ) -> None:
        handler = _handler(metrics, summary, stale_after, space)
        # A port taken by another program is a setting to change, said in one line.
        super().__init__(handler, port, host=host, setting="metrics_port", name="health")


def _handler(
    metrics: Metrics, summary: Callable[[], LedgerSummary], stale_after: float, space: Space | None
) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:
            if self.path == "/metrics":
                self._send(200, metrics.render(summary(), space), CONTENT_TYPE)
            elif self.path == "/healthz":
                ages = metrics.heartbeat_ages()
                stale = sorted(loop for loop, age in ages.items() if age > stale_after)
                problems = [] if ages and not stale else [f"stale: {', '.join(stale) or 'not started'}"]
                problems += space.problems() if space is not None else []
                body = "".join(line + "\n" for line in problems) or "ok\n"
                self._send(503 if problems else 200, body, "text/plain")
            else:
                self._send(404, "not found\n", "text/plain")

        def _send(self, status: int, body: str, content_type: str) -> None:
            data = body.encode()
            self.send_response(status)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(data)))
            self.end_headers()
            self.wfile.write(data)

        def log_message(self, format: str, *args: Any) -> None:
            """Silence the default per-request stderr line."""

    return Handler
