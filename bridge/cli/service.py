"""The commands of the watch-folder service: watch, status, resend, prune, stand-in (shell)."""

from __future__ import annotations

import argparse
import math
import signal
import sys
import threading
from dataclasses import asdict
from pathlib import Path

import orjson

from bridge.cli.parser import EXIT_BAD_INPUT, EXIT_OK
from bridge.config import Settings
from bridge.errors import ConfigError
from bridge.service.folders import check_folders
from bridge.service.ledger import Ledger, ServiceLock
from bridge.service.logs import configure as configure_logging
from bridge.service.receiver import FhirPeer, MllpPeer, ResourceStore, StandInSettings
from bridge.service.receiver.damage import KINDS, plant
from bridge.service.runner import Service
from bridge.service.settings import Destination
from bridge.service.transports.base import TlsOptions, Transport
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.file import FileTransport
from bridge.service.transports.mllp import MllpTransport
from bridge.service.transports.smart import SmartClient
from bridge.tables import Tables
from bridge.tables.files import load_map_choice


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
            read_timeout=destination.answer_timeout,
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
        read_timeout=destination.answer_timeout,
        tls=tls,
    )


def cmd_watch(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    # Handlers first: a stop asked for while the ledger opens is honoured, not a hard exit.
    stop = threading.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda *_: stop.set())
    service_settings = settings.require_service()
    configure_logging(service_settings.log_format)
    try:
        check_folders(service_settings)
    except ConfigError as exc:
        raise ConfigError(exc.key, exc.expected, settings.source) from None  # named with the configuration file
    created = () if service_settings.state.is_dir() else (service_settings.state,)  # the lock makes it
    with ServiceLock.acquire(service_settings.state), Ledger.open(service_settings.ledger_path) as ledger:
        transports = {d.name: build_transport(d) for d in service_settings.destinations}
        maps = load_map_choice(settings.field_map, settings.maps, tables)
        service = Service(
            service_settings, settings.pipeline, maps, tables, ledger, transports, stop=stop, created=created
        )
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


SQLITE_MAX_INTEGER = 2**63 - 1  # source: SQLite datatypes, INTEGER is a signed 8-byte value


def existing_ledger(settings: Settings) -> Path:
    """The service's ledger, which must exist: a mistyped state folder is not a fresh, empty ledger."""
    service = settings.require_service()
    if not service.ledger_path.is_file():
        raise ConfigError(
            "state",
            f"the service's state folder, holding {service.ledger_path.name}; got {service.state}, which does not "
            "(mistyped, or the service has never run with it)",
            settings.source,
        )
    return service.ledger_path


def cmd_resend(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    if args.id is not None and not 1 <= args.id <= SQLITE_MAX_INTEGER:
        raise ConfigError("ID", f"an outbox id (dlco-bridge status --json), got {args.id}")
    with Ledger.open(existing_ledger(settings)) as ledger:
        if args.rejected:
            count = ledger.requeue_rejected()
            print(f"{count} rejected message{'' if count == 1 else 's'} queued again")
        else:
            ledger.requeue(args.id)
            print(f"message {args.id} queued again")
    return EXIT_OK


def cmd_prune(args: argparse.Namespace, settings: Settings, tables: Tables) -> int:
    service = settings.require_service()
    if not (math.isfinite(args.older_than) and args.older_than >= 0):
        raise ConfigError("--older-than", f"a number of days >= 0, got {args.older_than}")
    # The service prunes on its own (retention_days); by hand, only while it is stopped.
    with ServiceLock.acquire(service.state), Ledger.open(existing_ledger(settings)) as ledger:
        result = ledger.prune(args.older_than, service.duplicate_memory_days, vacuum=True)
    print(
        f"ledger {service.ledger_path}: {_count(result.payloads, 'payload')} and "
        f"{_count(result.attempts, 'attempt record')} removed (delivered over {args.older_than:g} days ago); "
        f"{_count(result.messages, 'message')}, {_count(result.inputs, 'input')} and "
        f"{_count(result.sent_records, 'superseded record')} of sent resources forgotten "
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
    if any(getattr(args, kind) for kind in KINDS):
        return _damage_stand_in(where, args)
    for key, port in (("--mllp-port", where.mllp_port), ("--fhir-port", where.fhir_port)):
        if not 0 <= port <= 65535:
            raise ConfigError(key, f"a port number 0-65535, got {port}")
    stop = threading.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda *_: stop.set())
    store = ResourceStore(where.resources)
    mllp: MllpPeer | None = None
    try:  # a port in use is a ConfigError naming its option
        mllp = MllpPeer(where.messages, where.mllp_port, where.answer)
    except OSError as exc:
        store.close()
        raise _port_taken("--mllp-port", where.mllp_port, exc) from exc
    try:
        fhir = FhirPeer(store, where.fhir_port)
    except ConfigError:
        if mllp is not None:
            mllp.stop()
        store.close()
        raise
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


def _port_taken(flag: str, port: int, exc: OSError) -> ConfigError:
    """One line naming the flag and the port that could not be bound."""
    return ConfigError(flag, f"a free port on 127.0.0.1, got {port} ({exc.strerror or exc})")


def _damage_stand_in(where: StandInSettings, args: argparse.Namespace) -> int:
    """``--lose``, ``--alter``, ``--withdraw``, ``--duplicate``, ``--extra``: damage planted for reconcile."""
    if not where.resources.exists():
        print(f"{where.resources}: (file): resources kept by dlco-bridge stand-in, found none", file=sys.stderr)
        return EXIT_BAD_INPUT
    store = ResourceStore(where.resources)
    try:
        for kind in KINDS:
            for value in getattr(args, kind) or ():
                for line in plant(store, kind, value):
                    print(line)
    except LookupError as exc:
        print(f"{where.resources}: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    finally:
        store.close()
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
