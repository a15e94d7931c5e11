"""What a payload carries, resource by resource, as sent: the ledger's record of it (pure).

Owns :func:`carried`, read from a payload's bytes when the service's ledger records it (a
``convert`` or an audit never needs it): :func:`fhir_carried` (each entry of a transaction
Bundle: its identifier, code, value, unit, status and the SHA-256 of its compact JSON) and
:func:`hl7_carried` (each OBX of an ORU^R01: the identifier of the result it carries, its
code, OBX-5, OBX-6, OBX-11 and the SHA-256 of the segment). The service keeps these per test
id and destination so that a correction knows what it replaces and what it must withdraw, and
reconciliation what to look for, after old payloads are pruned. Read from what was sent, never
rebuilt: the record is what went out.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from decimal import Decimal
from typing import Any

from bridge.emit.fhir_json import Resource, dumps
from bridge.hl7.text import FIELD_SEPARATOR, split_fields, split_segments
from bridge.model import Carried, Payload

_COMPONENT = "^"


def carried(payload: Payload, identifier_system: str) -> tuple[Carried, ...]:
    """What ``payload`` carries, read from its bytes: a Bundle's entries, an ORU^R01's OBX (none for NDJSON).

    ``identifier_system``: the site's identifier system of observations, which an OBX does not name.
    The Bundle is read with its numbers as Decimal, so each resource's compact JSON, and so its
    digest, is the text that was sent (:func:`bridge.emit.fhir_json.dumps` writes a Decimal's digits).
    """
    if payload.kind == "fhir":
        return fhir_carried(json.loads(payload.data, parse_float=Decimal))
    if payload.kind == "hl7":
        return hl7_carried(payload.data.decode("utf-8"), identifier_system, payload.identifiers)
    return ()


def fhir_carried(bundle: Resource) -> tuple[Carried, ...]:
    """One record per entry of a transaction Bundle (values as the Bundle holds them: Decimal digits kept)."""
    return tuple(_resource(entry["resource"]) for entry in bundle["entry"])


def _resource(resource: Resource) -> Carried:
    kind = str(resource["resourceType"])
    digest = hashlib.sha256(dumps(resource, indent=False)).hexdigest()
    if kind == "Provenance":  # no identifier in R4: its session entity (the first) is its key
        identifier = resource["entity"][0]["what"]["identifier"]
        system, value = identifier["system"], identifier["value"]
        return Carried(resource_type=kind, identifier_system=system, identifier_value=value, digest=digest)
    identifier = resource["identifier"][0]
    coding = resource.get("code", {}).get("coding", [{}])[0]
    quantity = resource.get("valueQuantity", {})
    return Carried(
        resource_type=kind,
        identifier_system=identifier["system"],
        identifier_value=identifier["value"],
        code_system=coding.get("system"),
        code=coding.get("code"),
        value=_text(quantity.get("value")),
        unit=quantity.get("code"),
        status=str(resource.get("status", "")),
        digest=digest,
    )


def _text(value: Any) -> str | None:
    if value is None:
        return None
    return str(value) if isinstance(value, Decimal | str) else str(Decimal(str(value)))


def hl7_carried(er7: str, identifier_system: str, identifiers: Sequence[str]) -> tuple[Carried, ...]:
    """One record per OBX of an ORU^R01; ``identifiers``: the result each OBX carries, in OBX order."""
    found = []
    observations = [s for s in split_segments(er7) if s.startswith("OBX" + FIELD_SEPARATOR)]
    if len(observations) != len(identifiers):
        raise ValueError(f"{len(observations)} OBX segments for {len(identifiers)} results")
    for segment, identifier in zip(observations, identifiers, strict=True):
        fields = split_fields(segment)  # fields[n] is OBX-n

        def field(n: int, fields: list[str] = fields) -> str:
            return fields[n] if n < len(fields) else ""

        code = field(3).split(_COMPONENT)
        found.append(
            Carried(
                resource_type="OBX",
                identifier_system=identifier_system,
                identifier_value=identifier,
                code_system=code[2] if len(code) > 2 and code[2] else None,
                code=code[0] or None,
                value=field(5) or None,
                unit=field(6).split(_COMPONENT)[0] or None,
                status=field(11),
                digest=hashlib.sha256(segment.encode("utf-8")).hexdigest(),
            )
        )
    return tuple(found)
