"""What was sent against what the receiver holds: one verdict per expected resource (pure).

Owns: the expected resource (:class:`ExpectedResource`, the shape of what the ledger records
of a sent resource; :class:`Expected` is its plain value), what a held copy says (:class:`Held`,
read from the server's JSON by :func:`held_of`), the classes a verdict may have (``CLASSES``)
and the one decision (:func:`classify`):

* **present** -- one copy, and its code, value, unit and status are those sent;
* **missing** -- no copy with the identifier;
* **duplicated** -- more than one copy (a person resolves it: a conditional write would fail);
* **withdrawn** -- the one copy is ``entered-in-error``;
* **superseded** -- a correction was sent (status ``corrected``) and the copy holds other
  content under another status: the content from before the correction;
* **different** -- the one copy differs in code, value, unit or status;
* **unexpected** -- held under the bridge's identifier system, explained by nothing sent;
* **unchecked** -- sent, but what was sent can no longer be listed (its payload was pruned);
* **hl7-aa**, **hl7-ae**, **hl7-ar**, **hl7-never** -- an HL7 v2 message, which no receiver can
  be asked about: what its ACK said, or that none came.

Values are compared at the precision sent: the held value is rounded (half to even) to the
decimals of the value as sent, then compared, so a server that keeps 29.39 as the float
29.390000000000001 holds 29.39, and one that holds 29.4 does not. It must not do I/O: the
shell searches the server and hands the held resources in.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from decimal import ROUND_HALF_EVEN, Decimal, InvalidOperation
from types import MappingProxyType
from typing import Any, Protocol

CLASSES = (
    "present", "missing", "different", "duplicated", "superseded", "withdrawn", "unexpected", "unchecked",
    "hl7-aa", "hl7-ae", "hl7-ar", "hl7-never",
)  # fmt: skip
LABELS = MappingProxyType(
    {
        "present": "present and equal",
        "missing": "missing",
        "different": "different",
        "duplicated": "duplicated",
        "superseded": "superseded (holds the content from before a correction)",
        "withdrawn": "withdrawn (entered-in-error)",
        "unexpected": "unexpected (under the bridge's identifier system, never sent)",
        "unchecked": "not checked (what was sent was pruned from the ledger)",
        "hl7-aa": "HL7 v2: acknowledged AA",
        "hl7-ae": "HL7 v2: answered AE (application error)",
        "hl7-ar": "HL7 v2: answered AR (rejected)",
        "hl7-never": "HL7 v2: never acknowledged",
    }
)
FINE = frozenset({"present", "hl7-aa"})  # every other class is a gap: the receiver is not proven complete
# source: FHIR R4 ValueSet observation-status and diagnostic-report-status ("entered-in-error", "corrected")
ENTERED_IN_ERROR = "entered-in-error"
CORRECTED = "corrected"


class ExpectedResource(Protocol):
    """What the engine needs of one sent resource (the ledger's record of it has these fields)."""

    @property
    def destination(self) -> str: ...
    @property
    def lab(self) -> str: ...
    @property
    def test_id(self) -> str: ...
    @property
    def resource_type(self) -> str: ...
    @property
    def identifier_system(self) -> str: ...
    @property
    def identifier_value(self) -> str: ...
    @property
    def code_system(self) -> str: ...
    @property
    def code(self) -> str: ...
    @property
    def value(self) -> str: ...
    @property
    def unit(self) -> str: ...
    @property
    def status(self) -> str: ...
    @property
    def message_id(self) -> str: ...


@dataclass(frozen=True, slots=True)
class Expected:
    """One resource as it was sent (or would be sent): its identifier and what a copy must say.

    ``value`` is the number's text as sent ("" for a resource without one); ``kind`` is "fhir"
    or "hl7"; ``digest`` the SHA-256 of the resource as sent; ``sent_at`` seconds since the epoch
    (None: not sent yet, the migration form).
    """

    destination: str
    kind: str
    lab: str
    test_id: str
    resource_type: str
    identifier_system: str
    identifier_value: str
    code_system: str = ""
    code: str = ""
    value: str = ""
    unit: str = ""
    status: str = ""
    digest: str = ""
    message_id: str = ""
    sent_at: float | None = None


@dataclass(frozen=True, slots=True)
class Held:
    """What one resource on the server says, as far as reconciliation looks.

    ``identifiers`` are (system, value) pairs: ``identifier`` of an Observation, DiagnosticReport
    or Patient, ``entity.what.identifier`` of a Provenance. ``value`` is the number's text.
    """

    resource_type: str
    id: str
    identifiers: tuple[tuple[str, str], ...] = ()
    status: str = ""
    codings: tuple[tuple[str, str], ...] = ()
    value: str | None = None
    unit: str = ""


@dataclass(frozen=True, slots=True)
class Verdict:
    """The class of one expected (or unexpected) resource, the server's ids of its copies, and why."""

    verdict: str
    destination: str
    resource_type: str
    identifier_system: str
    identifier_value: str
    test_id: str = ""
    lab: str = ""
    message_id: str = ""
    held_ids: tuple[str, ...] = ()
    detail: str = ""

    @property
    def gap(self) -> bool:
        return self.verdict not in FINE


@dataclass(slots=True)
class Tally:
    """Verdicts counted by class."""

    counts: dict[str, int] = field(default_factory=dict)

    def add(self, verdict: Verdict) -> None:
        self.counts[verdict.verdict] = self.counts.get(verdict.verdict, 0) + 1

    @property
    def gaps(self) -> int:
        return sum(n for name, n in self.counts.items() if name not in FINE)

    @property
    def total(self) -> int:
        return sum(self.counts.values())

    def as_dict(self) -> dict[str, int]:
        """Every class with at least one verdict, in the order of ``CLASSES``."""
        return {name: self.counts[name] for name in CLASSES if self.counts.get(name)}


def classify(expected: ExpectedResource, held: Sequence[Held]) -> Verdict:
    """The verdict on one expected resource given every copy the server holds under its identifier."""
    ids = tuple(f"{h.resource_type}/{h.id}" for h in held)
    if not held:
        return _verdict("missing", expected, ids, "no resource with this identifier")
    if len(held) > 1:
        return _verdict("duplicated", expected, ids, f"{len(held)} resources with this identifier")
    copy = held[0]
    if copy.status == ENTERED_IN_ERROR:
        return _verdict("withdrawn", expected, ids, f"status {ENTERED_IN_ERROR} on the server")
    found = differences(expected, copy)
    if not found:
        return _verdict("present", expected, ids, "")
    if expected.status == CORRECTED and copy.status != CORRECTED:
        return _verdict("superseded", expected, ids, "; ".join(found))
    return _verdict("different", expected, ids, "; ".join(found))


def unexpected(copy: Held, system: str, destination: str) -> Verdict:
    """A held resource under ``system`` that nothing sent explains."""
    value = next((v for s, v in copy.identifiers if s == system), "")
    return Verdict("unexpected", destination, copy.resource_type, system, value,
                   held_ids=(f"{copy.resource_type}/{copy.id}",), detail="held, never sent")  # fmt: skip


def differences(expected: ExpectedResource, copy: Held) -> list[str]:
    """What the copy says otherwise than sent: code, value (at the precision sent), unit, status."""
    found = []
    if expected.code and (expected.code_system, expected.code) not in copy.codings:
        held = ", ".join(f"{s}|{c}" for s, c in copy.codings) or "none"
        found.append(f"code: sent {expected.code_system}|{expected.code}, held {held}")
    if expected.value:
        if copy.value is None:
            found.append(f"value: sent {expected.value}, held none")
        elif not same_value(expected.value, copy.value):
            found.append(f"value: sent {expected.value}, held {copy.value}")
    if expected.unit and expected.unit != copy.unit:
        found.append(f"unit: sent {expected.unit}, held {copy.unit or 'none'}")
    if expected.status and expected.status != copy.status:
        found.append(f"status: sent {expected.status}, held {copy.status or 'none'}")
    return found


def same_value(sent: str, held: str) -> bool:
    """Whether ``held`` rounded to the decimals of ``sent`` (half to even) is ``sent``."""
    try:
        target, number = Decimal(sent), Decimal(held)
        if not (target.is_finite() and number.is_finite()):
            return False
        return number.quantize(target, rounding=ROUND_HALF_EVEN) == target
    except InvalidOperation:  # not numbers, or too many digits to round
        return False


def held_of(resource: Mapping[str, Any]) -> Held:
    """What a server's resource says (tolerant: a missing or odd element reads as absent)."""
    kind = str(resource.get("resourceType", ""))
    if kind == "Provenance":
        whats = (_dict(_dict(entity).get("what")).get("identifier") for entity in _list(resource.get("entity")))
        identifiers = tuple(_pair(identifier) for identifier in whats if isinstance(identifier, dict))
    else:
        identifiers = tuple(_pair(i) for i in _list(resource.get("identifier")) if isinstance(i, dict))
    quantity = resource.get("valueQuantity")
    value = unit = None
    if isinstance(quantity, dict):
        value = _number_text(quantity.get("value"))
        unit = quantity.get("code") or quantity.get("unit")
    codings = tuple(_pair(c, "code") for c in _list(_dict(resource.get("code")).get("coding")) if isinstance(c, dict))
    return Held(kind, str(resource.get("id", "")), identifiers, str(resource.get("status", "")), codings, value,
                str(unit or ""))  # fmt: skip


def _verdict(name: str, expected: ExpectedResource, ids: tuple[str, ...], detail: str) -> Verdict:
    return Verdict(
        name, expected.destination, expected.resource_type, expected.identifier_system, expected.identifier_value,
        expected.test_id, expected.lab, expected.message_id, ids, detail,
    )  # fmt: skip


def _pair(item: Mapping[str, Any], key: str = "value") -> tuple[str, str]:
    return str(item.get("system", "")), str(item.get(key, ""))


def _dict(value: Any) -> Mapping[str, Any]:
    return value if isinstance(value, dict) else {}


def _list(value: Any) -> list[Any]:
    return value if isinstance(value, list) else []


def _number_text(value: Any) -> str | None:
    """A JSON number as text: a float by its shortest repr, a Decimal by its digits; anything else is absent."""
    if isinstance(value, bool) or not isinstance(value, int | float | Decimal):
        return None
    return repr(value) if isinstance(value, float) else str(value)
