"""Manoeuvre quality grades, repeatability, and which manoeuvres make the reported value.

Owns: applying the grade table (``mappings/quality_grades.toml``, parsed by
``bridge.tables.grades``) to the facts of each manoeuvre, and the 2017 reporting rule: the mean
of two or more repeatable grade-A manoeuvres; one grade A alone; otherwise the mean of the
best-graded acceptable ones with a caution. "Repeatable" follows a named criterion of the table:
the ERS/ATS 2017 one by default, the ATS/ERS 2005 one for legacy data when a site or a field map
selects it. Pure: plain numbers in, grades and indices out.

A criterion without its evidence (no vital capacity for VI/VC, no sample-collection time) is
*not evaluated*: the manoeuvre is graded on the criteria that can be evaluated, and its grade
carries the caveat among its reasons ("VI/VC not evaluated: no vital capacity"). No value stands
in for the missing one, so no grade is A by construction; the caveat travels with the grade to
``check`` and the outputs' notes.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

FAIL_GRADE = "F"
# The repeatability criterion used unless a site or a field map names another (a criterion of
# mappings/quality_grades.toml; the table must carry it).
DEFAULT_REPEATABILITY = "2017"
# Differences are compared after rounding away floating-point noise, so 22.1 - 20.1 is 2.0.
_DIFFERENCE_DIGITS = 9


@dataclass(frozen=True, slots=True)
class GradeRule:
    """The limits of one grade: VI/VC >= a floor, breath-hold within a range, sample collection under a limit."""

    grade: str
    vi_vc_min_percent: float  # inclusive
    sample_collection_below_s: float  # strict
    breath_hold_s: tuple[float, float] | None = None  # inclusive; None: any breath-hold
    vi_vc_min_percent_if_va_close: float | None = None  # the floor when VA agrees with the largest acceptable VA
    va_close_ml: float = 0.0
    va_close_percent: float = 0.0


@dataclass(frozen=True, slots=True)
class RepeatabilityCriterion:
    """When two acceptable manoeuvres agree: DLCO within an absolute limit, or within a per cent of the higher.

    Both limits are inclusive; a criterion without ``max_percent_of_highest`` has the absolute limit only.
    """

    name: str  # how settings and field maps select it: "2017", "2005"
    standard: str  # how outputs name it: "ERS/ATS 2017"
    max_dlco_difference: float  # mL/min/mmHg
    max_percent_of_highest: float | None = None

    def agree(self, a: float, b: float) -> bool:
        """True when DLCO values ``a`` and ``b`` (mL/min/mmHg) are repeatable by this criterion."""
        difference = round(abs(a - b), _DIFFERENCE_DIGITS)
        if difference <= self.max_dlco_difference:
            return True
        if self.max_percent_of_highest is None:
            return False
        return difference <= round(self.max_percent_of_highest * max(a, b) / 100.0, _DIFFERENCE_DIGITS)

    @property
    def limits(self) -> str:
        """The limits in words: ``within 3 mL/min/mmHg or 10 % of the highest``."""
        limits = f"within {self.max_dlco_difference:g} mL/min/mmHg"
        if self.max_percent_of_highest is not None:
            limits += f" or {self.max_percent_of_highest:g} % of the highest"
        return limits

    @property
    def description(self) -> str:
        """The criterion in words: ``ATS/ERS 2005: within 3 mL/min/mmHg or 10 % of the highest``."""
        return f"{self.standard}: {self.limits}"


@dataclass(frozen=True, slots=True)
class GradeTable:
    rules: tuple[GradeRule, ...]
    criteria: tuple[RepeatabilityCriterion, ...]  # the named repeatability criteria, in table order
    acceptable_grades: tuple[str, ...]

    @property
    def criterion_names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.criteria)

    def criterion(self, name: str) -> RepeatabilityCriterion:
        """The criterion named ``name``; names are checked where settings and maps are read."""
        found = next((c for c in self.criteria if c.name == name), None)
        if found is None:
            raise ValueError(f"repeatability criterion {name!r}: expected one of {', '.join(self.criterion_names)}")
        return found


@dataclass(frozen=True, slots=True)
class ManoeuvreFacts:
    """What grading needs to know of one manoeuvre (volumes in L, times in s)."""

    inspired_volume_l: float
    breath_hold_s: float
    sample_collection_s: float | None
    va_l: float | None


VI_VC_NOT_EVALUATED = "VI/VC not evaluated: no vital capacity"
SAMPLE_NOT_EVALUATED = "sample collection time not evaluated: not reported"


@dataclass(frozen=True, slots=True)
class Grade:
    grade: str
    reasons: tuple[str, ...]  # the criteria missed (grade F) and the criteria not evaluated

    @property
    def not_evaluated(self) -> tuple[str, ...]:
        """The caveats: criteria the grade does not rest on."""
        return tuple(r for r in self.reasons if r in (VI_VC_NOT_EVALUATED, SAMPLE_NOT_EVALUATED))


def grade_manoeuvres(
    manoeuvres: Sequence[ManoeuvreFacts], largest_vc_l: float | None, table: GradeTable
) -> tuple[Grade, ...]:
    """Grade every manoeuvre of a session; VI/VC is against the session's largest measured VC.

    ``largest_vc_l`` None: no vital capacity was measured, VI/VC is not evaluated. The lower
    VI/VC floor of the best grade applies when a manoeuvre's VA agrees with the largest VA of the
    other acceptable manoeuvres: those that meet the best grade's limits on their own.
    """
    first = [_grade(m, largest_vc_l, table, close_va=False) for m in manoeuvres]
    best = table.rules[0]
    acceptable = [i for i, g in enumerate(first) if g.grade == best.grade]
    result = []
    for i, facts in enumerate(manoeuvres):
        others = [va for j in acceptable if j != i and (va := manoeuvres[j].va_l) is not None]
        close = bool(others) and _va_close(facts.va_l, max(others), best)
        result.append(_grade(facts, largest_vc_l, table, close_va=True) if close else first[i])
    return tuple(result)


def _grade(facts: ManoeuvreFacts, largest_vc_l: float | None, table: GradeTable, close_va: bool) -> Grade:
    vi_vc: float | None = None
    if largest_vc_l is not None:
        # A VC that is not positive cannot show VI/VC meets any floor.
        vi_vc = round(100.0 * facts.inspired_volume_l / largest_vc_l, _DIFFERENCE_DIGITS) if largest_vc_l > 0 else 0.0
    caveats = (() if vi_vc is not None else (VI_VC_NOT_EVALUATED,)) + (
        () if facts.sample_collection_s is not None else (SAMPLE_NOT_EVALUATED,)
    )
    missed: list[str] = []
    for rule in table.rules:
        missed = _misses(rule, facts, vi_vc, close_va)
        if not missed:
            return Grade(rule.grade, caveats)
    return Grade(FAIL_GRADE, (*missed, *caveats))


def _misses(rule: GradeRule, facts: ManoeuvreFacts, vi_vc: float | None, close_va: bool) -> list[str]:
    misses = []
    floor = rule.vi_vc_min_percent
    if close_va and rule.vi_vc_min_percent_if_va_close is not None:
        floor = rule.vi_vc_min_percent_if_va_close
    if vi_vc is not None and vi_vc < floor:
        misses.append(f"VI/VC {vi_vc:.0f} % is below {floor:.0f} %")
    elif vi_vc is None and facts.inspired_volume_l <= 0:
        misses.append("no inspired volume")  # fails every floor, whatever the VC
    if rule.breath_hold_s is not None:
        low, high = rule.breath_hold_s
        if not low <= facts.breath_hold_s <= high:
            misses.append(f"breath-hold {facts.breath_hold_s:.1f} s is outside {low:g}-{high:g} s")
    sample = facts.sample_collection_s
    if sample is not None and not sample < rule.sample_collection_below_s:
        misses.append(f"sample collection {sample:.1f} s is not under {rule.sample_collection_below_s:g} s")
    return misses


def _va_close(va: float | None, largest: float, rule: GradeRule) -> bool:
    """VA within ``va_close_ml`` or ``va_close_percent`` of ``largest``, whichever is greater."""
    if va is None or rule.vi_vc_min_percent_if_va_close is None:
        return False
    tolerance = max(rule.va_close_ml / 1000.0, rule.va_close_percent / 100.0 * largest)
    return round(abs(va - largest), _DIFFERENCE_DIGITS) <= round(tolerance, _DIFFERENCE_DIGITS)


@dataclass(frozen=True, slots=True)
class Selection:
    """Which manoeuvres make the reported value, the session grade, and any caution."""

    indices: tuple[int, ...]
    session_grade: str
    repeatable: bool | None  # None: fewer than two manoeuvres to compare
    caution: str | None


def select_reported(
    grades: Sequence[Grade], dlcos: Sequence[float], table: GradeTable, criterion: str = DEFAULT_REPEATABILITY
) -> Selection:
    """Apply the 2017 reporting rule to graded manoeuvres and their DLCO (mL/min/mmHg).

    ``criterion``: the name of the repeatability criterion in ``table`` that says which agree.
    """
    rule = table.criterion(criterion)
    rank = {grade: i for i, grade in enumerate(table.acceptable_grades)}
    best = table.acceptable_grades[0]
    top = [i for i, g in enumerate(grades) if g.grade == best]
    if len(top) >= 2:
        pair = _repeatable_subset(top, dlcos, rule)
        if pair:
            return Selection(pair, best, True, None)
        caution = f"grade-{best} manoeuvres not repeatable ({rule.description})"
        return Selection(tuple(top), best, False, caution)
    if len(top) == 1:
        return Selection(tuple(top), best, None, None)
    usable = sorted((i for i, g in enumerate(grades) if g.grade in rank), key=lambda i: rank[grades[i].grade])
    if not usable:
        return Selection((), FAIL_GRADE, None, "no acceptable manoeuvre")
    chosen = tuple(sorted(usable[:2]))
    worst = max((grades[i].grade for i in chosen), key=lambda g: rank[g])
    repeatable = rule.agree(dlcos[chosen[0]], dlcos[chosen[1]]) if len(chosen) == 2 else None
    return Selection(chosen, worst, repeatable, f"no grade-{best} manoeuvre; best grade {worst}")


def _repeatable_subset(indices: Sequence[int], dlcos: Sequence[float], rule: RepeatabilityCriterion) -> tuple[int, ...]:
    """The largest group of manoeuvres whose DLCO values are repeatable with each other.

    Agreement with the lowest value of a group is agreement of every pair in it: both limits
    grow with the higher value, so a value that agrees with the lowest agrees with any between.
    """
    ordered = sorted(indices, key=lambda i: dlcos[i])
    best: tuple[int, ...] = ()
    for start in range(len(ordered)):
        group = [i for i in ordered[start:] if rule.agree(dlcos[ordered[start]], dlcos[i])]
        if len(group) > len(best):
            best = tuple(sorted(group))
    return best if len(best) >= 2 else ()
