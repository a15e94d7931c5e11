"""Ledger bytes per input: one-session inputs taken by the service's intake and delivered to one destination.

Run: ``python benchmarks/bench_ledger.py [--inputs 2000] [--payload fhir|hl7] [--json]``.

In one process, in a temporary folder: N invented exports (the clean bundled samples under new
test and patient ids, one session each) are taken by the service's own :class:`Intake` (the
pipeline, the ledger commit, the archive move), then every message is delivered by the
service's own ``deliver_due`` to a transport that accepts everything at once (what a receiver
answers costs the ledger one short ``ack_text``, kept as a FHIR server's summary would be).
The ledger is closed (SQLite checkpoints its WAL into the file and removes it) and its file
size divided by N is the figure: what one input costs the ledger until retention prunes its
payload. Also printed: the bytes of payloads alone, as ``status`` counts them, and the pages
SQLite keeps free.

Also measured, on the same Bundles: the payload as compact JSON, and compressed by zlib
(stdlib) and by zstandard (PyPI, when installed) at a few levels, with the time each takes.

This is a script, not a test: it prints figures and never fails a build.
"""

from __future__ import annotations

import argparse
import json
import platform
import random
import sys
import tempfile
import time
import zlib
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import orjson

from bridge.config import parse_settings
from bridge.pipeline import Route, process
from bridge.service.delivery import deliver_due
from bridge.service.intake import Intake
from bridge.service.ledger import Ledger
from bridge.service.metrics import Metrics
from bridge.service.transports.base import DeliveryReceipt, OutgoingMessage
from bridge.tables.files import load_tables, samples_dir

TEMPLATES = (  # the bundled samples that are neither refused nor blocked, one session each
    "01-healthy-adult.json",
    "02-anaemic-patient.json",
    "03-high-altitude.json",
    "04-raised-cohb.json",
    "05-child.json",
    "06-three-manoeuvres.json",
)
TARGET_BYTES_PER_INPUT = 8_000  # issue 21: at most 8 kB per one-session input to one destination


class Accepting:
    """A transport that accepts every message at once, answering as a FHIR server's summary would."""

    def __init__(self) -> None:
        self.delivered = 0

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        self.delivered += 1
        return DeliveryReceipt("200", "201 Created x9")

    def close(self) -> None:
        """Nothing held."""


def inputs(count: int, seed: int = 20261203) -> list[bytes]:
    """``count`` invented one-session exports with unique test and patient ids."""
    rng = random.Random(seed)
    templates = [json.loads((samples_dir() / name).read_bytes()) for name in TEMPLATES]
    made = []
    for n in range(count):
        document = json.loads(json.dumps(templates[n % len(templates)]))
        document["test_id"] = f"LEDGER-{n:06d}"
        document["patient"]["id"] = f"FICT-L{rng.randrange(10**6):06d}"
        made.append(json.dumps(document, indent=2).encode("utf-8"))
    return made


def run_ledger(count: int, payload: str, folder: Path) -> dict[str, Any]:
    """Take ``count`` inputs, deliver their messages, measure the closed ledger file."""
    units = ' units = "si"' if payload == "fhir" else ""
    settings = parse_settings(
        'inbox = "in"\narchive = "ar"\nquarantine = "q"\nstate = "st"\nstable_seconds = 0\n'
        f'[destination.one]\npayload = "{payload}"\n{units}\ntransport = "file"\nfolder = "out"\n',
        {},
        base=folder,
    )
    service = settings.require_service()
    service.inbox.mkdir(parents=True)
    tables = load_tables()
    transport = Accepting()
    started = time.perf_counter()
    with Ledger.open(service.ledger_path) as ledger:
        intake = Intake(settings, tables, ledger, Metrics(time.time))
        for n, data in enumerate(inputs(count)):
            path = service.inbox / f"in-{n:06d}.json"
            path.write_bytes(data)
            intake.take(path, time.time())
        deliver_due(ledger, {"one": transport}, time.time, random.random)
        size = ledger.size()
        summary = ledger.summary()
    elapsed = time.perf_counter() - started
    wal = service.ledger_path.with_name(service.ledger_path.name + "-wal")
    file_bytes = service.ledger_path.stat().st_size + (wal.stat().st_size if wal.exists() else 0)
    return {
        "inputs": count,
        "payload": payload,
        "delivered": summary.delivered,
        "ledger_bytes": file_bytes,
        "bytes_per_input": file_bytes / count,
        "payload_bytes_per_input": size.payload_bytes / count,
        "free_bytes": size.free_bytes,
        "seconds": elapsed,
        "target_bytes_per_input": TARGET_BYTES_PER_INPUT,
        "within_target": file_bytes / count <= TARGET_BYTES_PER_INPUT,
    }


def codecs() -> dict[str, Callable[[bytes], bytes]]:
    """zlib at levels 1, 6 (its default) and 9; zstandard at 3 (its default) and 19 when installed."""
    found: dict[str, Callable[[bytes], bytes]] = {
        f"zlib-{level}": (lambda data, level=level: zlib.compress(data, level)) for level in (1, 6, 9)
    }
    try:
        import zstandard  # type: ignore[import-not-found]  # optional: measured only when installed
    except ImportError:
        return found
    for level in (3, 19):
        found[f"zstd-{level}"] = zstandard.ZstdCompressor(level=level).compress
    return found


def run_codecs(count: int) -> dict[str, Any]:
    """Each codec on ``count`` compact Bundles: mean compressed bytes and microseconds per Bundle."""
    tables = load_tables()
    now = datetime(2026, 12, 3, tzinfo=UTC)
    bundles = [
        process(data, f"c-{n}.json", tables, routes=(Route("fhir", "si"),), now=now).payloads[0].data
        for n, data in enumerate(inputs(count))
    ]
    # The Bundle as the emitter writes it, and re-dumped without indentation (what the wire carries).
    compact = [orjson.dumps(orjson.loads(b)) for b in bundles]
    report: dict[str, Any] = {
        "bundles": count,
        "emitted_bytes": sum(map(len, bundles)) / count,
        "compact_bytes": sum(map(len, compact)) / count,
        "codecs": {},
    }
    for name, compress in codecs().items():
        started = time.perf_counter()
        sizes = [len(compress(b)) for b in compact]
        report["codecs"][name] = {
            "bytes": sum(sizes) / count,
            "us_per_bundle": (time.perf_counter() - started) / count * 1e6,
        }
    packed = [zlib.compress(b) for b in compact]
    started = time.perf_counter()
    for p in packed:
        zlib.decompress(p)
    report["zlib_decompress_us"] = (time.perf_counter() - started) / count * 1e6
    return report


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--inputs", type=int, default=2000)
    parser.add_argument("--payload", choices=("fhir", "hl7"), default="fhir")
    parser.add_argument("--codec-bundles", type=int, default=200)
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="bench-ledger-") as folder:
        ledger = run_ledger(args.inputs, args.payload, Path(folder))
    result = {
        "machine": {"python": platform.python_version(), "platform": platform.platform()},
        "ledger": ledger,
        "codecs": run_codecs(args.codec_bundles),
    }
    if args.json:
        print(orjson.dumps(result).decode())
        return 0
    print(
        f"ledger: {ledger['inputs']} one-session inputs, {ledger['payload']} to one destination, "
        f"{ledger['delivered']} delivered in {ledger['seconds']:.1f} s"
    )
    print(
        f"  {ledger['ledger_bytes'] / 1e6:.1f} MB: {ledger['bytes_per_input'] / 1000:.1f} kB per input "
        f"({ledger['payload_bytes_per_input'] / 1000:.1f} kB of it payload; target "
        f"<= {TARGET_BYTES_PER_INPUT / 1000:.0f} kB: {'met' if ledger['within_target'] else 'NOT met'})"
    )
    c = result["codecs"]
    print(
        f"payloads: {c['bundles']} Bundles, {c['emitted_bytes'] / 1000:.1f} kB as emitted, "
        f"{c['compact_bytes'] / 1000:.1f} kB as compact JSON"
    )
    for name, figures in c["codecs"].items():
        print(f"  {name:<8} {figures['bytes'] / 1000:6.2f} kB  {figures['us_per_bundle']:8.0f} us per Bundle")
    print(f"  zlib decompress {c['zlib_decompress_us']:.0f} us per Bundle")
    return 0


if __name__ == "__main__":
    sys.exit(main())
