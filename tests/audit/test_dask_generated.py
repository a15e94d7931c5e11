"""On generated sessions (as the benchmarks make them), a Dask LocalCluster finds what the process pool finds."""

from __future__ import annotations

from pathlib import Path

import pytest

from benchmarks.bench_convert import generate, with_whole_report
from bridge.audit.run import AuditSettings, run_audit
from tests.audit.conftest import JOB

distributed = pytest.importorskip("distributed", reason="the [scale] extra (dask[distributed]) is not installed")


def test_findings_on_generated_sessions_are_the_same_on_dask(tmp_path: Path):
    """findings.csv byte for byte: 20 DLCO-only and 20 whole-report sessions, two local workers against Dask."""
    archive = tmp_path / "archive"
    archive.mkdir()
    sessions = generate(20, seed=26) + with_whole_report(generate(20, seed=27))
    for i, data in enumerate(sessions):
        (archive / f"{i:03d}.json").write_bytes(data)

    run_audit([archive], tmp_path / "pool", JOB, AuditSettings(workers=2, chunk_files=7))
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        run_audit([archive], tmp_path / "dask", JOB, AuditSettings(chunk_files=7), scheduler=cluster.scheduler_address)

    pool = (tmp_path / "pool" / "findings.csv").read_bytes()
    assert pool.count(b"\n") > 40  # generated sessions carry findings, most of them several
    assert pool == (tmp_path / "dask" / "findings.csv").read_bytes()
