"""The audit of a planted archive finds exactly what was planted, and runs the same on 1 or 2 workers."""

from __future__ import annotations

import csv
import json
import os
from collections import Counter
from pathlib import Path

from bridge.audit.run import AuditSettings, run_audit
from bridge.inputs import find_inputs
from bridge.tables.field_map_model import MapChoice
from tests.audit import planted
from tests.audit.conftest import JOB


def _findings(report: Path) -> list[dict[str, str]]:
    with open(report / "findings.csv", newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_findings_csv_has_the_documented_header(report: Path):
    """findings.csv starts with source,test_id,check,severity,message."""
    assert "source,test_id,check,severity,message" == (report / "findings.csv").read_text().splitlines()[0]


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
    sources = {(row["check"], row["source"]) for row in found if row["test_id"] == ""}
    assert {
        ("UNIT_CONVENTIONS_MIXED", planted.SALTREACH),
        ("REFERENCE_SETS_MIXED", planted.BRACKENFOLD),
    } == {s for s in sources if not s[0].startswith("UN") or s[0] == "UNIT_CONVENTIONS_MIXED"}


def test_summary_counts_files_sessions_and_clean_ones(report: Path):
    """summary.json counts every file, the sessions read and the clean ones (hand-counted plan)."""
    summary = json.loads((report / "summary.json").read_text())

    # the files read: the readable ones, three half-written and two of another format; scan.pdf is skipped
    assert (planted.READABLE + 5, 1, planted.READABLE, planted.CLEAN) == (
        summary["files"],
        summary["skipped"],
        summary["sessions_read"],
        summary["clean"],
    )
    assert dict(planted.PLANTED) == summary["findings_by_check"]


def test_ndjson_holds_the_clean_sessions_and_lists_the_others(report: Path):
    """One DiagnosticReport per clean session; quarantined.csv lists the error records and the unreadable files."""
    reports = (report / "ndjson" / "DiagnosticReport.ndjson").read_text().splitlines()
    with open(report / "ndjson" / "quarantined.csv", newline="", encoding="utf-8") as handle:
        quarantined = list(csv.DictReader(handle))

    assert planted.CLEAN == len(reports)
    # the Hb wrong-way and unit-mislabel records, and five files that could not be read as sessions
    assert planted.HB_WRONG + len(planted.JUMPED) + 5 == len(quarantined)


def test_one_worker_writes_the_same_files_as_two(archive: Path, report: Path, tmp_path: Path):
    """The order of results is the walk's, so 1 and 2 workers write the same bytes."""
    run_audit([archive], tmp_path, JOB, AuditSettings(workers=1, chunk_files=333))
    ndjson = [f"ndjson/{p.name}" for p in (report / "ndjson").iterdir()]
    names = ["findings.csv", "summary.json", "report.html", *ndjson]

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
    """Thousands of points, yet the page holds one embedded PNG per scatter plot and one for the box plot's
    outliers, not an element per point."""
    page = (report / "report.html").read_text(encoding="utf-8")
    # source: matplotlib documentation, Artist.set_rasterized: a rasterised artist is written to a
    # vector file (SVG) as one embedded bitmap
    assert 3 == page.count('xlink:href="data:image/png;base64,')
    assert len(page) < 2_000_000  # about 3,000 sessions: the points no longer scale the page
