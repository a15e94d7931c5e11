"""Shared fixtures: the bundled tables and samples."""

from __future__ import annotations

from pathlib import Path

import pytest

from bridge.model import Outcome
from bridge.pipeline import process
from bridge.tables import Tables
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "samples"
GOOD_SAMPLES = sorted(p for p in SAMPLES.glob("*.json") if "malformed" not in p.name)


@pytest.fixture(scope="session")
def tables() -> Tables:
    return load_tables()


@pytest.fixture(scope="session")
def sample_outcomes(tables: Tables) -> dict[str, Outcome]:
    """Every good sample processed once, by file stem."""
    return {p.stem: process(p.read_bytes(), p.name, tables) for p in GOOD_SAMPLES}
