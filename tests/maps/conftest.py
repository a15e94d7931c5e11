"""Fixtures of the field-map tests: the two bundled maps and a small map built per test."""

from __future__ import annotations

from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.tables.field_map_parser import field_map

ROOT = Path(__file__).resolve().parents[2]
MAPS = ROOT / "mappings" / "maps"
LEGACY = ROOT / "samples" / "legacy"
CSV_MAP = MAPS / "lowmarsh-csv.toml"
HL7_MAP = MAPS / "highcairn-hl7v23.toml"
CSV_SAMPLE = LEGACY / "lowmarsh-results.csv"
HL7_SAMPLE = LEGACY / "highcairn-results.hl7"

# A minimal one-row-per-session CSV map: the required fields and two quantities.
SMALL_CSV_MAP = """
[map]
source = "test layout"
format = "csv"
{map_extra}

[csv]
delimiter = "{delimiter}"
{csv_extra}

[values]
decimal = "{decimal}"
date_format = "%Y-%m-%d"
datetime_format = "%Y-%m-%d %H:%M"
time_zone = "Europe/London"

[fields]
"test_id" = {{ column = "id" }}
"performed_at" = {{ column = "when" }}
"lab.name" = {{ value = "Test lab (fictional)" }}
"patient.id" = {{ column = "patient" }}
"patient.id_system" = {{ value = "https://fenwick-hollow.example/fictional-patient-id" }}
"patient.family" = {{ column = "family" }}
"patient.sex" = {{ column = "sex" }}
"patient.birth_date" = {{ column = "born" }}
"patient.height" = {{ column = "height", unit = "cm" }}
"results.dlco" = {{ column = "dlco", unit_column = "dlco unit" }}
"""


def small_csv_map(tables: Tables, delimiter: str = ",", decimal: str = ".", map_extra: str = "",
                  csv_extra: str = "") -> FieldMap:  # fmt: skip
    text = SMALL_CSV_MAP.format(delimiter=delimiter, decimal=decimal, map_extra=map_extra, csv_extra=csv_extra)
    return field_map(text, "small.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)


@pytest.fixture(scope="session")
def csv_map(tables: Tables) -> FieldMap:
    return field_map(
        CSV_MAP.read_text(encoding="utf-8"),
        "mappings/maps/lowmarsh-csv.toml",
        tables.units,
        ZoneInfo,
        sex_codes=tables.hl7.sex_of_code,
    )


@pytest.fixture(scope="session")
def hl7_map(tables: Tables) -> FieldMap:
    return field_map(
        HL7_MAP.read_text(encoding="utf-8"),
        "mappings/maps/highcairn-hl7v23.toml",
        tables.units,
        ZoneInfo,
        sex_codes=tables.hl7.sex_of_code,
    )
