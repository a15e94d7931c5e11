"""The commands on files: check, convert, demo, show, schema, map check, audit (shell)."""

from __future__ import annotations

import argparse
import functools
import json
import shutil
import sys
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

import orjson

from bridge.cli.outputs import OutputFolder, Written
from bridge.cli.parser import EXIT_BAD_INPUT, EXIT_OK, EXIT_SETUP
from bridge.config import (
    Settings,
)
from bridge.display.bundle_summary import describe_bundle
from bridge.display.check_report import CAUTION, finding_text, outcome_json, outcome_text
from bridge.display.hl7_fields import describe_er7
from bridge.display.map_report import MapCheck, map_check_json, map_check_text, passes
from bridge.errors import ConfigError, InputError, ProcessingFailed, UnknownFormat
from bridge.hl7.mllp import unframed
from bridge.inputs import Found, each_input, find_inputs, read_input
from bridge.model import OUTPUT_KINDS, Outcome, Severity
from bridge.pipeline import PipelineSettings, Route, process_all
from bridge.readers.csv_export import read_csv
from bridge.readers.hl7v2_legacy import read_hl7
from bridge.readers.schema import export_schema
from bridge.tables import Tables
from bridge.tables.files import load_field_map, load_map_choice, samples_dir


def gather(paths: Sequence[Path], settings: Settings, tables: Tables) -> tuple[list[Path], list[Found]]:
    """The inputs under ``paths`` (the folder rule of :mod:`bridge.inputs`), and the files skipped."""
    maps = load_map_choice(settings.field_map, settings.maps, tables)
    inputs: list[Path] = []
    skipped: list[Found] = []
    for found in find_inputs(paths, maps):
        if found.skipped is None:
            inputs.append(found.path)
        else:
            skipped.append(found)
    return inputs, skipped


def run_inputs(
    paths: Sequence[Path], settings: Settings, tables: Tables, routes: Sequence[Route] = (), now: datetime | None = None
) -> Iterator[tuple[Path, Outcome | InputError]]:
    """The pipeline over every input file of ``paths``; an InputError is returned in place of its outcome.

    Reading, the size limit and the guard that keeps one file from stopping the others are
    :func:`bridge.inputs.each_input`'s (any other exception becomes that file's
    :class:`ProcessingFailed`). ``paths`` are taken as found by :func:`gather`.
    """
    now = now or datetime.now(UTC)  # the shell reads the clock once per run; the pipeline receives it
    maps = load_map_choice(settings.field_map, settings.maps, tables)
    for path in paths:
        # The record names its input by file name, as the service does; errors name the path given.
        # A field map may find many sessions in one file: one result each.
        pipeline = settings.pipeline.reading_with(maps.for_file(path.name))
        work = functools.partial(process_all, source=path.name, tables=tables, settings=pipeline)
        read = each_input(path, settings.pipeline.max_input_bytes, functools.partial(work, now=now, routes=routes))
        for result in read:
            yield path, result.with_source(str(path)) if isinstance(result, InputError) else result


def no_inputs(paths: Sequence[Path], inputs: Sequence[Path], skipped: Sequence[Found]) -> bool:
    """Whether ``paths`` hold no input at all (an empty folder, say), said on stderr once."""
    if inputs:
        return False
    named = ", ".join(str(p) for p in paths)
    also = f" ({skipped_text(skipped)})" if skipped else ""
    print(f"{named}: (inputs): at least one export file, found none{also}", file=sys.stderr)
    return True


SHOWN_SKIPPED = 5  # names shown per reason; the count is always complete


def skipped_text(skipped: Sequence[Found]) -> str:
    """``3 skipped: not an export: README.txt, Thumbs.db; hidden: .DS_Store`` (the folder rule's count)."""
    reasons: dict[str, list[str]] = {}
    for found in skipped:
        reasons.setdefault(found.skipped or "", []).append(found.path.name)
    parts = []
    for reason, names in reasons.items():
        more = f" and {len(names) - SHOWN_SKIPPED} more" if len(names) > SHOWN_SKIPPED else ""
        parts.append(f"{reason}: {', '.join(names[:SHOWN_SKIPPED])}{more}")
    return f"{len(skipped)} skipped, " + "; ".join(parts)


def cmd_check(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    inputs, skipped = gather(args.files, settings, tables)
    if no_inputs(args.files, inputs, skipped):
        return EXIT_BAD_INPUT
    failed = 0
    reports: list[dict[str, object]] = []
    for path, result in run_inputs(inputs, settings, tables):
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
        shown = [{"path": str(f.path), "reason": f.skipped} for f in skipped]
        document = {"caution": CAUTION, "files": reports, "skipped": shown}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        if skipped:
            print(f"Not read: {skipped_text(skipped)} (the folder rule: dlco-bridge check --help)\n")
        print(CAUTION)
    return EXIT_BAD_INPUT if failed else EXIT_OK


def convert_files(
    paths: Sequence[Path],
    out: Path,
    settings: Settings,
    tables: Tables,
    now: datetime | None = None,
    *,
    pretty: bool = False,
    overwrite: bool = False,
) -> list[tuple[Path, Outcome | InputError, Written]]:
    """Convert every input under ``paths``; each result is (input, outcome or error, what was written).

    ``now``: the send time written into every message (default: the clock, read once).
    ``pretty``: Bundles indented for people; otherwise compact, the bytes the service sends.
    ``overwrite``: a later input with a test id already converted from other content replaces it
    (default: it is refused, naming both files).
    """
    routes = [Route(kind, settings.units) for kind in settings.to]
    folder = OutputFolder(out, overwrite, pretty)
    inputs, _ = gather(paths, settings, tables)
    results: list[tuple[Path, Outcome | InputError, Written]] = []
    for path, result in run_inputs(inputs, settings, tables, routes, now):
        if isinstance(result, InputError):
            results.append((path, result, Written(())))
            continue
        try:
            results.append((path, result, folder.write(path, result)))
        except InputError as exc:
            results.append((path, exc, Written(())))
    return results


def cmd_convert(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    inputs, skipped = gather(args.files, settings, tables)
    if no_inputs(args.files, inputs, skipped):
        return EXIT_BAD_INPUT
    try:
        args.out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError("--out", f"a folder that can be written, got {args.out} ({exc.strerror})") from exc
    failed = 0
    for path, result, written in convert_files(
        inputs, args.out, settings, tables, pretty=args.pretty, overwrite=args.overwrite
    ):
        if isinstance(result, InputError):
            failed += 1
            print(result.line(), file=sys.stderr)
            continue
        note = f" ({written.note})" if written.note else ""
        print(f"{path}: {', '.join(str(w) for w in written.files)}{note}{_finding_summary(result)}")
    if skipped:
        print(f"Not read: {skipped_text(skipped)} (the folder rule: dlco-bridge convert --help)")
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
        names = " + ".join(w.name for w in written.files)
        print(f"  {status:<8} {path.name} -> {names}")
        for finding in result.findings:
            label = "NOTE" if finding.severity is Severity.INFO else finding.severity.value.upper()
            text = finding_text(finding, tables, settings.units, settings.pipeline.emit.hemoglobin_unit)
            print(f"           {label} {finding.code}: {text}")
    good = sum(1 for _, r, _ in converted if not isinstance(r, InputError))
    print(f"\n  {good} sessions converted, {len(converted) - good} refused; outputs in {out}")
    print(f"  look inside: dlco-bridge show {out}/<test id>.oru.hl7")
    print(f"  the demo's files (invented data) stay in {work}; remove them with: rm -r {work}\n")
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
    stripped = unframed(text, also="\n\t \ufeff")  # MLLP framing and white space around a message
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
    from bridge.audit.report import MANIFEST
    from bridge.audit.run import AuditSettings, Job, run_audit, terminal  # matplotlib: only when auditing

    if args.workers is not None and args.workers < 1:
        print("dlco-bridge: --workers: at least 1", file=sys.stderr)
        return EXIT_SETUP
    missing = [p for p in args.paths if not p.exists()]
    if missing:  # a mistyped or unmounted archive is not an empty one
        print(f"{missing[0]}: (path): an existing file or folder to audit, found none", file=sys.stderr)
        return EXIT_BAD_INPUT
    # An earlier report (its manifest) is replaced only when asked; a folder that is not one is refused by the
    # report writer (bridge.audit.report.prepare_folder), which removes exactly what the earlier run listed.
    if (args.report / MANIFEST).exists() and not args.overwrite:
        raise ConfigError("--report", f"a folder without an earlier report, got {args.report} holding {MANIFEST} "
                          "(--overwrite replaces it)")  # fmt: skip
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
    skipped = f", {summary['skipped']} skipped (not exports)" if summary.get("skipped") else ""
    print(
        f"{summary['files']} files, {summary['records']} records: {summary['ready']} can migrate as they are, "
        f"{summary['need_decision']} need a decision, {summary['unreadable']} cannot be read; "
        f"{summary['findings']} findings{skipped}; report in {args.report / 'report.html'}"
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
        results = list(process_all(data, name, tables, shown, now=datetime.now(UTC)))
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
