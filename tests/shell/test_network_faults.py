"""Faults of a hospital network, from a real loopback peer that misbehaves on purpose.

The peer is a plain TCP server (no HL7 or HTTP library in its way) that, per message, answers
properly, half-closes its side half-way through the answer, accepts and stays silent, or resets
the connection. Against it run the real transports and the real delivery step with the ledger:
every wait is bounded by the destination's timeouts, the message is retried, it is never marked
delivered without an ``AA`` (or a 2xx), and every attempt carries the same MSH-10, so a receiver
that de-duplicates by control id records it once. Then HTTP 429/503 with ``Retry-After``, for
minutes, on a fake clock. All data is invented.
"""

from __future__ import annotations

import itertools
import socket
import struct
import threading
import time
from collections import deque
from collections.abc import Callable, Iterator
from datetime import UTC, datetime
from email.utils import format_datetime
from pathlib import Path

import pytest

from bridge.service.delivery import Backoff, deliver_one
from bridge.service.ledger import Ledger, NewInput, NewMessage
from bridge.service.transports.base import FHIR_JSON, HL7_V2_ER7, Transport
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.mllp import MllpTransport, read_control_id
from tests.shell.conftest import LOOPBACK, Clock, ack, bundle, oru

READ_TIMEOUT = 0.6  # the destination's read_timeout in these tests
CONNECT_TIMEOUT = 0.6
SLACK = 1.5  # a loaded 2-core machine: scheduling, not waiting
FAULTS = ("half-close", "silent", "reset")


class FaultyPeer:
    """A loopback TCP receiver of MLLP blocks or HTTP requests that misbehaves as scripted, one fault per request."""

    def __init__(self, protocol: str) -> None:
        self.protocol = protocol
        self.server = socket.create_server((LOOPBACK, 0))
        self.port = int(self.server.getsockname()[1])
        self.script: deque[str] = deque()
        self.requests: list[bytes] = []  # every request read, whole
        self.answered: list[bytes] = []  # the requests answered in full
        self.connections = 0
        self.answer_with: Callable[[bytes], bytes] = self._default_answer
        self._stop = threading.Event()
        threading.Thread(target=self._accept, daemon=True).start()

    def close(self) -> None:
        self._stop.set()
        self.server.close()

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.server.accept()
            except OSError:
                return
            self.connections += 1
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        buffer = bytearray()
        try:
            while True:
                request = self._read_request(conn, buffer)
                if request is None:
                    return
                self.requests.append(request)
                fault = self.script.popleft() if self.script else "answer"
                reply = self.answer_with(request)
                if fault == "answer":
                    conn.sendall(reply)
                    self.answered.append(request)
                    continue
                if fault == "half-close":  # part of the answer, then our side closed; theirs stays open
                    conn.sendall(reply[: len(reply) // 2])
                    conn.shutdown(socket.SHUT_WR)
                if fault == "reset":  # SO_LINGER 0: close sends RST (source: POSIX setsockopt, SO_LINGER)
                    conn.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
                    return
                while conn.recv(65536):  # silent (or half-closed): say nothing until the client gives up
                    pass
                return
        except OSError:
            return
        finally:
            conn.close()

    def _read_request(self, conn: socket.socket, buffer: bytearray) -> bytes | None:
        while True:
            if self.protocol == "mllp" and (end := buffer.find(b"\x1c\r")) >= 0:
                request = bytes(buffer[buffer.find(b"\x0b") + 1 : end])
                del buffer[: end + 2]
                return request
            if self.protocol == "http" and (head_end := buffer.find(b"\r\n\r\n")) >= 0:
                head = bytes(buffer[:head_end]).decode("latin-1").lower()
                length = (
                    int(head.split("content-length:", 1)[1].split("\r\n", 1)[0]) if "content-length:" in head else 0
                )
                if len(buffer) >= head_end + 4 + length:
                    request = bytes(buffer[head_end + 4 : head_end + 4 + length])
                    del buffer[: head_end + 4 + length]
                    return request
            chunk = conn.recv(65536)
            if not chunk:
                return None
            buffer += chunk

    def _default_answer(self, request: bytes) -> bytes:
        if self.protocol == "mllp":
            # source: HL7 v2 MLLP release 2 framing <VT> ... <FS><CR>; MSA-1 AA, MSA-2 the MSH-10 answered
            return b"\x0b" + ack("AA", read_control_id(request) or "") + b"\x1c\r"
        return http_answer(200, b'{"resourceType":"Bundle","type":"transaction-response","entry":[]}')


def http_answer(status: int, body: bytes, headers: dict[str, str] | None = None) -> bytes:
    # source: RFC 9112 §2.1 (status line, header fields, CRLF), RFC 9110 §8.6 (Content-Length)
    lines = [f"HTTP/1.1 {status} {'OK' if status == 200 else 'Busy'}", "Content-Type: application/fhir+json"]
    lines += [f"{name}: {value}" for name, value in (headers or {}).items()]
    lines.append(f"Content-Length: {len(body)}")
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + body


@pytest.fixture
def mllp_peer() -> Iterator[FaultyPeer]:
    peer = FaultyPeer("mllp")
    yield peer
    peer.close()


@pytest.fixture
def http_peer() -> Iterator[FaultyPeer]:
    peer = FaultyPeer("http")
    yield peer
    peer.close()


def one_message(ledger: Ledger, destination: str, payload: bytes, content_type: str) -> int:
    new = NewMessage(destination, "NET-1", "T-NET-1", "p1", payload, content_type)
    [row_id] = ledger.record_input_and_enqueue(NewInput("f" * 64, "net.json", "T-NET-1"), [new])
    return row_id


def attempt(ledger: Ledger, destination: str, transport: Transport, clock: Clock) -> tuple[str | None, float]:
    """One delivery step at the row's due time; what it gave and how long it took (monotonic seconds)."""
    row = ledger.rows("pending")
    if row:
        clock.now = max(clock.now, row[0].next_attempt_at)
    started = time.monotonic()
    result = deliver_one(ledger, destination, transport, clock, lambda: 0.5, Backoff(0.1, 300.0))
    return result, time.monotonic() - started


@pytest.mark.parametrize("fault", FAULTS)
def test_an_mllp_fault_is_a_bounded_retry_and_the_message_is_acknowledged_once(
    ledger: Ledger, clock: Clock, mllp_peer: FaultyPeer, fault: str
) -> None:
    """Half-close mid-ACK, silence or reset: retried within read_timeout, never marked delivered; then one AA."""
    row_id = one_message(ledger, "records", oru("NET-1"), HL7_V2_ER7)
    mllp_peer.script.extend([fault, fault])
    transport = MllpTransport(LOOPBACK, mllp_peer.port, connect_timeout=CONNECT_TIMEOUT, read_timeout=READ_TIMEOUT)
    try:
        failed = [attempt(ledger, "records", transport, clock) for _ in range(2)]
        still = ledger.get(row_id)
        done, _ = attempt(ledger, "records", transport, clock)
    finally:
        transport.close()
    row = ledger.get(row_id)

    assert [("retry", True), ("retry", True)] == [(r, took < READ_TIMEOUT + SLACK) for r, took in failed]
    assert still is not None and ("pending", 2) == (still.state, still.attempts)
    assert row is not None and ("delivered", "delivered", "AA") == (done, row.state, row.ack_text[:2])
    # Every attempt carried the same MSH-10: a receiver de-duplicating by control id keeps one.
    assert (["NET-1"] * 3, 1) == ([read_control_id(r) for r in mllp_peer.requests], len(mllp_peer.answered))
    assert 3 == mllp_peer.connections  # each failed connection dropped, a fresh one opened


@pytest.mark.parametrize("fault", FAULTS)
def test_a_fhir_fault_is_a_bounded_retry_and_the_bundle_is_posted_until_a_2xx(
    ledger: Ledger, clock: Clock, http_peer: FaultyPeer, fault: str
) -> None:
    """The same faults in an HTTP exchange: retried within read_timeout, never delivered without a 2xx."""
    row_id = one_message(ledger, "store", bundle("T-NET-1"), FHIR_JSON)
    http_peer.script.append(fault)
    transport = FhirRestTransport(
        f"http://{LOOPBACK}:{http_peer.port}/fhir", connect_timeout=CONNECT_TIMEOUT, read_timeout=READ_TIMEOUT
    )
    try:
        failed, took = attempt(ledger, "store", transport, clock)
        still = ledger.get(row_id)
        done, _ = attempt(ledger, "store", transport, clock)
    finally:
        transport.close()
    row = ledger.get(row_id)

    assert ("retry", True) == (failed, took < READ_TIMEOUT + SLACK)
    assert still is not None and "pending" == still.state
    assert row is not None and ("delivered", "delivered", 2, 1) == (
        done,
        row.state,
        len(http_peer.requests),
        len(http_peer.answered),
    )


def test_a_receiver_that_never_reads_cannot_hold_the_sender(ledger: Ledger, clock: Clock) -> None:
    """A peer that accepts and reads nothing: sending a message larger than the socket buffers still ends in time."""
    server = socket.create_server((LOOPBACK, 0))
    server.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    held: list[socket.socket] = []
    threading.Thread(target=lambda: held.append(server.accept()[0]), daemon=True).start()
    big = oru("NET-1").replace(b"21.4", b"21.4" + b"0" * 8_000_000)  # invented padding in OBX-5
    row_id = one_message(ledger, "records", big, HL7_V2_ER7)
    transport = MllpTransport(
        LOOPBACK, server.getsockname()[1], connect_timeout=CONNECT_TIMEOUT, read_timeout=READ_TIMEOUT
    )
    try:
        result, took = attempt(ledger, "records", transport, clock)
    finally:
        transport.close()
        server.close()
        for conn in held:
            conn.close()
    row = ledger.get(row_id)

    assert ("retry", True) == (result, took < READ_TIMEOUT + SLACK)
    assert row is not None and "pending" == row.state


# ---- 429 / 503 with Retry-After, for minutes ------------------------------------------------


def busy_for(peer: FaultyPeer, answers: list[tuple[int, str | None]]) -> None:
    """The peer answers these statuses (with these Retry-After values) in turn, then 200."""
    queue = deque(answers)

    def answer(request: bytes) -> bytes:
        if not queue:
            return http_answer(200, b'{"resourceType":"Bundle","type":"transaction-response","entry":[]}')
        status, after = queue.popleft()
        return http_answer(
            status, b'{"resourceType":"OperationOutcome","issue":[]}', {"Retry-After": after} if after else {}
        )

    peer.answer_with = answer


def test_minutes_of_429_and_503_are_waited_out_as_retry_after_says(tmp_path: Path, http_peer: FaultyPeer) -> None:
    """Busy for minutes: each attempt no sooner than its Retry-After (seconds or HTTP-date), then delivered once."""
    # source: RFC 9110 §10.2.3 (Retry-After: HTTP-date / delay-seconds), §15.6.4 (503); RFC 6585 §4 (429)
    clock = Clock(start=1_800_000_000.0)
    in_90_s = format_datetime(datetime.fromtimestamp(clock.now + 60 + 90, UTC), usegmt=True)  # sent at the 2nd try
    busy_for(http_peer, [(429, "60"), (503, in_90_s), (429, "120"), (503, "30")])
    transport = FhirRestTransport(
        f"http://{LOOPBACK}:{http_peer.port}/fhir",
        clock=clock,
        connect_timeout=CONNECT_TIMEOUT,
        read_timeout=READ_TIMEOUT,
    )
    tried_at: list[float] = []
    results: list[str | None] = []
    with Ledger.open(tmp_path / "ledger.sqlite3", now=clock) as ledger:
        row_id = one_message(ledger, "store", bundle("T-NET-1"), FHIR_JSON)
        try:
            for _ in range(5):
                due = ledger.get(row_id)
                assert due is not None
                clock.now = max(clock.now, due.next_attempt_at)
                tried_at.append(clock.now)
                results.append(deliver_one(ledger, "store", transport, clock, lambda: 0.5, Backoff(1.0, 300.0)))
        finally:
            transport.close()
        row = ledger.get(row_id)

    waits = [round(b - a, 3) for a, b in itertools.pairwise(tried_at)]
    assert ["retry"] * 4 + ["delivered"] == results
    assert [60.0, 90.0, 120.0, 30.0] == waits  # back-off alone would wait at most 0.5, 1, 2, 4 s
    assert row is not None and ("delivered", 5) == (row.state, len(http_peer.requests))


def test_a_retry_after_beyond_the_cap_counts_as_a_failure_and_waits_the_cap(
    tmp_path: Path, http_peer: FaultyPeer
) -> None:
    """Retry-After: 7200 with a 300 s cap: the attempt is a failure (said in the ledger), retried after the cap."""
    clock = Clock(start=1_800_000_000.0)
    busy_for(http_peer, [(503, "7200")])
    transport = FhirRestTransport(f"http://{LOOPBACK}:{http_peer.port}/fhir", clock=clock, read_timeout=READ_TIMEOUT)
    with Ledger.open(tmp_path / "ledger.sqlite3", now=clock) as ledger:
        row_id = one_message(ledger, "store", bundle("T-NET-1"), FHIR_JSON)
        try:
            result = deliver_one(ledger, "store", transport, clock, lambda: 0.5, Backoff(1.0, 300.0))
        finally:
            transport.close()
        row = ledger.get(row_id)

    assert row is not None
    assert ("retry", clock.now + 300.0, True) == (
        result,
        row.next_attempt_at,
        "over the maximum of 300 s: counted as a failure" in row.last_error,
    )
