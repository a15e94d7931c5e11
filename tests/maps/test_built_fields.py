"""Fields built from several columns or HL7 locations, date formats tried in order, and an assumed time of day."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import pytest

from bridge.errors import InputError, UnreadableInput
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.tables.field_map_parser import field_map
from tests.maps.conftest import HL7_SAMPLE, SMALL_CSV_MAP

HEADER = "site,number,day,time,patient,prefix,family,sex,born,height,dlco,dlco unit\n"
ROWS = [
    "NF,0042,2026-01-15,09:15,FICT-1,van,Fictive,F,15.01.1981,178,24.6,mL/min/mmHg\n",
    "NF,0043,2026-01-15,-,FICT-2,-,Fictive,F,1981-01-15,178,24.6,mL/min/mmHg\n",
]


def _map(tables: Tables, csv_extra: str = "", **fields: str) -> FieldMap:
    """The small test map with some of its [fields] lines replaced (key -> the new table)."""
    text = SMALL_CSV_MAP.format(delimiter=",", decimal=".", map_extra="", csv_extra=csv_extra)
    lines = text.splitlines()
    for key, spec in fields.items():
        at = next(i for i, t in enumerate(lines) if t.startswith(f'"{key}" ='))
        lines[at] = f'"{key}" = {spec}'
    return field_map("\n".join(lines), "built.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)


def _read(tables: Tables, rows: list[str], **fields: str) -> list[Outcome | InputError]:
    data = (HEADER + "".join(rows)).encode()
    return list(process_all(data, "x.csv", tables, PipelineSettings(field_map=_map(tables, **fields))))


BUILT = {
    "test_id": '{ column = ["site", "number"], join = "-" }',
    "performed_at": '{ column = ["day", "time"], format = "%Y-%m-%d %H:%M" }',
    "patient.family": '{ column = ["prefix", "family"] }',
    "patient.birth_date": '{ column = "born", format = ["%d.%m.%Y", "%Y-%m-%d"] }',
}


def test_a_code_a_date_time_and_a_name_from_two_columns_each(tables: Tables):
    """NF + 0042 -> NF-0042; 2026-01-15 + 09:15 in London (winter, +00:00); van + Fictive -> 'van Fictive'."""
    # source: Summer Time Order 2002 (UK): summer time from the last Sunday of March, so 15 January is UTC+0
    first = _read(tables, ROWS[:1], **BUILT)[0]
    assert isinstance(first, Outcome)
    got = (first.session.test_id, first.session.performed_at, first.session.patient.family)
    assert ("NF-0042", datetime(2026, 1, 15, 9, 15, tzinfo=UTC), "van Fictive") == got


def test_a_missing_part_is_left_out_and_a_missing_time_is_an_error_not_midnight(tables: Tables):
    """The second row: its prefix '-' is left out of the name, and its time '-' leaves a date the format refuses."""
    second = _read(tables, ROWS[1:], **BUILT)[0]
    expected = "x.csv: line 2, columns 'day' + 'time': a date-time in the map's format %Y-%m-%d %H:%M, got '2026-01-15'"
    assert expected == str(second)
    with_time = _read(tables, [ROWS[1].replace(",-,FICT", ",10:40,FICT")], **BUILT)[0]
    assert isinstance(with_time, Outcome)
    assert "Fictive" == with_time.session.patient.family


def test_formats_are_tried_in_order(tables: Tables):
    """A birth date written 15.01.1981 in one row and 1981-01-15 in another reads as one date with two formats."""
    rows = [ROWS[0], ROWS[1].replace(",-,FICT", ",10:40,FICT").replace("NF,0042", "NF,0044")]
    found = _read(tables, rows, **BUILT)
    dates = [r.session.patient.birth_date.isoformat() for r in found if isinstance(r, Outcome)]
    assert ["1981-01-15", "1981-01-15"] == dates


def test_assume_time_gives_a_date_only_source_the_time_the_map_says(tables: Tables):
    """assume_time = "07:30" on a date-only column: 2026-01-15 07:30 London time."""
    fields = {**BUILT, "performed_at": '{ column = "day", format = "%Y-%m-%d", assume_time = "07:30" }'}
    first = _read(tables, ROWS[:1], **fields)[0]
    assert isinstance(first, Outcome)
    assert datetime(2026, 1, 15, 7, 30, tzinfo=UTC) == first.session.performed_at


def test_rows_of_one_session_are_grouped_by_a_column_of_a_joined_test_id(tables: Tables):
    """rows = "manoeuvre" with test_id from site + number, grouped by the number: one session per number."""
    fmap = _map(tables, csv_extra='rows = "manoeuvre"\ngroup_by = "number"', **BUILT)
    rows = [ROWS[0], ROWS[0], ROWS[0].replace("0042", "0045")]
    found = list(process_all((HEADER + "".join(rows)).encode(), "x.csv", tables, PipelineSettings(field_map=fmap)))
    assert ["NF-0042", "NF-0045"] == [r.session.test_id for r in found if isinstance(r, Outcome)]


# ---- HL7: locations joined, and one map for timestamps with and without an offset ----------------------

TEXT = HL7_SAMPLE.read_text(encoding="utf-8")
FIRST = "MSH" + TEXT.split("MSH")[1]


def test_the_bundled_hl7_map_reads_obr_7_with_and_without_its_offset_alike(hl7_map: FieldMap, tables: Tables):
    """202603031440-0700 and 202603031440 (read in America/Denver, -07:00 in March) are the same moment."""
    # source: US Energy Policy Act of 2005, s. 110 (daylight time from the second Sunday of March: 8 March 2026)
    assert "|||202603031440-0700" in FIRST
    without = FIRST.replace("|||202603031440-0700", "|||202603031440")
    moments = [
        next(read_hl7(m.encode(), "feed.hl7", hl7_map, tables.units)).session.performed_at  # type: ignore[union-attr]
        for m in (FIRST, without)
    ]
    expected = datetime(2026, 3, 3, 14, 40, tzinfo=timezone(timedelta(hours=-7)))
    assert [expected, expected] == moments


def test_several_locations_are_joined(hl7_map: FieldMap, tables: Tables):
    """at = ["PID-5.2", "PID-5.1"], join = " ": the given name, then the family name (Fictive^Bryony)."""
    # source: HL7 v2.5.1 ch. 3.4.2.5 (PID-5 patient name: XPN, family name first, then given name)
    from tests.maps.conftest import HL7_MAP

    text = HL7_MAP.read_text(encoding="utf-8").replace(
        '"patient.family" = { at = "PID-5.1" }', '"patient.family" = { at = ["PID-5.2", "PID-5.1"] }'
    )
    fmap = field_map(text, "joined.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)
    record = next(read_hl7(FIRST.encode(), "feed.hl7", fmap, tables.units))
    cell = next(c for c in record.cells if c.source.target.path == "patient.family")
    assert ("Bryony Fictive", "message 1, PID-5.2 + PID-5.1") == (cell.text, cell.where)


def test_an_hl7_file_in_another_encoding_names_the_byte(hl7_map: FieldMap, tables: Tables):
    """A Latin-1 'é' in a UTF-8 feed: the byte offset, the byte, and Latin-1 suggested."""
    data = FIRST.replace("Fictive^Bryony", "Fictivé^Bryony").encode("latin-1")
    offset = data.index(b"\xe9")  # source: ISO/IEC 8859-1 code table (é is 0xE9)
    with pytest.raises(UnreadableInput) as caught:
        list(read_hl7(data, "feed.hl7", hl7_map, tables.units))
    expected = (
        f"feed.hl7: byte {offset}: utf-8 text as the map says (hl7.encoding), got byte 0xe9; "
        'the file reads as latin-1 (set encoding = "latin-1")'
    )
    assert expected == str(caught.value)
