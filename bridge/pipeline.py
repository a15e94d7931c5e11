"""The one path: the bytes of one input -> :class:`bridge.model.Outcome` with its payloads (pure).

Owns: the order of the steps, in one place: read (normalising every quantity on the parsed
tree before the one validation) -> derive -> check -> gate -> emit, what is emitted built
once per unit system (-> validate, when asked). Every command calls :func:`process` (``check`` with no routes,
``convert`` and ``demo`` with the kinds asked for, ``watch`` with its destinations' routes);
none calls the gate or an emitter on its own. No I/O: the shell reads the file, the clock and
the ledger, and passes the bytes, the time and a correction test in.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime

from bridge.emit.outputs import payloads, refuse_blocked
from bridge.emit.settings import EmitSettings
from bridge.emit.validation import problems
from bridge.errors import InputError, OutputInvalid, UnreadableInput
from bridge.model import Outcome, OutputKind, Payload
from bridge.readers.json_export import read_export
from bridge.science.checks import run_checks
from bridge.science.derive import derive
from bridge.science.units import UnitSystem
from bridge.tables import Tables

DEFAULT_MAX_INPUT_BYTES = 5 * 1024 * 1024  # a DLCO export is a few kB; anything huge is wrong


@dataclass(frozen=True, slots=True)
class Route:
    """One kind of payload in one unit system (several destinations may share a route)."""

    kind: OutputKind
    units: UnitSystem


@dataclass(frozen=True, slots=True)
class PipelineSettings:
    """What the pipeline needs of the settings (built by ``bridge.config``; defaults written here once)."""

    max_input_bytes: int = DEFAULT_MAX_INPUT_BYTES
    # Every ERROR finding keeps a record from being emitted unless its code is in ``allow``
    # (then the value goes out marked preliminary, with the finding); ``blocking`` adds codes
    # of lesser findings that should stop a record too.
    allow: frozenset[str] = frozenset()
    blocking: frozenset[str] = frozenset()
    validate_outputs: bool = False  # check each payload with independent libraries (slow)
    emit: EmitSettings = field(default_factory=EmitSettings)


def _never(test_id: str, source_sha256: str) -> bool:
    return False


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
) -> Outcome:
    """Read, normalise, derive, check, gate and emit one input.

    ``routes`` empty: nothing is emitted and no gate applies (``check``). Otherwise ``now`` is
    the send time the shell read, and ``is_correction(test_id, sha256)`` says whether this
    content replaces a result already sent. Raises :class:`InputError` when the input cannot
    be read, an ERROR finding not allowed (or a blocking one) refuses it, or (with ``validate_outputs``) an independent
    validator finds a payload invalid.
    """
    if len(data) > settings.max_input_bytes:
        raise UnreadableInput("(file)", f"at most {settings.max_input_bytes} bytes, got {len(data)}", source)
    try:
        session = read_export(data, source, tables.units)
    except InputError as exc:
        raise exc if exc.source else exc.with_source(source) from None
    derived = derive(session, tables)
    sha256 = hashlib.sha256(data).hexdigest()
    outcome = Outcome(
        source=source,
        source_sha256=sha256,
        session=session,
        derived=derived,
        findings=run_checks(session, derived, tables),
    )
    if not routes:
        return outcome
    if now is None:
        raise ValueError("emitting needs the send time (now)")
    refuse_blocked(outcome, settings.blocking, settings.allow)
    correction = is_correction(session.test_id, sha256)
    asked = tuple(dict.fromkeys(routes))  # each route once, in the order asked
    kinds_by_units: dict[UnitSystem, list[OutputKind]] = {}
    for route in asked:
        kinds_by_units.setdefault(route.units, []).append(route.kind)
    made: dict[Route, Payload] = {}
    for units, kinds in kinds_by_units.items():  # what is emitted is built once per unit system
        context = settings.emit.context(now, units, correction)
        for payload in payloads(outcome, tables, context, kinds):
            made[Route(payload.kind, payload.units)] = payload
    built = [made[route] for route in asked]
    if settings.validate_outputs:
        _validate(built, outcome)
    return outcome.model_copy(update={"payloads": tuple(built), "correction": correction})


def _validate(built: Sequence[Payload], outcome: Outcome) -> None:
    """Refuse the input when an independent validator rejects what was built for it."""
    for payload in built:
        found = problems(payload)
        if found:
            what = "FHIR Bundle (fhir.resources R4B)" if payload.kind == "fhir" else "ORU^R01 (hl7apy STRICT)"
            more = f" (+{len(found) - 1} more)" if len(found) > 1 else ""
            raise OutputInvalid("(output)", f"a valid {what}: {found[0]}{more}", outcome.source)
