"""``dlco-bridge reconcile`` (feed form) against the stand-in on loopback: time and peak memory.

Run: ``python benchmarks/bench_reconcile.py [--sessions 10000] [--small 1000] [--in-flight 4] [--json]``.

Set-up (not timed): generated sessions (``bench_convert.generate``: invented, varied, every
sample's shape) go through the one pipeline to their FHIR transaction Bundle (SI units); each
Bundle is applied to a stand-in store with the stand-in's own transaction code and recorded in
a service ledger as delivered, as ``watch`` would have left them. Both files live under
``/dev/shm`` when it exists (their fsyncs are not what is measured).

Measured: the stand-in runs as its own process (``dlco-bridge stand-in``, as a user runs it); then
``dlco-bridge reconcile --config ... --report DIR`` as a subprocess, timed by the wall clock from
start to exit, its RSS and its high-water mark read from ``/proc`` every 0.05 s. It must
find every resource present and equal (exit 0) and look for unexpected ones. The same is done
for ``--small`` sessions: the peak memory of the two runs is compared (flat: within a few MB,
however many sessions). The floor: the same searches fetched with the same HTTP client, one
after another, parsed with orjson and nothing else (no ledger, no classification, no report).
Generated data is invented: names, identifiers and labs are made up.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import platform
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import orjson

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_convert import SETTINGS, generate

from bridge.pipeline import Route, process
from bridge.reconcile.bundles import expected_from_bundle, parse_bundle
from bridge.reconcile.search import batches
from bridge.service.ledger import Ledger, NewInput, NewMessage
from bridge.service.receiver.fhir_peer import process_transaction
from bridge.service.receiver.store import ResourceStore
from bridge.tables.files import load_tables

TARGET_SECONDS = 60.0  # 10,000 sessions (issue 27)
NOW = datetime(2026, 3, 10, 12, tzinfo=UTC)


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def prepare(folder: Path, sessions: int, fhir_port: int) -> Path:
    """A stand-in store and a ledger holding ``sessions`` delivered Bundles; the configuration file."""
    tables = load_tables()
    store = ResourceStore(folder / "stand-in" / "resources.sqlite3")
    store._conn.execute("PRAGMA synchronous = OFF")  # set-up only: the stand-in reopens it with its defaults
    ledger = Ledger.open(folder / "state" / "ledger.sqlite3")
    for number, data in enumerate(generate(sessions)):
        outcome = process(data, f"gen-{number}.json", tables, SETTINGS, now=NOW, routes=(Route("fhir", "si"),))
        payload = outcome.payloads[0]
        process_transaction(store, json.loads(payload.data))
        message = NewMessage("fhir-store", f"{payload.message_id}.{outcome.source_sha256[:12]}",
                             outcome.session.test_id, outcome.session.patient.id, payload.data, payload.content_type,
                             outcome.source_sha256)  # fmt: skip
        (row,) = ledger.record_input_and_enqueue(
            NewInput(outcome.source_sha256, f"gen-{number}.json", outcome.session.test_id, "processed"), [message]
        )
        ledger.mark_delivered(row, "200 OK")
    ledger.close()
    store.close()
    config = folder / "bridge.toml"
    config.write_text(
        'inbox = "inbox"\narchive = "archive"\nquarantine = "quarantine"\nstate = "state"\n'
        '[destination.fhir-store]\npayload = "fhir"\nunits = "si"\ntransport = "fhir-rest"\n'
        f'base_url = "http://127.0.0.1:{fhir_port}/fhir"\n'
    )
    return config


def stand_in(folder: Path, fhir_port: int) -> subprocess.Popen[str]:
    process_ = subprocess.Popen(
        [sys.executable, "-m", "bridge", "stand-in", "--folder", str(folder / "stand-in"),
         "--fhir-port", str(fhir_port), "--mllp-port", str(free_port())],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )  # fmt: skip
    assert process_.stdout is not None
    first = process_.stdout.readline()
    if "FHIR at" not in first:
        raise SystemExit(f"the stand-in did not start: {first}")
    return process_


def reconcile(config: Path, report: Path, in_flight: int) -> dict[str, Any]:
    """One ``dlco-bridge reconcile`` subprocess: wall time, exit code, its RSS every 0.05 s and its peak.

    The peak is the child's own high-water mark (``VmHWM``), read until it exits: ``wait4``'s
    ``ru_maxrss`` would count the pages of this (large) process that the child had before its exec.
    """
    log = report.parent / "reconcile.log"
    samples: list[tuple[float, float, float]] = []
    started = time.perf_counter()
    with log.open("w") as out:
        child = subprocess.Popen(
            [sys.executable, "-m", "bridge", "reconcile", "--config", str(config), "--report", str(report),
             "--in-flight", str(in_flight)],
            stdout=out, stderr=subprocess.STDOUT,
        )  # fmt: skip
        while child.poll() is None:
            memory = _memory_mb(child.pid)
            if memory is not None:
                samples.append((time.perf_counter() - started, *memory))
            time.sleep(0.05)
    seconds = time.perf_counter() - started
    summary = json.loads((report / "summary.json").read_text()) if (report / "summary.json").exists() else {}
    quarters = [samples[min(len(samples) - 1, len(samples) * q // 4)][1] for q in (1, 2, 3, 4)] if samples else []
    peak, output = round(max((s[2] for s in samples), default=0.0), 1), log.read_text()[-400:]
    return {"seconds": round(seconds, 2), "exit": child.returncode, "peak_rss_mb": peak,
            "rss_at_quarters_mb": [round(q, 1) for q in quarters], "counts": summary.get("counts"),
            "output": output}  # fmt: skip


def _memory_mb(pid: int) -> tuple[float, float] | None:
    """(VmRSS, VmHWM) of a live process in MB; None once it is gone."""
    try:
        fields = dict(line.split(":", 1) for line in Path(f"/proc/{pid}/status").read_text().splitlines())
        return int(fields["VmRSS"].split()[0]) / 1024, int(fields["VmHWM"].split()[0]) / 1024
    except (OSError, KeyError, ValueError):
        return None


def floor(config: Path, sessions: int, fhir_port: int) -> float:
    """The same searches, one after another, with one httpx client; orjson parses each page; nothing else."""
    tables_free = []
    with Ledger.open(config.parent / "state" / "ledger.sqlite3", read_only=True) as ledger:
        rows = ledger.latest_per_test("fhir-store", delivered_only=True, limit=sessions + 1)
        for row in rows:
            tables_free += expected_from_bundle(parse_bundle(row.payload), destination="d", test_id=row.test_id)
    queries = [batch.query() for batch in batches(tables_free)]
    base = f"http://127.0.0.1:{fhir_port}/fhir/"
    started = time.perf_counter()
    with httpx.Client(trust_env=False, timeout=60) as client:
        for query in queries:
            url: str | None = base + query
            while url:
                page = orjson.loads(client.get(url).content)
                url = next((link["url"] for link in page.get("link", []) if link["relation"] == "next"), None)
    return time.perf_counter() - started


def run(sessions: int, small: int, in_flight: int, say: Any) -> dict[str, Any]:
    shm = Path("/dev/shm")
    base = shm if shm.is_dir() and os.access(shm, os.W_OK) else None
    result: dict[str, Any] = {"sessions": sessions, "small": small, "in_flight": in_flight, "machine": machine()}
    for label, count in (("small", small), ("full", sessions)):
        with tempfile.TemporaryDirectory(prefix="bench-reconcile-", dir=base) as tmp:
            folder, port = Path(tmp), free_port()
            say(f"{label}: preparing {count} sessions ...")
            started = time.perf_counter()
            config = prepare(folder, count, port)
            result[f"{label}_prepare_seconds"] = round(time.perf_counter() - started, 1)
            server = stand_in(folder, port)
            try:
                gc.collect()
                say(f"{label}: reconcile ...")
                result[label] = reconcile(config, folder / "report", in_flight)
                if label == "full":
                    say("full: floor ...")
                    result["floor_seconds"] = round(floor(config, count, port), 2)
            finally:
                server.send_signal(signal.SIGTERM)
                server.communicate(timeout=30)
    full = result["full"]
    result["sessions_per_second"] = round(sessions / full["seconds"], 1)
    result["ratio_to_floor"] = round(full["seconds"] / result["floor_seconds"], 2)
    result["memory_growth_mb"] = round(full["peak_rss_mb"] - result["small"]["peak_rss_mb"], 1)
    result["target_met"] = full["exit"] == 0 and (sessions < 10_000 or full["seconds"] < TARGET_SECONDS)
    return result


def machine() -> dict[str, Any]:
    return {"cpus": os.cpu_count(), "python": platform.python_version(), "load": round(os.getloadavg()[0], 2),
            "at": datetime.now(UTC).isoformat(timespec="minutes")}  # fmt: skip


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    parser.add_argument("--sessions", type=int, default=10_000)
    parser.add_argument("--small", type=int, default=1_000)
    parser.add_argument("--in-flight", type=int, default=4)
    parser.add_argument("--json", action="store_true", help="one machine-readable line")
    args = parser.parse_args(argv)

    def say(text: str) -> None:
        if not args.json:
            print(text, file=sys.stderr, flush=True)

    result = run(args.sessions, args.small, args.in_flight, say)
    if args.json:
        print(json.dumps(result))
        return 0
    full, small = result["full"], result["small"]
    print(f"reconcile, feed form, {args.sessions} sessions against the stand-in on loopback "
          f"({args.in_flight} searches in flight)")  # fmt: skip
    print(f"  wall time      {full['seconds']:.1f} s (exit {full['exit']}), {result['sessions_per_second']} sessions/s")
    print(f"  counts         {full['counts']}")
    print(f"  floor          {result['floor_seconds']:.1f} s (the same searches, fetched and parsed only); "
          f"ratio {result['ratio_to_floor']}")  # fmt: skip
    print(f"  peak RSS       {full['peak_rss_mb']} MB at {args.sessions} sessions, {small['peak_rss_mb']} MB at "
          f"{args.small} ({small['seconds']:.1f} s): growth {result['memory_growth_mb']} MB")  # fmt: skip
    quarters = ", ".join(f"{mb:.1f}" for mb in full["rss_at_quarters_mb"])
    print(f"  RSS in the run {quarters} MB at a quarter, half, three quarters and the end of the run")
    print(f"  set-up         {result['full_prepare_seconds']} s (not timed)")
    print(f"  target (< {TARGET_SECONDS:.0f} s for 10,000): {'met' if result['target_met'] else 'NOT met'}")
    print(f"  machine        {result['machine']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
