"""A planted archive of reference sets mixed within a lab: the audit finds the labs that mix, and only them.

Built here, in a temporary folder, from the invented reports ``samples/10-spirometry-and-dlco.json``
(spirometry) and ``samples/11-whole-report.json`` (spirometry and static lung volumes), each session its
own invented patient, with the set each lab's own report names (``spirometry.reference_set``,
``lung_volumes.reference_set``, docs/format.md) planted by hand:

- Lowmarsh (the samples' own invented lab): spirometry named GLI-2012 in three sessions and GLI Global
  in two (mixed: found); lung volumes named ECSC 1993 in both of its whole reports (consistent);
- Saltreach: spirometry named GLI-2012 in both sessions (consistent); lung volumes named ECSC 1993 in
  two sessions and GLI-2021 in one (mixed: found);
- Highcairn: spirometry GLI Global and lung volumes GLI-2021 throughout, and one session that names no
  set at all (nothing to find: a set not named is not a second set). Naming one set for spirometry and
  another for lung volumes is no mix either: each section is watched on its own.
"""

from __future__ import annotations

import copy
import csv
import json
from pathlib import Path

import pytest

from bridge.audit.reduce import ARCHIVE_CHECKS
from bridge.audit.run import AuditSettings, run_audit
from bridge.tables.files import samples_dir
from tests.audit.conftest import JOB

LOWMARSH = "Lowmarsh Respiratory Physiology Lab (fictional)"
SALTREACH = "Saltreach Breathing Lab (fictional)"
HIGHCAIRN = "Highcairn Lung Function Unit (fictional)"
# file name: (lab, sample, spirometry set, lung-volume set); None: the field is left out
PLAN = {
    "LS-0": (LOWMARSH, "10-spirometry-and-dlco", "GLI-2012", None),
    "LS-1": (LOWMARSH, "10-spirometry-and-dlco", "GLI-2012", None),
    "LS-2": (LOWMARSH, "10-spirometry-and-dlco", "GLI-2012", None),
    "LS-3": (LOWMARSH, "10-spirometry-and-dlco", "GLI Global", None),
    "LS-4": (LOWMARSH, "10-spirometry-and-dlco", "GLI Global", None),
    "LV-0": (LOWMARSH, "11-whole-report", None, "ECSC 1993"),
    "LV-1": (LOWMARSH, "11-whole-report", None, "ECSC 1993"),
    "SS-0": (SALTREACH, "10-spirometry-and-dlco", "GLI-2012", None),
    "SS-1": (SALTREACH, "10-spirometry-and-dlco", "GLI-2012", None),
    "SV-0": (SALTREACH, "11-whole-report", None, "ECSC 1993"),
    "SV-1": (SALTREACH, "11-whole-report", None, "GLI-2021"),
    "SV-2": (SALTREACH, "11-whole-report", None, "ECSC 1993"),
    "HS-0": (HIGHCAIRN, "10-spirometry-and-dlco", "GLI Global", None),
    "HV-0": (HIGHCAIRN, "11-whole-report", "GLI Global", "GLI-2021"),
    "HV-1": (HIGHCAIRN, "11-whole-report", "GLI Global", "GLI-2021"),
    "HV-2": (HIGHCAIRN, "11-whole-report", None, None),
}


def _write(root: Path) -> None:
    samples = {
        name: json.loads((samples_dir() / f"{name}.json").read_text(encoding="utf-8"))
        for name in ("10-spirometry-and-dlco", "11-whole-report")
    }
    for number, (name, (lab, sample, spirometry_set, volumes_set)) in enumerate(PLAN.items()):
        doc = copy.deepcopy(samples[sample])
        doc["test_id"] = f"RS-{name}"
        doc["patient"]["id"] = f"FICT-RS{number:03d}"  # each session its own invented patient
        doc["lab"]["name"] = lab
        if spirometry_set is not None:
            doc["spirometry"]["reference_set"] = spirometry_set
        if volumes_set is not None:
            doc["lung_volumes"]["reference_set"] = volumes_set
        (root / f"{name}.json").write_text(json.dumps(doc), encoding="utf-8")


@pytest.fixture(scope="module")
def planted(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("reference-set-archive")
    _write(root)
    return root


def _audit(archive: Path, report: Path) -> list[dict[str, str]]:
    run_audit([archive], report, JOB, AuditSettings(workers=1, chunk_files=4))
    with open(report / "findings.csv", newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_the_audit_finds_the_labs_that_mix_reference_sets_and_no_other(planted: Path, tmp_path: Path):
    """Lowmarsh's spirometry sets and Saltreach's lung-volume sets are mixed; Highcairn names one set each."""
    found = _audit(planted, tmp_path / "report")
    across = [
        (r["file"], r["source"], r["test_id"], r["check"], r["severity"]) for r in found if r["check"] in ARCHIVE_CHECKS
    ]

    # one finding per lab and section, at the first file of the set named less often; sorted by source
    assert [
        (str(planted / "LS-3.json"), LOWMARSH, "", "REFERENCE_SETS_MIXED", "warning"),
        (str(planted / "SV-1.json"), SALTREACH, "", "REFERENCE_SETS_MIXED", "warning"),
    ] == across
    messages = [r["message"] for r in found if r["check"] == "REFERENCE_SETS_MIXED"]
    # counted by hand from PLAN; the sets listed in text order ("GLI Global" before "GLI-2012": a space
    # sorts before a hyphen in ASCII)
    assert [
        f"2 spirometry reference sets within one source: GLI Global (2, first in {planted / 'LS-3.json'}), "
        f"GLI-2012 (3, first in {planted / 'LS-0.json'}); check each against the lab's own.",
        f"2 lung-volume reference sets within one source: ECSC 1993 (2, first in {planted / 'SV-0.json'}), "
        f"GLI-2021 (1, first in {planted / 'SV-1.json'}); check each against the lab's own.",
    ] == messages


def test_a_set_left_unnamed_is_not_a_second_set(planted: Path, tmp_path: Path):
    """Highcairn, whose HV-2 names no set beside sessions naming GLI Global and GLI-2021, has no finding across
    records; HV-2 was read (every copy of sample 11 has spirometry findings of its own, its grades among them)."""
    found = _audit(planted, tmp_path / "report")

    assert [] == [r for r in found if r["source"] == HIGHCAIRN and r["check"] in ARCHIVE_CHECKS]
    assert "SPIROMETRY_GRADE" in {r["check"] for r in found if r["test_id"] == "RS-HV-2"}
