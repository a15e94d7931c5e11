"""The lab's status of each value through field maps: OBX-11 of a legacy feed, a CSV status column."""

from __future__ import annotations

from zoneinfo import ZoneInfo

import pytest

from bridge.errors import MappingError
from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.tables.field_map_parser import field_map
from tests.core.test_lab_status import _observations
from tests.maps.conftest import HL7_MAP, HL7_SAMPLE


def test_legacy_hl7_reads_obx_11_per_value(tables: Tables, hl7_map: FieldMap) -> None:
    """Highcairn message 1 with OBX-11 W on TLCO and P on VA: no DLCO, VA preliminary, KCO final."""
    # source: HL7 v2.3 / v2.5.1 ch. 7, OBX-11 observation result status (table 0085)
    text = HL7_SAMPLE.read_text().split("MSH|")[1]
    text = "MSH|" + text.replace("HCDL^TLCO^L||15.1|mL/min/mmHg|||||F", "HCDL^TLCO^L||15.1|mL/min/mmHg|||||W")
    text = text.replace("HCVA^VA^L||4.6|L|||||F", "HCVA^VA^L||4.6|L|||||P")
    (outcome,) = list(process_all(text.encode(), "feed.hl7", tables, PipelineSettings(field_map=hl7_map)))
    assert isinstance(outcome, Outcome)
    observations = _observations(outcome, tables)

    assert outcome.session.results.dlco is None
    assert {"results.va": "P"} == outcome.session.lab_status
    assert ("preliminary", "final") == (observations["va"]["status"], observations["kco"]["status"])
    assert "dlco" not in observations


def test_a_csv_status_column_with_the_labs_words(tables: Tables) -> None:
    """A map reads a status column per value and turns the lab's words into table 0085 codes."""
    text = """
[map]
source = "test layout (fictional)"
format = "csv"

[values]
date_format = "%Y-%m-%d"
datetime_format = "%Y-%m-%d %H:%M"

[status]
"ok" = "F"
"wrong" = "W"
"draft" = "P"

[fields]
"test_id" = "id"
"performed_at" = "when"
"lab.name" = { value = "Test lab (fictional)" }
"patient.id" = "patient"
"patient.id_system" = { value = "https://fenwick-hollow.example/fictional-patient-id" }
"patient.sex" = "sex"
"patient.birth_date" = "born"
"patient.height" = { column = "height", unit = "cm" }
"results.dlco" = { column = "dlco", unit = "mmol/min/kPa", status_column = "dlco status" }
"results.va" = { column = "va", unit = "L", status_column = "va status" }
"""
    fmap = field_map(text, "status.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)
    data = (
        "id,when,patient,sex,born,height,dlco,dlco status,va,va status\n"
        "T-1,2026-03-02 09:00,P-1,M,1970-01-01,175,8.1,wrong,6.0,ok\n"
        "T-2,2026-03-02 10:00,P-2,F,1980-01-01,165,7.2,draft,5.1,\n"
    )
    first, second = process_all(data.encode(), "s.csv", tables, PipelineSettings(field_map=fmap))
    assert isinstance(first, Outcome) and isinstance(second, Outcome)

    assert (None, 6.0) == (first.session.results.dlco, first.session.results.va and first.session.results.va.value)
    assert {} == first.session.lab_status
    assert {"results.dlco": "P"} == second.session.lab_status
    assert "preliminary" == _observations(second, tables)["dlco"]["status"]
    assert "final" == _observations(second, tables)["va"]["status"]


def test_a_status_column_belongs_to_a_csv_column(tables: Tables) -> None:
    """status_column on an HL7 code is refused: HL7 values carry their own OBX-11."""
    text = HL7_MAP.read_text().replace(
        '"HCDL", unit_from = "OBX-6" }', '"HCDL", unit_from = "OBX-6", status_column = "x" }'
    )

    with pytest.raises(MappingError, match="status_column"):
        field_map(text, "m.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)
