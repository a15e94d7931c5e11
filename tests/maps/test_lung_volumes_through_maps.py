"""A field map fills the static lung volumes and the sets the lab's own report names (docs/field-maps.md).

An invented lab's CSV layout, written here: the lung volumes in their own columns (TLC, FRC and RV
in millilitres, VC in litres, RV/TLC as a fraction), the method as the lab writes it, and the names
of the reference sets the lab's report used for spirometry and for lung volumes. Every expected value
is the CSV's text converted by hand.
"""

from __future__ import annotations

from zoneinfo import ZoneInfo

import pytest

from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process_all
from bridge.tables import Tables
from bridge.tables.field_map_parser import field_map

MAP = """
[map]
source = "Tarnmoor Lung Lab (fictional)"
format = "csv"

[csv]
delimiter = ";"

[values]
decimal = ","
date_format = "%Y-%m-%d"
datetime_format = "%Y-%m-%d %H:%M"

[fields]
"test_id" = { column = "Test" }
"performed_at" = { column = "When" }
"lab.name" = { value = "Tarnmoor Lung Lab (fictional)" }
"patient.id" = { column = "Patient" }
"patient.id_system" = { value = "https://fenwick-hollow.example/fictional-patient-id" }
"patient.sex" = { column = "Sex" }
"patient.birth_date" = { column = "Born" }
"patient.height" = { column = "Height cm", unit = "cm" }
"results.dlco" = { column = "DLCO", unit = "mL/min/mmHg" }
"spirometry.reference_set" = { column = "Spiro ref." }
"spirometry.pre.results.fev1" = { column = "FEV1 L", unit = "L" }
"lung_volumes.method" = { column = "Volumes by" }
"lung_volumes.reference_set" = { column = "Volumes ref." }
"lung_volumes.tlc" = { column = "TLC mL", unit = "mL" }
"lung_volumes.frc" = { column = "FRC mL", unit = "mL" }
"lung_volumes.rv" = { column = "RV mL", unit = "mL" }
"lung_volumes.vc" = { column = "VC L", unit = "L" }
"lung_volumes.rv_tlc" = { column = "RV/TLC", unit = "1" }
"""

CSV = (
    "Test;When;Patient;Sex;Born;Height cm;DLCO;Spiro ref.;FEV1 L;"
    "Volumes by;Volumes ref.;TLC mL;FRC mL;RV mL;VC L;RV/TLC\n"
    "TM-1;2026-03-06 09:15;FICT-3001;M;1959-11-03;176;18,2;GLI-2012;2,41;"
    "plethysmography;ECSC 1993;7600;5500;4200;3,40;0,55\n"
    "TM-2;2026-03-06 11:40;FICT-3002;M;1962-02-14;181;24,0;;3,02;;;6900;;;;\n"
)


def _read(tables: Tables) -> list[Outcome]:
    fmap = field_map(MAP, "tarnmoor.toml", tables.units, ZoneInfo, sex_codes=tables.hl7.sex_of_code)
    results = list(process_all(CSV.encode(), "tarnmoor.csv", tables, PipelineSettings(field_map=fmap)))
    assert all(isinstance(r, Outcome) for r in results), results
    return [r for r in results if isinstance(r, Outcome)]


def test_a_map_fills_the_lung_volumes_and_the_labs_reference_sets(tables):
    """TM-1: every mapped lung volume in litres, RV/TLC in per cent, the method and both sets as written."""
    first = _read(tables)[0].session
    volumes, spirometry = first.lung_volumes, first.spirometry
    assert volumes is not None and spirometry is not None

    assert ("GLI-2012", "ECSC 1993", "plethysmography") == (
        spirometry.reference_set,
        volumes.reference_set,
        volumes.method,
    )
    # by hand: 7600 mL = 7.6 L, 5500 mL = 5.5 L, 4200 mL = 4.2 L; 3,40 L (decimal comma) = 3.4 L;
    # the fraction 0,55 is 55 % (docs/format.md: unit "1" is a fraction)
    quantities = [volumes.tlc, volumes.frc, volumes.rv, volumes.vc, volumes.rv_tlc]
    assert [q for q in quantities if q is not None] == quantities
    assert ["L", "L", "L", "L", "%"] == [q.unit for q in quantities if q is not None]
    assert [7.6, 5.5, 4.2, 3.4, 55.0] == pytest.approx([q.value for q in quantities if q is not None], rel=1e-12)


def test_a_row_that_leaves_them_empty_has_no_set_and_only_its_tlc(tables):
    """TM-2: empty cells are missing: no method, no reference set, TLC alone."""
    second = _read(tables)[1].session
    volumes, spirometry = second.lung_volumes, second.spirometry
    assert volumes is not None and spirometry is not None

    assert (None, None, None) == (spirometry.reference_set, volumes.reference_set, volumes.method)
    assert (None, None, None) == (volumes.frc, volumes.rv, volumes.vc)
    assert volumes.tlc is not None and 6.9 == pytest.approx(volumes.tlc.value, rel=1e-12)  # 6900 mL
