"""The audit of a planted archive finds exactly what was planted, and runs the same on 1 or 2 workers."""

from __future__ import annotations

import csv
import json
import os
import re
from collections import Counter
from pathlib import Path

from bridge.audit.reduce import ARCHIVE_CHECKS
from bridge.audit.run import AuditSettings, run_audit
from bridge.inputs import find_inputs
from bridge.tables.field_map_model import MapChoice
from tests.audit import planted
from tests.audit.conftest import JOB

ROOT = Path(__file__).resolve().parents[2]


def _findings(report: Path) -> list[dict[str, str]]:
    with open(report / "findings.csv", newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_findings_csv_has_the_documented_header(report: Path):
    """findings.csv starts with file,record,source,test_id,check,severity,message."""
    assert "file,record,source,test_id,check,severity,message" == (report / "findings.csv").read_text().splitlines()[0]


def test_every_finding_names_its_file_and_source_always_means_the_lab(report: Path, archive: Path):
    """Each finding names a file of the archive; source is one of the planted labs, or empty for a file not read."""
    found = _findings(report)
    labs = {planted.LOWMARSH, planted.SALTREACH, planted.BRACKENFOLD, planted.HIGHCAIRN, ""}

    assert [] == [row for row in found if not Path(row["file"]).is_file() or archive not in Path(row["file"]).parents]
    assert set() == {row["source"] for row in found} - labs
    assert {"UNREADABLE_INPUT", "UNKNOWN_FORMAT"} == {row["check"] for row in found if row["source"] == ""}


def test_the_audit_finds_exactly_what_was_planted(report: Path):
    """Each planted problem is found as many times as it was planted, and nothing else is found."""
    assert planted.PLANTED == Counter(row["check"] for row in _findings(report))


def test_the_archive_findings_name_the_planted_sessions(report: Path):
    """Sex changes, jumps and conflicts point at the very sessions that were planted."""
    found = _findings(report)

    def ids(check: str) -> set[str]:
        return {row["test_id"] for row in found if row["check"] == check}

    assert {f"LM-{p:05d}-2" for p in planted.SEX_CHANGED} == ids("PATIENT_SEX_CHANGED")
    assert {f"LM-{p:05d}-1" for p in planted.BIRTH_CHANGED} == ids("PATIENT_BIRTH_DATE_CHANGED")
    assert {f"LM-{p:05d}-2" for p in planted.JUMPED} == ids("SERIES_UNIT_JUMP")
    assert {f"LM-{p:05d}-0" for p in planted.CONFLICTING} == ids("DUPLICATE_TEST_ID_CONFLICT")
    off = {f"LM-{p:05d}-0" for p in planted.PREDICTED_OFF} | {f"LM-{p:05d}-2" for p in planted.SEX_CHANGED}
    assert off == ids("PREDICTED_NOT_FROM_CLAIMED_SET")
    sources = {(row["check"], row["source"]) for row in found if row["test_id"] == "" and row["source"]}
    assert {("UNIT_CONVENTIONS_MIXED", planted.SALTREACH), ("REFERENCE_SETS_MIXED", planted.BRACKENFOLD)} == sources


def test_the_archive_check_codes_are_listed_documented_and_found(report: Path):
    """ARCHIVE_CHECKS, the codes the code validation must know beside the record checks', are documented and found."""
    findings_md = (ROOT / "docs" / "findings.md").read_text(encoding="utf-8")
    first_cells = re.findall(r"^\| (`[A-Z_]+`(?:, `[A-Z_]+`)*) \|", findings_md, re.M)  # a row may name two codes
    documented = {code for cell in first_cells for code in re.findall(r"`([A-Z_]+)`", cell)}
    found = {row["check"] for row in _findings(report)}
    planted_kinds = {"DUPLICATE_TEST_ID_CONFLICT", "PATIENT_SEX_CHANGED", "PATIENT_BIRTH_DATE_CHANGED",
                     "SERIES_UNIT_JUMP", "UNIT_CONVENTIONS_MIXED", "REFERENCE_SETS_MIXED"}  # fmt: skip
    spirometry_only = {"POST_WITHOUT_PRE_IN_SOURCE"}  # planted in tests/audit/test_planted_spirometry.py

    assert planted_kinds | spirometry_only == set(ARCHIVE_CHECKS)
    assert set() == set(ARCHIVE_CHECKS) - documented
    assert set() == set(ARCHIVE_CHECKS) - found - spirometry_only


def test_summary_counts_files_sessions_and_clean_ones(report: Path):
    """summary.json counts every file, the sessions read and the clean ones (hand-counted plan)."""
    summary = json.loads((report / "summary.json").read_text())

    # the files read (scan.pdf is skipped by the folder rule, not read), one skipped
    assert (planted.FILES, 1, planted.READABLE, planted.CLEAN) == (
        summary["files"],
        summary["skipped"],
        summary["sessions_read"],
        summary["clean"],
    )
    assert dict(planted.PLANTED) == summary["findings_by_check"]


def test_the_export_of_many_sessions_is_one_file_whose_findings_name_their_record(report: Path):
    """The CSV export's findings name the export and the record in it: 1 (sample 04's twin), 2 (06's), 3 (10's)."""
    exported = {
        (r["record"], r["test_id"], r["check"]) for r in _findings(report) if r["file"].endswith(planted.EXPORT)
    }

    # source: samples/legacy/lowmarsh-results.csv, its sessions are LOW-2026-0002, LOW-2026-0003, LOW-2026-0010
    assert {
        ("1", "LOW-2026-0002", "COHB_RAISED"),
        ("2", "LOW-2026-0003", "BREATH_HOLD_OUT_OF_TARGET"),
        ("2", "LOW-2026-0003", "MANOEUVRE_NOT_ACCEPTABLE"),
        ("3", "LOW-2026-0010", "SPIROMETRY_BRONCHODILATOR_RESPONSE"),
        ("3", "LOW-2026-0010", "SPIROMETRY_GRADE"),
    } == exported


def test_the_answer_counts_what_can_migrate_what_needs_a_decision_and_what_cannot_be_read(report: Path):
    """ready + need a decision + copies + unreadable are the hand-counted plan, and add up to the records."""
    summary = json.loads((report / "summary.json").read_text())
    counted = (summary["ready"], summary["need_decision"], summary["copies"], summary["unreadable"])

    assert (planted.READY, planted.DECISION, planted.COPIES, planted.UNREADABLE) == counted
    assert summary["records"] == sum(counted)


def test_ndjson_holds_one_version_per_test_id_and_lists_the_others(report: Path):
    """One DiagnosticReport per session ready to migrate, no test id twice; quarantined.csv lists every other record."""
    reports = [json.loads(line) for line in (report / "ndjson" / "DiagnosticReport.ndjson").read_text().splitlines()]
    test_ids = [r["identifier"][0]["value"] for r in reports]
    with open(report / "ndjson" / "quarantined.csv", newline="", encoding="utf-8") as handle:
        quarantined = list(csv.DictReader(handle))

    assert planted.READY == len(reports)
    assert len(test_ids) == len(set(test_ids))
    assert planted.DECISION + planted.UNREADABLE == len(quarantined)


def test_a_conflicting_test_id_is_kept_out_with_both_files_listed(report: Path):
    """Both versions of each planted conflict are in quarantined.csv (the original and the resent file), neither in
    the NDJSON."""
    with open(report / "ndjson" / "quarantined.csv", newline="", encoding="utf-8") as handle:
        conflicts = [r for r in csv.DictReader(handle) if "DUPLICATE_TEST_ID_CONFLICT" in r["checks"].split()]
    handed = (report / "ndjson" / "DiagnosticReport.ndjson").read_text()

    expected = {f"LM-{p:05d}-0" for p in planted.CONFLICTING}
    assert {(t, folder) for t in expected for folder in ("2019", "resent")} == {
        (r["test_id"], Path(r["file"]).parent.name) for r in conflicts
    }
    assert [] == [t for t in expected if f".{t}.report" in handed]  # the report identifier: lab.test id.report


def test_one_worker_writes_the_same_files_as_two(archive: Path, report: Path, tmp_path: Path):
    """The order of results is the walk's, so 1 and 2 workers write the same bytes."""
    run_audit([archive], tmp_path, JOB, AuditSettings(workers=1, chunk_files=333))
    ndjson = [f"ndjson/{p.name}" for p in (report / "ndjson").iterdir()]
    names = ["findings.csv", "summary.json", "report.html", "manifest.json", *ndjson]

    assert {n: (report / n).read_bytes() for n in names} == {n: (tmp_path / n).read_bytes() for n in names}


def test_walk_goes_deeper_than_the_recursion_limit(tmp_path: Path):
    """A folder 1,500 levels deep is walked iteratively (Python's recursion limit is 1,000)."""
    folder = str(tmp_path)
    for _ in range(1500):  # one by one: pathlib's and os's own makedirs recurse
        folder += "/d"
        os.mkdir(folder)
    with open(folder + "/deep.json", "w") as handle:
        handle.write("{}")
    try:
        found = [str(f.path) for f in find_inputs([tmp_path], MapChoice())]
    finally:  # removed here level by level: pytest's clean-up of old temporary folders recurses too
        os.remove(folder + "/deep.json")
        while folder != str(tmp_path):
            os.rmdir(folder)
            folder = os.path.dirname(folder)

    assert [str(tmp_path) + "/d" * 1500 + "/deep.json"] == found


def test_the_plots_carry_their_points_as_one_image_each(report: Path):
    """Thousands of points, yet each scatter plot holds one embedded PNG and the box plot at most one (its outliers
    within the range shown), not an element per point."""
    page = (report / "report.html").read_text(encoding="utf-8")
    figures = dict(re.findall(r'<figure id="plot-([a-z-]+)">(.*?)</figure>', page, re.DOTALL))
    # source: matplotlib documentation, Artist.set_rasterized: a rasterised artist is written to a
    # vector file (SVG) as one embedded bitmap
    images = {name: body.count('xlink:href="data:image/png;base64,') for name, body in figures.items()}

    assert (1, 1, True) == (images["agreement"], images["kco"], images["percent-predicted"] <= 1)
    assert len(page) < 2_000_000  # about 3,000 sessions: the points no longer scale the page
