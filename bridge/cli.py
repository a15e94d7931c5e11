"""The console script ``dlco-bridge``: the composition root (shell).

Owns: parsing arguments, building the one settings object through ``bridge.config``
(configuration file, environment, then these flags), reading files, calling the one pipeline,
printing, and exit codes. Exit 0 when every input was
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
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import asdict, replace
from datetime import UTC, datetime
from pathlib import Path

import orjson

from bridge import __version__
from bridge.config import (
    CONFIG_ENV,
    SAMPLE_CONFIG,
    UNIT_SYSTEMS,
    Destination,
    ServiceSettings,
    Settings,
    config_path,
    load_settings,
)
from bridge.display.bundle_summary import describe_bundle
from bridge.display.check_report import CAUTION, outcome_json, outcome_text
from bridge.display.hl7_fields import describe_er7
from bridge.display.map_report import SHOWN_RECORDS, MapCheck, map_check_json, map_check_text
from bridge.emit.outputs import file_stem
from bridge.errors import BridgeError, ConfigError, InputError, ProcessingFailed, UnknownFormat, UnreadableInput
from bridge.model import OUTPUT_KINDS, Outcome, Severity
from bridge.pipeline import Route, process_all
from bridge.readers.csv_export import read_csv
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.readers.schema import export_schema
from bridge.service.ledger import Ledger, ServiceLock
from bridge.service.logs import configure as configure_logging
from bridge.service.receiver import ANSWERS, FhirPeer, MllpPeer, ResourceStore, StandInSettings
from bridge.service.runner import Service
from bridge.service.transports.base import OutgoingMessage, TlsOptions, Transport
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.file import FileTransport
from bridge.service.transports.mllp import MllpTransport
from bridge.service.transports.smart import SmartClient
from bridge.tables import Tables
from bridge.tables.files import load_field_map, load_map_choice, load_tables, samples_dir

EXIT_OK = 0
EXIT_SETUP = 1
EXIT_BAD_INPUT = 2
DEFAULTS = Settings()  # shown in --help; the values themselves are written in the settings classes
DEFAULTS_SERVICE = ServiceSettings(Path(), Path(), Path(), Path(), ())


def _add_settings(parser: argparse.ArgumentParser, *, emits: bool) -> None:
    """Flags that override the configuration file and the environment (``None``: not given)."""
    parser.add_argument(
        "--config",
        type=Path,
        help=f"configuration file (TOML); default: ${CONFIG_ENV}, else none (see {SAMPLE_CONFIG})",
    )
    parser.add_argument(
        "--units",
        choices=UNIT_SYSTEMS,
        help=f"units to show or write (key units; default {DEFAULTS.units})",
    )
    parser.add_argument(
        "--max-input-bytes",
        type=int,
        help=f"largest input accepted (key max_input_bytes; default {DEFAULTS.pipeline.max_input_bytes})",
    )
    parser.add_argument(
        "--map",
        type=lambda value: str(Path(value).absolute()),
        help="read every input through this field map (mappings/maps/*.toml; CSV or legacy HL7 v2) "
        "(key map; default: none, inputs are dlco-result/1 JSON; [maps] chooses one per file pattern)",
    )
    parser.add_argument(
        "--traditional-per-si",
        type=float,
        help="mL/min/mmHg per mmol/min/kPa, 2.987 or 2.986 "
        f"(key traditional_per_si; default {DEFAULTS.traditional_per_si})",
    )
    if not emits:
        return
    parser.add_argument(
        "--allow",
        action="append",
        metavar="CODE",
        help="an ERROR finding code to write anyway, the value marked preliminary with the finding; "
        "repeat or separate with commas (key allow; default "
        f"{','.join(sorted(DEFAULTS.pipeline.allow)) or 'none'}: "
        "every ERROR finding keeps a record from being written)",
    )
    parser.add_argument(
        "--blocking",
        help="codes of lesser (warning, info) findings that also keep a record from being written, "
        f"comma-separated (key blocking; default {','.join(sorted(DEFAULTS.pipeline.blocking)) or 'none'})",
    )
    parser.add_argument(
        "--validate",
        action="store_const",
        const=True,
        help="check every Bundle with fhir.resources and every ORU with hl7apy STRICT before writing it "
        "(key validate; needs the [validate] extra)",
    )
    site = DEFAULTS.pipeline.emit
    for key, what in (
        ("sending_application", "MSH-3"),
        ("sending_facility", "MSH-4"),
        ("receiving_application", "MSH-5"),
        ("receiving_facility", "MSH-6"),
    ):
        parser.add_argument(
            "--" + key.replace("_", "-"),
            dest="emit." + key,
            help=f"HL7 {what} (key emit.{key}; default {getattr(site, key)})",
        )
    parser.add_argument(
        "--patient-reference",
        dest="emit.patient_reference",
        choices=("identifier", "conditional-create"),
        help=f"FHIR: refer to the patient by identifier, or create it if absent "
        f"(key emit.patient_reference; default {site.patient_reference})",
    )


# Flags that are settings; everything else on the command line is an argument of the command.
_SETTING_FLAGS = (
    "units", "max_input_bytes", "traditional_per_si", "blocking", "allow", "validate", "to", "map",
    "emit.sending_application", "emit.sending_facility", "emit.receiving_application",
    "emit.receiving_facility", "emit.patient_reference",
)  # fmt: skip


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
    _add_settings(check, emits=False)
    convert = commands.add_parser("convert", help="write FHIR R4 Bundles and HL7 v2.5.1 ORU^R01 messages")
    convert.add_argument("files", nargs="+", type=Path, help="export files or folders")
    convert.add_argument("--to", help=f"fhir, hl7 or fhir,hl7 (key to; default {','.join(DEFAULTS.to)})")
    convert.add_argument("--out", type=Path, default=Path("out"), help="output folder (default ./out)")
    _add_settings(convert, emits=True)
    demo = commands.add_parser("demo", help="run the invented scenario end to end in a temporary folder")
    _add_settings(demo, emits=True)
    show = commands.add_parser("show", help="an HL7 v2 message with field names, or a FHIR Bundle summarised")
    show.add_argument("file", type=Path, help="an ER7 HL7 v2 message or a FHIR Bundle (JSON)")
    commands.add_parser("schema", help="print the JSON Schema of the dlco-result/1 format")
    audit = commands.add_parser("audit", help="check a whole archive, write a report folder (and bulk FHIR NDJSON)")
    audit.add_argument("paths", nargs="+", type=Path, help="export files or folders (walked to any depth)")
    audit.add_argument("--report", type=Path, required=True, help="folder for findings.csv, summary.json, report.html")
    audit.add_argument("--workers", type=int, help="worker processes (default: the number of CPUs)")
    audit.add_argument("--emit", choices=("ndjson",), help="also write the clean sessions as FHIR R4 NDJSON")
    audit.add_argument("--scheduler", help="run on an existing Dask cluster at this address (the [scale] extra)")
    _add_settings(audit, emits=False)
    maps = commands.add_parser("map", help="field maps: onboard a CSV or legacy HL7 v2 source without code")
    map_commands = maps.add_subparsers(dest="map_command", required=True)
    map_check = map_commands.add_parser(
        "check", help="read a sample through a map: what each column or code feeds, what stays unused or empty"
    )
    map_check.add_argument("map_file", metavar="MAP", type=Path, help="the field map (TOML)")
    map_check.add_argument("sample", metavar="SAMPLE", type=Path, help="a sample export of the source")
    map_check.add_argument("--json", action="store_true", help="machine-readable output")
    map_check.add_argument(
        "--records", type=int, default=SHOWN_RECORDS, help=f"records shown field by field (default {SHOWN_RECORDS})"
    )
    config_help = f"the service's configuration file (TOML); default: ${CONFIG_ENV} (see {SAMPLE_CONFIG})"
    watch = commands.add_parser("watch", help="run the watch-folder service")
    watch.add_argument("--config", type=Path, help=config_help)
    status = commands.add_parser("status", help="what the service's ledger holds: pending, delivered, rejected")
    status.add_argument("--config", type=Path, help=config_help)
    status.add_argument("--json", action="store_true", help="machine-readable output")
    resend = commands.add_parser("resend", help="queue an outbox message (or every rejected one) again")
    resend.add_argument("--config", type=Path, help=config_help)
    which = resend.add_mutually_exclusive_group(required=True)
    which.add_argument("id", nargs="?", type=int, help="outbox id (see status --json)")
    which.add_argument("--rejected", action="store_true", help="every dead-lettered message")
    _add_prune(commands, config_help)
    _add_stand_in(commands)
    return parser


def _add_stand_in(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    defaults = StandInSettings(Path())
    stand_in = commands.add_parser(
        "stand-in",
        help="a loopback MLLP listener and FHIR endpoint to try a feed against (never started by watch)",
        description="Listen on 127.0.0.1 only: MLLP (each message written to FOLDER/messages/ and answered) and "
        "a FHIR endpoint taking transaction Bundles (kept in FOLDER/resources.sqlite3). Runs until Ctrl-C/SIGTERM. "
        "For trials and rehearsals, not for patient data in production.",
    )
    stand_in.add_argument("--folder", type=Path, required=True, help="where received messages and resources are kept")
    stand_in.add_argument(
        "--mllp-port",
        type=int,
        default=defaults.mllp_port,
        help=f"MLLP port on 127.0.0.1 (default {defaults.mllp_port})",
    )
    stand_in.add_argument(
        "--fhir-port",
        type=int,
        default=defaults.fhir_port,
        help=f"FHIR port on 127.0.0.1, base URL http://127.0.0.1:PORT/fhir (default {defaults.fhir_port})",
    )
    stand_in.add_argument(
        "--answer",
        choices=ANSWERS,
        default=defaults.answer,
        help=f"MSA-1 of every ACK: AA accepts, AE and AR rehearse refusals (default {defaults.answer})",
    )
    stand_in.add_argument("--list", action="store_true", help="list the FHIR resources kept in FOLDER, then exit")


def _add_prune(commands: argparse._SubParsersAction[argparse.ArgumentParser], config_help: str) -> None:
    service = DEFAULTS_SERVICE
    prune = commands.add_parser(
        "prune",
        help="remove delivered payloads and old ledger rows; duplicates stay recognisable",
        description="Remove the payloads and attempt history of messages delivered more than DAYS ago; forget "
        "delivered messages and their inputs after duplicate_memory_days (default "
        f"{service.duplicate_memory_days:g}). Pending and rejected messages are never pruned. "
        "Run it with the service stopped (or set retention_days and let the service prune).",
    )
    prune.add_argument("--config", type=Path, help=config_help)
    prune.add_argument(
        "--older-than",
        type=float,
        required=True,
        metavar="DAYS",
        help="prune what was delivered more than DAYS days ago (0 or more)",
    )


def settings_of(args: argparse.Namespace, environ: Mapping[str, str]) -> Settings:
    """The one settings object for this run: configuration file, environment, then flags."""
    flags = {key: getattr(args, key) for key in _SETTING_FLAGS if hasattr(args, key)}
    return load_settings(config_path(getattr(args, "config", None), environ), environ, flags)


def expand(paths: Sequence[Path]) -> Iterator[Path]:
    """Files named, and the files inside folders named (sorted, not recursive into hidden)."""
    for path in paths:
        if path.is_dir():
            yield from sorted(p for p in path.iterdir() if p.is_file() and not p.name.startswith("."))
        else:
            yield path


def read_input(path: Path, limit: int) -> bytes:
    """The bytes of one input; an unreadable or oversized file is an InputError."""
    try:
        size = path.stat().st_size
        if size > limit:
            raise UnreadableInput("(file)", f"at most {limit} bytes, got {size}", str(path))
        return path.read_bytes()
    except OSError as exc:
        raise UnreadableInput("(file)", f"a readable file ({exc.strerror})", str(path)) from exc


def run_inputs(
    paths: Sequence[Path], settings: Settings, tables: Tables, routes: Sequence[Route] = (), now: datetime | None = None
) -> Iterator[tuple[Path, Outcome | InputError]]:
    """The pipeline over every input; an InputError is returned in place of its outcome, never raised.

    Any other exception is a defect of the bridge, reported for that file alone
    (:class:`ProcessingFailed`) so that the other files are still processed.
    """
    now = now or datetime.now(UTC)  # the shell reads the clock once per run; the pipeline receives it
    maps = load_map_choice(settings.field_map, settings.maps, tables.units)
    for path in expand(paths):
        try:
            data = read_input(path, settings.pipeline.max_input_bytes)
            pipeline = replace(settings.pipeline, field_map=maps.for_file(path.name))
            # The record names its input by file name, as the service does; errors name the path given.
            # A field map may find many sessions in one file: one result each.
            for result in process_all(data, path.name, tables, pipeline, now=now, routes=routes):
                yield path, result.with_source(str(path)) if isinstance(result, InputError) else result
        except InputError as exc:
            yield path, exc.with_source(str(path))
        except Exception as exc:  # one file must never stop the others
            yield path, ProcessingFailed.wrapping(exc, str(path))


def no_inputs(paths: Sequence[Path]) -> bool:
    """Whether ``paths`` name no input at all (an empty folder, say), said on stderr once."""
    if any(True for _ in expand(paths)):
        return False
    named = ", ".join(str(p) for p in paths)
    print(f"{named}: (inputs): at least one export file, found none", file=sys.stderr)
    return True


def cmd_check(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    if no_inputs(args.files):
        return EXIT_BAD_INPUT
    failed = 0
    reports: list[dict[str, object]] = []
    for path, result in run_inputs(args.files, settings, tables):
        report: dict[str, object] | str | InputError
        if isinstance(result, InputError):
            report = result
        else:
            try:
                if args.json:
                    report = outcome_json(result, tables, settings.units)
                else:
                    report = outcome_text(result, tables, settings.units)
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


def convert_files(
    paths: Sequence[Path], out: Path, settings: Settings, tables: Tables, now: datetime | None = None
) -> list[tuple[Path, Outcome | InputError, list[Path]]]:
    """Convert every input; each result is (input, outcome or error, files written).

    ``now``: the send time written into every message (default: the clock, read once).
    """
    routes = [Route(kind, settings.units) for kind in settings.to]
    writer = FileTransport(out)
    results: list[tuple[Path, Outcome | InputError, list[Path]]] = []
    for path, result in run_inputs(paths, settings, tables, routes, now):
        if isinstance(result, InputError):
            results.append((path, result, []))
            continue
        written = []
        for payload in result.payloads:
            stem = file_stem(result.session.test_id)
            receipt = writer.deliver(OutgoingMessage("convert", stem, payload.data, payload.content_type))
            written.append(out / receipt.text)
        results.append((path, result, written))
    return results


def cmd_convert(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    if no_inputs(args.files):
        return EXIT_BAD_INPUT
    failed = 0
    for path, result, written in convert_files(args.files, args.out, settings, tables):
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
    count = len(outcome.findings)
    return f"  [{count} finding{'' if count == 1 else 's'}{': ' + codes if codes else ''}]"


def cmd_demo(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    """The invented scenario end to end: samples -> check -> FHIR + HL7 in a temporary folder."""
    source = samples_dir()
    work = Path(tempfile.mkdtemp(prefix="dlco-bridge-demo-"))
    inbox, out = work / "inbox", work / "out"
    shutil.copytree(source, inbox)
    settings = replace(settings, to=OUTPUT_KINDS)
    print(f"dlco-bridge demo: invented scenario (fictional Fenwick Hollow health group) in {work}")
    print(f"  {len(list(inbox.glob('*.json')))} lab exports copied to {inbox}\n")
    converted = convert_files(sorted(inbox.glob("*.json")), out, settings, tables)
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


def cmd_show(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    try:
        data = args.file.read_bytes()
    except OSError as exc:
        print(f"{args.file}: (file): a readable file ({exc.strerror})", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        shown = describe_shown(data, str(args.file))
    except InputError as exc:
        print(exc.line(), file=sys.stderr)
        return EXIT_BAD_INPUT
    sys.stdout.write(shown)
    return EXIT_OK


SHOWABLE = "an HL7 v2 message (MSH segment first) or a FHIR Bundle (JSON, resourceType Bundle)"


def describe_shown(data: bytes, source: str) -> str:
    """What ``show`` prints for ``data``; anything but an ER7 message or a Bundle is an InputError."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise UnknownFormat("(content)", f"{SHOWABLE}, got bytes that are not UTF-8 text", source) from None
    stripped = text.strip("\x0b\x1c\r\n\t \ufeff")  # MLLP framing and white space around a message
    if stripped.startswith("{"):
        try:
            document = json.loads(stripped)
        except json.JSONDecodeError as exc:
            raise UnknownFormat(f"line {exc.lineno}", f"valid JSON ({exc.msg})", source) from None
        if not isinstance(document, dict) or document.get("resourceType") != "Bundle":
            kind = document.get("resourceType") if isinstance(document, dict) else None
            got = f"resourceType {kind}" if kind else "JSON without resourceType Bundle"
            raise UnknownFormat("resourceType", f"{SHOWABLE}, got {got}", source)
        return describe_bundle(document)
    if stripped.startswith("MSH") and len(stripped) > 8:
        return describe_er7(stripped)
    raise UnknownFormat("(content)", f"{SHOWABLE}, got text starting {stripped[:12]!r}", source)


def cmd_schema(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    sys.stdout.write(json.dumps(export_schema(), indent=2, sort_keys=True) + "\n")
    return EXIT_OK


def cmd_audit(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    """Audit an archive; exit 0 whatever was found, 1 only when the report could not be written."""
    from bridge.audit.run import AuditSettings, Job, run_audit, terminal  # matplotlib: only when auditing

    if args.workers is not None and args.workers < 1:
        print("dlco-bridge: --workers: at least 1", file=sys.stderr)
        return EXIT_SETUP
    audit = AuditSettings(emit_ndjson=args.emit == "ndjson")
    if args.workers is not None:
        audit = replace(audit, workers=args.workers)
    job = Job(settings.pipeline, settings.traditional_per_si, settings.units, datetime.now(UTC), audit.emit_ndjson)
    try:
        summary = run_audit(args.paths, args.report, job, audit, progress=terminal(), scheduler=args.scheduler)
    except OSError as exc:  # the report folder cannot be written, or the scheduler cannot be reached
        print(f"dlco-bridge: audit could not run: {exc}", file=sys.stderr)
        return EXIT_SETUP
    print(
        f"{summary['files']} files, {summary['sessions_read']} sessions read, {summary['clean']} clean, "
        f"{summary['findings']} findings; report in {args.report / 'report.html'}"
    )
    print(CAUTION)
    return EXIT_OK


def cmd_map(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    """``map check MAP SAMPLE``: an invalid map is a setup error (exit 1) naming its file, line and key."""
    fmap = load_field_map(args.map_file, tables.units)
    try:
        data = read_input(args.sample, settings.pipeline.max_input_bytes)
        reader = read_csv if fmap.format == "csv" else read_hl7
        records = list(reader(data, args.sample.name, fmap, tables.units))
        pipeline = replace(settings.pipeline, field_map=replace(fmap, on_bad_record="skip"))  # show every record
        results = list(process_all(data, args.sample.name, tables, pipeline))
    except InputError as exc:
        print(exc.with_source(str(args.sample)).line(), file=sys.stderr)
        return EXIT_BAD_INPUT
    check = MapCheck(fmap, str(args.sample), tuple(zip(records, results, strict=True)))
    if args.json:
        document = {"caution": CAUTION, **map_check_json(check)}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        sys.stdout.write(map_check_text(check, max(args.records, 0)))
        print(CAUTION)
    return EXIT_BAD_INPUT if any(isinstance(r, InputError) for r in results) else EXIT_OK


def build_transport(destination: Destination) -> Transport:
    """The transport of one destination (the CLI is the only place transports are built)."""
    tls = None
    if destination.ca_file or destination.cert_file:
        tls = TlsOptions(destination.ca_file, destination.cert_file, destination.key_file)
    if destination.transport == "file":
        assert destination.folder is not None  # checked by config
        return FileTransport(destination.folder)
    if destination.transport == "mllp":
        retried = frozenset(code for code, policy in (("AE", destination.on_ae), ("AR", destination.on_ar))
                            if policy == "retry")  # fmt: skip
        return MllpTransport(
            destination.host,
            destination.port,
            connect_timeout=destination.connect_timeout,
            read_timeout=destination.read_timeout,
            tls=tls,
            retried=retried,
        )
    smart = None
    if destination.client_id and destination.private_key_file is not None:
        smart = SmartClient(
            destination.client_id, destination.token_url, destination.private_key_file, destination.scopes
        )
    return FhirRestTransport(
        destination.base_url,
        token=destination.token,
        smart=smart,
        busy=destination.on_busy,
        connect_timeout=destination.connect_timeout,
        read_timeout=destination.read_timeout,
        tls=tls,
    )


def cmd_watch(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    # Handlers first: a stop asked for while the ledger opens is honoured, not a hard exit.
    stop = threading.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda *_: stop.set())
    service_settings = settings.require_service()
    configure_logging(service_settings.log_format)
    with ServiceLock.acquire(service_settings.state), Ledger.open(service_settings.ledger_path) as ledger:
        transports = {d.name: build_transport(d) for d in service_settings.destinations}
        service = Service(settings, tables, ledger, transports, stop=stop)
        for signum in (signal.SIGTERM, signal.SIGINT):
            signal.signal(signum, lambda *_: service.request_stop())
        if not stop.is_set():
            service.run()
    return EXIT_OK


def cmd_status(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    service = settings.require_service()
    with Ledger.open(service.ledger_path, read_only=True) as ledger:
        summary = ledger.summary()
        dead = ledger.rows("rejected")
        size = ledger.size()
    dead_letters = [
        {"id": r.id, "destination": r.destination, "message_id": r.message_id, "test_id": r.test_id,
         "attempts": r.attempts, "reason": r.last_error}
        for r in dead
    ]  # fmt: skip
    if args.json:
        document = {**asdict(summary), "ledger_bytes": size.bytes, "dead_letters": dead_letters}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
        return EXIT_OK
    print(
        f"ledger {service.ledger_path}  {_megabytes(size.bytes)} ({_megabytes(size.payload_bytes)} of payloads, "
        f"{_megabytes(size.free_bytes)} free)"
    )
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


def cmd_resend(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    with Ledger.open(settings.require_service().ledger_path) as ledger:
        if args.rejected:
            count = ledger.requeue_rejected()
            print(f"{count} rejected message{'' if count == 1 else 's'} queued again")
        else:
            ledger.requeue(args.id)
            print(f"message {args.id} queued again")
    return EXIT_OK


def cmd_prune(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    service = settings.require_service()
    if not args.older_than >= 0:
        raise ConfigError("--older-than", f"a number of days >= 0, got {args.older_than}")
    # The service prunes on its own (retention_days); by hand, only while it is stopped.
    with ServiceLock.acquire(service.state), Ledger.open(service.ledger_path) as ledger:
        result = ledger.prune(args.older_than, service.duplicate_memory_days, vacuum=True)
    print(
        f"ledger {service.ledger_path}: {_count(result.payloads, 'payload')} and "
        f"{_count(result.attempts, 'attempt record')} removed (delivered over {args.older_than:g} days ago); "
        f"{_count(result.messages, 'message')} and {_count(result.inputs, 'input')} forgotten "
        f"(over {max(service.duplicate_memory_days, args.older_than):g} days); "
        f"{_megabytes(result.bytes_before)} -> {_megabytes(result.bytes_after)}"
        + (" after VACUUM" if result.vacuumed else "")
    )
    return EXIT_OK


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}{'' if n == 1 else 's'}"


def _megabytes(n: int) -> str:
    return f"{n / 1_000_000:.1f} MB"


def cmd_stand_in(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    where = StandInSettings(args.folder, args.mllp_port, args.fhir_port, args.answer)
    if args.list:
        return _list_stand_in(where)
    for key, port in (("--mllp-port", where.mllp_port), ("--fhir-port", where.fhir_port)):
        if not 0 <= port <= 65535:
            raise ConfigError(key, f"a port number 0-65535, got {port}")
    stop = threading.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda *_: stop.set())
    store = ResourceStore(where.resources)
    mllp: MllpPeer | None = None
    try:
        mllp = MllpPeer(where.messages, where.mllp_port, where.answer)
        fhir = FhirPeer(store, where.fhir_port)
    except OSError as exc:
        if mllp is not None:
            mllp.server.server_close()
        store.close()
        raise ConfigError("--mllp-port/--fhir-port", f"free ports on 127.0.0.1 ({exc.strerror or exc})") from exc
    mllp.start()
    fhir.start()
    print(f"dlco-bridge stand-in: MLLP on 127.0.0.1:{mllp.port} (answers {where.answer}), FHIR at {fhir.url}")
    print(f"  messages in {where.messages}/, resources in {where.resources} (stop with Ctrl-C)", flush=True)
    try:
        stop.wait()
    finally:
        mllp.stop()
        fhir.stop()
        store.close()
    print(f"dlco-bridge stand-in: stopped; {_count(mllp.received, 'message')}, {_count(fhir.bundles, 'Bundle')}")
    return EXIT_OK


def _list_stand_in(where: StandInSettings) -> int:
    if not where.resources.exists():
        print(f"{where.resources}: (file): resources kept by dlco-bridge stand-in, found none", file=sys.stderr)
        return EXIT_BAD_INPUT
    store = ResourceStore(where.resources)
    try:
        resources = store.all()
    finally:
        store.close()
    for item in resources:
        print(f"{item.reference:<24} v{item.version}  {item.criteria}")
    messages = len(list(where.messages.glob("*.hl7"))) if where.messages.is_dir() else 0
    print(f"{_count(len(resources), 'resource')}; {_count(messages, 'HL7 message')} in {where.messages}")
    return EXIT_OK


COMMANDS = {
    "stand-in": cmd_stand_in,
    "prune": cmd_prune,
    "watch": cmd_watch,
    "status": cmd_status,
    "resend": cmd_resend,
    "check": cmd_check,
    "convert": cmd_convert,
    "demo": cmd_demo,
    "show": cmd_show,
    "schema": cmd_schema,
    "audit": cmd_audit,
    "map": cmd_map,
}
_NEEDS_CONFIG = ("watch", "status", "resend", "prune")


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        settings = settings_of(args, os.environ)
        if args.command in _NEEDS_CONFIG and settings.source.startswith("("):
            raise ConfigError("--config", f"a configuration file (--config FILE or ${CONFIG_ENV}; see {SAMPLE_CONFIG})")
        tables = load_tables(traditional_per_si=settings.traditional_per_si)
        return COMMANDS[args.command](args, settings, tables)
    except BridgeError as exc:
        print(f"dlco-bridge: {exc}", file=sys.stderr)
        return EXIT_SETUP
