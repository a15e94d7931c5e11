"""What was sent, as ``reconcile`` reads it: the ledger of a feed, or an archive through the one pipeline (shell).

Owns :func:`expected_from_ledger` (the resources a FHIR destination was sent, from the ledger's
durable record of each one, the latest per identifier: the one place the ledger is read for
them), :func:`acknowledgements` (what an HL7 v2
destination answered, from the same ledger) and :func:`expected_from_outcomes` (what the
pipeline would send for each session of an archive: the bytes ``convert`` writes). It must not
search a server or classify anything.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from datetime import UTC, datetime

from bridge.errors import InputError
from bridge.model import Outcome
from bridge.reconcile.bundles import expected_from_bundle, parse_bundle
from bridge.reconcile.engine import Expected, Verdict
from bridge.service.ledger import Ledger, OutboxRow

PAGE = 50  # outbox rows (with their payloads, some 50-70 kB each) read at a time


def expected_from_ledger(ledger: Ledger, destination: str, since: float | None) -> Iterator[Expected | Verdict]:
    """Every resource the ledger says ``destination`` (a FHIR one) was sent and acknowledged, the latest
    per identifier, delivered at ``since`` or later; a message whose resources cannot be listed any more
    comes as an ``unchecked`` verdict.

    What was sent is the ledger's durable record of every sent resource (``Ledger.sent_resources``:
    identifier, code, value and unit as sent, status, digest), kept per destination after ``prune``
    removed the payloads. A message delivered before the ledger kept that record (an older ledger)
    is read from its stored Bundle, as long as ``prune`` has left it.
    """
    at = None if since is None else datetime.fromtimestamp(since, UTC)
    recorded: set[str] = set()  # test ids the durable record lists
    names: dict[int, str] = {}  # outbox row -> its message id (what --resend asks the outbox for)
    for sent in ledger.sent_resources(destination, at):
        if sent.kind != "fhir":
            continue
        recorded.add(sent.test_id)
        if sent.message_id not in names:
            row = ledger.get(sent.message_id)
            names[sent.message_id] = row.message_id if row is not None else ""  # "": the row itself was pruned
        yield Expected(destination=destination, kind="fhir", lab=sent.lab, test_id=sent.test_id,
                       resource_type=sent.resource_type, identifier_system=sent.identifier_system,
                       identifier_value=sent.identifier_value, code_system=sent.code_system or "",
                       code=sent.code or "", value=sent.value or "", unit=sent.unit or "", status=sent.status,
                       digest=sent.digest, message_id=names[sent.message_id],
                       sent_at=sent.sent_at.timestamp())  # fmt: skip
    for row in _rows(ledger, destination, since, delivered_only=True):
        if row.test_id in recorded:
            continue
        if not row.payload:
            said = f"delivered {_day(row.delivered_at)}; its payload was pruned, so what it held cannot be listed"
            yield Verdict("unchecked", destination, "Bundle", "outbox message", row.message_id, row.test_id,
                          message_id=row.message_id, detail=said)  # fmt: skip
            continue
        try:
            bundle = parse_bundle(row.payload, f"outbox row {row.id}")
        except ValueError as exc:
            yield Verdict("unchecked", destination, "Bundle", "outbox message", row.message_id, row.test_id,
                          message_id=row.message_id, detail=str(exc))  # fmt: skip
            continue
        yield from expected_from_bundle(
            bundle, destination=destination, test_id=row.test_id, message_id=row.message_id, sent_at=row.delivered_at
        )


def acknowledgements(ledger: Ledger, destination: str, since: float | None) -> Iterator[Verdict]:
    """What an HL7 v2 destination answered to the latest message of each test id: AA, AE, AR or nothing yet."""
    for row in _rows(ledger, destination, since, delivered_only=False):
        yield Verdict(_answered(row), destination, "ORU^R01", "MSH-10", row.message_id, row.test_id,
                      message_id=row.message_id, detail=_ack_detail(row))  # fmt: skip


def expected_from_outcomes(
    results: Iterable[Outcome | InputError], destination: str
) -> Iterator[Expected | InputError]:
    """The resources of each outcome's FHIR payload (an input the pipeline refused comes as its error)."""
    for result in results:
        if isinstance(result, InputError):
            yield result
            continue
        for payload in result.payloads:
            if payload.kind == "fhir":
                bundle = parse_bundle(payload.data, result.source)
                yield from expected_from_bundle(bundle, destination=destination, test_id=result.session.test_id)


def _rows(ledger: Ledger, destination: str, since: float | None, *, delivered_only: bool) -> Iterator[OutboxRow]:
    after = 0
    while True:
        page = ledger.latest_per_test(destination, since=since or 0.0, delivered_only=delivered_only,
                                      after_id=after, limit=PAGE)  # fmt: skip
        yield from page
        if len(page) < PAGE:
            return
        after = page[-1].id


def _answered(row: OutboxRow) -> str:
    """hl7-aa (AA or CA), hl7-ae (AE or CE), hl7-ar (AR or CR) or hl7-never. source: HL7 v2.5.1 table 0008"""
    if row.state == "delivered":
        return "hl7-aa"
    words = row.last_error.split(None, 1) if row.state == "rejected" else []
    code = words[0] if words else ""  # the MLLP transport records "AE <text>" when it dead-letters
    return {"AE": "hl7-ae", "CE": "hl7-ae", "AR": "hl7-ar", "CR": "hl7-ar"}.get(code, "hl7-never")


def _ack_detail(row: OutboxRow) -> str:
    if row.state == "delivered":
        return f"{row.ack_text or 'acknowledged'} ({_day(row.delivered_at)})"
    if row.state == "rejected":
        return f"dead-lettered after {row.attempts} attempt(s): {row.last_error}"
    last = f"; last: {row.last_error}" if row.last_error else ""
    return f"still pending after {row.attempts} attempt(s){last}"


def _day(moment: float | None) -> str:
    return "at an unknown time" if moment is None else datetime.fromtimestamp(moment, UTC).strftime("%Y-%m-%d")
