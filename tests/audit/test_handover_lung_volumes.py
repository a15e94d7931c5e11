"""The NDJSON hand-over carries the whole report of samples/11 (spirometry, static lung volumes and DLCO): its
lung-volume panel and members through the site's gate, as convert would send them (issue 25)."""

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

SAMPLE = "11-whole-report.json"
TEST_ID = json.loads((samples_dir() / SAMPLE).read_text(encoding="utf-8"))["test_id"]


def _archive(tmp_path: Path, rv_tlc: float | None = None) -> Path:
    """The sample in a folder of its own; ``rv_tlc``: its reported RV/TLC (per cent) replaced by this."""
    archive = tmp_path / "archive"
    archive.mkdir()
    doc = json.loads((samples_dir() / SAMPLE).read_text(encoding="utf-8"))
    if rv_tlc is not None:
        doc["lung_volumes"]["rv_tlc"] = {"value": rv_tlc, "unit": "%"}
    (archive / SAMPLE).write_text(json.dumps(doc), encoding="utf-8")
    return archive


def _lines(report: Path, kind: str) -> list[dict[str, Any]]:
    path = report / "ndjson" / f"{kind}.ndjson"
    return [json.loads(line) for line in path.read_text().splitlines()] if path.is_file() else []


def _identifier(resource: dict[str, Any]) -> str:
    return str(resource["identifier"][0]["value"])


def test_the_hand_over_holds_all_three_groups_with_the_lung_volume_panel_and_members(tmp_path: Path):
    """The lung-volume panel is in Observation.ndjson beside the two spirometry panels, listed by the report, with
    every member beside it (TLC, FRC, RV and VC among them, by LOINC); the Observations are those convert's
    Bundle carries for the same sample; every line is valid R4."""
    report = tmp_path / "report"
    run_audit([_archive(tmp_path)], report, JOB, AuditSettings(workers=1))
    observations = _lines(report, "Observation")
    by_id = {f"Observation/{o['id']}": o for o in observations}
    (diagnostic,) = _lines(report, "DiagnosticReport")
    # source: FHIR R4 Observation.hasMember: a panel names its members; DiagnosticReport.result lists the panels
    panels = {p["code"]["text"]: p for p in observations if "hasMember" in p}
    listed = {r["reference"] for r in diagnostic["result"]}

    assert {"Spirometry before bronchodilator", "Spirometry after bronchodilator", "Static lung volumes"} == set(panels)
    assert all(f"Observation/{p['id']}" in listed for p in panels.values())
    members = [by_id.get(m["reference"]) for m in panels["Static lung volumes"]["hasMember"]]
    assert members and None not in members  # every member handed over beside its panel
    codes = {c["code"] for m in members if m for c in m["code"]["coding"]}
    # source: LOINC 19862-2 Total lung capacity, 19843-2 Functional residual capacity, 20146-7 Residual volume,
    # 19867-1 Vital capacity
    assert {"19862-2", "19843-2", "20146-7", "19867-1"} <= codes
    # DLCO is there too: source: LOINC 19911-7 Diffusion capacity.carbon monoxide
    assert any(c["code"] == "19911-7" for o in observations for c in o["code"]["coding"])
    # the same Observations as convert's FHIR Bundle of the sample (same time, same settings)
    outcome = process((samples_dir() / SAMPLE).read_bytes(), SAMPLE, load_tables(), PipelineSettings(), now=JOB.now,
                      routes=(Route("fhir", JOB.units),))  # fmt: skip
    bundle = json.loads(outcome.payloads[0].data)
    converted = {_identifier(e["resource"]) for e in bundle["entry"] if e["resource"]["resourceType"] == "Observation"}
    assert converted == {_identifier(o) for o in observations}
    validators = shared_validators()  # source: HL7 FHIR R4 fhir.schema.json (official JSON schema)
    assert [] == [e for o in [*observations, diagnostic] for e in errors(validators[o["resourceType"]], o)]


def _quarantined(report: Path) -> list[tuple[str, str, str]]:
    with open(report / "ndjson" / "quarantined.csv", newline="", encoding="utf-8") as handle:
        return [(Path(r["file"]).name, r["test_id"], r["checks"]) for r in csv.DictReader(handle)]


def test_a_blocking_lung_volume_code_keeps_the_session_out(tmp_path: Path):
    """Sample 11 with its RV/TLC reported as 60 %: 100 x 4.2 / 7.6 = 55.3 %, 4.7 points from it, more than the 1 %
    rounding allowed, a LUNG_VOLUMES_RATIO_MISMATCH (a warning). With that code blocking, the session is kept out of
    the hand-over and listed in quarantined.csv; without it (the control), it goes through."""
    archive = _archive(tmp_path, rv_tlc=60)
    blocking = replace(JOB, pipeline=PipelineSettings(blocking=frozenset({"LUNG_VOLUMES_RATIO_MISMATCH"})))
    run_audit([archive], tmp_path / "blocked", blocking, AuditSettings(workers=1))
    run_audit([archive], tmp_path / "open", JOB, AuditSettings(workers=1))

    assert ([], []) == (_lines(tmp_path / "blocked", "Observation"), _lines(tmp_path / "blocked", "DiagnosticReport"))
    assert [(SAMPLE, TEST_ID, "LUNG_VOLUMES_RATIO_MISMATCH")] == _quarantined(tmp_path / "blocked")
    assert (1, []) == (len(_lines(tmp_path / "open", "DiagnosticReport")), _quarantined(tmp_path / "open"))


def test_convert_refuses_it_with_the_same_blocking_list(tmp_path: Path, capsys):
    """The same gate: convert --blocking LUNG_VOLUMES_RATIO_MISMATCH writes nothing for it and exits 2."""
    archive = _archive(tmp_path, rv_tlc=60)
    code = main(["convert", str(archive / SAMPLE), "--to", "fhir", "--out", str(tmp_path / "out"),
                 "--blocking", "LUNG_VOLUMES_RATIO_MISMATCH"])  # fmt: skip

    assert (2, False) == (code, (tmp_path / "out").exists() and any((tmp_path / "out").iterdir()))
    assert "LUNG_VOLUMES_RATIO_MISMATCH" in capsys.readouterr().err
