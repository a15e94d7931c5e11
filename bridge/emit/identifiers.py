"""The identifiers and code systems of what the bridge emits (pure).

Owns: the stable identifier of each observation and report (lab, test id, quantity key), the
lab's slug in it, and the FHIR ``Coding.system`` of a code (LOINC from ``codes.toml``, local
codes under the site's base URL). Both emitters and the ledger's correction detection rely
on the identifier being the same for the same test on every run.
"""

from __future__ import annotations

import re

from bridge.emit.settings import EmitContext
from bridge.model import Outcome
from bridge.tables import Code, Tables


def lab_slug(name: str) -> str:
    """``Lowmarsh Respiratory Lab (fictional)`` -> ``lowmarsh-respiratory-lab-fictional``."""
    return re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-") or "lab"


def observation_identifier(outcome: Outcome, key: str) -> str:
    """Stable identifier value of one observation: lab + test id + quantity key.

    Test ids are unique per lab only, so the lab is part of it; written as a slug so the
    value needs no escaping in FHIR search URLs.
    """
    return f"{lab_slug(outcome.session.lab.name)}.{outcome.session.test_id}.{key}"


def session_identifier(outcome: Outcome) -> str:
    """The session an outcome came from: the source file's SHA-256, the lab and the test id.

    ``sha256:<hex>/<lab-slug>.<test id>``: a file read through a field map holds many sessions,
    so the file's hash alone does not name one (its Provenance is keyed on this).
    """
    session = outcome.session
    return f"sha256:{outcome.source_sha256}/{lab_slug(session.lab.name)}.{session.test_id}"


def code_system_uri(code: Code, tables: Tables, context: EmitContext) -> str:
    """The FHIR Coding.system of a code: LOINC from codes.toml, local codes from the site."""
    if code.system == "local":
        return context.site.local_system
    return tables.codes.systems[code.system]
