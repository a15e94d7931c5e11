"""The sets a lab's own report names for spirometry and lung volumes are carried, never charted (docs/format.md).

``spirometry.reference_set`` and ``lung_volumes.reference_set`` name the lab's own sets; the bridge's
reference values stay its own (the site's spirometry set, GLI-2021 for lung volumes). So naming them
changes no Observation and no OBX: only what identifies the source's bytes (its hash) differs.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

from bridge.pipeline import Route, process
from bridge.tables import Tables

SAMPLE = Path(__file__).resolve().parents[2] / "samples" / "11-whole-report.json"
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
ROUTES = (Route("fhir", "traditional"), Route("hl7", "traditional"))


def _named() -> bytes:
    """Sample 11 with both sets named, inserted as text so that every other byte (7.60 L's digits) stays."""
    raw = SAMPLE.read_bytes()
    named = raw.replace(b'"spirometry": {', b'"spirometry": {"reference_set": "GLI-2012", ', 1)
    named = named.replace(b'"lung_volumes": {', b'"lung_volumes": {"reference_set": "ECSC 1993", ', 1)
    assert 2 == named.count(b'"reference_set"')
    return named


def _charted(data: bytes, tables: Tables) -> tuple[list[dict], list[str]]:
    """The FHIR Observations and the HL7 segments but MSH (whose message id comes from the source's hash)."""
    by_kind = {p.kind: p.data for p in process(data, SAMPLE.name, tables, now=NOW, routes=ROUTES).payloads}
    bundle = json.loads(by_kind["fhir"])
    observations = [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "Observation"]
    segments = [s for s in by_kind["hl7"].decode("utf-8").split("\r") if s and not s.startswith("MSH|")]
    return observations, segments


def test_the_labs_own_sets_change_no_observation_and_no_obx(tables):
    """Sample 11 with and without the sets named: the same Observations, the same segments but MSH."""
    plain, named = _charted(SAMPLE.read_bytes(), tables), _charted(_named(), tables)

    assert len(plain[0]) > 10 and len(plain[1]) > 10  # the sample's spirometry and lung volumes are charted
    assert plain == named
