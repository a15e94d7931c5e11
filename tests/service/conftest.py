"""The watch-folder service under test: a real ``dlco-bridge watch`` process and real peers.

The service runs as a subprocess (``python -m bridge watch --config ...``) with its own config
in ``tmp_path``; the peers are the loopback MLLP receiver (python-hl7's asyncio server) and the
FHIR endpoint of ``tests/shell/conftest.py``. Every wait polls with a bound; nothing sleeps long.
All data is invented: the inputs are the bundled fictional samples with new test ids.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

from bridge.service.ledger import Ledger, LedgerSummary
from bridge.service.receiver import FhirPeer, ResourceStore
from tests.conftest import SAMPLES
from tests.shell.conftest import LOOPBACK, FhirEndpoint, MllpReceiver, free_port, serve_fhir

# Samples that go through: 07 and 09 carry an ERROR finding (a probable unit mislabel, an Hb
# adjustment the wrong way round) and are refused by default; 08 is malformed.
GOOD = tuple(sorted(p for p in SAMPLES.glob("*.json") if not p.name.startswith(("07-", "08-", "09-"))))
BLOCKED = SAMPLES / "07-unit-mislabel.json"
MALFORMED = SAMPLES / "08-malformed.json"

POLL_SECONDS = 0.05
WAIT_SECONDS = 30.0  # generous for a loaded 2-core machine; a passing run is far quicker


def wait_until(condition: Callable[[], Any], what: str, timeout: float = WAIT_SECONDS) -> Any:
    """Poll ``condition`` until it returns something truthy; fail naming ``what`` after ``timeout``."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout:g} s waiting for {what} (last: {value!r})")
        time.sleep(POLL_SECONDS)


def samples(exposition: str) -> dict[str, float]:
    """Prometheus text as {sample name with labels: value}, read by prometheus_client's own parser.

    ``name{label="value",...}`` with the labels in the order written; an independent reading of
    what the service wrote (source: Prometheus text exposition format 0.0.4).
    """
    found: dict[str, float] = {}
    for family in text_string_to_metric_families(exposition):
        for sample in family.samples:
            labels = ",".join(f'{key}="{value}"' for key, value in sample.labels.items())
            found[sample.name + (f"{{{labels}}}" if labels else "")] = sample.value
    return found


# ---- inputs ----------------------------------------------------------------------------


def make_input(
    test_id: str,
    patient_id: str,
    *,
    template: Path = GOOD[0],
    given: str = "Alder",
    change: float = 0.0,
) -> bytes:
    """A sample export with a new test id and patient; ``change`` alters a value (a correction)."""
    document = json.loads(template.read_bytes())
    document["test_id"] = test_id
    document["patient"]["id"] = patient_id
    document["patient"]["given"] = given
    if change:
        document["results"]["va"]["value"] = round(document["results"]["va"]["value"] + change, 2)
    return json.dumps(document, indent=2).encode("utf-8")


def drop(inbox: Path, name: str, data: bytes) -> Path:
    """Put a file into the inbox the way a careful writer does: write aside, then rename in."""
    staging = inbox.parent / "staging"
    staging.mkdir(exist_ok=True)
    (staging / name).write_bytes(data)
    return (staging / name).rename(inbox / name)


# ---- the MLLP receiver, recording what it acknowledged -----------------------------------


@dataclass(frozen=True)
class Acked:
    """One message the receiver answered: MSH-10, patient (PID-3.1), test id (OBR-3.1), OBX-11s, MSA-1."""

    control_id: str
    patient: str
    test_id: str
    statuses: tuple[str, ...]
    code: str


@dataclass
class RecordingReceiver(MllpReceiver):
    """The shell tests' receiver, also noting patient, test id and OBX-11 of each answer.

    ``refuse_tests`` maps a test id (OBR-3.1) to the AE text to answer with.
    """

    acked: list[Acked] = field(default_factory=list)
    refuse_tests: dict[str, str] = field(default_factory=dict)

    def reply_to(self, message: Any, control_id: str) -> tuple[str, str, str]:
        refusal = self.refuse_tests.get(str(message.segment("OBR")(3)(1)(1)))  # EI.1 of the filler order number
        # source: HL7 v2.5.1 ch. 2, MSA-1 acknowledgment codes (AA accept, AE error)
        if refusal is not None:
            return "AE", control_id, refusal
        return self.answer, control_id, self.text

    def on_answered(self, message: Any, control_id: str, code: str) -> None:
        test_id = str(message.segment("OBR")(3)(1)(1))  # source: HL7 v2.5.1 ch. 7, OBR-3 (EI: EI.1 the test id)
        patient = str(message.segment("PID")(3)(1)(1))
        statuses = tuple(str(s(11)) for s in message.segments("OBX"))
        self.acked.append(Acked(control_id, patient, test_id, statuses, code))

    def accepted(self) -> list[Acked]:
        return [a for a in list(self.acked) if a.code == "AA"]


@pytest.fixture
def receiver() -> Iterator[RecordingReceiver]:
    """A plain-TCP MLLP receiver on loopback answering AA until told otherwise."""
    peer = RecordingReceiver()
    peer.run()
    yield peer
    peer.shutdown()


@pytest.fixture
def fhir_server() -> Iterator[FhirEndpoint]:
    """The shell tests' loopback FHIR endpoint, for faults (it refuses or fails when told)."""
    with serve_fhir() as endpoint:
        yield endpoint


@pytest.fixture
def stand_in_fhir(tmp_path: Path) -> Iterator[FhirPeer]:
    """The product's own stand-in FHIR endpoint (as ``dlco-bridge stand-in`` runs it), on a free port."""
    store = ResourceStore(tmp_path / "stand-in" / "resources.sqlite3")
    try:
        with FhirPeer(store) as peer:
            yield peer
    finally:
        store.close()


# ---- the service process -----------------------------------------------------------------


def mllp_destination(port: int, name: str = "records", read_timeout: float = 10.0) -> str:
    return (
        f'[destination.{name}]\npayload = "hl7"\ntransport = "mllp"\nhost = "{LOOPBACK}"\nport = {port}\n'
        f"connect_timeout = 2.0\nread_timeout = {read_timeout}\n"
    )


def fhir_destination(url: str, name: str = "store") -> str:
    return (
        f'[destination.{name}]\npayload = "fhir"\nunits = "si"\ntransport = "fhir-rest"\n'
        f'base_url = "{url}"\nconnect_timeout = 2.0\nread_timeout = 10.0\n'
    )


def file_destination(folder: str = "outbox", name: str = "drop") -> str:
    return f'[destination.{name}]\npayload = "hl7"\ntransport = "file"\nfolder = "{folder}"\n'


@dataclass
class Site:
    """One service's folders and config in ``tmp_path``, and the process running it."""

    root: Path
    destinations: str
    extra: str = ""
    metrics_port: int = field(default_factory=free_port)
    process: subprocess.Popen[bytes] | None = None
    runs: int = 0

    def __post_init__(self) -> None:
        self.inbox.mkdir(parents=True, exist_ok=True)
        # file_destination()'s folder: another system's, so it exists before the service starts (checked at start)
        (self.root / "outbox").mkdir(exist_ok=True)
        self.config.write_text(
            'inbox = "inbox"\narchive = "archive"\nquarantine = "quarantine"\nstate = "state"\n'
            "rescan_seconds = 0.2\nstable_seconds = 0.3\nretry_base_seconds = 0.05\nretry_cap_seconds = 0.5\n"
            f"metrics_port = {self.metrics_port}\n{self.extra}\n{self.destinations}",
            encoding="utf-8",
        )

    @property
    def config(self) -> Path:
        return self.root / "bridge.toml"

    @property
    def inbox(self) -> Path:
        return self.root / "inbox"

    @property
    def archive(self) -> Path:
        return self.root / "archive"

    @property
    def quarantine(self) -> Path:
        return self.root / "quarantine"

    @property
    def ledger_path(self) -> Path:
        return self.root / "state" / "ledger.sqlite3"

    def stderr_path(self, run: int | None = None) -> Path:
        return self.root / f"stderr-{self.runs if run is None else run}.log"

    # -- the process --
    def start(self, wait: bool = True) -> subprocess.Popen[bytes]:
        """Start ``dlco-bridge watch``; with ``wait``, until /healthz answers ok."""
        self.runs += 1
        with self.stderr_path().open("wb") as stderr:
            self.process = watch(self.config, stderr)
        if wait:
            wait_until(lambda: self.healthy(), "the service's /healthz")
        return self.process

    def healthy(self) -> bool:
        assert self.process is not None
        if self.process.poll() is not None:
            pytest.fail(f"service exited with {self.process.returncode}: {self.stderr()}")
        try:
            with urllib.request.urlopen(f"http://{LOOPBACK}:{self.metrics_port}/healthz", timeout=2) as answer:
                return bool(answer.status == 200)
        except (OSError, urllib.error.URLError):
            return False

    def kill(self) -> None:
        """SIGKILL: no chance to finish anything."""
        assert self.process is not None
        self.process.kill()
        self.process.wait(timeout=10)

    def stop(self, timeout: float = 20.0) -> int:
        """SIGTERM and wait; the exit code."""
        assert self.process is not None
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
        return self.process.wait(timeout=timeout)

    def stderr(self, run: int | None = None) -> str:
        return self.stderr_path(run).read_text(encoding="utf-8", errors="replace")

    def all_stderr(self) -> str:
        return "".join(self.stderr(run) for run in range(1, self.runs + 1))

    # -- what it did --
    def summary(self) -> LedgerSummary:
        """The ledger as ``status`` reads it (read-only, beside the running service)."""
        if not self.ledger_path.exists():
            return LedgerSummary()
        with Ledger.open(self.ledger_path, read_only=True) as ledger:
            return ledger.summary()

    def status_json(self) -> dict[str, Any]:
        done = cli("status", "--json", "--config", str(self.config))
        assert 0 == done.returncode, done.stderr
        document: dict[str, Any] = json.loads(done.stdout)
        return document

    def metrics(self) -> dict[str, float]:
        """``/metrics`` as {sample name with labels: value}."""
        url = f"http://{LOOPBACK}:{self.metrics_port}/metrics"
        with urllib.request.urlopen(url, timeout=5) as answer:
            return samples(answer.read().decode())

    def inbox_names(self) -> set[str]:
        return {p.name for p in self.inbox.iterdir() if p.is_file() and not p.name.startswith(".")}

    def archived(self) -> list[Path]:
        if not self.archive.exists():
            return []
        return sorted(p for p in self.archive.rglob("*") if p.is_file() and not p.name.startswith("."))

    def quarantined(self) -> list[Path]:
        if not self.quarantine.exists():
            return []
        return sorted(
            p
            for p in self.quarantine.iterdir()
            if p.is_file() and not p.name.startswith(".") and not p.name.endswith(".error.json")
        )


def watch(config: Path, stderr: Any) -> subprocess.Popen[bytes]:
    return subprocess.Popen(
        [sys.executable, "-m", "bridge", "watch", "--config", str(config)],
        stdout=subprocess.DEVNULL,
        stderr=stderr,
        env=clean_environment(),
    )


def clean_environment() -> dict[str, str]:
    """The test's environment without any DLCO_BRIDGE_* variable that could change the config."""
    return {k: v for k, v in os.environ.items() if not k.startswith("DLCO_BRIDGE_")}


def cli(*args: str, cwd: Path | None = None, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "bridge", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=clean_environment(),
        timeout=timeout,
        check=False,
    )


@pytest.fixture
def make_site(tmp_path: Path) -> Iterator[Callable[..., Site]]:
    """Builds a service site in ``tmp_path``; every process started is stopped at the end."""
    sites: list[Site] = []

    def build(destinations: str, extra: str = "", name: str = "site") -> Site:
        site = Site(tmp_path / name, destinations, extra)
        sites.append(site)
        return site

    yield build
    for site in sites:
        if site.process is not None and site.process.poll() is None:
            site.process.kill()
            with contextlib.suppress(subprocess.TimeoutExpired):
                site.process.wait(timeout=10)
