"""The shipped JSON Schema is the one generated from the models, and the samples follow it."""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import pytest

from bridge.readers.schema import export_schema

ROOT = Path(__file__).resolve().parent.parent
SHIPPED = ROOT / "docs" / "dlco-result-1.schema.json"


def test_shipped_schema_is_current():
    """docs/dlco-result-1.schema.json equals the schema generated from bridge.model."""
    assert export_schema() == json.loads(SHIPPED.read_text())


def test_schema_is_valid_draft_2020_12():
    """The schema itself is a valid JSON Schema (checked by the jsonschema library's metaschema)."""
    # source: JSON Schema draft 2020-12 metaschema, as carried by the jsonschema package
    jsonschema.Draft202012Validator.check_schema(export_schema())


@pytest.mark.parametrize("path", sorted((ROOT / "samples").glob("0*.json")), ids=lambda p: p.name)
def test_samples_follow_the_schema(path):
    """Every sample, the malformed one too (its flaw is a missing offset), is schema-shaped."""
    validator = jsonschema.Draft202012Validator(export_schema())

    assert [] == [e.message for e in validator.iter_errors(json.loads(path.read_text()))]
