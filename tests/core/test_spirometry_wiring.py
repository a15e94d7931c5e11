"""Spirometry through derive and the checks: reference values, 2019 grades, 2022 BD response, findings (24.2)."""

from __future__ import annotations

import json
import math
from datetime import date
from pathlib import Path

import pytest
from pyspiro import BOWERMAN_2022, GLI_2012

from bridge.errors import InputError
from bridge.model import Outcome, Severity
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = json.loads((ROOT / "samples" / "01-healthy-adult.json").read_text())  # a man, 178 cm, born 1981-01-15
TABLES = load_tables()
# common practice (the GLI equations' decimal age): days between birth and test over 365.25
AGE = (date(2026, 3, 2) - date(1981, 1, 15)).days / 365.25
MALE = 1  # pyspiro: 0 = female, 1 = male


def _litres(value: float) -> dict:
    return {"value": value, "unit": "L"}


def _doc(spirometry: dict, ethnicity: str | None = None) -> bytes:
    doc = json.loads(json.dumps(SAMPLE))
    doc["spirometry"] = spirometry
    if ethnicity is not None:
        doc["patient"]["ethnicity"] = ethnicity
    return json.dumps(doc).encode()


def _run(spirometry: dict, ethnicity: str | None = None, settings: PipelineSettings = PipelineSettings()) -> Outcome:
    return process(_doc(spirometry, ethnicity), "x.json", TABLES, settings)


def _codes(outcome: Outcome) -> dict[str, Severity]:
    return {f.code: f.severity for f in outcome.findings if f.code.startswith("SPIROMETRY_")}


PRE = {
    "fev1": _litres(3.95),
    "fvc": _litres(4.95),
    "fev1_fvc": {"value": 79.8, "unit": "%"},
    "fef25_75": {"value": 3.6, "unit": "L/s"},
}


def test_gli_global_reference_values_agree_with_pyspiro():
    """By default GLI Global: predicted, LLN and z of FEV1, FVC and FEV1/FVC as pyspiro computes them."""
    derived = _run({"pre": {"results": PRE}}).derived.spirometry
    assert derived is not None and derived.pre is not None
    # source: pyspiro 1.0.0, class BOWERMAN_2022 (GLI Global, Bowerman et al. 2023); FEV1/FVC as a fraction
    theirs = BOWERMAN_2022()
    for key, name, measured, scale in (
        ("fev1", "FEV1", 3.95, 1),
        ("fvc", "FVC", 4.95, 1),
        ("fev1_fvc", "FEV1FVC", 0.798, 100),
    ):
        parameter = BOWERMAN_2022.Parameters[name].value
        _, m, _ = (float(v) for v in theirs.lms(MALE, AGE, 178.0, parameter, None))
        lln = float(theirs.lln(MALE, AGE, 178.0, parameter, None))
        z = float(theirs.zscore(MALE, AGE, 178.0, parameter, measured))
        ours = derived.pre.references[key]
        shown = 0.051 if key == "fev1_fvc" else 0.006  # ours: 1 decimal in %, 2 decimals in L
        assert (m * scale, lln * scale) == pytest.approx((ours.predicted.value, ours.lln.value), abs=shown), key
        assert math.isclose(z, ours.z_score, abs_tol=0.006), key
    assert "fef25_75" not in derived.pre.references  # GLI Global has no FEF25-75 equation
    assert "GLI Global (Bowerman 2023)" == derived.reference_set


def test_gli_2012_with_the_patients_group_agrees_with_pyspiro():
    """With spirometry_reference gli-2012 and an ethnicity: GLI-2012's values for that group, FEF25-75 too."""
    settings = PipelineSettings(spirometry_reference="gli-2012")
    derived = _run({"pre": {"results": PRE}}, "north_east_asian", settings).derived.spirometry
    assert derived is not None and derived.pre is not None
    # source: pyspiro 1.0.0, class GLI_2012 (Quanjer et al. 2012), ethnicity 3 = North East Asian
    theirs = GLI_2012()
    for key, name, measured in (("fev1", "FEV1", 3.95), ("fef25_75", "FEF25_75", 3.6)):
        parameter = GLI_2012.Parameters[name].value
        z = float(theirs.zscore(MALE, AGE, 178.0, 3, parameter, measured))
        assert math.isclose(z, derived.pre.references[key].z_score, abs_tol=0.006), key


def test_gli_2012_without_an_ethnicity_says_why_there_are_no_reference_values():
    """GLI-2012 needs a group: none given, no reference values and an info finding naming the reason."""
    outcome = _run({"pre": {"results": PRE}}, settings=PipelineSettings(spirometry_reference="gli-2012"))
    derived = outcome.derived.spirometry
    assert derived is not None and derived.pre is not None
    assert {} == derived.pre.references
    reason = next(f.message for f in outcome.findings if f.code == "SPIROMETRY_REFERENCE_NOT_COMPUTED")
    assert "needs an ethnic group" in reason


def test_bronchodilator_response_relative_to_the_predicted_value():
    """ERS/ATS 2022: 100 x (post - pre) / predicted; over 10 % is a significant response."""
    spiro = {
        "pre": {"results": {"fev1": _litres(2.50), "fvc": _litres(4.00)}},
        "post": {"results": {"fev1": _litres(2.95), "fvc": _litres(4.10)}},
        "bronchodilator": {"drug": "salbutamol", "dose": {"value": 400, "unit": "ug"}},
    }
    derived = _run(spiro).derived.spirometry
    assert derived is not None and derived.fev1_response is not None and derived.fvc_response is not None
    # source: pyspiro 1.0.0, BOWERMAN_2022: the predicted (M) FEV1 and FVC of this man
    theirs = BOWERMAN_2022()
    m_fev1 = float(theirs.lms(MALE, AGE, 178.0, BOWERMAN_2022.Parameters["FEV1"].value, None)[1])
    m_fvc = float(theirs.lms(MALE, AGE, 178.0, BOWERMAN_2022.Parameters["FVC"].value, None)[1])
    # source: Stanojevic et al., Eur Respir J 2022;60:2101499 (BDR section): change / predicted x 100, > 10 %
    fev1_percent = 100 * (2.95 - 2.50) / m_fev1  # 0.45 L of about 4.2 L: about 11 %
    fvc_percent = 100 * (4.10 - 4.00) / m_fvc  # 0.10 L of about 5.3 L: about 2 %
    assert (round(fev1_percent, 1), True) == (derived.fev1_response.percent_of_predicted.value, fev1_percent > 10)
    assert derived.fev1_response.significant
    assert (round(fvc_percent, 1), False) == (
        derived.fvc_response.percent_of_predicted.value,
        derived.fvc_response.significant,
    )
    assert Severity.INFO == _codes(_run(spiro))["SPIROMETRY_BRONCHODILATOR_RESPONSE"]


def _manoeuvre(fev1: float, fvc: float, fev1_status: str, fvc_status: str) -> dict:
    return {"fev1": _litres(fev1), "fvc": _litres(fvc), "fev1_status": fev1_status, "fvc_status": fvc_status}


def test_2019_grades_computed_by_hand():
    """FEV1: three acceptable within 0.150 L is grade A; FVC: two acceptable 0.230 L apart, D, not repeatable."""
    manoeuvres = [
        _manoeuvre(3.95, 4.95, "acceptable", "acceptable"),
        _manoeuvre(3.90, 4.72, "acceptable", "acceptable"),
        _manoeuvre(3.85, 4.60, "acceptable", "usable"),
    ]
    outcome = _run({"pre": {"results": PRE, "manoeuvres": manoeuvres}})
    derived = outcome.derived.spirometry
    assert derived is not None and derived.pre is not None
    fev1, fvc = derived.pre.fev1_grade, derived.pre.fvc_grade
    assert fev1 is not None and fvc is not None
    # source: Graham et al., AJRCCM 2019;200:e70, Table 10: A = >= 3 acceptable within 0.150 L;
    # D = >= 2 acceptable within 0.250 L (not within 0.200 L); repeatability: within 0.150 L (over 6 y)
    assert ("A", 3, True) == (fev1.grade, fev1.acceptable, fev1.repeatable)  # 3.95 - 3.90 = 0.05 L
    assert ("D", 2, 1, False) == (fvc.grade, fvc.acceptable, fvc.usable, fvc.repeatable)  # 4.95 - 4.72 = 0.23 L
    codes = _codes(outcome)
    assert (Severity.INFO, Severity.WARNING, Severity.WARNING) == (
        codes["SPIROMETRY_GRADE"],
        codes["SPIROMETRY_LOW_GRADE"],
        codes["SPIROMETRY_NOT_REPEATABLE"],
    )


def test_fev1_above_fvc_is_an_error_that_stops_the_record():
    """FEV1 is part of FVC: a larger FEV1 is an error, and the gate keeps the record from being emitted."""
    spiro = {"pre": {"results": {"fev1": _litres(4.95), "fvc": _litres(3.95)}}}
    assert Severity.ERROR == _codes(_run(spiro))["SPIROMETRY_IMPOSSIBLE_VOLUMES"]  # common practice
    with pytest.raises(InputError):
        process(_doc(spiro), "x.json", TABLES, PipelineSettings(), routes=(Route("fhir", "traditional"),))


def test_litres_sent_as_millilitres_are_found_with_the_likely_value():
    """An FEV1 of 3.95 'mL' (0.00395 L) is outside any lung; 3.95 L is inside: an error naming both."""
    spiro = {"pre": {"results": {"fev1": {"value": 3.95, "unit": "mL"}, "fvc": _litres(4.95)}}}
    found = next(f for f in _run(spiro).findings if f.code == "SPIROMETRY_UNIT_MISLABEL")
    assert (Severity.ERROR, "spirometry.pre.results.fev1") == (found.severity, found.path)
    assert "3.950 L" in found.message  # the value in litres it most likely is


@pytest.mark.parametrize(
    ("ratio", "mismatch"),
    [
        ({"value": 70, "unit": "%"}, True),  # 3.95 / 4.95 = 0.798, not 0.70
        ({"value": 80, "unit": "%"}, False),  # 0.798 rounded to a whole per cent
        ({"value": 0.798, "unit": "1"}, False),  # the same ratio as a fraction
    ],
)
def test_the_reported_ratio_against_the_volumes(ratio, mismatch):
    """FEV1/FVC recomputed from the reported volumes (3.95 / 4.95 = 79.8 %) against the reported ratio."""
    spiro = {"pre": {"results": {"fev1": _litres(3.95), "fvc": _litres(4.95), "fev1_fvc": ratio}}}
    outcome = _run(spiro)
    assert mismatch == ("SPIROMETRY_RATIO_MISMATCH" in _codes(outcome))
    assert outcome.derived.spirometry is not None and outcome.derived.spirometry.pre is not None
    assert outcome.derived.spirometry.pre.fev1_fvc is not None
    assert 79.8 == outcome.derived.spirometry.pre.fev1_fvc.value  # 100 x 3.95 / 4.95 = 79.797...


def test_a_post_value_without_its_pre_value_is_a_warning():
    """A post-bronchodilator FEV1 alone cannot show a response."""
    assert (
        Severity.WARNING == _codes(_run({"post": {"results": {"fev1": _litres(3.2)}}}))["SPIROMETRY_POST_WITHOUT_PRE"]
    )


def test_a_session_without_spirometry_has_no_spirometry_findings():
    """The DLCO-only sample derives and finds as before: nothing of spirometry."""
    outcome = process(json.dumps(SAMPLE).encode(), "x.json", TABLES)
    assert (None, {}) == (outcome.derived.spirometry, _codes(outcome))
