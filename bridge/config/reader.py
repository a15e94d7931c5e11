"""The merged settings tree -> one frozen :class:`Settings`, validated by pydantic (shell).

Owns: :class:`Settings`, the keys each part of it accepts, and turning the tree that
``bridge.config`` merged from TOML, environment and flags into the settings models (the
pipeline's, the emitters', the service's and each destination's). pydantic checks every field
with the checks declared on it (``bridge.emit.setting_values``); a refused value becomes one
:class:`bridge.errors.ConfigError` naming the file and key, the variable or the flag. What needs
the files (paths beside the configuration, field maps, the finding codes, the HL7 tables, the
repeatability criteria, tokens from the environment) and what spans keys is checked here, with
``bridge.config.values``. Defaults live in the models' fields (:class:`bridge.pipeline.PipelineSettings`,
:class:`bridge.emit.settings.EmitSettings`, ``bridge.service.settings``, :class:`Settings` below),
written once.
"""

from __future__ import annotations

import importlib.util
from collections.abc import Mapping
from dataclasses import field, fields
from pathlib import Path
from typing import Annotated, Any

from pydantic import ValidationError
from pydantic.dataclasses import dataclass as settings_model

from bridge.config.values import ValueChecker
from bridge.emit.setting_values import check, choice, kinds, number
from bridge.emit.settings import HL7_NAMES, EmitSettings
from bridge.errors import ConfigError
from bridge.model import OUTPUT_KINDS, OutputKind, Severity
from bridge.pipeline import MAX_INPUT_BYTES_LIMIT, PipelineSettings
from bridge.science.units import DEFAULT_UNITS, TRADITIONAL_PER_SI, TRADITIONAL_PER_SI_CHOICES, UNIT_SYSTEMS, UnitSystem
from bridge.service.settings import Destination, ServiceSettings
from bridge.tables.files import finding_codes, load_hl7_tables, repeatability_criteria
from bridge.tables.finding_codes import FindingCodes
from bridge.values import SETTINGS_MODEL

__all__ = ["MAX_INPUT_BYTES_LIMIT", "SETTING_KEYS", "TOP_LEVEL_KEYS", "Settings", "SettingsReader"]

SAMPLE_CONFIG = "samples/service/bridge.toml"  # the documented example of every key
PROCESSING_IDS = load_hl7_tables().processing_ids  # source: HL7 v2.5.1 table 0103 (mappings/hl7_tables.toml)


def _factor(value: Any) -> float:
    found = number(value)
    if found not in TRADITIONAL_PER_SI_CHOICES:
        raise ValueError(" or ".join(map(str, TRADITIONAL_PER_SI_CHOICES)))
    return found


@settings_model(frozen=True, slots=True, config=SETTINGS_MODEL)
class Settings:
    """Every setting of every command; built once by :func:`load_settings`, passed explicitly."""

    pipeline: PipelineSettings = field(default_factory=PipelineSettings)
    units: Annotated[UnitSystem, check(choice, UNIT_SYSTEMS)] = DEFAULT_UNITS  # what check shows, convert writes
    traditional_per_si: Annotated[float, check(_factor)] = TRADITIONAL_PER_SI
    to: Annotated[tuple[OutputKind, ...], check(kinds)] = OUTPUT_KINDS  # what convert writes
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


# The keys of the configuration, read from the settings models' fields (a new field is a new key).
# A key's name is its field's, but for these: the field is filled from another key, or not from one.
_KEY_OF_FIELD = {"validate_outputs": "validate", "field_map": "map"}
_FIELD_OF_KEY = {key: name for name, key in _KEY_OF_FIELD.items()}
_NOT_KEYS = {"emit", "pipeline", "service", "source", "maps", "destinations"}  # sections, or filled by the reader


def _keys(*classes: type) -> frozenset[str]:
    return frozenset(_KEY_OF_FIELD.get(f.name, f.name) for cls in classes for f in fields(cls)) - _NOT_KEYS


_SERVICE_KEYS = _keys(ServiceSettings)
_PIPELINE_KEYS = _keys(PipelineSettings) - {"map"}  # its field map is chosen per file, from [maps] or map
TOP_LEVEL_KEYS = _keys(ServiceSettings, PipelineSettings, Settings)
_EMIT_KEYS = _keys(EmitSettings)
_DESTINATION_KEYS = {f.name for f in fields(Destination)} - {"name", "token"}
_FOLDERS = ("inbox", "archive", "quarantine", "state")
_DESTINATION_FILES = ("folder", "ca_file", "cert_file", "key_file", "private_key_file")
# Every key a flag may set (``emit.x`` for a key of [emit]): the CLI passes the flags it has of these.
SETTING_KEYS = TOP_LEVEL_KEYS | {f"emit.{key}" for key in _EMIT_KEYS}

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
    """The merged settings tree -> :class:`Settings`: regrouped by model, validated by pydantic, errors named."""

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
        tree: dict[str, Any] = {k: d[k] for k in ("units", "traditional_per_si", "to") if k in d}
        tree["pipeline"] = self.pipeline_tree()
        if self.wants_service():
            tree["service"] = self.service_tree()
        if d.get("map"):
            tree["field_map"] = self.map_file("map", d["map"])
        tree["maps"] = self.maps(d.get("maps", {}))
        try:
            settings = Settings(source=self.source, **tree)
        except ValidationError as exc:
            raise self.refused(exc, tree) from None
        self.check_pipeline(settings.pipeline)
        for destination in settings.service.destinations if settings.service else ():
            self.check_destination(destination, d["destination"][destination.name])
        return settings

    def refused(self, exc: ValidationError, tree: Mapping[str, Any]) -> ConfigError:
        """pydantic's first refusal as our one line: the key (or the variable, or the flag) and what was expected."""
        error = exc.errors(include_url=False)[0]
        loc = [str(part) for part in error["loc"]]
        if loc[:1] == ["service"] and loc[1:2] == ["destinations"]:
            name = tree["service"]["destinations"][int(loc[2])]["name"]
            key = ".".join(["destination", name, *loc[3:]])
        elif loc[:1] in (["pipeline"], ["service"]):
            key = ".".join([_KEY_OF_FIELD.get(loc[1], loc[1]), *loc[2:]]) if len(loc) > 1 else loc[0]
        else:
            key = ".".join([_KEY_OF_FIELD.get(loc[0], loc[0]), *loc[1:]]) if loc else "(settings)"
        cause = (error.get("ctx") or {}).get("error")
        expected = str(cause) if error["type"] == "value_error" and cause is not None else error["msg"]
        if error["type"] in ("dataclass_type", "dict_type", "dataclass_args_type"):
            expected = "a table"
        return self.fail(key, expected)

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

    def pipeline_tree(self) -> dict[str, Any]:
        d = self.data
        tree = {_FIELD_OF_KEY.get(k, k): d[k] for k in _PIPELINE_KEYS if k in d}
        tree["emit"] = self.emit_tree(d.get("emit", {}))
        if "repeatability" in d:
            criterion = self.choice("repeatability", _name(d["repeatability"]), repeatability_criteria())
            tree["repeatability"] = criterion
        return tree

    def check_pipeline(self, pipeline: PipelineSettings) -> None:
        """What pydantic cannot know: the extra installed, the codes the bridge reports, the HL7 table 0103."""
        if pipeline.validate_outputs and not _installed(VALIDATE_MODULE):
            raise self.fail("validate", "the optional extra installed first: pip install 'dlco-bridge[validate]'")
        known = finding_codes()
        self.codes("blocking", pipeline.blocking, known)
        self.codes("allow", pipeline.allow, known)
        for code in sorted(pipeline.allow):
            if known.severities[code] is not Severity.ERROR:
                raise self.fail(
                    "allow",
                    f"error finding codes, got {code}, a {known.severities[code].value} (it never stops a record)",
                )
        both = sorted(pipeline.blocking & pipeline.allow)
        if both:
            raise self.fail("allow", f"codes that are not also blocking, got {both[0]} in both")
        self.choice("emit.processing_id", pipeline.emit.processing_id, PROCESSING_IDS)

    def codes(self, key: str, given: frozenset[str], known: FindingCodes) -> None:
        """Each finding code must be one the bridge can report (in the order given, as typed)."""
        for word in self.words(key, self.data.get(key, sorted(given))):
            if word not in known.severities:
                near = known.closest(word)
                hint = f" (closest known: {near})" if near else ""
                raise self.fail(key, f"finding codes listed in docs/findings.md, got {word!r}{hint}")

    def emit_tree(self, e: Any) -> dict[str, Any]:
        if not isinstance(e, dict):
            raise self.fail("emit", "a table")
        unknown = sorted(set(e) - _EMIT_KEYS)
        if unknown:
            raise self.fail(f"emit.{unknown[0]}", f"one of {', '.join(sorted(_EMIT_KEYS))}")
        for key in HL7_NAMES:
            if key in e:
                self.hl7_namespace(f"emit.{key}", e[key])
        if "lab_facilities" in e:
            return {**e, "lab_facilities": self.facilities("emit.lab_facilities", e["lab_facilities"])}
        return dict(e)

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

    def service_tree(self) -> dict[str, Any]:
        d = self.data
        tree = {k: d[k] for k in _SERVICE_KEYS if k in d}
        tree.update({k: self.path(k, d.get(k)) for k in _FOLDERS})
        tree["destinations"] = [self.destination_tree(n, v) for n, v in d.get("destination", {}).items()]
        if not tree["destinations"]:
            raise self.fail("destination", "at least one [destination.NAME] table")
        return tree

    def destination_tree(self, name: str, v: Any) -> dict[str, Any]:
        where = f"destination.{name}"
        if not isinstance(v, dict):
            raise self.fail(where, "a table")
        unknown = sorted(set(v) - _DESTINATION_KEYS)
        if unknown:  # a misspelt key would otherwise be ignored and its default used
            raise self.fail(f"{where}.{unknown[0]}", f"one of {', '.join(sorted(_DESTINATION_KEYS))}")
        tree = {**v, "name": name, "transport": v.get("transport"), "payload": v.get("payload")}
        tree.update({k: self.path(f"{where}.{k}", v[k]) for k in _DESTINATION_FILES if k in v})
        if v.get("token_env"):
            tree["token"] = self.environ.get(str(v["token_env"]))
        return tree

    def check_destination(self, dest: Destination, v: dict[str, Any]) -> None:
        """What spans keys: a folder for files, a URL and FHIR for fhir-rest, the token set, SMART all or none."""
        where = f"destination.{dest.name}"
        self.smart(where, dest, v)
        if dest.transport == "file" and dest.folder is None:
            raise self.fail(f"{where}.folder", "a folder for the file transport")
        if dest.transport == "fhir-rest":
            self.url(f"{where}.base_url", dest.base_url)
            if dest.payload != "fhir":
                raise self.fail(f"{where}.payload", '"fhir" for the fhir-rest transport')
        if dest.token_env and dest.token is None:
            raise self.fail(f"{where}.token_env", f"the environment variable {dest.token_env} to be set")

    def smart(self, where: str, dest: Destination, v: dict[str, Any]) -> None:
        """SMART Backend Services keys: all of client_id, token_url, private_key_file, or none."""
        keys = ("client_id", "token_url", "private_key_file")
        given = [k for k in keys if v.get(k)]
        if not given:
            return
        missing = [k for k in keys if k not in given]
        if missing:
            raise self.fail(f"{where}.{missing[0]}", f"set with {', '.join(given)} (SMART Backend Services)")
        if dest.token_env:
            raise self.fail(f"{where}.token_env", "unset when client_id is set (one way to authenticate)")
        self.url(f"{where}.token_url", dest.token_url)
        if not dest.scopes.strip() or any(c in dest.scopes for c in '"\\\r\n'):
            raise self.fail(f"{where}.scopes", f"space-separated scopes, got {dest.scopes!r}")
