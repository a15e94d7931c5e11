"""``dlco-bridge audit`` on the command line: exit codes and bad input as findings."""

from __future__ import annotations

import csv
import json
from pathlib import Path

from bridge.cli import main
from bridge.tables.files import samples_dir


def test_audit_exits_0_reports_a_broken_export_and_skips_what_is_not_an_export(tmp_path: Path, capsys):
    """A broken export (sample 08) is a finding; a stray bridge.toml is skipped and counted (issue 19.4); exit 0."""
    archive = tmp_path / "archive"
    (archive / "service").mkdir(parents=True)
    for name in ("01-healthy-adult.json", "08-malformed.json", "service/bridge.toml"):
        (archive / name).write_bytes((samples_dir() / name).read_bytes())

    code = main(["audit", str(archive), "--report", str(tmp_path / "r"), "--workers", "1"])
    with open(tmp_path / "r" / "findings.csv", newline="", encoding="utf-8") as handle:
        refused = {(Path(row["file"]).name, row["check"]) for row in csv.DictReader(handle) if row["test_id"] == ""}
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())

    assert 0 == code
    # source: samples/08-malformed.json has a date-time without a UTC offset (README, "What the samples show")
    assert {("08-malformed.json", "INVALID_RECORD")} == refused
    assert (2, 1) == (summary["files"], summary["skipped"])
    assert "1 skipped (not exports); report in" in capsys.readouterr().out


def test_audit_that_cannot_write_its_report_exits_1(tmp_path: Path, capsys):
    """A report folder that cannot be made (a file is in the way) stops the audit with exit 1 and one line."""
    (tmp_path / "taken").write_text("a file, not a folder")

    code = main(["audit", str(samples_dir()), "--report", str(tmp_path / "taken" / "r"), "--workers", "1"])

    assert (1, True) == (code, "audit could not run" in capsys.readouterr().err)


def test_workers_below_one_is_a_usage_error(tmp_path: Path, capsys):
    """--workers 0 is refused before anything runs."""
    assert 1 == main(["audit", str(samples_dir()), "--report", str(tmp_path), "--workers", "0"])


def test_audit_reads_a_legacy_hl7_feed_through_its_map(tmp_path: Path, capsys):
    """audit --map reads every session of the invented legacy HL7 feed, one row each, none refused as a format."""
    root = Path(__file__).resolve().parents[2]
    archive = tmp_path / "archive"
    archive.mkdir()
    feed = next((root / "samples" / "legacy").glob("*.hl7"))
    (archive / feed.name).write_bytes(feed.read_bytes())
    hl7_map = root / "mappings" / "maps" / "highcairn-hl7v23.toml"

    code = main(["audit", str(archive), "--report", str(tmp_path / "r"), "--workers", "1", "--map", str(hl7_map)])
    with open(tmp_path / "r" / "findings.csv", newline="", encoding="utf-8") as handle:
        checks = {row["check"] for row in csv.DictReader(handle)}
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    capsys.readouterr()

    assert 0 == code
    assert "UNKNOWN_FORMAT" not in checks
    # the feed carries five sessions (samples/legacy, docs/field-maps.md), in one file
    assert (1, 5) == (summary["files"], summary["sessions_read"])
