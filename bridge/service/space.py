"""Disk full as a state of the service, not a crash (shell).

Owns :class:`Space`: the places the service writes (``ledger``, ``archive``, ``quarantine``,
``destination:<name>`` for a file destination), which of them are out of space, since when and
why; one log line when a place fills and one when it has room again (never one per attempt);
what ``/healthz`` and ``/metrics`` say of it; and looking again, at most once per ``probe_every``
seconds, whether a full place has :data:`RESUME_FREE_BYTES` free. And :class:`SpaceWatchedTransport`,
which tells it when a file destination's folder fills or takes a message again.

What a full place pauses is decided here too: any full place pauses the intake (new files stay in
the inbox, untouched); a full ledger also pauses delivery, because a delivery it cannot record
would be sent again. It must not write files, open the ledger or deliver.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

from bridge.errors import DestinationFull
from bridge.service.files import ROOM_BYTES, Disk
from bridge.service.transports.base import DeliveryReceipt, OutgoingMessage, Transport

log = logging.getLogger("dlco_bridge.service")

RESUME_FREE_BYTES = ROOM_BYTES  # how much room a full place needs before the service tries it again


@dataclass(frozen=True, slots=True)
class Shortage:
    """One full place: since when (monotonic seconds) and the error that said so."""

    since: float
    reason: str


class Space:
    """Which of the service's places are full; thread-safe (both loops report and look)."""

    def __init__(
        self,
        folders: Mapping[str, Path],
        disk: Disk,
        monotonic: Callable[[], float],
        probe_every: float,
    ) -> None:
        self.folders = dict(folders)
        self.disk = disk
        self.monotonic = monotonic
        self.probe_every = probe_every
        self._lock = threading.Lock()
        self._full: dict[str, Shortage] = {}
        self._next_look = 0.0

    @property
    def intake_paused(self) -> bool:
        with self._lock:
            return bool(self._full)

    @property
    def delivery_paused(self) -> bool:
        with self._lock:
            return "ledger" in self._full

    def full(self, where: str, reason: str) -> None:
        """``where`` has no space left; logged once, when it becomes so."""
        now = self.monotonic()
        with self._lock:
            if where in self._full:
                return
            self._full[where] = Shortage(now, reason)
            self._next_look = now + self.probe_every
            paused = "intake and delivery paused" if "ledger" in self._full else "intake paused"
        log.error(
            f"no space left: {paused} until space returns",
            extra={"event": "disk_full", "where": where, "folder": str(self.folders.get(where, "")), "reason": reason},
        )

    def freed(self, where: str, how: str) -> None:
        """``where`` has room again (``how``: what showed it); logged once, when it becomes so."""
        now = self.monotonic()
        with self._lock:
            shortage = self._full.pop(where, None)
            if shortage is None:
                return
            still = sorted(self._full)
        log.warning(
            "space again: " + (f"still full: {', '.join(still)}" if still else "intake and delivery resumed"),
            extra={"event": "disk_space_again", "where": where, "how": how, "paused_s": round(now - shortage.since, 1)},
        )

    def look_again(self) -> None:
        """For each full place, at most once per ``probe_every``: free it if its folder has room again."""
        now = self.monotonic()
        with self._lock:
            if not self._full or now < self._next_look:
                return
            self._next_look = now + self.probe_every
            places = list(self._full)
        for where in places:
            folder = self.folders.get(where)
            if folder is None:
                continue
            try:
                free = self.disk.free_bytes(folder)
            except OSError:
                continue  # the folder cannot be looked at now: look again next time
            if free >= RESUME_FREE_BYTES:
                self.freed(where, f"{free} bytes free")

    def problems(self) -> list[str]:
        """One line per full place, for ``/healthz``."""
        with self._lock:
            full = sorted(self._full.items())
        return [f"disk full: {where} ({self.folders.get(where, '')}): {s.reason}" for where, s in full]

    def full_places(self) -> frozenset[str]:
        """The places out of space now (``/metrics`` says 1 for these, 0 for the other folders)."""
        with self._lock:
            return frozenset(self._full)


class SpaceWatchedTransport:
    """A file destination's transport that reports its folder full (and free again) to :class:`Space`."""

    def __init__(self, inner: Transport, space: Space, where: str) -> None:
        self.inner = inner
        self.space = space
        self.where = where

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        try:
            receipt = self.inner.deliver(message)
        except DestinationFull as exc:
            self.space.full(self.where, exc.detail)
            raise
        self.space.freed(self.where, "a message was written")
        return receipt

    def close(self) -> None:
        self.inner.close()
