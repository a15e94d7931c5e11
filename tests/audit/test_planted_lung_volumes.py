"""A planted archive of lung-volume errors: the audit's unit-jump check finds exactly what was planted.

Built here, in a temporary folder, from the invented whole report ``samples/11-whole-report.json``
(spirometry, static lung volumes and DLCO): four invented patients of one invented lab, two sessions each
a year apart, every value as in the sample (so no honest change between visits can look like a jump),
with these changes planted by hand:

- patient 1, second session: TLC written as 7.6 but labelled ``mL`` (it is litres): 0.0076 L after 7.6 L,
  a jump by 1/1000;
- patient 2, first session: RV written as 4200 ``mL`` and labelled so (the same 4.2 L as the second
  session): no jump, a control.
"""

from __future__ import annotations

import copy
import csv
import json
from collections import Counter
from pathlib import Path

import pytest

from bridge.audit.reduce import ARCHIVE_CHECKS
from bridge.audit.run import AuditSettings, run_audit
from bridge.tables.files import samples_dir
from tests.audit.conftest import JOB

SAMPLE = "11-whole-report.json"
PATIENTS = 4


def _write(root: Path) -> str:
    base = json.loads((samples_dir() / SAMPLE).read_text(encoding="utf-8"))
    for patient in range(PATIENTS):
        for visit in range(2):
            doc = copy.deepcopy(base)
            doc["test_id"] = f"LV-{patient}-{visit}"
            doc["patient"]["id"] = f"FICT-LV{patient:03d}"
            doc["performed_at"] = f"{2024 + visit}-03-05T10:40:00+00:00"
            volumes = doc["lung_volumes"]
            if patient == 1 and visit == 1:
                volumes["tlc"]["unit"] = "mL"  # 7.6 mL: litres labelled millilitres
            if patient == 2 and visit == 0:
                volumes["rv"] = {"value": 4200, "unit": "mL"}  # the same 4.2 L
            (root / f"{doc['test_id']}.json").write_text(json.dumps(doc), encoding="utf-8")
    return str(base["lab"]["name"])


@pytest.fixture(scope="module")
def planted(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    root = tmp_path_factory.mktemp("lung-volume-archive")
    return root, _write(root)


def _audit(archive: Path, report: Path, workers: int = 1) -> list[dict[str, str]]:
    run_audit([archive], report, JOB, AuditSettings(workers=workers, chunk_files=3))
    with open(report / "findings.csv", newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_the_audit_finds_exactly_the_planted_tlc_jump(planted: tuple[Path, str], tmp_path: Path):
    """Across records: one TLC jump (patient 1), and nothing for the control (patient 2's RV in mL)."""
    archive, lab = planted
    found = _audit(archive, tmp_path / "report")
    across = [(r["file"], r["record"], r["source"], r["test_id"], r["check"], r["severity"])
              for r in found if r["check"] in ARCHIVE_CHECKS]  # fmt: skip

    assert [(str(archive / "LV-1-1.json"), "", lab, "LV-1-1", "SERIES_UNIT_JUMP", "error")] == across
    # 7.6 mL is 0.0076 L: 0.0076 / 7.6 = 0.001, one thousandth of the first session's value
    (jump,) = [r for r in found if r["check"] == "SERIES_UNIT_JUMP"]
    assert jump["message"].startswith("TLC 0.0076 L is 0.001 x the previous session's 7.6 (test LV-1-0, ")

    # The records' own findings beyond those every copy of sample 11 carries, worked by hand from the sample:
    # TLC 0.0076 L is below any adult's (a unit mislabel); RV 4.2 L and FRC 5.5 L are each larger than it
    # (two impossible nestings); 100 x 4.2 / 0.0076 = 55263 % is not the reported RV/TLC 55 %; TLC - FRC =
    # 0.0076 - 5.5 = -5.49 L is not the reported IC 2.1 L (ERV = FRC - RV does not involve TLC).
    def checks(test_id: str) -> Counter[str]:
        return Counter(r["check"] for r in found if r["test_id"] == test_id and r["check"] not in ARCHIVE_CHECKS)

    untouched = checks("LV-0-0")
    assert {
        "LUNG_VOLUMES_UNIT_MISLABEL": 1,
        "LUNG_VOLUMES_IMPOSSIBLE": 2,
        "LUNG_VOLUMES_RATIO_MISMATCH": 1,
        "LUNG_VOLUMES_SUM_MISMATCH": 1,
    } == checks("LV-1-1") - untouched
    others = ("LV-0-1", "LV-1-0", "LV-2-0", "LV-2-1", "LV-3-0", "LV-3-1")  # the control's RV in mL too
    assert [untouched] * len(others) == [checks(test_id) for test_id in others]


def test_a_second_worker_and_a_dask_cluster_find_the_same(planted: tuple[Path, str], tmp_path: Path):
    """findings.csv is byte for byte the same on one worker, on two, and on a Dask LocalCluster."""
    archive, _ = planted
    _audit(archive, tmp_path / "one")
    _audit(archive, tmp_path / "two", workers=2)
    one = (tmp_path / "one" / "findings.csv").read_bytes()
    assert one == (tmp_path / "two" / "findings.csv").read_bytes()
    distributed = pytest.importorskip("distributed", reason="the [scale] extra (dask[distributed]) is not installed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        run_audit([archive], tmp_path / "dask", JOB, AuditSettings(chunk_files=3), scheduler=cluster.scheduler_address)

    assert one == (tmp_path / "dask" / "findings.csv").read_bytes()
