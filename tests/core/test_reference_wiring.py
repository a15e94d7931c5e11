"""GLI-2017 reference values reach every session: derived values, out-of-range findings, unit-mislabel evidence."""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from bridge.model import Outcome, Severity
from bridge.pipeline import process
from bridge.tables import Tables

SAMPLES = Path(__file__).resolve().parents[2] / "samples"


def _run(tables: Tables, change: Callable[[dict[str, Any]], None], base: str = "01-healthy-adult") -> Outcome:
    document = json.loads((SAMPLES / f"{base}.json").read_text(encoding="utf-8"))
    change(document)
    return process(json.dumps(document).encode(), f"{base}-variant.json", tables)


def _vignette_man(document: dict[str, Any]) -> None:
    """The man of the pft vignette: 45 y (and a day: 45.002 y), 178 cm, DLCO 22.0 mL/min/mmHg, at sea level."""
    document["patient"].update(sex="male", birth_date="1981-03-01", height={"value": 178, "unit": "cm"})
    document["performed_at"] = "2026-03-02T09:15:00+00:00"
    document["conditions"].pop("barometric_pressure", None)
    document["manoeuvres"] = []
    document["results"] = {"dlco": {"value": 22.0, "unit": "mL/min/mm[Hg]"}, "va": {"value": 6.5, "unit": "L"}}


def test_tables_carry_the_reference_equations(tables: Tables):
    """load_tables gives every core step the GLI-2017 equations (the vignette man's predicted DLCO)."""
    from bridge.model import Sex
    from bridge.science.reference import Lms, Parameter

    lms = tables.reference.lms(Parameter.DLCO, Sex.MALE, 45.0, 178.0)

    assert isinstance(lms, Lms)
    # source: R package pft, vignette "diffusion capacity" (GLI 2017): predicted 30.3 mL/min/mmHg
    assert 30.3 == round(lms.predicted, 1)


def test_vignette_man_through_the_pipeline(tables: Tables):
    """Male, 45 y, 178 cm, DLCO 22.0: predicted 30.3, LLN 23.4, ULN 38.3, z -2.01, 73 %, mild, flag L."""
    reference = _run(tables, _vignette_man).derived.reference_dlco

    assert reference is not None
    # source: R package pft, vignette "diffusion capacity": predicted 30.3, LLN 23.4, ULN 38.3 mL/min/mmHg
    assert ("30.3", "23.4", "38.3") == (reference.predicted.text(), reference.lln.text(), reference.uln.text())
    # by hand, LMS method (Cole & Green 1992) with L = 0.39482 (GLI-2017 q0, DLCO male) and the M, S of
    # phase 1 for this man, M = 30.317, S = 0.14972:
    # z = ((22.0 / 30.317)^0.39482 - 1) / (0.39482 x 0.14972) = (0.88117 - 1) / 0.059112 = -2.01
    assert -2.01 == round(reference.z_score, 2)
    assert "73" == reference.percent_predicted.text()  # by hand: 100 x 22.0 / 30.317 = 72.6
    # source: ERS/ATS 2022 interpretive standard, z between -1.645 and -2.5 is mild  # from memory
    assert ("mild", "L") == (reference.impairment, reference.flag)
    assert ("measured", "GLI-2017") == (reference.basis, reference.reference_set)


def test_kco_without_a_lab_value_is_compared_as_dlco_over_va(tables: Tables):
    """Without a reported KCO, DLCO/VA = 22.0 / 6.5 = 3.385 is compared with the KCO equation."""
    reference = _run(tables, _vignette_man).derived.reference_kco

    assert reference is not None
    assert 3.385 == round(reference.compared.value, 3)  # by hand: 22.0 / 6.5


def test_high_altitude_compares_the_value_adjusted_to_sea_level(sample_outcomes: dict[str, Outcome]):
    """At altitude the z-score rests on DLCO adjusted to sea level, and the derived values say so."""
    # source: ERS/ATS 2017 DLCO standard (Graham et al., ERJ 2017;49:1600016): adjust to standard PIO2
    derived = sample_outcomes["03-high-altitude"].derived

    assert derived.reference_dlco is not None
    assert "pressure_adjusted" == derived.reference_dlco.basis
    assert derived.dlco_pressure_adjusted == derived.reference_dlco.compared


@pytest.mark.parametrize(
    ("change", "words"),
    [
        (lambda p: p.update(birth_date="2023-01-01"), "age"),  # a 3-year-old child
        (lambda p: p.update(birth_date="1935-01-01"), "age"),  # a 91-year-old adult
        (lambda p: p.update(height={"value": 95, "unit": "cm"}), "height"),
        (lambda p: p.update(sex="other"), "female and male only"),
    ],
    ids=["child-3y", "adult-91y", "height-95cm", "sex-other"],
)
def test_outside_the_equations_no_numbers_and_a_finding(tables: Tables, change, words):
    """Outside the equations' range: no reference value, an INFO finding that says why, the rest still derived."""
    # source: Stanojevic et al., ERJ 2017;50:1700010: equations for ages 5-85 y, female and male
    outcome = _run(tables, lambda d: change(d["patient"]))
    d = outcome.derived
    found = [f for f in outcome.findings if f.code == "REFERENCE_NOT_COMPUTED"]

    assert (None, None, None) == (d.reference_dlco, d.reference_kco, d.reference_va)
    assert [Severity.INFO] == [f.severity for f in found]
    assert words in found[0].message
    assert d.kco is not None  # the other derived values are still there


def test_child_inside_the_range_gets_reference_values(sample_outcomes: dict[str, Outcome]):
    """An 11-year-old girl is inside the equations (5-85 y): values and no REFERENCE_NOT_COMPUTED."""
    outcome = sample_outcomes["05-child"]

    assert outcome.derived.reference_dlco is not None
    assert "REFERENCE_NOT_COMPUTED" not in {f.code for f in outcome.findings}


def test_legacy_predicted_values_are_kept_beside_gli(sample_outcomes: dict[str, Outcome]):
    """The lab's own predicted value stays the basis of its per cent predicted; GLI-2017 comes beside it."""
    outcome = sample_outcomes["01-healthy-adult"]
    predicted = outcome.session.results.predicted

    assert predicted is not None and predicted.dlco is not None
    assert outcome.derived.dlco_percent_predicted is not None
    assert outcome.derived.reference_dlco is not None


def _swapped(dlco: float, kco: float, unit: str) -> Callable[[dict[str, Any]], None]:
    def change(document: dict[str, Any]) -> None:
        document["results"] = {
            "dlco": {"value": dlco, "unit": unit},
            "kco": {"value": kco, "unit": unit + "/L"},
            "va": {"value": 6.5, "unit": "L"},
        }

    return change


@pytest.mark.parametrize(
    ("dlco", "kco", "unit"),
    [
        (25.0, 3.85, "mmol/min/kPa"),  # traditional numbers labelled SI (issue 10's case)
        (8.4, 1.29, "mL/min/mm[Hg]"),  # SI numbers labelled traditional (the reverse swap)
    ],
    ids=["traditional-labelled-si", "si-labelled-traditional"],
)
def test_both_swapped_without_predicted_values_is_a_probable_mislabel(tables: Tables, dlco, kco, unit):
    """DLCO and KCO both in the other unit, no predicted values: each is UNIT_MISLABEL_PROBABLE, GLI named."""
    # DLCO = KCO x VA holds (25.0 = 3.85 x 6.5), so only the yardstick of the GLI-2017 predicted value
    # (30.3 mL/min/mmHg for this 45-year-old 178 cm man, pft vignette) shows the 2.987x error:
    # by hand 25.0 x 2.987 = 74.7 is z about +7 and 8.4 is z about -6.7, while 25.0 and 8.4 x 2.987 = 25.1
    # are z about -1.
    outcome = _run(tables, _swapped(dlco, kco, unit))
    found = [f for f in outcome.findings if f.code == "UNIT_MISLABEL_PROBABLE"]

    assert ["results.dlco", "results.kco"] == [f.path for f in found]
    assert all("GLI-2017 predicted value" in f.message for f in found)
    assert all(f.severity is Severity.ERROR for f in found)


def test_a_plausible_value_is_not_accused(tables: Tables):
    """A low but possible DLCO (z about -3, vignette man at 18.0) is no mislabel evidence."""
    outcome = _run(tables, _swapped(18.0, 2.77, "mL/min/mm[Hg]"))

    assert "UNIT_MISLABEL_PROBABLE" not in {f.code for f in outcome.findings}


def test_check_report_shows_gli_beside_the_lab(tables: Tables):
    """check's text shows GLI-2017 predicted, LLN, z-score and band next to the lab's predicted and LLN."""
    from bridge.display.check_report import outcome_text

    outcome = process((SAMPLES / "01-healthy-adult.json").read_bytes(), "01-healthy-adult.json", tables)
    lines = outcome_text(outcome, tables, "traditional").splitlines()
    gli = next(line for line in lines if line.strip().startswith("DLCO GLI-2017"))
    lab = next(line for line in lines if line.strip().startswith("DLCO lab"))

    # source: R package pft vignette (same man, 45 y, 178 cm): predicted 30.3, LLN 23.4 mL/min/mmHg
    assert "predicted 30.3 mL/min/mmHg" in gli and "LLN 23.4 mL/min/mmHg" in gli
    assert "(normal)" in gli and "z -0.2" in gli
    # the lab's 10.15 mmol/min/kPa x 2.987 = 30.32 mL/min/mmHg  # source: ERS/ATS 2017 conversion factor
    assert "predicted 30.32 mL/min/mmHg" in lab


def test_a_value_above_the_uln_is_flagged_h_and_not_called_normal(tables: Tables):
    """DLCO 74.7 mL/min/mmHg for the vignette man (predicted 30.3, ULN 38.3): flag H, band "above the ULN"."""
    # source: R package pft vignette, ULN 38.3 mL/min/mmHg; HL7 table 0078 H above the upper limit
    reference = _run(tables, _swapped(74.7, 11.5, "mL/min/mm[Hg]")).derived.reference_dlco

    assert reference is not None
    assert ("H", "above the ULN") == (reference.flag, reference.band)
