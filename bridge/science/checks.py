"""Adjustment, quality and reference rules, and the one list of every rule (pure).

Owns: the rules on the adjustments (haemoglobin, COHb, barometric pressure), the manoeuvre
quality and repeatability findings, the breath-hold target, why no reference values were
computed, and :data:`DEFAULT_RULES` / :func:`run_checks`, which run these with the consistency
and unit-mislabel rules of ``bridge.science.consistency``. Findings are collected, never
raised; each code is stable and documented in docs/findings.md; messages are sentences a
person can act on. Quantities are in canonical (traditional) units here; messages say the unit.
"""

from __future__ import annotations

from collections.abc import Iterator

from bridge.model import Derived, Finding, Session, Severity
from bridge.science.consistency import check_bounds, check_kco, check_recomputed, check_unit_mislabel
from bridge.science.derive import age_in_years, anatomic_dead_space, gas_conditions, hb_factor
from bridge.science.findings import (
    DLCO_UNIT,
    PRESSURE_UNIT,
    Rule,
    bound_quantity,
    finding,
    finding_with_values,
    message_quantity,
    relative_difference,
)
from bridge.science.lung_volume_checks import LUNG_VOLUME_RULES
from bridge.science.physiology import ANATOMIC_DEAD_SPACE_ML_PER_KG, COHB_BASELINE_PERCENT
from bridge.science.quality import DEFAULT_REPEATABILITY
from bridge.science.spirometry_checks import SPIROMETRY_RULES
from bridge.science.table_values import Tables

ADJUSTMENT_TOLERANCE = 0.02
HB_NOTE_THRESHOLD = 0.05  # mention the Hb adjustment when it moves DLCO by more than 5 %  # common practice
BREATH_HOLD_TARGET_S = (8.0, 12.0)  # source: ATS/ERS 2005 Table 6 (10 +/- 2 s)
LOW_PRESSURE_MMHG = 700.0  # flag the altitude adjustment below this PB (about 700 m)  # common practice
# A lab's predicted DLCO that claims GLI-2017 but is further than this from the GLI-2017 value
# for the record's sex, age and height was computed otherwise (another set, another sex, a
# copying error). Labs round ages and predicted values, which moves them by a few per cent at most.
PREDICTED_TOLERANCE = 0.05  # relative (common practice)


def check_breath_hold(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    low, high = BREATH_HOLD_TARGET_S
    for i, manoeuvre in enumerate(session.manoeuvres):
        bht = manoeuvre.breath_hold_time.value
        if not low <= bht <= high:
            yield finding(
                "BREATH_HOLD_OUT_OF_TARGET",
                Severity.WARNING,
                f"manoeuvres[{i}].breath_hold_time",
                f"manoeuvre {i + 1}: breath-hold {bht:.1f} s is outside {low:g}-{high:g} s; "
                "the result may still be usable but the deviation must be noted.",
            )


def check_haemoglobin(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    reported = session.results.dlco_hb_adjusted
    hb = session.conditions.hemoglobin
    if reported is not None and hb is None:
        yield finding(
            "HB_ADJUSTED_WITHOUT_HB",
            Severity.WARNING,
            "results.dlco_hb_adjusted",
            "a haemoglobin-adjusted DLCO is reported without the haemoglobin it was adjusted for; "
            "the standard requires Hb whenever it is used.",
        )
        return
    if hb is None:
        return
    age = age_in_years(session)
    factor = hb_factor(session, age)
    if factor is None:
        yield finding(
            "HB_ADJUSTMENT_NOT_COMPUTED",
            Severity.INFO,
            "patient.sex",
            f"sex is {session.patient.sex.value!r}: the haemoglobin adjustment depends on it and was not recomputed.",
        )
        return
    measured = session.results.dlco
    if measured is not None and derived.dlco_hb_adjusted is not None and abs(factor - 1) > HB_NOTE_THRESHOLD:
        yield finding_with_values(
            "HB_ADJUSTMENT",
            Severity.INFO,
            "conditions.hemoglobin",
            "Hb {hb}: DLCO adjusted to standard Hb is {adjusted} " + f"(factor {factor:.3f}, age {age:.0f} y).",
            hb=hb,
            adjusted=message_quantity(derived.dlco_hb_adjusted.value, DLCO_UNIT, 1),
        )
    if reported is None or measured is None or abs(factor - 1) <= ADJUSTMENT_TOLERANCE:
        return
    expected, inverted = measured.value * factor, measured.value / factor
    if relative_difference(reported.value, inverted) <= ADJUSTMENT_TOLERANCE:
        yield finding_with_values(
            "HB_ADJUSTMENT_WRONG_DIRECTION",
            Severity.ERROR,
            "results.dlco_hb_adjusted",
            "Hb-adjusted DLCO {reported} equals measured / factor; adjusting the measured value "
            "to standard Hb gives {expected} (the factor was applied the wrong way round).",
            reported=reported,
            expected=message_quantity(expected, DLCO_UNIT, 1),
        )
    elif relative_difference(reported.value, expected) > ADJUSTMENT_TOLERANCE:
        yield finding_with_values(
            "HB_ADJUSTMENT_MISMATCH",
            Severity.WARNING,
            "results.dlco_hb_adjusted",
            "Hb-adjusted DLCO {reported} differs from {expected} (Cotes adjustment of the "
            "measured {measured} at Hb {hb}).",
            reported=reported,
            expected=message_quantity(expected, DLCO_UNIT, 1),
            measured=measured,
            hb=hb,
        )


def check_carboxyhaemoglobin(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    cohb = session.conditions.carboxyhemoglobin
    if cohb is None or cohb.value <= COHB_BASELINE_PERCENT or derived.dlco_cohb_adjusted is None:
        return
    yield finding_with_values(
        "COHB_RAISED",
        Severity.WARNING,
        "conditions.carboxyhemoglobin",
        f"COHb {cohb.value:.1f} % (baseline {COHB_BASELINE_PERCENT:g} %) lowers measured DLCO; adjusted to the "
        "baseline COHb, DLCO would be {adjusted}.",
        adjusted=message_quantity(derived.dlco_cohb_adjusted.value, DLCO_UNIT, 1),
    )


def check_pressure(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    gas = gas_conditions(session)
    if session.manoeuvres and gas.pb_assumed and session.conditions.altitude is None:
        yield finding_with_values(
            "PRESSURE_ASSUMED",
            Severity.INFO,
            "conditions.barometric_pressure",
            "no barometric pressure or altitude given: {pb} was assumed to recompute the manoeuvres.",
            pb=message_quantity(gas.pb_mmhg, PRESSURE_UNIT, 0),
        )
    adjusted = derived.dlco_pressure_adjusted
    if adjusted is not None and gas.pb_mmhg < LOW_PRESSURE_MMHG:
        uses = {  # what per cent predicted compares follows the site's reference_basis
            "pressure_adjusted": "per cent predicted uses it.",
            "hb_and_pressure_adjusted": "per cent predicted uses it, adjusted to standard Hb as well.",
        }.get(derived.dlco_basis or "", "per cent predicted uses the measured value.")
        yield finding_with_values(
            "PRESSURE_ADJUSTMENT",
            Severity.INFO,
            "conditions.barometric_pressure",
            "measured at PB {pb}: DLCO adjusted to sea level (PIO2 {pio2}) is {adjusted}; " + uses,
            pb=message_quantity(gas.pb_mmhg, PRESSURE_UNIT, 0),
            pio2=message_quantity(150.0, PRESSURE_UNIT, 0),
            adjusted=message_quantity(adjusted.value, DLCO_UNIT, 1),
        )


def check_dead_space(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Say when the anatomic dead space subtracted from VI was estimated from body weight, or not known."""
    sources = [anatomic_dead_space(session, m) for m in session.manoeuvres]
    missing = [str(i + 1) for i, (_, source) in enumerate(sources) if source != "stated"]
    if not missing:
        return
    which = f"manoeuvre {missing[0]} states" if len(missing) == 1 else f"manoeuvres {', '.join(missing)} state"
    volume, source = sources[int(missing[0]) - 1]
    if source == "estimated":
        yield finding_with_values(
            "ANATOMIC_DEAD_SPACE_ESTIMATED",
            Severity.INFO,
            "manoeuvres",
            f"{which} no anatomic dead space: VA was recomputed with {{estimate}} "
            f"({ANATOMIC_DEAD_SPACE_ML_PER_KG:g} mL per kg of the weight {{weight}}).",
            estimate=message_quantity(volume * 1000.0, "mL", 0),
            weight=session.patient.weight,  # type: ignore[arg-type]  # "estimated" needs a weight
        )
    else:
        yield finding(
            "ANATOMIC_DEAD_SPACE_UNKNOWN",
            Severity.INFO,
            "manoeuvres",
            f"{which} no anatomic dead space and the patient's weight is missing: VA was recomputed "
            f"without one, so it is too large by about {ANATOMIC_DEAD_SPACE_ML_PER_KG:g} mL per kg of body weight.",
        )


def check_quality(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    if not session.manoeuvres:
        return
    for assessment in derived.manoeuvres:
        if assessment.grade == "F":
            yield finding(
                "MANOEUVRE_NOT_ACCEPTABLE",
                Severity.WARNING,
                f"manoeuvres[{assessment.index}]",
                f"manoeuvre {assessment.index + 1} is grade F: " + "; ".join(assessment.grade_reasons or ("no DLCO",)),
            )
    grade = derived.session_grade
    if grade == "F":
        yield finding("NO_ACCEPTABLE_MANOEUVRE", Severity.ERROR, "manoeuvres", "no manoeuvre is acceptable.")
    elif grade is not None and grade != tables.grades.acceptable_grades[0]:
        yield finding(
            "QUALITY_BELOW_A",
            Severity.WARNING,
            "manoeuvres",
            f"session quality grade {grade}: interpret the result with caution.",
        )
    if derived.repeatable is False:  # the decision derive made when it chose the reported manoeuvres
        used = [a for a in derived.manoeuvres if a.index in derived.reported_manoeuvres and a.dlco is not None]
        dlcos = [a.dlco.value for a in used if a.dlco is not None]
        numbers = ", ".join(str(a.index + 1) for a in used)
        rule = tables.grades.criterion(derived.repeatability_criterion or DEFAULT_REPEATABILITY)
        highest = rule.max_percent_of_highest
        percent = f" or {highest:g} % of the highest" if highest is not None else ""
        yield finding_with_values(
            "NOT_REPEATABLE",
            Severity.WARNING,
            "manoeuvres",
            f"manoeuvres {numbers}, which make the reported value, span {{span}}: not repeatable by the "
            f"{rule.standard} criterion (within {{limit}}{percent}).",
            span=message_quantity(max(dlcos) - min(dlcos), DLCO_UNIT, 1),
            limit=bound_quantity(rule.max_dlco_difference, DLCO_UNIT),
        )


def check_reference(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Say why no GLI-2017 reference values were computed (sex, age, height, a value that is not positive)."""
    if derived.reference_not_computed is None:
        return
    yield finding(
        "REFERENCE_NOT_COMPUTED",
        Severity.INFO,
        "patient",
        f"no GLI-2017 predicted values, limits of normal or z-scores: {derived.reference_not_computed}.",
    )


def check_reference_basis(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Say when the adjustment reference_basis asks for could not be made (the measured value is compared)."""
    if derived.reference_basis_fallback is None:
        return
    yield finding(
        "REFERENCE_BASIS_FALLBACK",
        Severity.INFO,
        "conditions.hemoglobin",
        "per cent predicted and z-scores compare the measured DLCO and KCO: the site compares them adjusted "
        f"to standard Hb (reference_basis hb_adjusted), but {derived.reference_basis_fallback}.",
    )


def claims_gli_2017(reference_set: str) -> bool:
    """Whether a lab's reference-set name says GLI-2017 (labs write it several ways)."""
    text = reference_set.upper()
    return "GLI" in text and "2017" in text


def check_predicted_set(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """A lab's predicted DLCO that claims GLI-2017 but is not the GLI-2017 value for this patient."""
    predicted = session.results.predicted
    reference = derived.reference_dlco
    if predicted is None or predicted.dlco is None or reference is None:
        return  # nothing claimed, or the equations do not cover this patient: nothing to compare with
    if not claims_gli_2017(predicted.reference_set or ""):
        return
    gli = reference.predicted.value
    if abs(predicted.dlco.value / gli - 1) <= PREDICTED_TOLERANCE:
        return
    patient = session.patient
    yield finding_with_values(
        "PREDICTED_NOT_FROM_CLAIMED_SET",
        Severity.WARNING,
        "results.predicted.dlco",
        f"the lab's predicted DLCO {{reported}} is said to be {predicted.reference_set}, but GLI-2017 predicts "
        f"{{gli}} for a {patient.sex.value} of {derived.age_years:.0f} y and {patient.height.value:.0f} cm; "
        "check the set, the sex and the age the lab used.",
        reported=predicted.dlco,
        gli=message_quantity(gli, DLCO_UNIT, 1),
    )


DEFAULT_RULES: tuple[Rule, ...] = (
    check_unit_mislabel,
    check_kco,
    check_recomputed,
    check_bounds,
    check_breath_hold,
    check_haemoglobin,
    check_carboxyhaemoglobin,
    check_pressure,
    check_dead_space,
    check_quality,
    check_reference,
    check_reference_basis,
    check_predicted_set,
    *SPIROMETRY_RULES,
    *LUNG_VOLUME_RULES,
)


def run_checks(
    session: Session, derived: Derived, tables: Tables, rules: tuple[Rule, ...] = DEFAULT_RULES
) -> tuple[Finding, ...]:
    """Every finding of every rule, in rule order."""
    return tuple(found for rule in rules for found in rule(session, derived, tables))
