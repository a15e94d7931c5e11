"""What the service is set with: its folders, loops and receivers, as frozen values (shell).

Owns: :class:`ServiceSettings` and :class:`Destination` with their defaults, written once.
Each field's check is declared on it (``bridge.emit.setting_values``) and run by pydantic;
reading them from the configuration file, the environment and flags is ``bridge.config``'s job;
``bridge.config.Settings`` carries them as ``service``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import field
from pathlib import Path
from types import MappingProxyType
from typing import Annotated, Literal
from urllib.parse import urlsplit, urlunsplit

from pydantic import Field, ValidationInfo, field_validator
from pydantic.dataclasses import dataclass as settings_model

from bridge.emit import setting_values as kind
from bridge.emit.setting_values import check, choice, flag, loopback, number, optional_number, text, whole
from bridge.model import OUTPUT_KINDS, OutputKind
from bridge.science.units import DEFAULT_UNITS, UNIT_SYSTEMS, UnitSystem
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
LOG_FORMATS = ("text", "json")


@settings_model(frozen=True, slots=True, config=SETTINGS_MODEL)
class Destination:
    """One receiver: what it gets (payload, units) and how (transport)."""

    name: str
    payload: Annotated[OutputKind, check(choice, OUTPUT_KINDS)]
    transport: Annotated[TransportKind, check(choice, TRANSPORT_KINDS)]
    units: Annotated[UnitSystem, check(choice, UNIT_SYSTEMS)] = DEFAULT_UNITS
    folder: Path | None = None  # file
    host: Annotated[str, check(kind.host)] = "127.0.0.1"  # mllp
    port: Annotated[int, check(kind.port)] = Field(default=0, validate_default=True)  # mllp: 1-65535
    base_url: Annotated[str, check(text)] = ""  # fhir-rest
    token_env: Annotated[str, check(text)] = ""  # name of the environment variable holding the bearer token
    token: str | None = field(default=None, repr=False)  # read from token_env at load time
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    connect_timeout: Annotated[float, check(number, 0.01)] = CONNECT_TIMEOUT
    read_timeout: Annotated[float | None, check(optional_number, 0.01)] = None  # None: the transport's, READ_TIMEOUTS
    on_ae: Annotated[AnswerPolicy, check(choice, ANSWER_POLICIES)] = "dead-letter"  # mllp: an AE/CE answer
    on_ar: Annotated[AnswerPolicy, check(choice, ANSWER_POLICIES)] = "dead-letter"  # mllp: AR/CR (some: "busy")
    # fhir-rest: HTTP 429/503 (Retry-After honoured when retried)
    on_busy: Annotated[AnswerPolicy, check(choice, ANSWER_POLICIES)] = "retry"
    # fhir-rest, SMART Backend Services: OAuth 2.0 client credentials with a JWT
    client_id: Annotated[str, check(text)] = ""
    token_url: Annotated[str, check(text)] = ""
    private_key_file: Path | None = None  # PEM, RSA (RS384) or EC P-384 (ES384)
    scopes: Annotated[str, check(text)] = "system/*.write"
    # fhir-rest: searches reconcile runs at once against this server
    reconcile_in_flight: Annotated[int, check(whole, 1, 1_000)] = 4

    @field_validator("port")
    @classmethod
    def _mllp_port(cls, value: int, info: ValidationInfo) -> int:
        """An MLLP receiver listens on a port; 0 (none) is for the other transports."""
        return kind.port(value, info.data.get("transport") != "mllp")

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
    rescan_seconds: Annotated[float, check(number, 0.05)] = 5.0
    stable_seconds: Annotated[float, check(number, 0.0)] = 1.0
    retry_base_seconds: Annotated[float, check(number, 0.01)] = RETRY_BASE_SECONDS
    retry_cap_seconds: Annotated[float, check(number, 0.01)] = RETRY_CAP_SECONDS
    metrics_port: Annotated[int, check(kind.port)] = 0  # 0: no health/metrics endpoint
    metrics_host: Annotated[str, check(loopback)] = "127.0.0.1"
    log_format: Annotated[Literal["text", "json"], check(choice, LOG_FORMATS)] = "text"
    log_patient_data: Annotated[bool, check(flag)] = False
    # 0: keep delivered payloads; else prune them (and old rows) after so many days
    retention_days: Annotated[float, check(number, 0.0)] = 0.0
    # how long input hashes and control ids are kept to recognise a resend
    duplicate_memory_days: Annotated[float, check(number, 1.0)] = 3650.0

    @property
    def ledger_path(self) -> Path:
        return self.state / "ledger.sqlite3"
