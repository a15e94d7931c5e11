"""Per-destination answer policy: AE/AR retried or dead-lettered, HTTP 429/503 with Retry-After honoured."""

from __future__ import annotations

import json
from collections.abc import Iterator
from datetime import UTC, datetime
from email.utils import format_datetime
from http.server import BaseHTTPRequestHandler
from pathlib import Path
from typing import Any

import pytest

from bridge.errors import DeliveryError, Rejected, RetryLater
from bridge.service.delivery import Backoff, deliver_one
from bridge.service.files import STRAY_TEMPORARY, remove_strays, write_atomically
from bridge.service.ledger import Ledger, NewInput, NewMessage
from bridge.service.loopback import LoopbackServer
from bridge.service.transports.base import FHIR_JSON, DeliveryReceipt, OutgoingMessage
from bridge.service.transports.fhir_rest import FhirRestTransport, retry_after
from bridge.service.transports.mllp import Ack, judge
from tests.shell.conftest import LOOPBACK, Clock, bundle


@pytest.fixture
def busy_server() -> Iterator[dict[str, Any]]:
    """An endpoint answering the status and Retry-After the test sets."""
    state: dict[str, Any] = {"status": 429, "retry_after": "120"}

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:
            self.rfile.read(int(self.headers.get("Content-Length", "0")))
            data = json.dumps({"resourceType": "OperationOutcome", "issue": []}).encode()
            self.send_response(state["status"])
            if state["retry_after"] is not None:
                self.send_header("Retry-After", state["retry_after"])
            self.send_header("Content-Length", str(len(data)))
            self.end_headers()
            self.wfile.write(data)

        def log_message(self, format: str, *args: Any) -> None:
            """Quiet."""

    with LoopbackServer(Handler, name="test-busy") as server:
        state["url"] = f"http://{LOOPBACK}:{server.port}/fhir"
        yield state


def _message() -> OutgoingMessage:
    return OutgoingMessage("store", "B-1", bundle("T-1"), FHIR_JSON, "T-1")


@pytest.mark.parametrize("status", [429, 503])
def test_busy_with_retry_after_seconds_is_retried_no_sooner(busy_server, status):
    """429/503 with Retry-After: 120 is RetryLater after 120 s."""
    # source: RFC 9110 §10.2.3 (Retry-After delay-seconds), RFC 6585 §4 (429)
    busy_server["status"] = status
    transport = FhirRestTransport(busy_server["url"], connect_timeout=1, read_timeout=2)

    with pytest.raises(RetryLater) as caught:
        transport.deliver(_message())

    assert 120.0 == caught.value.after


def test_busy_without_retry_after_is_an_ordinary_retry(busy_server):
    """503 without Retry-After: retried with the usual back-off."""
    busy_server.update(status=503, retry_after=None)
    transport = FhirRestTransport(busy_server["url"], connect_timeout=1, read_timeout=2)

    with pytest.raises(DeliveryError) as caught:
        transport.deliver(_message())

    assert (DeliveryError, "HTTP 503") == (type(caught.value), caught.value.detail[:8])


def test_busy_can_be_dead_lettered_by_the_destination(busy_server):
    """on_busy = "dead-letter": a 429 is Rejected."""
    transport = FhirRestTransport(busy_server["url"], busy="dead-letter", connect_timeout=1, read_timeout=2)

    with pytest.raises(Rejected):
        transport.deliver(_message())


def test_retry_after_reads_an_http_date():
    """An HTTP-date 90 s ahead means 90 s; a date in the past means now."""
    # source: RFC 9110 §5.6.7 (IMF-fixdate), §10.2.3
    now = 1_700_000_000.0
    ahead = format_datetime(datetime.fromtimestamp(now + 90, UTC), usegmt=True)
    past = format_datetime(datetime.fromtimestamp(now - 90, UTC), usegmt=True)

    assert (90.0, 0.0) == (retry_after(ahead, now), retry_after(past, now))
    assert (None, None) == (retry_after("soon", now), retry_after(None, now))


class _Busy:
    def __init__(self, after: float) -> None:
        self.after = after

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        raise RetryLater(message.destination, f"HTTP 429: slow down (Retry-After {self.after:g} s)", self.after)

    def close(self) -> None:
        """Nothing held."""


@pytest.mark.parametrize(
    ("after", "due_in", "counted_as_failure"),
    [(200.0, 200.0, False), (300.0, 300.0, False), (600.0, 300.0, True), (86_400.0, 300.0, True)],
)
def test_delivery_waits_out_retry_after_up_to_the_cap_and_a_longer_one_is_a_failure(
    tmp_path: Path, after: float, due_in: float, counted_as_failure: bool
):
    """Back-off would retry after 0.5 s; a Retry-After within the 300 s cap is waited out, a longer one waits it."""
    # source: RFC 9110 §10.2.3 (Retry-After: the client waits at least that long; the maximum is the client's)
    clock = Clock()
    with Ledger.open(tmp_path / "l.sqlite3", now=clock) as ledger:
        (row_id,) = ledger.record_input_and_enqueue(
            NewInput("b" * 64, "b.json", "T-1"), [NewMessage("store", "B-1", "T-1", "p", b"{}", FHIR_JSON)]
        )
        busy = _Busy(after)
        result = deliver_one(ledger, "store", busy, clock, lambda: 0.5, Backoff(1.0, 300.0), "http://x/fhir")
        row = ledger.get(row_id)

    assert row is not None
    assert ("retry", clock.now + due_in, counted_as_failure) == (
        result,
        row.next_attempt_at,
        "counted as a failure" in row.last_error,
    )


@pytest.mark.parametrize(
    ("code", "retried", "expected"),
    [("AE", frozenset(), Rejected), ("AR", frozenset(), Rejected), ("AE", frozenset({"AE"}), DeliveryError),
     ("AR", frozenset({"AR"}), DeliveryError), ("CR", frozenset({"AR"}), DeliveryError),
     ("AE", frozenset({"AR"}), Rejected)],
)  # fmt: skip
def test_ack_refusals_follow_the_destination_policy(code, retried, expected):
    """AE/AR dead-letter by default; listed codes (and their commit-level CE/CR) are retried instead."""
    # source: HL7 v2.5.1 ch. 2 table 0008 (AA, AE, AR; CA, CE, CR for enhanced acknowledgement)
    with pytest.raises(DeliveryError) as caught:
        judge(Ack(code, "C-1", "busy"), "C-1", "records", retried)

    assert expected is type(caught.value)


def test_only_our_temporary_files_are_removed(tmp_path: Path):
    """remove_strays takes .<name>.<8 chars>.tmp and .<name>.tmp, nothing else."""
    ours = [".a.json.error.json.ab12_x9z.tmp", ".a.json.tmp"]
    theirs = ["a.tmp", ".keep", ".a.json.part", "a.json", ".tmp", "..tmp"]
    for name in ours + theirs:
        (tmp_path / name).write_bytes(b"x")
    write_atomically(tmp_path / "written.json", b"{}")

    removed = remove_strays(tmp_path)

    assert sorted(ours) == sorted(p.name for p in removed)
    assert sorted([*theirs, "written.json"]) == sorted(p.name for p in tmp_path.iterdir())
    assert STRAY_TEMPORARY.fullmatch(".x.json.12345678.tmp")
