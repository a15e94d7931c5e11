"""The spirometry part of the ``check`` report: each phase's values against the reference set, grades, response (pure).

Owns the lines ``bridge.display.check_report`` shows for a session's spirometry: the values the lab
reported before and after the bronchodilator (as sent, when the unit differs), each compared with
the site's spirometry set (the lab's own set named beside it, when the record names one; predicted,
LLN, ULN, z-score and band, per cent predicted), FEV1/FVC recomputed, the ATS/ERS 2019 grade and
repeatability of FEV1 and FVC, and the ERS/ATS 2022 bronchodilator response.
"""

from __future__ import annotations

from collections.abc import Callable

from bridge.model import Outcome, Quantity
from bridge.spirometry_record import (
    BronchodilatorChange,
    ParameterGrade,
    PhaseDerived,
    SpirometryPhase,
    SpirometryReference,
)

_LABELS = (("fev1", "FEV1"), ("fvc", "FVC"), ("fev1_fvc", "FEV1/FVC"), ("fef25_75", "FEF25-75"), ("pef", "PEF"))
_PHASES = (("pre", "before the bronchodilator"), ("post", "after the bronchodilator"))


def spirometry_lines(outcome: Outcome, text: Callable[[Quantity], str], brief: Callable[[Quantity], str]) -> list[str]:
    """The report's spirometry lines; none when the session has no spirometry.

    ``text``: a quantity as shown with its value as sent; ``brief``: the quantity alone.
    """
    spiro, derived = outcome.session.spirometry, outcome.derived.spirometry
    if spiro is None or derived is None:
        return []
    lab = f"; the lab's report used {spiro.reference_set}" if spiro.reference_set is not None else ""
    lines = [f"  spirometry (reference values {derived.reference_set}, computed by dlco-bridge{lab})"]
    for name, title in _PHASES:
        phase: SpirometryPhase | None = getattr(spiro, name)
        done: PhaseDerived | None = getattr(derived, name)
        if phase is None or done is None:
            continue
        given = spiro.bronchodilator if name == "post" else None
        if given is not None:
            dose = f" {given.dose.text()} {given.dose.unit}" if given.dose is not None else ""  # the dose as given
            title += f" ({given.drug}{dose})"
        lines.append(f"    {title}")
        lines += _phase_lines(phase, done, text, brief)
    for label, change in (("FEV1", derived.fev1_response), ("FVC", derived.fvc_response)):
        if change is not None:
            lines.append(_response_line(label, change, brief))
    if derived.reference_not_computed is not None:
        lines.append(f"    spirometry reference values not computed: {derived.reference_not_computed}")
    return lines


def _phase_lines(
    phase: SpirometryPhase, done: PhaseDerived, text: Callable[[Quantity], str], brief: Callable[[Quantity], str]
) -> list[str]:
    lines = []
    for key, label in _LABELS:
        value: Quantity | None = getattr(phase.results, key)
        if value is None:
            continue
        lines.append(f"      {label:<30}{text(value)}")
        ref = done.references.get(key)
        if ref is not None:
            lines.append(f"      {'':<30}{reference_text(ref, brief)}")
    if done.fev1_fvc is not None:
        lines.append(f"      {'FEV1/FVC recomputed':<30}{brief(done.fev1_fvc)}")
    for label, graded in (("FEV1", done.fev1_grade), ("FVC", done.fvc_grade)):
        if graded is not None:
            lines.append(f"      {label + ' grade (ATS/ERS 2019)':<30}{_grade_text(graded, brief)}")
    return lines


def reference_text(ref: SpirometryReference, brief: Callable[[Quantity], str]) -> str:
    """One result's reference values on one line: predicted, LLN, ULN, z (its band) and per cent predicted."""
    band = ref.impairment if ref.flag != "H" else "above the ULN"
    return (
        f"predicted {brief(ref.predicted)}  LLN {brief(ref.lln)}  ULN {brief(ref.uln)}  "
        f"z {ref.z_score:.2f} ({band})  {ref.percent_predicted.text()} %"
    )


def _grade_text(graded: ParameterGrade, brief: Callable[[Quantity], str]) -> str:
    text = f"{graded.grade} ({graded.acceptable} acceptable, {graded.usable} usable only)"
    if graded.repeatable is not None and graded.difference is not None:
        verdict = "repeatable" if graded.repeatable else "not repeatable"
        text += f", two largest {brief(graded.difference)} apart: {verdict}"
    return text


def _response_line(label: str, change: BronchodilatorChange, brief: Callable[[Quantity], str]) -> str:
    verdict = "significant" if change.significant else "not significant"
    sign = "+" if change.change.value >= 0 else ""
    return (
        f"    {label + ' bronchodilator response':<32}{sign}{brief(change.change)}, "
        f"{change.percent_of_predicted.text()} % of predicted: {verdict} (ERS/ATS 2022: more than 10 %)"
    )
