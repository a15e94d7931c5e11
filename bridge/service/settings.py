"""What the service is set with: its folders, loops and receivers, as frozen values (shell).

Owns: :class:`ServiceSettings` and :class:`Destination` with their defaults, written once.
Reading them from the configuration file, the environment and flags, and checking each value,
is ``bridge.config``'s job; ``bridge.config.Settings`` carries them as ``service``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import field
from pathlib import Path
from types import MappingProxyType
from typing import Literal
from urllib.parse import urlsplit, urlunsplit

from pydantic.dataclasses import dataclass as settings_model

from bridge.model import OutputKind
from bridge.science.units import DEFAULT_UNITS, UnitSystem
from bridge.values import SETTINGS_MODEL

TransportKind = Literal["file", "mllp", "fhir-rest"]
AnswerPolicy = Literal["dead-letter", "retry"]
ANSWER_POLICIES: tuple[AnswerPolicy, ...] = ("dead-letter", "retry")
TRANSPORT_KINDS: tuple[TransportKind, ...] = ("file", "mllp", "fhir-rest")
CONNECT_TIMEOUT = 10.0  # seconds to connect, MLLP and FHIR alike
# Seconds for the answer, by transport: a FHIR server processes a whole transaction Bundle before it
# answers, an MLLP receiver only acknowledges (the file transport waits on nothing).
READ_TIMEOUTS: Mapping[TransportKind, float] = MappingProxyType({"mllp": 30.0, "fhir-rest": 60.0, "file": 0.0})
RETRY_BASE_SECONDS = 1.0  # the outbox's back-off: the first retry's largest delay, doubling from there
RETRY_CAP_SECONDS = 300.0  # ... up to this


@settings_model(frozen=True, slots=True, config=SETTINGS_MODEL)
class Destination:
    """One receiver: what it gets (payload, units) and how (transport)."""

    name: str
    payload: OutputKind
    transport: TransportKind
    units: UnitSystem = DEFAULT_UNITS
    folder: Path | None = None  # file
    host: str = "127.0.0.1"  # mllp
    port: int = 0
    base_url: str = ""  # fhir-rest
    token_env: str = ""  # name of the environment variable holding the bearer token
    token: str | None = field(default=None, repr=False)  # read from token_env at load time
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    connect_timeout: float = CONNECT_TIMEOUT
    read_timeout: float | None = None  # None: the transport's own, READ_TIMEOUTS
    on_ae: AnswerPolicy = "dead-letter"  # mllp: what an AE/CE answer means
    on_ar: AnswerPolicy = "dead-letter"  # mllp: what an AR/CR answer means (some receivers: "busy")
    on_busy: AnswerPolicy = "retry"  # fhir-rest: HTTP 429/503 (Retry-After honoured when retried)
    client_id: str = ""  # fhir-rest, SMART Backend Services: OAuth 2.0 client credentials with a JWT
    token_url: str = ""
    private_key_file: Path | None = None  # PEM, RSA (RS384) or EC P-384 (ES384)
    scopes: str = "system/*.write"
    reconcile_in_flight: int = 4  # fhir-rest: searches reconcile runs at once against this server

    @property
    def answer_timeout(self) -> float:
        """Seconds the transport waits for an answer: ``read_timeout`` if set, else the transport's default."""
        return READ_TIMEOUTS[self.transport] if self.read_timeout is None else self.read_timeout

    @property
    def address(self) -> str:
        """Where it delivers, for logs: host:port, the URL (without credentials) or the folder."""
        if self.transport == "mllp":
            return f"{self.host}:{self.port}"
        if self.transport == "fhir-rest":
            parts = urlsplit(self.base_url)
            host = parts.hostname or ""
            return urlunsplit(parts._replace(netloc=f"{host}:{parts.port}" if parts.port else host))
        return str(self.folder)


@settings_model(frozen=True, slots=True, config=SETTINGS_MODEL)
class ServiceSettings:
    """What only ``watch``, ``status`` and ``resend`` need: folders, ledger, receivers, loops."""

    inbox: Path
    archive: Path
    quarantine: Path
    state: Path
    destinations: tuple[Destination, ...]
    rescan_seconds: float = 5.0
    stable_seconds: float = 1.0
    retry_base_seconds: float = RETRY_BASE_SECONDS
    retry_cap_seconds: float = RETRY_CAP_SECONDS
    metrics_port: int = 0  # 0: no health/metrics endpoint
    metrics_host: str = "127.0.0.1"
    log_format: Literal["text", "json"] = "text"
    log_patient_data: bool = False
    retention_days: float = 0.0  # 0: keep delivered payloads; else prune them (and old rows) after so many days
    duplicate_memory_days: float = 3650.0  # how long input hashes and control ids are kept to recognise a resend

    @property
    def ledger_path(self) -> Path:
        return self.state / "ledger.sqlite3"
