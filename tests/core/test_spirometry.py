"""Spirometry and lung-volume checks, computed by hand from the standards' text.

Sources named beside each check:
- 2019: Graham BL et al., Standardization of Spirometry 2019 Update, Am J Respir Crit Care Med
  2019;200:e70-e88 (repeatability text; Table 10, the grades).
- 2022: Stanojevic S et al., ERS/ATS technical standard on interpretive strategies for routine lung
  function tests, Eur Respir J 2022;60:2101499 (bronchodilator response relative to predicted).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from bridge.errors import MappingError
from bridge.science.spirometry import (
    Impossible,
    Problem,
    SpirometryRules,
    Status,
    bronchodilator_response,
    fev1_above_fvc,
    fev1_fvc_check,
    grade,
    lung_volume_problems,
    millilitres_as_litres,
    post_without_pre,
    repeatability,
    status_from_flags,
)
from bridge.tables.files import load_spirometry_rules, mappings_dir
from bridge.tables.spirometry_grades import spirometry_rules

A, U, N = Status.ACCEPTABLE, Status.USABLE, Status.NOT_USABLE
ADULT, CHILD = 40.0, 5.0


@pytest.fixture(scope="module")
def rules() -> SpirometryRules:
    return load_spirometry_rules()


def _acc(*values: float) -> list[tuple[float, Status]]:
    return [(v, A) for v in values]


# --- grades, age > 6 y: Table 10, one case each side of every boundary -------------------------


@pytest.mark.parametrize(
    ("measurements", "expected"),
    [
        # A: >= 3 acceptable, two largest within 0.150 L.  3.150 - 3.000 = 0.150 -> A
        (_acc(3.000, 3.150, 2.900), "A"),
        # 3.151 - 3.000 = 0.151 > 0.150 -> not A, not B; within 0.200 -> C
        (_acc(3.000, 3.151, 2.900), "C"),
        # B: exactly 2 acceptable within 0.150 L (3.150 - 3.000 = 0.150)
        (_acc(3.000, 3.150), "B"),
        # C: >= 2 acceptable within 0.200 L (3.200 - 3.000 = 0.200)
        (_acc(3.000, 3.200), "C"),
        # 0.201 L -> D (within 0.250)
        (_acc(3.000, 3.201), "D"),
        # D: within 0.250 L (3.250 - 3.000)
        (_acc(3.000, 3.250, 2.000), "D"),
        # E: >= 2 acceptable beyond 0.250 L (0.251)
        (_acc(3.000, 3.251), "E"),
        # E: one acceptable value
        ([*_acc(3.000), (3.5, U)], "E"),
        # U: no acceptable, at least one usable
        ([(3.0, U), (2.0, N)], "U"),
        # F: neither acceptable nor usable
        ([(3.0, N), (3.1, N)], "F"),
        ([], "F"),
    ],
)
def test_grades_over_six_years_at_their_boundaries(rules, measurements, expected):
    """2019 Table 10 for age > 6 y: A/B within 0.150 L, C 0.200 L, D 0.250 L, E beyond or one, U usable only, F none."""
    # source: 2019, Table 10 (grading system for FEV1 and FVC, graded separately)
    assert expected == grade(measurements, ADULT, rules).grade


@pytest.mark.parametrize(
    ("measurements", "expected"),
    [
        # highest 0.900 L: 10 % is 0.090 < 0.100, so 0.100 L rules.  0.900 - 0.800 = 0.100 -> A
        (_acc(0.800, 0.900, 0.700), "A"),
        # 0.101 L beyond 0.100 -> C (within 0.150)
        (_acc(0.799, 0.900, 0.700), "C"),
        # highest 1.500 L: 10 % is 0.150 > 0.100, so 0.150 L rules for A.  1.500 - 1.350 = 0.150 -> A
        (_acc(1.350, 1.500, 1.200), "A"),
        # 0.151 L: beyond 0.150 -> C: limit max(0.150, 0.150) = 0.150 fails; D: max(0.200, 0.150) = 0.200 holds
        (_acc(1.349, 1.500, 1.200), "D"),
        # C for a child at 0.150 L (highest 0.800: 10 % = 0.080)
        (_acc(0.650, 0.800), "C"),
        # D for a child: within 0.200 L (0.800 - 0.600)
        (_acc(0.600, 0.800), "D"),
        # E for a child: beyond 0.200 L (0.201, 10 % of 0.801 = 0.0801)
        (_acc(0.600, 0.801), "E"),
    ],
)
def test_grades_of_a_child_are_tighter(rules, measurements, expected):
    """Age <= 6 y: A/B 0.100 L, C 0.150 L, D 0.200 L, each or 10 % of the highest value, whichever is greater."""
    # source: 2019, Table 10, column age <= 6 y and its footnote (or 10 % of the highest value)
    assert expected == grade(measurements, CHILD, rules).grade


def test_six_years_is_a_child_and_just_over_is_not(rules):
    """'aged 6 years or younger' is the child column: 0.120 L is A at 6.0 y only if 10 % allows it; at 6.01 y adult."""
    # source: 2019, repeatability text: "<= 0.100 L or 10% of largest ... for those aged 6 years or younger"
    values = _acc(1.080, 1.200, 1.000)  # difference 0.120; 10 % of 1.200 = 0.120
    assert ("A", "A") == (grade(values, 6.0, rules).grade, grade(values, 6.01, rules).grade)
    values = _acc(0.880, 1.000, 0.800)  # difference 0.120; 10 % of 1.000 = 0.100 -> child limit 0.100
    assert ("C", "A") == (grade(values, 6.0, rules).grade, grade(values, 6.01, rules).grade)


def test_grade_reports_its_evidence(rules):
    """The grade carries the counts, the difference of the two largest and the limit applied."""
    found = grade([*_acc(3.000, 3.120, 2.900), (3.3, U)], ADULT, rules)

    assert ("A", 3, 1) == (found.grade, found.acceptable, found.usable)
    assert 0.120 == pytest.approx(found.difference_l)
    assert 0.150 == found.limit_l


def test_repeatability(rules):
    """Repeatable when the two largest acceptable values are within 0.150 L (adult), 0.100 L or 10 % (child)."""
    # source: 2019, repeatability text
    assert repeatability([3.0, 3.15], ADULT, rules).met  # type: ignore[union-attr]
    assert not repeatability([3.0, 3.151], ADULT, rules).met  # type: ignore[union-attr]
    child = repeatability([1.05, 1.2], CHILD, rules)  # 0.150 > max(0.100, 0.120)
    assert child is not None and (False, 0.12) == (child.met, pytest.approx(child.limit_l))
    assert repeatability([3.0], ADULT, rules) is None


def test_flags_become_one_status():
    """Acceptable implies usable; a usable flag alone is usable; neither is not usable."""
    # source: 2019, acceptability and usability criteria (acceptable manoeuvres are usable)
    assert [A, A, U, N] == [
        status_from_flags(a, u) for a, u in ((True, True), (True, False), (False, True), (False, False))
    ]


# --- FEV1/FVC -----------------------------------------------------------------------------------


def test_ratio_recomputed_against_fraction_and_percentage(rules):
    """FEV1 2.40 L / FVC 3.20 L = 0.750: 0.75 and 75 agree; 0.77 does not (0.02 beyond 0.01)."""
    # hand computation: 2.40 / 3.20 = 0.75
    as_fraction = fev1_fvc_check(2.40, 3.20, 0.75, rules)
    as_percent = fev1_fvc_check(2.40, 3.20, 75.0, rules)
    wrong = fev1_fvc_check(2.40, 3.20, 0.77, rules)

    assert as_fraction is not None and as_percent is not None and wrong is not None
    assert (True, False, pytest.approx(0.75)) == (
        as_fraction.agrees,
        as_fraction.reported_as_percent,
        as_fraction.recomputed,
    )
    assert (True, True, 0.75) == (as_percent.agrees, as_percent.reported_as_percent, as_percent.reported)
    assert not wrong.agrees
    assert fev1_fvc_check(2.4, 0.0, 0.75, rules) is None


# --- bronchodilator response, 2022 -----------------------------------------------------------------


@pytest.mark.parametrize(
    ("pre", "post", "predicted", "percent", "significant"),
    [
        # 100 x (2.40 - 2.10) / 3.00 = 10.0 % -> not > 10 %
        (2.10, 2.40, 3.00, 10.0, False),
        # 100 x (2.41 - 2.10) / 3.00 = 10.33 % -> significant
        (2.10, 2.41, 3.00, 10.333333, True),
        # a 12 % and 200 mL rise from a low baseline (the 2005 rule) that is not 10 % of predicted:
        # 100 x (1.40 - 1.20) / 4.00 = 5 %
        (1.20, 1.40, 4.00, 5.0, False),
        # a fall is never a response: 100 x (2.90 - 3.00) / 3.50 = -2.857 %
        (3.00, 2.90, 3.50, -2.857143, False),
    ],
)
def test_bronchodilator_response_relative_to_predicted(rules, pre, post, predicted, percent, significant):
    """ERS/ATS 2022: 100 (post - pre) / predicted; a change > 10 % is a significant response."""
    # source: 2022 standard, bronchodilator responsiveness (change relative to the predicted value, > 10 %)
    found = bronchodilator_response(pre, post, predicted, rules)

    assert found is not None
    assert (percent, significant) == (pytest.approx(found.percent_of_predicted, abs=1e-6), found.significant)
    assert bronchodilator_response(pre, post, 0.0, rules) is None


# --- impossible and mislabelled values ---------------------------------------------------------------


def test_fev1_above_fvc_is_impossible():
    """FEV1 is a part of FVC: 3.10 > 3.00 is impossible; equal is possible (exhalation within 1 s)."""
    # common practice: FEV1 is the volume of the first second of the FVC manoeuvre
    assert fev1_above_fvc(3.10, 3.00) == Impossible(Problem.FEV1_ABOVE_FVC, "fev1", (("fev1", 3.10), ("fvc", 3.00)))
    assert (None, None) == (fev1_above_fvc(3.00, 3.00), fev1_above_fvc(2.4, 3.2))


def test_millilitres_sent_as_litres(rules):
    """FEV1 '2450' labelled L is 2.45 L sent in mL; 9.5 L (above range, 0.0095 below it) is not a unit error."""
    # common practice: 1 L = 1000 mL
    found = millilitres_as_litres("fev1", 2450.0, rules)
    assert found is not None and (Problem.MILLILITRES_AS_LITRES, 2.45) == (found.problem, found.likely_value)
    assert (None, None) == (millilitres_as_litres("fev1", 9.5, rules), millilitres_as_litres("tlc", 6.1, rules))


def test_post_without_pre():
    """A post-bronchodilator value alone is flagged; pre alone or both are fine."""
    assert post_without_pre("fev1", None, 2.5) == Impossible(Problem.POST_WITHOUT_PRE, "fev1", (("fev1_post", 2.5),))
    assert (None, None) == (post_without_pre("fev1", 2.3, None), post_without_pre("fev1", 2.3, 2.5))


def test_lung_volume_combinations(rules):
    """RV > TLC, FRC < RV, FRC > TLC are impossible; RV/TLC recomputed: 1.80 / 6.00 = 30 %, reported 35 % differs."""
    # common practice: RV <= FRC <= TLC (FRC = RV + ERV; TLC = FRC + IC)
    problems = lung_volume_problems(tlc_l=5.0, rv_l=5.2, frc_l=5.1)
    assert [Problem.RV_ABOVE_TLC, Problem.FRC_BELOW_RV, Problem.FRC_ABOVE_TLC] == [p.problem for p in problems]
    # hand computation: 100 x 1.80 / 6.00 = 30.0 %; 31.0 is within 1 point, 35.0 is not
    assert () == lung_volume_problems(6.0, 1.8, 3.0, 31.0, rules)
    (differs,) = lung_volume_problems(6.0, 1.8, 3.0, 35.0, rules)
    assert (Problem.RV_TLC_DIFFERS, 30.0) == (differs.problem, pytest.approx(differs.likely_value))


# --- the table ---------------------------------------------------------------------------------


def test_table_carries_the_published_limits(rules):
    """The limits in spirometry_grades.toml are those of the 2019 and 2022 standards."""
    # source: 2019, Table 10 and repeatability text; 2022, bronchodilator response
    limits = {r.grade: (r.min_acceptable, r.max_difference_l, r.max_difference_l_child) for r in rules.grades}
    assert {
        "A": (3, 0.150, 0.100),
        "B": (2, 0.150, 0.100),
        "C": (2, 0.200, 0.150),
        "D": (2, 0.250, 0.200),
        "E": (1, None, None),
        "U": (0, None, None),
    } == limits
    assert (6.0, 10.0, 0.150, 0.100, 10.0) == (
        rules.child_max_age_y,
        rules.child_percent_of_highest,
        rules.repeatability_l,
        rules.repeatability_l_child,
        rules.bronchodilator_percent_of_predicted,
    )


@pytest.mark.parametrize(
    ("old", "new"),
    [
        ('grade = "B"', 'grade = "Z"'),
        ("min_acceptable = 3", 'min_acceptable = "x"'),
        ("fev1 = [0.1, 9.0]", "fev1 = [9.0, 0.1]"),
        ("[ratio]", "[ratios]"),
    ],
)
def test_broken_table_is_a_mapping_error(old, new):
    """Grades out of order, a bad number, an empty range or a missing section name the table."""
    text = (mappings_dir() / "spirometry_grades.toml").read_text(encoding="utf-8")
    assert old in text
    with pytest.raises(MappingError) as caught:
        spirometry_rules(text.replace(old, new, 1))
    assert "spirometry_grades.toml" == caught.value.table


def test_loader_names_a_missing_file(tmp_path: Path):
    with pytest.raises(MappingError) as caught:
        load_spirometry_rules(tmp_path)
    assert "spirometry_grades.toml" == caught.value.table
