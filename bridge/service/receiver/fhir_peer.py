"""The stand-in's FHIR endpoint: transaction Bundles in, resources kept in a SQLite file.

Owns answering ``POST [base]`` with a transaction Bundle: each entry ``POST Type`` with
``ifNoneExist`` creates the resource unless one was created with the same search (then 200 and
nothing new), and ``PUT Type?search`` updates the resource that search finds or creates it;
``urn:uuid:`` references between entries are rewritten to the ids given. All entries succeed or
none does. ``GET [base]/Type?identifier=...`` searches what it holds (:mod:`.fhir_search`: OR-lists,
``_count``, pages). Anything else is a 400 OperationOutcome. Loopback only; no authentication,
unless a test hands it ``authorize``; ``busy_every`` rehearses a throttling server (every n-th
search answered 429 with ``Retry-After``).
source: FHIR R4 http.html#transaction, #cond-update, #ccreate (If-None-Exist / ifNoneExist)
"""

from __future__ import annotations

import json
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler
from typing import Any

from bridge.service.loopback import LoopbackServer
from bridge.service.receiver.fhir_search import SearchRefused, answer, parse_search
from bridge.service.receiver.store import ResourceStore

MAX_BODY_BYTES = 20 * 1024 * 1024


class BundleRefused(Exception):
    """The Bundle cannot be processed; the text goes into the OperationOutcome."""


def process_transaction(store: ResourceStore, bundle: Any) -> dict[str, Any]:
    """Apply a transaction Bundle to ``store``; the transaction-response Bundle."""
    if not isinstance(bundle, dict) or bundle.get("resourceType") != "Bundle" or bundle.get("type") != "transaction":
        raise BundleRefused("a Bundle of type transaction")
    entries = bundle.get("entry") or []
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        raise BundleRefused("Bundle.entry: a list of entries")
    responses: list[dict[str, Any]] = []
    references: dict[str, str] = {}
    with store.transaction():
        planned = [_plan(entry) for entry in entries]
        written = []
        for method, kind, criteria, resource, full_url in planned:
            found = store.find(kind, criteria)
            if method == "POST" and found is not None:
                item, status, changed = found, "200 OK", False  # ifNoneExist matched: nothing created
            elif found is not None:
                item, status, changed = store.update(found, resource), "200 OK", True  # conditional update
            else:
                item, status, changed = store.create(kind, criteria, resource), "201 Created", True
            if full_url:
                references[full_url] = item.reference
            written.append((item, status, changed, resource))
        # References between entries are resolved once every entry has its id.
        for item, status, changed, resource in written:
            if changed:
                store.set_body(item, _resolved(resource, references))
            responses.append({"response": {"status": status, "location": f"{item.reference}/_history/{item.version}"}})
    return {"resourceType": "Bundle", "type": "transaction-response", "entry": responses}


def _plan(entry: dict[str, Any]) -> tuple[str, str, str, dict[str, Any], str]:
    request, resource = entry.get("request"), entry.get("resource")
    if not isinstance(request, dict) or not isinstance(resource, dict):
        raise BundleRefused("each entry: a request and a resource")
    method, url = request.get("method"), str(request.get("url", ""))
    kind = str(resource.get("resourceType", ""))
    if method == "POST" and url == kind and request.get("ifNoneExist"):
        return "POST", kind, str(request["ifNoneExist"]), resource, str(entry.get("fullUrl", ""))
    if method == "PUT" and url.startswith(kind + "?") and len(url) > len(kind) + 1:
        return "PUT", kind, url[len(kind) + 1 :], resource, str(entry.get("fullUrl", ""))
    raise BundleRefused(f"entry {method} {url}: POST with ifNoneExist or a conditional PUT (Type?search)")


def _resolved(resource: dict[str, Any], references: dict[str, str]) -> dict[str, Any]:
    text = json.dumps(resource)
    for urn, reference in references.items():
        text = text.replace(json.dumps(urn), json.dumps(reference))
    resolved: dict[str, Any] = json.loads(text)
    return resolved


class FhirPeer(LoopbackServer):
    """The FHIR endpoint on 127.0.0.1 in a background thread; the base URL is ``url``."""

    def __init__(self, store: ResourceStore, port: int = 0) -> None:
        self.store = store
        self.bundles = 0
        self.searches = 0
        self.busy_every = 0  # > 0: every n-th search is answered 429 with Retry-After busy_seconds
        self.busy_seconds = 1
        self.authorize: Callable[[str], bool] | None = None  # the Authorization header -> allowed (tests)
        self._count_lock = threading.Lock()
        super().__init__(_handler(self), port, setting="--fhir-port", name="stand-in-fhir")

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}/fhir"


def operation_outcome(text: str) -> dict[str, Any]:
    """A FHIR R4 OperationOutcome with one error issue (code ``invalid``) saying ``text``."""
    return {
        "resourceType": "OperationOutcome",
        "issue": [{"severity": "error", "code": "invalid", "diagnostics": text}],
    }


def _handler(peer: FhirPeer) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        # Keep-alive: a client's pool reuses its connections (every answer carries its length; a body
        # left unread closes the connection, so that it is never read as the next request).
        protocol_version = "HTTP/1.1"

        def do_POST(self) -> None:  # the name http.server dispatches to
            if self.path.rstrip("/") != "/fhir":
                self.close_connection = True
                return self._answer(404, operation_outcome(f"POST to the base URL {peer.url}"))
            length = int(self.headers.get("Content-Length", "0") or 0)
            if length > MAX_BODY_BYTES:
                self.close_connection = True
                return self._answer(413, operation_outcome("a Bundle of at most 20 MB"))
            try:
                document = json.loads(self.rfile.read(length))
                answer = process_transaction(peer.store, document)
            except (ValueError, BundleRefused) as exc:
                return self._answer(
                    400, operation_outcome(f"expected {exc}" if isinstance(exc, BundleRefused) else "JSON")
                )
            peer.bundles += 1
            self._answer(200, answer)

        def do_GET(self) -> None:  # the name http.server dispatches to
            path, _, query = self.path.partition("?")
            if not path.startswith("/fhir/"):
                return self._answer(404, operation_outcome(f"a search under the base URL {peer.url}"))
            if peer.authorize is not None and not peer.authorize(self.headers.get("Authorization", "")):
                return self._answer(401, operation_outcome("a valid access token"))
            with peer._count_lock:
                peer.searches += 1
                busy = peer.busy_every > 0 and peer.searches % peer.busy_every == 0
            if busy:
                return self._answer(429, operation_outcome("busy: try later"), {"Retry-After": str(peer.busy_seconds)})
            try:
                search = parse_search(path[len("/fhir/") :], query)
            except SearchRefused as exc:
                return self._answer(400, operation_outcome(f"expected {exc}"))
            self._send(200, answer(peer.store, search, peer.url))

        def _answer(self, status: int, document: dict[str, Any], headers: dict[str, str] | None = None) -> None:
            self._send(status, json.dumps(document).encode(), headers)

        def _send(self, status: int, data: bytes, headers: dict[str, str] | None = None) -> None:
            self.send_response(status)
            self.send_header("Content-Type", "application/fhir+json")
            self.send_header("Content-Length", str(len(data)))
            for name, value in (headers or {}).items():
                self.send_header(name, value)
            self.end_headers()
            self.wfile.write(data)

        def log_message(self, format: str, *args: Any) -> None:
            """The stand-in prints its own one line per Bundle, not http.server's."""

    return Handler
