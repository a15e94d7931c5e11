"""The sentences the outputs carry: findings, reference values, blood values, the report's notes (pure).

Owns the wording of every note both emitters send (FHIR ``note`` and ``conclusion``, HL7 v2
NTE): a finding with its quantities in the destination's units, the GLI-2017 values of a
result and what was compared, a blood value as supporting data, the test-quality grade and
repeatability criterion, the reference sets. Which note goes where is
:func:`bridge.emit.observations.build_content`'s choice.
"""

from __future__ import annotations

from collections.abc import Callable

from bridge.emit.content import Supporting
from bridge.model import Derived, Finding, Outcome, Quantity, ReferenceValue
from bridge.science.compared import BASIS_WORDS
from bridge.science.quality import DEFAULT_REPEATABILITY, GradeTable

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
        f"from the {basis_text(reference)}; computed by {BRIDGE_NAME}."
    )


def basis_text(reference: ReferenceValue) -> str:
    if reference.basis == "measured":
        return "measured value"
    return f"measured value {BASIS_WORDS[reference.basis]}"


def supporting_text(value: Supporting) -> str:
    """The note that carries a blood value in HL7 v2 (after the OBX of the result it qualifies)."""
    return (
        f"{value.code.display} {value.quantity.text()} {value.quantity.unit} ({value.code.code}), "
        "reported with the test: supporting data, not a result of this test."
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
