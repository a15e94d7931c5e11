"""Bulk NDJSON of the clean sessions validates against the official FHIR R4 JSON schema."""

from __future__ import annotations

from pathlib import Path

import orjson

from tests.fhir_schema import errors, shared_validators

EVERY = 7  # every 7th line of each file (and the last) is checked: the whole planted set takes minutes


def test_every_sampled_ndjson_line_is_a_valid_r4_resource(report: Path):
    """Each resource line checked is valid against the official R4 schema for its type, and named after its file."""
    validators = shared_validators()
    problems = []
    checked = 0
    for path in sorted((report / "ndjson").glob("*.ndjson")):
        lines = path.read_bytes().splitlines()
        for i in sorted({*range(0, len(lines), EVERY), len(lines) - 1}):
            resource = orjson.loads(lines[i])
            checked += 1
            if resource["resourceType"] != path.stem:
                problems.append(f"{path.name}:{i + 1}: a {resource['resourceType']}")
            problems += [f"{path.name}:{i + 1}: {e}" for e in errors(validators[path.stem], resource)]

    assert ([], True) == (problems[:5], checked > 1000)
