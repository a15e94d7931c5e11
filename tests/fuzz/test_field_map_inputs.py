"""Fuzz: hostile CSV exports and legacy HL7 v2 feeds through their field maps and the one pipeline.

Each example mutates one of the two legacy samples (inserted delimiters, quotes, line breaks,
MLLP and HL7 delimiter characters, missing markers, huge or non-finite numbers, stray bytes,
deleted spans) and runs every session through read -> normalise -> derive -> check -> both
emitters. Per session, only the project's own ``InputError`` may come back; whatever is
emitted must be JSON with a transaction Bundle and an ORU^R01 that python-hl7 parses.
Budget: a tenth of the whole-path fuzz budget (40 examples by default; DLCO_BRIDGE_FUZZ_EXAMPLES
and CI scale it as they scale the rest).
"""

from __future__ import annotations

import json
import math
import os
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import hl7
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bridge.errors import InputError, ProcessingFailed
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, Route, process_all
from bridge.tables.field_map_parser import field_map
from bridge.tables.files import load_tables
from tests.maps.conftest import CSV_MAP, CSV_SAMPLE, HL7_MAP, HL7_SAMPLE

TABLES = load_tables()
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
MAPS = {
    "csv": field_map(
        CSV_MAP.read_text(encoding="utf-8"), CSV_MAP.name, TABLES.units, ZoneInfo, sex_codes=TABLES.hl7.sex_of_code
    ),
    "hl7": field_map(
        HL7_MAP.read_text(encoding="utf-8"), HL7_MAP.name, TABLES.units, ZoneInfo, sex_codes=TABLES.hl7.sex_of_code
    ),
}
SAMPLES = {"csv": CSV_SAMPLE.read_bytes(), "hl7": HL7_SAMPLE.read_bytes()}
ROUTES = (Route("fhir", "traditional"), Route("hl7", "si"))
HOSTILE = [";", ",", '"', '""', "\n", "\r", "\r\n", "|", "^", "~", "\\", "&", "\x0b", "\x1c", "-", "n/a", "",
           "1e999", "NaN", "-0", "9" * 40, "0,0000000000001", "é", "\x00", "\xff", "MSH|^~\\&|", "OBX|1|NM|HCHT^x^L|",
           "31.02.2026", "29.02.2025 25:61", "19650819"]  # fmt: skip


def _examples() -> int:
    override = os.environ.get("DLCO_BRIDGE_FUZZ_EXAMPLES")
    total = int(override) if override else (10_000 if os.environ.get("CI") else 400)
    return max(10, math.ceil(total / 10))


@st.composite
def hostile_legacy_input(draw: st.DrawFn) -> tuple[str, bytes]:
    kind = draw(st.sampled_from(sorted(SAMPLES)))
    data = bytearray(SAMPLES[kind])
    for _ in range(draw(st.integers(1, 4))):
        at = draw(st.integers(0, len(data)))
        if draw(st.booleans()):
            piece = draw(st.sampled_from(HOSTILE) | st.text(max_size=6))
            data[at:at] = piece.encode("latin-1" if kind == "csv" else "utf-8", errors="replace")
        else:
            data[at : at + draw(st.integers(1, 40))] = b""
    return kind, bytes(data)


def _check_payloads(outcome: Outcome) -> None:
    for payload in outcome.payloads:
        if payload.kind == "fhir":
            bundle = json.loads(payload.data)
            assert ("Bundle", "transaction") == (bundle["resourceType"], bundle["type"])
        else:
            message = hl7.parse(payload.data.decode("utf-8"))  # source: python-hl7 parser
            assert str(message.segment("MSH")[9]).startswith("ORU^R01")


@pytest.mark.filterwarnings("ignore::DeprecationWarning")
@settings(max_examples=_examples(), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(hostile_legacy_input())
def test_hostile_csv_and_hl7_are_refused_per_record_or_emitted_valid(case):
    """Every session of a mutated legacy file is an InputError (never a crash) or valid FHIR and HL7."""
    kind, data = case
    site = PipelineSettings(blocking=frozenset(), field_map=MAPS[kind])
    try:
        results = list(process_all(data, f"fuzz.{kind}", TABLES, site, now=NOW, routes=ROUTES))
    except InputError as exc:  # the file as a whole: not the map's format, unreadable
        assert not isinstance(exc, ProcessingFailed)
        return
    for result in results:
        if isinstance(result, InputError):
            assert not isinstance(result, ProcessingFailed)
            assert "\n" not in str(result)  # one line
        else:
            _check_payloads(result)
