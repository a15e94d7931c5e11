"""Static lung volumes through derive and the checks: GLI-2021 reference values, ratios, impossible volumes."""

from __future__ import annotations

import json
import math
from datetime import date
from pathlib import Path

import pytest
from pyspiro import GLI_2021

from bridge.errors import InvalidField
from bridge.model import Outcome, Severity
from bridge.pipeline import PipelineSettings, process
from bridge.science.lung_volumes import volume_sum_problems
from bridge.science.spirometry import Problem
from bridge.tables.files import load_tables

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = json.loads((ROOT / "samples" / "01-healthy-adult.json").read_text())  # a man, 178 cm
TABLES = load_tables()
PYSPIRO_VERSION = "1.0.0"  # pyspiro's GLI_2021 class (Hall et al. 2021), the version compared with
PYSPIRO_SEX = {"female": 0, "male": 1}
TEST_DAY = date(2026, 3, 2)  # sample 01's performed_at


def _litres(value: float) -> dict:
    return {"value": value, "unit": "L"}


def _run(volumes: dict, sex: str = "male", birth: str | None = None, height: float = 178.0) -> Outcome:
    doc = json.loads(json.dumps(SAMPLE))
    doc["lung_volumes"] = volumes
    doc["patient"]["sex"] = sex
    doc["patient"]["height"] = {"value": height, "unit": "cm"}
    if birth is not None:
        doc["patient"]["birth_date"] = birth
    return process(json.dumps(doc).encode(), "x.json", TABLES, PipelineSettings())


def _findings(outcome: Outcome) -> dict[str, list]:
    found: dict[str, list] = {}
    for f in outcome.findings:
        if f.code.startswith("LUNG_VOLUMES_"):
            found.setdefault(f.code, []).append(f)
    return found


NORMAL = {
    "method": "plethysmography",
    "tlc": _litres(6.80),
    "frc": _litres(3.40),
    "rv": _litres(2.00),
    "vc": _litres(4.80),
    "rv_tlc": {"value": 29.4, "unit": "%"},
    "ic": _litres(3.40),
    "erv": _litres(1.40),
}


def test_consistent_volumes_give_no_finding_and_recompute_by_hand():
    """RV/TLC = 100 x 2.00 / 6.80 = 29.41 %; IC = 6.80 - 3.40 = 3.40 L; ERV = 3.40 - 2.00 = 1.40 L."""
    outcome = _run(NORMAL)
    derived = outcome.derived.lung_volumes
    assert derived is not None
    # hand computation from the volumes above
    assert (29.4, 3.40, 1.40) == (derived.rv_tlc.value, derived.ic.value, derived.erv.value)
    assert {} == _findings(outcome)


@pytest.mark.parametrize("sex", ["female", "male"])
@pytest.mark.parametrize("age_birth", ["2020-01-02", "2012-05-20", "1998-09-09", "1976-02-01", "1950-06-30"])
def test_gli_2021_reference_values_agree_with_pyspiro(sex, age_birth):
    """Predicted, LLN, ULN and z of every volume against pyspiro's GLI_2021, both sexes, 6 to 75 years."""
    height = 122.0 if age_birth.startswith("2020") else 166.0
    volumes = {key: value for key, value in NORMAL.items() if key != "method"}
    scale = 0.5 if height < 150 else 0.85  # plausible volumes for a 6-year-old, an adult
    volumes = {
        k: ({"value": v["value"], "unit": "%"} if k == "rv_tlc" else _litres(round(v["value"] * scale, 2)))
        for k, v in volumes.items()
    }
    outcome = _run(volumes, sex, age_birth, height)
    derived = outcome.derived.lung_volumes
    assert derived is not None and derived.reference_not_computed is None
    age = (TEST_DAY - date.fromisoformat(age_birth)).days / 365.25  # common practice: decimal age
    # source: pyspiro 1.0.0, class GLI_2021 (Hall et al., Eur Respir J 2021;57:2000289)
    theirs = GLI_2021()
    for key, name in (
        ("tlc", "TLC"),
        ("frc", "FRC"),
        ("rv", "RV"),
        ("vc", "VC"),
        ("rv_tlc", "RV_TLC"),
        ("ic", "IC"),
        ("erv", "ERV"),
    ):
        parameter = GLI_2021.Parameters[name].value
        measured = volumes[key]["value"]
        args = (PYSPIRO_SEX[sex], age, height, parameter)
        m = float(theirs.lms(*args, None)[1])
        lln, uln = float(theirs.lln(*args, None)), float(theirs.uln(*args, None))
        z = float(theirs.zscore(*args, measured))
        ours = derived.references[key]
        shown = 0.051 if key == "rv_tlc" else 0.006  # ours: 1 decimal in %, 2 decimals in L
        assert (m, lln, uln) == pytest.approx((ours.predicted.value, ours.lln.value, ours.uln.value), abs=shown), key
        assert math.isclose(z, ours.z_score, abs_tol=0.006), key
        assert ours.flag == ("L" if z < -1.645 else "H" if z > 1.645 else "N"), key  # source: 5th/95th centiles


def test_outside_gli_2021_age_range_says_why():
    """GLI-2021 covers 5-80 y (Hall et al. 2021, abstract): an 85-year-old gets no values and an info finding."""
    outcome = _run(NORMAL, birth="1940-06-01")
    assert outcome.derived.lung_volumes is not None and {} == outcome.derived.lung_volumes.references
    (found,) = _findings(outcome)["LUNG_VOLUMES_REFERENCE_NOT_COMPUTED"]
    assert found.severity is Severity.INFO and "5-80 y" in found.message


def test_rv_above_tlc_and_frc_outside_rv_tlc_are_errors_with_evidence():
    """RV 7.0 > TLC 6.8; FRC 1.5 < RV 2.0; FRC 7.0 > TLC 6.8: volumes nested in one another cannot be so."""
    outcome = _run({"tlc": _litres(6.8), "rv": _litres(7.0)})
    (rv,) = _findings(outcome)["LUNG_VOLUMES_IMPOSSIBLE"]
    assert rv.severity is Severity.ERROR and rv.path == "lung_volumes.rv"
    assert "RV 7.0 L" in rv.message and "TLC 6.8 L" in rv.message
    low = _findings(_run({"tlc": _litres(6.8), "rv": _litres(2.0), "frc": _litres(1.5)}))["LUNG_VOLUMES_IMPOSSIBLE"]
    assert ["lung_volumes.frc"] == [f.path for f in low] and "smaller than RV" in low[0].message
    high = _findings(_run({"tlc": _litres(6.8), "frc": _litres(7.0)}))["LUNG_VOLUMES_IMPOSSIBLE"]
    assert ["lung_volumes.frc"] == [f.path for f in high] and "larger than TLC" in high[0].message


def test_millilitres_labelled_litres_is_refused_and_litres_labelled_millilitres_is_an_error():
    """TLC 6800 "L" (millilitres labelled litres) is beyond any lung: the reader refuses it, naming the field.
    TLC 6.8 "mL" is 0.0068 L, below 0.5 L, while 6.8 L is inside 0.5-14 L: an error naming both values."""
    with pytest.raises(InvalidField, match=r"lung_volumes\.tlc"):
        _run({"tlc": _litres(6800), "rv": _litres(2.0)})
    outcome = _run({"tlc": {"value": 6.8, "unit": "mL"}, "rv": _litres(2.0)})
    found = _findings(outcome)["LUNG_VOLUMES_UNIT_MISLABEL"]
    assert [("lung_volumes.tlc", Severity.ERROR)] == [(f.path, f.severity) for f in found]
    assert "6.800 L" in found[0].message


def test_reported_rv_tlc_against_the_volumes():
    """100 x 2.00 / 6.80 = 29.41 %: a reported 29 % is rounding; 35 % differs by 5.6 % (> 1 %)."""
    base = {"tlc": _litres(6.8), "rv": _litres(2.0)}
    assert "LUNG_VOLUMES_RATIO_MISMATCH" not in _findings(_run({**base, "rv_tlc": {"value": 29, "unit": "%"}}))
    as_fraction = _run({**base, "rv_tlc": {"value": 0.294, "unit": "1"}})  # 0.294 of 1 is 29.4 %
    assert "LUNG_VOLUMES_RATIO_MISMATCH" not in _findings(as_fraction)
    (found,) = _findings(_run({**base, "rv_tlc": {"value": 35, "unit": "%"}}))["LUNG_VOLUMES_RATIO_MISMATCH"]
    assert found.severity is Severity.WARNING and "29.4 %" in found.message and "35 %" in found.message


def test_ic_and_erv_against_the_differences_of_the_volumes():
    """IC 3.00 against 6.80 - 3.40 = 3.40 (0.40 L off); ERV 1.45 against 3.40 - 2.00 = 1.40 (0.05 L: allowed)."""
    volumes = {**NORMAL, "ic": _litres(3.00), "erv": _litres(1.45)}
    (found,) = _findings(_run(volumes))["LUNG_VOLUMES_SUM_MISMATCH"]
    assert found.path == "lung_volumes.ic" and "3.40 L" in found.message and "IC 3.0 L" in found.message


def test_volume_sums_on_plain_numbers():
    """ERV 0.80 against FRC - RV = 3.0 - 2.0 = 1.0 L: 0.2 L off, beyond the 0.10 L allowance; IC exact."""
    (problem,) = volume_sum_problems(6.0, 3.0, 2.0, 3.0, 0.80, TABLES.spirometry)
    assert problem.problem is Problem.ERV_DIFFERS and problem.likely_value == pytest.approx(1.0)
    assert () == volume_sum_problems(6.0, 3.0, 2.0, 3.0, None, TABLES.spirometry)  # ERV not given: nothing to check
