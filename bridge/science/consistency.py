"""Consistency and unit-mislabel rules: a normalised session and its derivations -> findings (pure).

Owns: every rule that can say "this record disagrees with itself, with its gas data, with
plausible ranges or with its units": KCO against DLCO/VA, a DLCO or KCO about 2.987 times off
(with the evidence that says which), device and session values against the gas data, and the
plausibility bounds. Findings are collected, never raised; each code is documented in
docs/findings.md. Quantities are in canonical (traditional) units here; messages say the unit.
"""

from __future__ import annotations

from collections.abc import Iterator

from bridge.model import Derived, Finding, Quantity, Session, Severity
from bridge.science.derive import age_in_years
from bridge.science.findings import (
    DLCO_UNIT,
    KCO_UNIT,
    bound_quantity,
    finding,
    finding_with_values,
    literal,
    message_quantity,
    near_factor,
    ratio_of,
    relative_difference,
)
from bridge.science.reference import Lms, Parameter
from bridge.science.table_values import Tables

# Relative difference tolerated between a reported and a recomputed value (rounding of the
# lab's printout plus our assumptions about room temperature and gas handling).
KCO_TOLERANCE = 0.03  # common practice: two or three significant digits of rounding
MANOEUVRE_TOLERANCE = 0.05  # recomputation from gas data
RESULT_TOLERANCE = 0.10  # reported mean vs mean of the manoeuvres we would report
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
# A possible mislabel (warning, below the error tier): the GLI-2017 z-score lies beyond +/-4 as
# labelled (two-sided probability 6.3e-5 in the reference population, about 1 in 16,000; the
# error tier's +/-5 is 5.7e-7), while read in the other unit system it lies within +/-1.96, the
# central 95 % of that population. Severe disease reaches z -4 as well, so this asks a person to
# check the unit; it never stops a record.  # common practice (no published threshold)
POSSIBLE_MISLABEL_Z = 4.0
POSSIBLE_RELABELLED_Z = 1.96


def check_kco(session: Session, derived: Derived, tables: Tables) -> Iterator[Finding]:
    kco, computed = session.results.kco, derived.kco
    if kco is None or computed is None:
        return
    if relative_difference(kco.value, computed.value) > KCO_TOLERANCE:
        if near_factor(
            ratio_of(kco.value, computed.value), tables.units.traditional_per_si, tables.plausibility.mislabel_tolerance
        ):
            return  # reported by check_unit_mislabel with the evidence
        yield finding_with_values(
            "KCO_INCONSISTENT",
            Severity.WARNING,
            "results.kco",
            f"KCO {{kco}} differs by {100 * relative_difference(kco.value, computed.value):.0f} % "
            "from DLCO/VA = {computed}; check which of DLCO, VA or KCO is wrong.",
            kco=kco,
            computed=message_quantity(computed.value, KCO_UNIT, 2),
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
        ratio = ratio_of(r.dlco.value, r.kco.value * r.va.value)
        if ratio is not None and near_factor(ratio, factor, tolerance):
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
        yield finding(
            "UNIT_MISLABEL_PROBABLE",
            Severity.ERROR,
            "results",
            f"{mutual} (expected 1): DLCO or KCO carries the wrong unit (SI and traditional swapped?); "
            "nothing else in the record says which.",
        )
        return
    probable = set()
    for path in accused:
        value, evidence = suspects[path]
        texts = ([mutual] if mutual else []) + [text for text, _, _ in evidence]
        if mutual is None and not any(strong for _, _, strong in evidence) and len(evidence) < 2:
            continue
        probable.add(path)
        stated = value.original.unit if value.original else value.unit
        values = {name: q for _, found, _ in evidence for name, q in found.items()}
        yield finding_with_values(
            "UNIT_MISLABEL_PROBABLE",
            Severity.ERROR,
            path,
            f"{path} is labelled {literal(repr(stated))} but looks {factor:g}x off "
            "(SI and traditional units swapped?): " + "; ".join(texts) + ".",
            **values,
        )
    for path, (value, _) in suspects.items():
        if path not in probable:
            yield from _possible_mislabel(session, derived, tables, path, value)


def _possible_mislabel(
    session: Session, derived: Derived, tables: Tables, path: str, value: Quantity
) -> Iterator[Finding]:
    """The warning tier: far outside the GLI-2017 range as labelled, typical in the other unit system."""
    is_dlco = path == "results.dlco"
    reference = derived.reference_dlco if is_dlco else derived.reference_kco
    if reference is None or abs(reference.z_score) <= POSSIBLE_MISLABEL_Z:
        return
    patient = session.patient
    parameter = Parameter.DLCO if is_dlco else Parameter.KCO_TRAD
    lms = tables.reference.lms(parameter, patient.sex, age_in_years(session), patient.height.value)
    if not isinstance(lms, Lms):
        return
    stated = value.original.unit if value.original else value.unit
    source = tables.units.resolve(stated)
    labelled_traditional = source is None or source.code == value.unit
    factor = tables.units.traditional_per_si
    # Labelled traditional, the number may be SI (the value is factor x larger); labelled SI, the reverse.
    other = reference.compared.value * factor if labelled_traditional else reference.compared.value / factor
    other_unit = ("mmol/min/kPa" if labelled_traditional else "mL/min/mm[Hg]") + ("" if is_dlco else "/L")
    z = lms.z_score(other)
    if not isinstance(z, float) or abs(z) >= POSSIBLE_RELABELLED_Z:
        return
    yield finding(
        "UNIT_MISLABEL_POSSIBLE",
        Severity.WARNING,
        path,
        f"{path} is labelled {stated!r} and may carry the wrong unit (SI and traditional "
        f"swapped?): its {reference.reference_set} z-score is {reference.z_score:.1f} as labelled and would "
        f"be {z:+.1f} read as {other_unit}; check the unit at the source.",
    )


def _mislabel_evidence(
    session: Session, derived: Derived, tables: Tables, path: str, value: Quantity, factor: float, tol: float
) -> Iterator[tuple[str, dict[str, Quantity], bool]]:
    """Evidence independent of the DLCO-KCO-VA triangle: (template, its quantities, is it strong on its own)."""
    r = session.results
    if path == "results.dlco" and derived.dlco_from_manoeuvres is not None:
        gas = derived.dlco_from_manoeuvres.value
        if near_factor(ratio_of(value.value, gas), factor, tol):
            yield "the manoeuvre gas data give {gas}", {"gas": message_quantity(gas, DLCO_UNIT, 1)}, True
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
            {
                "stated": value,
                "low": bound_quantity(bound.low, bound.unit),
                "high": bound_quantity(bound.high, bound.unit),
            },
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
            if relative_difference(reported.value, computed.value) > MANOEUVRE_TOLERANCE:
                yield finding_with_values(
                    f"MANOEUVRE_{name.upper()}_MISMATCH",
                    Severity.WARNING,
                    f"manoeuvres[{i}].reported.{name}",
                    f"manoeuvre {i + 1}: the device reports {name.upper()} {{reported}} "
                    "but its gas data give {computed} "
                    f"({100 * relative_difference(reported.value, computed.value):.0f} % apart).",
                    reported=reported,
                    computed=computed,
                )
    for name, reported, computed in (
        ("dlco", session.results.dlco, derived.dlco_from_manoeuvres),
        ("va", session.results.va, derived.va_from_manoeuvres),
    ):
        if reported is None or computed is None:
            continue
        mislabel = near_factor(
            ratio_of(reported.value, computed.value),
            tables.units.traditional_per_si,
            tables.plausibility.mislabel_tolerance,
        )
        if relative_difference(reported.value, computed.value) > RESULT_TOLERANCE and not (name == "dlco" and mislabel):
            yield finding_with_values(
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
                yield finding_with_values(
                    "OUT_OF_RANGE",
                    Severity.WARNING,
                    where,
                    f"{literal(where)} = {{value}} is outside the plausible range {{low}} to {{high}}.",
                    value=quantity,
                    low=bound_quantity(bound.low, bound.unit),
                    high=bound_quantity(bound.high, bound.unit),
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
