"""The spirometry rules: findings from the record's spirometry and what was recomputed of it (pure).

Owns the findings of spirometry (codes ``SPIROMETRY_*``, listed in ``mappings/finding_codes.toml``
and ``docs/findings.md``): FEV1 above FVC, a volume or flow sent in the wrong unit by a factor of
1000, a post-bronchodilator value without its pre value, the reported FEV1/FVC unlike the ratio of
the reported volumes, the ATS/ERS 2019 grades and repeatability, the ERS/ATS 2022 bronchodilator
response, and why no reference values were computed. The numbers come from
``bridge.science.spirometry`` (limits in ``mappings/spirometry_grades.toml``) and
``bridge.science.spirometry_derive``; each rule is a :data:`bridge.science.findings.Rule`.
"""

from __future__ import annotations

from collections.abc import Iterator

from bridge.model import Derived, Finding, Quantity, Session, Severity
from bridge.science.findings import finding, finding_with_values, message_quantity
from bridge.science.normalise import express
from bridge.science.spirometry import fev1_above_fvc, fev1_fvc_check, millilitres_as_litres, post_without_pre
from bridge.science.table_values import Tables
from bridge.spirometry_record import ParameterGrade, SpirometryManoeuvre, SpirometryPhase, SpirometryValues

_PHASES = ("pre", "post")
_LOW_GRADES = frozenset({"D", "E", "F", "U"})  # source: ATS/ERS 2019 spirometry standard, Table 10 (A-C: usable)
_KEYS_IN_LITRES = ("fev1", "fvc", "fef25_75", "pef")  # volumes in L, flows in L/s


def _phases(session: Session) -> Iterator[tuple[str, SpirometryPhase]]:
    spiro = session.spirometry
    if spiro is None:
        return
    for name in _PHASES:
        phase = getattr(spiro, name)
        if phase is not None:
            yield name, phase


def check_spirometry_values(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """FEV1 above FVC, a factor-of-1000 unit mix-up, and the reported FEV1/FVC against the volumes."""
    for name, phase in _phases(session):
        where = f"spirometry.{name}"
        yield from _impossible(phase.results, f"{where}.results")
        for i, manoeuvre in enumerate(phase.manoeuvres):
            yield from _impossible(manoeuvre, f"{where}.manoeuvres[{i}]")
        yield from _units(phase.results, f"{where}.results", tables)
        yield from _ratio(phase.results, f"{where}.results", tables)


def _impossible(values: SpirometryValues | SpirometryManoeuvre, path: str) -> Iterator[Finding]:
    if values.fev1 is None or values.fvc is None or fev1_above_fvc(values.fev1.value, values.fvc.value) is None:
        return
    yield finding_with_values(
        "SPIROMETRY_IMPOSSIBLE_VOLUMES",
        Severity.ERROR,
        f"{path}.fev1",
        "FEV1 {fev1} is larger than FVC {fvc}, of which it is a part: one of them is wrong "
        "(swapped columns, or a value of another manoeuvre).",
        fev1=values.fev1,
        fvc=values.fvc,
    )


def _units(results: SpirometryValues, path: str, tables: Tables) -> Iterator[Finding]:
    """A value 1000 times off: millilitres labelled litres (above the range), or litres labelled millilitres."""
    for key in _KEYS_IN_LITRES:
        value: Quantity | None = getattr(results, key)
        if value is not None:
            yield from wrong_unit("SPIROMETRY_UNIT_MISLABEL", f"{path}.{key}", key, value, tables)


def wrong_unit(code: str, path: str, key: str, value: Quantity, tables: Tables) -> Iterator[Finding]:
    """``value`` of ``key`` outside its plausible range but 1000 times it (or a thousandth) inside: a unit mix-up.

    Shared by spirometry and the static lung volumes, each under its own code; the ranges are the
    ``[plausible]`` table of ``mappings/spirometry_grades.toml``.
    """
    rules = tables.spirometry
    low, high = rules.plausible[key]
    likely: float | None = None
    found = millilitres_as_litres(key, value.value, rules)
    if found is not None:
        likely = found.likely_value
    elif 0.0 < value.value < low and low <= value.value * 1000.0 <= high:
        likely = value.value * 1000.0
    if likely is None:
        return
    sent = value.original.unit if value.original is not None else value.unit
    yield finding_with_values(
        code,
        Severity.ERROR,
        path,
        f"{key.upper()} {{value}} is outside {low:g}-{high:g} {value.unit}, but {{likely}} is inside: "
        f"the value was most likely sent in the wrong unit (as {sent}); correct the unit at the source.",
        value=value,
        likely=message_quantity(likely, value.unit, 3),
    )


def _ratio(results: SpirometryValues, path: str, tables: Tables) -> Iterator[Finding]:
    if results.fev1 is None or results.fvc is None or results.fev1_fvc is None:
        return
    found = fev1_fvc_check(results.fev1.value, results.fvc.value, results.fev1_fvc.value, tables.spirometry)
    if found is None or found.agrees:
        return
    yield finding_with_values(
        "SPIROMETRY_RATIO_MISMATCH",
        Severity.WARNING,
        f"{path}.fev1_fvc",
        "The reported FEV1/FVC {reported} differs from FEV1/FVC {recomputed} of the reported FEV1 and FVC "
        "by more than rounding: one of the three values is not what the lab measured.",
        reported=express(results.fev1_fvc, "%", tables.units),
        recomputed=message_quantity(100.0 * found.recomputed, "%", 1),
    )


def check_post_without_pre(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """A post-bronchodilator FEV1 or FVC needs its pre-bronchodilator value to mean anything."""
    spiro = session.spirometry
    if spiro is None or spiro.post is None:
        return
    for key in ("fev1", "fvc"):
        pre = getattr(spiro.pre.results, key) if spiro.pre is not None else None
        post = getattr(spiro.post.results, key)
        if post_without_pre(key, pre.value if pre else None, post.value if post else None) is None:
            continue
        yield finding_with_values(
            "SPIROMETRY_POST_WITHOUT_PRE",
            Severity.WARNING,
            f"spirometry.post.results.{key}",
            f"A post-bronchodilator {key.upper()} {{post}} came without its pre-bronchodilator value: "
            "no bronchodilator response can be judged.",
            post=post,
        )


def check_spirometry_quality(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """The 2019 grade of FEV1 and FVC in each phase, and whether the two largest acceptable values repeat."""
    spiro = derived.spirometry
    if spiro is None:
        return
    for name in _PHASES:
        phase = getattr(spiro, name)
        if phase is None:
            continue
        for key, graded in (("fev1", phase.fev1_grade), ("fvc", phase.fvc_grade)):
            if graded is not None:
                yield from _graded(f"spirometry.{name}", key, graded)


def _graded(path: str, key: str, graded: ParameterGrade) -> Iterator[Finding]:
    counts = f"{graded.acceptable} acceptable and {graded.usable} only usable manoeuvre(s)"
    low = graded.grade in _LOW_GRADES
    yield finding(
        "SPIROMETRY_LOW_GRADE" if low else "SPIROMETRY_GRADE",
        Severity.WARNING if low else Severity.INFO,
        f"{path}.manoeuvres",
        f"{key.upper()} grade {graded.grade} (ATS/ERS 2019) from {counts}"
        + ("; interpret with caution." if low else "."),
    )
    if graded.repeatable is False and graded.difference is not None:
        yield finding_with_values(
            "SPIROMETRY_NOT_REPEATABLE",
            Severity.WARNING,
            f"{path}.manoeuvres",
            f"The two largest acceptable {key.upper()} values differ by {{difference}}, more than the ATS/ERS 2019 "
            "repeatability limit (0.150 L; for children aged 6 or less 0.100 L or 10 % of the largest).",
            difference=graded.difference,
        )


def check_bronchodilator_response(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """The ERS/ATS 2022 response of FEV1 and FVC: the change as a per cent of the predicted value, over 10 %."""
    spiro = derived.spirometry
    if spiro is None:
        return
    limit = tables.spirometry.bronchodilator_percent_of_predicted
    for key, change in (("fev1", spiro.fev1_response), ("fvc", spiro.fvc_response)):
        if change is None:
            continue
        verdict = "a significant bronchodilator response" if change.significant else "no significant response"
        yield finding_with_values(
            "SPIROMETRY_BRONCHODILATOR_RESPONSE",
            Severity.INFO,
            f"spirometry.post.results.{key}",
            f"{key.upper()} changed by {{change}} after the bronchodilator, {{percent}} of the predicted value "
            f"({spiro.reference_set}): {verdict} (ERS/ATS 2022: more than {limit:g} %).",
            change=change.change,
            percent=change.percent_of_predicted,
        )


def check_spirometry_reference(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Say why spirometry has no reference values (outside the equations' range, GLI-2012 without a group)."""
    spiro = derived.spirometry
    if spiro is None or spiro.reference_not_computed is None:
        return
    yield finding(
        "SPIROMETRY_REFERENCE_NOT_COMPUTED",
        Severity.INFO,
        "spirometry",
        f"No {spiro.reference_set} reference values for spirometry: {spiro.reference_not_computed}.",
    )


SPIROMETRY_RULES = (
    check_spirometry_values,
    check_post_without_pre,
    check_spirometry_quality,
    check_bronchodilator_response,
    check_spirometry_reference,
)
