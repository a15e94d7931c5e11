"""The NDJSON hand-over carries the whole report of samples/10 (its spirometry panels and their members) through
the site's gate, as convert would send it (issue 25.4)."""

from __future__ import annotations

import csv
import json
from dataclasses import replace
from pathlib import Path
from typing import Any

from bridge.audit.run import AuditSettings, run_audit
from bridge.cli import main
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables.files import load_tables, samples_dir
from tests.audit.conftest import JOB
from tests.fhir_schema import errors, shared_validators

SAMPLE = "10-spirometry-and-dlco.json"


def _archive(tmp_path: Path) -> Path:
    archive = tmp_path / "archive"
    archive.mkdir()
    (archive / SAMPLE).write_bytes((samples_dir() / SAMPLE).read_bytes())
    return archive


def _lines(report: Path, kind: str) -> list[dict[str, Any]]:
    path = report / "ndjson" / f"{kind}.ndjson"
    return [json.loads(line) for line in path.read_text().splitlines()] if path.is_file() else []


def _identifier(resource: dict[str, Any]) -> str:
    return str(resource["identifier"][0]["value"])


def test_the_hand_over_holds_the_spirometry_panels_and_their_members(tmp_path: Path):
    """Each phase's panel is in Observation.ndjson, listed by the report, with every member beside it; the
    Observations are those convert's Bundle carries for the same sample; every line is valid R4."""
    report = tmp_path / "report"
    run_audit([_archive(tmp_path)], report, JOB, AuditSettings(workers=1))
    observations = _lines(report, "Observation")
    by_id = {f"Observation/{o['id']}": o for o in observations}
    (diagnostic,) = _lines(report, "DiagnosticReport")
    # source: FHIR R4 Observation.hasMember: a panel names its members; DiagnosticReport.result lists the panels
    panels = [o for o in observations if "hasMember" in o]
    listed = {r["reference"] for r in diagnostic["result"]}

    assert {"Spirometry before bronchodilator", "Spirometry after bronchodilator"} == {
        p["code"]["text"] for p in panels
    }
    assert all(f"Observation/{p['id']}" in listed for p in panels)
    members = [m["reference"] for p in panels for m in p["hasMember"]]
    assert members and all(m in by_id for m in members)  # every member handed over beside its panel
    # the same Observations as convert's FHIR Bundle of the sample (same time, same settings)
    outcome = process((samples_dir() / SAMPLE).read_bytes(), SAMPLE, load_tables(), PipelineSettings(), now=JOB.now,
                      routes=(Route("fhir", JOB.units),))  # fmt: skip
    bundle = json.loads(outcome.payloads[0].data)
    converted = {_identifier(e["resource"]) for e in bundle["entry"] if e["resource"]["resourceType"] == "Observation"}
    assert converted == {_identifier(o) for o in observations}
    validators = shared_validators()  # source: HL7 FHIR R4 fhir.schema.json (official JSON schema)
    assert [] == [e for o in [*observations, diagnostic] for e in errors(validators[o["resourceType"]], o)]


def test_a_blocking_spirometry_code_keeps_the_session_out(tmp_path: Path):
    """With blocking = SPIROMETRY_GRADE (sample 10's grades, A and B: an info finding, blocking only because the
    site says so), the session is kept out of the hand-over and listed in quarantined.csv, as convert refuses it."""
    archive = _archive(tmp_path)
    blocking = replace(JOB, pipeline=PipelineSettings(blocking=frozenset({"SPIROMETRY_GRADE"})))
    run_audit([archive], tmp_path / "blocked", blocking, AuditSettings(workers=1))
    with open(tmp_path / "blocked" / "ndjson" / "quarantined.csv", newline="", encoding="utf-8") as handle:
        quarantined = [(Path(r["file"]).name, r["test_id"], r["checks"]) for r in csv.DictReader(handle)]

    assert ([], []) == (_lines(tmp_path / "blocked", "Observation"), _lines(tmp_path / "blocked", "DiagnosticReport"))
    assert [(SAMPLE, "LOW-2026-0010", "SPIROMETRY_GRADE")] == quarantined


def test_convert_refuses_sample_10_with_the_same_blocking_list(tmp_path: Path, capsys):
    """The same gate: convert --blocking SPIROMETRY_GRADE writes nothing for sample 10 and exits 2."""
    code = main(["convert", str(samples_dir() / SAMPLE), "--to", "fhir", "--out", str(tmp_path / "out"),
                 "--blocking", "SPIROMETRY_GRADE"])  # fmt: skip

    assert (2, False) == (code, (tmp_path / "out").exists() and any((tmp_path / "out").iterdir()))
    assert "SPIROMETRY_GRADE" in capsys.readouterr().err
