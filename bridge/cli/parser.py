"""The argument parser, the exit codes, and the one settings object for a run (shell)."""

from __future__ import annotations

import argparse
from collections.abc import Mapping
from pathlib import Path

from bridge.config import CONFIG_ENV, SAMPLE_CONFIG, Settings, config_path, load_settings
from bridge.config.reader import MAX_INPUT_BYTES_LIMIT, SETTING_KEYS
from bridge.display.check_report import CAUTION
from bridge.display.map_report import SHOWN_RECORDS
from bridge.emit.settings import CHARTED_PREDICTED, PATIENT_REFERENCES
from bridge.inputs import FOLDER_RULE
from bridge.science.compared import REFERENCE_BASES
from bridge.science.equation_sets import SPIROMETRY_SETS
from bridge.science.units import TRADITIONAL_PER_SI_CHOICES, UNIT_SYSTEMS
from bridge.service.receiver import ANSWERS, StandInSettings
from bridge.service.settings import Destination, ServiceSettings
from bridge.tables.files import repeatability_criteria
from bridge.version import __version__

EXIT_OK = 0
EXIT_SETUP = 1
EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130  # Ctrl-C: 128 + SIGINT, as the shell reports a program it stopped
EXIT_BROKEN_PIPE = 141  # the reader of the output went away (| head): 128 + SIGPIPE, as for other tools
# Every file the bridge creates is for its owner only (0600), every folder 0700: inputs, outputs,
# reports, ledgers and quarantine reports hold patient data (README, "Patient data on disk").
PRIVATE_UMASK = 0o077
DEFAULTS = Settings()  # shown in --help; the values themselves are written in the settings classes
DEFAULTS_SERVICE = ServiceSettings(Path(), Path(), Path(), Path(), ())
TO_HELP = f"fhir, hl7 or fhir,hl7; repeat or separate with commas (key to; default {','.join(DEFAULTS.to)})"


def _add_settings(parser: argparse.ArgumentParser, *, emits: bool, chooses_map: bool = True) -> None:
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
        help=f"largest input accepted, in bytes: a whole number up to {MAX_INPUT_BYTES_LIMIT} "
        f"(key max_input_bytes; default {DEFAULTS.pipeline.max_input_bytes})",
    )
    if chooses_map:
        _add_map(parser)
    parser.add_argument(
        "--traditional-per-si",
        type=float,
        help=f"mL/min/mmHg per mmol/min/kPa, {' or '.join(map(str, TRADITIONAL_PER_SI_CHOICES))} "
        f"(key traditional_per_si; default {DEFAULTS.traditional_per_si})",
    )
    _add_science(parser)
    if not emits:
        return
    _add_gate(parser)
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
        choices=PATIENT_REFERENCES,
        help=f"FHIR: refer to the patient by identifier, or create it if absent "
        f"(key emit.patient_reference; default {site.patient_reference})",
    )
    parser.add_argument(
        "--charted-predicted",
        dest="emit.charted_predicted",
        choices=CHARTED_PREDICTED,
        help="whose predicted values, per cent predicted and range are charted, one per quantity: the GLI-2017 "
        "values computed by dlco-bridge or the lab's own; the other set is named in the notes; outside the "
        "GLI-2017 equations' range their results are sent without a value, saying why "
        f"(key emit.charted_predicted; default {site.charted_predicted})",
    )


def _add_map(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--map",
        type=lambda value: str(Path(value).absolute()),
        help="read every input through this field map (mappings/maps/*.toml; CSV or legacy HL7 v2) "
        "(key map; default: none, inputs are dlco-result/1 JSON; [maps] chooses one per file pattern)",
    )


def _add_gate(parser: argparse.ArgumentParser) -> None:
    """The gate's flags: which findings keep a record from being written (convert, demo, the audit's hand-over)."""
    parser.add_argument(
        "--allow",
        action="append",
        metavar="CODE",
        help="an ERROR finding code to write anyway, the value marked preliminary with the finding; "
        "repeat or separate with commas (key allow; default "
        f"{','.join(sorted(DEFAULTS.pipeline.allow)) or 'none'}: "
        "every ERROR finding keeps a record from being written). A code the bridge does not know, or one "
        "that is not an error, stops the command at start",
    )
    parser.add_argument(
        "--blocking",
        action="append",
        metavar="CODE",
        help="a code of a lesser (warning, info) finding that also keeps a record from being written; "
        "repeat or separate with commas (key blocking; default "
        f"{','.join(sorted(DEFAULTS.pipeline.blocking)) or 'none'}). A code the bridge does not know stops the "
        "command at start",
    )


def _add_science(parser: argparse.ArgumentParser) -> None:
    """The flags that choose how results are judged: the repeatability criterion and the reference values."""
    parser.add_argument(
        "--repeatability",
        choices=repeatability_criteria(),
        help="the criterion that says which manoeuvres are repeatable, named in mappings/quality_grades.toml "
        "(2017: ERS/ATS 2017; 2005: ATS/ERS 2005, for legacy data); a field map's own [map] repeatability "
        f"wins for the inputs it reads (key repeatability; default {DEFAULTS.pipeline.repeatability})",
    )
    parser.add_argument(
        "--reference-basis",
        choices=REFERENCE_BASES,
        help="the DLCO and KCO that per cent predicted and z-scores compare: adjusted to sea level, as measured, "
        "or adjusted to standard Hb (and to sea level where that applies); without Hb the measured value, "
        f"with a finding (key reference_basis; default {DEFAULTS.pipeline.reference_basis})",
    )
    parser.add_argument(
        "--spirometry-reference",
        choices=SPIROMETRY_SETS,
        help="the spirometry reference equations: gli-global (GLI Global, race-neutral) or gli-2012 (GLI-2012, "
        "which uses the patient's ethnicity) "
        f"(key spirometry_reference; default {DEFAULTS.pipeline.spirometry_reference})",
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
    check.add_argument("files", nargs="+", type=Path, help=f"export files or folders: {FOLDER_RULE}")
    check.add_argument("--json", action="store_true", help="machine-readable output")
    _add_settings(check, emits=False)
    convert = commands.add_parser("convert", help="write FHIR R4 Bundles and HL7 v2.5.1 ORU^R01 messages")
    convert.add_argument("files", nargs="+", type=Path, help=f"export files or folders: {FOLDER_RULE}")
    convert.add_argument("--to", action="append", help=TO_HELP)
    convert.add_argument(
        "--out",
        type=Path,
        default=Path("out"),
        help="output folder (default ./out): <test id>.bundle.json and <test id>.oru.hl7, the test id percent-encoded "
        "where it holds other characters than letters, digits and -._~ (X/1 -> X%%2F1)",
    )
    convert.add_argument(
        "--overwrite",
        action="store_true",
        help="let a later input whose test id was already converted from other content in this run replace it "
        "(default: it is refused, naming both files)",
    )
    convert.add_argument(
        "--pretty", action="store_true", help="indent FHIR Bundles for people (default: compact, as the service sends)"
    )
    _add_settings(convert, emits=True)
    demo = commands.add_parser("demo", help="run the invented scenario end to end in a temporary folder")
    _add_settings(demo, emits=True)
    show = commands.add_parser("show", help="an HL7 v2 message with field names, or a FHIR Bundle summarised")
    show.add_argument("file", type=Path, help="an ER7 HL7 v2 message or a FHIR Bundle (JSON)")
    commands.add_parser("schema", help="print the JSON Schema of the dlco-result/1 format")
    audit = commands.add_parser("audit", help="check a whole archive, write a report folder (and bulk FHIR NDJSON)")
    audit.add_argument("paths", nargs="+", type=Path, help=f"export files or folders, each must exist: {FOLDER_RULE}")
    audit.add_argument(
        "--report",
        type=Path,
        required=True,
        help="folder for findings.csv, summary.json, report.html (a new or empty folder, or see --overwrite)",
    )
    audit.add_argument(
        "--overwrite", action="store_true", help="replace the report an earlier audit left in the --report folder"
    )
    audit.add_argument("--workers", type=int, help="worker processes (default: the number of CPUs)")
    audit.add_argument(
        "--emit",
        choices=("ndjson",),
        help="also hand over the sessions that can migrate as they are, as FHIR R4 NDJSON",
    )
    audit.add_argument("--scheduler", help="run on an existing Dask cluster at this address (the [scale] extra)")
    _add_settings(audit, emits=False)
    _add_gate(audit)  # the hand-over goes through the same gate as convert
    maps = commands.add_parser("map", help="field maps: onboard a CSV or legacy HL7 v2 source without code")
    map_commands = maps.add_subparsers(dest="map_command", required=True)
    map_check = map_commands.add_parser(
        "check",
        help="read a sample through a map: what each column or code feeds, what stays unused or empty, "
        "and what convert would do with each record",
        description="Exit 0 when every record of the sample is readable and convert (with the same settings) "
        "would send at least one; 2 when a record is unreadable or none would be sent; 1 when the map is invalid.",
    )
    map_check.add_argument("map_file", metavar="MAP", type=Path, help="the field map (TOML)")
    map_check.add_argument("sample", metavar="SAMPLE", type=Path, help="a sample export of the source")
    map_check.add_argument("--json", action="store_true", help="machine-readable output")
    map_check.add_argument(
        "--records", type=int, default=SHOWN_RECORDS, help=f"records shown field by field (default {SHOWN_RECORDS})"
    )
    map_check.add_argument("--to", action="append", help=TO_HELP)
    _add_settings(map_check, emits=True, chooses_map=False)
    config_help = f"the service's configuration file (TOML); default: ${CONFIG_ENV} (see {SAMPLE_CONFIG})"
    watch = commands.add_parser(
        "watch",
        help="run the watch-folder service",
        description=f"Take each complete export from the inbox (which must exist) and deliver it: {FOLDER_RULE}.",
    )
    watch.add_argument("--config", type=Path, help=config_help)
    _add_science(watch)
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
    _add_reconcile(commands)
    return parser


def _add_reconcile(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    in_flight = Destination("", "fhir", "fhir-rest").reconcile_in_flight
    reconcile = commands.add_parser(
        "reconcile",
        help="ask the receiving FHIR server whether it holds exactly what was sent",
        description="After a feed (--config bridge.toml): every result the ledger delivered to each destination. "
        "After a migration (PATH... --fhir-base URL): every session the pipeline would send. Each expected "
        "resource is found by identifier and called present, missing, different, duplicated, superseded or "
        "withdrawn; held resources nothing sent explains are unexpected; HL7 v2 destinations list their ACKs. "
        "Exit 0 when everything is present and equal, 1 when there are gaps, 2 when the check could not run "
        "(docs/reconcile.md).",
    )
    reconcile.add_argument(
        "paths", nargs="*", type=Path, help="migration form: export files or folders (what the pipeline would send)"
    )
    reconcile.add_argument("--fhir-base", metavar="URL", help="migration form: the target FHIR server's base URL")
    reconcile.add_argument(
        "--destination", action="append", metavar="NAME", help="feed form: only this destination (repeat; default all)"
    )
    reconcile.add_argument(
        "--since",
        metavar="DATE",
        help="feed form: only what was sent since DATE (YYYY-MM-DD, UTC; or a date-time "
        "with offset); default everything the ledger holds",
    )
    reconcile.add_argument("--report", type=Path, metavar="DIR", help="write reconcile.csv, summary.json, report.html")
    reconcile.add_argument(
        "--resend",
        action="store_true",
        help="feed form: queue the missing results again and the different ones as conditional updates, through "
        "the outbox (the service delivers them); duplicates are left for a person",
    )
    reconcile.add_argument(
        "--in-flight",
        type=_positive,
        metavar="N",
        help=f"searches at once (key destination.NAME.reconcile_in_flight; default {in_flight})",
    )
    _add_settings(reconcile, emits=True)


def _positive(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"at least 1, got {value}")
    return value


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
    damage = {
        "lose": "forget the resources found by this identifier value",
        "alter": "change their value by one in its last digit (a resource without a value: status amended)",
        "withdraw": "mark them entered-in-error",
        "duplicate": "store a second copy of each",
        "extra": "store a copy under the identifier value VALUE-extra (never sent)",
    }
    for kind, what in damage.items():
        stand_in.add_argument(
            f"--{kind}",
            action="append",
            metavar="VALUE",
            help=f"rehearse a receiver's damage for reconcile: {what}, in FOLDER, then exit (repeat; "
            "VALUE: an identifier value, or a Provenance's sha256:...)",
        )


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
    flags = {key: value for key, value in vars(args).items() if key in SETTING_KEYS}  # a flag whose dest is a key
    return load_settings(config_path(getattr(args, "config", None), environ), environ, flags)
