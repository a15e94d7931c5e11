"""The watch-folder service: intake loop, delivery loop, health endpoint, graceful stop (shell).

Owns: wiring :mod:`bridge.service.watcher` (when a file is complete), :mod:`bridge.service.intake`
(what becomes of it), :mod:`bridge.service.delivery` (outbox to transports) and
:mod:`bridge.service.metrics` (health, metrics) together, in two threads: intake must stay
responsive while a receiver is slow or down, and delivery must go on while a burst of files
arrives. A stop request (SIGTERM/SIGINT) lets the file and the message in flight finish.
Transports and the ledger are built by the CLI and passed in.
"""

from __future__ import annotations

import logging
import os
import random
import threading
import time
from collections.abc import Callable, Mapping
from pathlib import Path

from watchdog.observers import Observer

from bridge.pipeline import PipelineSettings
from bridge.service.delivery import Backoff, deliver_due
from bridge.service.files import remove_strays
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import HealthServer, MeteredTransport, Metrics
from bridge.service.settings import ServiceSettings
from bridge.service.transports.base import Transport
from bridge.service.watcher import Readiness, is_candidate, pair_moves_quickly
from bridge.tables import Tables
from bridge.tables.field_map_model import MapChoice

log = logging.getLogger("dlco_bridge.service")

IDLE_WAIT_SECONDS = 0.25  # longest sleep of either loop when nothing wakes it
PRUNE_EVERY_SECONDS = 86_400.0  # automatic retention runs at start and then once a day


class Service:
    """One running bridge: call :meth:`run` (blocks until ``stop`` is set)."""

    def __init__(
        self,
        settings: ServiceSettings,
        pipeline: PipelineSettings,
        maps: MapChoice,
        tables: Tables,
        ledger: Ledger,
        transports: Mapping[str, Transport],
        clock: Callable[[], float] = time.time,
        rand: Callable[[], float] = random.random,
        stop: threading.Event | None = None,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.rand = rand
        self.stop = stop or threading.Event()  # the CLI passes the one its signal handlers set
        self.files_arrived = threading.Event()
        self.messages_queued = threading.Event()
        self.metrics = Metrics(clock)
        self.transports = {name: MeteredTransport(t, self.metrics) for name, t in transports.items()}
        self.readiness = Readiness(self.settings.inbox, self.settings.stable_seconds, clock, self.files_arrived)
        self.intake = Intake(settings, pipeline, maps, tables, ledger, self.metrics, clock, self.messages_queued.set)
        self.backoff = Backoff(self.settings.retry_base_seconds, self.settings.retry_cap_seconds)
        self._unmovable: dict[str, tuple[int, int]] = {}
        self.addresses = {d.name: d.address for d in self.settings.destinations}
        self._next_prune = 0.0
        self.health: HealthServer | None = None

    def run(self) -> None:
        """Watch, process and deliver until :attr:`stop` is set; then finish what is in flight."""
        self._start_health()  # first: a port in use stops the start before anything runs
        for folder in (self.settings.inbox, self.settings.archive, self.settings.quarantine):
            folder.mkdir(parents=True, exist_ok=True)
        self._remove_strays()
        self._log_start()
        pair_moves_quickly()  # before Observer(): watchdog reads the wait when it is built
        observer = Observer()
        observer.schedule(self.readiness, str(self.settings.inbox), recursive=False)
        observer.start()
        delivery = threading.Thread(target=self._delivery_loop, name="delivery", daemon=True)
        delivery.start()
        log.info("service started", extra={"event": "started", "inbox": str(self.settings.inbox)})
        try:
            self._intake_loop()
        finally:
            self.stop.set()
            self.messages_queued.set()
            delivery.join()
            observer.stop()
            observer.join(timeout=5)
            if self.health is not None:
                self.health.stop()
            for transport in self.transports.values():
                transport.close()
            log.info("service stopped", extra={"event": "stopped"})

    def _own_folders(self) -> list[Path]:
        """Where the service writes atomically: the quarantine, file destinations and the archive.

        Of the archive only the two newest day folders (and their ``duplicates/``) are looked at:
        a crash leaves its temporary file in the folder of the day it happened, the last run's,
        and years of archive are not walked at every start.
        """
        folders = [self.settings.archive, self.settings.quarantine]
        folders += [d.folder for d in self.settings.destinations if d.folder is not None]
        days = sorted(p for p in self.settings.archive.glob("????-??-??") if p.is_dir())[-2:]
        return folders + [f for day in days for f in (day, day / "duplicates")]

    def _remove_strays(self) -> None:
        """Temporary files of writes a crash cut short: never complete, never read; removed."""
        for folder in self._own_folders():
            for path in remove_strays(folder):
                log.info("stray temporary file removed", extra={"event": "stray_removed", "file": str(path)})

    def _log_start(self) -> None:
        """What this service reads, writes and talks to, one line each, before it starts."""
        health = f"http://{self.settings.metrics_host}:{self.health.port}/healthz" if self.health is not None else "off"
        log.info(
            "service starting",
            extra={"event": "starting", "ledger": str(self.settings.ledger_path), "health": health},
        )
        for d in self.settings.destinations:
            log.info(
                "destination",
                extra={"event": "destination", "destination": d.name, "transport": d.transport, "address": d.address},
            )

    def request_stop(self) -> None:
        """Ask the loops to stop after the file and message in flight (signal-safe)."""
        self.stop.set()
        self.files_arrived.set()
        self.messages_queued.set()

    def _start_health(self) -> None:
        if not self.settings.metrics_port:
            return
        self.health = HealthServer(
            self.settings.metrics_host,
            self.settings.metrics_port,
            self.metrics,
            self.ledger.summary,
            stale_after=max(30.0, 3 * self.settings.rescan_seconds),
        )
        self.health.start()

    def _intake_loop(self) -> None:
        next_scan = 0.0
        while not self.stop.is_set():
            self.metrics.heartbeat("intake")
            now = self.clock()
            if now >= next_scan or self.files_arrived.is_set():
                self.files_arrived.clear()
                self.scan_once()
                next_scan = now + min(self.settings.rescan_seconds, max(self.settings.stable_seconds, 0.05))
            self.files_arrived.wait(IDLE_WAIT_SECONDS)

    def scan_once(self) -> int:
        """Take every complete file in the inbox once; return how many were taken."""
        names = [e.name for e in os.scandir(self.settings.inbox) if e.is_file() and is_candidate(Path(e.name))]
        taken = 0
        for path, complete_at in self.readiness.ready(n for n in names if not self._is_unmovable(n)):
            if self.stop.is_set():
                break
            try:
                self.intake.take(path, complete_at)
            except OSError as exc:
                # The file cannot be read or moved (permissions, a share gone): leave it,
                # say so once, and look again when it changes.
                self._remember_unmovable(path)
                log.error("input left in place", extra={"event": "stuck", "file": path.name, "reason": str(exc)})
            self.readiness.forget(path.name)
            taken += 1
        return taken

    def _is_unmovable(self, name: str) -> bool:
        seen = self._unmovable.get(name)
        if seen is None:
            return False
        try:
            stat = (self.settings.inbox / name).stat()
        except OSError:
            return True
        if (stat.st_size, stat.st_mtime_ns) != seen:
            del self._unmovable[name]
            return False
        return True

    def _remember_unmovable(self, path: Path) -> None:
        try:
            stat = path.stat()
        except OSError:
            return
        self._unmovable[path.name] = (stat.st_size, stat.st_mtime_ns)

    def _between_messages(self) -> bool:
        """Beat the delivery heartbeat (a long backlog is work, not a hang); whether to stop."""
        self.metrics.heartbeat("delivery")
        return self.stop.is_set()

    def _delivery_loop(self) -> None:
        while not self.stop.is_set():
            self.metrics.heartbeat("delivery")
            self.messages_queued.clear()
            deliver_due(
                self.ledger,
                self.transports,
                self.clock,
                self.rand,
                backoff=self.backoff,
                should_stop=self._between_messages,
                addresses=self.addresses,
            )
            self.prune_when_due()
            self.messages_queued.wait(IDLE_WAIT_SECONDS)

    def prune_when_due(self) -> None:
        """Automatic retention (``retention_days`` > 0): prune at start, then once a day; no VACUUM."""
        days = self.settings.retention_days
        now = self.clock()
        if days <= 0 or now < self._next_prune:
            return
        self._next_prune = now + PRUNE_EVERY_SECONDS
        # Freed pages are reused by later writes, so the file stops growing without a VACUUM,
        # which would hold every writer for as long as it rewrites the file.
        result = self.ledger.prune(days, self.settings.duplicate_memory_days)
        log.info(
            "ledger pruned",
            extra={
                "event": "pruned",
                "payloads": result.payloads,
                "messages": result.messages,
                "inputs": result.inputs,
                "ledger_bytes": result.bytes_after,
            },
        )
