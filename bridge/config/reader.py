"""The merged settings tree -> one frozen :class:`Settings` (shell).

Owns: :class:`Settings`, the keys each part of it accepts, and turning the tree that
``bridge.config`` merged from TOML, environment and flags into typed settings objects (the
pipeline's, the emitters', the service's and each destination's), every value checked by
``bridge.config.values`` as it is read. Defaults live with the value objects they belong to
(:class:`bridge.pipeline.PipelineSettings`, :class:`bridge.emit.settings.EmitSettings`,
:class:`Settings` below), written once.
"""

from __future__ import annotations

import importlib.util
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from bridge.config.values import ValueChecker
from bridge.emit.settings import CHARTED_PREDICTED, HEMOGLOBIN_UNITS, PATIENT_REFERENCES, EmitSettings
from bridge.errors import ConfigError
from bridge.model import OUTPUT_KINDS, OutputKind, Severity
from bridge.pipeline import PipelineSettings
from bridge.science.compared import REFERENCE_BASES
from bridge.science.equation_sets import SPIROMETRY_SETS
from bridge.science.units import DEFAULT_UNITS, TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_CHOICES, UNIT_SYSTEMS, UnitSystem
from bridge.service.settings import (
    ANSWER_POLICIES,
    TRANSPORT_KINDS,
    Destination,
    ServiceSettings,
)
from bridge.tables.files import finding_codes, load_hl7_tables, repeatability_criteria
from bridge.tables.finding_codes import FindingCodes

SAMPLE_CONFIG = "samples/service/bridge.toml"  # the documented example of every key
PROCESSING_IDS = load_hl7_tables().processing_ids  # source: HL7 v2.5.1 table 0103 (mappings/hl7_tables.toml)


@dataclass(frozen=True, slots=True)
class Settings:
    """Every setting of every command; built once by :func:`load_settings`, passed explicitly."""

    pipeline: PipelineSettings = field(default_factory=PipelineSettings)
    units: UnitSystem = DEFAULT_UNITS  # what check shows and convert writes
    traditional_per_si: float = TRADITIONAL_PER_SI
    to: tuple[OutputKind, ...] = OUTPUT_KINDS  # what convert writes
    service: ServiceSettings | None = None
    source: str = "(defaults)"  # the configuration file read, if any
    field_map: Path | None = None  # key map: read every input through this field map (CSV, legacy HL7)
    maps: tuple[tuple[str, Path], ...] = ()  # [maps]: file-name pattern -> field map, first match wins

    def require_service(self) -> ServiceSettings:
        """The service settings; a configuration without them cannot run the service."""
        if self.service is None:
            raise ConfigError("inbox", "the service settings (inbox, archive, quarantine, state, a destination)",
                              self.source)  # fmt: skip
        return self.service


def _default(cls: type, name: str) -> Any:
    """The default of one field of a settings dataclass (the one place it is written)."""
    return next(f.default for f in fields(cls) if f.name == name)


# The keys of the configuration, read from the settings classes' fields (a new field is a new key).
# A key's name is its field's, but for these: the field is filled from another key, or not from one.
_KEY_OF_FIELD = {"validate_outputs": "validate", "field_map": "map"}
_NOT_KEYS = {"emit", "pipeline", "service", "source", "maps", "destinations"}  # sections, or filled by the reader


def _keys(*classes: type) -> frozenset[str]:
    return frozenset(_KEY_OF_FIELD.get(f.name, f.name) for cls in classes for f in fields(cls)) - _NOT_KEYS


_SERVICE_KEYS = _keys(ServiceSettings)
TOP_LEVEL_KEYS = _keys(ServiceSettings, PipelineSettings, Settings)
_EMIT_KEYS = _keys(EmitSettings)
_DESTINATION_KEYS = {f.name for f in fields(Destination)} - {"name", "token"}
# Every key a flag may set (``emit.x`` for a key of [emit]): the CLI passes the flags it has of these.
SETTING_KEYS = TOP_LEVEL_KEYS | {f"emit.{key}" for key in _EMIT_KEYS}


# The most max_input_bytes may be: every input is read whole into memory (a DLCO export is a few kB).
MAX_INPUT_BYTES_LIMIT = 1024**3
VALIDATE_MODULE = "fhir.resources"  # the [validate] extra: what --validate needs


def _installed(module: str) -> bool:
    """Whether ``module`` can be imported (a missing parent package is "no", not an exception)."""
    try:
        return importlib.util.find_spec(module) is not None
    except (ImportError, ValueError):  # ModuleNotFoundError for the parent; ValueError: a module without spec
        return False


def _name(value: Any) -> Any:
    """A criterion name written as a number in TOML (``repeatability = 2005``) is the same name."""
    return str(value) if isinstance(value, int) and not isinstance(value, bool) else value


class SettingsReader(ValueChecker):
    """Typed access to the merged settings tree, each error naming its key."""

    def __init__(
        self,
        data: dict[str, Any],
        source: str,
        base: Path,
        environ: Mapping[str, str],
        origins: Mapping[str, str] | None = None,
    ) -> None:
        super().__init__(source, base, origins)
        self.data, self.environ = data, environ

    def settings(self) -> Settings:
        d = self.data
        unknown = sorted(set(d) - TOP_LEVEL_KEYS - {"emit", "destination", "maps"})
        if unknown:
            raise self.fail(unknown[0], f"a known setting (every key is shown in {SAMPLE_CONFIG})")
        factor = self.number(
            "traditional_per_si", d.get("traditional_per_si", _default(Settings, "traditional_per_si"))
        )
        if factor not in TRADITIONAL_PER_SI_CHOICES:
            raise self.fail("traditional_per_si", " or ".join(map(str, TRADITIONAL_PER_SI_CHOICES)))
        return Settings(
            pipeline=self.pipeline(),
            units=self.choice("units", d.get("units", _default(Settings, "units")), UNIT_SYSTEMS),  # type: ignore[arg-type]
            traditional_per_si=factor,
            to=self.kinds("to", d.get("to", _default(Settings, "to"))),
            service=self.service() if self.wants_service() else None,
            source=self.source,
            field_map=self.map_file("map", d["map"]) if d.get("map") else None,
            maps=self.maps(d.get("maps", {})),
        )

    def maps(self, table: Any) -> tuple[tuple[str, Path], ...]:
        """``[maps]``: ``"*.csv" = "mappings/maps/x.toml"``, in the file's order (first match wins)."""
        if not isinstance(table, dict):
            raise self.fail("maps", 'a table of file-name pattern = field map file ("*.csv" = "maps/x.toml")')
        return tuple((str(pattern), self.map_file(f'maps."{pattern}"', path)) for pattern, path in table.items())

    def map_file(self, key: str, value: Any) -> Path:
        path = self.path(key, value)
        if not path.is_file():
            raise self.fail(key, f"a field map file (mappings/maps/*.toml), got {str(value)!r}")
        return path

    def pipeline(self) -> PipelineSettings:
        d, defaults = self.data, PipelineSettings()
        validate = self.flag("validate", d.get("validate", defaults.validate_outputs))
        if validate and not _installed(VALIDATE_MODULE):
            raise self.fail("validate", "the optional extra installed first: pip install 'dlco-bridge[validate]'")
        known = finding_codes()
        blocking = self.codes("blocking", d.get("blocking", sorted(defaults.blocking)), known)
        allow = self.codes("allow", d.get("allow", sorted(defaults.allow)), known)
        for code in sorted(allow):
            if known.severities[code] is not Severity.ERROR:
                raise self.fail(
                    "allow",
                    f"error finding codes, got {code}, a {known.severities[code].value} (it never stops a record)",
                )
        both = sorted(blocking & allow)
        if both:
            raise self.fail("allow", f"codes that are not also blocking, got {both[0]} in both")
        return PipelineSettings(
            max_input_bytes=self.whole(
                "max_input_bytes", d.get("max_input_bytes", defaults.max_input_bytes), 1, MAX_INPUT_BYTES_LIMIT
            ),
            blocking=blocking,
            allow=allow,
            validate_outputs=validate,
            emit=self.emit(d.get("emit", {})),
            repeatability=self.choice(
                "repeatability", _name(d.get("repeatability", defaults.repeatability)), repeatability_criteria()
            ),
            reference_basis=self.choice(  # type: ignore[arg-type]
                "reference_basis", d.get("reference_basis", defaults.reference_basis), REFERENCE_BASES
            ),
            spirometry_reference=self.choice(  # type: ignore[arg-type]
                "spirometry_reference", d.get("spirometry_reference", defaults.spirometry_reference), SPIROMETRY_SETS
            ),
        )

    def codes(self, key: str, value: Any, known: FindingCodes) -> frozenset[str]:
        """Finding codes (a list, or text separated by commas); each must be one the bridge can report."""
        words = self.words(key, value)
        for word in words:
            if word not in known.severities:
                near = known.closest(word)
                hint = f" (closest known: {near})" if near else ""
                raise self.fail(key, f"finding codes listed in docs/findings.md, got {word!r}{hint}")
        return frozenset(words)

    def emit(self, e: Any) -> EmitSettings:
        if not isinstance(e, dict):
            raise self.fail("emit", "a table")
        unknown = sorted(set(e) - _EMIT_KEYS)
        if unknown:
            raise self.fail(f"emit.{unknown[0]}", f"one of {', '.join(sorted(_EMIT_KEYS))}")
        defaults = EmitSettings()
        facilities = self.facilities("emit.lab_facilities", e.get("lab_facilities", {}))
        values = {k: str(v) for k, v in e.items() if k != "lab_facilities"}
        for key in (
            "sending_application",
            "sending_facility",
            "receiving_application",
            "receiving_facility",
            "patient_identifier_type",
        ):
            self.hl7_namespace(f"emit.{key}", values.get(key, getattr(defaults, key)))
        self.choice("emit.processing_id", values.get("processing_id", defaults.processing_id), PROCESSING_IDS)
        self.choice(
            "emit.patient_reference",
            values.get("patient_reference", defaults.patient_reference),
            PATIENT_REFERENCES,
        )
        self.system_base("emit.system_base", values.get("system_base", defaults.system_base))
        for key in ("identifier_system", "local_code_system"):
            if key in values:
                self.uri(f"emit.{key}", values[key])
        if "hemoglobin_unit" in values:
            self.choice("emit.hemoglobin_unit", values["hemoglobin_unit"], HEMOGLOBIN_UNITS)
        self.choice(
            "emit.charted_predicted", values.get("charted_predicted", defaults.charted_predicted), CHARTED_PREDICTED
        )
        return EmitSettings(**values, lab_facilities=facilities)  # type: ignore[arg-type]

    def facilities(self, key: str, value: Any) -> tuple[tuple[str, str], ...]:
        """``{"lab name" = "FACILITY-ID"}`` in TOML, ``lab name=FACILITY-ID;...`` in the environment."""
        if isinstance(value, str):
            pairs = [part.partition("=") for part in value.split(";") if part.strip()]
            if any(not sep for _, sep, _ in pairs):
                raise self.fail(key, f"lab name=FACILITY-ID pairs separated by ;, got {value!r}")
            value = {name.strip(): facility.strip() for name, _, facility in pairs}
        if not isinstance(value, dict) or not all(isinstance(v, str) and k for k, v in value.items()):
            raise self.fail(key, 'a table of lab name = "HL7 facility id"')
        for name, facility in value.items():
            self.hl7_namespace(f"{key}.{name}", facility)
        return tuple(sorted(value.items()))

    def wants_service(self) -> bool:
        return bool(set(self.data) & _SERVICE_KEYS) or "destination" in self.data

    def service(self) -> ServiceSettings:
        d = self.data

        def defaults(name: str) -> Any:
            return _default(ServiceSettings, name)

        folders = {k: self.path(k, d.get(k)) for k in ("inbox", "archive", "quarantine", "state")}
        destinations = tuple(self.destination(n, v) for n, v in d.get("destination", {}).items())
        if not destinations:
            raise self.fail("destination", "at least one [destination.NAME] table")
        return ServiceSettings(
            inbox=folders["inbox"],
            archive=folders["archive"],
            quarantine=folders["quarantine"],
            state=folders["state"],
            destinations=destinations,
            rescan_seconds=self.number("rescan_seconds", d.get("rescan_seconds", defaults("rescan_seconds")), 0.05),
            stable_seconds=self.number("stable_seconds", d.get("stable_seconds", defaults("stable_seconds")), 0.0),
            retry_base_seconds=self.number(
                "retry_base_seconds", d.get("retry_base_seconds", defaults("retry_base_seconds")), 0.01
            ),
            retry_cap_seconds=self.number(
                "retry_cap_seconds", d.get("retry_cap_seconds", defaults("retry_cap_seconds")), 0.01
            ),
            metrics_port=self.port("metrics_port", d.get("metrics_port", defaults("metrics_port")), allow_zero=True),
            metrics_host=self.loopback("metrics_host", d.get("metrics_host", defaults("metrics_host"))),
            log_format=self.choice("log_format", d.get("log_format", defaults("log_format")), ("text", "json")),  # type: ignore[arg-type]
            log_patient_data=self.flag("log_patient_data", d.get("log_patient_data", defaults("log_patient_data"))),
            retention_days=self.number("retention_days", d.get("retention_days", defaults("retention_days")), 0.0),
            duplicate_memory_days=self.number(
                "duplicate_memory_days", d.get("duplicate_memory_days", defaults("duplicate_memory_days")), 1.0
            ),
        )

    def destination(self, name: str, v: Any) -> Destination:
        where = f"destination.{name}"
        if not isinstance(v, dict):
            raise self.fail(where, "a table")
        unknown = sorted(set(v) - _DESTINATION_KEYS)
        if unknown:  # a misspelt key would otherwise be ignored and its default used
            raise self.fail(f"{where}.{unknown[0]}", f"one of {', '.join(sorted(_DESTINATION_KEYS))}")
        transport = self.choice(f"{where}.transport", v.get("transport"), TRANSPORT_KINDS)
        payload = self.choice(f"{where}.payload", v.get("payload"), OUTPUT_KINDS)
        units = self.choice(f"{where}.units", v.get("units", _default(Destination, "units")), UNIT_SYSTEMS)
        host = str(v.get("host", _default(Destination, "host")))
        if not host or any(c.isspace() for c in host):
            raise self.fail(f"{where}.host", f"a host name or address, got {host!r}")
        dest = Destination(
            name=name,
            payload=payload,  # type: ignore[arg-type]
            units=units,  # type: ignore[arg-type]
            transport=transport,  # type: ignore[arg-type]
            folder=self.path(f"{where}.folder", v["folder"]) if "folder" in v else None,
            host=host,
            port=self.port(f"{where}.port", v.get("port", 0), allow_zero=transport != "mllp"),
            base_url=str(v.get("base_url", "")),
            token_env=str(v.get("token_env", "")),
            token=self.environ.get(str(v["token_env"])) if v.get("token_env") else None,
            ca_file=self.path(f"{where}.ca_file", v["ca_file"]) if "ca_file" in v else None,
            cert_file=self.path(f"{where}.cert_file", v["cert_file"]) if "cert_file" in v else None,
            key_file=self.path(f"{where}.key_file", v["key_file"]) if "key_file" in v else None,
            connect_timeout=self.number(
                f"{where}.connect_timeout", v.get("connect_timeout", _default(Destination, "connect_timeout")), 0.01
            ),
            read_timeout=self.number(f"{where}.read_timeout", v["read_timeout"], 0.01) if "read_timeout" in v else None,
            reconcile_in_flight=self.count(
                f"{where}.reconcile_in_flight",
                v.get("reconcile_in_flight", _default(Destination, "reconcile_in_flight")),
            ),
            **self.answers(where, v),
            **self.smart(where, v),
        )
        if transport == "file" and dest.folder is None:
            raise self.fail(f"{where}.folder", "a folder for the file transport")
        if transport == "fhir-rest":
            self.url(f"{where}.base_url", dest.base_url)
            if payload != "fhir":
                raise self.fail(f"{where}.payload", '"fhir" for the fhir-rest transport')
        if dest.token_env and dest.token is None:
            raise self.fail(f"{where}.token_env", f"the environment variable {dest.token_env} to be set")
        return dest

    def answers(self, where: str, v: dict[str, Any]) -> dict[str, Any]:
        """The response policy of one destination (``on_ae``, ``on_ar``, ``on_busy``)."""
        return {
            key: self.choice(f"{where}.{key}", v.get(key, _default(Destination, key)), ANSWER_POLICIES)
            for key in ("on_ae", "on_ar", "on_busy")
        }

    def smart(self, where: str, v: dict[str, Any]) -> dict[str, Any]:
        """SMART Backend Services keys: all of client_id, token_url, private_key_file, or none."""
        keys = ("client_id", "token_url", "private_key_file")
        given = [k for k in keys if v.get(k)]
        if not given:
            return {}
        missing = [k for k in keys if k not in given]
        if missing:
            raise self.fail(f"{where}.{missing[0]}", f"set with {', '.join(given)} (SMART Backend Services)")
        if v.get("token_env"):
            raise self.fail(f"{where}.token_env", "unset when client_id is set (one way to authenticate)")
        self.url(f"{where}.token_url", str(v["token_url"]))
        scopes = str(v.get("scopes", _default(Destination, "scopes")))
        if not scopes.strip() or any(c in scopes for c in '"\\\r\n'):
            raise self.fail(f"{where}.scopes", f"space-separated scopes, got {scopes!r}")
        return {
            "client_id": str(v["client_id"]),
            "token_url": str(v["token_url"]),
            "private_key_file": self.path(f"{where}.private_key_file", v["private_key_file"]),
            "scopes": scopes,
        }
