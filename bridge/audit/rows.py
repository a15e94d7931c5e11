"""One audited input as a small row: what the cross-archive checks and the report need (pure).

Owns :class:`AuditFinding` (one line of ``findings.csv``) and :class:`Row`, built from an
:class:`~bridge.model.Outcome` or from the :class:`~bridge.errors.InputError` that refused the
input. A row carries numbers and short text only (and the record's hand-over, when one is
asked for), so that worker processes send little back. A row names its file and, in a file of
many sessions, the record within it; ``source`` is always the lab (empty when none was read).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC
from types import MappingProxyType

from bridge.errors import BlockedByFinding, InputError, ProcessingFailed, UnknownFormat, UnreadableInput
from bridge.model import Outcome, Quantity, Session, Severity

SEVERITY_RANK = MappingProxyType({Severity.INFO.value: 0, Severity.WARNING.value: 1, Severity.ERROR.value: 2})

# An input that could not be read is itself a finding; its check code says why.
UNREADABLE = "UNREADABLE_INPUT"  # not UTF-8, not JSON, empty, half-written, too large, or not readable
UNKNOWN_FORMAT = "UNKNOWN_FORMAT"  # no reader recognises it
INVALID_RECORD = "INVALID_RECORD"  # readable, but a field is missing or impossible
INTERNAL_ERROR = "INTERNAL_ERROR"  # the bridge failed on it: a defect to report

LITRES_PER_MILLILITRE = 1000  # a volume sent in millilitres but labelled litres, or the reverse


@dataclass(frozen=True, slots=True)
class Series:
    """A quantity whose series per patient the unit-jump check watches (``bridge.audit.reduce``)."""

    key: str  # its column in the audit's index
    label: str  # as a finding names it
    unit: str  # the core's canonical unit of it, as a finding writes it
    path: tuple[str, ...]  # where it lies in the session, attribute by attribute
    factor: float | None  # the unit factor a mislabel multiplies it by; None: the site's SI/traditional factor
    digits: str  # how a finding writes its value


@dataclass(frozen=True, slots=True)
class LabSet:
    """A reference-set name the lab writes into its records, watched for sets mixed within one lab."""

    what: str  # as a finding names them
    path: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class PrePost:
    """A quantity measured before and after a bronchodilator, watched for post values without pre values."""

    label: str
    pre: tuple[str, ...]
    post: tuple[str, ...]


# What each check across records watches: adding a quantity to a check is one entry of its table
# (and nothing else: the row, the index and the checks are written from these tables).
SERIES = (
    Series("dlco", "DLCO", "mL/min/mmHg", ("results", "dlco"), None, ".1f"),
    Series("fev1_pre", "FEV1 (pre-bronchodilator)", "L", ("spirometry", "pre", "results", "fev1"),
           LITRES_PER_MILLILITRE, ".4g"),
    Series("fvc_pre", "FVC (pre-bronchodilator)", "L", ("spirometry", "pre", "results", "fvc"),
           LITRES_PER_MILLILITRE, ".4g"),
    Series("fev1_post", "FEV1 (post-bronchodilator)", "L", ("spirometry", "post", "results", "fev1"),
           LITRES_PER_MILLILITRE, ".4g"),
    Series("fvc_post", "FVC (post-bronchodilator)", "L", ("spirometry", "post", "results", "fvc"),
           LITRES_PER_MILLILITRE, ".4g"),
    Series("tlc", "TLC", "L", ("lung_volumes", "tlc"), LITRES_PER_MILLILITRE, ".4g"),
    Series("frc", "FRC", "L", ("lung_volumes", "frc"), LITRES_PER_MILLILITRE, ".4g"),
    Series("rv", "RV", "L", ("lung_volumes", "rv"), LITRES_PER_MILLILITRE, ".4g"),
    Series("vc", "VC", "L", ("lung_volumes", "vc"), LITRES_PER_MILLILITRE, ".4g"),
)  # fmt: skip
# The reference set the lab's own report names, per section (dlco-result/1, docs/format.md); the
# bridge's own reference values are the site's, one set for the whole run, and are not watched.
LAB_SETS = (
    LabSet("DLCO reference sets", ("results", "predicted", "reference_set")),  # of its predicted values
    LabSet("spirometry reference sets", ("spirometry", "reference_set")),
    LabSet("lung-volume reference sets", ("lung_volumes", "reference_set")),
)
PRE_POST = (
    PrePost("FEV1", ("spirometry", "pre", "results", "fev1"), ("spirometry", "post", "results", "fev1")),
    PrePost("FVC", ("spirometry", "pre", "results", "fvc"), ("spirometry", "post", "results", "fvc")),
)


@dataclass(frozen=True, slots=True, order=True)
class AuditFinding:
    """One line of ``findings.csv``: the file (and the record within a file of many sessions) it
    concerns, ``source`` the lab that produced the record (empty when none could be read)."""

    file: str
    record: str  # the record's number within a file of many sessions (1-based); "" for a one-session file
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
    record: str = ""  # within a file of many sessions, the record's number (1-based)
    readable: bool = True
    # The codes for which the site's gate (allow/blocking, bridge.emit.outputs) refused the record;
    # empty: the gate lets it through (the findings across records may still hold it back).
    held: tuple[str, ...] = ()
    ndjson: bytes = b""  # the record's hand-over (the pipeline's ndjson route), when asked for
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
    dlco_percent_predicted: float | None = None
    series: tuple[float | None, ...] = ()  # the values of SERIES, in its order (empty: none)
    lab_sets: tuple[str, ...] = ()  # the names of LAB_SETS, in its order ("" where none)
    post_without_pre: tuple[str, ...] = ()  # the labels of PRE_POST with a post value but no pre value
    with_post: bool = False  # a post value of PRE_POST is present

    @property
    def clean(self) -> bool:
        """Read, and let through by the site's gate."""
        return self.readable and not self.held


def _value(quantity: Quantity | None) -> float | None:
    return None if quantity is None else quantity.value


def _at(session: Session, path: tuple[str, ...]) -> object:
    """What lies at ``path`` in the session (None where a part is absent)."""
    found: object = session
    for name in path:
        found = getattr(found, name, None)
        if found is None:
            return None
    return found


def _series(session: Session) -> tuple[float | None, ...]:
    values = [_at(session, s.path) for s in SERIES]
    return tuple(v.value if isinstance(v, Quantity) else None for v in values)


def _convention(quantity: Quantity | None) -> str:
    if quantity is None:
        return ""
    unit = quantity.original.unit if quantity.original is not None else quantity.unit
    return "si" if unit.lower().startswith("mmol") else "traditional"


def row_of(outcome: Outcome, file: str, record: str = "", refused: InputError | None = None) -> Row:
    """The row of one outcome of the pipeline; ``refused``: the error the gate (or emitting) raised for it."""
    session, derived = outcome.session, outcome.derived
    source = session.lab.name
    findings = tuple(
        AuditFinding(file, record, source, session.test_id, f.code, f.severity.value, f"{f.path}: {f.message}")
        for f in outcome.findings
    )
    held: tuple[str, ...] = ()
    if isinstance(refused, BlockedByFinding):
        held = (refused.code,)
    elif refused is not None:  # built, but what was built could not be (an output without results, invalid)
        check = _check_of(refused)
        held = (check,)
        findings += (AuditFinding(file, record, source, session.test_id, check, Severity.ERROR.value, refused.line()),)
    ndjson = next((p.data for p in outcome.payloads if p.kind == "ndjson"), b"")
    patient = session.patient
    name = " ".join(part for part in (patient.given, patient.family) if part)
    results = session.results
    return Row(
        file=file,
        source=source,
        findings=findings,
        record=record,
        held=held,
        ndjson=ndjson,
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
        dlco_percent_predicted=_value(derived.dlco_percent_predicted),
        series=_series(session),
        lab_sets=tuple(str(_at(session, s.path) or "") for s in LAB_SETS),
        post_without_pre=tuple(
            p.label for p in PRE_POST if _at(session, p.post) is not None and _at(session, p.pre) is None
        ),
        with_post=any(_at(session, p.post) is not None for p in PRE_POST),
    )


def _check_of(error: InputError) -> str:
    if isinstance(error, ProcessingFailed):
        return INTERNAL_ERROR
    if isinstance(error, UnknownFormat):
        return UNKNOWN_FORMAT
    if isinstance(error, UnreadableInput):
        return UNREADABLE
    return INVALID_RECORD


def row_of_error(error: InputError, file: str, record: str = "") -> Row:
    """The row of an input the pipeline refused: one finding naming the file and the reason."""
    check = _check_of(error)
    finding = AuditFinding(file, record, "", "", check, Severity.ERROR.value, error.with_source(file).line())
    return Row(file=file, source="", findings=(finding,), record=record, readable=False, held=(check,))
