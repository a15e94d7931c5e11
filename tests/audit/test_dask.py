"""The audit on a Dask LocalCluster writes the same findings.csv and NDJSON as a local run."""

from __future__ import annotations

from pathlib import Path

import pytest

from bridge.audit.run import AuditSettings, run_audit
from tests.audit.conftest import JOB

distributed = pytest.importorskip("distributed", reason="the [scale] extra (dask[distributed]) is not installed")


def test_a_local_cluster_writes_the_same_files_as_local_processes(archive: Path, report: Path, tmp_path: Path):
    """findings.csv and every NDJSON file are byte for byte those of the local run of the same archive."""
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        run_audit([archive], tmp_path, JOB, AuditSettings(chunk_files=100), scheduler=cluster.scheduler_address)
    names = ["findings.csv", *(f"ndjson/{p.name}" for p in sorted((report / "ndjson").iterdir()))]

    assert {n: (report / n).read_bytes() for n in names} == {n: (tmp_path / n).read_bytes() for n in names}
