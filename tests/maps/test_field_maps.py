"""Field map files: the bundled maps read, and a broken map is one error naming file, line and key."""

from __future__ import annotations

from zoneinfo import ZoneInfo

import pytest

from bridge.errors import MappingError
from bridge.tables.canonical_fields import canonical_fields
from bridge.tables.field_map_model import MapChoice
from bridge.tables.field_map_parser import field_map
from tests.maps.conftest import CSV_MAP, SMALL_CSV_MAP


def _small(**replace: str) -> str:
    text = SMALL_CSV_MAP.format(delimiter=",", decimal=".", map_extra="", csv_extra="")
    for old, new in replace.items():
        text = text.replace(old, new)
    return text


def _error(text: str, tables) -> str:
    with pytest.raises(MappingError) as caught:
        field_map(text, "maps/site.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)
    return str(caught.value)


CASES = {
    "unknown canonical field": (
        {'"patient.height"': '"patient.shoe_size"'},
        'maps/site.toml: line 26: fields."patient.shoe_size": a canonical field of dlco-result/1 '
        "(docs/field-maps.md lists them)",
    ),
    "unknown unit": (
        {'unit = "cm"': 'unit = "hands"'},
        'maps/site.toml: line 26: fields."patient.height".unit: a unit in mappings/units.toml or in [units] of '
        "this map, got 'hands'",
    ),
    "unit of the wrong dimension": (
        {'unit = "cm"': 'unit = "kg"'},
        "maps/site.toml: line 26: fields.\"patient.height\".unit: a length unit, got 'kg' (mass)",
    ),
    "quantity without a unit": (
        {', unit = "cm"': ""},
        'maps/site.toml: line 26: fields."patient.height": its unit: one of unit, unit_column or unit_from '
        "(a quantity needs a unit)",
    ),
    "percent on a field that is not a gas fraction": (
        {'{ column = "height", unit = "cm" }': '{ column = "height", unit = "cm", percent = true }'},
        'maps/site.toml: line 26: fields."patient.height".percent: true or false, and true only on a gas fraction',
    ),
    "a date-time whose format reads no time of day": (
        {'datetime_format = "%Y-%m-%d %H:%M"': 'datetime_format = "%Y-%m-%d"'},
        "maps/site.toml: line 19: fields.\"performed_at\": a time of day: values.datetime_format '%Y-%m-%d' reads "
        'a date only; read the time too (column = ["date column", "time column"], format = "%d.%m.%Y %H:%M") '
        'or say the time to assume (assume_time = "00:00")',
    ),
    "a date-time field's own date-only format": (
        {'{ column = "when" }': '{ column = "when", format = ["%Y-%m-%d %H:%M", "%Y-%m-%d"] }'},
        'maps/site.toml: line 19: fields."performed_at": a time of day: fields."performed_at".format '
        "'%Y-%m-%d' reads a date only",
    ),
    "assume_time with a format that reads a time": (
        {'{ column = "when" }': '{ column = "when", assume_time = "12:00" }'},
        'maps/site.toml: line 19: fields."performed_at".assume_time: a date-only format to apply it to '
        "(values.datetime_format reads a time)",
    ),
    "assume_time that is not a time of day": (
        {'{ column = "when" }': '{ column = "when", format = "%Y-%m-%d", assume_time = "noon" }'},
        'maps/site.toml: line 19: fields."performed_at".assume_time: a time of day "HH:MM" on a date-time field, '
        "got 'noon'",
    ),
    "format on a field that is not a date": (
        {'{ column = "patient" }': '{ column = "patient", format = "%Y" }'},
        'maps/site.toml: line 21: fields."patient.id".format: no format (patient.id is not a date or date-time)',
    ),
    "several columns for a quantity": (
        {'{ column = "height", unit = "cm" }': '{ column = ["height", "inches"], unit = "cm" }'},
        'maps/site.toml: line 26: fields."patient.height".column: one source (only text, date and date-time '
        "fields are joined)",
    ),
    "a list of one column": (
        {'{ column = "family" }': '{ column = ["family"] }'},
        'maps/site.toml: line 23: fields."patient.family".column: non-empty text, or a list of two or more',
    ),
    "join without several columns": (
        {'{ column = "family" }': '{ column = "family", join = "-" }'},
        'maps/site.toml: line 23: fields."patient.family".join: text, beside a list of columns or locations',
    ),
    "csv group_by not a column of test_id": (
        {
            '"test_id" = { column = "id" }': '"test_id" = { column = ["site", "id"] }',
            'delimiter = ","': 'delimiter = ","\nrows = "manoeuvre"\ngroup_by = "number"',
        },
        "maps/site.toml: line 10: csv.group_by: a column of \"test_id\" ('site' or 'id')",
    ),
    "bad decimal separator": (
        {'decimal = "."': 'decimal = "·"'},
        "maps/site.toml: line 12: values.decimal: one of ., ,, got '·'",
    ),
    "unknown key": (
        {'format = "csv"': 'format = "csv"\ncolour = "blue"'},
        "maps/site.toml: line 5: map.colour: one of format, name, on_bad_record, repeatability, source",
    ),
    "unknown format": (
        {'format = "csv"': 'format = "xlsx"'},
        "maps/site.toml: line 4: map.format: one of csv, hl7v2, got 'xlsx'",
    ),
    "bad time zone": (
        {"Europe/London": "Mars/Olympus"},
        "maps/site.toml: line 15: values.time_zone: an IANA time zone such as Europe/London, got 'Mars/Olympus'",
    ),
    "broken TOML": ({'"test_id" = {': '"test_id" = '}, "maps/site.toml: file: valid TOML"),
    "a spirometry manoeuvre without its number in a CSV map": (
        {'"patient.height" = {': '"spirometry.pre.manoeuvres.fev1" = {'},
        'maps/site.toml: line 26: fields."spirometry.pre.manoeuvres.fev1": the manoeuvre\'s number, such as '
        "spirometry.pre.manoeuvres[1].fev1 (one column each)",
    ),
    "a number on a DLCO manoeuvre field": (
        {'"patient.height" = {': '"manoeuvres[1].inspired_volume" = {'},
        'maps/site.toml: line 26: fields."manoeuvres[1].inspired_volume": a number only on an item of a list '
        "inside an object",
    ),
}


@pytest.mark.parametrize("case", CASES, ids=list(CASES))
def test_a_broken_map_names_file_line_and_key(case, tables):
    """Each mistake is one MappingError naming the map file, the line and the key at fault."""
    change, expected = CASES[case]
    assert expected == _error(_small(**change), tables)[: len(expected)]


def test_the_bundled_maps_read(tables):
    """Both maps in mappings/maps/ are valid."""
    from tests.maps.conftest import HL7_MAP

    names = [
        field_map(
            p.read_text(encoding="utf-8"), p.name, tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code
        ).format
        for p in (CSV_MAP, HL7_MAP)
    ]
    assert ["csv", "hl7v2"] == names


def test_canonical_fields_follow_the_model():
    """The fields a map may fill are those of docs/format.md, e.g. manoeuvre volumes and predicted values."""
    fields = canonical_fields()
    assert ("quantity", "volume", "L") == (
        fields["manoeuvres.inspired_volume"].kind,
        fields["manoeuvres.inspired_volume"].dimension,
        fields["manoeuvres.inspired_volume"].canonical_unit,
    )
    assert ("number", "date", "datetime", "sex") == (
        fields["manoeuvres.alveolar_co_fraction"].kind,
        fields["patient.birth_date"].kind,
        fields["performed_at"].kind,
        fields["patient.sex"].kind,
    )
    assert "format" not in fields


def test_the_first_matching_pattern_chooses_the_map(tables, csv_map, hl7_map):
    """[maps] is read in order; a file no pattern matches takes the default (here none: JSON)."""
    choice = MapChoice(default=None, by_pattern=(("*.csv", csv_map), ("lab-*", hl7_map)))
    assert [csv_map, hl7_map, None] == [choice.for_file(n) for n in ("lab-1.csv", "lab-1.hl7", "x.json")]
