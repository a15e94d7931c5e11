"""The console script ``dlco-bridge``: the composition root (shell).

Owns: parsing arguments (every option also from a ``DLCO_BRIDGE_*`` environment variable),
reading files, calling the pure core, printing, and exit codes. Exit 0 when every input was
read, 2 when one could not be (one line per bad input on stderr), 1 on a usage or setup error.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import sys
import tempfile
import threading
from collections.abc import Iterator, Sequence
from dataclasses import asdict
from datetime import UTC, datetime
from pathlib import Path

import orjson

from bridge import __version__
from bridge.config import Destination, EmitSettings, load_settings
from bridge.emit.observations import EmitContext
from bridge.emit.outputs import OUTPUT_KINDS, OutputKind, Payload, file_stem, gate, payloads
from bridge.errors import BridgeError, ConfigError, InputError, OutputInvalid, ProcessingFailed, UnreadableInput
from bridge.fhirshow import describe_bundle
from bridge.hl7show import describe_er7
from bridge.ledger import Ledger, ServiceLock
from bridge.logs import configure as configure_logging
from bridge.mapping import Tables
from bridge.model import Outcome, Severity
from bridge.pipeline import DEFAULT_MAX_INPUT_BYTES, Limits, process
from bridge.render import CAUTION, outcome_json, outcome_text
from bridge.resources import load_tables, samples_dir
from bridge.schema import export_schema
from bridge.service import Service
from bridge.transports.base import OutgoingMessage, TlsOptions, Transport
from bridge.transports.fhir_rest import FhirRestTransport
from bridge.transports.file import FileTransport
from bridge.transports.mllp import MllpTransport
from bridge.units import TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE, UnitSystem
from bridge.validate import problems

EXIT_OK = 0
EXIT_SETUP = 1
EXIT_BAD_INPUT = 2
ENV_PREFIX = "DLCO_BRIDGE_"


def _env(name: str, default: str) -> str:
    return os.environ.get(ENV_PREFIX + name, default)


def _add_common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--units",
        choices=("si", "traditional"),
        default=_env("UNITS", "traditional"),
        help="units to show or emit (env DLCO_BRIDGE_UNITS; default traditional)",
    )
    parser.add_argument(
        "--max-bytes",
        type=int,
        default=int(_env("MAX_INPUT_BYTES", str(DEFAULT_MAX_INPUT_BYTES))),
        help="largest input accepted (env DLCO_BRIDGE_MAX_INPUT_BYTES)",
    )
    parser.add_argument(
        "--factor",
        type=float,
        choices=(TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE),
        default=float(_env("FACTOR", str(TRADITIONAL_PER_SI))),
        help="mL/min/mmHg per mmol/min/kPa (env DLCO_BRIDGE_FACTOR; default 2.987)",
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="dlco-bridge",
        description="Carry single-breath DLCO results from lab exports into FHIR R4 and HL7 v2, checked.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"dlco-bridge {__version__}")
    commands = parser.add_subparsers(dest="command", required=True)
    check = commands.add_parser("check", help="read, normalise, recompute and report findings")
    check.add_argument("files", nargs="+", type=Path, help="export files or folders")
    check.add_argument("--json", action="store_true", help="machine-readable output")
    _add_common(check)
    convert = commands.add_parser("convert", help="write FHIR R4 Bundles and HL7 v2.5.1 ORU^R01 messages")
    convert.add_argument("files", nargs="+", type=Path, help="export files or folders")
    convert.add_argument("--to", default=_env("TO", "fhir,hl7"), help="fhir, hl7 or both (env DLCO_BRIDGE_TO)")
    convert.add_argument("--out", type=Path, default=Path(_env("OUT", "out")), help="output folder")
    convert.add_argument(
        "--validate",
        action="store_true",
        default=_env("VALIDATE", "") in ("1", "true", "yes"),
        help="check every Bundle with fhir.resources and every ORU with hl7apy STRICT before writing it",
    )
    _add_common(convert)
    _add_emit_options(convert)
    demo = commands.add_parser("demo", help="run the invented scenario end to end in a temporary folder")
    _add_common(demo)
    _add_emit_options(demo)
    show = commands.add_parser("show", help="an HL7 v2 message with field names, or a FHIR Bundle summarised")
    show.add_argument("file", type=Path)
    commands.add_parser("schema", help="print the JSON Schema of the dlco-result/1 format")
    watch = commands.add_parser("watch", help="run the watch-folder service")
    watch.add_argument("--config", type=Path, default=Path(_env("CONFIG", "bridge.toml")))
    status = commands.add_parser("status", help="what the service's ledger holds: pending, delivered, rejected")
    status.add_argument("--config", type=Path, default=Path(_env("CONFIG", "bridge.toml")))
    status.add_argument("--json", action="store_true")
    resend = commands.add_parser("resend", help="queue an outbox message (or every rejected one) again")
    resend.add_argument("--config", type=Path, default=Path(_env("CONFIG", "bridge.toml")))
    which = resend.add_mutually_exclusive_group(required=True)
    which.add_argument("id", nargs="?", type=int, help="outbox id (see status --json)")
    which.add_argument("--rejected", action="store_true", help="every dead-lettered message")
    return parser


def _add_emit_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--sending-application", default=_env("SENDING_APPLICATION", "DLCO-BRIDGE"))
    parser.add_argument("--sending-facility", default=_env("SENDING_FACILITY", "PFT-LAB"))
    parser.add_argument("--receiving-application", default=_env("RECEIVING_APPLICATION", "RECORDS"))
    parser.add_argument("--receiving-facility", default=_env("RECEIVING_FACILITY", "HOSPITAL"))
    parser.add_argument(
        "--patient-reference",
        choices=("identifier", "conditional-create"),
        default=_env("PATIENT_REFERENCE", "identifier"),
        help="FHIR: refer to the patient by identifier, or create it if absent",
    )
    parser.add_argument(
        "--block",
        default=_env("BLOCK", ""),
        help="finding codes that stop a file from being emitted, comma-separated (env DLCO_BRIDGE_BLOCK)",
    )


def expand(paths: Sequence[Path]) -> Iterator[Path]:
    """Files named, and the files inside folders named (sorted, not recursive into hidden)."""
    for path in paths:
        if path.is_dir():
            yield from sorted(p for p in path.iterdir() if p.is_file() and not p.name.startswith("."))
        else:
            yield path


def read_input(path: Path, limits: Limits) -> bytes:
    """The bytes of one input; an unreadable or oversized file is an InputError."""
    try:
        size = path.stat().st_size
        if size > limits.max_input_bytes:
            raise UnreadableInput("(file)", f"at most {limits.max_input_bytes} bytes, got {size}", str(path))
        return path.read_bytes()
    except OSError as exc:
        raise UnreadableInput("(file)", f"a readable file ({exc.strerror})", str(path)) from exc


def run_inputs(paths: Sequence[Path], tables: Tables, limits: Limits) -> Iterator[tuple[Path, Outcome | InputError]]:
    """Process every input; an InputError is returned in place of its outcome, never raised.

    Any other exception is a defect of the bridge, reported for that file alone
    (:class:`ProcessingFailed`) so that the other files are still processed.
    """
    for path in expand(paths):
        try:
            yield path, process(read_input(path, limits), str(path), tables, limits)
        except InputError as exc:
            yield path, exc
        except Exception as exc:  # one file must never stop the others
            yield path, ProcessingFailed.wrapping(exc, str(path))


def cmd_check(args: argparse.Namespace, tables: Tables) -> int:
    units: UnitSystem = args.units
    limits = Limits(max_input_bytes=args.max_bytes)
    failed = 0
    reports: list[dict[str, object]] = []
    for path, result in run_inputs(args.files, tables, limits):
        report: dict[str, object] | str | InputError
        if isinstance(result, InputError):
            report = result
        else:
            try:
                report = outcome_json(result, tables, units) if args.json else outcome_text(result, tables, units)
            except Exception as exc:  # one file must never stop the others
                report = ProcessingFailed.wrapping(exc, str(path))
        if isinstance(report, InputError):
            failed += 1
            print(report.line(), file=sys.stderr)
            reports.append({"source": report.source, "error": report.line()})
        elif isinstance(report, str):
            print(report, end="\n\n")
        else:
            reports.append(report)
    if args.json:
        document = {"caution": CAUTION, "files": reports}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(CAUTION)
    return EXIT_BAD_INPUT if failed else EXIT_OK


def emit_context(args: argparse.Namespace) -> EmitContext:
    """The shell reads the clock; the emitters only receive it."""
    emit = EmitSettings(
        sending_application=args.sending_application,
        sending_facility=args.sending_facility,
        receiving_application=args.receiving_application,
        receiving_facility=args.receiving_facility,
        patient_reference=args.patient_reference,
    )
    return emit.context(datetime.now(UTC), args.units)


def _kinds(text: str) -> tuple[OutputKind, ...]:
    kinds = tuple(k.strip() for k in text.split(",") if k.strip())
    unknown = [k for k in kinds if k not in OUTPUT_KINDS]
    if unknown or not kinds:
        raise ConfigError("--to", f"fhir, hl7 or fhir,hl7, got {text!r}")
    return tuple(k for k in OUTPUT_KINDS if k in kinds)


def convert_files(
    paths: Sequence[Path], out: Path, args: argparse.Namespace, tables: Tables
) -> list[tuple[Path, Outcome | InputError, list[Path]]]:
    """Convert every input; each result is (input, outcome or error, files written)."""
    kinds = _kinds(args.to)
    blocking = {c.strip() for c in args.block.split(",") if c.strip()}
    context = emit_context(args)
    writer = FileTransport(out)
    limits = Limits(max_input_bytes=args.max_bytes)
    results: list[tuple[Path, Outcome | InputError, list[Path]]] = []
    for path, result in run_inputs(paths, tables, limits):
        if isinstance(result, InputError):
            results.append((path, result, []))
            continue
        try:
            gate(result, blocking)
            built = payloads(result, tables, context, kinds)
            if getattr(args, "validate", False):
                _validated(built, result)
        except InputError as exc:
            results.append((path, exc, []))
            continue
        except Exception as exc:  # one file must never stop the others
            results.append((path, ProcessingFailed.wrapping(exc, str(path)), []))
            continue
        written = []
        for payload in built:
            stem = file_stem(result.session.test_id)
            receipt = writer.deliver(OutgoingMessage("convert", stem, payload.data, payload.content_type))
            written.append(out / receipt.text)
        results.append((path, result, written))
    return results


def _validated(built: Sequence[Payload], outcome: Outcome) -> None:
    """Refuse the input when an independent validator rejects what was built for it."""
    for payload in built:
        found = problems(payload)
        if found:
            what = "FHIR Bundle (fhir.resources R4B)" if payload.kind == "fhir" else "ORU^R01 (hl7apy STRICT)"
            more = f" (+{len(found) - 1} more)" if len(found) > 1 else ""
            raise OutputInvalid("(output)", f"a valid {what}: {found[0]}{more}", outcome.source)


def cmd_convert(args: argparse.Namespace, tables: Tables) -> int:
    failed = 0
    for path, result, written in convert_files(args.files, args.out, args, tables):
        if isinstance(result, InputError):
            failed += 1
            print(result.line(), file=sys.stderr)
            continue
        print(f"{path}: {', '.join(str(w) for w in written)}{_finding_summary(result)}")
    print(CAUTION)
    return EXIT_BAD_INPUT if failed else EXIT_OK


def _finding_summary(outcome: Outcome) -> str:
    if not outcome.findings:
        return ""
    codes = ", ".join(sorted({f.code for f in outcome.findings if f.severity is not Severity.INFO}))
    return f"  [{len(outcome.findings)} findings{': ' + codes if codes else ''}]"


def cmd_demo(args: argparse.Namespace, tables: Tables) -> int:
    """The invented scenario end to end: samples -> check -> FHIR + HL7 in a temporary folder."""
    source = samples_dir()
    work = Path(tempfile.mkdtemp(prefix="dlco-bridge-demo-"))
    inbox, out = work / "inbox", work / "out"
    shutil.copytree(source, inbox)
    args.to = "fhir,hl7"
    # The demo shows the blocking gate too: a probable unit mislabel is refused, not emitted.
    args.block = args.block or "UNIT_MISLABEL_PROBABLE"
    print(f"dlco-bridge demo: invented scenario (fictional Fenwick Hollow health group) in {work}")
    print(f"  {len(list(inbox.glob('*.json')))} lab exports copied to {inbox}\n")
    converted = convert_files(sorted(inbox.glob("*.json")), out, args, tables)
    for path, result, written in converted:
        if isinstance(result, InputError):
            print(f"  REFUSED  {path.name}\n           {result.line()}")
            continue
        flagged = any(f.severity is not Severity.INFO for f in result.findings)
        status = "FLAGGED" if flagged else "OK"
        names = " + ".join(w.name for w in written)
        print(f"  {status:<8} {path.name} -> {names}")
        for finding in result.findings:
            label = "NOTE" if finding.severity is Severity.INFO else finding.severity.value.upper()
            print(f"           {label} {finding.code}: {finding.message}")
    good = sum(1 for _, r, _ in converted if not isinstance(r, InputError))
    print(f"\n  {good} sessions converted, {len(converted) - good} refused; outputs in {out}")
    print(f"  look inside: dlco-bridge show {out}/<test id>.oru.hl7\n")
    print(CAUTION)
    return EXIT_OK


def cmd_show(args: argparse.Namespace, tables: Tables) -> int:
    try:
        data = args.file.read_bytes()
    except OSError as exc:
        print(f"{args.file}: (file): a readable file ({exc.strerror})", file=sys.stderr)
        return EXIT_BAD_INPUT
    text = data.decode("utf-8", errors="replace")
    if text.lstrip().startswith("{"):
        try:
            bundle = json.loads(text)
        except json.JSONDecodeError as exc:
            print(f"{args.file}: line {exc.lineno}: valid JSON ({exc.msg})", file=sys.stderr)
            return EXIT_BAD_INPUT
        sys.stdout.write(describe_bundle(bundle))
    else:
        sys.stdout.write(describe_er7(text))
    return EXIT_OK


def cmd_schema(args: argparse.Namespace, tables: Tables) -> int:
    sys.stdout.write(json.dumps(export_schema(), indent=2, sort_keys=True) + "\n")
    return EXIT_OK


def build_transport(destination: Destination) -> Transport:
    """The transport of one destination (the CLI is the only place transports are built)."""
    tls = None
    if destination.ca_file or destination.cert_file:
        tls = TlsOptions(destination.ca_file, destination.cert_file, destination.key_file)
    if destination.transport == "file":
        assert destination.folder is not None  # checked by config
        return FileTransport(destination.folder)
    if destination.transport == "mllp":
        return MllpTransport(
            destination.host,
            destination.port,
            connect_timeout=destination.connect_timeout,
            read_timeout=destination.read_timeout,
            tls=tls,
        )
    return FhirRestTransport(
        destination.base_url,
        token=destination.token,
        connect_timeout=destination.connect_timeout,
        read_timeout=destination.read_timeout,
        tls=tls,
    )


def cmd_watch(args: argparse.Namespace, tables: Tables) -> int:
    # Handlers first: a stop asked for while the ledger opens is honoured, not a hard exit.
    stop = threading.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda *_: stop.set())
    settings = load_settings(args.config, os.environ)
    tables = load_tables(traditional_per_si=settings.traditional_per_si)
    configure_logging(settings.log_format)
    with ServiceLock.acquire(settings.state), Ledger.open(settings.ledger_path) as ledger:
        transports = {d.name: build_transport(d) for d in settings.destinations}
        service = Service(settings, tables, ledger, transports, stop=stop)
        for signum in (signal.SIGTERM, signal.SIGINT):
            signal.signal(signum, lambda *_: service.request_stop())
        if not stop.is_set():
            service.run()
    return EXIT_OK


def cmd_status(args: argparse.Namespace, tables: Tables) -> int:
    settings = load_settings(args.config, os.environ)
    with Ledger.open(settings.ledger_path, read_only=True) as ledger:
        summary = ledger.summary()
        dead = ledger.rows("rejected")
    dead_letters = [
        {"id": r.id, "destination": r.destination, "message_id": r.message_id, "test_id": r.test_id,
         "attempts": r.attempts, "reason": r.last_error}
        for r in dead
    ]  # fmt: skip
    if args.json:
        document = {**asdict(summary), "dead_letters": dead_letters}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
        return EXIT_OK
    print(f"ledger {settings.ledger_path}")
    print(
        f"  inputs: {summary.processed} processed, {summary.corrections} corrections, "
        f"{summary.duplicates} duplicates, {summary.quarantined} quarantined"
    )
    for name, d in sorted(summary.destinations.items()):
        oldest = f", oldest pending {d.oldest_pending_age:.0f} s" if d.oldest_pending_age else ""
        print(f"  {name}: {d.pending} pending, {d.delivered} delivered, {d.rejected} rejected{oldest}")
    if dead_letters:
        print("  dead letters (dlco-bridge resend ID | --rejected):")
        for letter in dead_letters:
            print(f"    {letter['id']:>6}  {letter['destination']}  test {letter['test_id']}  {letter['reason']}")
    return EXIT_OK


def cmd_resend(args: argparse.Namespace, tables: Tables) -> int:
    settings = load_settings(args.config, os.environ)
    with Ledger.open(settings.ledger_path) as ledger:
        if args.rejected:
            count = ledger.requeue_rejected()
            print(f"{count} rejected messages queued again")
        else:
            ledger.requeue(args.id)
            print(f"message {args.id} queued again")
    return EXIT_OK


COMMANDS = {
    "watch": cmd_watch,
    "status": cmd_status,
    "resend": cmd_resend,
    "check": cmd_check,
    "convert": cmd_convert,
    "demo": cmd_demo,
    "show": cmd_show,
    "schema": cmd_schema,
}


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        tables = load_tables(traditional_per_si=getattr(args, "factor", TRADITIONAL_PER_SI))
        return COMMANDS[args.command](args, tables)
    except BridgeError as exc:
        print(f"dlco-bridge: {exc}", file=sys.stderr)
        return EXIT_SETUP
