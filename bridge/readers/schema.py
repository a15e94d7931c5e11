"""The JSON Schema of ``dlco-result/1``, generated from the canonical models (pure)."""

from __future__ import annotations

from typing import Any

from bridge.model import Session
from bridge.values import record_schema

SCHEMA_ID = "urn:dlco-bridge:schema:dlco-result:1"


def export_schema() -> dict[str, Any]:
    """JSON Schema (draft 2020-12) for one ``dlco-result/1`` document."""
    schema = record_schema(Session)
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["$id"] = SCHEMA_ID
    schema["title"] = (
        "dlco-result/1: one single-breath DLCO test session, with its spirometry and static lung volumes when given"
    )
    return schema
