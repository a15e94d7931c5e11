"""The hand-over goes through the site's gate, holds one version per test id, and a re-run replaces its own files."""

from __future__ import annotations

import csv
import json
from dataclasses import replace
from pathlib import Path

import pytest

from bridge.audit.run import AuditSettings, run_audit
from bridge.cli import main
from bridge.pipeline import PipelineSettings
from bridge.tables.files import samples_dir
from tests.audit.conftest import JOB

ROOT = Path(__file__).resolve().parents[2]


def _archive(tmp_path: Path, *names: str) -> Path:
    archive = tmp_path / "archive"
    archive.mkdir()
    for name in names:
        (archive / name).write_bytes((samples_dir() / name).read_bytes())
    return archive


def _handed(report: Path) -> list[str]:
    """The test ids of the DiagnosticReports handed over (identifier: lab.test id.report)."""
    lines = (report / "ndjson" / "DiagnosticReport.ndjson").read_text().splitlines()
    return sorted(json.loads(line)["identifier"][0]["value"].split(".")[-2] for line in lines)


def _quarantined(report: Path) -> list[dict[str, str]]:
    with open(report / "ndjson" / "quarantined.csv", newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_the_hand_over_honours_the_sites_blocking_list(tmp_path: Path):
    """With blocking = COHB_RAISED, sample 04 is kept out of the NDJSON (as convert and watch refuse it); without, it
    is handed over."""
    archive = _archive(tmp_path, "01-healthy-adult.json", "04-raised-cohb.json")
    blocking = replace(JOB, pipeline=PipelineSettings(blocking=frozenset({"COHB_RAISED"})))
    run_audit([archive], tmp_path / "blocked", blocking, AuditSettings(workers=1))
    run_audit([archive], tmp_path / "open", JOB, AuditSettings(workers=1))
    ids = {name: json.loads((samples_dir() / name).read_text())["test_id"] for name in ("01-healthy-adult.json",
           "04-raised-cohb.json")}  # fmt: skip

    assert [ids["01-healthy-adult.json"]] == _handed(tmp_path / "blocked")
    assert [("04-raised-cohb.json", "COHB_RAISED")] == [
        (Path(r["file"]).name, r["checks"]) for r in _quarantined(tmp_path / "blocked")
    ]
    assert sorted(ids.values()) == _handed(tmp_path / "open")


def test_convert_refuses_sample_04_with_the_same_blocking_list(tmp_path: Path, capsys):
    """The same gate: convert --blocking COHB_RAISED writes nothing for sample 04 and exits 2."""
    code = main(["convert", str(samples_dir() / "04-raised-cohb.json"), "--to", "fhir", "--out", str(tmp_path),
                 "--blocking", "COHB_RAISED"])  # fmt: skip

    assert (2, []) == (code, sorted(p.name for p in tmp_path.iterdir()))
    assert "COHB_RAISED" in capsys.readouterr().err


def test_a_file_of_many_sessions_counts_once_and_names_each_record(tmp_path: Path, capsys):
    """The legacy HL7 feed through its map: 1 file, 5 records; every finding names the file and its record (but
    the one on the lab's units); each session ready to migrate is handed over."""
    feed = next((ROOT / "samples" / "legacy").glob("*.hl7"))
    archive = tmp_path / "archive"
    archive.mkdir()
    (archive / feed.name).write_bytes(feed.read_bytes())
    hl7_map = ROOT / "mappings" / "maps" / "highcairn-hl7v23.toml"

    code = main(["audit", str(archive), "--report", str(tmp_path / "r"), "--workers", "1", "--map", str(hl7_map),
                 "--emit", "ndjson"])  # fmt: skip
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    with open(tmp_path / "r" / "findings.csv", newline="", encoding="utf-8") as handle:
        found = list(csv.DictReader(handle))
    capsys.readouterr()

    assert (0, 1, 5) == (code, summary["files"], summary["records"])  # samples/legacy: five sessions in one file
    # message 5, sample 10's twin, gives the DLCO in SI units where messages 1-4 use traditional ones:
    # one finding on the lab (no record), the others each on their record
    by_lab = [f["check"] for f in found if f["record"] == ""]
    records = {"1", "2", "3", "4", "5"}
    assert ["UNIT_CONVENTIONS_MIXED"] == by_lab
    assert [] == [f for f in found if Path(f["file"]).name != feed.name or f["record"] not in records | {""}]
    assert summary["ready"] == len(_handed(tmp_path / "r"))
    assert 5 == summary["ready"] + summary["need_decision"] + summary["copies"] + summary["unreadable"]


def test_a_re_run_replaces_the_files_of_the_run_before(tmp_path: Path):
    """A run with NDJSON, then one without into the same folder: no stale ndjson/ remains; the user's file stays."""
    archive = _archive(tmp_path, "01-healthy-adult.json")
    report = tmp_path / "report"
    run_audit([archive], report, JOB, AuditSettings(workers=1))
    (report / "notes.txt").write_text("the migration lead's own notes")
    run_audit([archive], report, replace(JOB, emit_ndjson=False), AuditSettings(workers=1))
    manifest = json.loads((report / "manifest.json").read_text())

    assert ["findings.csv", "manifest.json", "notes.txt", "report.html", "summary.json"] == sorted(
        p.name for p in report.iterdir()
    )
    assert ["findings.csv", "summary.json", "report.html"] == manifest["files"]


def test_a_folder_that_is_not_an_earlier_report_is_refused(tmp_path: Path, capsys):
    """A non-empty folder without an audit's manifest: exit 1, one line, and its files untouched."""
    folder = tmp_path / "somebody-else"
    folder.mkdir()
    (folder / "findings.csv").write_text("someone's own spreadsheet")

    code = main(["audit", str(samples_dir()), "--report", str(folder), "--workers", "1"])

    assert (1, "someone's own spreadsheet") == (code, (folder / "findings.csv").read_text())
    assert "not an earlier audit report" in capsys.readouterr().err
    with pytest.raises(OSError, match="not an earlier audit report"):
        run_audit([samples_dir()], folder, JOB, AuditSettings(workers=1))
