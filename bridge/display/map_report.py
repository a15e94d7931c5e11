"""What ``dlco-bridge map check`` prints: a sample read through a field map, for the engineer writing it (pure).

Owns: the report of one sample: for the first few records, each source column or code beside
the canonical field it fed and the value in the canonical unit (a wrong unit or a shifted column
shows at a glance; a field built from several columns shows the text they make together); the
source columns or codes nothing uses; the canonical fields that stay empty in every record; each
bad record's one line; the findings; and what ``convert`` would do with each record (sent,
refused by the gate, unreadable), taken from the pipeline's own decision, with the verdict
(:func:`passes`) that sets the exit status. Text and JSON.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, is_dataclass
from typing import Any

from bridge.errors import BlockedByFinding, InputError
from bridge.model import Outcome, Quantity, Session
from bridge.readers.mapped import Cell, MappedRecord
from bridge.science.unit_text import for_people
from bridge.tables.canonical_fields import MANOEUVRES, canonical_fields
from bridge.tables.field_map_model import FieldMap
from bridge.values import compact_json, plain

SHOWN_RECORDS = 3  # records shown field by field; the rest are counted
# What convert would do with a record, as the pipeline decided it.
SENT, GATE, UNREADABLE, NOT_READ = "sent", "refused by the gate", "unreadable", "not read"


@dataclass(frozen=True, slots=True)
class MapCheck:
    """A sample read through a map: each record with its pipeline results.

    ``records`` pairs each record with the pipeline's result without outputs (as ``check``: the
    session's values and every finding); ``decisions`` holds, per record, the pipeline's result
    with the outputs ``convert`` would write (an outcome: sent; an error: refused), or None where
    the map's ``on_bad_record = "refuse"`` stopped the file before the record.
    """

    fmap: FieldMap
    sample: str
    records: tuple[tuple[MappedRecord, Outcome | InputError], ...]
    decisions: tuple[Outcome | InputError | None, ...]


def decision(result: Outcome | InputError | None) -> str:
    """What convert does with a record: sent, refused by the gate (a finding keeps it back), unreadable, not read."""
    if result is None:
        return NOT_READ
    if isinstance(result, Outcome):
        return SENT
    return GATE if isinstance(result, BlockedByFinding) else UNREADABLE


def counts(check: MapCheck) -> dict[str, int]:
    """How many records convert would send, refuse by the gate, find unreadable, or not read."""
    decided = [decision(d) for d in check.decisions]
    return {kind: decided.count(kind) for kind in (SENT, GATE, UNREADABLE, NOT_READ)}


def passes(check: MapCheck) -> bool:
    """The sample shows a working map: every record readable and at least one that convert would send.

    A record refused by the gate for its own findings does not fail the map; every record refused does
    (a wrong unit or a shifted column makes every record an error finding).
    """
    found = counts(check)
    return found[SENT] > 0 and found[UNREADABLE] == 0 and found[NOT_READ] == 0


def value_at(session: Session, path: str, manoeuvre: int | None) -> Any:
    """The value of a canonical field in a (normalised) session, or None."""
    node: Any = session
    parts = path.split(".")
    for at, part in enumerate(parts):
        node = getattr(node, part, None)
        if isinstance(node, tuple) and at < len(parts) - 1:  # a list of manoeuvres: the one numbered
            node = node[manoeuvre] if manoeuvre is not None and manoeuvre < len(node) else None
        if node is None:
            return None
    return node


def _shown(value: Any, people: bool) -> str:
    if value is None:
        return "(empty)"
    if isinstance(value, Quantity):  # UCUM for machines (--json), the trade's spelling for people
        return f"{value.text()} {for_people(value.unit) if people else value.unit}"
    if is_dataclass(value):
        return compact_json(value)
    return str(value.value if hasattr(value, "value") and not isinstance(value, float | int) else value)


def _row(cell: Cell, session: Session | None, people: bool) -> dict[str, str]:
    target = cell.source.target.path
    field = target if cell.manoeuvre is None else target.replace(MANOEUVRES, f"{MANOEUVRES}[{cell.manoeuvre}]", 1)
    written = cell.text + (f" [{cell.unit}]" if cell.unit and cell.source.target.kind == "quantity" else "")
    value = value_at(session, target, cell.manoeuvre) if session is not None else None
    return {"source": cell.source.origin, "written": written, "field": field, "value": _shown(value, people)}


def _empty_fields(check: MapCheck) -> list[str]:
    """Canonical fields no record filled (the map has no source for them, or every source was empty)."""
    sessions = [r.session for _, r in check.records if isinstance(r, Outcome)]
    empty = []
    for path, target in canonical_fields().items():
        if target.item_of is not None:
            counts = [(s, len(value_at(s, target.item_of, None) or ())) for s in sessions]
            filled = any(value_at(s, path, i) is not None for s, count in counts for i in range(count))
        else:
            filled = any(value_at(s, path, None) is not None for s in sessions)
        if not filled:
            empty.append(path)
    return empty


def _unused(check: MapCheck) -> list[str]:
    seen: dict[str, None] = {}
    for record, _ in check.records:
        for item in (*record.unused, *record.unmapped):
            seen.setdefault(item.split(", ", 1)[-1], None)
    return list(seen)


def map_check_json(check: MapCheck, people: bool = False) -> dict[str, object]:
    """The report as a JSON-ready tree (units in UCUM; ``people``: as the trade spells them, for the text)."""
    records = []
    for (record, result), decided in zip(check.records, check.decisions, strict=True):
        entry: dict[str, object] = {"where": record.where, "decision": decision(decided)}
        if isinstance(result, InputError):
            entry["error"] = result.line()
        else:
            entry["test_id"] = result.session.test_id
            entry["fields"] = [_row(c, result.session, people) for c in record.cells]
            entry["findings"] = [plain(f, "json") for f in result.findings]
            if isinstance(decided, InputError):
                entry["refused"] = decided.line()
        records.append(entry)
    found = counts(check)
    return {
        "map": check.fmap.name,
        "source": check.fmap.source,
        "format": check.fmap.format,
        "sample": check.sample,
        "records": records,
        "sent": found[SENT],
        "refused_by_gate": found[GATE],
        "unreadable": found[UNREADABLE],
        "not_read": found[NOT_READ],
        "passed": passes(check),
        "unused_sources": _unused(check),
        "empty_fields": _empty_fields(check),
    }


def map_check_text(check: MapCheck, shown: int = SHOWN_RECORDS) -> str:
    """The report for people: the first ``shown`` records field by field, then the summary."""
    doc = map_check_json(check, people=True)
    lines = [f"map {check.fmap.name} ({check.fmap.format}): {check.fmap.source}", f"sample {check.sample}", ""]
    for entry in _records(doc)[:shown]:
        if "error" in entry:
            lines += [f"{entry['where']}: REFUSED  {entry['error']}", ""]
            continue
        lines.append(f"{entry['where']}: test {entry['test_id']}")
        rows: Sequence[dict[str, str]] = entry["fields"]
        widths = [max([len(r[k]) for r in rows] + [len(k)]) for k in ("source", "written", "field")]
        for r in rows:
            source, written, field = r["source"], r["written"], r["field"]
            lines.append(f"  {source:<{widths[0]}}  {written:<{widths[1]}}  -> {field:<{widths[2]}}  = {r['value']}")
        for finding in entry["findings"]:
            lines.append(f"  {finding['severity'].upper()} {finding['code']}: {finding['message']}")
        lines.append(f"  convert: {entry['decision']}" + (f"  {entry['refused']}" if "refused" in entry else ""))
        lines.append("")
    rest = _records(doc)[shown:]
    if rest:
        lines.append(f"... {len(rest)} more record(s) not shown field by field")
        lines += [f"{e['where']}: REFUSED  {e['error']}" for e in rest if "error" in e]
        lines += [f"{e['where']}: {e['decision'].upper()}  {e['refused']}" for e in rest if "refused" in e]
        lines.append("")
    lines.append(_summary(doc))
    unused = doc["unused_sources"]
    lines.append("unused in the sample: " + (", ".join(unused) if isinstance(unused, list) and unused else "none"))
    empty = doc["empty_fields"]
    lines.append("canonical fields left empty: " + (", ".join(empty) if isinstance(empty, list) and empty else "none"))
    return "\n".join(lines) + "\n"


def _summary(doc: dict[str, object]) -> str:
    """What convert would do with the sample's records, and whether that shows a working map."""
    said = f"convert would send {doc['sent']} record(s); {doc['refused_by_gate']} refused by the gate"
    said += f", {doc['unreadable']} unreadable" + (f", {doc['not_read']} not read" if doc["not_read"] else "")
    if doc["passed"]:
        return said
    if not doc["sent"]:
        return said + "\nNO RECORD WOULD BE SENT: check each field's column and unit above"
    if doc["unreadable"]:
        return said + "\nA RECORD IS UNREADABLE: its line above names the row and column or code"
    return said + '\nTHE FILE IS REFUSED at its first refused record (on_bad_record = "refuse")'


def _records(doc: dict[str, object]) -> list[dict[str, Any]]:
    records = doc["records"]
    assert isinstance(records, list)
    return records
