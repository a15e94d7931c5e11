"""Counters, delivery latency, and the loopback health/metrics endpoint (shell).

Owns: thread-safe counters the service increments, the file-close-to-acknowledgement latency
of each message (noted at enqueue, measured at delivery by :class:`MeteredTransport`), their
Prometheus text rendering, and a tiny HTTP server on a loopback address serving
``/healthz`` and ``/metrics``. No patient data is ever put in a label.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Mapping
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from bridge.errors import ConfigError
from bridge.service.ledger import LedgerSummary
from bridge.service.space import Space
from bridge.service.transports.base import DeliveryReceipt, OutgoingMessage, Transport

# Latency buckets in seconds (Prometheus histogram "le" bounds).
LATENCY_BUCKETS = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0)
# files_failed_internal: quarantined because processing raised something other than an
# InputError (a bug the file exposed); they are counted in files_quarantined as well.
# records_quarantined: sessions a field map refused in a file whose other sessions went on.
# files_skipped: inbox files that are not exports (bridge.inputs, the skip rule), left in place.
COUNTERS = (
    "files_seen",
    "files_processed",
    "files_quarantined",
    "files_failed_internal",
    "files_duplicate",
    "corrections",
    "records_quarantined",
    "files_skipped",
)


class Metrics:
    """What the service has done since it started, safe to update from several threads.

    Heartbeats are on the ``monotonic`` clock, so a step of the wall clock never makes a loop
    look stale (or fresh); latency is wall time, from when a file was complete.
    """

    def __init__(self, clock: Callable[[], float], monotonic: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._monotonic = monotonic
        self._lock = threading.Lock()
        self.counts = dict.fromkeys(COUNTERS, 0)
        self._started: dict[str, float] = {}  # message id -> when its input was complete
        self._buckets: dict[str, list[int]] = {}
        self._sums: dict[str, float] = {}
        self._measured: dict[str, int] = {}
        self._delivered: dict[str, int] = {}
        self._heartbeats: dict[str, float] = {}

    def count(self, name: str) -> None:
        with self._lock:
            self.counts[name] += 1

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
        with self._lock:
            self._delivered[destination] = self._delivered.get(destination, 0) + 1
            started = self._started.pop(message_id, None)
            if started is None:
                return  # enqueued before a restart: no start time to measure from
            latency = max(0.0, now - started)
            buckets = self._buckets.setdefault(destination, [0] * len(LATENCY_BUCKETS))
            for i, bound in enumerate(LATENCY_BUCKETS):
                if latency <= bound:
                    buckets[i] += 1
            self._sums[destination] = self._sums.get(destination, 0.0) + latency
            self._measured[destination] = self._measured.get(destination, 0) + 1

    def render(self, summary: LedgerSummary) -> str:
        """Prometheus text exposition format (version 0.0.4)."""
        lines: list[str] = []
        with self._lock:
            for name in COUNTERS:
                metric = f"dlco_bridge_{name}_total"
                lines += [f"# TYPE {metric} counter", f"{metric} {self.counts[name]}"]
            lines += _per_destination("dlco_bridge_delivered_total", "counter", self._delivered)
            lines.append("# TYPE dlco_bridge_delivery_latency_seconds histogram")
            for destination, buckets in sorted(self._buckets.items()):
                label = _label(destination)
                for bound, count in zip(LATENCY_BUCKETS, buckets, strict=True):
                    lines.append(f'dlco_bridge_delivery_latency_seconds_bucket{{{label},le="{bound}"}} {count}')
                total = self._measured[destination]
                lines.append(f'dlco_bridge_delivery_latency_seconds_bucket{{{label},le="+Inf"}} {total}')
                lines.append(f"dlco_bridge_delivery_latency_seconds_sum{{{label}}} {self._sums[destination]:.6f}")
                lines.append(f"dlco_bridge_delivery_latency_seconds_count{{{label}}} {total}")
        depth = {name: d.pending for name, d in summary.destinations.items()}
        rejected = {name: d.rejected for name, d in summary.destinations.items()}
        oldest = {name: d.oldest_pending_age or 0.0 for name, d in summary.destinations.items()}
        lines += _per_destination("dlco_bridge_outbox_depth", "gauge", depth)
        lines += _per_destination("dlco_bridge_dead_letters", "gauge", rejected)
        lines += _per_destination("dlco_bridge_oldest_pending_seconds", "gauge", oldest)
        lines += [
            "# TYPE dlco_bridge_inputs_quarantined gauge",
            f"dlco_bridge_inputs_quarantined {summary.quarantined}",
        ]
        return "\n".join(lines) + "\n"


def _label(destination: str) -> str:
    escaped = destination.replace("\\", "\\\\").replace('"', '\\"')
    return f'destination="{escaped}"'


def _per_destination(metric: str, kind: str, values: Mapping[str, float]) -> list[str]:
    lines = [f"# TYPE {metric} {kind}"]
    lines += [f"{metric}{{{_label(name)}}} {value:g}" for name, value in sorted(values.items())]
    return lines


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


class HealthServer:
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
        try:
            self.server = ThreadingHTTPServer((host, port), handler)
        except OSError as exc:
            # A port taken by another program is a setting to change, said in one line.
            raise ConfigError("metrics_port", f"a free port on {host}, got {port} ({exc.strerror or exc})") from exc
        self.thread = threading.Thread(target=self.server.serve_forever, name="health", daemon=True)

    @property
    def port(self) -> int:
        return int(self.server.server_address[1])

    def start(self) -> None:
        self.thread.start()

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def _handler(
    metrics: Metrics, summary: Callable[[], LedgerSummary], stale_after: float, space: Space | None
) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:
            if self.path == "/metrics":
                text = metrics.render(summary()) + (space.render() if space is not None else "")
                self._send(200, text, "text/plain; version=0.0.4")
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
