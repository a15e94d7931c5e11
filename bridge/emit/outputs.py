"""The payloads one outcome becomes, per output kind, and the blocking-finding gate (pure).

Owns: ``fhir`` -> transaction Bundle JSON, ``hl7`` -> ORU^R01 ER7 (CR-separated),
``ndjson`` -> the resources of the Bundle one per line (the audit's bulk hand-over), their
stable message ids and file stems, and refusing an outcome that carries an ERROR finding the
site did not allow, or a finding it marks as blocking. Called only by ``bridge.pipeline``.
"""

from __future__ import annotations

import re
from collections.abc import Collection, Sequence

from bridge.emit.fhir import to_bundle
from bridge.emit.fhir_json import dumps, require_aware
from bridge.emit.fhir_ndjson import ndjson_lines
from bridge.emit.hl7v2 import control_id, to_oru
from bridge.emit.identifiers import observation_identifier
from bridge.emit.observations import build_content
from bridge.emit.settings import EmitContext
from bridge.emit.status import order_groups, resolve
from bridge.errors import BlockedByFinding, MissingField
from bridge.model import Outcome, OutputKind, Payload, Severity
from bridge.tables import Tables

FHIR_JSON = "application/fhir+json"
HL7_V2_ER7 = "x-application/hl7-v2+er7"
FHIR_NDJSON = "application/fhir+ndjson"
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")


def file_stem(test_id: str) -> str:
    """A test id made safe as a file name (no path separators, no leading dot)."""
    return _UNSAFE.sub("_", test_id).lstrip(".") or "_"


def blocked_because(code: str, severity: Severity, blocking: Collection[str] = (), allow: Collection[str] = ()) -> str:
    """Why a finding of this code and severity keeps its record from being emitted ("" when it does not).

    The one rule of the gate: an ERROR finding not in ``allow``, or any finding in ``blocking``.
    The audit applies it to its findings across records too.
    """
    if code in blocking:
        return "is configured as blocking"
    if severity is Severity.ERROR and code not in allow:
        return f"is an error finding (send it anyway, marked preliminary, with --allow {code})"
    return ""


def refuse_blocked(outcome: Outcome, blocking: Collection[str] = (), allow: Collection[str] = ()) -> None:
    """Raise BlockedByFinding when the outcome carries an ERROR finding not in ``allow``, or a finding in ``blocking``.

    Known-wrong values never leave as final: an allowed ERROR goes out with its finding and a
    preliminary status (``build_content``); any other ERROR keeps the record from being emitted.
    """
    for finding in outcome.findings:
        why = blocked_because(finding.code, finding.severity, blocking, allow)
        if why:
            raise BlockedByFinding(
                finding.path,
                f"not emitted: {finding.code} {why} ({finding.message})",
                outcome.source,
                code=finding.code,
            )


def payloads(
    outcome: Outcome, tables: Tables, context: EmitContext, kinds: Sequence[OutputKind]
) -> tuple[Payload, ...]:
    """Every requested payload of one outcome (what each carries: ``bridge.emit.manifest.carried``).

    What is emitted (:func:`build_content`) and the status of each result (:func:`resolve`)
    are built once and rendered by each emitter.
    """
    if not kinds:
        return ()
    built = []
    content = build_content(
        outcome, tables, context.units, context.site.hemoglobin_unit, context.site.charted_predicted
    )
    if not content.items:
        # An ORU^R01 needs at least one OBX, and a report of nothing is no report.
        raise MissingField("results", "at least one result or condition to send (dlco, va, kco, ...)", outcome.source)
    statuses = resolve(outcome, content, tables, context)
    for kind in kinds:
        if kind == "ndjson":
            require_aware(context.now)
            data = ndjson_lines(outcome, tables, context, content, statuses)
            stem = file_stem(outcome.session.test_id)
            built.append(Payload(kind=kind, units=context.units, message_id=stem, content_type=FHIR_NDJSON, data=data))
        elif kind == "fhir":
            require_aware(context.now)  # as bundle_json: the time is checked before anything is built
            data = dumps(to_bundle(outcome, tables, context, content, statuses), indent=False)  # compact, as sent
            stem = file_stem(outcome.session.test_id)
            built.append(Payload(kind="fhir", units=context.units, message_id=stem, content_type=FHIR_JSON, data=data))
        else:
            er7 = to_oru(outcome, tables, context, content, statuses)
            keys = [key for group in order_groups(content, statuses, tables) for key in group.obx_keys()]  # OBX order
            prefix = observation_identifier(outcome, "")  # lab slug and test id, once
            built.append(
                Payload(
                    kind="hl7",
                    units=context.units,
                    message_id=control_id(outcome, context),
                    content_type=HL7_V2_ER7,
                    data=er7.encode(),
                    identifiers=tuple(prefix + key for key in keys),
                )
            )
    return tuple(built)
