"""The whole report through the service: samples/10 (spirometry and DLCO) and samples/11 (spirometry, static lung
volumes and DLCO) delivered to a file, over MLLP and over FHIR REST to the stand-in is what ``convert`` writes, and
a corrected spirometry or lung-volume value goes out as a correction (issue 25).

The service's own parts run in this process, as ``watch`` runs them (the intake into the ledger, then
:func:`deliver_due` over the transports ``watch`` builds from the destinations), with the clock fixed
so that the send time in both outputs is ``convert``'s; the stand-in's FHIR endpoint and MLLP
listener are the product's own (``bridge.service.receiver``), on 127.0.0.1. Nothing is patched.
"""

from __future__ import annotations

import json
import random
import time
from collections.abc import Iterator
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import hl7
import pytest

from bridge.cli import convert_files
from bridge.cli.service import build_transport
from bridge.config import Settings, load_settings
from bridge.service.delivery import deliver_due
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.service.receiver import FhirPeer, MllpPeer, ResourceStore
from bridge.service.receiver.fhir_peer import process_transaction
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables
from tests.conftest import SAMPLES

SAMPLE = SAMPLES / "10-spirometry-and-dlco.json"
WHOLE = SAMPLES / "11-whole-report.json"
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)


@dataclass
class Site:
    root: Path
    settings: Settings
    store: ResourceStore
    mllp: MllpPeer
    ledger: Ledger

    def send(self, data: bytes, name: str) -> None:
        """Drop one input, take it in (clock fixed at NOW) and deliver what it became to every destination."""
        service = self.settings.require_service()
        path = service.inbox / name
        path.write_bytes(data)
        intake = Intake(service, self.settings.pipeline, MapChoice(), load_tables(), self.ledger, Metrics(time.time),
                        clock=NOW.timestamp)  # fmt: skip
        intake.take(path, time.time())
        transports = {d.name: build_transport(d) for d in service.destinations}
        try:
            deliver_due(self.ledger, transports, time.time, random.random)
        finally:
            for transport in transports.values():
                transport.close()

    def messages(self, folder: Path) -> list[bytes]:
        """The messages in ``folder``, in the order they were written."""
        return [p.read_bytes() for p in sorted(folder.glob("*.hl7"), key=lambda p: p.stat().st_mtime_ns)]


@pytest.fixture
def site(tmp_path: Path) -> Iterator[Site]:
    store = ResourceStore(tmp_path / "stand-in" / "resources.sqlite3")
    fhir, mllp = FhirPeer(store), MllpPeer(tmp_path / "stand-in" / "messages")
    fhir.start()
    mllp.start()
    config = tmp_path / "bridge.toml"
    config.write_text(
        'inbox = "in"\narchive = "archive"\nquarantine = "quarantine"\nstate = "state"\nunits = "si"\n'
        '[emit]\nsystem_base = "https://fenwick-hollow.example/dlco-bridge"\n'
        '[destination.drop]\npayload = "hl7"\nunits = "si"\ntransport = "file"\nfolder = "drop"\n'
        f'[destination.records]\npayload = "hl7"\nunits = "si"\ntransport = "mllp"\nport = {mllp.port}\n'
        f'[destination.store]\npayload = "fhir"\nunits = "si"\ntransport = "fhir-rest"\nbase_url = "{fhir.url}"\n',
        encoding="utf-8",
    )
    for name in ("in", "archive", "quarantine", "state", "drop"):
        (tmp_path / name).mkdir()
    settings = load_settings(config, {})
    ledger = Ledger.open(settings.require_service().ledger_path)
    try:
        yield Site(tmp_path, settings, store, mllp, ledger)
    finally:
        ledger.close()
        fhir.stop()
        mllp.stop()
        store.close()


def _held(store: ResourceStore) -> list[tuple[str, int, dict[str, Any]]]:
    return [(r.type, r.id, r.body) for r in store.all()]


# sample 10: a pre and a post spirometry panel; sample 11: those and the static lung volumes' panel
@pytest.mark.parametrize(("sample", "panels"), [(SAMPLE, 2), (WHOLE, 3)], ids=["sample-10", "sample-11"])
def test_the_three_destinations_get_what_convert_writes(site: Site, tmp_path: Path, sample: Path, panels: int):
    """The file destination's and the MLLP listener's message are convert's ORU byte for byte; the stand-in holds
    from the delivered Bundle exactly what it holds when given convert's Bundle (the same ids, the same bodies)."""
    site.send(sample.read_bytes(), sample.name)
    converted = convert_files([sample], tmp_path / "out", replace(site.settings, to=("fhir", "hl7")), load_tables(),
                              now=NOW)  # fmt: skip
    (written,) = [w for _, _, w in converted]
    oru = next(p for p in written.files if p.suffix == ".hl7").read_bytes()
    bundle = json.loads(next(p for p in written.files if p.name.endswith(".bundle.json")).read_bytes())
    reference = ResourceStore(tmp_path / "reference.sqlite3")
    process_transaction(reference, bundle)

    assert [oru] == site.messages(site.root / "drop")
    assert [oru] == site.messages(site.root / "stand-in" / "messages")
    assert _held(reference) == _held(site.store)
    # the panels are among what was delivered (source: FHIR R4 Observation.hasMember)
    assert panels == sum("hasMember" in body for kind, _, body in _held(site.store) if kind == "Observation")
    reference.close()


def _obx(message: bytes, loinc: str) -> tuple[str, str]:
    """OBX-5 and OBX-11 of the observation coded ``loinc``, parsed by python-hl7."""
    parsed = hl7.parse(message.decode("utf-8"))
    obx = next(s for s in parsed.segments("OBX") if str(s[3]).startswith(f"{loinc}^"))
    return str(obx[5]), str(obx[11])


def test_a_corrected_spirometry_value_is_delivered_as_a_correction(site: Site):
    """Sample 10, then its pre FEV1 changed from 1.92 to 1.95 L under the same test id: the second message's FEV1 is
    1.95 with OBX-11 C, in the file and over MLLP; the stand-in's FEV1 is updated (version 2) and corrected."""
    site.send(SAMPLE.read_bytes(), "first.json")
    document = json.loads(SAMPLE.read_bytes())
    document["spirometry"]["pre"]["results"]["fev1"]["value"] = 1.95
    document["spirometry"]["pre"]["results"]["fev1_fvc"]["value"] = 64  # 1.95 / 3.05 = 0.639: the ratio follows
    site.send(json.dumps(document).encode(), "second.json")
    fev1 = [r for r in site.store.all() if r.type == "Observation" and r.body["code"]["coding"][0]["code"] == "20157-4"]

    # source: LOINC 20157-4 FEV1 --pre bronchodilation; HL7 v2.5.1 ch. 7, OBX-3, OBX-5, OBX-11, table 0085
    # observation result status (F final, C correction)
    for folder in (site.root / "drop", site.root / "stand-in" / "messages"):
        assert [("1.92", "F"), ("1.95", "C")] == [_obx(m, "20157-4") for m in site.messages(folder)]
    # source: FHIR R4 ObservationStatus value set ("corrected"); http.html#cond-update: the one match updated
    assert [("corrected", 2, 1.95)] == [(r.body["status"], r.version, r.body["valueQuantity"]["value"]) for r in fev1]


def test_a_corrected_lung_volume_is_delivered_as_a_correction(site: Site):
    """Sample 11, then its VC changed from 3.40 to 3.5 L under the same test id (VC enters no ratio or sum of the
    other volumes, so nothing else changes): the second message's VC is 3.5 with OBX-11 C, in the file and over
    MLLP; the stand-in's VC is updated (version 2) and corrected."""
    site.send(WHOLE.read_bytes(), "first.json")
    document = json.loads(WHOLE.read_bytes())
    document["lung_volumes"]["vc"]["value"] = 3.5
    site.send(json.dumps(document).encode(), "second.json")
    # source: LOINC 19867-1 Vital capacity [Volume] Respiratory system
    vc = [r for r in site.store.all() if r.type == "Observation" and r.body["code"]["coding"][0]["code"] == "19867-1"]

    # source: HL7 v2.5.1 ch. 7, table 0085 observation result status (F final, C correction); OBX-3, OBX-5, OBX-11
    for folder in (site.root / "drop", site.root / "stand-in" / "messages"):
        # the value's text as the record wrote it: the sample's 3.40, then json.dumps's 3.5
        assert [("3.40", "F"), ("3.5", "C")] == [_obx(m, "19867-1") for m in site.messages(folder)]
    # source: FHIR R4 ObservationStatus value set ("corrected"); http.html#cond-update: the one match updated
    assert [("corrected", 2, 3.5)] == [(r.body["status"], r.version, r.body["valueQuantity"]["value"]) for r in vc]
