"""The commands on files: check, convert, demo, show, schema, map check, audit (shell)."""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

import orjson

from bridge.cli.parser import EXIT_BAD_INPUT, EXIT_OK, EXIT_SETUP
from bridge.config import (
    Settings,
)
from bridge.display.bundle_summary import describe_bundle
from bridge.display.check_report import CAUTION, finding_text, outcome_json, outcome_text
from bridge.display.hl7_fields import describe_er7
from bridge.display.map_report import MapCheck, map_check_json, map_check_text, passes
from bridge.emit.outputs import file_stem
from bridge.errors import InputError, ProcessingFailed, UnknownFormat, UnreadableInput
from bridge.model import OUTPUT_KINDS, Outcome, Severity
from bridge.pipeline import PipelineSettings, Route, process_all
from bridge.readers.csv_export import read_csv
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.readers.schema import export_schema
from bridge.service.transports.base import OutgoingMessage
from bridge.service.transports.file import FileTransport
from bridge.tables import Tables
from bridge.tables.files import load_field_map, load_map_choice, samples_dir


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
    maps = load_map_choice(settings.field_map, settings.maps, tables)
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
                    report = outcome_json(result, tables, settings.units, settings.pipeline.emit.hemoglobin_unit)
                else:
                    report = outcome_text(result, tables, settings.units, settings.pipeline.emit.hemoglobin_unit)
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
            text = finding_text(finding, tables, settings.units, settings.pipeline.emit.hemoglobin_unit)
            print(f"           {label} {finding.code}: {text}")
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
    load_map_choice(settings.field_map, settings.maps, tables)  # a broken map stops the audit here
    now, units = datetime.now(UTC), settings.units
    job = Job(
        settings.pipeline, settings.traditional_per_si, units, now, audit.emit_ndjson, settings.field_map, settings.maps
    )
    try:
        summary = run_audit(args.paths, args.report, job, audit, progress=terminal(), scheduler=args.scheduler)
    except OSError as exc:  # the report folder cannot be written, or the scheduler cannot be reached
        print(f"dlco-bridge: audit could not run: {exc}", file=sys.stderr)
        return EXIT_SETUP
    print(
        f"{summary['files']} files, {summary['records']} records: {summary['ready']} can migrate as they are, "
        f"{summary['need_decision']} need a decision, {summary['unreadable']} cannot be read; "
        f"{summary['findings']} findings; report in {args.report / 'report.html'}"
    )
    print(CAUTION)
    return EXIT_OK


def cmd_map(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    """``map check MAP SAMPLE``: an invalid map is a setup error (exit 1) naming its file, line and key.

    Each record goes through the pipeline twice: as ``check`` (every finding, for the report) and as
    ``convert`` with the same settings (what would be sent); exit 2 unless :func:`passes`.
    """
    fmap = load_field_map(args.map_file, tables)
    name = args.sample.name
    try:
        data = read_input(args.sample, settings.pipeline.max_input_bytes)
        reader = read_csv if fmap.format == "csv" else read_hl7
        records = list(reader(data, name, fmap, tables.units))
        shown = replace(settings.pipeline, field_map=replace(fmap, on_bad_record="skip"))  # show every record
        results = list(process_all(data, name, tables, shown))
        decisions = _as_convert(data, name, replace(settings.pipeline, field_map=fmap), settings, tables)
    except InputError as exc:
        print(exc.with_source(str(args.sample)).line(), file=sys.stderr)
        return EXIT_BAD_INPUT
    decided = (*decisions, *[None] * (len(records) - len(decisions)))  # None: "refuse" stopped the file before it
    check = MapCheck(fmap, str(args.sample), tuple(zip(records, results, strict=True)), decided)
    if args.json:
        document = {"caution": CAUTION, **map_check_json(check)}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        sys.stdout.write(map_check_text(check, max(args.records, 0)))
        print(CAUTION)
    return EXIT_OK if passes(check) else EXIT_BAD_INPUT


def _as_convert(
    data: bytes, name: str, pipeline: PipelineSettings, settings: Settings, tables: Tables
) -> list[Outcome | InputError]:
    """The pipeline's decision on each record as ``convert`` would take it (its routes, gate and ``on_bad_record``)."""
    routes = [Route(kind, settings.units) for kind in settings.to]
    decided: list[Outcome | InputError] = []
    try:
        decided.extend(process_all(data, name, tables, pipeline, now=datetime.now(UTC), routes=routes))
    except InputError as exc:  # on_bad_record = "refuse": the first refused record refuses the rest of the file
        decided.append(exc)
    return decided
