"""The sentences the outputs carry: findings, reference values, blood values, the report's notes (pure).

Owns the wording of every note both emitters send (FHIR ``note`` and ``conclusion``, HL7 v2
NTE): a finding with its quantities in the destination's units, the GLI-2017 values of a
result and what was compared, the lab's own predicted values when they are not charted (and
GLI-2017's when they are not), why a reference value is absent, the Hb an adjusted value used
and the COHb reported with the test, the test-quality grade and repeatability criterion, the
reference sets. Which note goes where is
:func:`bridge.emit.observations.build_content`'s choice.
"""

from __future__ import annotations

from collections.abc import Callable

from bridge.emit.content import Supporting
from bridge.model import ComparedBasis, Derived, Finding, Outcome, Quantity, ReferenceValue
from bridge.science.compared import BASIS_WORDS
from bridge.science.quality import DEFAULT_REPEATABILITY, GradeTable
from bridge.tables import Code

BRIDGE_NAME = "dlco-bridge"
COMPUTED_NOTE = "Computed by dlco-bridge from the reported values."
GLI_SOURCE = "GLI-2017 (Stanojevic et al., Eur Respir J 2017;50:1700010, corrected 2020)"
GLI_RANGE_TEXT = "GLI-2017 LLN-ULN (5th-95th percentile)"
LAB_RANGE_TEXT = "LLN (5th percentile)"


def finding_note(finding: Finding, say: Callable[[Quantity], str]) -> str:
    """A finding as a note, its quantities in the destination's units."""
    return f"{finding.severity.value.upper()} {finding.code} ({finding.path}): {finding.text(say)}"


def quantity_text(q: Quantity) -> str:
    return f"{q.text()} {q.unit}"


def reference_note(reference: ReferenceValue, show: Callable[[Quantity], Quantity]) -> str:
    """The GLI-2017 values of a result in one sentence, in the destination's units."""
    return (
        f"{reference.reference_set}: predicted {quantity_text(show(reference.predicted))}, "
        f"LLN {quantity_text(show(reference.lln))}, ULN {quantity_text(show(reference.uln))}, "
        f"z-score {reference.z_score:.2f} "
        f"({reference.band}), {reference.percent_predicted.text()} % predicted, "
        f"from the {basis_text(reference.basis)}; computed by {BRIDGE_NAME}."
    )


def basis_text(basis: ComparedBasis) -> str:
    """``measured value`` or ``measured value adjusted to sea level`` (and so on)."""
    if basis == "measured":
        return "measured value"
    return f"measured value {BASIS_WORDS[basis]}"


def gli_absent_note(reason: str | None) -> str:
    """Why there are no GLI-2017 values for a result (outside the equations, say)."""
    return f"GLI-2017 reference values not computed: {reason or 'the equations do not apply'}."


def lab_note(
    reference_set: str | None,
    predicted: Quantity | None,
    low: Quantity | None,
    percent: Quantity | None,
    basis: ComparedBasis,
    altitude_adjusted: bool,
    say: Callable[[Quantity], str],
) -> str:
    """The lab's own predicted value, lower limit and per cent of it, and which value that per cent compares."""
    parts = [f"predicted {say(predicted)}"] if predicted is not None else []
    parts += [f"LLN {say(low)}"] if low is not None else []
    if percent is not None:
        parts.append(f"{percent.text()} % predicted from the {basis_text(basis)}")
    given = "; its predicted values are adjusted to the altitude of the test" if altitude_adjusted else ""
    return f"The lab's reference values ({reference_set or 'reference set not named'}{given}): {', '.join(parts)}."


def not_charted(note: str, charted: str) -> str:
    """A note of the reference set the site does not chart (``charted_predicted``); ``charted``: whose it charts."""
    return f"{note} Not charted: the site charts {charted} predicted values."


def range_elsewhere_note(label: str, compared: str) -> str:
    """On a result as measured: its reference range and flag sit on the value it is compared as."""
    return f"{label} is compared with its reference values as {compared}: the range and flag are sent with that result."


def adjustment_note(label: str, basis: ComparedBasis) -> str:
    """How an adjusted DLCO or KCO was computed."""
    pressure = "x (1 + 0.0031 (PIO2 - 150)), PIO2 = FIO2 x (PB - 47)"
    how = {
        "pressure_adjusted": f"{label} {pressure}",
        "hb_adjusted": f"{label} adjusted to standard haemoglobin (Cotes)",
        "hb_and_pressure_adjusted": f"{label} adjusted to standard haemoglobin (Cotes) and {pressure}",
    }[basis]
    return f"{how}, computed by {BRIDGE_NAME}."


def supporting_text(value: Supporting) -> str:
    """The note that carries in HL7 v2 the Hb an adjusted value used (after that value's OBX)."""
    return (
        f"Haemoglobin used by this adjustment: {value.code.display} {value.quantity.text()} {value.quantity.unit} "
        f"({value.code.code}), as reported with the test; not a result of this test."
    )


def carboxyhemoglobin_note(code: Code, quantity: Quantity) -> str:
    """COHb reported with the test: it bears on the measured DLCO, and no value sent is adjusted for it."""
    return (
        f"{code.display} {quantity.text()} {quantity.unit} ({code.code}), reported with the test: supporting data, "
        "not a result of this test; no value sent here is adjusted for it."
    )


def report_notes(
    outcome: Outcome, attached: set[str], say: Callable[[Quantity], str], grades: GradeTable
) -> tuple[str, ...]:
    """Report-level notes: quality grade, reference set, and the findings no item carries."""
    notes: list[str] = []
    d, s = outcome.derived, outcome.session
    if d.session_grade is not None:
        basis = "".join(f"; {caveat}" for caveat in d.grade_not_evaluated) + repeatability_note(d, grades)
        notes.append(f"Test quality grade {d.session_grade} ({len(s.manoeuvres)} manoeuvres{basis}).")
    if d.quality_caution is not None:
        notes.append(f"Interpret with caution: {d.quality_caution}.")
    pred = s.results.predicted
    if pred is not None and pred.reference_set:
        notes.append(f"Reference values: {pred.reference_set}.")
    graded = [
        f"{label} z {r.z_score:.2f} ({r.band})"
        for label, r in (("DLCO", d.reference_dlco), ("KCO", d.reference_kco), ("VA", d.reference_va))
        if r is not None
    ]
    if graded:
        notes.append(f"Reference values computed by {BRIDGE_NAME}: {GLI_SOURCE}; " + ", ".join(graded) + ".")
    notes.extend(finding_note(f, say) for f in outcome.findings if f.path not in attached)
    return tuple(notes)


def repeatability_note(d: Derived, grades: GradeTable) -> str:
    """``; repeatable by the ATS/ERS 2005 criterion, ...`` when a criterion other than the default decided it.

    Under the default criterion a repeatable session says nothing more (the caution and the
    NOT_REPEATABLE finding name the criterion when it is not repeatable); under another one the
    reported mean rests on a limit a reader would not assume, so the grade note names it either way.
    """
    name = d.repeatability_criterion
    if d.repeatable is None or name is None or name == DEFAULT_REPEATABILITY:
        return ""
    rule = grades.criterion(name)
    return f"; {'repeatable' if d.repeatable else 'not repeatable'} by the {rule.standard} criterion, {rule.limits}"
