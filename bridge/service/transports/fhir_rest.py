"""FHIR REST delivery: POST each transaction Bundle to the server's base URL with httpx.

Owns the HTTP exchange and what its answer means: 2xx delivered, 4xx refused (with the
OperationOutcome's text), 5xx and network trouble retryable. It must not touch the
ledger, read the environment or log; above all it never writes the bearer token into a
receipt, an exception or a repr.
"""

from __future__ import annotations

import json
import ssl
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import httpx

from bridge.errors import (
    ConfigError,
    ConnectFailed,
    DeliveryError,
    DeliveryTimeout,
    Rejected,
)
from bridge.service.transports.base import (
    FHIR_JSON,
    DeliveryReceipt,
    OutgoingMessage,
    TlsOptions,
    client_tls_context,
)

DEFAULT_CONNECT_TIMEOUT = 10.0
DEFAULT_READ_TIMEOUT = 60.0
MAX_TEXT = 500  # keep ledger rows and status lines readable

# 4xx answers that say nothing against the message itself: bad credentials, a proxy
# asking for them, timeouts and throttling. Dead-lettering on these would strand every
# message while the operator fixes a token; they are retried instead.
# source: RFC 9110 §15.5 (401, 407, 408), RFC 8470 (425), RFC 6585 §4 (429)
RETRYABLE_4XX = frozenset({401, 407, 408, 425, 429})


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


def judge(status: int, reason: str, body: bytes, destination: str) -> DeliveryReceipt:
    """Turn an HTTP answer into a receipt, or the DeliveryError it amounts to."""
    if 200 <= status < 300:
        return DeliveryReceipt(str(status), response_summary(body)[:MAX_TEXT])
    text = f"HTTP {status}: {operation_outcome_text(body) or reason}"[:MAX_TEXT]
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
            trust_env=False,  # settings come from config.py only, not ambient variables
        )

    def __repr__(self) -> str:
        # Without any user:password part of the URL.
        url = self.url.copy_with(username=None, password=None)
        return f"FhirRestTransport({str(url)!r})"

    def deliver(self, message: OutgoingMessage) -> DeliveryReceipt:
        destination = message.destination
        if message.content_type != FHIR_JSON:
            raise Rejected(destination, f"cannot POST {message.content_type} as FHIR")
        with _translated(destination):
            response = self._client.post(self.url, content=message.payload)
        return judge(response.status_code, response.reason_phrase, response.content, destination)

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
