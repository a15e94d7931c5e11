"""A sent transaction Bundle as expected resources, and the Bundle that heals what a receiver lost (pure).

Owns: reading the resources of a Bundle the bridge built (``emit/fhir.py``) into
:class:`~bridge.reconcile.engine.Expected` values -- Observations and the DiagnosticReport by
identifier, with code, value (its digits as sent), unit and status; the Patient when the Bundle
creates it; the Provenance by its entity's identifier -- and rewriting a Bundle for ``--resend``:
the entries of missing resources keep their conditional create, those of different or
superseded ones become conditional updates on the same search (a conditional create would change
nothing on a server that holds the identifier), and the DiagnosticReport too when one of its
results is resent, so that its ``result`` points at the copies the server holds. Everything else
stays as sent, so references between entries resolve as they did.
source: FHIR R4 http.html#transaction, #cond-update, #ccreate
"""

from __future__ import annotations

import json
from collections.abc import Collection, Mapping
from decimal import Decimal
from typing import Any

from bridge.emit.fhir_json import dumps
from bridge.reconcile.engine import Expected

Key = tuple[str, str, str]  # resource type, identifier system, identifier value


def parse_bundle(payload: bytes, source: str = "payload") -> dict[str, Any]:
    """A transaction Bundle's JSON with every decimal kept as written (7.460 stays 7.460); ValueError if it is none."""
    try:
        document = json.loads(payload, parse_float=Decimal)
    except (ValueError, UnicodeDecodeError) as exc:
        raise ValueError(f"{source}: a FHIR Bundle (JSON): {exc}") from None
    if not isinstance(document, dict) or document.get("resourceType") != "Bundle":
        raise ValueError(f"{source}: a FHIR Bundle (resourceType Bundle)")
    return document


def expected_from_bundle(
    bundle: Mapping[str, Any], *, destination: str, test_id: str, message_id: str = "", sent_at: float | None = None
) -> list[Expected]:
    """The resources of one sent Bundle, in its order; an entry of another kind is not expected."""
    entries = [e for e in bundle.get("entry") or [] if isinstance(e, dict) and isinstance(e.get("resource"), dict)]
    resources = [e["resource"] for e in entries]
    lab = next((_lab(r) for r in resources if _lab(r)), "")
    found = []
    for resource in resources:
        key = entry_key(resource)
        if key is None:
            continue
        kind, system, value = key
        coding = _first_coding(resource) if kind in ("Observation", "DiagnosticReport") else {}
        quantity = resource.get("valueQuantity") if kind == "Observation" else None
        number = quantity.get("value") if isinstance(quantity, dict) else None
        found.append(
            Expected(
                destination=destination, kind="fhir", lab=lab, test_id=test_id, resource_type=kind,
                identifier_system=system, identifier_value=value,
                code_system=str(coding.get("system", "")), code=str(coding.get("code", "")),
                value="" if number is None or isinstance(number, bool) else str(number),
                unit=str(quantity.get("code") or quantity.get("unit") or "") if isinstance(quantity, dict) else "",
                status=str(resource.get("status", "")) if kind != "Patient" else "",
                message_id=message_id, sent_at=sent_at,
            )
        )  # fmt: skip
    return found


def entry_key(resource: Mapping[str, Any]) -> Key | None:
    """(type, system, value) by which reconciliation finds a resource of the Bundle; None if it cannot."""
    kind = str(resource.get("resourceType", ""))
    if kind == "Provenance":
        entities = resource.get("entity") or []
        what = entities[0].get("what") if entities and isinstance(entities[0], dict) else None
        identifier = what.get("identifier") if isinstance(what, dict) else None
    elif kind in ("Observation", "DiagnosticReport", "Patient"):
        identifiers = resource.get("identifier") or []
        identifier = identifiers[0] if identifiers else None
    else:
        return None
    if not isinstance(identifier, dict) or not identifier.get("system") or not identifier.get("value"):
        return None
    return kind, str(identifier["system"]), str(identifier["value"])


def resend_bundle(bundle: Mapping[str, Any], create: Collection[Key], update: Collection[Key]) -> bytes:
    """The Bundle as sent, with ``update``'s entries as conditional updates (and the report, if one of
    its results is resent); ``create``'s entries keep their conditional create. JSON as the emitter writes it."""
    entries = [dict(e) for e in bundle.get("entry") or [] if isinstance(e, dict)]
    keys = [entry_key(e.get("resource") or {}) for e in entries]
    touched = {k for k in keys if k is not None and (k in create or k in update)}
    results_resent = any(k[0] == "Observation" for k in touched)
    for entry, key in zip(entries, keys, strict=True):
        if key is None:
            continue
        if key in update or (key[0] == "DiagnosticReport" and results_resent and key not in create):
            entry["request"] = _conditional_update(entry, key[0])
    return dumps({**bundle, "entry": entries}, indent=True)


def _conditional_update(entry: Mapping[str, Any], kind: str) -> dict[str, Any]:
    request = entry.get("request") or {}
    if request.get("method") == "PUT":
        return dict(request)  # a correction's entry is a conditional update already
    search = request.get("ifNoneExist")
    if not search:
        raise ValueError(f"{kind} entry without ifNoneExist: no search to update by")
    return {"method": "PUT", "url": f"{kind}?{search}"}


def _first_coding(resource: Mapping[str, Any]) -> Mapping[str, Any]:
    code = resource.get("code")
    codings = code.get("coding") if isinstance(code, dict) else None
    first = codings[0] if isinstance(codings, list) and codings else None
    return first if isinstance(first, dict) else {}


def _lab(resource: Mapping[str, Any]) -> str:
    performers = resource.get("performer")
    first = performers[0] if isinstance(performers, list) and performers else None
    return str(first.get("display", "")) if isinstance(first, dict) else ""
