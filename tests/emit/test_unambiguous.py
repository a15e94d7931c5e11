"""What a receiver files can be told apart: one value per code, ranges on the value they describe,
stated absences, the Hb an adjusted value used, standard codes, converted pressures at their precision.

Every session goes through the one pipeline (``process`` with routes); both outputs are read back
with independent readers: json and the official FHIR R4 JSON schema (tests/fhir_schema.py),
python-hl7 and hl7apy STRICT.
"""

from __future__ import annotations

import json
import re
from collections import Counter
from datetime import UTC, datetime
from decimal import Decimal
from pathlib import Path
from typing import Any

import hl7
import pytest
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message
from pyspiro import GLI_2017

from bridge.display.bundle_summary import describe_bundle
from bridge.display.check_report import outcome_text
from bridge.emit.settings import EmitSettings
from bridge.pipeline import PipelineSettings, Route, process
from bridge.tables import Tables
from tests.conftest import GOOD_SAMPLES
from tests.emit.test_hl7v2 import ALLOWED_WARNINGS
from tests.emit.test_reference_outputs import _observations, _obx
from tests.fhir_schema import bundle_errors, shared_validators

SAMPLES = Path(__file__).resolve().parents[2] / "samples"
NOW = datetime(2026, 3, 10, 12, 0, tzinfo=UTC)
BOTH = (Route("fhir", "traditional"), Route("hl7", "traditional"))
SI = (Route("fhir", "si"), Route("hl7", "si"))
CHARTED = ("gli-2017", "lab")
# Samples 07 and 09 carry ERROR findings: sent (marked preliminary) only when the site allows them.
ALLOW = frozenset({"UNIT_MISLABEL_PROBABLE", "HB_ADJUSTMENT_WRONG_DIRECTION"})
SNOMED = "http://snomed.info/sct"


def _document(name: str) -> dict[str, Any]:
    data: dict[str, Any] = json.loads((SAMPLES / f"{name}.json").read_text(encoding="utf-8"))
    return data


def _outputs(
    document: dict[str, Any], tables: Tables, charted: str = "gli-2017", routes: tuple[Route, ...] = BOTH
) -> tuple[dict[str, Any], str]:
    """(Bundle as JSON, ER7 text) of one export."""
    emit = EmitSettings(charted_predicted=charted)  # type: ignore[arg-type]
    settings = PipelineSettings(emit=emit, allow=ALLOW)
    outcome = process(json.dumps(document).encode(), "variant.json", tables, settings, now=NOW, routes=routes)
    by_kind = {p.kind: p.data for p in outcome.payloads}
    return json.loads(by_kind["fhir"]), by_kind["hl7"].decode("utf-8")


def _notes_after(er7: str, code: str) -> list[str]:
    """The NTE-3 texts right after the OBX whose OBX-3 identifier is ``code``."""
    segments = list(hl7.parse(er7))
    at = next(i for i, s in enumerate(segments) if str(s[0]) == "OBX" and str(s[3][0][0]) == code)
    notes = []
    for segment in segments[at + 1 :]:
        if str(segment[0]) != "NTE":
            break
        notes.append(str(segment[3]))
    return notes


def _strict(er7: str, tmp_path: Path) -> None:
    """hl7apy STRICT: a valid ORU_R01, with no warning beyond hl7apy's stale copy of table 0396."""
    report = tmp_path / "report.txt"
    message = parse_message(er7, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
    assert message.validate(report_file=str(report))
    assert set() == {line for line in report.read_text().splitlines() if line} - ALLOWED_WARNINGS


# ---------- one basis per record, stated (issue 18, item 4) ----------


def _flag_contradicts_range(obx: Any) -> bool:
    """OBX-8 says something else than OBX-5 against the OBX-7 range."""
    # source: HL7 v2.5.1 ch. 7, OBX-7 reference range ("lower-upper", ">lower"); table 0078 abnormal
    # flags: L below low normal, H above high normal, N normal
    value, limits, flag = str(obx[5]), str(obx[7]), str(obx[8])
    if not limits:
        return flag not in ("", "N")  # a flag without a range would rest on something not sent
    found = re.fullmatch(r"(-?[\d.]+)-(-?[\d.]+)|>(-?[\d.]+)", limits)
    assert found is not None, limits
    low = Decimal(found[1] or found[3])
    high = Decimal(found[2]) if found[2] else None
    expected = "L" if Decimal(value) < low else "H" if high is not None and Decimal(value) > high else "N"
    return flag != expected


def _altitude_17(tables: Tables, charted: str = "gli-2017") -> tuple[dict[str, Any], str]:
    """Sample 02 (615 mmHg) with DLCO 17.0: inside 16.0-26.0 as measured, below 16.0 at sea level."""
    document = _document("02-anaemic-patient")
    document["results"]["dlco"]["value"] = 17.0
    document["results"].pop("kco")
    return _outputs(document, tables, charted)


@pytest.mark.parametrize("charted", CHARTED)
def test_no_flag_contradicts_the_range_beside_it(tables: Tables, charted: str):
    """Across the samples and the altitude case, OBX-8 agrees with OBX-5 against OBX-7 (today: 17.0|16.0-26.0|L)."""
    messages = [_outputs(_document(p.stem), tables, charted)[1] for p in GOOD_SAMPLES]
    messages.append(_altitude_17(tables, charted)[1])

    assert [] == [
        f"{obx[3][0][0]}: {obx[5]} | {obx[7]} | {obx[8]}"
        for er7 in messages
        for obx in hl7.parse(er7).segments("OBX")
        if _flag_contradicts_range(obx)
    ]


def test_the_range_and_flag_sit_on_the_sea_level_value_they_describe(tables: Tables):
    """At 615 mmHg DLCO 17.0 goes out without a range; DLCO at sea level 15.4 carries 16.0-26.0 and L."""
    # by hand: ERS/ATS 2017, 1 + 0.0031 x (0.21 x (615 - 47) - 150) = 0.904768; 17.0 x 0.904768 = 15.38
    # source: pyspiro GLI-2017 (Stanojevic et al. 2017): LLN and ULN of the woman of sample 02
    age = (datetime(2026, 3, 3).date() - datetime(1974, 6, 30).date()).days / 365.25
    gli, dlco = GLI_2017(), GLI_2017.Parameters.DLCO.value
    limits = (round(float(gli.lln(0, age, 163.0, dlco, None)), 1), round(float(gli.uln(0, age, 163.0, dlco, None)), 1))
    bundle, er7 = _altitude_17(tables)
    (measured,) = _obx(er7, "19911-7")
    (sea_level,) = _obx(er7, "DLCO-PB-ADJ")
    (fhir_sea_level,) = _observations(bundle, "DLCO-PB-ADJ")
    (z,) = _observations(bundle, "DLCO-Z")

    assert ("17.0", "", "") == (str(measured[5]), str(measured[7]), str(measured[8]))
    assert "15.4" == str(sea_level[5])
    assert limits == tuple(float(v) for v in str(sea_level[7]).split("-"))
    assert "L" == str(sea_level[8])
    # FHIR R4 Observation.derivedFrom: the z-score rests on the Observation that carries the range
    full_url = next(
        e["fullUrl"] for e in bundle["entry"] if e["resource"] is not None and e["resource"] == fhir_sea_level
    )
    assert full_url == z["derivedFrom"][0]["reference"]
    assert "referenceRange" in fhir_sea_level
    assert "referenceRange" not in _observations(bundle, "19911-7")[0]


def test_the_labs_per_cent_says_which_dlco_it_used(tables: Tables):
    """Sample 03: the lab's 100 % compares DLCO at sea level; with altitude-adjusted predictions, 110 % as measured."""
    # by hand: 36.4 x 0.904768 / 33.0 = 99.8 % -> 100; 36.4 / 33.0 = 110.3 % -> 110
    bundle, _ = _outputs(_document("03-high-altitude"), tables)
    notes = [n["text"] for o in _observations(bundle, "DLCO-PB-ADJ") for n in o["note"]]
    document = _document("03-high-altitude")
    document["results"]["predicted"]["altitude_adjusted"] = True
    _, er7 = _outputs(document, tables, "lab")
    (percent,) = _obx(er7, "98130-8")  # source: LOINC 98130-8 DLCO/predicted

    assert any("100 % predicted from the measured value adjusted to sea level" in n for n in notes)
    assert "110" == str(percent[5])
    assert any("from the measured value," in n for n in _notes_after(er7, "98130-8"))


def test_check_shows_the_basis_beside_every_comparison(sample_outcomes, tables: Tables):
    """check: the lab's per cent predicted says which value it compares, like the GLI-2017 line beside it."""
    text = outcome_text(sample_outcomes["03-high-altitude"], tables, "traditional")
    compared = [line for line in text.splitlines() if " % " in line or line.endswith(" %")]

    assert compared
    assert [] == [line for line in compared if "[" not in line]
    assert any(line.strip().startswith("DLCO lab") and "[adjusted to sea level]" in line for line in compared)


# ---------- results independent of the values (issue 18, item 5) ----------


def test_the_set_of_results_does_not_depend_on_the_values(tables: Tables):
    """Sample 04 with DLCO 7.80 or 7.87 mmol/min/kPa: the same results go out (today 7.80 sends one fewer)."""
    # by hand (ERS/ATS 2017, 100.6 kPa): factor 0.995623; 7.80 -> 7.766 -> 7.8 equals the reported value
    #   at its precision, 7.87 -> 7.836 -> 7.8 does not
    codes = []
    for dlco in (7.80, 7.87):
        document = _document("04-raised-cohb")
        document["results"]["dlco"]["value"] = dlco
        bundle, er7 = _outputs(document, tables)
        fhir = [e["resource"]["identifier"][0]["value"] for e in bundle["entry"] if "identifier" in e["resource"]]
        codes.append((fhir, [str(obx[3][0][0]) for obx in hl7.parse(er7).segments("OBX")]))

    assert codes[0] == codes[1]
    assert "DLCO-PB-ADJ" in codes[0][1]


def test_outside_the_equations_the_results_are_sent_as_stated_absences(tables: Tables, tmp_path: Path):
    """A man of 86: GLI-2017 predicted, per cent and z-score go out without a value, saying why; not the lab's."""
    # source: Stanojevic et al., ERJ 2017;50:1700010 (equations for 5-85 y); FHIR R4 Observation
    # obs-6 and CodeSystem data-absent-reason "not-applicable"; HL7 v2.5.1 table 0085 X "results
    # cannot be obtained for this observation", the reason in NTE
    document = _document("01-healthy-adult")
    document["patient"]["birth_date"] = "1939-06-01"  # 86 y on 2026-03-02
    bundle, er7 = _outputs(document, tables)
    absent = [o for code in ("19910-9", "98130-8", "DLCO-Z") for o in _observations(bundle, code)]

    assert 3 == len(absent)
    assert [] == [o for o in absent if "valueQuantity" in o]  # never the lab's 10.15 mmol/min/kPa instead
    assert {"not-applicable"} == {o["dataAbsentReason"]["coding"][0]["code"] for o in absent}
    assert all("age" in o["dataAbsentReason"]["text"] for o in absent)
    assert [] == bundle_errors(bundle, shared_validators())  # source: official FHIR R4 JSON schema
    for code in ("19910-9", "98130-8", "DLCO-Z"):
        (obx,) = _obx(er7, code)
        assert ("X", "", "") == (str(obx[11]), str(obx[5]), str(obx[2]))
        assert any("age" in n for n in _notes_after(er7, code))
    _strict(er7, tmp_path)


# ---------- one result per code under an order (issue 28, item 1) ----------


@pytest.mark.parametrize("charted", CHARTED)
@pytest.mark.parametrize("routes", [BOTH, SI], ids=["traditional", "si"])
def test_no_code_repeats_under_an_order(tables: Tables, charted: str, routes: tuple[Route, ...]):
    """(OBX-3, OBX-4) is unique under the OBR, and no two Observations share a code (today sample 02: 19910-9 twice)."""
    # source: HL7 v2.5.1 ch. 7, OBX-4 observation sub-id: distinguishes OBX segments with the same
    # OBX-3 under one OBR (read back with python-hl7); FHIR R4 Observation: nothing else tells apart
    # two Observations of one report with the same code
    repeated = {}
    for path in GOOD_SAMPLES:
        bundle, er7 = _outputs(_document(path.stem), tables, charted, routes)
        keys = Counter((str(obx[3][0][0]), str(obx[4])) for obx in hl7.parse(er7).segments("OBX"))
        codes = Counter(
            coding["code"]
            for e in bundle["entry"]
            if e["resource"]["resourceType"] == "Observation"
            for coding in e["resource"]["code"]["coding"]
        )
        repeated[path.stem] = ([k for k, n in keys.items() if n > 1], [c for c, n in codes.items() if n > 1])

    assert {stem: ([], []) for stem in repeated} == repeated


def test_the_site_chooses_whose_predicted_value_is_charted(tables: Tables):
    """Sample 02: GLI-2017's 20.6 charted by default, the lab's 20.9 with charted_predicted lab; the other in a note."""
    # source: pyspiro GLI-2017 predicted DLCO of the woman of sample 02 (51.7 y, 163 cm)
    age = (datetime(2026, 3, 3).date() - datetime(1974, 6, 30).date()).days / 365.25
    gli = round(float(GLI_2017().lms(0, age, 163.0, GLI_2017.Parameters.DLCO.value, None)[1]), 1)
    default, default_er7 = _outputs(_document("02-anaemic-patient"), tables)
    lab, lab_er7 = _outputs(_document("02-anaemic-patient"), tables, "lab")
    (default_predicted,) = _observations(default, "19910-9")  # source: LOINC 19910-9 DLCO predicted
    (lab_predicted,) = _observations(lab, "19910-9")

    assert (gli, 20.9) == (
        float(default_predicted["valueQuantity"]["value"]),
        float(lab_predicted["valueQuantity"]["value"]),
    )
    assert any("predicted 20.9" in n and "Not charted" in n for n in _notes_after(default_er7, "DLCO-PB-ADJ"))
    assert any(f"predicted {gli}" in n and "Not charted" in n for n in _notes_after(lab_er7, "DLCO-PB-ADJ"))
    assert [] == _obx(lab_er7, "DLCO-Z")  # a GLI-2017 z-score is not charted beside the lab's values


# ---------- blood values (issue 28, item 3) ----------


def test_the_hb_an_adjustment_used_travels_with_it(tables: Tables, tmp_path: Path):
    """Sample 02: Hb 8.9 g/dL contained in the Hb-adjusted DLCO (#hb) and in an NTE after its OBX; never an entry."""
    # source: FHIR R4 Resource.contained and references.html ("#id"; dom-3); HL7 v2.5.1 ch. 2, NTE
    # comments on the segment before it; LOINC 718-7 haemoglobin, 19913-3 DLCO adjusted for hemoglobin
    bundle, er7 = _outputs(_document("02-anaemic-patient"), tables)
    (adjusted,) = _observations(bundle, "19913-3")

    assert [("hb", "718-7", Decimal("8.9"))] == [
        (c["id"], c["code"]["coding"][0]["code"], Decimal(str(c["valueQuantity"]["value"])))
        for c in adjusted["contained"]
    ]
    assert {"reference": "#hb"} in adjusted["derivedFrom"]
    assert [] == _observations(bundle, "718-7") + [
        o for e in bundle["entry"] for o in [e["resource"]] if "component" in o
    ]
    assert any("8.9 g/dL (718-7)" in n and "used by this adjustment" in n for n in _notes_after(er7, "19913-3"))
    assert [] == _obx(er7, "718-7")
    assert [] == bundle_errors(bundle, shared_validators())  # source: official FHIR R4 JSON schema
    _strict(er7, tmp_path)


# ---------- standard codes (issue 28, item 5) ----------


def test_va_carries_its_snomed_code_and_results_their_technique(tables: Tables, tmp_path: Path):
    """VA: SNOMED CT 251953007 beside the local code; single-breath results: method SNOMED CT 264284001."""
    # source: PFT IG (Automate-Medical/pft-ig) AlveolarVolume.fsh and MII Lungenfunktion profile
    #   mii-pr-lungenfunktion-va: SNOMED CT 251953007 "Alveolar volume (observable entity)"; MII
    #   ValueSet mii-vs-lufu-sct-technique: 264284001 "Single-breath technique (qualifier value)";
    #   HL7 v2.5.1 ch. 2, CE components 4-6 (alternate identifier), ch. 7 OBX-17 observation method
    bundle, er7 = _outputs(_document("01-healthy-adult"), tables)
    (va,) = _observations(bundle, "VA")
    (dlco,) = _observations(bundle, "19911-7")
    (va_obx,) = _obx(er7, "VA")
    (dlco_obx,) = _obx(er7, "19911-7")

    assert (SNOMED, "251953007") == (va["code"]["coding"][1]["system"], va["code"]["coding"][1]["code"])
    assert [(SNOMED, "264284001")] == [(c["system"], c["code"]) for c in dlco["method"]["coding"]]
    assert ("251953007", "SCT") == (str(va_obx[3][0][3]), str(va_obx[3][0][5]))
    assert ("264284001", "SCT") == (str(dlco_obx[17][0][0]), str(dlco_obx[17][0][2]))
    assert "method" not in _observations(bundle, "19910-9")[0]  # a predicted value is no measurement
    assert [] == bundle_errors(bundle, shared_validators())  # source: official FHIR R4 JSON schema
    _strict(er7, tmp_path)


# ---------- converted pressures (issue 28, item 6) ----------


def test_a_pressure_in_hpa_goes_out_at_its_own_step(tables: Tables):
    """1008 hPa goes out as 100.8 kPa in both outputs, not 100.80."""
    # source: NIST SP 811 (2008) B.7.2: a step of 1 hPa is 0.1 kPa, so one decimal
    document = _document("04-raised-cohb")
    document["conditions"]["barometric_pressure"] = {"value": 1008, "unit": "hPa"}
    bundle, er7 = _outputs(document, tables, routes=SI)
    (pressure,) = _observations(bundle, "PB")
    (obx,) = _obx(er7, "PB")

    assert ("100.8", "kPa") == (str(pressure["valueQuantity"]["value"]), pressure["valueQuantity"]["code"])
    assert "100.8" == str(obx[5])


def test_show_says_a_stated_absence(tables: Tables):
    """show summarises an Observation without a value by its dataAbsentReason, not as a blank value."""
    # source: FHIR R4 Observation.dataAbsentReason (obs-6: present only when value[x] is absent)
    document = _document("01-healthy-adult")
    document["patient"]["birth_date"] = "1939-06-01"  # 86 y: outside GLI-2017
    bundle, _ = _outputs(document, tables)
    lines = [line for line in describe_bundle(bundle).splitlines() if line.strip().startswith("19910-9")]

    assert 1 == len(lines)
    assert "no value (not-applicable)" in lines[0]
