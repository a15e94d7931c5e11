"""One basis per record, and results that depend on which inputs are present, never on the values.

Every expectation is worked out by hand here from the ERS/ATS 2017 DLCO standard (Graham et
al., Eur Respir J 2017;49:1600016): DLCO x (1 + 0.0031 (PIO2 - 150)), PIO2 = 0.21 (PB - 47);
and from NIST SP 811 (2008) for the rounding of converted values.
"""

from __future__ import annotations

import json
from dataclasses import fields
from pathlib import Path
from typing import Any

import pytest

from bridge.model import Outcome
from bridge.pipeline import process
from bridge.science.normalise import express
from bridge.tables import Tables

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
MMHG_PER_KPA = 1000 / 133.322  # source: UCUM, mm[Hg] = 133.322 Pa
# Sample 04 at 100.6 kPa, by hand: 100.6 x 7.50064 = 754.56 mmHg; PIO2 = 0.21 x (754.56 - 47) = 148.588;
# factor = 1 + 0.0031 x (148.588 - 150) = 0.995623
FACTOR_04 = 1 + 0.0031 * (0.21 * (100.6 * MMHG_PER_KPA - 47) - 150)
# Sample 03 at 615 mmHg, by hand: 1 + 0.0031 x (0.21 x 568 - 150) = 0.904768
FACTOR_03 = 0.904768
TRADITIONAL_PER_SI = 2.987  # source: ERS/ATS 2017 DLCO standard, 1 mmol/min/kPa = 2.987 mL/min/mmHg


def _document(name: str) -> dict[str, Any]:
    data: dict[str, Any] = json.loads((SAMPLES / f"{name}.json").read_text(encoding="utf-8"))
    return data


def _process(document: dict[str, Any], tables: Tables) -> Outcome:
    return process(json.dumps(document).encode(), "variant.json", tables)


def test_dlco_and_kco_of_one_record_are_compared_on_one_basis(sample_outcomes):
    """Sample 04 (100.6 kPa): DLCO and KCO both compared at sea level (today DLCO as measured, KCO adjusted)."""
    # by hand: DLCO 6.1 x 2.987 x 0.995623 = 18.141 mL/min/mmHg; KCO 1.119 x 2.987 x 0.995623 = 3.3278
    derived = sample_outcomes["04-raised-cohb"].derived

    assert ("pressure_adjusted", "pressure_adjusted") == (derived.dlco_basis, derived.kco_basis)
    assert derived.reference_dlco is not None and derived.reference_kco is not None
    assert 6.1 * TRADITIONAL_PER_SI * FACTOR_04 == pytest.approx(derived.reference_dlco.compared.value, abs=1e-3)
    assert 1.119 * TRADITIONAL_PER_SI * FACTOR_04 == pytest.approx(derived.reference_kco.compared.value, abs=1e-4)


def test_a_test_near_sea_level_still_gets_its_sea_level_dlco(sample_outcomes):
    """Sample 07 at 101.4 kPa: the sea-level DLCO exists although it equals the reported 24.8 at its precision."""
    # by hand: 101.4 kPa x 7.50064 = 760.56 mmHg; 0.21 x (760.56 - 47) = 149.848; 1 + 0.0031 x (-0.152) = 0.999529;
    #   24.8 mmol/min/kPa x 2.987 = 74.078 mL/min/mmHg; x 0.999529 = 74.043
    derived = sample_outcomes["07-unit-mislabel"].derived

    assert derived.dlco_pressure_adjusted is not None
    assert 74.043 == pytest.approx(derived.dlco_pressure_adjusted.value, abs=1e-3)
    assert "pressure_adjusted" == derived.dlco_basis


@pytest.mark.parametrize("dlco", ["7.80", "7.87"])
def test_which_values_exist_does_not_depend_on_the_numbers(tables: Tables, dlco: str):
    """Sample 04 with DLCO 7.80 or 7.87 mmol/min/kPa: the same adjusted values exist for both."""
    # by hand: 7.80 x 0.995623 = 7.766 -> 7.8, the reported value at its precision (the old rule sent
    #   none); 7.87 x 0.995623 = 7.836 -> 7.8, not 7.87 (the old rule sent one)
    document = _document("04-raised-cohb")
    document["results"]["dlco"]["value"] = float(dlco)
    derived = _process(document, tables).derived
    present = {f.name for f in fields(derived) if getattr(derived, f.name) is not None and f.name.endswith("_adjusted")}

    assert {
        "dlco_hb_adjusted",
        "dlco_pressure_adjusted",
        "kco_pressure_adjusted",
        "kco_hb_adjusted",
        "dlco_hb_pressure_adjusted",
        "kco_hb_pressure_adjusted",
        "dlco_cohb_adjusted",
    } == present
    assert derived.dlco_pressure_adjusted is not None
    assert float(dlco) * TRADITIONAL_PER_SI * FACTOR_04 == pytest.approx(derived.dlco_pressure_adjusted.value, rel=1e-5)


def test_a_labs_predicted_value_already_adjusted_to_altitude_is_compared_with_the_measured_value(tables: Tables):
    """Sample 03 with results.predicted.altitude_adjusted: 110 % and 107 % of the lab's values, not 100 % and 97 %."""
    # by hand: DLCO 36.4 / 33.0 = 110.30 %; KCO 5.13 / 4.79 = 107.10 % (the lab's predicted values
    #   already allow for 1800 m: adjusting the measured value to sea level too would count it twice)
    document = _document("03-high-altitude")
    document["results"]["predicted"]["altitude_adjusted"] = True
    derived = _process(document, tables).derived

    assert "measured" == derived.lab_basis
    assert 110.30 == pytest.approx(derived.dlco_percent_predicted.value, abs=0.01)
    assert 107.10 == pytest.approx(derived.kco_percent_predicted.value, abs=0.01)
    assert "pressure_adjusted" == derived.dlco_basis  # GLI-2017 is a sea-level set: still compared at sea level


def test_by_default_a_labs_predicted_value_is_a_sea_level_value(sample_outcomes):
    """Sample 03 without the field: the lab's values are compared with the sea-level DLCO and KCO (99.8 %, 96.9 %)."""
    # by hand: 36.4 x 0.904768 / 33.0 = 99.80 %; 5.13 x 0.904768 / 4.79 = 96.90 %
    derived = sample_outcomes["03-high-altitude"].derived

    assert "pressure_adjusted" == derived.lab_basis
    assert 36.4 * FACTOR_03 / 33.0 * 100 == pytest.approx(derived.dlco_percent_predicted.value, abs=0.01)
    assert 5.13 * FACTOR_03 / 4.79 * 100 == pytest.approx(derived.kco_percent_predicted.value, abs=0.01)


def test_a_pressure_in_hpa_keeps_its_step_in_kpa(tables: Tables):
    """1008 hPa is 100.8 kPa, not 100.80: the conversion starts from the lab's value and its step."""
    # source: NIST SP 811 (2008) B.7.2: the converted value's rounding step is no finer than the
    #   original's. By hand: a step of 1 hPa is 0.1 kPa, so 1008 hPa = 100.8 kPa (one decimal); going
    #   through mm[Hg] first gave 756.06 -> 756.1 mm[Hg] (step 0.1 mm[Hg]), then 100.80 kPa (step 0.01)
    document = _document("04-raised-cohb")
    document["conditions"]["barometric_pressure"] = {"value": 1008, "unit": "hPa"}
    pressure = _process(document, tables).session.conditions.barometric_pressure

    assert pressure is not None
    assert "756.1" == pressure.text()  # 1008 x 0.750062 = 756.06 mm[Hg]: 1 hPa = 0.75 mm[Hg] -> one decimal
    assert "100.8" == express(pressure, "kPa", tables.units).text()
    assert "1008" == express(pressure, "hPa", tables.units).text()  # the lab's own unit: its own digits
