"""Spirometry read through both field maps equals the JSON sample's, manoeuvres and 2019 grades included.

The twins of samples/10-spirometry-and-dlco.json in the bundled legacy samples (invented,
fictional): session LOW-2026-0010 of samples/legacy/lowmarsh-results.csv (the manoeuvres in
numbered columns) and message HC-26-0199 of samples/legacy/highcairn-results.hl7 (one OBX per
manoeuvre value, OBX-4 the manoeuvre number). tests/maps/test_three_encodings.py compares the
whole sessions; this file looks at the spirometry and the grades recomputed from the manoeuvres.
"""

from __future__ import annotations

import pytest

from bridge.model import Outcome
from bridge.pipeline import PipelineSettings, process, process_all
from bridge.values import plain
from tests.maps.conftest import CSV_SAMPLE, HL7_SAMPLE, ROOT
from tests.maps.test_three_encodings import _leaves

TWIN = ROOT / "samples" / "10-spirometry-and-dlco.json"
TWINS = [(CSV_SAMPLE, "csv_map", "LOW-2026-0010"), (HL7_SAMPLE, "hl7_map", "HC-26-0199")]


def _twin_of(sample, map_name, test_id, tables, request) -> Outcome:
    fmap = request.getfixturevalue(map_name)
    outcomes = [r for r in process_all(sample.read_bytes(), sample.name, tables, PipelineSettings(field_map=fmap))]
    (outcome,) = [r for r in outcomes if isinstance(r, Outcome) and r.session.test_id == test_id]
    return outcome


@pytest.mark.parametrize(("sample", "map_name", "test_id"), TWINS)
def test_the_maps_read_the_spirometry_of_their_json_twin_field_by_field(sample, map_name, test_id, tables, request):
    """Every spirometry value and manoeuvre (value, unit, digits, original, acceptability) equals the JSON's."""
    outcome = _twin_of(sample, map_name, test_id, tables, request)
    expected = process(TWIN.read_bytes(), TWIN.name, tables).session.spirometry
    assert expected is not None and outcome.session.spirometry is not None
    mine = _leaves(plain(outcome.session.spirometry, "json"))

    assert _leaves(plain(expected, "json")) == mine
    assert "acceptable" == mine["pre.manoeuvres[0].fev1_status"]  # samples/10: the first pre manoeuvre
    assert "usable" == mine["pre.manoeuvres[2].fvc_status"]


@pytest.mark.parametrize(("sample", "map_name", "test_id"), TWINS)
def test_the_mapped_twins_get_the_2019_grades_of_samples_10(sample, map_name, test_id, tables, request):
    """The grades recomputed from mapped manoeuvres are those worked out by hand from samples/10's values."""
    # source: Graham et al., Am J Respir Crit Care Med 2019;200:e70, Table 10 (FEV1 and FVC graded
    # separately, per phase): A = >= 3 acceptable, the two largest within 0.150 L; B = 2 acceptable
    # within 0.150 L (limits for patients older than 6 years: born 1968, tested 2026).
    # Before the bronchodilator: FEV1 1.92, 1.88, 1.85 L all acceptable -> 3, 1.92 - 1.88 = 0.04 L -> A;
    # FVC 3.05, 2.98 acceptable and 3.01 usable -> 2 acceptable, 3.05 - 2.98 = 0.07 L -> B.
    # After: FEV1 2.31, 2.27 L acceptable -> 0.04 L -> B; FVC 3.24, 3.19 L acceptable -> 0.05 L -> B.
    derived = _twin_of(sample, map_name, test_id, tables, request).derived.spirometry
    assert derived is not None and derived.pre is not None and derived.post is not None
    grades = [derived.pre.fev1_grade, derived.pre.fvc_grade, derived.post.fev1_grade, derived.post.fvc_grade]
    assert None not in grades

    assert [("A", 3, 0), ("B", 2, 1), ("B", 2, 0), ("B", 2, 0)] == [
        (g.grade, g.acceptable, g.usable) for g in grades if g is not None
    ]
    assert [True, True, True, True] == [g.repeatable for g in grades if g is not None]
