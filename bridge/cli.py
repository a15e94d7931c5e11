"""The console script ``dlco-bridge``: the composition root (shell).

Owns: parsing arguments (every option also from a ``DLCO_BRIDGE_*`` environment variable),
reading files, calling the pure core, printing, and exit codes. Exit 0 when every input was
read, 2 when one could not be (one line per bad input on stderr), 1 on a usage or setup error.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path

import orjson

from bridge import __version__
from bridge.errors import BridgeError, InputError, UnreadableInput
from bridge.mapping import Tables
from bridge.model import Outcome
from bridge.pipeline import DEFAULT_MAX_INPUT_BYTES, Limits, process
from bridge.render import CAUTION, outcome_json, outcome_text
from bridge.resources import load_tables
from bridge.schema import export_schema
from bridge.units import TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE, UnitSystem

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
    commands.add_parser("schema", help="print the JSON Schema of the dlco-result/1 format")
    return parser


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


def run_inputs(
    paths: Sequence[Path], tables: Tables, limits: Limits
) -> Iterator[tuple[Path, Outcome | InputError]]:
    """Process every input; an InputError is returned in place of its outcome, never raised."""
    for path in expand(paths):
        try:
            yield path, process(read_input(path, limits), str(path), tables, limits)
        except InputError as exc:
            yield path, exc


def cmd_check(args: argparse.Namespace, tables: Tables) -> int:
    units: UnitSystem = args.units
    limits = Limits(max_input_bytes=args.max_bytes)
    failed = 0
    reports = []
    for _, result in run_inputs(args.files, tables, limits):
        if isinstance(result, InputError):
            failed += 1
            print(result.line(), file=sys.stderr)
            reports.append({"source": result.source, "error": result.line()})
            continue
        if args.json:
            reports.append(outcome_json(result, tables, units))
        else:
            print(outcome_text(result, tables, units), end="\n\n")
    if args.json:
        document = {"caution": CAUTION, "files": reports}
        sys.stdout.write(orjson.dumps(document, option=orjson.OPT_INDENT_2).decode() + "\n")
    else:
        print(CAUTION)
    return EXIT_BAD_INPUT if failed else EXIT_OK


def cmd_schema(args: argparse.Namespace, tables: Tables) -> int:
    sys.stdout.write(json.dumps(export_schema(), indent=2, sort_keys=True) + "\n")
    return EXIT_OK


COMMANDS = {"check": cmd_check, "schema": cmd_schema}


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        tables = load_tables(traditional_per_si=getattr(args, "factor", TRADITIONAL_PER_SI))
        return COMMANDS[args.command](args, tables)
    except BridgeError as exc:
        print(f"dlco-bridge: {exc}", file=sys.stderr)
        return EXIT_SETUP
