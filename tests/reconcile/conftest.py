"""A feed that really happened, for reconcile to check: the intake, the ledger, delivery, the stand-in.

``feed`` runs the service's own parts in this process: each input through :class:`Intake` into a
ledger, delivered by :func:`deliver_due` over the real FHIR transport to the stand-in's FHIR
endpoint (and over MLLP to the stand-in's listener), both on 127.0.0.1. Nothing is patched. The
inputs are the bundled fictional samples under new test ids and patients.
"""

from __future__ import annotations

import csv
import json
import random
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from bridge import cli
from bridge.cli.service import build_transport
from bridge.config import Settings, load_settings
from bridge.service.delivery import deliver_due
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.service.receiver import FhirPeer, MllpPeer, ResourceStore
from bridge.service.transports.base import Transport
from bridge.tables.files import load_map_choice, load_tables
from tests.conftest import SAMPLES

# The samples every default site sends (07 and 09 carry an ERROR finding, 08 is malformed).
SENT = tuple(sorted(p for p in SAMPLES.glob("*.json") if not p.name.startswith(("07-", "08-", "09-"))))
SYSTEM = "https://fenwick-hollow.example/dlco-bridge/observation-id"  # the invented site's system_base


def session(template: Path, number: int) -> bytes:
    """A sample under a new test id and patient (invented)."""
    document = json.loads(template.read_bytes())
    document["test_id"] = f"RC-{number:04d}"
    document["patient"]["id"] = f"FICT-RC{number:04d}"
    return json.dumps(document).encode()


@dataclass
class Feed:
    """A site whose ledger delivered ``count`` sessions to the stand-in (FHIR, and HL7 v2 over MLLP)."""

    root: Path
    store: ResourceStore
    fhir: FhirPeer
    mllp: MllpPeer
    config: Path
    settings: Settings
    ledger: Ledger
    transports: dict[str, Transport] = field(default_factory=dict)
    count: int = 0

    def send(self, data: bytes, name: str) -> None:
        """Drop one input and deliver what it became."""
        path = self.root / "inbox" / name
        path.write_bytes(data)
        tables = load_tables()
        maps = load_map_choice(self.settings.field_map, self.settings.maps, tables)
        intake = Intake(
            self.settings.require_service(), self.settings.pipeline, maps, tables, self.ledger, Metrics(time.time)
        )
        intake.take(path, time.time())
        self.deliver()

    def deliver(self) -> None:
        deliver_due(self.ledger, self.transports, time.time, random.random)

    def reconcile(self, *flags: str) -> tuple[int, list[dict[str, str]], dict[str, object]]:
        """``dlco-bridge reconcile --config ... --report DIR [flags]``: the exit code, the CSV rows, the summary."""
        report = self.root / f"report-{time.monotonic_ns()}"
        code = cli.main(["reconcile", "--config", str(self.config), "--report", str(report), *flags])
        with (report / "reconcile.csv").open(encoding="utf-8") as stream:
            rows = list(csv.DictReader(stream))
        return code, rows, json.loads((report / "summary.json").read_text())

    def observations(self) -> list[str]:
        """The identifier values of the Observations the stand-in holds, oldest first."""
        return [r.body["identifier"][0]["value"] for r in self.store.all() if r.type == "Observation"]


def write_config(root: Path, fhir_url: str, mllp_port: int, extra: str = "", emit: str = "") -> Path:
    config = root / "bridge.toml"
    config.write_text(
        'inbox = "inbox"\narchive = "archive"\nquarantine = "quarantine"\nstate = "state"\n'
        f'[emit]\nsystem_base = "https://fenwick-hollow.example/dlco-bridge"\n{emit}'
        f'[destination.records]\npayload = "hl7"\nunits = "traditional"\ntransport = "mllp"\nport = {mllp_port}\n'
        f'[destination.fhir-store]\npayload = "fhir"\nunits = "si"\ntransport = "fhir-rest"\nbase_url = "{fhir_url}"\n'
        + extra
    )
    for name in ("inbox", "archive", "quarantine", "state"):
        (root / name).mkdir(exist_ok=True)
    return config


@pytest.fixture
def make_feed(tmp_path: Path) -> Iterator[object]:
    """Build a :class:`Feed` of ``count`` sessions (the samples in turn), delivered."""
    made: list[Feed] = []

    def make(count: int, extra: str = "", emit: str = "") -> Feed:
        root = tmp_path / f"site{len(made)}"
        root.mkdir()
        store = ResourceStore(root / "stand-in" / "resources.sqlite3")
        fhir, mllp = FhirPeer(store), MllpPeer(root / "stand-in" / "messages")
        fhir.start()
        mllp.start()
        config = write_config(root, fhir.url, mllp.port, extra, emit)
        settings = load_settings(config, {})
        ledger = Ledger.open(settings.require_service().ledger_path)
        feed = Feed(root, store, fhir, mllp, config, settings, ledger)
        made.append(feed)
        feed.transports = {d.name: build_transport(d) for d in settings.require_service().destinations}
        for number in range(count):
            feed.send(session(SENT[number % len(SENT)], number), f"rc-{number:04d}.json")
        feed.count = count
        return feed

    yield make
    for feed in made:
        for transport in feed.transports.values():
            transport.close()
        feed.ledger.close()
        feed.fhir.stop()
        feed.mllp.stop()
        feed.store.close()
