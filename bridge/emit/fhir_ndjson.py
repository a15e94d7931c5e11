"""FHIR R4 NDJSON for bulk loads: the resources of many outcomes, one file per resource type.

Owns: turning each outcome's transaction Bundle (:func:`bridge.emit.fhir.to_bundle`) into
plain resources a bulk load takes: each with ``id`` = its deterministic UUID, references as
``Type/id`` instead of ``urn:uuid:``, a conditional patient reference replaced by a logical
one, and a Patient shared by several outcomes written once. :func:`ndjson_lines` is the
``ndjson`` output route of one outcome (``bridge.emit.outputs``: the audit's hand-over goes
through the pipeline's gate like every other output); :func:`to_ndjson` groups many. Pure.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import orjson

from bridge.emit.content import ReportContent
from bridge.emit.fhir import patient_by_identifier, to_bundle
from bridge.emit.fhir_json import Resource, dumps
from bridge.emit.settings import EmitContext
from bridge.emit.status import Statuses
from bridge.model import Outcome
from bridge.tables import Tables


def ndjson_lines(
    outcome: Outcome,
    tables: Tables,
    context: EmitContext,
    content: ReportContent | None = None,
    statuses: Statuses | None = None,
) -> bytes:
    """The resources of one outcome, one JSON object per line in the Bundle's order (each names its type).

    Each resource gets ``id`` = its deterministic UUID and references ``Type/id`` instead of
    ``urn:uuid:``. Without a Patient entry (``patient_reference`` "identifier") the subject is a
    logical reference by the patient's identifier: a bulk load has no transaction to resolve a
    conditional reference in.
    """
    bundle = to_bundle(outcome, tables, context, content, statuses)
    local = {e["fullUrl"]: f"{e['resource']['resourceType']}/{_uuid_of(e)}" for e in bundle["entry"]}
    patient = outcome.session.patient
    logical = _Logical(
        patient_by_identifier(patient),
        {"type": "Patient", "identifier": {"system": patient.id_system, "value": patient.id}},
    )
    rows = []
    for entry in bundle["entry"]:
        resource = _rewrite_references(entry["resource"], local, logical)
        resource = {"resourceType": resource["resourceType"], "id": _uuid_of(entry), **_without_type(resource)}
        rows.append(dumps(resource, indent=False) + b"\n")
    return b"".join(rows)


def resource_key(line: bytes) -> tuple[str, str]:
    """(resource type, id) of one NDJSON line."""
    resource = orjson.loads(line)
    return str(resource["resourceType"]), str(resource["id"])


def to_ndjson(outcomes: Iterable[Outcome], tables: Tables, context: EmitContext) -> dict[str, bytes]:
    """Resources of many outcomes as NDJSON per resource type, for bulk loads (no transaction).

    The lines of :func:`ndjson_lines`, grouped by resource type; a resource shared by several
    outcomes (a Patient) is written once.
    """
    lines: dict[str, list[bytes]] = {}
    seen: set[tuple[str, str]] = set()
    for outcome in outcomes:
        for line in ndjson_lines(outcome, tables, context).splitlines():
            key = resource_key(line)
            if key not in seen:
                seen.add(key)
                lines.setdefault(key[0], []).append(line)
    return {kind: b"\n".join(rows) + b"\n" for kind, rows in sorted(lines.items())}


@dataclass(frozen=True, slots=True)
class _Logical:
    """A conditional reference and the logical reference that replaces it outside a transaction."""

    conditional: str
    reference: Resource


def _rewrite_references(node: Any, local: Mapping[str, str], logical: _Logical) -> Any:
    if isinstance(node, dict):
        if node.get("reference") == logical.conditional:
            return dict(logical.reference)
        return {
            key: (local.get(value, value) if key == "reference" else _rewrite_references(value, local, logical))
            for key, value in node.items()
        }
    if isinstance(node, list):
        return [_rewrite_references(item, local, logical) for item in node]
    return node


def _without_type(resource: Resource) -> Resource:
    return {key: value for key, value in resource.items() if key != "resourceType"}


def _uuid_of(entry: Resource) -> str:
    return str(entry["fullUrl"]).removeprefix("urn:uuid:")
