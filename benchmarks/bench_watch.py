"""Drop files into the running watch-folder service at a steady rate; report latency to ACK and memory.

Run: ``python benchmarks/bench_watch.py [--rate 20] [--seconds 60] [--soak-minutes 0] [--burst 200] [--json]``.

Everything runs on 127.0.0.1, in a temporary folder (``--dir`` to choose the file system):

* a real MLLP receiver: python-hl7's asyncio server in a thread of this process, answering AA
  and noting when each block arrived (``time.perf_counter``) with its MSH-10 and ORC-2;
* ``python -m bridge watch`` as a **subprocess** (so its memory is its own: VmRSS from
  ``/proc/<pid>/status``), with a written ``bridge.toml``: one HL7 v2 destination over MLLP to
  that receiver, completeness detection as in ``samples/service/bridge.toml`` (close/rename
  events, 1 s stable, 5 s rescan), ``/metrics`` on a free loopback port;
* generated exports (invented data from the clean bundled samples, one unique test id each)
  written to a dot-name and renamed into the inbox: the rename is "file close", and its time
  is noted just after ``os.rename`` returns.

Latency per file = arrival of its message at the receiver minus its rename, matched through
the test id the message carries in ORC-2. The phases, in order:

1. **floor** (before the service starts): a plain loop that drops the same kind of file at the
   same rate, reads it, builds a trivial ER7 from it and sends it over MLLP to the same
   receiver, waiting for the ACK; then the same loop made as durable as the service (a journal
   append + fsync before sending, the move to an archive folder with both folders fsynced, a
   journal append + fsync after the ACK).
2. **steady**: ``--seconds`` at ``--rate`` files/s; p50/p90/p99/max, sustained files/s (files
   acknowledged / wall time from the first rename to the last arrival), compared with the
   service's own ``dlco_bridge_delivery_latency_seconds`` histogram (scraped before and after
   the phase and subtracted) and with the floor.
3. **soak** (``--soak-minutes``, 0 to skip): the same rate; RSS sampled every 10 s and
   ``/metrics`` scraped every 10 s (as a monitoring system would; each scrape is timed).
   Reported: start/end/max RSS and the least-squares slope over the second half. "No growth"
   means the growth the fit predicts over that half is below max(1 MB, 2 x the residual
   standard deviation of the samples): a leak shows as a steady slope, allocator noise does not.
4. **burst** (``--burst`` files, 0 to skip): all dropped at once; files/s until the last ACK
   is the service's capacity, for the headroom over ``--rate``.

This is a script, not a test: it prints figures and never fails a build. Every loop is bounded
by a count and a time limit, and everything it starts (service, receiver, temporary folder) is
stopped or removed on the way out, also on error or Ctrl-C.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import copy
import os
import platform
import random
import re
import shutil
import signal
import socket
import socketserver
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import orjson
from bench_convert import FAMILY, GIVEN  # the same invented names (run from benchmarks/)
from hl7.mllp import start_hl7_server  # type: ignore[import-untyped]  # python-hl7 ships no type hints
from prometheus_client.parser import text_string_to_metric_families

from bridge.service.loopback import LoopbackServer
from bridge.tables.files import samples_dir

LOOPBACK = "127.0.0.1"
SEED = 20261202
TARGET_P50_S = 0.050
TARGET_P99_S = 0.250
TEMPLATES = (  # the bundled samples that are neither refused nor blocked
    "01-healthy-adult.json",
    "02-anaemic-patient.json",
    "03-high-altitude.json",
    "04-raised-cohb.json",
    "05-child.json",
    "06-three-manoeuvres.json",
)
START_TIMEOUT_S = 30.0
STOP_TIMEOUT_S = 15.0
ACK_TIMEOUT_S = 10.0
SOAK_SAMPLE_S = 10.0
STEADY_SAMPLE_S = 2.0
PREFIX = {"floor": "F", "durable": "D", "steady": "S", "soak": "K", "burst": "B"}  # test id letter per phase
_VT, _FS_CR = b"\x0b", b"\x1c\x0d"


# ---------- inputs ----------


class Inputs:
    """Generated ``dlco-result/1`` documents: a clean sample with a fresh test id and patient."""

    def __init__(self, seed: int = SEED) -> None:
        self.rng = random.Random(seed)
        folder = samples_dir()
        self.templates = [orjson.loads((folder / name).read_bytes()) for name in TEMPLATES]
        self.tag = f"{self.rng.randrange(36**4):04x}"

    def make(self, test_id: str) -> bytes:
        doc = copy.deepcopy(self.rng.choice(self.templates))
        doc["test_id"] = test_id
        p = doc["patient"]
        p["id"] = f"FICT-W{self.rng.randrange(10**6):06d}"
        p["given"], p["family"] = self.rng.choice(GIVEN), self.rng.choice(FAMILY)
        return orjson.dumps(doc)


def drop(inbox: Path, name: str, data: bytes) -> float:
    """Write ``data`` under a dot-name, rename it into ``inbox``; return when the rename was done."""
    temporary = inbox / f".{name}.tmp"
    with temporary.open("wb") as stream:
        stream.write(data)
    os.rename(temporary, inbox / name)
    return time.perf_counter()


# ---------- the receiver ----------


@dataclass
class Receiver:
    """python-hl7's asyncio MLLP server on loopback; answers AA and notes each arrival."""

    port: int = 0
    arrivals: dict[str, float] = field(default_factory=dict)  # ORC-2 (test id) -> perf_counter
    control_ids: dict[str, str] = field(default_factory=dict)  # ORC-2 -> MSH-10
    count: int = 0
    _loop: asyncio.AbstractEventLoop = field(default_factory=asyncio.new_event_loop)
    _server: Any = None
    _thread: threading.Thread | None = None
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def start(self) -> None:
        self._thread = threading.Thread(target=self._loop.run_forever, name="receiver", daemon=True)
        self._thread.start()
        future = asyncio.run_coroutine_threadsafe(start_hl7_server(self._handle, LOOPBACK, 0), self._loop)
        self._server = future.result(timeout=5)
        self.port = self._server.sockets[0].getsockname()[1]

    def shutdown(self) -> None:
        if self._thread is None:
            return
        with contextlib.suppress(Exception):
            asyncio.run_coroutine_threadsafe(self._close(), self._loop).result(timeout=5)
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join(timeout=5)
        if not self._thread.is_alive():
            self._loop.close()
        self._thread = None

    def arrived(self, test_id: str) -> float | None:
        with self._lock:
            return self.arrivals.get(test_id)

    def arrived_count(self, test_ids: Sequence[str]) -> int:
        with self._lock:
            return sum(1 for t in test_ids if t in self.arrivals)

    async def _close(self) -> None:
        self._server.close()
        await asyncio.wait_for(self._server.wait_closed(), 2)

    async def _handle(self, reader: Any, writer: Any) -> None:
        try:
            while True:
                block = await reader.readblock()
                at = time.perf_counter()
                text = block.decode("utf-8", errors="replace")
                segments = text.split("\r")
                msh = segments[0].split("|")
                control_id = msh[9] if len(msh) > 9 else ""
                orc = next((s.split("|") for s in segments if s.startswith("ORC|")), ["", "", ""])
                test_id = orc[2] if len(orc) > 2 else ""
                with self._lock:
                    self.arrivals.setdefault(test_id, at)
                    self.control_ids[test_id] = control_id
                    self.count += 1
                ack = (
                    f"MSH|^~\\&|RECEIVER|BENCH|DLCO-BRIDGE|BENCH|20261202000000||ACK^R01^ACK|A{control_id[:18]}|P|2.5.1\r"
                    f"MSA|AA|{control_id}\r"
                )
                writer.writeblock(ack.encode("ascii"))
                await writer.drain()
        except (asyncio.IncompleteReadError, ConnectionError):
            pass
        finally:
            writer.close()


# ---------- the floor: the same steps without the service ----------


class FloorSender:
    """Reads a dropped file, builds a trivial ER7 and sends it over one kept-open MLLP connection."""

    def __init__(self, port: int, durable_dir: Path | None) -> None:
        self.sock = socket.create_connection((LOOPBACK, port), timeout=ACK_TIMEOUT_S)
        self.durable_dir = durable_dir
        self.journal = None
        if durable_dir is not None:
            (durable_dir / "archive").mkdir(parents=True, exist_ok=True)
            self.journal = (durable_dir / "journal.log").open("ab")

    def handle(self, path: Path) -> None:
        doc = orjson.loads(path.read_bytes())
        test_id, patient = doc["test_id"], doc["patient"]
        obx = [
            f"OBX|{k}|NM|{key}^{key}^L||{q['value']}|{q['unit']}^{q['unit']}^UCUM|||||F"
            for k, (key, q) in enumerate(doc["results"].items(), 1)
            if isinstance(q, dict) and "value" in q
        ]
        er7 = "\r".join(
            (
                f"MSH|^~\\&|FLOOR|BENCH|RECORDS|BENCH|20261202000000||ORU^R01^ORU_R01|{test_id}|P|2.5.1",
                f"PID|1||{patient['id']}^^^BENCH^MR||{patient.get('family', '')}^{patient.get('given', '')}",
                f"ORC|RE|{test_id}|{test_id}",
                f"OBR|1|{test_id}|{test_id}|81458-2^Pulmonary function test panel^LN",
                *obx,
            )
        ).encode("utf-8")
        if self.journal is not None:
            self._journal(er7)
            target = self.durable_dir / "archive" / path.name  # type: ignore[operator]
            os.rename(path, target)
            _fsync_folder(target.parent)
            _fsync_folder(path.parent)
        self.sock.sendall(_VT + er7 + b"\r" + _FS_CR)
        answer = b""
        deadline = time.monotonic() + ACK_TIMEOUT_S
        while not answer.endswith(_FS_CR) and time.monotonic() < deadline:
            chunk = self.sock.recv(65536)
            if not chunk:
                raise ConnectionError("receiver closed before the ACK")
            answer += chunk
        if b"MSA|AA|" not in answer:
            raise ConnectionError(f"no AA for {test_id}")
        if self.journal is not None:
            self._journal(b"delivered " + test_id.encode())
        else:
            path.unlink()

    def _journal(self, data: bytes) -> None:
        assert self.journal is not None
        self.journal.write(data + b"\n")
        self.journal.flush()
        os.fsync(self.journal.fileno())

    def close(self) -> None:
        self.sock.close()
        if self.journal is not None:
            self.journal.close()


def _fsync_folder(folder: Path) -> None:
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


# ---------- the service ----------


def free_port() -> int:
    probe = LoopbackServer(socketserver.BaseRequestHandler)  # bound, read, released; never started
    probe.stop()
    return probe.port


CONFIG = """\
# written by benchmarks/bench_watch.py; invented names only
inbox = "inbox"
archive = "archive"
quarantine = "quarantine"
state = "state"
rescan_seconds = 5.0
stable_seconds = 1.0
metrics_port = {metrics_port}
log_format = "json"

[emit]
sending_application = "DLCO-BRIDGE"
sending_facility = "BENCH-PFT"
receiving_application = "RECORDS"
receiving_facility = "BENCH-WARD"

[destination.records]
payload = "hl7"
units = "traditional"
transport = "mllp"
host = "127.0.0.1"
port = {mllp_port}
connect_timeout = 5.0
read_timeout = 30.0
"""


# Runs ``dlco-bridge watch`` with watchdog's IN_MOVED_FROM/IN_MOVED_TO pairing wait (0.5 s in
# watchdog 7.1) set to argv[1] seconds, to show how much of the latency that wait accounts for.
# The service sets the wait itself (bridge.service.watcher.pair_moves_quickly), so the
# experiment changes the value that function applies rather than watchdog's attribute.
_WITH_MOVE_DELAY = (
    "import sys; from bridge.service import watcher; watcher.MOVE_PAIRING_SECONDS = float(sys.argv[1]); "
    "from bridge.cli import main; sys.exit(main(sys.argv[2:]))"
)


class Service:
    """``python -m bridge watch`` in a subprocess; stopped with SIGTERM, then SIGKILL."""

    def __init__(self, folder: Path, mllp_port: int, move_delay: float | None = None) -> None:
        self.folder = folder
        self.move_delay = move_delay
        self.inbox = folder / "inbox"
        self.inbox.mkdir(parents=True)
        self.metrics_port = free_port()
        self.config = folder / "bridge.toml"
        self.config.write_text(CONFIG.format(metrics_port=self.metrics_port, mllp_port=mllp_port))
        self.log = (folder / "service.log").open("wb")
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        command = [sys.executable, "-m", "bridge", "watch", "--config", str(self.config)]
        if self.move_delay is not None:  # the experiment: same service, shorter move-pairing wait
            command[1:3] = ["-c", _WITH_MOVE_DELAY, str(self.move_delay)]
        self.process = subprocess.Popen(
            command,
            cwd=self.folder,
            stdin=subprocess.DEVNULL,
            stdout=self.log,
            stderr=subprocess.STDOUT,
        )
        deadline = time.monotonic() + START_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"the service exited with {self.process.returncode}; see {self.log.name}")
            with contextlib.suppress(OSError):
                if self.get("/healthz").startswith("ok"):
                    return
            time.sleep(0.1)
        raise RuntimeError(f"the service did not report healthy within {START_TIMEOUT_S:.0f} s")

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def get(self, path: str) -> str:
        with urllib.request.urlopen(f"http://{LOOPBACK}:{self.metrics_port}{path}", timeout=5) as answer:
            return str(answer.read().decode())

    def rss_mb(self) -> float | None:
        try:
            status = Path(f"/proc/{self.pid}/status").read_text()
        except OSError:
            return None
        match = re.search(r"^VmRSS:\s+(\d+) kB", status, re.MULTILINE)
        return int(match.group(1)) / 1024 if match else None

    def cpu_seconds(self) -> float:
        try:
            fields = Path(f"/proc/{self.pid}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            return 0.0
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime + stime

    def stop(self) -> int | None:
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout=STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=STOP_TIMEOUT_S)
        self.log.close()
        return None if self.process is None else self.process.returncode


@dataclass
class Histogram:
    """The service's delivery-latency histogram for the benchmark destination."""

    buckets: dict[float, int] = field(default_factory=dict)  # le -> cumulative count
    total: float = 0.0
    count: int = 0

    @classmethod
    def parse(cls, text: str) -> Histogram:
        """The ``records`` destination's histogram, read by prometheus_client's text parser."""
        h = cls()
        for family in text_string_to_metric_families(text):
            if family.name != "dlco_bridge_delivery_latency_seconds":
                continue
            for sample in family.samples:
                if sample.labels.get("destination") != "records":
                    continue
                if sample.name.endswith("_bucket"):
                    h.buckets[float(sample.labels["le"])] = int(sample.value)
                elif sample.name.endswith("_sum"):
                    h.total = sample.value
                elif sample.name.endswith("_count"):
                    h.count = int(sample.value)
        return h

    def minus(self, before: Histogram) -> Histogram:
        return Histogram(
            {le: n - before.buckets.get(le, 0) for le, n in self.buckets.items()},
            self.total - before.total,
            self.count - before.count,
        )

    def quantile(self, q: float) -> float | None:
        """Prometheus ``histogram_quantile``: linear within the bucket that holds rank q*count."""
        if self.count <= 0:
            return None
        rank, lower, below = q * self.count, 0.0, 0
        for le in sorted(self.buckets):
            n = self.buckets[le]
            if n >= rank:
                if le == float("inf"):
                    return lower
                return lower + (le - lower) * (rank - below) / max(n - below, 1)
            lower, below = le, n
        return lower


# ---------- sampling ----------


class Sampler:
    """RSS (and, when asked, the time a /metrics scrape takes) every ``interval`` seconds, in a thread."""

    def __init__(self, service: Service) -> None:
        self.service = service
        self.interval = STEADY_SAMPLE_S
        self.scrape = False
        self.rss: list[tuple[float, float, str]] = []  # (perf_counter, MB, phase)
        self.scrapes: list[tuple[float, float]] = []  # (perf_counter, seconds)
        self.phase = "idle"
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="sampler", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=10)

    def _run(self) -> None:
        while not self._stop.is_set():
            now = time.perf_counter()
            mb = self.service.rss_mb()
            if mb is not None:
                self.rss.append((now, mb, self.phase))
            if self.scrape:
                with contextlib.suppress(OSError):
                    start = time.perf_counter()
                    self.service.get("/metrics")
                    self.scrapes.append((start, time.perf_counter() - start))
            self._stop.wait(self.interval)


# ---------- phases ----------


@dataclass
class Phase:
    name: str
    renamed: dict[str, float] = field(default_factory=dict)  # test id -> perf_counter after the rename
    late_max: float = 0.0  # worst lag of a drop behind its schedule
    first: float = 0.0
    last_drop: float = 0.0


def paced(count: int, rate: float, time_limit: float) -> Iterator[int]:
    """Indices 0..count-1 at ``rate`` per second (0: as fast as possible), within ``time_limit``."""
    start = time.perf_counter()
    for i in range(count):
        if rate > 0:
            wait = start + i / rate - time.perf_counter()
            if wait > 0:
                time.sleep(wait)
        if time.perf_counter() - start > time_limit:
            return
        yield i


def run_drops(
    name: str, inputs: Inputs, inbox: Path, count: int, rate: float, after: Callable[[Path], None] | None = None
) -> Phase:
    """Drop ``count`` files into ``inbox`` at ``rate``; ``after`` handles each one (the floor)."""
    phase = Phase(name)
    prefix = f"BW{inputs.tag}-{PREFIX[name]}"
    payloads = {}
    if rate <= 0:  # a burst: make every file first, so only the drops are timed
        payloads = {i: inputs.make(f"{prefix}{i:06d}") for i in range(count)}
    time_limit = (count / rate if rate > 0 else 0) + 60.0
    start = time.perf_counter()
    for i in paced(count, rate, time_limit):
        test_id = f"{prefix}{i:06d}"
        data = payloads.pop(i, None) or inputs.make(test_id)
        file_name = f"{test_id}.json"
        at = drop(inbox, file_name, data)
        phase.renamed[test_id] = at
        if rate > 0:
            phase.late_max = max(phase.late_max, at - (start + i / rate))
        if after is not None:
            after(inbox / file_name)
    phase.first = min(phase.renamed.values(), default=start)
    phase.last_drop = time.perf_counter()
    return phase


def wait_for_acks(receiver: Receiver, phase: Phase, timeout: float) -> None:
    ids = list(phase.renamed)
    deadline = time.perf_counter() + timeout
    while receiver.arrived_count(ids) < len(ids) and time.perf_counter() < deadline:
        time.sleep(0.05)


def percentile(values: Sequence[float], q: float) -> float:
    """Linear interpolation between closest ranks (numpy's default)."""
    ordered = sorted(values)
    if not ordered:
        return float("nan")
    k = (len(ordered) - 1) * q
    lo = int(k)
    hi = min(lo + 1, len(ordered) - 1)
    return ordered[lo] + (ordered[hi] - ordered[lo]) * (k - lo)


def latency_report(receiver: Receiver, phase: Phase) -> dict[str, Any]:
    latencies = []
    last_arrival = phase.first
    for test_id, renamed in phase.renamed.items():
        arrived = receiver.arrived(test_id)
        if arrived is not None:
            latencies.append(arrived - renamed)
            last_arrival = max(last_arrival, arrived)
    wall = max(last_arrival - phase.first, 1e-9)
    report: dict[str, Any] = {
        "dropped": len(phase.renamed),
        "acked": len(latencies),
        "wall_s": round(wall, 3),
        "files_per_s": round(len(latencies) / wall, 2),
        "drop_late_max_ms": round(phase.late_max * 1e3, 2),
    }
    if latencies:
        report |= {
            f"{label}_ms": round(percentile(latencies, q) * 1e3, 2)
            for label, q in (("p50", 0.5), ("p90", 0.9), ("p99", 0.99))
        }
        report |= {
            "max_ms": round(max(latencies) * 1e3, 2),
            "min_ms": round(min(latencies) * 1e3, 2),
            "mean_ms": round(statistics.fmean(latencies) * 1e3, 2),
        }
    return report


def histogram_report(h: Histogram) -> dict[str, Any]:
    def ms(value: float | None) -> float | None:
        return None if value is None else round(value * 1e3, 2)

    return {
        "count": h.count,
        "mean_ms": ms(h.total / h.count) if h.count else None,
        "p50_ms_est": ms(h.quantile(0.5)),
        "p99_ms_est": ms(h.quantile(0.99)),
        "share_le_50ms": round(h.buckets.get(0.05, 0) / h.count, 4) if h.count else None,
        "share_le_250ms": round(h.buckets.get(0.25, 0) / h.count, 4) if h.count else None,
    }


def fit(points: Sequence[tuple[float, float]]) -> tuple[float, float]:
    """Least-squares slope (per unit of x) and the residual standard deviation."""
    n = len(points)
    if n < 3:
        return float("nan"), float("nan")
    mx = statistics.fmean(x for x, _ in points)
    my = statistics.fmean(y for _, y in points)
    sxx = sum((x - mx) ** 2 for x, _ in points)
    slope = sum((x - mx) * (y - my) for x, y in points) / sxx if sxx else 0.0
    residuals = [y - (my + slope * (x - mx)) for x, y in points]
    return slope, (sum(r * r for r in residuals) / (n - 2)) ** 0.5


def soak_report(samples: Sequence[tuple[float, float, str]], scrapes: Sequence[tuple[float, float]]) -> dict[str, Any]:
    soak = [(t, mb) for t, mb, phase in samples if phase == "soak"]
    if len(soak) < 4:
        return {"samples": len(soak)}
    t0 = soak[0][0]
    half = [((t - t0) / 60, mb) for t, mb in soak[len(soak) // 2 :]]
    slope, noise = fit(half)
    window = half[-1][0] - half[0][0]
    growth = slope * window
    allowed = max(1.0, 2 * noise)
    scrape_ms = [s * 1e3 for _, s in scrapes]
    return {
        "samples": len(soak),
        "rss_start_mb": round(soak[0][1], 1),
        "rss_end_mb": round(soak[-1][1], 1),
        "rss_max_mb": round(max(mb for _, mb in soak), 1),
        "slope_mb_per_min_second_half": round(slope, 4),
        "residual_sd_mb": round(noise, 3),
        "fitted_growth_mb_second_half": round(growth, 3),
        "allowed_mb": round(allowed, 3),
        "no_growth": abs(growth) < allowed,
        "metrics_scrape_ms_first": round(statistics.fmean(scrape_ms[:3]), 2) if scrape_ms else None,
        "metrics_scrape_ms_last": round(statistics.fmean(scrape_ms[-3:]), 2) if scrape_ms else None,
    }


def minute_by_minute(receiver: Receiver, phase: Phase) -> list[dict[str, Any]]:
    """p50/p99 per minute of the soak, to see a drift that a single figure hides."""
    minutes: dict[int, list[float]] = {}
    for test_id, renamed in phase.renamed.items():
        arrived = receiver.arrived(test_id)
        if arrived is not None:
            minutes.setdefault(int((renamed - phase.first) // 60), []).append(arrived - renamed)
    return [
        {
            "minute": m,
            "files": len(v),
            "p50_ms": round(percentile(v, 0.5) * 1e3, 1),
            "p99_ms": round(percentile(v, 0.99) * 1e3, 1),
        }
        for m, v in sorted(minutes.items())
    ]


def filesystem(path: Path) -> str:
    """The type of the file system holding ``path`` (longest matching mount point)."""
    best, kind = "", "?"
    with contextlib.suppress(OSError):
        for line in Path("/proc/mounts").read_text().splitlines():
            parts = line.split()
            if len(parts) > 2 and str(path.resolve()).startswith(parts[1]) and len(parts[1]) > len(best):
                best, kind = parts[1], parts[2]
    return kind


def machine() -> dict[str, Any]:
    return {
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "machine": platform.machine(),
        "nproc": os.cpu_count(),
        "date": datetime.now(UTC).strftime("%Y-%m-%d"),
    }


# ---------- main ----------


def run_floor(
    name: str, inputs: Inputs, folder: Path, receiver: Receiver, count: int, rate: float, durable: bool
) -> dict[str, Any]:
    inbox = folder / name / "inbox"
    inbox.mkdir(parents=True)
    sender = FloorSender(receiver.port, folder / name if durable else None)
    try:
        phase = run_drops(name, inputs, inbox, count, rate, after=sender.handle)
    finally:
        sender.close()
    wait_for_acks(receiver, phase, 5.0)
    return latency_report(receiver, phase)


def run(args: argparse.Namespace, folder: Path, say: Callable[..., None]) -> dict[str, Any]:
    result: dict[str, Any] = {
        "machine": machine(),
        "rate": args.rate,
        "seconds": args.seconds,
        "soak_minutes": args.soak_minutes,
        "move_pairing_delay": args.move_pairing_delay,
        "filesystem": filesystem(folder),
    }
    inputs = Inputs()
    receiver = Receiver()
    service: Service | None = None
    sampler: Sampler | None = None
    receiver.start()
    try:
        say(f"receiver on {LOOPBACK}:{receiver.port}; work folder {folder} ({result['filesystem']})")
        floor_count = max(1, min(args.floor_files, int(args.rate * args.seconds)))
        say(f"floor: {floor_count} files at {args.rate:g}/s, plain and durable ...")
        result["floor"] = run_floor("floor", inputs, folder, receiver, floor_count, args.rate, durable=False)
        result["floor_durable"] = run_floor("durable", inputs, folder, receiver, floor_count, args.rate, durable=True)

        service = Service(folder / "service", receiver.port, args.move_pairing_delay)
        service.start()
        sampler = Sampler(service)
        sampler.start()
        say(f"service pid {service.pid} healthy; metrics on {LOOPBACK}:{service.metrics_port}")

        phases = [("steady", int(args.rate * args.seconds), args.rate)]
        if args.soak_minutes > 0:
            phases.append(("soak", int(args.rate * args.soak_minutes * 60), args.rate))
        if args.burst > 0:
            phases.append(("burst", args.burst, 0.0))
        for name, count, rate in phases:
            say(f"{name}: {count} files" + (f" at {rate:g}/s ..." if rate else " at once ..."))
            sampler.phase = name
            sampler.interval = SOAK_SAMPLE_S if name == "soak" else STEADY_SAMPLE_S
            sampler.scrape = name == "soak"
            before = Histogram.parse(service.get("/metrics"))
            cpu_before, wall_before = service.cpu_seconds(), time.perf_counter()
            phase = run_drops(name, inputs, service.inbox, count, rate)
            wait_for_acks(receiver, phase, args.drain_timeout)
            cpu = service.cpu_seconds() - cpu_before
            wall = time.perf_counter() - wall_before
            sampler.scrape = False
            after = Histogram.parse(service.get("/metrics"))
            report = latency_report(receiver, phase)
            report["service_histogram"] = histogram_report(after.minus(before))
            report["service_cpu_share_of_one_core"] = round(cpu / wall, 3)
            if name == "soak":
                report["by_minute"] = minute_by_minute(receiver, phase)
            result[name] = report
            say(f"  {summary_line(report)}")
        sampler.stop()
        result["rss"] = rss_summary(sampler.rss)
        if args.soak_minutes > 0:
            result["soak"]["memory"] = soak_report(sampler.rss, sampler.scrapes)
        result["quarantined"] = sum(1 for p in (service.folder / "quarantine").glob("*.error.json"))
    finally:
        if sampler is not None:
            sampler.stop()
        if service is not None:
            result["service_exit"] = service.stop()
        receiver.shutdown()
    steady, floor = result["steady"], result["floor"]
    if "p50_ms" in steady and "p50_ms" in floor:
        result["ratio_p50_service_floor"] = round(steady["p50_ms"] / floor["p50_ms"], 1)
        result["ratio_p99_service_floor"] = round(steady["p99_ms"] / floor["p99_ms"], 1)
        durable = result["floor_durable"]
        result["ratio_p50_service_durable_floor"] = round(steady["p50_ms"] / durable["p50_ms"], 1)
        result["targets"] = {
            "p50_lt_50ms": steady["p50_ms"] < TARGET_P50_S * 1e3,
            "p99_lt_250ms": steady["p99_ms"] < TARGET_P99_S * 1e3,
            "all_acked": steady["acked"] == steady["dropped"],
        }
    return result


def rss_summary(samples: Sequence[tuple[float, float, str]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for phase in dict.fromkeys(p for _, _, p in samples):
        values = [mb for _, mb, p in samples if p == phase]
        out[phase] = {"first_mb": round(values[0], 1), "last_mb": round(values[-1], 1), "max_mb": round(max(values), 1)}
    return out


def summary_line(r: dict[str, Any]) -> str:
    if "p50_ms" not in r:
        return f"{r['acked']}/{r['dropped']} acknowledged"
    return (
        f"{r['acked']}/{r['dropped']} acked, {r['files_per_s']:.1f} files/s; "
        f"p50 {r['p50_ms']:.1f} ms, p90 {r['p90_ms']:.1f}, p99 {r['p99_ms']:.1f}, max {r['max_ms']:.1f}"
    )


def print_report(r: dict[str, Any]) -> None:
    m = r["machine"]
    print()
    print(f"{m['date']}, {m['nproc']} CPUs, {m['implementation']} {m['python']}, work folder on {r['filesystem']}")
    print(f"latency = arrival at the MLLP receiver - rename into the inbox; rate {r['rate']:g} files/s")
    print()
    print(f"{'':28} {'files':>6} {'files/s':>8} {'p50 ms':>8} {'p90 ms':>8} {'p99 ms':>8} {'max ms':>8}")
    rows = [
        ("floor (plain loop)", "floor"),
        ("floor (durable loop)", "floor_durable"),
        ("service, steady", "steady"),
        ("service, soak", "soak"),
        ("service, burst", "burst"),
    ]
    for label, key in rows:
        x = r.get(key)
        if not x or "p50_ms" not in x:
            continue
        print(
            f"{label:28} {x['acked']:>6} {x['files_per_s']:>8.1f} {x['p50_ms']:>8.1f} "
            f"{x['p90_ms']:>8.1f} {x['p99_ms']:>8.1f} {x['max_ms']:>8.1f}"
        )
    if "ratio_p50_service_floor" in r:
        print()
        print(
            f"ratio service/floor: p50 {r['ratio_p50_service_floor']}x, p99 {r['ratio_p99_service_floor']}x "
            f"(p50 against the durable floor: {r['ratio_p50_service_durable_floor']}x)"
        )
    for key in ("steady", "soak", "burst"):
        x = r.get(key)
        if x and x.get("service_histogram", {}).get("count"):
            h = x["service_histogram"]
            print(
                f"/metrics histogram, {key}: {h['count']} messages, mean {h['mean_ms']} ms, "
                f"p50 ~{h['p50_ms_est']} ms, p99 ~{h['p99_ms_est']} ms (bucket interpolation), "
                f"<= 50 ms {h['share_le_50ms']:.1%}, <= 250 ms {h['share_le_250ms']:.1%}; "
                f"service CPU {x['service_cpu_share_of_one_core']:.1%} of one core"
            )
    if "targets" in r:
        t = r["targets"]
        s = r["steady"]
        print()
        print(
            f"target p50 < 50 ms: {'met' if t['p50_lt_50ms'] else 'NOT MET'} ({s['p50_ms']:.1f} ms); "
            f"p99 < 250 ms: {'met' if t['p99_lt_250ms'] else 'NOT MET'} ({s['p99_ms']:.1f} ms); "
            f"all acknowledged: {t['all_acked']}"
        )
    soak = r.get("soak")
    if soak:
        mem = soak.get("memory", {})
        print()
        for row in soak.get("by_minute", []):
            print(
                f"  soak minute {row['minute']:>2}: {row['files']} files, "
                f"p50 {row['p50_ms']} ms, p99 {row['p99_ms']} ms"
            )
        if "rss_start_mb" in mem:
            print(
                f"RSS over the soak: start {mem['rss_start_mb']} MB, end {mem['rss_end_mb']} MB, "
                f"max {mem['rss_max_mb']} MB; slope over the second half {mem['slope_mb_per_min_second_half']} MB/min "
                f"(fitted growth {mem['fitted_growth_mb_second_half']} MB, allowed {mem['allowed_mb']} MB): "
                + ("no growth" if mem["no_growth"] else "GROWTH")
            )
            print(
                f"/metrics scrape: {mem['metrics_scrape_ms_first']} ms at the start, "
                f"{mem['metrics_scrape_ms_last']} ms at the end"
            )
    print(
        f"RSS by phase (MB): {r.get('rss')}; quarantined: {r.get('quarantined')}; service exit {r.get('service_exit')}"
    )


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--rate", type=float, default=20.0, help="files per second (steady and soak)")
    parser.add_argument("--seconds", type=float, default=60.0, help="length of the steady phase")
    parser.add_argument("--soak-minutes", type=float, default=0.0, help="length of the soak (0: none)")
    parser.add_argument("--burst", type=int, default=200, help="files dropped at once at the end (0: none)")
    parser.add_argument("--floor-files", type=int, default=200, help="files through each floor loop")
    parser.add_argument("--drain-timeout", type=float, default=60.0, help="longest wait for ACKs after a phase")
    parser.add_argument(
        "--move-pairing-delay",
        type=float,
        default=None,
        help="experiment: run the service with watchdog's rename-pairing wait set to this many seconds",
    )
    parser.add_argument("--dir", type=Path, default=None, help="where the temporary work folder goes")
    parser.add_argument("--keep", action="store_true", help="keep the work folder (service log, ledger)")
    parser.add_argument("--json", action="store_true", help="print one machine-readable JSON line")
    args = parser.parse_args(argv)
    if args.rate <= 0 or args.seconds <= 0:
        parser.error("--rate and --seconds must be positive")
    say = (lambda *a: None) if args.json else (lambda *a: print(*a, flush=True))
    folder = Path(tempfile.mkdtemp(prefix="bench-watch-", dir=args.dir))
    try:
        result = run(args, folder, say)
    finally:
        if args.keep:
            say(f"work folder kept: {folder}")
        else:
            shutil.rmtree(folder, ignore_errors=True)
    if args.json:
        print(orjson.dumps(result).decode())
    else:
        print_report(result)
    return 0


if __name__ == "__main__":
    sys.exit(main())
