"""The FHIR R4 Provenance of one session: what the bridge made, from which file and session (pure).

Owns the Provenance entry of a transaction Bundle (``bridge.emit.fhir`` places it last): its
targets, the agent (the bridge, as assembler), the entities (the session, its key, then the
source file's SHA-256), and its conditional create keyed on the session.
"""

from __future__ import annotations

from typing import Any

from bridge.emit.fhir_references import full_url, token
from bridge.emit.identifiers import session_identifier
from bridge.emit.notes import BRIDGE_NAME
from bridge.emit.settings import EmitContext
from bridge.model import Outcome

Resource = dict[str, Any]
PARTICIPANT_TYPE = "http://terminology.hl7.org/CodeSystem/provenance-participant-type"


def provenance_entry(outcome: Outcome, context: EmitContext, recorded: str, targets: list[str]) -> Resource:
    """The Provenance of one session: its entries as targets, the source file and the session as entities.

    Keyed on the session (the file's SHA-256 with the lab and test id), not on the file alone: a
    file read through a field map holds many sessions, and each gets its own Provenance naming
    its own resources (FHIR R4 Provenance: ``target`` the resources the activity produced;
    ``entity`` what it used). The file's entity keeps the plain hash, so a search by the file's
    hash finds every session's Provenance.
    """
    file_value = f"sha256:{outcome.source_sha256}"
    session_value = session_identifier(outcome)
    session_system = context.site.session_system
    resource: Resource = {
        "resourceType": "Provenance",
        "target": [{"reference": url} for url in targets],
        "recorded": recorded,
        "agent": [
            {
                "type": {"coding": [{"system": PARTICIPANT_TYPE, "code": "assembler", "display": "Assembler"}]},
                "who": {"type": "Device", "display": BRIDGE_NAME},
            }
        ],
        # The session first: the entity that keys this Provenance (its conditional create, and how
        # reconcile finds it); the file's plain hash second, shared by every session of the file.
        "entity": [
            {
                "role": "source",
                "what": {
                    "identifier": {"system": session_system, "value": session_value},
                    "display": f"{outcome.source}, test {outcome.session.test_id}",
                },
            },
            {
                "role": "source",
                "what": {
                    "identifier": {"system": context.site.source_system, "value": file_value},
                    "display": outcome.source,
                },
            },
        ],
    }
    request = {
        "method": "POST",
        "url": "Provenance",
        "ifNoneExist": "entity:identifier=" + token(session_system, session_value),
    }
    return {"fullUrl": full_url(session_system, session_value), "resource": resource, "request": request}
