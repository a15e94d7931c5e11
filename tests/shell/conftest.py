"""Real loopback peers for the shell tests: an MLLP receiver and a small FHIR endpoint.

Both bind to 127.0.0.1 on a free port and run in a background thread. Nothing is
patched: the transports under test talk to them over real sockets. All data is invented.
The MLLP receiver is python-hl7's own asyncio server (an MLLP framing written outside this
project); the FHIR endpoint, which must fail on demand, runs on the product's loopback server.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import shutil
import socketserver
import ssl
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler
from pathlib import Path
from typing import Any

import hl7  # type: ignore[import-untyped]  # python-hl7 ships no type hints
import pytest
from hl7.mllp import HL7StreamReader, HL7StreamWriter, start_hl7_server  # type: ignore[import-untyped]

from bridge.service.ledger import Ledger
from bridge.service.loopback import LOOPBACK, LoopbackServer
from bridge.service.receiver.fhir_peer import operation_outcome


def free_port() -> int:
    """A loopback port nobody listens on right now (bound, read, released; never started)."""
    probe = LoopbackServer(socketserver.BaseRequestHandler)
    probe.stop()
    return probe.port


def oru(control_id: str, patient: str = "TEST-0001") -> bytes:
    """A small, invented ORU^R01 in ER7 with the given MSH-10."""
    segments = (
        f"MSH|^~\\&|DLCO-BRIDGE|TESTLAB|RECEIVER|TESTWARD|20240102030405||ORU^R01^ORU_R01|{control_id}|P|2.5.1",
        f"PID|1||{patient}^^^TESTLAB^MR||Testpatient^Alpha||19700101|F",
        "OBR|1||T-1|19911-7^DLCO^LN",
        "OBX|1|NM|19911-7^DLCO^LN||21.4|mL/min/mm[Hg]^^UCUM|||||F",
    )
    return ("\r".join(segments) + "\r").encode("ascii")


def ack(code: str, control_id: str, text: str = "") -> bytes:
    """An ACK in ER7 answering ``control_id`` with MSA-1 ``code``."""
    segments = (
        f"MSH|^~\\&|RECEIVER|TESTWARD|DLCO-BRIDGE|TESTLAB|20240102030406||ACK^R01^ACK|A-{control_id}|P|2.5.1",
        f"MSA|{code}|{control_id}|{text}",
    )
    return ("\r".join(segments) + "\r").encode("ascii")


class Clock:
    """A settable clock for the ledger and the delivery loop."""

    def __init__(self, start: float = 1_700_000_000.0) -> None:
        self.now = start

    def __call__(self) -> float:
        return self.now

    def advance(self, seconds: float) -> None:
        self.now += seconds


@pytest.fixture
def clock() -> Clock:
    """A fake clock starting at a fixed instant."""
    return Clock()


@pytest.fixture
def ledger(tmp_path: Path, clock: Clock) -> Iterator[Ledger]:
    """A fresh ledger in a temporary state folder."""
    with Ledger.open(tmp_path / "state" / "ledger.sqlite3", now=clock) as opened:
        yield opened


# ---- MLLP receiver -------------------------------------------------------------------


@dataclass
class MllpReceiver:
    """python-hl7's asyncio MLLP server on loopback, answering as each test tells it."""

    answer: str = "AA"
    text: str = ""
    delay: float = 0.0
    ack_control_id: str | None = None  # answer with this MSA-2 instead of the MSH-10
    refuse: dict[str, str] = field(default_factory=dict)  # MSH-10 -> AE text
    received: list[str] = field(default_factory=list)
    connections: int = 0
    port: int = 0
    ssl_context: ssl.SSLContext | None = None
    _loop: asyncio.AbstractEventLoop = field(default_factory=asyncio.new_event_loop)
    _server: asyncio.Server | None = None
    _writers: set[HL7StreamWriter] = field(default_factory=set)
    _thread: threading.Thread | None = None

    def run(self) -> None:
        self._thread = threading.Thread(target=self._loop.run_forever, daemon=True)
        self._thread.start()
        self.start()

    def start(self) -> None:
        """Listen (again) on the same port; port 0 picks a free one the first time."""
        self._server = self._call(self._listen())
        self.port = self._server.sockets[0].getsockname()[1]

    def stop(self) -> None:
        """Stop listening and drop every open connection: the receiver is down."""
        self._call(self._close())

    def shutdown(self) -> None:
        self.stop()
        self._loop.call_soon_threadsafe(self._loop.stop)
        assert self._thread is not None
        self._thread.join(timeout=2)
        self._loop.close()

    def _call(self, coro: Any) -> Any:
        return asyncio.run_coroutine_threadsafe(coro, self._loop).result(timeout=2)

    async def _listen(self) -> asyncio.Server:
        server: asyncio.Server = await start_hl7_server(self._handle, LOOPBACK, self.port, ssl=self.ssl_context)
        return server

    async def _close(self) -> None:
        if self._server is not None:
            self._server.close()
        writers, self._writers = list(self._writers), set()
        for writer in writers:
            writer.close()
        for writer in writers:
            # Wait until the FIN is out, so the client sees the link as closed.
            with contextlib.suppress(ConnectionError):
                await writer.wait_closed()

    def reply_to(self, message: Any, control_id: str) -> tuple[str, str, str]:
        """(MSA-1 code, MSA-2 control id, text) to answer ``message`` with."""
        answered = self.ack_control_id or control_id
        if control_id in self.refuse:
            return "AE", answered, self.refuse[control_id]
        return self.answer, answered, self.text

    def on_answered(self, message: Any, control_id: str, code: str) -> None:
        """Called after each answer went out (a hook for recording receivers)."""

    async def _handle(self, reader: HL7StreamReader, writer: HL7StreamWriter) -> None:
        self.connections += 1
        self._writers.add(writer)
        try:
            while True:
                message = await reader.readmessage()
                control_id = str(message.segment("MSH")(10))
                self.received.append(control_id)
                if self.delay:
                    await asyncio.sleep(self.delay)
                code, answered, text = self.reply_to(message, control_id)
                writer.writeblock(ack(code, answered, text))
                await writer.drain()
                self.on_answered(message, control_id, code)
        except (asyncio.IncompleteReadError, ConnectionError, hl7.ParseException):
            pass
        finally:
            self._writers.discard(writer)
            writer.close()


@pytest.fixture
def mllp_receiver() -> Iterator[MllpReceiver]:
    """A plain-TCP MLLP receiver answering AA until told otherwise."""
    receiver = MllpReceiver()
    receiver.run()
    yield receiver
    receiver.shutdown()


# ---- TLS material --------------------------------------------------------------------


@dataclass(frozen=True)
class CertPair:
    cert: Path
    key: Path


def _self_signed(folder: Path, name: str) -> CertPair:
    """A throw-away self-signed certificate for 127.0.0.1, made by the openssl tool."""
    cert, key = folder / f"{name}.crt", folder / f"{name}.key"
    subprocess.run(
        [
            "openssl", "req", "-x509", "-newkey", "ec",
            "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
            "-keyout", str(key), "-out", str(cert), "-days", "1",
            "-subj", f"/CN={name}",
            "-addext", "subjectAltName=IP:127.0.0.1",
        ],
        check=True,
        capture_output=True,
    )  # fmt: skip
    return CertPair(cert, key)


@pytest.fixture
def make_cert(tmp_path: Path) -> Callable[[str], CertPair]:
    """Makes self-signed certificates; skipped where no openssl tool is installed."""
    if shutil.which("openssl") is None:
        pytest.skip("needs the openssl command to make a throw-away certificate")
    return lambda name: _self_signed(tmp_path, name)


@pytest.fixture
def tls_pair(make_cert: Callable[[str], CertPair]) -> CertPair:
    """A self-signed certificate for the TLS receiver."""
    return make_cert("test-receiver")


@pytest.fixture
def tls_receiver(tls_pair: CertPair) -> Iterator[MllpReceiver]:
    """An MLLP receiver behind TLS with the self-signed certificate."""
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(tls_pair.cert, tls_pair.key)
    receiver = MllpReceiver(ssl_context=context)
    receiver.run()
    yield receiver
    receiver.shutdown()


@pytest.fixture
def client_pair(make_cert: Callable[[str], CertPair]) -> CertPair:
    """A self-signed certificate the client presents in mutual TLS."""
    return make_cert("test-sender")


@pytest.fixture
def mutual_tls_receiver(tls_pair: CertPair, client_pair: CertPair) -> Iterator[MllpReceiver]:
    """An MLLP receiver behind TLS that accepts only the client certificate it trusts."""
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH, cafile=str(client_pair.cert))
    context.verify_mode = ssl.CERT_REQUIRED
    context.load_cert_chain(tls_pair.cert, tls_pair.key)
    receiver = MllpReceiver(ssl_context=context)
    receiver.run()
    yield receiver
    receiver.shutdown()


# ---- FHIR endpoint -------------------------------------------------------------------


@dataclass
class FhirEndpoint:
    """What the endpoint answers next, and what it was sent."""

    mode: str = "ok"  # ok | reject | unavailable | throttled | slow
    delay: float = 0.0
    bundles: list[dict[str, Any]] = field(default_factory=list)
    authorizations: list[str] = field(default_factory=list)
    content_types: list[str] = field(default_factory=list)
    url: str = ""


def _handler(endpoint: FhirEndpoint) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # the name http.server dispatches to
            body = self.rfile.read(int(self.headers.get("Content-Length", "0")))
            endpoint.authorizations.append(self.headers.get("Authorization", ""))
            endpoint.content_types.append(self.headers.get("Content-Type", ""))
            if endpoint.mode == "slow":
                time.sleep(endpoint.delay)
            if endpoint.mode == "unavailable":
                return self._answer(503, operation_outcome("the store is restarting"))
            if endpoint.mode == "throttled":
                return self._answer(429, operation_outcome("too many requests"))
            bundle = json.loads(body)
            is_transaction = bundle.get("resourceType") == "Bundle" and bundle.get("type") == "transaction"
            if endpoint.mode == "reject" or not is_transaction:
                return self._answer(400, operation_outcome("Observation.code: unknown code"))
            endpoint.bundles.append(bundle)
            entries = [{"response": {"status": "201 Created"}} for _ in bundle.get("entry", [])]
            self._answer(
                200,
                {
                    "resourceType": "Bundle",
                    "type": "transaction-response",
                    "entry": entries,
                },
            )

        def _answer(self, status: int, document: dict[str, Any]) -> None:
            data = json.dumps(document).encode("utf-8")
            # A client that timed out has gone; that is the point of the slow mode.
            with contextlib.suppress(BrokenPipeError, ConnectionResetError):
                self.send_response(status)
                self.send_header("Content-Type", "application/fhir+json")
                self.send_header("Content-Length", str(len(data)))
                self.end_headers()
                self.wfile.write(data)

        def log_message(self, format: str, *args: Any) -> None:
            """Keep the test output quiet."""

    return Handler


@contextlib.contextmanager
def serve_fhir() -> Iterator[FhirEndpoint]:
    """Run a loopback FHIR endpoint for the duration of the block (shared with tests/service)."""
    endpoint = FhirEndpoint()
    with LoopbackServer(_handler(endpoint), name="test-fhir") as server:
        endpoint.url = f"http://{LOOPBACK}:{server.port}/fhir"
        yield endpoint


@pytest.fixture
def fhir_endpoint() -> Iterator[FhirEndpoint]:
    """A loopback HTTP endpoint taking FHIR transaction Bundles at its base URL."""
    with serve_fhir() as endpoint:
        yield endpoint


def bundle(test_id: str = "T-0001") -> bytes:
    """A minimal, invented FHIR transaction Bundle."""
    document = {
        "resourceType": "Bundle",
        "type": "transaction",
        "entry": [
            {
                "resource": {
                    "resourceType": "Observation",
                    "status": "final",
                    "identifier": [{"system": "urn:example:test", "value": test_id}],
                },
                "request": {"method": "POST", "url": "Observation"},
            }
        ],
    }
    return json.dumps(document).encode("utf-8")


@pytest.fixture
def make_oru() -> Callable[..., bytes]:
    """Build an invented ORU^R01 for a control id (see ``oru``)."""
    return oru


@pytest.fixture
def make_bundle() -> Callable[..., bytes]:
    """Build an invented transaction Bundle for a test id (see ``bundle``)."""
    return bundle
