"""`convert` and `watch` are one path: the same input and site settings give the same bytes."""

from __future__ import annotations

import shutil
import time
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

from bridge.cli import convert_files
from bridge.config import load_settings
from bridge.pipeline import Route, process
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.tables.field_map_model import MapChoice
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parent.parent
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
# A site that sets every emit setting away from its default (invented names), with one
# destination per output kind, both in SI units.
SITE = """
inbox = "in"
archive = "archive"
quarantine = "quarantine"
state = "state"
units = "si"

[emit]
sending_application = "BRIDGE-TEST"
sending_facility = "FENWICK-PFT"
receiving_application = "CHART"
receiving_facility = "FENWICK-HOLLOW"
identifier_system = "https://fenwick-hollow.example/observation-id"
local_code_system = "https://fenwick-hollow.example/local-codes"
patient_reference = "conditional-create"
processing_id = "T"

[destination.records]
payload = "hl7"
units = "si"
transport = "file"
folder = "hl7-out"

[destination.store]
payload = "fhir"
units = "si"
transport = "file"
folder = "fhir-out"
"""


def test_convert_and_watch_write_byte_identical_payloads(tmp_path: Path):
    """For good samples (samples 10 and 11, spirometry and the whole report, too), convert's ORU and Bundle equal what
    the service enqueues."""
    config = tmp_path / "site.toml"
    config.write_text(SITE, encoding="utf-8")
    settings = load_settings(config, {})
    service = settings.require_service()
    tables = load_tables()
    names = ("01-healthy-adult.json", "03-high-altitude.json", "06-three-manoeuvres.json")
    # 10: spirometry and DLCO; 11: the whole report (spirometry, static lung volumes and DLCO)
    samples = [ROOT / "samples" / n for n in (*names, "10-spirometry-and-dlco.json", "11-whole-report.json")]

    converted = convert_files(samples, tmp_path / "out", replace(settings, to=("fhir", "hl7")), tables, now=NOW)
    service.inbox.mkdir()
    with Ledger.open(service.ledger_path) as ledger:
        intake = Intake(
            service, settings.pipeline, MapChoice(), tables, ledger, Metrics(time.time), clock=NOW.timestamp
        )
        for sample in samples:
            intake.take(Path(shutil.copy(sample, service.inbox)), time.time())
        queued = {(row.test_id, row.destination): row.payload for row in ledger.rows("pending")}

    written = {
        (outcome.session.test_id, "store" if path.name.endswith(".bundle.json") else "records"): path.read_bytes()
        for _, outcome, written in converted
        for path in written.files
        if not isinstance(outcome, Exception)
    }
    assert 10 == len(written)  # five samples, two outputs each
    assert written == queued


def test_payloads_come_in_the_order_of_the_routes_each_once():
    """Routes mixing unit systems give one payload per distinct route, in the order asked."""
    data = (ROOT / "samples" / "01-healthy-adult.json").read_bytes()
    routes = (Route("fhir", "si"), Route("hl7", "traditional"), Route("hl7", "si"), Route("fhir", "si"))

    outcome = process(data, "01.json", load_tables(), now=NOW, routes=routes)

    assert [("fhir", "si"), ("hl7", "traditional"), ("hl7", "si")] == [(p.kind, p.units) for p in outcome.payloads]
    # DLCO 9.84 mmol/min/kPa x 2.987 = 29.39: the step 0.01 becomes 0.02987, so two decimals keep it no
    # coarser (NIST SP 811 (2008) B.7.2): 29.39 mL/min/mm[Hg]
    # source: GLI 2017 factor (tests/core/test_units.py); OBX-5 is the value (HL7 v2.5.1 ch. 7); OBX 1 is DLCO
    first_obx = [next(s for s in p.data.decode().split("\r") if s.startswith("OBX|1|")) for p in outcome.payloads[1:]]
    assert ["29.39", "9.84"] == [segment.split("|")[5] for segment in first_obx]
