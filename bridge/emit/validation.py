"""Optional run-time validation of what the emitters built, by independent libraries.

Owns: checking a FHIR Bundle with the ``fhir.resources`` R4B models and an ORU^R01 with hl7apy
in STRICT mode, returning the problems as text. The emitters build output with plain dicts and
strings because these libraries cost 100-1,000 times the build (benchmarks/README.md); the test
suite always validates, and ``convert --validate`` does so at run time for an integration
engineer who wants the proof on their own data. ``fhir.resources`` is an optional extra
(``pip install 'dlco-bridge[validate]'``).
"""

from __future__ import annotations

from typing import Any

from bridge.errors import ConfigError
from bridge.model import Payload


def problems(payload: Payload) -> list[str]:
    """What the independent validator finds wrong with one payload (empty when it is valid)."""
    if payload.kind == "fhir":
        return _bundle_problems(payload.data)
    if payload.kind == "ndjson":
        return _resources_problems(payload.data)
    return _oru_problems(payload.data.decode("utf-8"))


def _bundle_problems(data: bytes) -> list[str]:
    try:
        from fhir.resources.R4B.bundle import Bundle
        from pydantic import ValidationError
    except ImportError as exc:
        raise ConfigError("--validate", "the optional extra: pip install 'dlco-bridge[validate]'") from exc
    try:
        Bundle.model_validate_json(data)
    except ValidationError as exc:
        return [f"{'.'.join(str(p) for p in e['loc'])}: {e['msg']}" for e in exc.errors(include_url=False)]
    return []


def _resources_problems(data: bytes) -> list[str]:
    """Each NDJSON line as the ``fhir.resources`` R4B model of its own type."""
    try:
        import orjson
        from fhir.resources.R4B import get_fhir_model_class
        from pydantic import ValidationError
    except ImportError as exc:
        raise ConfigError("--validate", "the optional extra: pip install 'dlco-bridge[validate]'") from exc
    found = []
    for number, line in enumerate(data.splitlines(), start=1):
        kind = orjson.loads(line)["resourceType"]
        try:
            get_fhir_model_class(kind).model_validate_json(line)
        except ValidationError as exc:
            found += [f"line {number} ({kind}): {e['msg']}" for e in exc.errors(include_url=False)]
    return found


def _oru_problems(er7: str) -> list[str]:
    from hl7apy.consts import VALIDATION_LEVEL
    from hl7apy.exceptions import HL7apyException
    from hl7apy.parser import parse_message

    try:
        message: Any = parse_message(er7, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
        message.validate()
    except HL7apyException as exc:
        return [str(exc)]
    return []
