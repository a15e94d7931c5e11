"""The one path: the bytes of one input -> :class:`bridge.model.Outcome` with its payloads (pure).

Owns: the order of the steps, in one place: read (normalising every quantity on the parsed
tree before the one validation) -> the lab's own status of each value (a value it marked not
to be sent is taken out) -> derive -> check -> gate -> emit, what is emitted built once
per unit system (-> validate, when asked). Every command calls :func:`process` or
:func:`process_all` (``check`` with no routes, ``convert`` and ``demo`` with the kinds asked for,
``watch`` with its destinations' routes); none calls the gate or an emitter on its own. The
reader is chosen by ``PipelineSettings.field_map``: none reads ``dlco-result/1`` JSON (one
record); a field map reads a CSV export or a legacy HL7 v2 feed (many records). Every reader
yields records, :func:`process_all` gives one outcome or error for each, and :func:`process` is
a thin wrapper for an input of one session. No I/O: the shell reads the file, the clock and
the ledger, and passes the bytes, the time and a correction test in.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from typing import Annotated

from pydantic import InstanceOf
from pydantic.dataclasses import dataclass as settings_model

from bridge.emit.outputs import payloads, refuse_blocked
from bridge.emit.setting_values import check, choice, codes, flag, text, whole
from bridge.emit.settings import EmitSettings
from bridge.emit.validation import problems
from bridge.errors import InputError, InvalidField, OutputInvalid, UnreadableInput
from bridge.model import Finding, Outcome, OutputKind, Payload, Session, Severity
from bridge.readers.common import Record
from bridge.readers.csv_export import read_csv
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.readers.json_export import read_records
from bridge.readers.mapped import MappedRecord
from bridge.science.checks import run_checks
from bridge.science.compared import DEFAULT_REFERENCE_BASIS, REFERENCE_BASES, ReferenceBasis
from bridge.science.derive import derive
from bridge.science.equation_sets import DEFAULT_SPIROMETRY_SET, SPIROMETRY_SETS, SpirometrySet
from bridge.science.lab_status import apply_lab_status
from bridge.science.quality import DEFAULT_REPEATABILITY
from bridge.science.units import UnitSystem
from bridge.tables import Tables
from bridge.tables.field_map_model import FieldMap
from bridge.values import SETTINGS_MODEL

DEFAULT_MAX_INPUT_BYTES = 5 * 1024 * 1024  # a DLCO export is a few kB; anything huge is wrong
# The most max_input_bytes may be: every input is read whole into memory.
MAX_INPUT_BYTES_LIMIT = 1024**3
# A test dated later than the time its input was read, by more than this, cannot have happened:
# a device clock a year out, day and month swapped. The hour allows for clocks that drift and
# a lab computer that missed the change to summer time.
FUTURE_TOLERANCE = timedelta(hours=1)
UNMAPPED_CODE = "UNMAPPED_SOURCE_CODE"  # a field map reader met a source code its map does not name


@dataclass(frozen=True, slots=True)
class Route:
    """One kind of payload in one unit system (several destinations may share a route)."""

    kind: OutputKind
    units: UnitSystem


@settings_model(frozen=True, slots=True, config=SETTINGS_MODEL)
class PipelineSettings:
    """What the pipeline needs of the settings (built by ``bridge.config``; defaults written here once)."""

    max_input_bytes: Annotated[int, check(whole, 1, MAX_INPUT_BYTES_LIMIT)] = DEFAULT_MAX_INPUT_BYTES
    # Every ERROR finding keeps a record from being emitted unless its code is in ``allow``
    # (then the value goes out marked preliminary, with the finding); ``blocking`` adds codes
    # of lesser findings that should stop a record too.
    allow: Annotated[frozenset[str], check(codes)] = frozenset()
    blocking: Annotated[frozenset[str], check(codes)] = frozenset()
    validate_outputs: Annotated[bool, check(flag)] = False  # check each payload with independent libraries (slow)
    emit: EmitSettings = field(default_factory=EmitSettings)
    # Read the input through this map (CSV, legacy HL7); None: dlco-result/1.
    field_map: InstanceOf[FieldMap] | None = None
    # The repeatability criterion (a name in mappings/quality_grades.toml); a field map that
    # names its own wins for the inputs read through it.
    repeatability: Annotated[str, check(text)] = DEFAULT_REPEATABILITY
    # what per cent predicted and z-scores compare
    reference_basis: Annotated[ReferenceBasis, check(choice, REFERENCE_BASES)] = DEFAULT_REFERENCE_BASIS
    # the spirometry equations: GLI Global or GLI-2012
    spirometry_reference: Annotated[SpirometrySet, check(choice, SPIROMETRY_SETS)] = DEFAULT_SPIROMETRY_SET

    def reading_with(self, fmap: FieldMap | None) -> PipelineSettings:
        """These settings reading through ``fmap``: themselves when it is already theirs (settings are
        validated when built, so one file after another does not build and check them anew)."""
        return self if fmap is self.field_map else replace(self, field_map=fmap)

    def repeatability_for(self, fmap: FieldMap | None) -> str:
        """The criterion for inputs read through ``fmap`` (None: dlco-result/1 JSON): the map's, else the site's."""
        return fmap.repeatability if fmap is not None and fmap.repeatability is not None else self.repeatability


def _never(test_id: str, source_sha256: str) -> bool:
    return False


def _nothing_sent(test_id: str) -> tuple[tuple[str, str], ...]:
    return ()


# What was sent before for a test id: (identifier value, status as last sent) pairs (the ledger's record).
SentBefore = Callable[[str], tuple[tuple[str, str], ...]]


DEFAULT_SETTINGS = PipelineSettings()


def process(
    data: bytes,
    source: str,
    tables: Tables,
    settings: PipelineSettings = DEFAULT_SETTINGS,
    *,
    now: datetime | None = None,
    routes: Sequence[Route] = (),
    is_correction: Callable[[str, str], bool] = _never,
    gate: bool = False,
    sent_before: SentBefore = _nothing_sent,
) -> Outcome:
    """Read, normalise, derive, check, gate and emit one input: :func:`process_all` for an input of one session.

    ``now`` is the time the shell read (the clock stays out of the core): a test dated after it,
    beyond :data:`FUTURE_TOLERANCE`, is refused, and it is the send time of what is emitted.
    ``routes`` empty: nothing is emitted and no gate applies (``check``) unless ``gate`` asks for
    it (the audit: which records the gate would refuse, without building what it does not write).
    Otherwise ``is_correction(test_id, sha256)`` says whether this content replaces a result
    already sent, and ``sent_before(test_id)`` what was sent for it (so a correction withdraws
    what it no longer gives; ``bridge.emit.status``). Raises :class:`InputError` when the input
    cannot be read, holds other than one session (``process``), is impossible (born after the
    test, nothing measured, dated in the future), an ERROR finding not allowed (or a blocking
    one) refuses it, or (with ``validate_outputs``) an independent validator finds a payload
    invalid; an error raised at the gate or while emitting carries the checked record as
    ``outcome``.
    """
    results = list(
        process_all(
            data,
            source,
            tables,
            settings,
            now=now,
            routes=routes,
            is_correction=is_correction,
            gate=gate,
            sent_before=sent_before,
        )
    )
    if len(results) != 1:
        raise InvalidField("(file)", f"one session, got {len(results)} (use process_all)", source)
    if isinstance(results[0], InputError):
        raise results[0]
    return results[0]


def process_all(
    data: bytes,
    source: str,
    tables: Tables,
    settings: PipelineSettings = DEFAULT_SETTINGS,
    *,
    now: datetime | None = None,
    routes: Sequence[Route] = (),
    is_correction: Callable[[str, str], bool] = _never,
    gate: bool = False,
    sent_before: SentBefore = _nothing_sent,
) -> Iterator[Outcome | InputError]:
    """The one path for every input: one outcome (or error) per session the reader yields (see :func:`process`).

    Without ``settings.field_map`` the input is one ``dlco-result/1`` document: one record, and
    what refuses the document is that record's error. With a map, a bad record (or a session a
    blocking finding refuses) is yielded as its InputError and the next is taken; when the map
    says ``on_bad_record = "refuse"`` the first bad record is raised instead, refusing the file
    (callers that must not act on part of a file collect first). Raises InputError when a mapped
    file as a whole cannot be read or is not the map's format.
    """
    fmap = settings.field_map
    records = _records(data, source, tables, settings)  # a mapped file too large is refused before any hashing
    sha256 = hashlib.sha256(data).hexdigest()
    history = (is_correction, sent_before)
    for record in records:
        try:
            if record.error is not None:
                raise record.error
            assert record.session is not None  # a record holds a session or an error
            outcome = _complete(record.session, sha256, source, tables, settings, now, routes, history, gate)
        except InputError as exc:
            if fmap is not None and fmap.on_bad_record == "refuse":
                raise
            yield exc
            continue
        yield _with_unmapped(outcome, record.unmapped, fmap.name if fmap is not None else "")


def _records(data: bytes, source: str, tables: Tables, settings: PipelineSettings) -> Iterator[Record | MappedRecord]:
    """Every record of the input, by the reader ``settings.field_map`` chooses (none: ``dlco-result/1`` JSON)."""
    fmap = settings.field_map
    if fmap is None:
        try:
            _check_size(data, source, settings)
        except InputError as exc:  # the document's one record is refused
            return iter((Record(error=exc),))
        return read_records(data, source, tables.units)
    _check_size(data, source, settings)
    reader = read_csv if fmap.format == "csv" else read_hl7
    return reader(data, source, fmap, tables.units)


def _with_unmapped(outcome: Outcome, unmapped: Sequence[str], map_name: str) -> Outcome:
    """The outcome with one finding per source code the map does not name (its value was not read)."""
    if not unmapped:
        return outcome
    found = tuple(
        Finding(
            code=UNMAPPED_CODE,
            severity=Severity.WARNING,
            path=where,
            message=f"{outcome.source}: {where} is not in map {map_name}; its value was not read",
        )
        for where in unmapped
    )
    return replace(outcome, findings=outcome.findings + found)


def _check_size(data: bytes, source: str, settings: PipelineSettings) -> None:
    if len(data) > settings.max_input_bytes:
        raise UnreadableInput("(file)", f"at most {settings.max_input_bytes} bytes, got {len(data)}", source)


def _complete(
    session: Session,
    sha256: str,
    source: str,
    tables: Tables,
    settings: PipelineSettings,
    now: datetime | None,
    routes: Sequence[Route],
    history: tuple[Callable[[str, str], bool], SentBefore],
    gate: bool = False,
) -> Outcome:
    """Apply the lab's statuses, derive, check, gate and emit one session (one dated after ``now`` is refused)."""
    if now is not None and session.performed_at > now + FUTURE_TOLERANCE:
        latest = (now + FUTURE_TOLERANCE).isoformat(timespec="seconds")
        expected = f"a test no later than the time the input was read (at most {latest}), got "
        raise InvalidField("performed_at", expected + session.performed_at.isoformat(), source)
    session, status_findings = apply_lab_status(session, tables.result_status, source)
    derived = derive(
        session,
        tables,
        repeatability=settings.repeatability_for(settings.field_map),
        reference_basis=settings.reference_basis,
        spirometry_reference=settings.spirometry_reference,
    )
    outcome = Outcome(
        source=source,
        source_sha256=sha256,
        session=session,
        derived=derived,
        findings=status_findings + run_checks(session, derived, tables),
    )
    if not routes and not gate:
        return outcome
    try:
        refuse_blocked(outcome, settings.blocking, settings.allow)
        return outcome if not routes else _emit(outcome, tables, settings, now, routes, history)
    except InputError as exc:
        exc.outcome = outcome  # the record as checked: the audit counts its findings all the same
        raise


def _emit(
    outcome: Outcome,
    tables: Tables,
    settings: PipelineSettings,
    now: datetime | None,
    routes: Sequence[Route],
    history: tuple[Callable[[str, str], bool], SentBefore],
) -> Outcome:
    """Build (and validate, when asked) every payload the routes ask for, of an outcome the gate let through."""
    if now is None:
        raise ValueError("emitting needs the send time (now)")
    session, sha256 = outcome.session, outcome.source_sha256
    is_correction, sent_before = history
    correction = is_correction(session.test_id, sha256)
    earlier = sent_before(session.test_id)
    asked = tuple(dict.fromkeys(routes))  # each route once, in the order asked
    kinds_by_units: dict[UnitSystem, list[OutputKind]] = {}
    for route in asked:
        kinds_by_units.setdefault(route.units, []).append(route.kind)
    made: dict[Route, Payload] = {}
    for units, kinds in kinds_by_units.items():  # what is emitted is built once per unit system
        context = settings.emit.context(now, units, correction, earlier)
        for payload in payloads(outcome, tables, context, kinds):
            made[Route(payload.kind, payload.units)] = payload
    built = [made[route] for route in asked]
    if settings.validate_outputs:
        _validate(built, outcome)
    return replace(outcome, payloads=tuple(built), correction=correction)


def _validate(built: Sequence[Payload], outcome: Outcome) -> None:
    """Refuse the input when an independent validator rejects what was built for it."""
    for payload in built:
        found = problems(payload)
        if found:
            what = {
                "fhir": "FHIR Bundle (fhir.resources R4B)",
                "ndjson": "FHIR resource (fhir.resources R4B)",
            }.get(payload.kind, "ORU^R01 (hl7apy STRICT)")
            more = f" (+{len(found) - 1} more)" if len(found) > 1 else ""
            raise OutputInvalid("(output)", f"a valid {what}: {found[0]}{more}", outcome.source)
