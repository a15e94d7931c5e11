"""One audited input as a small row: what the cross-archive checks and the report need (pure).

Owns :class:`AuditFinding` (one line of ``findings.csv``) and :class:`Row`, built from an
:class:`~bridge.model.Outcome` or from the :class:`~bridge.errors.InputError` that refused the
input. A row carries numbers and short text only, so that worker processes send little back.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC
from types import MappingProxyType

from bridge.errors import InputError, ProcessingFailed, UnknownFormat, UnreadableInput
from bridge.model import Outcome, Quantity, Severity
from bridge.science.reference import OutsideRange, Parameter, ReferenceEquations

SEVERITY_RANK = MappingProxyType({Severity.INFO.value: 0, Severity.WARNING.value: 1, Severity.ERROR.value: 2})

# An input that could not be read is itself a finding; its check code says why.
UNREADABLE = "UNREADABLE_INPUT"  # not UTF-8, not JSON, empty, half-written, too large, or not readable
UNKNOWN_FORMAT = "UNKNOWN_FORMAT"  # no reader recognises it
INVALID_RECORD = "INVALID_RECORD"  # readable, but a field is missing or impossible
INTERNAL_ERROR = "INTERNAL_ERROR"  # the bridge failed on it: a defect to report
PREDICTED_NOT_FROM_SET = "PREDICTED_NOT_FROM_CLAIMED_SET"
# A lab's predicted DLCO that claims GLI-2017 but is further than this from the GLI-2017 value
# for the record's sex, age and height was computed otherwise (another set, another sex, a
# copying error). Labs round ages and predicted values, which moves them by a few per cent at most.
PREDICTED_TOLERANCE = 0.05  # relative (common practice)


@dataclass(frozen=True, slots=True, order=True)
class AuditFinding:
    """One line of ``findings.csv``: ``source`` is the lab (the file, when no lab could be read)."""

    source: str
    test_id: str
    check: str
    severity: str
    message: str

    @property
    def rank(self) -> int:
        """Higher is worse: error 2, warning 1, info 0."""
        return SEVERITY_RANK.get(self.severity, 0)


@dataclass(frozen=True, slots=True)
class Row:
    """What the audit keeps of one input (values in the core's canonical, traditional units)."""

    file: str
    source: str
    findings: tuple[AuditFinding, ...]
    readable: bool = True
    clean: bool = False  # readable and no finding of severity error: handed over in bulk
    test_id: str = ""
    sha256: str = ""
    patient: str = ""  # identifier system | identifier
    patient_name: str = ""
    sex: str = ""
    birth_date: str = ""
    performed_at: str = ""  # ISO 8601 in UTC, so that text order is time order
    dlco: float | None = None
    dlco_recomputed: float | None = None  # from the manoeuvres' raw gas data
    kco: float | None = None
    va: float | None = None
    dlco_convention: str = ""  # "si" or "traditional": the unit system the lab wrote DLCO in
    reference_set: str = ""
    dlco_percent_predicted: float | None = None


def _value(quantity: Quantity | None) -> float | None:
    return None if quantity is None else quantity.value


def _convention(quantity: Quantity | None) -> str:
    if quantity is None:
        return ""
    unit = quantity.original.unit if quantity.original is not None else quantity.unit
    return "si" if unit.lower().startswith("mmol") else "traditional"


def claims_gli_2017(reference_set: str) -> bool:
    """Whether a lab's reference-set name says GLI-2017 (labs write it several ways)."""
    text = reference_set.upper()
    return "GLI" in text and "2017" in text


def predicted_check(outcome: Outcome, equations: ReferenceEquations) -> AuditFinding | None:
    """A predicted DLCO that claims GLI-2017 but is not the GLI-2017 value for this patient."""
    session = outcome.session
    predicted = session.results.predicted
    if predicted is None or predicted.dlco is None or not claims_gli_2017(predicted.reference_set or ""):
        return None
    patient = session.patient
    lms = equations.lms(Parameter.DLCO, patient.sex, outcome.derived.age_years, patient.height.value)
    if isinstance(lms, OutsideRange):
        return None  # the equations do not cover this patient: nothing to compare with
    reported = predicted.dlco.value
    if abs(reported / lms.predicted - 1) <= PREDICTED_TOLERANCE:
        return None
    message = (
        f"results.predicted.dlco: {reported:.1f} mL/min/mmHg is said to be {predicted.reference_set}, but GLI-2017 "
        f"predicts {lms.predicted:.1f} for a {patient.sex.value} of {outcome.derived.age_years:.0f} y and "
        f"{patient.height.value:.0f} cm; check the set, the sex and the age the lab used."
    )
    return AuditFinding(session.lab.name, session.test_id, PREDICTED_NOT_FROM_SET, Severity.WARNING.value, message)


def row_of(outcome: Outcome, file: str, equations: ReferenceEquations | None = None) -> Row:
    """The row of one outcome of the pipeline (with ``equations``, its predicted values are checked too)."""
    session, derived = outcome.session, outcome.derived
    source = session.lab.name
    findings = tuple(
        AuditFinding(source, session.test_id, f.code, f.severity.value, f"{f.path}: {f.message}")
        for f in outcome.findings
    )
    extra = predicted_check(outcome, equations) if equations is not None else None
    if extra is not None:
        findings = (*findings, extra)
    patient = session.patient
    name = " ".join(part for part in (patient.given, patient.family) if part)
    results = session.results
    predicted = results.predicted
    return Row(
        file=file,
        source=source,
        findings=findings,
        clean=all(f.severity != Severity.ERROR.value for f in findings),
        test_id=session.test_id,
        sha256=outcome.source_sha256,
        patient=f"{patient.id_system}|{patient.id}",
        patient_name=name,
        sex=patient.sex.value,
        birth_date=patient.birth_date.isoformat(),
        performed_at=session.performed_at.astimezone(UTC).isoformat(),
        dlco=_value(results.dlco),
        dlco_recomputed=_value(derived.dlco_from_manoeuvres),
        kco=_value(results.kco),
        va=_value(results.va),
        dlco_convention=_convention(results.dlco),
        reference_set=(predicted.reference_set or "") if predicted is not None else "",
        dlco_percent_predicted=_value(derived.dlco_percent_predicted),
    )


def row_of_error(error: InputError, file: str) -> Row:
    """The row of an input the pipeline refused: one finding naming the file and the reason."""
    if isinstance(error, ProcessingFailed):
        check = INTERNAL_ERROR
    elif isinstance(error, UnknownFormat):
        check = UNKNOWN_FORMAT
    elif isinstance(error, UnreadableInput):
        check = UNREADABLE
    else:
        check = INVALID_RECORD
    finding = AuditFinding(file, "", check, Severity.ERROR.value, error.with_source(file).line())
    return Row(file=file, source=file, findings=(finding,), readable=False)
