"""A planted archive of spirometry errors: the audit's checks across records find exactly what was planted.

Built here, in a temporary folder, from the invented complete report ``samples/10-spirometry-and-dlco.json``:
five invented patients of one invented lab, two sessions each a year apart, every value as in the sample
(so no honest change between visits can look like a jump), with these errors planted by hand:

- patient 1, second session: the pre-bronchodilator FEV1 written as 1.92 but labelled ``mL`` (it is litres):
  FEV1 0.00192 L after 1.92 L, a jump by 1/1000;
- patient 2, second session: the post-bronchodilator FVC written 3240 ``mL`` in the first session and
  3.24 ``L`` in the second is no jump (the same volume), so nothing is planted there: a control;
- patient 3, second session: the pre-bronchodilator phase left out (a post value without its pre).

(Reference sets mixed within a lab, ``spirometry.reference_set``, are planted in
``tests/audit/test_planted_reference_sets.py``.)
"""

from __future__ import annotations

import copy
import csv
import json
from collections import Counter
from pathlib import Path

import pytest

from bridge.audit.page import read_meanings
from bridge.audit.reduce import ARCHIVE_CHECKS
from bridge.audit.run import AuditSettings, run_audit
from bridge.tables.files import samples_dir
from tests.audit.conftest import JOB
from tests.audit.test_report_page import load, parse

LAB = "Lowmarsh Respiratory Physiology Lab (fictional)"  # the sample's own (invented) lab
PATIENTS = 5


def _write(root: Path) -> None:
    base = json.loads((samples_dir() / "10-spirometry-and-dlco.json").read_text(encoding="utf-8"))
    for patient in range(PATIENTS):
        for visit in range(2):
            doc = copy.deepcopy(base)
            doc["test_id"] = f"SP-{patient}-{visit}"
            doc["patient"]["id"] = f"FICT-SP{patient:03d}"
            doc["performed_at"] = f"{2024 + visit}-03-05T10:40:00+00:00"
            spirometry = doc["spirometry"]
            if patient == 1 and visit == 1:
                spirometry["pre"]["results"]["fev1"]["unit"] = "mL"  # 1.92 mL: a unit mislabel
            if patient == 2 and visit == 0:
                spirometry["post"]["results"]["fvc"] = {"value": 3240, "unit": "mL"}  # the same 3.24 L
            if patient == 3 and visit == 1:
                del spirometry["pre"]
            (root / f"{doc['test_id']}.json").write_text(json.dumps(doc), encoding="utf-8")


@pytest.fixture(scope="module")
def planted(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("spirometry-archive")
    _write(root)
    return root


def _audit(archive: Path, report: Path, **options: object) -> list[dict[str, str]]:
    run_audit([archive], report, JOB, AuditSettings(workers=1, chunk_files=3), **options)  # type: ignore[arg-type]
    with open(report / "findings.csv", newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_the_audit_finds_exactly_the_planted_spirometry_errors(planted: Path, tmp_path: Path):
    """Across records: one FEV1 jump (patient 1) and one lab with a post value without its pre (patient 3)."""
    found = _audit(planted, tmp_path / "report")
    across = [(r["file"], r["record"], r["source"], r["test_id"], r["check"], r["severity"]) for r in found[-2:]]
    assert across == [  # the archive's findings, and no others, come last
        (r["file"], r["record"], r["source"], r["test_id"], r["check"], r["severity"])
        for r in found
        if r["check"] in ARCHIVE_CHECKS
    ]
    expected_across = [
        (str(planted / "SP-3-1.json"), "", LAB, "", "POST_WITHOUT_PRE_IN_SOURCE", "warning"),
        (str(planted / "SP-1-1.json"), "", LAB, "SP-1-1", "SERIES_UNIT_JUMP", "error"),
    ]  # the archive's findings come last, sorted by source, then test id ("" first)

    assert expected_across == across
    # 1.92 mL is 0.00192 L: 0.00192 / 1.92 = 0.001, one thousandth of the first session's value
    assert found[-1]["message"].startswith(
        "FEV1 (pre-bronchodilator) 0.00192 L is 0.001 x the previous session's 1.92 (test SP-1-0, "
    )
    # every session with spirometry has post values (10); one of them has neither pre FEV1 nor pre FVC
    assert found[-2]["message"].startswith(
        "1 of the 10 sessions of this source with post-bronchodilator values came without a pre-bronchodilator "
        "value (FEV1 in 1, FVC in 1), the first here;"
    )

    # The records' own findings beyond those every copy of sample 10 carries: the mislabelled FEV1 is
    # implausible (and so is FEV1/FVC from it), the post values without their pre are each a finding.
    def checks(test_id: str) -> Counter[str]:
        return Counter(r["check"] for r in found[:-2] if r["test_id"] == test_id)

    untouched = checks("SP-0-0")  # an untouched copy; a Counter difference keeps what a session has beyond it
    assert ({"SPIROMETRY_UNIT_MISLABEL": 1, "SPIROMETRY_RATIO_MISMATCH": 1}) == checks("SP-1-1") - untouched
    assert {"SPIROMETRY_POST_WITHOUT_PRE": 2} == checks("SP-3-1") - untouched  # FEV1 and FVC
    others = ("SP-0-1", "SP-1-0", "SP-2-0", "SP-2-1", "SP-3-0", "SP-4-0", "SP-4-1")  # the FVC in mL too
    assert [untouched] * len(others) == [checks(test_id) for test_id in others]


def test_the_control_is_no_jump_and_other_sessions_find_nothing_across_records(planted: Path, tmp_path: Path):
    """3240 mL then 3.24 L is one volume: no jump; no patient but 1 has a series finding."""
    found = _audit(planted, tmp_path / "report")

    assert ["SP-1-1"] == [r["test_id"] for r in found if r["check"] == "SERIES_UNIT_JUMP"]


def test_a_second_worker_and_a_dask_cluster_find_the_same(planted: Path, tmp_path: Path):
    """findings.csv is byte for byte the same on one worker, on two, and on a Dask LocalCluster."""
    _audit(planted, tmp_path / "one")
    run_audit([planted], tmp_path / "two", JOB, AuditSettings(workers=2, chunk_files=3))
    one = (tmp_path / "one" / "findings.csv").read_bytes()
    assert one == (tmp_path / "two" / "findings.csv").read_bytes()
    distributed = pytest.importorskip("distributed", reason="the [scale] extra (dask[distributed]) is not installed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        run_audit([planted], tmp_path / "dask", JOB, AuditSettings(chunk_files=3), scheduler=cluster.scheduler_address)

    assert one == (tmp_path / "dask" / "findings.csv").read_bytes()


def test_the_page_shows_the_spirometry_findings_across_records(planted: Path, tmp_path: Path):
    """In headless Chromium: a group for each check across records, its meaning from docs/findings.md and an
    example naming the planted file (the helpers of tests/audit/test_report_page.py)."""
    report = tmp_path / "report"
    _audit(planted, report)
    dom, console = load(report / "report.html", tmp_path / "profile")
    root, meanings = parse(dom), read_meanings()

    assert [] == console
    for check, file in (("SERIES_UNIT_JUMP", "SP-1-1.json"), ("POST_WITHOUT_PRE_IN_SOURCE", "SP-3-1.json")):
        group = root.by_id(f"check-{check}")
        said = group.find("p", cls="meaning")[0].text()
        assert (meanings[check].when in said, meanings[check].action in said) == (True, True)
        assert ["1", [str(planted / file)]] == [
            group.find(cls="count")[0].text(),
            [row[0] for row in group.find("tbody")[0].rows()],
        ]
