"""Asking a FHIR server what it holds: identifier searches over the destination's own HTTP client (shell).

Owns running the searches of :mod:`bridge.reconcile.search` against one server: every page of a
search (its Bundle's link "next", which must stay on the same server, at most ``MAX_PAGES``),
a bounded number of searches in flight (``Destination.reconcile_in_flight`` worker threads sharing
the transport's one connection pool), and what an answer means: 2xx is read, 429 and 503 are
waited out (no sooner than ``Retry-After``, else a doubling back-off) and tried again, as are
other 5xx and network trouble, up to ``MAX_ATTEMPTS`` tries; anything else stops the check
(:class:`bridge.errors.ReconcileFailed`, exit 2), since a search that cannot be answered proves
nothing. The HTTP client, its TLS, timeouts and token are the transport's
(:meth:`FhirRestTransport.get`): there is no second client configuration.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any, Protocol

import httpx
import orjson

from bridge.errors import DeliveryError, ReconcileFailed
from bridge.reconcile.engine import Held, Verdict
from bridge.reconcile.search import Batch, judge_batch, unique_held, whole_system
from bridge.service.transports.fhir_rest import BUSY, operation_outcome_text, retry_after

MAX_ATTEMPTS = 6  # tries of one request before the check stops
FIRST_BACKOFF = 1.0  # seconds before the second try when the server names no Retry-After; doubled each try
MAX_WAIT = 120.0  # a longer Retry-After stops the check: run it again when the server is less busy
MAX_PAGES = 10_000  # pages of one search: more is a server that loops


class SearchTransport(Protocol):
    """What a search needs of the destination's transport (:class:`FhirRestTransport` is one)."""

    @property
    def url(self) -> httpx.URL: ...

    def get(self, url: str, destination: str) -> httpx.Response: ...


class SearchClient:
    """Searches one FHIR server through its transport; ``in_flight`` searches at a time."""

    def __init__(
        self,
        transport: SearchTransport,
        destination: str,
        *,
        in_flight: int,
        sleep: Callable[[float], None] = time.sleep,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.transport = transport
        self.destination = destination
        self.in_flight = max(1, in_flight)
        self.base = str(transport.url).rstrip("/")
        self._origin = _origin(httpx.URL(self.base))
        self._sleep = sleep
        self._clock = clock
        self.requests = 0
        self.waits = 0

    def judged(self, batches: Iterable[Batch]) -> Iterator[list[Verdict]]:
        """The verdicts of each batch, in the batches' order, with at most ``in_flight`` searches running."""
        with ThreadPoolExecutor(max_workers=self.in_flight, thread_name_prefix="reconcile") as pool:
            window: deque[Future[list[Verdict]]] = deque()
            try:
                for batch in batches:
                    window.append(pool.submit(self._judge, batch))
                    if len(window) >= 2 * self.in_flight:  # a few queued behind the running ones
                        yield window.popleft().result()
                while window:
                    yield window.popleft().result()
            finally:
                for future in window:
                    future.cancel()

    def held_under(self, resource_type: str, system: str) -> Iterator[list[Held]]:
        """Every ``resource_type`` the server holds under the identifier ``system``, page by page."""
        for page in self.pages(whole_system(resource_type, system)):
            yield unique_held(page, resource_type)

    def pages(self, query: str) -> Iterator[list[dict[str, Any]]]:
        """The resources of each page of one search (``query`` relative to the base URL)."""
        url = f"{self.base}/{query}"
        for _ in range(MAX_PAGES):
            bundle = self._read(url)
            resources = [e["resource"] for e in bundle.get("entry") or [] if isinstance(e, dict) and "resource" in e]
            following = next((link.get("url") for link in bundle.get("link") or []
                              if isinstance(link, dict) and link.get("relation") == "next"), None)  # fmt: skip
            del bundle  # one page in memory at a time: this one goes before the next is read
            yield resources
            resources = []
            if not following:
                return
            url = self._same_server(str(following), url)
        raise ReconcileFailed(self.destination, f"a search returned more than {MAX_PAGES} pages: stopped")

    def _judge(self, batch: Batch) -> list[Verdict]:
        resources = [resource for page in self.pages(batch.query()) for resource in page]
        return judge_batch(batch, resources)

    def _same_server(self, link: str, current: str) -> str:
        """The next page's URL, refused when it leaves the server (the token must not go elsewhere)."""
        url = httpx.URL(current).join(link)
        if _origin(url) != self._origin:
            raise ReconcileFailed(self.destination, f"a next-page link points to another server ({url.host})")
        return str(url)

    def _read(self, url: str) -> dict[str, Any]:
        response = self._get(url)
        try:
            document = orjson.loads(response.content)
        except orjson.JSONDecodeError:
            raise ReconcileFailed(self.destination, "a search answered with something that is not JSON") from None
        if not isinstance(document, dict) or document.get("resourceType") != "Bundle":
            raise ReconcileFailed(self.destination, "a search answered with something that is not a Bundle")
        return document

    def _get(self, url: str) -> httpx.Response:
        """One GET, tried again on 429, 503, other 5xx and network trouble; any other failure stops the check."""
        for attempt in range(1, MAX_ATTEMPTS + 1):
            self.requests += 1
            try:
                response = self.transport.get(url, self.destination)
            except DeliveryError as exc:
                why, wait = exc.detail, None
            else:
                status = response.status_code
                if 200 <= status < 300:
                    return response
                why = f"HTTP {status}: {operation_outcome_text(response.content) or response.reason_phrase}"
                if status not in BUSY and status < 500:
                    raise ReconcileFailed(self.destination, f"a search was refused: {why}"[:500])
                wait = retry_after(response.headers.get("Retry-After"), self._clock()) if status in BUSY else None
            if attempt == MAX_ATTEMPTS:
                break
            if wait is not None and wait > MAX_WAIT:
                raise ReconcileFailed(self.destination, f"{why}: the server asks to wait {wait:g} s; try again later")
            self.waits += 1
            self._sleep(wait if wait is not None else min(MAX_WAIT, FIRST_BACKOFF * 2 ** (attempt - 1)))
        raise ReconcileFailed(self.destination, f"{why} ({MAX_ATTEMPTS} tries)"[:500])


def _origin(url: httpx.URL) -> tuple[str, str, int | None]:
    return url.scheme, url.host, url.port
