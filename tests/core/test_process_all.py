"""One path for every reader: process_all takes the records any reader yields; process is its one-session case."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest

from bridge.errors import BlockedByFinding, InputError, InvalidField, UnreadableInput
from bridge.pipeline import PipelineSettings, Route, process, process_all
from bridge.readers.json_export import read_records
from bridge.tables.files import load_field_map, load_tables

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = sorted((ROOT / "samples").glob("*.json"))
TABLES = load_tables()
NOW = datetime(2026, 6, 1, 9, 0, tzinfo=UTC)  # after every sample's test: a test dated after "now" is refused
ROUTES = (Route("fhir", "si"), Route("hl7", "traditional"))


@pytest.mark.parametrize("sample", SAMPLES, ids=lambda p: p.name)
def test_the_json_reader_yields_one_record_per_document(sample: Path):
    """A dlco-result/1 document is one record: its session, or the error that refuses it, never both."""
    records = list(read_records(sample.read_bytes(), sample.name, TABLES.units))

    assert 1 == len(records)
    assert (records[0].session is None) != (records[0].error is None)


@pytest.mark.parametrize("sample", SAMPLES, ids=lambda p: p.name)
def test_process_is_the_one_result_of_process_all(sample: Path):
    """process returns what process_all yields for a one-session input, or raises the error it yields."""
    data = sample.read_bytes()
    (expected,) = list(process_all(data, sample.name, TABLES, now=NOW, routes=ROUTES))

    if isinstance(expected, InputError):
        with pytest.raises(type(expected)) as raised:
            process(data, sample.name, TABLES, now=NOW, routes=ROUTES)
        assert str(expected) == str(raised.value)
    else:
        assert expected == process(data, sample.name, TABLES, now=NOW, routes=ROUTES)


def test_a_document_over_the_size_limit_is_its_one_records_error():
    """Over max_input_bytes, process_all yields the refusal (the other inputs go on); process raises it."""
    data = (ROOT / "samples" / "01-healthy-adult.json").read_bytes()
    settings = PipelineSettings(max_input_bytes=len(data) - 1)

    (result,) = list(process_all(data, "big.json", TABLES, settings))
    with pytest.raises(UnreadableInput):
        process(data, "big.json", TABLES, settings)
    assert isinstance(result, UnreadableInput)
    assert f"big.json: (file): at most {len(data) - 1} bytes, got {len(data)}" == str(result)


def test_the_gate_refuses_a_json_record_as_it_does_a_mapped_one():
    """Sample 04 with blocking COHB_RAISED: process_all yields the refusal carrying the checked record."""
    data = (ROOT / "samples" / "04-raised-cohb.json").read_bytes()
    settings = PipelineSettings(blocking=frozenset({"COHB_RAISED"}))

    (result,) = list(process_all(data, "04.json", TABLES, settings, now=NOW, routes=ROUTES))

    assert isinstance(result, BlockedByFinding)
    assert result.outcome is not None
    assert "COHB_RAISED" in {f.code for f in result.outcome.findings}


def test_process_refuses_an_input_of_other_than_one_session():
    """The CSV export of many sessions through its map: process_all yields each, process refuses the file."""
    fmap = load_field_map(ROOT / "mappings" / "maps" / "lowmarsh-csv.toml", TABLES)
    data = (ROOT / "samples" / "legacy" / "lowmarsh-results.csv").read_bytes()
    settings = PipelineSettings(field_map=fmap)

    count = len(list(process_all(data, "lowmarsh-results.csv", TABLES, settings)))
    with pytest.raises(InvalidField) as raised:
        process(data, "lowmarsh-results.csv", TABLES, settings)

    assert count > 1
    assert f"lowmarsh-results.csv: (file): one session, got {count} (use process_all)" == str(raised.value)
