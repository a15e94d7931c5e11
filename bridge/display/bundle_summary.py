"""A readable summary of a FHIR Bundle (dict in, text out; pure).

Owns: one line per Observation (code, value, unit, flag, lower limit), the report's status and
conclusion, the request of each entry, and the Provenance source. Must not validate or change
the Bundle. Tolerates bundles from elsewhere: missing elements are shown as ``-``.
"""

from __future__ import annotations

from collections import Counter
from typing import Any

from bridge.science.unit_text import for_people


def describe_bundle(bundle: dict[str, Any]) -> str:
    """Summary of a Bundle: counts, Observations, DiagnosticReport, Provenance."""
    entries = [e for e in bundle.get("entry", []) if isinstance(e, dict)]
    resources = [e.get("resource", {}) for e in entries]
    counts = Counter(r.get("resourceType", "?") for r in resources)
    lines = [
        f"Bundle type={bundle.get('type', '-')}  entries={len(entries)}  "
        + "  ".join(f"{kind}={n}" for kind, n in sorted(counts.items())),
    ]
    for entry, resource in zip(entries, resources, strict=True):
        kind = resource.get("resourceType")
        request = entry.get("request", {})
        how = f"{request.get('method', '-')} {request.get('ifNoneExist') or request.get('url', '')}".strip()
        if kind == "Observation":
            lines.append(f"  {_observation(resource)}")
        elif kind == "DiagnosticReport":
            lines.append(f"  DiagnosticReport {_code(resource)} status={resource.get('status', '-')}")
            if resource.get("conclusion"):
                lines.extend(f"    | {line}" for line in str(resource["conclusion"]).splitlines())
        elif kind == "Patient":
            ids = ", ".join(f"{i.get('system')}|{i.get('value')}" for i in resource.get("identifier", []))
            lines.append(f"  Patient {ids}")
        elif kind == "Provenance":
            sources = [e.get("what", {}).get("identifier", {}).get("value", "-") for e in resource.get("entity", [])]
            lines.append(f"  Provenance recorded={resource.get('recorded', '-')} source={', '.join(sources)}")
        else:
            lines.append(f"  {kind}")
        lines.append(f"      request: {how}")
    return "\n".join(lines) + "\n"


def _code(resource: dict[str, Any]) -> str:
    codings = resource.get("code", {}).get("coding", [])
    if not codings:
        return str(resource.get("code", {}).get("text", "-"))
    first = codings[0]
    return f"{first.get('code', '-')} {first.get('display', '')}".strip()


def _observation(resource: dict[str, Any]) -> str:
    quantity = resource.get("valueQuantity", {})
    unit = for_people(str(quantity.get("code", quantity.get("unit", ""))))  # people read the trade's spelling
    value = f"{quantity.get('value', '-')} {unit}".strip()
    absent = [c.get("code") for c in resource.get("dataAbsentReason", {}).get("coding", [])]
    if absent:  # a stated absence (FHIR R4 Observation.dataAbsentReason)
        value = f"no value ({absent[0]})"
    flags = [c.get("code") for i in resource.get("interpretation", []) for c in i.get("coding", [])]
    low = next((r.get("low", {}) for r in resource.get("referenceRange", []) if "low" in r), None)
    parts = [f"{_code(resource):<52}", f"{value:<24}"]
    if flags:
        parts.append(f"flag={'/'.join(str(f) for f in flags)}")
    if low:
        parts.append(f"LLN={low.get('value')}")
    parts.append(f"status={resource.get('status', '-')}")
    return "  ".join(parts)
