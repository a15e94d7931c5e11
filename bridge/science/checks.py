"""Consistency and plausibility rules: a normalised session and its derivations -> findings.

Owns: every rule that can say "this record disagrees with itself, with the gas data, with
plausible physiology or with its units". Findings are collected, never raised. Each code is
stable and documented in docs/findings.md; messages are sentences a person can act on.
Quantities are in canonical (traditional) units here; messages say the unit.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator

from bridge.model import Derived, Finding, Quantity, Session, Severity
from bridge.science.derive import age_in_years, gas_conditions, hb_factor
from bridge.science.physiology import COHB_BASELINE_PERCENT
from bridge.science.reference import Lms, Parameter
from bridge.tables import Tables

# Relative difference tolerated between a reported and a recomputed value (rounding of the
# lab's printout plus our assumptions about room temperature and gas handling).
KCO_TOLERANCE = 0.03  # common practice: two or three significant digits of rounding
MANOEUVRE_TOLERANCE = 0.05  # recomputation from gas data
RESULT_TOLERANCE = 0.10  # reported mean vs mean of the manoeuvres we would report
ADJUSTMENT_TOLERANCE = 0.02
HB_NOTE_THRESHOLD = 0.05  # mention the Hb adjustment when it moves DLCO by more than 5 %  # common practice
BREATH_HOLD_TARGET_S = (8.0, 12.0)  # source: ATS/ERS 2005 Table 6 (10 +/- 2 s)
# Unit-mislabel evidence from the lab's own predicted value: a per cent predicted outside the
# first band that the SI <-> traditional factor would move into the second, narrower band.
# Measured DLCO rarely lies below 30 % or above 160 % predicted; the narrower band keeps the
# relabelled value well inside what is seen.  # common practice (no published threshold)
PERCENT_PREDICTED_PLAUSIBLE = (30.0, 160.0)
PERCENT_PREDICTED_RELABELLED = (40.0, 140.0)
# Unit-mislabel evidence from the GLI-2017 equations when the lab sent no predicted value: a
# z-score this far out has a probability below 1e-6 in the reference population, while the value
# in the other unit system lies within the range that healthy and diseased values reach.
# common practice (no published threshold)
MISLABEL_Z = 5.0
RELABELLED_Z = 3.0
LOW_PRESSURE_MMHG = 700.0  # flag the altitude adjustment below this PB (about 700 m)  # common practice

Rule = Callable[[Session, Derived, Tables], Iterator[Finding]]


def _finding(code: str, severity: Severity, path: str, message: str) -> Finding:
    return Finding(code=code, severity=severity, path=path, message=message)


def _measured(code: str, severity: Severity, path: str, template: str, **values: Quantity) -> Finding:
    """A finding whose sentence carries quantities: ``{name}`` places in ``template``, one per value.

    ``message`` says them in the canonical units; ``Finding.text`` in any other (see bridge.model).
    """
    message = template.format_map({name: f"{q.text()} {q.unit}" for name, q in values.items()})
    return Finding(code=code, severity=severity, path=path, message=message, template=template, values=values)


def _literal(text: str) -> str:
    """Free text (a path, a unit as the lab wrote it) made safe inside a template."""
    return text.replace("{", "{{").replace("}", "}}")


def _q(value: float, unit: str, decimals: int) -> Quantity:
    """A number of a message as a quantity, with the digits the message shows."""
    return Quantity(value=value, unit=unit, decimals=decimals)


def _bound(value: float, unit: str) -> Quantity:
    """A plausibility bound as written in its table (0.5 keeps one decimal)."""
    return _q(value, unit, len(f"{value:g}".partition(".")[2]))


DLCO_UNIT, KCO_UNIT, HB_UNIT, PRESSURE_UNIT = "mL/min/mm[Hg]", "mL/min/mm[Hg]/L", "g/dL", "mm[Hg]"


def _rel(a: float, b: float) -> float:
    return abs(a - b) / max(abs(b), 1e-12)


def _ratio(a: float, b: float) -> float | None:
    """``a / b``; None when there is no finite ratio (a zero divisor, an overflow)."""
    if b == 0:
        return None
    ratio = a / b
    return ratio if math.isfinite(ratio) else None


def _near_factor(ratio: float | None, factor: float, tolerance: float) -> bool:
    """True when ``ratio`` is about ``factor`` or ``1/factor``."""
    if ratio is None or ratio <= 0:
        return False
    return abs(abs(math.log(ratio)) - math.log(factor)) <= math.log(1.0 + tolerance)


def check_kco(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    kco, computed = session.results.kco, derived.kco
    if kco is None or computed is None:
        return
    if _rel(kco.value, computed.value) > KCO_TOLERANCE:
        if _near_factor(
            _ratio(kco.value, computed.value), tables.units.traditional_per_si, tables.plausibility.mislabel_tolerance
        ):
            return  # reported by check_unit_mislabel with the evidence
        yield _measured(
            "KCO_INCONSISTENT",
            Severity.WARNING,
            "results.kco",
            f"KCO {{kco}} differs by {100 * _rel(kco.value, computed.value):.0f} % "
            "from DLCO/VA = {computed}; check which of DLCO, VA or KCO is wrong.",
            kco=kco,
            computed=_q(computed.value, KCO_UNIT, 2),
        )


def check_unit_mislabel(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """A DLCO or KCO about 2.987 times off what the rest of the record implies.

    DLCO vs KCO x VA disagreeing by the factor says one of the two carries the wrong unit;
    independent evidence (the gas data, the lab's predicted value, plausible ranges) says which.
    """
    factor = tables.units.traditional_per_si
    tolerance = tables.plausibility.mislabel_tolerance
    r = session.results
    mutual = None
    if r.dlco is not None and r.kco is not None and r.va is not None:
        ratio = _ratio(r.dlco.value, r.kco.value * r.va.value)
        if ratio is not None and _near_factor(ratio, factor, tolerance):
            mutual = f"DLCO is {ratio:.3g}x KCO x VA"
    suspects = {}
    for path, value in (("results.dlco", r.dlco), ("results.kco", r.kco)):
        if value is not None:
            suspects[path] = (
                value,
                list(_mislabel_evidence(session, derived, tables, path, value, factor, tolerance)),
            )
    accused = [p for p, (_, evidence) in suspects.items() if evidence]
    # Each piece of evidence is (template, its quantities, is it strong on its own).
    if mutual is not None and len(accused) != 1:
        yield _finding(
            "UNIT_MISLABEL_PROBABLE",
            Severity.ERROR,
            "results",
            f"{mutual} (expected 1): DLCO or KCO carries the wrong unit (SI and traditional swapped?); "
            "nothing else in the record says which.",
        )
        return
    for path in accused:
        value, evidence = suspects[path]
        texts = ([mutual] if mutual else []) + [text for text, _, _ in evidence]
        if mutual is None and not any(strong for _, _, strong in evidence) and len(evidence) < 2:
            continue
        stated = value.original.unit if value.original else value.unit
        values = {name: q for _, found, _ in evidence for name, q in found.items()}
        yield _measured(
            "UNIT_MISLABEL_PROBABLE",
            Severity.ERROR,
            path,
            f"{path} is labelled {_literal(repr(stated))} but looks {factor:g}x off "
            "(SI and traditional units swapped?): " + "; ".join(texts) + ".",
            **values,
        )


def _mislabel_evidence(
    session: Session, derived: Derived, tables: Tables, path: str, value: Quantity, factor: float, tol: float
) -> Iterator[tuple[str, dict[str, Quantity], bool]]:
    """Evidence independent of the DLCO-KCO-VA triangle: (template, its quantities, is it strong on its own)."""
    r = session.results
    if path == "results.dlco" and derived.dlco_from_manoeuvres is not None:
        gas = derived.dlco_from_manoeuvres.value
        if _near_factor(_ratio(value.value, gas), factor, tol):
            yield "the manoeuvre gas data give {gas}", {"gas": _q(gas, DLCO_UNIT, 1)}, True
    predicted = getattr(r.predicted, path.split(".")[1], None) if r.predicted else None
    if isinstance(predicted, Quantity) and predicted.value > 0:
        percent = 100 * value.value / predicted.value
        percents = (percent / factor, percent * factor)
        low, high = PERCENT_PREDICTED_PLAUSIBLE
        relabelled_low, relabelled_high = PERCENT_PREDICTED_RELABELLED
        if not low <= percent <= high and any(relabelled_low <= p <= relabelled_high for p in percents):
            yield f"it is {percent:.0f} % of the lab's own predicted value", {}, False
    yield from _reference_evidence(session, derived, tables, path, factor)
    bound = tables.plausibility.bounds.get(path)
    relabelled = (value.value / factor, value.value * factor)
    if (
        bound is not None
        and not bound.low <= value.value <= bound.high
        and any(bound.low <= v <= bound.high for v in relabelled)
    ):
        yield (
            "{stated} is outside the plausible {low} to {high}",
            {"stated": value, "low": _bound(bound.low, bound.unit), "high": _bound(bound.high, bound.unit)},
            False,
        )


def _reference_evidence(
    session: Session, derived: Derived, tables: Tables, path: str, factor: float
) -> Iterator[tuple[str, dict[str, Quantity], bool]]:
    """The GLI-2017 predicted value as yardstick: far outside what the equations allow, normal in the other unit."""
    is_dlco = path == "results.dlco"
    reference = derived.reference_dlco if is_dlco else derived.reference_kco
    parameter = Parameter.DLCO if is_dlco else Parameter.KCO_TRAD
    if reference is None or abs(reference.z_score) <= MISLABEL_Z:
        return
    patient = session.patient
    lms = tables.reference.lms(parameter, patient.sex, age_in_years(session), patient.height.value)
    if not isinstance(lms, Lms):
        return
    compared = reference.compared.value
    for relabelled in (compared / factor, compared * factor):
        z = lms.z_score(relabelled)
        if isinstance(z, float) and abs(z) < RELABELLED_Z:
            ratio = compared / reference.predicted.value
            yield (
                f"it is {ratio:.2f}x the {reference.reference_set} predicted value {{gli_predicted}} "
                f"(z-score {reference.z_score:.1f}, beyond what the equations allow), "
                f"while in the other unit system its z-score would be {z:.1f}",
                {"gli_predicted": reference.predicted},
                True,
            )
            return


def check_recomputed(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Device-reported and session-reported DLCO and VA against the gas data."""
    for assessment, manoeuvre in zip(derived.manoeuvres, session.manoeuvres, strict=True):
        i = assessment.index
        pairs = (
            ("dlco", manoeuvre.reported.dlco, assessment.dlco),
            ("va", manoeuvre.reported.va, assessment.va),
        )
        for name, reported, computed in pairs:
            if reported is None or computed is None:
                continue
            if _rel(reported.value, computed.value) > MANOEUVRE_TOLERANCE:
                yield _measured(
                    f"MANOEUVRE_{name.upper()}_MISMATCH",
                    Severity.WARNING,
                    f"manoeuvres[{i}].reported.{name}",
                    f"manoeuvre {i + 1}: the device reports {name.upper()} {{reported}} "
                    "but its gas data give {computed} "
                    f"({100 * _rel(reported.value, computed.value):.0f} % apart).",
                    reported=reported,
                    computed=computed,
                )
    for name, reported, computed in (
        ("dlco", session.results.dlco, derived.dlco_from_manoeuvres),
        ("va", session.results.va, derived.va_from_manoeuvres),
    ):
        if reported is None or computed is None:
            continue
        mislabel = _near_factor(
            _ratio(reported.value, computed.value),
            tables.units.traditional_per_si,
            tables.plausibility.mislabel_tolerance,
        )
        if _rel(reported.value, computed.value) > RESULT_TOLERANCE and not (name == "dlco" and mislabel):
            yield _measured(
                f"RESULT_{name.upper()}_MISMATCH",
                Severity.WARNING,
                f"results.{name}",
                f"reported {name.upper()} {{reported}} differs from "
                "{computed} recomputed from the acceptable manoeuvres.",
                reported=reported,
                computed=computed,
            )


def check_bounds(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    for path, bound in tables.plausibility.bounds.items():
        for where, quantity in _resolve(session, path):
            value = tables.units.convert(quantity.value, quantity.unit, bound.unit)
            if not bound.low <= value <= bound.high:
                yield _measured(
                    "OUT_OF_RANGE",
                    Severity.WARNING,
                    where,
                    f"{_literal(where)} = {{value}} is outside the plausible range {{low}} to {{high}}.",
                    value=quantity,
                    low=_bound(bound.low, bound.unit),
                    high=_bound(bound.high, bound.unit),
                )


def _resolve(session: Session, path: str) -> Iterator[tuple[str, Quantity]]:
    """Quantities at a bounds path; ``manoeuvres[]`` expands to every manoeuvre."""
    per_manoeuvre, parts = _path_parts(path)
    if per_manoeuvre:
        rest = parts[0]
        for i, manoeuvre in enumerate(session.manoeuvres):
            value = getattr(manoeuvre, rest, None)
            if isinstance(value, Quantity):
                yield f"manoeuvres[{i}].{rest}", value
        return
    node: object = session
    for part in parts:
        node = getattr(node, part, None)
        if node is None:
            return  # getattr(None, part, None) is None all the way down
    if isinstance(node, Quantity):
        yield path, node


def _path_parts(path: str) -> tuple[bool, tuple[str, ...]]:
    """(expands per manoeuvre, attribute names) of a bounds path, split once per path."""
    head, _, rest = path.partition(".")
    if head == "manoeuvres[]":
        return True, (rest,)
    return False, tuple(path.split("."))


def check_breath_hold(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    low, high = BREATH_HOLD_TARGET_S
    for i, manoeuvre in enumerate(session.manoeuvres):
        bht = manoeuvre.breath_hold_time.value
        if not low <= bht <= high:
            yield _finding(
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
        yield _finding(
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
        yield _finding(
            "HB_ADJUSTMENT_NOT_COMPUTED",
            Severity.INFO,
            "patient.sex",
            f"sex is {session.patient.sex.value!r}: the haemoglobin adjustment depends on it and was not recomputed.",
        )
        return
    measured = session.results.dlco
    if measured is not None and derived.dlco_hb_adjusted is not None and abs(factor - 1) > HB_NOTE_THRESHOLD:
        yield _measured(
            "HB_ADJUSTMENT",
            Severity.INFO,
            "conditions.hemoglobin",
            "Hb {hb}: DLCO adjusted to standard Hb is {adjusted} " + f"(factor {factor:.3f}, age {age:.0f} y).",
            hb=hb,
            adjusted=_q(derived.dlco_hb_adjusted.value, DLCO_UNIT, 1),
        )
    if reported is None or measured is None or abs(factor - 1) <= ADJUSTMENT_TOLERANCE:
        return
    expected, inverted = measured.value * factor, measured.value / factor
    if _rel(reported.value, inverted) <= ADJUSTMENT_TOLERANCE:
        yield _measured(
            "HB_ADJUSTMENT_WRONG_DIRECTION",
            Severity.ERROR,
            "results.dlco_hb_adjusted",
            "Hb-adjusted DLCO {reported} equals measured / factor; adjusting the measured value "
            "to standard Hb gives {expected} (the factor was applied the wrong way round).",
            reported=reported,
            expected=_q(expected, DLCO_UNIT, 1),
        )
    elif _rel(reported.value, expected) > ADJUSTMENT_TOLERANCE:
        yield _measured(
            "HB_ADJUSTMENT_MISMATCH",
            Severity.WARNING,
            "results.dlco_hb_adjusted",
            "Hb-adjusted DLCO {reported} differs from {expected} (Cotes adjustment of the "
            "measured {measured} at Hb {hb}).",
            reported=reported,
            expected=_q(expected, DLCO_UNIT, 1),
            measured=measured,
            hb=hb,
        )


def check_carboxyhaemoglobin(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    cohb = session.conditions.carboxyhemoglobin
    if cohb is None or cohb.value <= COHB_BASELINE_PERCENT or derived.dlco_cohb_adjusted is None:
        return
    yield _measured(
        "COHB_RAISED",
        Severity.WARNING,
        "conditions.carboxyhemoglobin",
        f"COHb {cohb.value:.1f} % (baseline {COHB_BASELINE_PERCENT:g} %) lowers measured DLCO; adjusted to the "
        "baseline COHb, DLCO would be {adjusted}.",
        adjusted=_q(derived.dlco_cohb_adjusted.value, DLCO_UNIT, 1),
    )


def check_pressure(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    gas = gas_conditions(session)
    if session.manoeuvres and gas.pb_assumed and session.conditions.altitude is None:
        yield _measured(
            "PRESSURE_ASSUMED",
            Severity.INFO,
            "conditions.barometric_pressure",
            "no barometric pressure or altitude given: {pb} was assumed to recompute the manoeuvres.",
            pb=_q(gas.pb_mmhg, PRESSURE_UNIT, 0),
        )
    adjusted = derived.dlco_pressure_adjusted
    if adjusted is not None and gas.pb_mmhg < LOW_PRESSURE_MMHG:
        yield _measured(
            "PRESSURE_ADJUSTMENT",
            Severity.INFO,
            "conditions.barometric_pressure",
            "measured at PB {pb}: DLCO adjusted to sea level (PIO2 {pio2}) is {adjusted}; per cent predicted uses it.",
            pb=_q(gas.pb_mmhg, PRESSURE_UNIT, 0),
            pio2=_q(150.0, PRESSURE_UNIT, 0),
            adjusted=_q(adjusted.value, DLCO_UNIT, 1),
        )


def check_quality(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    if not session.manoeuvres:
        return
    for assessment in derived.manoeuvres:
        if assessment.grade == "F":
            yield _finding(
                "MANOEUVRE_NOT_ACCEPTABLE",
                Severity.WARNING,
                f"manoeuvres[{assessment.index}]",
                f"manoeuvre {assessment.index + 1} is grade F: " + "; ".join(assessment.grade_reasons or ("no DLCO",)),
            )
    grade = derived.session_grade
    if grade == "F":
        yield _finding("NO_ACCEPTABLE_MANOEUVRE", Severity.ERROR, "manoeuvres", "no manoeuvre is acceptable.")
    elif grade is not None and grade != tables.grades.acceptable_grades[0]:
        yield _finding(
            "QUALITY_BELOW_A",
            Severity.WARNING,
            "manoeuvres",
            f"session quality grade {grade}: interpret the result with caution.",
        )
    if derived.repeatable is False:  # the decision derive made when it chose the reported manoeuvres
        used = [a for a in derived.manoeuvres if a.index in derived.reported_manoeuvres and a.dlco is not None]
        dlcos = [a.dlco.value for a in used if a.dlco is not None]
        numbers = ", ".join(str(a.index + 1) for a in used)
        yield _measured(
            "NOT_REPEATABLE",
            Severity.WARNING,
            "manoeuvres",
            f"manoeuvres {numbers}, which make the reported value, span {{span}}, "
            "more than the {limit} the standard allows.",
            span=_q(max(dlcos) - min(dlcos), DLCO_UNIT, 1),
            limit=_bound(tables.grades.max_dlco_difference, DLCO_UNIT),
        )


def check_reference(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    """Say why no GLI-2017 reference values were computed (sex, age, height, a value that is not positive)."""
    if derived.reference_not_computed is None:
        return
    yield _finding(
        "REFERENCE_NOT_COMPUTED",
        Severity.INFO,
        "patient",
        f"no GLI-2017 predicted values, limits of normal or z-scores: {derived.reference_not_computed}.",
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
    check_quality,
    check_reference,
)


def run_checks(
    session: Session, derived: Derived, tables: Tables, rules: tuple[Rule, ...] = DEFAULT_RULES
) -> tuple[Finding, ...]:
    """Every finding of every rule, in rule order."""
    return tuple(finding for rule in rules for finding in rule(session, derived, tables))
