"""Shared fixtures: the bundled tables and samples."""

from __future__ import annotations

import logging
from collections.abc import Iterator
from pathlib import Path

import pytest

from bridge.model import Outcome
from bridge.pipeline import process
from bridge.tables import Tables
from bridge.tables.files import load_tables


@pytest.fixture(autouse=True)
def _bridge_logger_as_it_was() -> Iterator[None]:
    """A command run in a test configures the "dlco_bridge" logger for its process (a stream handler,
    no propagation: ``bridge.service.logs.configure``); the next test gets the logger as it was.

    Left configured, its handler writes to the finished test's closed stream, and pytest (9.1 and
    later) hands a logger that does not propagate its own capture handlers, so a test that makes it
    propagate again would see each record twice."""
    logger = logging.getLogger("dlco_bridge")
    handlers, propagate, level = list(logger.handlers), logger.propagate, logger.level
    yield
    logger.handlers[:] = handlers
    logger.propagate = propagate
    logger.setLevel(level)


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
