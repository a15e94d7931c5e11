"""One reconciliation, destination by destination, and ``--resend`` (shell).

Owns the order of the work: every expected resource once (a Patient or a Provenance that several
Bundles share is looked for once; a scratch SQLite file remembers what was expected, so memory
stays flat however large the feed or archive), searched in batches through
:class:`~bridge.reconcile.client.SearchClient`, each verdict handed to the sink (the report) as it
comes; then, where asked, everything held under the bridge's identifier systems that nothing sent
explains (``unexpected``). ``resend`` queues the healing Bundles in the outbox (the service
delivers them). It must not parse settings, print, or write the report's files.
"""

from __future__ import annotations

import hashlib
import sqlite3
import tempfile
from collections.abc import Callable, Collection, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path

from bridge.errors import InputError
from bridge.reconcile.bundles import Key, parse_bundle, resend_bundle
from bridge.reconcile.client import SearchClient
from bridge.reconcile.engine import ExpectedResource, Tally, Verdict, unexpected
from bridge.reconcile.search import batches
from bridge.service.ledger import Ledger, NewMessage

Sink = Callable[[Verdict], None]
SCANNED = ("Observation", "DiagnosticReport")  # the resources under the bridge's observation identifier system
HEALED = {"missing": "create", "different": "update", "superseded": "update"}  # what --resend does per class
RESEND_SUFFIX = ".resend"


@dataclass(slots=True)
class Checked:
    """What the check of one destination found; ``unexpected`` says whether that was looked for, and if not why."""

    name: str
    kind: str  # fhir, hl7, or file (nothing to ask)
    address: str
    tally: Tally = field(default_factory=Tally)
    unexpected: str = ""
    searches: int = 0
    waits: int = 0
    refused_inputs: int = 0


@dataclass(slots=True)
class Gaps:
    """The gaps --resend may heal, by outbox message: (type, system, value) -> class."""

    by_message: dict[str, dict[Key, str]] = field(default_factory=dict)

    def note(self, verdict: Verdict) -> None:
        if verdict.verdict in (*HEALED, "duplicated") and verdict.message_id:
            key = (verdict.resource_type, verdict.identifier_system, verdict.identifier_value)
            self.by_message.setdefault(verdict.message_id, {})[key] = verdict.verdict


@dataclass(slots=True)
class Resent:
    """What --resend did: messages queued (new), made pending again, already pending, and left alone."""

    queued: int = 0
    requeued: int = 0
    pending: int = 0
    duplicated: list[str] = field(default_factory=list)  # message ids not resent: a duplicated identifier
    pruned: list[str] = field(default_factory=list)  # message ids whose payload is gone


def check_fhir(
    checked: Checked,
    expected: Iterable[ExpectedResource | Verdict | InputError],
    client: SearchClient,
    sink: Sink,
    *,
    systems: Collection[str],
    scan: str,
) -> Checked:
    """Check one FHIR destination; ``scan`` "" looks for unexpected resources under ``systems`` (and the
    systems of what was expected), otherwise it says why not."""

    def tell(verdict: Verdict) -> None:
        checked.tally.add(verdict)
        sink(verdict)

    with tempfile.TemporaryDirectory(prefix="dlco-bridge-reconcile-") as scratch, _Seen(Path(scratch)) as seen:
        found_systems = set(systems)

        def fresh() -> Iterator[ExpectedResource]:
            for item in expected:
                if isinstance(item, Verdict):
                    tell(item)
                elif isinstance(item, InputError):
                    checked.refused_inputs += 1
                elif seen.first(item):
                    if item.resource_type in SCANNED:
                        found_systems.add(item.identifier_system)
                    yield item

        for verdicts in client.judged(batches(fresh())):
            for verdict in verdicts:
                tell(verdict)
        if not scan and checked.tally.counts.get("unchecked"):
            scan = "some messages could not be listed (payloads pruned), so nothing held can be called unexpected"
        if not scan:
            for kind in SCANNED:
                for system in sorted(found_systems):
                    for page in client.held_under(kind, system):
                        for copy in page:
                            if not any(seen.known(kind, s, v) for s, v in copy.identifiers if s == system):
                                tell(unexpected(copy, system, checked.name))
        checked.unexpected = scan or "checked"
    checked.searches, checked.waits = client.requests, client.waits
    return checked


def check_hl7(checked: Checked, verdicts: Iterable[Verdict], sink: Sink) -> Checked:
    """List what an HL7 v2 destination answered (no receiver can be asked what it holds)."""
    for verdict in verdicts:
        checked.tally.add(verdict)
        sink(verdict)
    checked.unexpected = "an HL7 v2 receiver cannot be asked what it holds"
    return checked


def resend(ledger: Ledger, destination: str, gaps: Gaps) -> Resent:
    """Queue, through the outbox, a healing Bundle for each message with missing, different or superseded
    resources; a message with a duplicated identifier is left for a person (a conditional write on it fails).

    Idempotent: the same healing Bundle is queued once (made pending again if it was delivered and the
    gap came back). Only what the ledger recorded as sent goes out: payloads the gate let through.
    """
    done = Resent()
    for message_id, classes in sorted(gaps.by_message.items()):
        if "duplicated" in classes.values():
            done.duplicated.append(message_id)
            continue
        row = ledger.delivered_message(destination, message_id)
        if row is None or not row.payload:
            done.pruned.append(message_id)
            continue
        create = [k for k, c in classes.items() if HEALED[c] == "create"]
        update = [k for k, c in classes.items() if HEALED[c] == "update"]
        payload = resend_bundle(parse_bundle(row.payload, f"outbox row {row.id}"), create, update)
        base = row.message_id.removesuffix(RESEND_SUFFIX)
        message = NewMessage(destination, base + RESEND_SUFFIX, row.test_id, row.patient_key, payload,
                             row.content_type, hashlib.sha256(payload).hexdigest())  # fmt: skip
        _, state = ledger.enqueue_again(message, row.input_sha256)
        setattr(done, state, getattr(done, state) + 1)
    return done


def collecting(sink: Sink, gaps: Gaps) -> Sink:
    """``sink``, noting on the way the gaps --resend may heal."""

    def both(verdict: Verdict) -> None:
        gaps.note(verdict)
        sink(verdict)

    return both


class _Seen:
    """The expected resources met so far, in a scratch SQLite file (not in memory: an archive may be huge)."""

    def __init__(self, folder: Path) -> None:
        self._conn = sqlite3.connect(folder / "expected.sqlite3", isolation_level=None)
        self._conn.execute("PRAGMA journal_mode = OFF")
        self._conn.execute("PRAGMA synchronous = OFF")
        self._conn.execute(
            "CREATE TABLE seen (type TEXT, system TEXT, value TEXT, PRIMARY KEY (type, system, value)) WITHOUT ROWID"
        )
        self._conn.execute("BEGIN")

    def __enter__(self) -> _Seen:
        return self

    def __exit__(self, *exc: object) -> None:
        self._conn.close()

    def first(self, item: ExpectedResource) -> bool:
        """Whether ``item``'s identifier is met for the first time (it is remembered)."""
        cursor = self._conn.execute(
            "INSERT OR IGNORE INTO seen VALUES (?, ?, ?)",
            (item.resource_type, item.identifier_system, item.identifier_value),
        )
        return cursor.rowcount == 1

    def known(self, kind: str, system: str, value: str) -> bool:
        row = self._conn.execute(
            "SELECT 1 FROM seen WHERE type = ? AND system = ? AND value = ?", (kind, system, value)
        )
        return row.fetchone() is not None


def counts(results: Iterable[Checked]) -> Mapping[str, int]:
    """The verdicts of every destination counted together."""
    total = Tally()
    for checked in results:
        for name, n in checked.tally.counts.items():
            total.counts[name] = total.counts.get(name, 0) + n
    return total.as_dict()
