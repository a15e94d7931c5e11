"""The watch-folder service: intake loop, delivery loop, health endpoint, graceful stop (shell).

Owns: wiring :mod:`bridge.service.watcher` (when a file is complete), :mod:`bridge.service.intake`
(what becomes of it), :mod:`bridge.service.delivery` (outbox to transports) and
:mod:`bridge.service.metrics` (health, metrics) together, in two threads: intake must stay
responsive while a receiver is slow or down, and delivery must go on while a burst of files
arrives. A stop request (SIGTERM/SIGINT) lets the file and the message in flight finish.
Transports and the ledger are built by the CLI and passed in.

Faults it rides out rather than stopping: a full disk (:mod:`bridge.service.space`: intake paused,
and delivery too when it is the ledger's disk, until space returns) and a step of the wall clock
(waits, settle times and heartbeats are on the monotonic clock; due times in the ledger are wall
time, so a step seen while running moves them by as much, and none stays further away than the
back-off cap).
"""

from __future__ import annotations

import logging
import random
import threading
import time
from collections.abc import Callable, Mapping
from pathlib import Path

from watchdog.observers import Observer

from bridge.errors import DiskFull
from bridge.inputs import HIDDEN, TEMPORARY, find_inputs, is_input
from bridge.pipeline import PipelineSettings
from bridge.service.delivery import Backoff, deliver_due
from bridge.service.files import Disk, remove_strays
from bridge.service.folders import check_folders
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import HealthServer, MeteredTransport, Metrics
from bridge.service.settings import ServiceSettings
from bridge.service.space import Space, SpaceWatchedTransport
from bridge.service.transports.base import Transport
from bridge.service.watcher import Readiness, pair_moves_quickly
from bridge.tables import Tables
from bridge.tables.field_map_model import MapChoice

log = logging.getLogger("dlco_bridge.service")

IDLE_WAIT_SECONDS = 0.25  # longest sleep of either loop when nothing wakes it
PRUNE_EVERY_SECONDS = 86_400.0  # automatic retention runs at start and then once a day
# A wall clock that moved this much more (or less) than the monotonic clock between two looks
# was stepped (an NTP step, a mistaken time zone or DST change), not slewed.
CLOCK_STEP_SECONDS = 2.0


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
        *,
        monotonic: Callable[[], float] = time.monotonic,
        disk: Disk | None = None,
        created: tuple[Path, ...] = (),
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock  # wall time: what the ledger records, and due times
        self.monotonic = monotonic  # waits, settle times, heartbeats, probes
        self.rand = rand
        self.stop = stop or threading.Event()  # the CLI passes the one its signal handlers set
        self.files_arrived = threading.Event()
        self.messages_queued = threading.Event()
        self.metrics = Metrics(clock, monotonic)
        disk = disk or Disk()
        self.space = Space(self._places(), disk, monotonic, probe_every=self.settings.rescan_seconds)
        self.transports = {name: self._watched(name, t) for name, t in transports.items()}
        self.intake = Intake(
            settings, pipeline, maps, tables, ledger, self.metrics, clock, self.messages_queued.set, disk=disk
        )
        self.readiness = Readiness(
            self.settings.inbox,
            self.settings.stable_seconds,
            clock,
            self.files_arrived,
            monotonic,
            accepts=lambda relative: is_input(relative, self.intake.maps),
        )
        self._skipped: set[str] = set()  # inbox files that are not inputs, said once each
        self.backoff = Backoff(self.settings.retry_base_seconds, self.settings.retry_cap_seconds)
        self._unmovable: dict[str, tuple[int, int]] = {}
        self.addresses = {d.name: d.address for d in self.settings.destinations}
        self._next_prune = 0.0
        self._clock_mark: tuple[float, float] | None = None  # (wall, monotonic) at the last look
        self.health: HealthServer | None = None
        self.created = created  # folders made for it before it ran (the state folder): said at start

    def _places(self) -> dict[str, Path]:
        """Where the service writes, by the name the disk-full state gives each."""
        service = self.settings
        places = {"ledger": service.state, "archive": service.archive, "quarantine": service.quarantine}
        places |= {f"destination:{d.name}": d.folder for d in self.settings.destinations if d.folder is not None}
        return places

    def _watched(self, name: str, transport: Transport) -> Transport:
        """The transport, metered; a file destination's also reports its folder full or free."""
        metered: Transport = MeteredTransport(transport, self.metrics)
        if f"destination:{name}" in self.space.folders:
            return SpaceWatchedTransport(metered, self.space, f"destination:{name}")
        return metered

    def run(self) -> None:
        """Watch, process and deliver until :attr:`stop` is set; then finish what is in flight."""
        self._start_health()  # first: a port in use stops the start before anything runs
        check_folders(self.settings)
        created = list(self.created)
        for folder in (self.settings.archive, self.settings.quarantine):
            if not folder.is_dir():
                folder.mkdir(parents=True)
                created.append(folder)
        for folder in created:
            log.info("folder created", extra={"event": "folder_created", "folder": str(folder)})
        self._remove_strays()
        self._log_start()
        self._clamp_due_times()
        pair_moves_quickly()  # before Observer(): watchdog reads the wait when it is built
        observer = Observer()
        observer.schedule(self.readiness, str(self.settings.inbox), recursive=True)  # the inbox to any depth
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
            space=self.space,
        )
        self.health.start()

    def _intake_loop(self) -> None:
        next_scan = 0.0
        while not self.stop.is_set():
            self.metrics.heartbeat("intake")
            self.space.look_again()
            if self.space.intake_paused:
                # A place is full: new files stay in the inbox, untouched (and still known complete).
                self.stop.wait(IDLE_WAIT_SECONDS)
                continue
            now = self.monotonic()
            if now >= next_scan or self.files_arrived.is_set():
                self.files_arrived.clear()
                self.scan_once()
                next_scan = now + min(self.settings.rescan_seconds, max(self.settings.stable_seconds, 0.05))
            self.files_arrived.wait(IDLE_WAIT_SECONDS)

    def scan_once(self) -> int:
        """Take every complete file in the inbox (to any depth) once; return how many were taken."""
        names = self._inbox_inputs()
        taken = 0
        for path, complete_at in self.readiness.ready(n for n in names if not self._is_unmovable(n)):
            if self.stop.is_set():
                break
            try:
                self.intake.take(path, complete_at)
            except DiskFull as exc:
                # Nothing half done: the file stays, still known complete, and is taken when space returns.
                self.space.full(exc.where, exc.detail)
                break
            except OSError as exc:
                # The file cannot be read or moved (permissions, a share gone): leave it,
                # say so once, and look again when it changes.
                self._remember_unmovable(path)
                log.error("input left in place", extra={"event": "stuck", "file": self._relative(path),
                                                        "reason": str(exc)})  # fmt: skip
            self.readiness.forget(self._relative(path))
            taken += 1
        return taken

    def _inbox_inputs(self) -> list[str]:
        """The inputs in the inbox, as paths relative to it (the one folder rule, bridge.inputs).

        A file that is not an export (README.txt, Thumbs.db, a stray bridge.toml) is left where
        it is, logged once and counted; hidden and temporary names are files still being written.
        """
        inbox = self.settings.inbox
        names: list[str] = []
        skipped: set[str] = set()
        for found in find_inputs([inbox], self.intake.maps):
            relative = found.path.relative_to(inbox).as_posix() if found.path != inbox else ""
            if found.skipped is None:
                if relative:
                    names.append(relative)
            elif found.skipped not in (HIDDEN, TEMPORARY):
                skipped.add(relative)
                if relative not in self._skipped:
                    self.metrics.count("files_skipped")
                    log.info("not an input: left in the inbox", extra={"event": "skipped", "file": relative,
                                                                          "reason": found.skipped})  # fmt: skip
        self._skipped = skipped
        return names

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
        self._unmovable[self._relative(path)] = (stat.st_size, stat.st_mtime_ns)

    def _relative(self, path: Path) -> str:
        """How the inbox's bookkeeping names a file: its path below the inbox, ``/``-separated."""
        return path.relative_to(self.settings.inbox).as_posix()

    def _between_messages(self) -> bool:
        """Beat the delivery heartbeat (a long backlog is work, not a hang); whether to stop."""
        self.metrics.heartbeat("delivery")
        return self.stop.is_set()

    def _delivery_loop(self) -> None:
        while not self.stop.is_set():
            self.metrics.heartbeat("delivery")
            self.messages_queued.clear()
            self.space.look_again()
            if not self.space.delivery_paused:
                # A delivery the ledger cannot record would be sent again: none while it is full.
                try:
                    self._follow_the_clock()
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
                except DiskFull as exc:
                    self.space.full(exc.where, exc.detail)
            self.messages_queued.wait(IDLE_WAIT_SECONDS)

    def _clamp_due_times(self) -> None:
        """At start: no due time further away than the back-off cap (a clock set back while stopped)."""
        try:
            clamped = self.ledger.clamp_due(self.clock() + self.backoff.cap)
        except DiskFull as exc:
            self.space.full(exc.where, exc.detail)
            return
        if clamped:
            log.warning(
                "due times beyond the back-off cap brought forward (the clock was set back?)",
                extra={"event": "due_clamped", "messages": clamped, "cap_s": self.backoff.cap},
            )

    def _follow_the_clock(self) -> None:
        """A step of the wall clock since the last look moves pending due times by as much, then clamps them.

        So a message keeps the wait it had: a step forward makes no burst of retries, a step back no
        message stuck for the length of the step.
        """
        wall, mono = self.clock(), self.monotonic()
        mark = self._clock_mark
        step = 0.0 if mark is None else (wall - mark[0]) - (mono - mark[1])
        if mark is None or abs(step) < CLOCK_STEP_SECONDS:
            self._clock_mark = (wall, mono)
            return
        # Due times set on the old clock lie between the last look and the cap after now on that
        # clock; those set on the new one (a retry or an input taken since the step) are not moved.
        old_now = mark[0] + (mono - mark[1])
        shifted = self.ledger.shift_due(step, after=mark[0], until=old_now + self.backoff.cap)
        clamped = self.ledger.clamp_due(wall + self.backoff.cap)
        self._clock_mark = (wall, mono)  # only once recorded: a full ledger keeps the step for later
        log.warning(
            "wall clock stepped: pending due times moved with it",
            extra={"event": "clock_step", "step_s": round(step, 1), "moved": shifted, "clamped": clamped},
        )

    def prune_when_due(self) -> None:
        """Automatic retention (``retention_days`` > 0): prune at start, then once a day; no VACUUM."""
        days = self.settings.retention_days
        now = self.monotonic()
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
