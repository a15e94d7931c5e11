"""Service settings: one frozen :class:`Settings` from TOML, overridden by the environment (shell).

Owns: reading ``bridge.toml`` and ``DLCO_BRIDGE_*`` environment variables, checking every
value, and saying exactly which line or key is wrong (:class:`bridge.errors.ConfigError`).
It is the only module that reads the environment. Nothing here opens connections.

Environment overrides: a top-level key ``inbox`` is ``DLCO_BRIDGE_INBOX``; a key of a
section is ``DLCO_BRIDGE_<SECTION>_<KEY>`` (``DLCO_BRIDGE_EMIT_SENDING_FACILITY``); a key of a
destination is ``DLCO_BRIDGE_DESTINATION_<NAME>_<KEY>`` (``DLCO_BRIDGE_DESTINATION_RECORDS_PORT``).
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, Literal

from bridge.emit.observations import EmitContext, PatientReference
from bridge.emit.outputs import OUTPUT_KINDS, OutputKind
from bridge.errors import ConfigError
from bridge.pipeline import DEFAULT_MAX_INPUT_BYTES
from bridge.units import TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE, UnitSystem

ENV_PREFIX = "DLCO_BRIDGE_"
TransportKind = Literal["file", "mllp", "fhir-rest"]
TRANSPORT_KINDS: tuple[TransportKind, ...] = ("file", "mllp", "fhir-rest")


@dataclass(frozen=True, slots=True)
class Destination:
    """One receiver: what it gets (payload, units) and how (transport)."""

    name: str
    payload: OutputKind
    units: UnitSystem
    transport: TransportKind
    folder: Path | None = None  # file
    host: str = "127.0.0.1"  # mllp
    port: int = 0
    base_url: str = ""  # fhir-rest
    token_env: str = ""  # name of the environment variable holding the bearer token
    token: str | None = field(default=None, repr=False)  # read from token_env at load time
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    connect_timeout: float = 10.0
    read_timeout: float = 30.0


@dataclass(frozen=True, slots=True)
class EmitSettings:
    sending_application: str = "DLCO-BRIDGE"
    sending_facility: str = "PFT-LAB"
    receiving_application: str = "RECORDS"
    receiving_facility: str = "HOSPITAL"
    identifier_system: str = "urn:dlco-bridge:observation-id"
    local_code_system: str | None = None
    patient_reference: PatientReference = "identifier"
    processing_id: str = "P"

    def context(self, now: datetime, units: UnitSystem, correction: bool = False) -> EmitContext:
        """The emitters' context for one message: these settings plus the time the shell read."""
        return EmitContext(
            now=now.replace(microsecond=0),
            units=units,
            sending_application=self.sending_application,
            sending_facility=self.sending_facility,
            receiving_application=self.receiving_application,
            receiving_facility=self.receiving_facility,
            local_code_system=self.local_code_system,
            identifier_system=self.identifier_system,
            patient_reference=self.patient_reference,
            correction=correction,
            processing_id=self.processing_id,
        )


@dataclass(frozen=True, slots=True)
class Settings:
    """Everything the watch-folder service needs; built once, passed explicitly."""

    inbox: Path
    archive: Path
    quarantine: Path
    state: Path
    destinations: tuple[Destination, ...]
    emit: EmitSettings = EmitSettings()
    rescan_seconds: float = 5.0
    stable_seconds: float = 1.0
    max_input_bytes: int = DEFAULT_MAX_INPUT_BYTES
    traditional_per_si: float = TRADITIONAL_PER_SI
    blocking: tuple[str, ...] = ("UNIT_MISLABEL_PROBABLE",)
    retry_base_seconds: float = 1.0
    retry_cap_seconds: float = 300.0
    metrics_port: int = 0  # 0: no health/metrics endpoint
    metrics_host: str = "127.0.0.1"
    log_format: Literal["text", "json"] = "text"
    log_patient_data: bool = False

    @property
    def ledger_path(self) -> Path:
        return self.state / "ledger.sqlite3"


def load_settings(path: Path, environ: Mapping[str, str]) -> Settings:
    """Settings from a TOML file, with ``DLCO_BRIDGE_*`` environment variables on top."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError("(file)", f"a readable config file ({exc.strerror})", str(path)) from exc
    return parse_settings(text, environ, source=str(path), base=path.parent)


def parse_settings(text: str, environ: Mapping[str, str], source: str = "bridge.toml", base: Path = Path()) -> Settings:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError("(syntax)", f"valid TOML: {exc}", source) from exc
    reader = _Reader(_with_environment(data, environ), source, base, environ)
    return reader.settings()


def _with_environment(data: dict[str, Any], environ: Mapping[str, str]) -> dict[str, Any]:
    """Overlay ``DLCO_BRIDGE_*`` variables (values stay text; the reader converts them)."""
    merged: dict[str, Any] = {k: (dict(v) if isinstance(v, dict) else v) for k, v in data.items()}
    destinations = {k: dict(v) for k, v in data.get("destination", {}).items() if isinstance(v, dict)}
    for name, value in environ.items():
        if not name.startswith(ENV_PREFIX):
            continue
        key = name[len(ENV_PREFIX) :].lower()
        if key.startswith("destination_"):
            dest, _, dest_key = key[len("destination_") :].partition("_")
            match = next((d for d in destinations if d.lower() == dest), dest)
            destinations.setdefault(match, {})[dest_key] = value
        elif key.startswith("emit_"):
            merged.setdefault("emit", {})[key[len("emit_") :]] = value
        elif key in _TOP_LEVEL:
            merged[key] = value
    if destinations:
        merged["destination"] = destinations
    return merged


_TOP_LEVEL = {
    "inbox", "archive", "quarantine", "state", "rescan_seconds", "stable_seconds", "max_input_bytes",
    "traditional_per_si", "blocking", "retry_base_seconds", "retry_cap_seconds", "metrics_port",
    "metrics_host", "log_format", "log_patient_data",
}  # fmt: skip

_DESTINATION_KEYS = set(Destination.__dataclass_fields__) - {"name", "token"}


class _Reader:
    """Typed access to the merged settings tree, each error naming its key."""

    def __init__(self, data: dict[str, Any], source: str, base: Path, environ: Mapping[str, str]) -> None:
        self.data, self.source, self.base, self.environ = data, source, base, environ

    def fail(self, key: str, expected: str) -> ConfigError:
        return ConfigError(key, expected, self.source)

    def settings(self) -> Settings:
        d = self.data
        unknown = sorted(set(d) - _TOP_LEVEL - {"emit", "destination"})
        if unknown:
            raise self.fail(unknown[0], "a known setting (see samples/bridge.toml)")
        folders = {k: self.path(k, d.get(k)) for k in ("inbox", "archive", "quarantine", "state")}
        destinations = tuple(self.destination(n, v) for n, v in d.get("destination", {}).items())
        if not destinations:
            raise self.fail("destination", "at least one [destination.NAME] table")
        factor = self.number("traditional_per_si", d.get("traditional_per_si", TRADITIONAL_PER_SI))
        if factor not in (TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_ALTERNATIVE):
            raise self.fail("traditional_per_si", f"{TRADITIONAL_PER_SI} or {TRADITIONAL_PER_SI_ALTERNATIVE}")
        return Settings(
            inbox=folders["inbox"],
            archive=folders["archive"],
            quarantine=folders["quarantine"],
            state=folders["state"],
            destinations=destinations,
            emit=self.emit(d.get("emit", {})),
            rescan_seconds=self.number("rescan_seconds", d.get("rescan_seconds", 5.0), low=0.05),
            stable_seconds=self.number("stable_seconds", d.get("stable_seconds", 1.0), low=0.0),
            max_input_bytes=int(
                self.number("max_input_bytes", d.get("max_input_bytes", DEFAULT_MAX_INPUT_BYTES), low=1)
            ),
            traditional_per_si=factor,
            blocking=self.words("blocking", d.get("blocking", ["UNIT_MISLABEL_PROBABLE"])),
            retry_base_seconds=self.number("retry_base_seconds", d.get("retry_base_seconds", 1.0), low=0.01),
            retry_cap_seconds=self.number("retry_cap_seconds", d.get("retry_cap_seconds", 300.0), low=0.01),
            metrics_port=self.port("metrics_port", d.get("metrics_port", 0), allow_zero=True),
            metrics_host=self.loopback("metrics_host", d.get("metrics_host", "127.0.0.1")),
            log_format=self.choice("log_format", d.get("log_format", "text"), ("text", "json")),  # type: ignore[arg-type]
            log_patient_data=self.flag("log_patient_data", d.get("log_patient_data", False)),
        )

    def emit(self, e: dict[str, Any]) -> EmitSettings:
        defaults = EmitSettings()
        known = set(EmitSettings.__dataclass_fields__)
        unknown = sorted(set(e) - known)
        if unknown:
            raise self.fail(f"emit.{unknown[0]}", f"one of {sorted(known)}")
        values = {k: str(v) for k, v in e.items()}
        reference = values.get("patient_reference", defaults.patient_reference)
        if reference not in ("identifier", "conditional-create"):
            raise self.fail("emit.patient_reference", '"identifier" or "conditional-create"')
        return EmitSettings(**{**{k: getattr(defaults, k) for k in known}, **values})

    def destination(self, name: str, v: Any) -> Destination:
        where = f"destination.{name}"
        if not isinstance(v, dict):
            raise self.fail(where, "a table")
        unknown = sorted(set(v) - _DESTINATION_KEYS)
        if unknown:  # a misspelt key would otherwise be ignored and its default used
            raise self.fail(f"{where}.{unknown[0]}", f"one of {', '.join(sorted(_DESTINATION_KEYS))}")
        transport = self.choice(f"{where}.transport", v.get("transport"), TRANSPORT_KINDS)
        payload = self.choice(f"{where}.payload", v.get("payload"), OUTPUT_KINDS)
        units = self.choice(f"{where}.units", v.get("units", "traditional"), ("si", "traditional"))
        dest = Destination(
            name=name,
            payload=payload,  # type: ignore[arg-type]
            units=units,  # type: ignore[arg-type]
            transport=transport,  # type: ignore[arg-type]
            folder=self.path(f"{where}.folder", v["folder"]) if "folder" in v else None,
            host=str(v.get("host", "127.0.0.1")),
            port=self.port(f"{where}.port", v.get("port", 0), allow_zero=transport != "mllp"),
            base_url=str(v.get("base_url", "")),
            token_env=str(v.get("token_env", "")),
            token=self.environ.get(str(v["token_env"])) if v.get("token_env") else None,
            ca_file=self.path(f"{where}.ca_file", v["ca_file"]) if "ca_file" in v else None,
            cert_file=self.path(f"{where}.cert_file", v["cert_file"]) if "cert_file" in v else None,
            key_file=self.path(f"{where}.key_file", v["key_file"]) if "key_file" in v else None,
            connect_timeout=self.number(f"{where}.connect_timeout", v.get("connect_timeout", 10.0), low=0.01),
            read_timeout=self.number(f"{where}.read_timeout", v.get("read_timeout", 30.0), low=0.01),
        )
        if transport == "file" and dest.folder is None:
            raise self.fail(f"{where}.folder", "a folder for the file transport")
        if transport == "fhir-rest" and not dest.base_url.startswith(("http://", "https://")):
            raise self.fail(f"{where}.base_url", "an http:// or https:// URL")
        if transport == "fhir-rest" and payload != "fhir":
            raise self.fail(f"{where}.payload", '"fhir" for the fhir-rest transport')
        if dest.token_env and dest.token is None:
            raise self.fail(f"{where}.token_env", f"the environment variable {dest.token_env} to be set")
        return dest

    def path(self, key: str, value: Any) -> Path:
        if not isinstance(value, str) or not value:
            raise self.fail(key, "a folder path")
        path = Path(value).expanduser()
        return path if path.is_absolute() else self.base / path

    def number(self, key: str, value: Any, low: float | None = None) -> float:
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise self.fail(key, f"a number, got {value!r}") from None
        if low is not None and number < low:
            raise self.fail(key, f"a number >= {low:g}, got {number:g}")
        return number

    def port(self, key: str, value: Any, allow_zero: bool) -> int:
        number = self.number(key, value)
        if number != int(number) or not (0 if allow_zero else 1) <= number <= 65535:
            raise self.fail(key, f"a port number 1-65535, got {value!r}")
        return int(number)

    def loopback(self, key: str, value: Any) -> str:
        # Health and metrics carry operational data only; they stay on this machine.
        if value not in ("127.0.0.1", "localhost", "::1"):
            raise self.fail(key, f"a loopback address (127.0.0.1, localhost or ::1), got {value!r}")
        return str(value)

    def choice(self, key: str, value: Any, options: tuple[str, ...]) -> str:
        if value not in options:
            raise self.fail(key, f"one of {', '.join(options)}, got {value!r}")
        return str(value)

    def flag(self, key: str, value: Any) -> bool:
        if isinstance(value, bool):
            return value
        if isinstance(value, str) and value.lower() in ("true", "false", "1", "0", "yes", "no"):
            return value.lower() in ("true", "1", "yes")
        raise self.fail(key, f"true or false, got {value!r}")

    def words(self, key: str, value: Any) -> tuple[str, ...]:
        if isinstance(value, str):
            return tuple(w.strip() for w in value.split(",") if w.strip())
        if isinstance(value, list) and all(isinstance(w, str) for w in value):
            return tuple(value)
        raise self.fail(key, "a list of finding codes")
