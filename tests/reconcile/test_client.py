"""Asking the server: pages, 429 with Retry-After, an expired SMART token mid-run, a static token, bad links.

Against the stand-in's FHIR endpoint on 127.0.0.1 (its ``busy_every`` answers every n-th search 429
with Retry-After; its ``authorize`` hook checks the bearer token), through the real FHIR transport.
"""

from __future__ import annotations

import json
import threading
import urllib.parse
from collections.abc import Iterator
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import rsa

from bridge.errors import ReconcileFailed
from bridge.reconcile.client import MAX_ATTEMPTS, SearchClient
from bridge.reconcile.engine import Expected
from bridge.reconcile.search import batches
from bridge.service.receiver import FhirPeer, ResourceStore, fhir_search
from bridge.service.receiver.fhir_peer import process_transaction
from bridge.service.transports.fhir_rest import FhirRestTransport
from bridge.service.transports.smart import SmartClient

SYSTEM = "https://fenwick-hollow.example/dlco-bridge/observation-id"
COUNT = 30


def _entry(value: str) -> dict[str, Any]:
    resource = {
        "resourceType": "Observation",
        "status": "final",
        "identifier": [{"system": SYSTEM, "value": value}],
        "code": {"coding": [{"system": "http://loinc.org", "code": "19911-7"}]},
        "valueQuantity": {"value": 21.5, "code": "mL/min/mm[Hg]"},
    }
    return {
        "resource": resource,
        "request": {"method": "POST", "url": "Observation", "ifNoneExist": f"identifier={SYSTEM}|{value}"},
    }


def _expected(value: str) -> Expected:
    return Expected(
        "fhir-store",
        "fhir",
        "Lab",
        value,
        "Observation",
        SYSTEM,
        value,
        "http://loinc.org",
        "19911-7",
        "21.5",
        "mL/min/mm[Hg]",
        "final",
    )


@pytest.fixture
def peer(tmp_path: Path) -> Iterator[FhirPeer]:
    """A stand-in holding COUNT Observations."""
    store = ResourceStore(tmp_path / "resources.sqlite3")
    entries = [_entry(f"T-{i:03d}.dlco") for i in range(COUNT)]
    process_transaction(store, {"resourceType": "Bundle", "type": "transaction", "entry": entries})
    fhir = FhirPeer(store)
    fhir.start()
    yield fhir
    fhir.stop()
    store.close()


def _all_verdicts(client: SearchClient, limit: int = 400) -> list[str]:
    expected = [_expected(f"T-{i:03d}.dlco") for i in range(COUNT)]
    return [v.verdict for found in client.judged(batches(expected, limit=limit)) for v in found]


def test_a_server_that_pages_at_two_is_followed_to_the_end(peer: FhirPeer, monkeypatch: pytest.MonkeyPatch):
    """The server gives two resources a page whatever _count asks: every one is still found, by link next."""
    # source: FHIR R4 search.html _count ("the server may return fewer"); http.html "Paging"
    monkeypatch.setattr(fhir_search, "MAX_COUNT", 2)
    transport = FhirRestTransport(peer.url)
    client = SearchClient(transport, "fhir-store", in_flight=3)

    verdicts = _all_verdicts(client, limit=4000)  # one batch of 30: 15 pages
    transport.close()

    assert (["present"] * COUNT, 15) == (verdicts, client.requests)


def test_429_with_retry_after_is_waited_out_then_tried_again(peer: FhirPeer):
    """Every third search is answered 429 Retry-After: 2: the client waits 2 s each time and finds everything."""
    # source: RFC 6585 §4 (429 Too Many Requests), RFC 9110 §10.2.3 (Retry-After: delay-seconds)
    peer.busy_every, peer.busy_seconds = 3, 2
    waited: list[float] = []
    transport = FhirRestTransport(peer.url)
    client = SearchClient(transport, "fhir-store", in_flight=1, sleep=waited.append)

    verdicts = _all_verdicts(client)  # batches of a few identifiers: about ten searches
    transport.close()

    assert ["present"] * COUNT == verdicts
    assert [2.0] * (peer.searches // 3) == waited
    assert peer.searches >= 3


def test_busy_without_retry_after_backs_off_then_gives_up(peer: FhirPeer):
    """Always 503-like busy without a usable wait: doubling waits, then ReconcileFailed after MAX_ATTEMPTS tries."""
    peer.busy_every, peer.busy_seconds = 1, "soon"  # type: ignore[assignment]  # not delay-seconds: unusable
    waited: list[float] = []
    transport = FhirRestTransport(peer.url)
    client = SearchClient(transport, "fhir-store", in_flight=1, sleep=waited.append)

    with pytest.raises(ReconcileFailed, match="429"):
        _all_verdicts(client, limit=4000)  # one search
    transport.close()

    assert [2.0**n for n in range(MAX_ATTEMPTS - 1)] == waited  # 1, 2, 4, 8, 16 s


def test_a_static_token_is_sent_with_every_search(peer: FhirPeer):
    """The destination's bearer token goes with each search; without it the server answers 401 and the check stops."""
    peer.authorize = lambda header: header == "Bearer s3cret-for-tests"
    good, bad = FhirRestTransport(peer.url, token="s3cret-for-tests"), FhirRestTransport(peer.url)

    verdicts = _all_verdicts(SearchClient(good, "fhir-store", in_flight=2))
    with pytest.raises(ReconcileFailed, match="401"):
        _all_verdicts(SearchClient(bad, "fhir-store", in_flight=1))
    good.close()
    bad.close()

    assert ["present"] * COUNT == verdicts


@dataclass
class TokenEndpoint:
    """A loopback OAuth token endpoint issuing access-1, access-2, ... (the assertion is checked elsewhere)."""

    issued: list[str] = field(default_factory=list)
    url: str = ""


def _token_handler(endpoint: TokenEndpoint) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:
            form = dict(urllib.parse.parse_qsl(self.rfile.read(int(self.headers["Content-Length"])).decode()))
            assert form["grant_type"] == "client_credentials"
            token = f"access-{len(endpoint.issued) + 1}"
            endpoint.issued.append(token)
            data = json.dumps({"access_token": token, "token_type": "bearer", "expires_in": 3600}).encode()
            self.send_response(200)
            self.send_header("Content-Type", "application/json")
            self.send_header("Content-Length", str(len(data)))
            self.end_headers()
            self.wfile.write(data)

        def log_message(self, format: str, *args: Any) -> None:
            """Quiet."""

    return Handler


def test_an_expired_smart_token_mid_run_is_renewed_once(peer: FhirPeer, tmp_path: Path):
    """The server stops honouring the first token after four searches: one new token, and the check goes on."""
    # source: HL7 SMART App Launch 2.x, Backend Services (client_credentials); RFC 6750 §3.1 (401 invalid_token)
    endpoint = TokenEndpoint()
    server = ThreadingHTTPServer(("127.0.0.1", 0), _token_handler(endpoint))
    endpoint.url = f"http://127.0.0.1:{server.server_address[1]}/token"
    threading.Thread(target=server.serve_forever, args=(0.05,), daemon=True).start()
    key = rsa.generate_private_key(public_exponent=65537, key_size=2048)
    key_file = tmp_path / "client-key.pem"
    key_file.write_bytes(
        key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption())
    )
    used: list[str] = []

    def authorize(header: str) -> bool:
        used.append(header)
        token = header.removeprefix("Bearer ")
        return token == "access-2" or (token == "access-1" and len(used) <= 4)  # access-1 expires mid-run

    peer.authorize = authorize
    smart = SmartClient("fenwick-hollow-bridge", endpoint.url, key_file, "system/Observation.read")
    transport = FhirRestTransport(peer.url, smart=smart)

    verdicts = _all_verdicts(SearchClient(transport, "fhir-store", in_flight=1))
    transport.close()
    server.shutdown()
    server.server_close()

    assert ["present"] * COUNT == verdicts
    assert ["access-1", "access-2"] == endpoint.issued
    assert "Bearer access-2" == used[-1]


class _Leaving(BaseHTTPRequestHandler):
    """A server whose first page points its next link at another host."""

    def do_GET(self) -> None:
        page = {
            "resourceType": "Bundle",
            "type": "searchset",
            "entry": [],
            "link": [{"relation": "next", "url": "http://192.0.2.1/fhir/Observation?page=2"}],
        }
        data = json.dumps(page).encode()
        self.send_response(200)
        self.send_header("Content-Length", str(len(data)))
        self.end_headers()
        self.wfile.write(data)

    def log_message(self, format: str, *args: Any) -> None:
        """Quiet."""


def test_a_next_link_to_another_server_stops_the_check():
    """A link "next" to another host is not followed (the token would go with it): ReconcileFailed."""
    server = ThreadingHTTPServer(("127.0.0.1", 0), _Leaving)
    threading.Thread(target=server.serve_forever, args=(0.05,), daemon=True).start()
    transport = FhirRestTransport(f"http://127.0.0.1:{server.server_address[1]}/fhir", token="t")

    with pytest.raises(ReconcileFailed, match="another server"):
        list(SearchClient(transport, "fhir-store", in_flight=1).pages("Observation?identifier=a|b"))
    transport.close()
    server.shutdown()
    server.server_close()
