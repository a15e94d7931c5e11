"""FHIR REST delivery: POST each transaction Bundle to the server's base URL with httpx.

Owns the HTTP exchange and what its answer means: 2xx delivered, 4xx refused (with the
OperationOutcome's text), 5xx and network trouble retryable; 429 and 503 retried no sooner
than their ``Retry-After`` (or dead-lettered, if the destination says so); how long a wait the
service accepts is the delivery loop's decision (:mod:`bridge.service.delivery`). Authentication is
a static bearer token, or SMART Backend Services (:mod:`.smart`), whose token is refreshed
once on a 401 before the message is dead-lettered. ``get`` lends the same client (pool, timeouts,
TLS, token) to ``reconcile``'s searches, so that there is one client configuration per server.
It must not touch the ledger, read the environment or log; above all it never writes a token
into a receipt, an exception or a repr.
"""

from __future__ import annotations

import json
import ssl
import time
from collections import Counter
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from email.utils import parsedate_to_datetime
from typing import Any

import httpx

from bridge.errors import (
    ConfigError,
    ConnectFailed,
    DeliveryError,
    DeliveryTimeout,
    Rejected,
    RetryLater,
)
from bridge.service.settings import CONNECT_TIMEOUT, READ_TIMEOUTS
from bridge.service.transports.base import (
    FHIR_JSON,
    DeliveryReceipt,
    OutgoingMessage,
    TlsOptions,
    client_tls_context,
)
from bridge.service.transports.smart import SmartClient, SmartTokens

DEFAULT_CONNECT_TIMEOUT = CONNECT_TIMEOUT
DEFAULT_READ_TIMEOUT = READ_TIMEOUTS["fhir-rest"]
MAX_TEXT = 500  # keep ledger rows and status lines readable

# 4xx answers that say nothing against the message itself: bad credentials, a proxy
# asking for them, timeouts and throttling. Dead-lettering on these would strand every
# message while the operator fixes a token; they are retried instead.
# source: RFC 9110 §15.5 (401, 407, 408), RFC 8470 (425), RFC 6585 §4 (429)
RETRYABLE_4XX = frozenset({401, 407, 408, 425, 429})
# "Busy, try later": their Retry-After is honoured. source: RFC 9110 §10.2.3, §15.6.4; RFC 6585 §4
BUSY = frozenset({429, 503})


def retry_after(value: str | None, now: float) -> float | None:
    """Seconds to wait from a Retry-After value (delay-seconds or an HTTP-date); None if absent or unreadable."""
    # source: RFC 9110 §10.2.3 Retry-After = HTTP-date / delay-seconds
    if not value:
        return None
    value = value.strip()
    if value.isascii() and value.isdigit():  # str.isdigit alone takes "²", which float() refuses
        return float(value)
    try:
        when = parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when.tzinfo is None:
        return None
    return max(0.0, when.timestamp() - now)


def operation_outcome_text(body: bytes) -> str:
    """The issues of an OperationOutcome body (diagnostics, else details.text, else code); "" if none."""
    try:
        document = json.loads(body)
    except (ValueError, UnicodeDecodeError):
        return ""
    if not isinstance(document, dict) or document.get("resourceType") != ("OperationOutcome"):
        return ""
    return "; ".join(filter(None, map(_issue_text, document.get("issue") or [])))


def _issue_text(issue: Any) -> str:
    if not isinstance(issue, dict):
        return ""
    details = issue.get("details")
    detail_text = details.get("text") if isinstance(details, dict) else None
    return str(issue.get("diagnostics") or detail_text or issue.get("code") or "")


def response_summary(body: bytes) -> str:
    """The entry statuses of a transaction-response Bundle, counted: '201 Created x3'."""
    try:
        document = json.loads(body)
    except (ValueError, UnicodeDecodeError):
        return ""
    if not isinstance(document, dict) or document.get("resourceType") != "Bundle":
        return ""
    statuses = Counter(
        str((entry.get("response") or {}).get("status", "?"))
        for entry in document.get("entry") or []
        if isinstance(entry, dict)
    )
    return ", ".join(f"{status} x{count}" for status, count in statuses.items())


def judge(
    status: int,
    reason: str,
    body: bytes,
    destination: str,
    *,
    busy: str = "retry",
    wait: float | None = None,
) -> DeliveryReceipt:
    """Turn an HTTP answer into a receipt, or the DeliveryError it amounts to.

    ``busy``: what 429 and 503 mean here ("retry" or "dead-letter"); ``wait``: their Retry-After in seconds.
    """
    if 200 <= status < 300:
        return DeliveryReceipt(str(status), response_summary(body)[:MAX_TEXT])
    text = f"HTTP {status}: {operation_outcome_text(body) or reason}"[:MAX_TEXT]
    if status in BUSY:
        if busy == "dead-letter":
            raise Rejected(destination, text)
        if wait is not None:
            raise RetryLater(destination, f"{text} (Retry-After {wait:g} s)", wait)
    if 400 <= status < 500 and status not in RETRYABLE_4XX:
        raise Rejected(destination, text)
    raise DeliveryError(destination, text)


@contextmanager
def _translated(destination: str) -> Iterator[None]:
    """The one translation of httpx, socket and TLS errors into DeliveryError."""
    try:
        yield
    except httpx.ConnectTimeout as exc:
        raise ConnectFailed(destination, "connect timed out") from exc
    except httpx.TimeoutException as exc:
        raise DeliveryTimeout(destination, "no answer in time") from exc
    except httpx.ConnectError as exc:
        raise ConnectFailed(destination, _describe(exc)) from exc
    except (httpx.HTTPError, httpx.StreamError, OSError, ssl.SSLError) as exc:
        raise DeliveryError(destination, _describe(exc)) from exc


def _describe(exc: BaseException) -> str:
    # httpx messages name the error, never the request headers, so no token can leak.
    return f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__


class FhirRestTransport:
    """POSTs transaction Bundles to one FHIR server; the connection pool is reused.

    ``token`` is the bearer token's value (the shell reads it from the environment
    variable the configuration names). TLS certificates are verified, against
    ``tls.ca_file`` when given, else the system store.
    """

    def __init__(
        self,
        base_url: str,
        *,
        token: str | None = None,
        smart: SmartClient | None = None,
        busy: str = "retry",
        clock: Callable[[], float] = time.time,
        connect_timeout: float = DEFAULT_CONNECT_TIMEOUT,
        read_timeout: float = DEFAULT_READ_TIMEOUT,
        tls: TlsOptions | None = None,
    ) -> None:
        self.url = _checked_url(base_url)
        headers = {"Content-Type": FHIR_JSON, "Accept": FHIR_JSON}
        if token:
            headers["Authorization"] = f"Bearer {token}"
        self._client = httpx.Client(
            headers=headers,
            timeout=httpx.Timeout(read_timeout, connect=connect_timeout),
            verify=client_tls_context(tls or TlsOptions()),
            follow_redirects=False,  # a redirected POST is a configuration mistake
            trust_env=False,  # settings come from bridge.config only, not ambient variables
        )
        self.busy = busy
        self._clock = clock
        # The key is read here: a bad one stops the start with a ConfigError.
        try:
            self._tokens = None if smart is None else SmartTokens(smart, self._client, clock)
        except ConfigError:
            self._client.close()
            raise

    def __repr__(self) -> str:
        # Without any user:password part of the URL.
        url = self.url.copy_with(username=None, password=None)
        return f"FhirRestTransport({str(url)!r})"

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        destination = message.destination
        if message.content_type != FHIR_JSON:
            raise Rejected(destination, f"cannot POST {message.content_type} as FHIR")
        response = self._post(message)
        if response.status_code == 401 and self._tokens is not None:
            # The token may have been revoked or expired early: one new token, one more try.
            self._tokens.forget()
            response = self._post(message)
            if response.status_code == 401:
                raise Rejected(destination, "HTTP 401 with a new token: the server does not accept this client")
        wait = retry_after(response.headers.get("Retry-After"), self._clock())
        return judge(
            response.status_code, response.reason_phrase, response.content, destination, busy=self.busy, wait=wait
        )

    def _post(self, message: OutgoingMessage) -> httpx.Response:
        headers = {}
        if self._tokens is not None:
            headers["Authorization"] = f"Bearer {self._tokens.token(message.destination)}"
        with _translated(message.destination):
            return self._client.post(self.url, content=message.payload, headers=headers)

    def get(self, url: str, destination: str) -> httpx.Response:
        """GET ``url`` (a search on this server) with the pool, TLS, timeouts and authentication of delivery.

        A 401 with SMART tokens fetches a new token and tries once more, as :meth:`deliver` does;
        the answer is the caller's to judge. Network trouble raises a DeliveryError.
        """
        response = self._get(url, destination)
        if response.status_code == 401 and self._tokens is not None:
            self._tokens.forget()
            response = self._get(url, destination)
        return response

    def _get(self, url: str, destination: str) -> httpx.Response:
        headers = {}
        if self._tokens is not None:
            headers["Authorization"] = f"Bearer {self._tokens.token(destination)}"
        with _translated(destination):
            return self._client.get(url, headers=headers)

    def close(self) -> None:
        self._client.close()


def _checked_url(base_url: str) -> httpx.URL:
    try:
        url = httpx.URL(base_url)
    except httpx.InvalidURL as exc:
        raise ConfigError("fhir.base_url", f"a valid URL ({exc})") from exc
    if url.scheme not in ("http", "https") or not url.host:
        raise ConfigError("fhir.base_url", "an http:// or https:// URL with a host")
    return url
