"""A planted archive audited once per test session (local pool, two workers, a fixed time)."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest

from bridge.audit.run import AuditSettings, Job, run_audit
from bridge.pipeline import PipelineSettings
from bridge.tables.files import mappings_dir
from tests.audit.planted import write_archive

NOW = datetime(2026, 12, 1, 12, tzinfo=UTC)
# CSV exports are read through Lowmarsh's field map; every other file is dlco-result/1 JSON
CSV_MAP = (("*.csv", mappings_dir() / "maps" / "lowmarsh-csv.toml"),)
JOB = Job(PipelineSettings(), 2.987, "traditional", NOW, emit_ndjson=True, map_patterns=CSV_MAP)


@pytest.fixture(scope="session")
def archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("archive")
    write_archive(root)
    return root


@pytest.fixture(scope="session")
def report(archive: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("report")
    run_audit([archive], folder, JOB, AuditSettings(workers=2, chunk_files=100))
    return folder
