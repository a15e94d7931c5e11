"""Disk full is a state, not a crash: each place the service writes, filled in turn, pauses and resumes it.

In process, with the seams the service offers: a :class:`~bridge.service.files.Disk` whose writes
under a "full" folder fail with ``OSError(ENOSPC)`` and which reports no free space there, and a
SQLite connection class whose writes fail as SQLite does on a full disk (``SQLITE_FULL``, "database
or disk is full"). Nothing is patched. ``test_disk_full_tmpfs.py`` does the same on a real,
small file system. All data is invented.
"""

from __future__ import annotations

import errno
import logging
import os
import sqlite3
import threading
import urllib.error
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

from bridge.config import parse_settings
from bridge.service.files import Disk
from bridge.service.ledger import Ledger
from bridge.service.metrics import HealthServer
from bridge.service.runner import Service
from bridge.service.transports.file import FileTransport
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables
from tests.service.conftest import MALFORMED, drop, make_input, samples, wait_until
from tests.shell.conftest import LOOPBACK

# source: SQLite result codes (sqlite.org/rescode.html), SQLITE_FULL = 13 "database or disk is full"
SQLITE_FULL = 13
WRITES = ("INSERT", "UPDATE", "DELETE", "REPLACE")


class FillableDisk(Disk):
    """The real file system, except that folders the test fills take no more bytes."""

    def __init__(self) -> None:
        self.full: set[Path] = set()
        self.lock = threading.Lock()

    def fill(self, folder: Path) -> None:
        with self.lock:
            self.full.add(folder)

    def empty(self, folder: Path) -> None:
        with self.lock:
            self.full.discard(folder)

    def is_full(self, path: Path) -> bool:
        with self.lock:
            return any(path == folder or folder in path.parents for folder in self.full)

    def _refuse(self, target: Path) -> None:
        if self.is_full(target):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(target))

    def write_atomically(self, target: Path, data: bytes) -> None:
        self._refuse(target)
        super().write_atomically(target, data)

    def move_durably(self, source: Path, target: Path) -> Path:
        self._refuse(target)
        return super().move_durably(source, target)

    def free_bytes(self, folder: Path) -> int:
        return 0 if self.is_full(folder) else 1 << 30

    def connection_class(self, state: Path) -> type[sqlite3.Connection]:
        """A SQLite connection whose writes fail as on a full disk while ``state`` is full."""
        disk = self

        class Connection(sqlite3.Connection):
            def execute(self, sql: str, parameters: Any = (), /) -> sqlite3.Cursor:
                if disk.is_full(state) and sql.lstrip().upper().startswith(WRITES):
                    error = sqlite3.OperationalError("database or disk is full")
                    error.sqlite_errorcode = SQLITE_FULL  # as the sqlite3 module sets it
                    raise error
                return super().execute(sql, parameters)

        return Connection


def get(url: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=5) as answer:
            return int(answer.status), answer.read().decode()
    except urllib.error.HTTPError as error:
        return int(error.code), error.read().decode()


class Running:
    """An in-process service with one file destination, its health endpoint, and the fillable disk."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.disk = FillableDisk()
        self.full_settings = parse_settings(
            'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\nmetrics_port = 0\n'
            "stable_seconds = 0.1\nrescan_seconds = 0.2\nretry_base_seconds = 0.05\nretry_cap_seconds = 0.5\n"
            '[destination.drop]\npayload = "hl7"\ntransport = "file"\nfolder = "out"\n',
            {},
            base=root,
        )
        self.settings = self.full_settings.require_service()
        self.settings.inbox.mkdir(parents=True)
        self.out = root / "out"
        self.out.mkdir()  # a file destination's folder must exist at start (issue 19.6)
        self.folders = {
            "ledger": self.settings.state,
            "archive": self.settings.archive,
            "quarantine": self.settings.quarantine,
            "destination:drop": self.out,
        }

    @contextmanager
    def running(self) -> Iterator[Running]:
        factory = self.disk.connection_class(self.settings.state)
        with Ledger.open(self.settings.ledger_path, factory=factory) as ledger:
            self.ledger = ledger
            transports = {"drop": FileTransport(self.out, disk=self.disk)}
            self.service = Service(
                self.settings,
                self.full_settings.pipeline,
                MapChoice(),
                load_tables(),
                ledger,
                transports,
                disk=self.disk,
            )
            self.service.health = HealthServer(
                LOOPBACK, 0, self.service.metrics, ledger.summary, stale_after=30.0, space=self.service.space
            )
            self.service.health.start()
            runner = threading.Thread(target=self.service.run)
            runner.start()
            try:
                wait_until(lambda: self.service.metrics.heartbeat_ages(), "the loops running")
                yield self
            finally:
                self.service.request_stop()
                runner.join(timeout=30)
        assert not runner.is_alive()

    def healthz(self) -> tuple[int, str]:
        assert self.service.health is not None
        return get(f"http://{LOOPBACK}:{self.service.health.port}/healthz")

    def metric(self, sample: str) -> float:
        assert self.service.health is not None
        _, text = get(f"http://{LOOPBACK}:{self.service.health.port}/metrics")
        return samples(text)[sample]

    def inbox(self) -> dict[str, bytes]:
        return {p.name: p.read_bytes() for p in self.settings.inbox.iterdir()}

    def delivered(self) -> list[str]:
        return sorted(p.name for p in self.out.iterdir() if not p.name.startswith(".")) if self.out.exists() else []

    def archived(self) -> list[str]:
        folder = self.settings.archive
        return sorted(p.name for p in folder.rglob("*") if p.is_file()) if folder.exists() else []

    def quarantined(self) -> list[str]:
        folder = self.settings.quarantine
        return sorted(p.name for p in folder.iterdir() if not p.name.endswith(".error.json")) if folder.exists() else []


def state_changes(caplog: pytest.LogCaptureFixture) -> list[tuple[str, str]]:
    return [
        (str(r.__dict__["event"]), str(r.__dict__["where"]))
        for r in caplog.records
        if r.__dict__.get("event") in ("disk_full", "disk_space_again")
    ]


@pytest.mark.parametrize("where", ["ledger", "archive", "quarantine", "destination:drop"])
def test_a_full_place_pauses_intake_reports_unhealthy_and_resumes_by_itself(
    tmp_path: Path, caplog: pytest.LogCaptureFixture, where: str
) -> None:
    """ENOSPC at one write site: new files stay in the inbox, /healthz says why, one log line each way, nothing lost."""
    caplog.set_level(logging.INFO, logger="dlco_bridge")
    site = Running(tmp_path)
    bad = where == "quarantine"  # the quarantine is written only for a file that goes there
    second = make_input("FULL-0002", "FICT-7102", template=MALFORMED) if bad else make_input("FULL-0002", "FICT-7102")
    third = make_input("FULL-0003", "FICT-7103")
    with site.running():
        drop(site.settings.inbox, "first.json", make_input("FULL-0001", "FICT-7101"))
        wait_until(lambda: len(site.delivered()) == 1 and site.archived(), "the first file through")

        site.disk.fill(site.folders[where])
        drop(site.settings.inbox, "second.json", second)
        status, body = wait_until(lambda: (s := site.healthz())[0] == 503 and s, "/healthz to say the disk is full")
        if where == "archive":  # committed before the move: delivered although the file waits in the inbox
            wait_until(lambda: len(site.delivered()) == 2, "the second file's message delivered")
        drop(site.settings.inbox, "third.json", third)
        wait_until(lambda: "third.json" in site.inbox(), "the third file in the inbox")
        paused = {
            "gauge": site.metric(f'dlco_bridge_disk_full{{where="{where}"}}'),
            "intake": site.metric("dlco_bridge_intake_paused"),
            "delivery": site.metric("dlco_bridge_delivery_paused"),
        }
        threading.Event().wait(1.0)  # five probes and rescans: nothing taken meanwhile
        waiting = site.inbox()
        delivered_while_full = len(site.delivered())

        site.disk.empty(site.folders[where])
        wait_until(lambda: site.healthz()[0] == 200, "/healthz ok again")
        wait_until(lambda: not site.inbox(), "the inbox emptied")
        wait_until(lambda: site.ledger.summary().delivered == (2 if bad else 3), "every message delivered")
        summary = site.ledger.summary()

    assert (503, True) == (status, body.startswith(f"disk full: {where} ({site.folders[where]}): "))
    assert {"gauge": 1.0, "intake": 1.0, "delivery": 1.0 if where == "ledger" else 0.0} == paused
    both = {"second.json": second, "third.json": third}
    assert ({"third.json": third} if where == "destination:drop" else both) == waiting
    assert {"ledger": 1, "archive": 2, "quarantine": 1, "destination:drop": 1}[where] == delivered_while_full
    assert [("disk_full", where), ("disk_space_again", where)] == state_changes(caplog)
    assert (["second.json"] if bad else []) == site.quarantined()
    assert (["first.json", "third.json"] if bad else ["first.json", "second.json", "third.json"]) == site.archived()
    assert (0, 1 if bad else 0, 2 if bad else 3) == (summary.pending, summary.quarantined, len(site.delivered()))


def test_a_delivery_the_full_ledger_cannot_record_is_sent_again_under_the_same_name(tmp_path: Path) -> None:
    """Ledger full between the receiver's yes and the record: delivery pauses; after, the same message goes again."""
    site = Running(tmp_path)
    sent: list[str] = []

    class Recording(FileTransport):
        def deliver(self, message: Any) -> Any:
            receipt = super().deliver(message)
            sent.append(message.message_id)
            if len(sent) == 1:
                site.disk.fill(site.settings.state)  # the disk fills as the receiver answers
            return receipt

    with site.running():
        site.service.transports = {"drop": Recording(site.out, disk=site.disk)}
        drop(site.settings.inbox, "one.json", make_input("FULL-0010", "FICT-7110"))
        wait_until(lambda: site.healthz()[0] == 503, "the ledger full")
        threading.Event().wait(1.0)  # paused: no second attempt while the ledger cannot record it
        attempts_while_full = len(sent)
        site.disk.empty(site.settings.state)
        wait_until(lambda: site.ledger.summary().delivered == 1, "the message recorded as delivered")

    # The receiver sees the same control id twice (it de-duplicates by MSH-10); the folder keeps one file.
    assert (1, 2, 1, 1) == (attempts_while_full, len(sent), len(set(sent)), len(site.delivered()))
