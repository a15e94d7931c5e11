"""Spirometry and static lung volumes: session grades, recomputed ratios, bronchodilator response,
and values that cannot be true.

Owns: the ATS/ERS 2019 grade (A-F and U) of FEV1 and FVC, each graded separately from the lab's
acceptable and usable manoeuvres (Graham et al., Am J Respir Crit Care Med 2019;200:e70, Table 10);
repeatability; FEV1/FVC recomputed against the reported ratio; the bronchodilator response of the
ERS/ATS 2022 interpretation standard (Stanojevic et al., Eur Respir J 2022;60:2101499: the change
relative to the predicted value); FEV1 above FVC, litres sent as millilitres, a post-bronchodilator
value without its pre value; RV above TLC, FRC outside RV-TLC and RV/TLC recomputed. The limits are
data (``mappings/spirometry_grades.toml``, parsed by ``bridge.tables.spirometry_grades``).

Every function takes plain numbers (litres, L/s, years) and returns a small frozen result; none
reads the Session model, so the checks can be wired into findings and outputs separately. Pure.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from enum import StrEnum


class Status(StrEnum):
    """A manoeuvre's standing for one parameter, from the lab's flags (2019 standard)."""

    ACCEPTABLE = "acceptable"  # acceptable is also usable
    USABLE = "usable"
    NOT_USABLE = "not_usable"


def status_from_flags(acceptable: bool, usable: bool) -> Status:
    """The lab's two flags as one status: acceptable wins; usable only if not acceptable."""
    if acceptable:
        return Status.ACCEPTABLE
    return Status.USABLE if usable else Status.NOT_USABLE


@dataclass(frozen=True, slots=True)
class GradeRule:
    """One row of Table 10: the grade and the conditions that give it."""

    grade: str
    min_acceptable: int
    min_usable: int = 0
    max_difference_l: float | None = None
    max_difference_l_child: float | None = None


@dataclass(frozen=True, slots=True)
class SpirometryRules:
    """Every limit of ``spirometry_grades.toml``."""

    grades: tuple[GradeRule, ...]
    child_max_age_y: float
    child_percent_of_highest: float
    repeatability_l: float
    repeatability_l_child: float
    bronchodilator_percent_of_predicted: float
    ratio_max_difference: float
    rv_tlc_max_difference_percent: float
    lung_volume_sum_max_difference_l: float  # IC vs TLC - FRC, ERV vs FRC - RV
    plausible: Mapping[str, tuple[float, float]]

    def difference_limit(self, adult_l: float, child_l: float, age_years: float, highest: float) -> float:
        """The adult limit above the child age; for a child, its limit or the per cent of the highest value."""
        if age_years > self.child_max_age_y:
            return adult_l
        return max(child_l, self.child_percent_of_highest / 100.0 * highest)


# Volumes come to 1 mL and limits are decimal: 1e-9 absorbs binary rounding (3.150 - 3.000 > 0.150).
_ROUNDING = 1e-9


def _within(difference: float, limit: float) -> bool:
    return difference <= limit + _ROUNDING


# --- grades and repeatability -----------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Grade:
    """The grade of one parameter (FEV1 or FVC) for one set of manoeuvres (pre or post)."""

    grade: str
    acceptable: int
    usable: int  # usable but not acceptable
    difference_l: float | None  # largest minus next largest acceptable value; None with fewer than 2
    limit_l: float | None  # the limit of the grade given, None for E, U and F


def _two_largest_difference(values: Sequence[float]) -> float | None:
    if len(values) < 2:
        return None
    largest, second = sorted(values, reverse=True)[:2]
    return largest - second


def grade(measurements: Sequence[tuple[float, Status]], age_years: float, rules: SpirometryRules) -> Grade:
    """The 2019 grade of one parameter: its values (L) with each manoeuvre's status for that parameter."""
    acceptable = [v for v, s in measurements if s is Status.ACCEPTABLE]
    usable = sum(1 for _, s in measurements if s is Status.USABLE)
    difference = _two_largest_difference(acceptable)
    highest = max(acceptable, default=0.0)
    for rule in rules.grades:
        if len(acceptable) < rule.min_acceptable or len(acceptable) + usable < rule.min_usable:
            continue
        if rule.max_difference_l is None:
            return Grade(rule.grade, len(acceptable), usable, difference, None)
        child = rule.max_difference_l_child if rule.max_difference_l_child is not None else rule.max_difference_l
        limit = rules.difference_limit(rule.max_difference_l, child, age_years, highest)
        if difference is not None and _within(difference, limit):
            return Grade(rule.grade, len(acceptable), usable, difference, limit)
    return Grade("F", len(acceptable), usable, difference, None)


@dataclass(frozen=True, slots=True)
class Repeatability:
    """Whether the two largest acceptable values are within the 2019 repeatability limit."""

    difference_l: float
    limit_l: float
    met: bool


def repeatability(acceptable_values: Sequence[float], age_years: float, rules: SpirometryRules) -> Repeatability | None:
    """The repeatability of one parameter; None with fewer than two acceptable values."""
    difference = _two_largest_difference(acceptable_values)
    if difference is None:
        return None
    limit = rules.difference_limit(
        rules.repeatability_l, rules.repeatability_l_child, age_years, max(acceptable_values)
    )
    return Repeatability(difference, limit, _within(difference, limit))


# --- ratios ------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class RatioCheck:
    """A ratio recomputed from its parts against the reported one, both as a fraction."""

    recomputed: float
    reported: float
    reported_as_percent: bool  # the lab sent 75 for 0.75
    agrees: bool


def fev1_fvc_check(fev1_l: float, fvc_l: float, reported: float, rules: SpirometryRules) -> RatioCheck | None:
    """FEV1/FVC from the volumes against the reported ratio (a fraction, or a percentage above 1.5)."""
    if not (fev1_l > 0.0 and fvc_l > 0.0):
        return None
    as_percent = reported > 1.5  # no FEV1/FVC fraction exceeds 1; a percentage is at least ~20
    fraction = reported / 100.0 if as_percent else reported
    recomputed = fev1_l / fvc_l
    return RatioCheck(recomputed, fraction, as_percent, _within(abs(recomputed - fraction), rules.ratio_max_difference))


# --- bronchodilator response -------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class BronchodilatorResponse:
    """The change after a bronchodilator relative to the predicted value (ERS/ATS 2022)."""

    change: float  # post - pre, in the quantity's unit
    percent_of_predicted: float  # 100 x change / predicted
    significant: bool  # percent_of_predicted > the limit (10 %)


def bronchodilator_response(
    pre: float, post: float, predicted: float, rules: SpirometryRules
) -> BronchodilatorResponse | None:
    """FEV1 or FVC: 100 (post - pre) / predicted, significant above 10 %; None without a predicted value."""
    if not predicted > 0.0:
        return None
    change = post - pre
    percent = 100.0 * change / predicted
    return BronchodilatorResponse(change, percent, not _within(percent, rules.bronchodilator_percent_of_predicted))


# --- values that cannot be true ---------------------------------------------------------------


class Problem(StrEnum):
    """What is impossible or mislabelled."""

    FEV1_ABOVE_FVC = "fev1_above_fvc"
    MILLILITRES_AS_LITRES = "millilitres_as_litres"
    POST_WITHOUT_PRE = "post_without_pre"
    RV_ABOVE_TLC = "rv_above_tlc"
    FRC_BELOW_RV = "frc_below_rv"
    FRC_ABOVE_TLC = "frc_above_tlc"
    RV_TLC_DIFFERS = "rv_tlc_differs"
    IC_DIFFERS = "ic_differs"  # IC unlike TLC - FRC (bridge.science.lung_volumes)
    ERV_DIFFERS = "erv_differs"  # ERV unlike FRC - RV


@dataclass(frozen=True, slots=True)
class Impossible:
    """A value or combination that cannot be true, with the values that show it."""

    problem: Problem
    quantity: str
    evidence: tuple[tuple[str, float], ...]
    likely_value: float | None = None  # for a unit mix-up: the value in the unit it should be in


def fev1_above_fvc(fev1_l: float, fvc_l: float) -> Impossible | None:
    """FEV1 is part of FVC, so it cannot be larger (it may equal it in a short exhalation)."""
    if fev1_l > fvc_l:
        return Impossible(Problem.FEV1_ABOVE_FVC, "fev1", (("fev1", fev1_l), ("fvc", fvc_l)))
    return None


def millilitres_as_litres(quantity: str, value: float, rules: SpirometryRules) -> Impossible | None:
    """A value far above the plausible range (L or L/s) whose thousandth part lies inside it."""
    low, high = rules.plausible[quantity]
    if value > high and low <= value / 1000.0 <= high:
        return Impossible(Problem.MILLILITRES_AS_LITRES, quantity, ((quantity, value),), value / 1000.0)
    return None


def post_without_pre(quantity: str, pre: float | None, post: float | None) -> Impossible | None:
    """A post-bronchodilator value needs its pre-bronchodilator value to mean anything."""
    if post is not None and pre is None:
        return Impossible(Problem.POST_WITHOUT_PRE, quantity, ((f"{quantity}_post", post),))
    return None


def lung_volume_problems(
    tlc_l: float | None,
    rv_l: float | None,
    frc_l: float | None = None,
    rv_tlc_reported_percent: float | None = None,
    rules: SpirometryRules | None = None,
) -> tuple[Impossible, ...]:
    """RV above TLC, FRC outside RV-TLC, and a reported RV/TLC unlike RV/TLC recomputed (needs rules)."""
    found: list[Impossible] = []
    if tlc_l is not None and rv_l is not None and rv_l > tlc_l:
        found.append(Impossible(Problem.RV_ABOVE_TLC, "rv", (("rv", rv_l), ("tlc", tlc_l))))
    if frc_l is not None and rv_l is not None and frc_l < rv_l:
        found.append(Impossible(Problem.FRC_BELOW_RV, "frc", (("frc", frc_l), ("rv", rv_l))))
    if frc_l is not None and tlc_l is not None and frc_l > tlc_l:
        found.append(Impossible(Problem.FRC_ABOVE_TLC, "frc", (("frc", frc_l), ("tlc", tlc_l))))
    if rules is not None and rv_tlc_reported_percent is not None and tlc_l and rv_l is not None and tlc_l > 0.0:
        recomputed = 100.0 * rv_l / tlc_l
        if not _within(abs(recomputed - rv_tlc_reported_percent), rules.rv_tlc_max_difference_percent):
            evidence = (("rv_tlc_reported", rv_tlc_reported_percent), ("rv_tlc_recomputed", recomputed))
            found.append(Impossible(Problem.RV_TLC_DIFFERS, "rv_tlc", evidence, recomputed))
    return tuple(found)
