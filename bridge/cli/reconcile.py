"""``dlco-bridge reconcile``: does the receiving system hold exactly what was sent? (shell)

Two forms, one engine (:mod:`bridge.reconcile`): after a feed (``--config bridge.toml``: every
result the ledger delivered to each destination) and after a migration (``PATH... --fhir-base
URL``: every session the pipeline would send, the bytes ``convert`` writes). Exit 0 when every
expected resource is present and equal, 1 when there are gaps, 2 when the check could not run.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import asdict, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from bridge.cli.files import gather, no_inputs, run_inputs
from bridge.cli.parser import EXIT_BAD_INPUT, EXIT_OK
from bridge.cli.service import build_transport
from bridge.config import Settings
from bridge.errors import BridgeError, ConfigError
from bridge.pipeline import Route
from bridge.reconcile.client import SearchClient
from bridge.reconcile.engine import LABELS, Verdict
from bridge.reconcile.report import ReportWriter, headline
from bridge.reconcile.run import Checked, Gaps, Resent, check_fhir, check_hl7, collecting, counts, resend
from bridge.reconcile.source import acknowledgements, expected_from_ledger, expected_from_outcomes
from bridge.service.ledger import Ledger
from bridge.service.settings import Destination
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.tables import Tables

EXIT_GAPS = 1
EXIT_COULD_NOT_RUN = 2
SHOWN_IN_TERMINAL = 20


def cmd_reconcile(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    writer = ReportWriter(None)
    try:
        inputs, skipped = gather(args.paths, settings, tables) if args.paths else ([], [])
        if args.paths and no_inputs(args.paths, inputs, skipped):
            return EXIT_COULD_NOT_RUN
        writer = ReportWriter(args.report)
        checked_at = datetime.now(UTC)
        terminal = _Terminal(writer)
        resent: dict[str, Resent] = {}
        if args.paths:
            form = "migration"
            results, notes = _migration(args, inputs, settings, tables, terminal)
        else:
            form = "feed"
            results, resent, notes = _feed(args, settings, terminal)
    except (BridgeError, OSError) as exc:
        writer.close()
        print(f"dlco-bridge reconcile: could not run: {exc}", file=sys.stderr)
        return EXIT_COULD_NOT_RUN
    summary = summarise(form, checked_at, results, resent, notes, writer.gaps)
    writer.finish(summary)
    terminal.finish(summary, resent)
    if args.report is not None:
        print(f"report in {args.report / 'report.html'}")
    return EXIT_OK if summary["complete"] else EXIT_GAPS


def _feed(
    args: argparse.Namespace, settings: Settings, terminal: _Terminal
) -> tuple[list[Checked], dict[str, Resent], list[str]]:
    service = settings.require_service()
    known = {d.name: d for d in service.destinations}
    names = args.destination or list(known)
    unknown = [name for name in names if name not in known]
    if unknown:
        raise ConfigError("--destination", f"a destination of {settings.source} ({', '.join(known)}), got {unknown[0]}")
    since = _since(args.since)
    scan = (
        ""
        if since is None
        else "--since limits the check to what was sent since then: nothing can be called unexpected"
    )
    results, resent, notes = [], {}, []
    with Ledger.open(service.ledger_path, read_only=not args.resend) as ledger:
        for name in names:
            destination = known[name]
            checked = Checked(name, _kind(destination), destination.address)
            terminal.start(checked)
            if checked.kind == "fhir":
                gaps = Gaps()
                sink = collecting(terminal.add, gaps) if args.resend else terminal.add
                with _client(destination, args.in_flight) as client:
                    check_fhir(checked, expected_from_ledger(ledger, name, since), client, sink,
                               systems=(_observation_system(settings),), scan=scan)  # fmt: skip
                if args.resend:
                    resent[name] = resend(ledger, name, gaps)
            elif checked.kind == "hl7":
                check_hl7(checked, acknowledgements(ledger, name, since), terminal.add)
            else:
                checked.unexpected = "a folder, not a receiving system: nothing to ask"
                notes.append(f"{name}: a file destination (a folder another system collects from) is not checked")
            results.append(checked)
    if args.resend and any(d.kind == "hl7" for d in results):
        notes.append(
            "HL7 v2 messages are not resent by reconcile: dlco-bridge resend --rejected queues the refused ones"
        )
    return results, resent, notes


def _migration(
    args: argparse.Namespace, inputs: list[Path], settings: Settings, tables: Tables, terminal: _Terminal
) -> tuple[list[Checked], list[str]]:
    """The archive's inputs (the folder rule of every command) through the pipeline, against the target server."""
    if not args.fhir_base:
        raise ConfigError("--fhir-base", "the target FHIR server's base URL (reconcile PATH... --fhir-base URL)")
    if args.resend or args.destination or args.since:
        raise ConfigError("--resend/--destination/--since", "the feed form only (reconcile --config bridge.toml)")
    destination = _target(settings, args.fhir_base, args.units)
    checked = Checked(destination.name, "fhir", destination.address)
    terminal.start(checked)
    results = (result for _, result in run_inputs(inputs, settings, tables, [Route("fhir", destination.units)]))
    with _client(destination, args.in_flight) as client:
        check_fhir(checked, expected_from_outcomes(results, destination.name), client, terminal.add,
                   systems=(_observation_system(settings),), scan="")  # fmt: skip
    notes = [f"units {destination.units}: values are expected as the pipeline emits them in these units"]
    if checked.refused_inputs:
        notes.append(f"{checked.refused_inputs} input(s) or session(s) refused by the pipeline's gate or unreadable: "
                     "not expected on the server (dlco-bridge audit says why)")  # fmt: skip
    return [checked], notes


@contextmanager
def _client(destination: Destination, in_flight: int | None) -> Iterator[SearchClient]:
    """The destination's transport (its pool, TLS, timeouts and token) lent to a SearchClient, closed after."""
    transport = build_transport(destination)
    try:
        if not isinstance(transport, FhirRestTransport):
            raise ConfigError(f"destination.{destination.name}.transport", "fhir-rest, to be asked what it holds")
        yield SearchClient(transport, destination.name, in_flight=in_flight or destination.reconcile_in_flight)
    finally:
        transport.close()


def _target(settings: Settings, base_url: str, units: str | None) -> Destination:
    """The configured fhir-rest destination with this base URL (its TLS, auth and units), else a plain one."""
    wanted = base_url.rstrip("/")
    configured = settings.service.destinations if settings.service is not None else ()
    for destination in configured:
        if destination.transport == "fhir-rest" and destination.base_url.rstrip("/") == wanted:
            return replace(destination, units=units) if units else destination  # type: ignore[arg-type]
    if not wanted.startswith(("http://", "https://")):
        raise ConfigError("--fhir-base", f"an http:// or https:// URL, got {base_url!r}")
    return Destination("target", "fhir", "fhir-rest", settings.units, base_url=wanted)


def _kind(destination: Destination) -> str:
    if destination.transport == "fhir-rest":
        return "fhir"
    return "hl7" if destination.transport == "mllp" else "file"


def _observation_system(settings: Settings) -> str:
    return settings.pipeline.emit.observation_system


def _since(text: str | None) -> float | None:
    """``--since``: a date (midnight UTC) or a date-time with its offset, as seconds since the epoch."""
    if text is None:
        return None
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise ConfigError("--since", f"a date YYYY-MM-DD or a date-time with offset, got {text!r}") from None
    if len(text) == 10:
        moment = moment.replace(tzinfo=UTC)
    if moment.tzinfo is None:
        raise ConfigError("--since", f"a date-time with its offset (or a date, read as UTC), got {text!r}")
    return moment.timestamp()


def summarise(
    form: str, checked_at: datetime, results: list[Checked], resent: dict[str, Resent], notes: list[str], gaps: int
) -> dict[str, Any]:
    """What ``summary.json`` says (the page is drawn from it too)."""
    total = counts(results)
    return {
        "complete": gaps == 0,
        "form": form,
        "checked_at": checked_at.isoformat(timespec="seconds"),
        "expected": sum(n for name, n in total.items() if name != "unexpected"),
        "gaps": gaps,
        "counts": dict(total),
        "destinations": [
            {
                "name": c.name,
                "kind": c.kind,
                "address": c.address,
                "counts": c.tally.as_dict(),
                "gaps": c.tally.gaps,
                "unexpected": c.unexpected,
                "searches": c.searches,
                "waits": c.waits,
                "refused_inputs": c.refused_inputs,
            }
            for c in results
        ],
        "notes": notes + [_resent_line(name, r) for name, r in resent.items()],
        "resend": {name: asdict(r) for name, r in resent.items()} or None,
    }


def _resent_line(name: str, r: Resent) -> str:
    left = []
    if r.duplicated:
        left.append(f"{len(r.duplicated)} with a duplicated identifier (a person resolves them)")
    if r.pruned:
        left.append(f"{len(r.pruned)} whose payload was pruned")
    not_sent = f"; not resent: {', '.join(left)}" if left else ""
    return (f"{name}: --resend queued {r.queued} message(s), made {r.requeued} pending again, {r.pending} already "
            f"pending{not_sent}; dlco-bridge watch delivers them, then run reconcile again")  # fmt: skip


class _Terminal:
    """What the terminal shows as the check goes: each destination, the first gaps, the counts."""

    def __init__(self, writer: ReportWriter) -> None:
        self.writer = writer
        self.shown = 0

    def start(self, checked: Checked) -> None:
        doing = "a folder: nothing to ask" if checked.kind == "file" else "checking"
        print(f"{checked.name} ({checked.kind}, {checked.address}): {doing}", flush=True)

    def add(self, verdict: Verdict) -> None:
        self.writer.add(verdict)
        if verdict.gap and self.shown < SHOWN_IN_TERMINAL:
            self.shown += 1
            print(f"  {verdict.verdict:<10} {verdict.resource_type:<16} {verdict.identifier_value}  {verdict.detail}")

    def finish(self, summary: dict[str, Any], resent: dict[str, Resent]) -> None:
        if summary["gaps"] > self.shown:
            print(f"  ... {summary['gaps'] - self.shown} more gap(s): --report DIR lists them all")
        for d in summary["destinations"]:
            nothing = "not checked" if d["kind"] == "file" else "nothing sent"
            said = ", ".join(f"{n} {LABELS[name]}" for name, n in d["counts"].items()) or nothing
            print(f"{d['name']}: {said}")
        for note in summary["notes"]:
            print(f"note: {note}")
        print(headline(summary))


__all__ = ["EXIT_BAD_INPUT", "EXIT_COULD_NOT_RUN", "EXIT_GAPS", "cmd_reconcile"]
