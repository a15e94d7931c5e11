"""The status each result goes out with, and what a correction withdraws: one decision for both emitters (pure).

Owns :func:`resolve`. A result is sent **preliminary** when the lab marked its value (or a value
it is computed from) preliminary (``Session.lab_status``, HL7 table 0085 P, R, S) or when an
ERROR finding the site allowed questions it; otherwise **corrected** when it replaces a result
the bridge sent before as final, else **final** -- a correction that sends a result for the
first time does not call it corrected. What was sent before comes in through
:attr:`EmitContext.earlier` (the ledger's record, per identifier, of the status last sent); a
correction with no such record (a ledger older than that record) treats every result as
replacing one. A result sent before that this outcome no longer produces (a value the lab
removed, or marked W or D) is **withdrawn**: the emitters send it as FHIR ``entered-in-error``
and HL7 OBX-11 ``D``.

source: FHIR R4 CodeSystem observation-status ("corrected": subsequent to being final, modified
to correct an error; "entered-in-error": withdrawn following previous final release); HL7 v2.5.1
ch. 7, table 0085 (C "replaces a final result", D "deletes the OBX record").
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Literal

from bridge.emit.content import ReportContent, ResultItem
from bridge.emit.identifiers import observation_identifier
from bridge.emit.settings import EmitContext
from bridge.emit.spirometry_items import GROUP_OF
from bridge.model import Outcome
from bridge.science.lab_status import NOT_SENT_CODE, WITHDRAWN_CODE
from bridge.tables import Code, Tables

ItemStatus = Literal["final", "corrected", "preliminary"]
REPORT_KEY = "report"  # the DiagnosticReport's identifier key

# The record paths of the lab's own value each item forwards (when the bridge did not compute it).
_LAB_VALUE = MappingProxyType(
    {
        "dlco": "results.dlco",
        "va": "results.va",
        "kco": "results.kco",
        "dlco_hb_adjusted": "results.dlco_hb_adjusted",
        "tlc": "results.tlc",
        "lab_dlco_predicted": "results.predicted.dlco",
        "lab_kco_predicted": "results.predicted.kco",
        "lab_va_predicted": "results.predicted.va",
        "barometric_pressure": "conditions.barometric_pressure",
        **{
            f"{key}_{phase}": f"spirometry.{phase}.results.{key}"
            for phase in ("pre", "post")
            for key in ("fev1", "fvc", "fev1_fvc", "fef25_75", "pef")
        },
        **{f"lv_{key}": f"lung_volumes.{key}" for key in ("tlc", "frc", "rv", "vc", "rv_tlc", "ic", "erv")},
    }
)
# Values a computed item rests on that are not items of their own (blood values).
_RESTS_ON = MappingProxyType({"dlco_hb_adjusted": ("conditions.hemoglobin",)})
# Statuses as sent, by class (FHIR Observation.status words and HL7 OBX-11 letters).
_SENT_FINAL = frozenset({"final", "corrected", "amended", "F", "C", "U"})
_SENT_WITHDRAWN = frozenset({"entered-in-error", "D", "W"})


@dataclass(frozen=True, slots=True)
class Withdrawn:
    """A result sent before that this outcome no longer produces: its key, code, why, and its test group."""

    key: str
    code: Code
    reason: str
    group: str | None = None  # the test group it was sent in (a ResultGroup's key); None: the DLCO test


@dataclass(frozen=True, slots=True)
class Statuses:
    """The status of each item and of the report, which of them replace a result sent before, what is withdrawn."""

    items: Mapping[str, ItemStatus]
    report: ItemStatus
    replaces: frozenset[str]  # keys (items, "report") that replace a result sent before
    withdrawn: tuple[Withdrawn, ...] = ()

    def of(self, key: str) -> ItemStatus:
        return self.items[key]


def resolve(outcome: Outcome, content: ReportContent, tables: Tables, context: EmitContext) -> Statuses:
    """The statuses of one outcome's items and report in ``context`` (see the module)."""
    preliminary = _preliminary(outcome, content, tables)
    prefix = observation_identifier(outcome, "")
    earlier = {ident.removeprefix(prefix): sent for ident, sent in context.earlier if ident.startswith(prefix)}
    keys = [item.key for item in content.items] + [group.key for group in content.groups] + [REPORT_KEY]
    if not context.correction:
        replaces: frozenset[str] = frozenset()
    elif not earlier:  # no record of what was sent: every result replaces one, as before the record
        replaces = frozenset(keys)
    else:
        replaces = frozenset(key for key in keys if earlier.get(key) in _SENT_FINAL)

    def status(key: str, is_preliminary: bool) -> ItemStatus:
        if is_preliminary:
            return "preliminary"
        return "corrected" if key in replaces else "final"

    items = {item.key: status(item.key, item.key in preliminary) for item in content.items}
    for group in content.groups:  # a panel is preliminary when one of its members is
        members = {item.key for item in content.items if item.group == group.key}
        items[group.key] = status(group.key, bool(members & preliminary))
    return Statuses(
        items=MappingProxyType(items),
        report=status(REPORT_KEY, bool(preliminary)),
        replaces=replaces,
        withdrawn=_withdrawn(outcome, earlier, set(keys), tables),
    )


def _preliminary(outcome: Outcome, content: ReportContent, tables: Tables) -> set[str]:
    """Keys of the items sent preliminary: questioned by an allowed error, or resting on a preliminary value."""
    marked = outcome.session.lab_status
    table = tables.result_status
    found: set[str] = set()
    for item in content.items:
        own = () if item.computed_here else (_LAB_VALUE.get(item.key),)
        paths = (*own, *_RESTS_ON.get(item.key, ()))
        if item.questionable or any(path is not None and table.is_preliminary(marked.get(path)) for path in paths):
            found.add(item.key)
    changed = True
    while changed:  # what is computed from a preliminary value is preliminary too
        changed = False
        for item in content.items:
            if item.key not in found and found.intersection(item.derived_from):
                found.add(item.key)
                changed = True
    return found


def _withdrawn(outcome: Outcome, earlier: dict[str, str], produced: set[str], tables: Tables) -> tuple[Withdrawn, ...]:
    """Results sent before (and not withdrawn since) that this outcome does not produce, in code-table order."""
    gone = {key for key, sent in earlier.items() if key not in produced and sent not in _SENT_WITHDRAWN}
    said = {f.path: f.message for f in outcome.findings if f.code in (WITHDRAWN_CODE, NOT_SENT_CODE)}
    found = []
    for key, code in tables.codes.codes.items():  # a key the code table no longer has cannot be named: skipped
        if key in gone:
            lab = said.get(_LAB_VALUE.get(key, ""))
            reason = f"{lab[0].upper()}{lab[1:]}" if lab else "The corrected record no longer gives this result."
            found.append(Withdrawn(key, code, f"Withdrawn: {reason}", GROUP_OF.get(key)))
    return tuple(found)


@dataclass(frozen=True, slots=True)
class OrderGroup:
    """One order group of an ORU: the DLCO test (``key`` None) or a test group, its items and its withdrawals."""

    key: str | None
    code: Code | None  # the group's code (OBR-4); None: the DLCO panel
    status: ItemStatus  # OBR-25
    items: tuple[ResultItem, ...]
    withdrawn: tuple[Withdrawn, ...]  # OBX-11 D after the items, under the OBR of the group they were sent in

    def obx_keys(self) -> list[str]:
        """The keys of the group's OBX, in message order: the items, then what is withdrawn."""
        return [item.key for item in self.items] + [gone.key for gone in self.withdrawn]


def order_groups(content: ReportContent, statuses: Statuses, tables: Tables) -> tuple[OrderGroup, ...]:
    """The order groups of the report's ORU in message order: the DLCO test, then the test groups.

    A withdrawn result goes under the OBR of its own test group (HL7 v2.5.1 ch. 7: an OBX belongs
    to the OBR above it). A test group the correction no longer has at all still gets its OBR,
    sent as a correction, to carry its withdrawals; its own key is that OBR, never an OBX.
    """
    present = {group.key: group.code for group in content.groups}
    vanished = {gone.group: tables.codes.codes[gone.group] for gone in statuses.withdrawn if gone.group}
    codes = {**vanished, **present}
    order = list(tables.codes.codes)
    found = [OrderGroup(None, None, statuses.report, _members(content, None), _gone(statuses, None))]
    for key in sorted(codes, key=lambda k: order.index(k) if k in order else len(order)):
        status: ItemStatus = statuses.of(key) if key in present else "corrected"
        found.append(OrderGroup(key, codes[key], status, _members(content, key), _gone(statuses, key)))
    return tuple(found)


def _members(content: ReportContent, group: str | None) -> tuple[ResultItem, ...]:
    return tuple(item for item in content.items if item.group == group)


def _gone(statuses: Statuses, group: str | None) -> tuple[Withdrawn, ...]:
    return tuple(gone for gone in statuses.withdrawn if gone.group == group and gone.key != group)
