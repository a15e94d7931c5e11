"""reference_basis: which DLCO and KCO per cent predicted and the GLI-2017 z-scores compare.

The expectations are computed here by hand (the adjustments) and by pyspiro 1.0.0 (the z-scores
and predicted values), independently of bridge.science.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any

import pytest
from pyspiro import GLI_2017

from bridge.model import Outcome, Severity
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables import Tables

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
MALE = 1  # pyspiro: 0 = female, 1 = male
# The vignette man of the R package pft (45 y, 178 cm, DLCO 22.0 mL/min/mmHg, VA 6.5 L), here
# tested at PB 615 mmHg with Hb 12.0 g/dL.
AGE = (date(2026, 3, 2) - date(1981, 3, 1)).days / 365.25  # decimal age on the day of the test
HEIGHT, DLCO, VA, PB, HB = 178.0, 22.0, 6.5, 615.0, 12.0
# source: ERS/ATS 2017 DLCO standard (Graham et al., ERJ 2017;49:1600016): DLCO x (1 + 0.0031 (PIO2 - 150)),
# PIO2 = 0.21 x (PB - 47). By hand: PIO2 = 0.21 x 568 = 119.28; factor = 1 - 0.0031 x 30.72 = 0.904768.
PRESSURE_FACTOR = 0.904768
# source: Cotes, as in the ATS/ERS 2005 and ERS/ATS 2017 DLCO standards: adjusted = measured x
# (10.22 + Hb) / (1.7 Hb) for men of 15 y and over. By hand: 22.22 / 20.4 = 1.0892157.
HB_FACTOR = 22.22 / 20.4


def _session(document: dict[str, Any], *, pressure: bool = True, hb: bool = True) -> None:
    document["patient"].update(sex="male", birth_date="1981-03-01", height={"value": 178, "unit": "cm"})
    document["performed_at"] = "2026-03-02T09:15:00+00:00"
    document["manoeuvres"] = []
    document["conditions"] = {}
    if pressure:
        document["conditions"]["barometric_pressure"] = {"value": PB, "unit": "mmHg"}
    if hb:
        document["conditions"]["hemoglobin"] = {"value": HB, "unit": "g/dL"}
    document["results"] = {"dlco": {"value": DLCO, "unit": "mL/min/mm[Hg]"}, "va": {"value": VA, "unit": "L"}}


def _run(tables: Tables, basis: str, routes: tuple[Route, ...] = (), **conditions: bool) -> Outcome:
    document = json.loads((SAMPLES / "01-healthy-adult.json").read_text(encoding="utf-8"))
    _session(document, **conditions)
    settings = PipelineSettings(reference_basis=basis)  # type: ignore[arg-type]
    now = datetime(2026, 3, 2, 12, 0, tzinfo=UTC)
    return process(json.dumps(document).encode(), "basis.json", tables, settings, now=now, routes=routes)


def _pyspiro(parameter: Any, value: float) -> tuple[float, float]:
    """(z-score, per cent predicted) of ``value`` for the man, from pyspiro."""
    gli = GLI_2017()
    z = float(gli.zscore(MALE, AGE, HEIGHT, parameter, value))
    predicted = float(gli.lms(MALE, AGE, HEIGHT, parameter, None)[1])
    return z, 100.0 * value / predicted


CASES: Mapping[str, tuple[dict[str, bool], float, str]] = {
    # setting, conditions given: the DLCO compared (by hand) and the basis the outputs name
    "pressure_adjusted": ({}, DLCO * PRESSURE_FACTOR, "pressure_adjusted"),  # 19.905
    "measured": ({}, DLCO, "measured"),
    "hb_adjusted": ({}, DLCO * HB_FACTOR * PRESSURE_FACTOR, "hb_and_pressure_adjusted"),  # 21.681
    "hb_adjusted at sea level": ({"pressure": False}, DLCO * HB_FACTOR, "hb_adjusted"),  # 23.963
    "hb_adjusted without Hb": ({"hb": False}, DLCO, "measured"),  # the measured value, with a finding
}


@pytest.mark.parametrize("case", list(CASES))
def test_dlco_z_score_compares_the_value_the_setting_names(tables: Tables, case: str):
    """z-score and per cent predicted of DLCO equal pyspiro's for the value compared by hand."""
    conditions, compared, basis = CASES[case]
    reference = _run(tables, case.split()[0], **conditions).derived.reference_dlco
    z, percent = _pyspiro(GLI_2017.Parameters.DLCO.value, compared)

    assert reference is not None
    assert basis == reference.basis
    assert compared == pytest.approx(reference.compared.value, rel=1e-9)
    assert z == pytest.approx(reference.z_score, abs=1e-3)
    assert round(percent) == round(reference.percent_predicted.value)


def test_kco_follows_dlco_on_the_hb_basis(tables: Tables):
    """KCO = DLCO/VA computed here, adjusted for Hb and pressure like DLCO: 22.0 / 6.5 x 1.08922 x 0.904768 = 3.3355."""
    reference = _run(tables, "hb_adjusted").derived.reference_kco
    compared = DLCO / VA * HB_FACTOR * PRESSURE_FACTOR
    z, _ = _pyspiro(GLI_2017.Parameters.KCO_trad.value, compared)

    assert reference is not None
    assert ("hb_and_pressure_adjusted", 3.335) == (reference.basis, round(reference.compared.value, 3))
    assert z == pytest.approx(reference.z_score, abs=1e-3)


def test_without_hb_the_measured_value_is_compared_and_a_finding_says_so(tables: Tables):
    """reference_basis hb_adjusted without Hb: one info finding naming the setting and what was missing."""
    outcome = _run(tables, "hb_adjusted", hb=False)
    found = [f for f in outcome.findings if f.code == "REFERENCE_BASIS_FALLBACK"]

    assert [Severity.INFO] == [f.severity for f in found]
    assert "reference_basis hb_adjusted" in found[0].message
    assert "no haemoglobin was reported" in found[0].message
    assert "REFERENCE_BASIS_FALLBACK" not in {f.code for f in _run(tables, "pressure_adjusted", hb=False).findings}


@pytest.mark.parametrize(
    ("basis", "words"),
    [
        ("pressure_adjusted", "from the measured value adjusted to sea level"),
        ("measured", "from the measured value."),
        ("hb_adjusted", "from the measured value adjusted to standard Hb and to sea level"),
    ],
)
def test_the_outputs_note_follows_the_setting(tables: Tables, basis: str, words: str):
    """The z-score's note in the HL7 message names the value the z-score compared."""
    outcome = _run(tables, basis, routes=(Route("hl7", "traditional"),))
    message = outcome.payloads[0].data.decode()
    assert outcome.derived.reference_dlco is not None

    assert f"GLI-2017 z-score: {outcome.derived.reference_dlco.band}, {words}" in message
