"""SMART Backend Services: OAuth 2.0 client credentials with a signed JWT assertion (shell).

Owns asking the token endpoint for an access token, caching it until shortly before it
expires, and forgetting it when the FHIR server answers 401. The assertion is signed with the
client's private key (PEM; RSA signs RS384, EC P-384 signs ES384), carries ``iss`` = ``sub`` =
the client id, ``aud`` = the token URL, a fresh ``jti`` and a 5-minute ``exp``.
source: HL7 SMART App Launch 2.x, "SMART Backend Services" (client_credentials grant,
client_assertion_type urn:ietf:params:oauth:client-assertion-type:jwt-bearer, exp at most
five minutes ahead); RFC 7523 section 2.2.

It never writes the key, the assertion or the token into an exception, a repr or a log. A key
that cannot be read or is of the wrong kind is a ``ConfigError`` when the transport is built,
so the service refuses to start rather than dead-lettering every message.
"""

from __future__ import annotations

import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import jwt
from cryptography.hazmat.primitives.asymmetric import ec, rsa
from cryptography.hazmat.primitives.serialization import load_pem_private_key

from bridge.errors import ConfigError, DeliveryError

ASSERTION_TYPE = "urn:ietf:params:oauth:client-assertion-type:jwt-bearer"  # source: RFC 7523 section 2.2
ASSERTION_LIFETIME = 300.0  # seconds; source: SMART Backend Services, "no more than five minutes in the future"
REFRESH_MARGIN = 60.0  # a token is renewed this long before it expires, so no request carries a stale one
DEFAULT_TOKEN_LIFETIME = 300.0  # when the answer has no expires_in (it is only RECOMMENDED, RFC 6749 5.1)


@dataclass(frozen=True, slots=True)
class SmartClient:
    """What identifies this client to the authorisation server."""

    client_id: str
    token_url: str
    private_key_file: Path
    scopes: str


def load_signing_key(path: Path, key: str = "private_key_file") -> tuple[Any, str]:
    """The private key at ``path`` and its algorithm (RS384 or ES384); anything else is a ConfigError."""
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ConfigError(key, f"a readable PEM private key ({exc.strerror})", str(path)) from None
    try:
        private = load_pem_private_key(data, password=None)
    except (ValueError, TypeError):
        # The library's message can quote the file; say only what was expected.
        raise ConfigError(key, "an unencrypted PEM private key (RSA or EC P-384)", str(path)) from None
    if isinstance(private, rsa.RSAPrivateKey):
        if private.key_size < 2048:
            raise ConfigError(key, f"an RSA key of at least 2048 bits, got {private.key_size}", str(path))
        return private, "RS384"
    if isinstance(private, ec.EllipticCurvePrivateKey) and isinstance(private.curve, ec.SECP384R1):
        return private, "ES384"
    raise ConfigError(key, "an RSA key (RS384) or an EC P-384 key (ES384)", str(path))


class SmartTokens:
    """Access tokens for one client, cached; thread-safe."""

    def __init__(
        self,
        client: SmartClient,
        http: httpx.Client,
        clock: Callable[[], float] = time.time,
        new_id: Callable[[], str] = lambda: str(uuid.uuid4()),
    ) -> None:
        self.client = client
        self._key, self.algorithm = load_signing_key(client.private_key_file)
        self._http = http
        self._clock = clock
        self._new_id = new_id
        self._lock = threading.Lock()
        self._token: str | None = None
        self._expires_at = 0.0
        self.issued = 0  # how many tokens were fetched (for tests and metrics)

    def __repr__(self) -> str:
        return f"SmartTokens(client_id={self.client.client_id!r}, token_url={self.client.token_url!r})"

    def assertion(self) -> str:
        """A fresh signed client assertion."""
        now = self._clock()
        claims = {
            "iss": self.client.client_id,
            "sub": self.client.client_id,
            "aud": self.client.token_url,
            "jti": self._new_id(),
            "iat": int(now),
            "exp": int(now + ASSERTION_LIFETIME),
        }
        return jwt.encode(claims, self._key, algorithm=self.algorithm, headers={"typ": "JWT"})

    def token(self, destination: str) -> str:
        """A valid access token: the cached one, or a new one when it is near its expiry."""
        with self._lock:
            if self._token is None or self._clock() >= self._expires_at - REFRESH_MARGIN:
                self._token, self._expires_at = self._fetch(destination)
            return self._token

    def forget(self) -> None:
        """Drop the cached token (the server answered 401): the next request fetches a new one."""
        with self._lock:
            self._token = None

    def _fetch(self, destination: str) -> tuple[str, float]:
        form = {
            "grant_type": "client_credentials",
            "scope": self.client.scopes,
            "client_assertion_type": ASSERTION_TYPE,
            "client_assertion": self.assertion(),
        }
        asked_at = self._clock()
        try:
            response = self._http.post(self.client.token_url, data=form, headers={"Accept": "application/json"})
        except httpx.HTTPError as exc:
            raise DeliveryError(destination, f"token endpoint {self.client.token_url}: {type(exc).__name__}") from None
        if response.status_code != 200:
            # The error code (RFC 6749 5.2) says what is wrong; the body never carries our secret.
            code = _json(response).get("error", "")
            raise DeliveryError(destination, f"token endpoint answered HTTP {response.status_code} {code}".strip())
        body = _json(response)
        token = body.get("access_token")
        if not isinstance(token, str) or not token:
            raise DeliveryError(destination, "token endpoint answered without an access_token")
        lifetime = body.get("expires_in", DEFAULT_TOKEN_LIFETIME)
        if not isinstance(lifetime, int | float) or lifetime <= 0:
            lifetime = DEFAULT_TOKEN_LIFETIME
        self.issued += 1
        return token, asked_at + float(lifetime)


def _json(response: httpx.Response) -> dict[str, Any]:
    try:
        document = response.json()
    except ValueError:
        return {}
    return document if isinstance(document, dict) else {}
