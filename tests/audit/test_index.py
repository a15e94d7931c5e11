"""The audit's on-disk index: what the checks across records get back, and that it leaves nothing behind."""

from __future__ import annotations

from pathlib import Path

from bridge.audit.index import ArchiveIndex
from bridge.audit.reduce import Visit
from bridge.audit.rows import Row
from bridge.cli import main
from bridge.tables.files import samples_dir

# FEV1 and FVC before the bronchodilator (L), none after; then TLC, FRC, RV and VC (L)
SPIRO = (2.5, 3.25, None, None, 5.8, 3.0, 1.9, 3.9)


def _row(file: str, test_id: str, sha: str, performed_at: str, dlco: float | None = 20.0, **extra: str) -> Row:
    # the series of bridge.audit.rows.SERIES: DLCO, FEV1 and FVC before and after the bronchodilator, lung volumes
    series = (dlco, *SPIRO)
    return Row(
        file=file, source="Lab A", findings=(), test_id=test_id, sha256=sha, patient="sys|P1",
        sex=extra.get("sex", "female"), birth_date="1970-01-01", performed_at=performed_at, dlco=dlco, series=series,
    )  # fmt: skip


def test_contents_name_each_content_by_its_first_file(tmp_path: Path):
    """Two files of one content and a third of another: the content groups as written out by hand."""
    rows = [
        _row("b.json", "T-1", "aa", "2020-01-01T10:00:00+00:00"),
        _row("a.json", "T-1", "aa", "2020-01-01T10:00:00+00:00"),
        _row("c.json", "T-1", "bb", "2020-01-01T10:00:00+00:00"),
        _row("d.json", "T-2", "cc", "2021-01-01T10:00:00+00:00"),
    ]
    with ArchiveIndex(tmp_path) as index:
        index.add(rows[:2])
        index.add(rows[2:])
        contents = list(index.contents())

    # hand expectation: per (source, test id) each hash with the smallest file name carrying it
    assert [("Lab A", "T-1", {"aa": "a.json", "bb": "c.json"}), ("Lab A", "T-2", {"cc": "d.json"})] == contents


def test_visits_come_back_per_patient_in_time_then_file_order(tmp_path: Path):
    """Rows added out of order come back sorted by time, then file; a row without DLCO is kept."""
    rows = [
        _row("z.json", "T-3", "c", "2022-05-01T09:00:00+00:00"),
        _row("y.json", "T-2", "b", "2021-05-01T09:00:00+00:00", dlco=None),
        _row("x.json", "T-1", "a", "2022-05-01T09:00:00+00:00", sex="male"),
    ]
    with ArchiveIndex(tmp_path) as index:
        index.add(rows)
        patients = list(index.patients())

    assert [
        (
            "sys|P1",
            [
                Visit(
                    "2021-05-01T09:00:00+00:00", "y.json", "", "Lab A", "T-2", "female", "1970-01-01", (None, *SPIRO)
                ),
                Visit("2022-05-01T09:00:00+00:00", "x.json", "", "Lab A", "T-1", "male", "1970-01-01", (20.0, *SPIRO)),
                Visit(
                    "2022-05-01T09:00:00+00:00", "z.json", "", "Lab A", "T-3", "female", "1970-01-01", (20.0, *SPIRO)
                ),
            ],
        )
    ] == patients


def test_an_audit_leaves_no_index_file_in_its_report_folder(tmp_path: Path):
    """The scratch index is removed once the report is written."""
    report = tmp_path / "report"

    assert 0 == main(["audit", str(samples_dir()), "--report", str(report), "--workers", "1"])
    assert [] == sorted(p.name for p in report.iterdir() if p.name.startswith(".audit-index-"))
    assert (report / "findings.csv").is_file()
