"""When an inbox file is complete, so the intake may take it (shell).

Owns:
- :func:`is_candidate` -- names never taken (hidden files, a writer's temporary names);
  which files of the inbox, to any depth, are inputs is :mod:`bridge.inputs`' rule (``accepts``);
- :class:`Readiness` -- a file is taken only when complete: closed after writing or renamed
  in (inotify events through watchdog), or, for what events miss (network shares, a missed
  event), size and modification time unchanged for ``stable_seconds`` on a periodic rescan,
  counted on a monotonic clock (a step of the wall clock neither takes a file early nor holds it);
- :func:`pair_moves_quickly` -- the one place that touches watchdog's private API.

It must not read, process or move a file: that is :mod:`bridge.service.intake`.
"""

from __future__ import annotations

import importlib
import logging
import threading
import time
from collections.abc import Callable, Iterable
from pathlib import Path, PurePath
from typing import Any

from watchdog.events import (
    FileClosedEvent,
    FileCreatedEvent,
    FileModifiedEvent,
    FileMovedEvent,
    FileSystemEvent,
    FileSystemEventHandler,
)

from bridge.inputs import in_progress

log = logging.getLogger("dlco_bridge.intake")

# watchdog holds an unpaired "moved from" event for 0.5 s to pair it with its "moved to", and
# its event thread sleeps through that wait: every rename into the inbox arrived up to 0.5 s
# late (measured in benchmarks/bench_watch.py). A rename inside one folder pairs within
# microseconds; a missed pair only means the file is taken by the stability rescan instead.
MOVE_PAIRING_SECONDS = 0.01
# Where watchdog keeps that wait: private API (watchdog 7.1, inotify backend), so guarded.
_GROUPER_MODULE = "watchdog.observers.inotify_move_event_grouper"


def pair_moves_quickly(grouper: Any = None) -> bool:
    """Set watchdog's move-pairing wait to :data:`MOVE_PAIRING_SECONDS`; whether that was possible.

    ``grouper`` is watchdog's ``InotifyMoveEventGrouper`` (a fake in tests). Its ``delay``
    is a private class attribute, read when an observer is built, so call this before
    ``Observer()``. A watchdog that moved or dropped it (another backend, a newer release)
    keeps its own wait: one warning, and the service goes on, renames seen up to 0.5 s late.
    """
    owner = _watchdog_grouper() if grouper is None else grouper
    if not isinstance(getattr(owner, "delay", None), int | float):
        log.warning(
            "cannot shorten watchdog's move-pairing wait (private API changed): renames may be seen late",
            extra={"event": "watchdog_private_api", "attribute": "InotifyMoveEventGrouper.delay"},
        )
        return False
    owner.delay = MOVE_PAIRING_SECONDS
    return True


def _watchdog_grouper() -> Any:
    try:
        module = importlib.import_module(_GROUPER_MODULE)
    except ImportError:
        return None
    return getattr(module, "InotifyMoveEventGrouper", None)


def is_candidate(path: PurePath) -> bool:
    """A file the intake may take one day: not hidden, not a writer's temporary name (bridge.inputs)."""
    return not in_progress(path.name)


class Readiness(FileSystemEventHandler):
    """Tracks inbox files until they are complete; also the watchdog event handler."""

    def __init__(
        self,
        inbox: Path,
        stable_seconds: float,
        clock: Callable[[], float],
        wake: threading.Event,
        monotonic: Callable[[], float] = time.monotonic,
        accepts: Callable[[PurePath], bool] = is_candidate,
    ):
        self.inbox = inbox
        self.accepts = accepts  # the folder rule: is a file at this path below the inbox an input?
        self.stable_seconds = stable_seconds
        self.clock = clock  # wall time: when a file was complete, for the latency it is measured from
        self.monotonic = monotonic  # how long a file has been unchanged
        self.wake = wake
        self._lock = threading.Lock()
        self._closed: dict[str, float] = {}  # name -> when (wall) a close/move-in event said complete
        self._watch: dict[str, tuple[int, int, float]] = {}  # name -> (size, mtime_ns, unchanged since: monotonic)

    # -- watchdog callbacks (observer thread) --
    def on_closed(self, event: FileSystemEvent) -> None:
        if isinstance(event, FileClosedEvent):
            self._complete(Path(str(event.src_path)))

    def on_moved(self, event: FileSystemEvent) -> None:
        if isinstance(event, FileMovedEvent):
            self._complete(Path(str(event.dest_path)))

    def on_created(self, event: FileSystemEvent) -> None:
        if isinstance(event, FileCreatedEvent):
            self.wake.set()

    def on_modified(self, event: FileSystemEvent) -> None:
        if isinstance(event, FileModifiedEvent):
            with self._lock:
                path = Path(str(event.src_path))
                if path.is_relative_to(self.inbox):
                    self._closed.pop(path.relative_to(self.inbox).as_posix(), None)

    def _complete(self, path: Path) -> None:
        try:
            relative = path.relative_to(self.inbox)  # in a sub-folder too: the inbox is read to any depth
        except ValueError:
            return
        if self.accepts(relative):
            with self._lock:
                self._closed[relative.as_posix()] = self.clock()
            self.wake.set()

    # -- intake thread --
    def ready(self, names: Iterable[str]) -> list[tuple[Path, float]]:
        """The files of ``names`` (paths relative to the inbox, ``/``-separated) that are complete, with since when."""
        now, since = self.clock(), self.monotonic()
        done: list[tuple[Path, float]] = []
        for name in sorted(names):
            path = self.inbox / name
            try:
                stat = path.stat()
            except FileNotFoundError:
                self.forget(name)
                continue
            with self._lock:
                closed_at = self._closed.get(name)
                seen = self._watch.get(name)
                if seen is None or seen[:2] != (stat.st_size, stat.st_mtime_ns):
                    self._watch[name] = (stat.st_size, stat.st_mtime_ns, since)
                    stable = False
                else:
                    stable = since - seen[2] >= self.stable_seconds
            if closed_at is not None:
                # The rename or last write (ctime) is when a sender sees the file complete.
                done.append((path, stat.st_ctime if 0 <= closed_at - stat.st_ctime < 5 else closed_at))
            elif stable:
                done.append((path, now))
        return done

    def forget(self, name: str) -> None:
        with self._lock:
            self._closed.pop(name, None)
            self._watch.pop(name, None)
