"""The one settings object: TOML, then the environment, then command-line flags (shell).

Owns: reading ``bridge.toml``, ``DLCO_BRIDGE_*`` environment variables and the flags the CLI
passes, in that order of precedence, into one tree, handed to ``reader`` (the tree -> one
frozen :class:`Settings`), which checks every value with ``values`` as it reads it (a bad
configuration stops the command before any file is touched, with the file, key and what was
expected). This package is the only code that reads the environment. Defaults live with the
value objects they belong to (:class:`bridge.pipeline.PipelineSettings`,
:class:`bridge.emit.settings.EmitSettings`, :class:`Settings`), written once.

Names: a top-level key ``inbox`` is ``DLCO_BRIDGE_INBOX``; a key of a section is
``DLCO_BRIDGE_<SECTION>_<KEY>`` (``DLCO_BRIDGE_EMIT_SENDING_FACILITY``); a key of a
destination is ``DLCO_BRIDGE_DESTINATION_<NAME>_<KEY>`` (``DLCO_BRIDGE_DESTINATION_RECORDS_PORT``).
Flags use the same keys (``--sending-facility`` is ``emit.sending_facility``).
"""

from __future__ import annotations

import difflib
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from bridge.config.reader import SAMPLE_CONFIG, TOP_LEVEL_KEYS, Settings, SettingsReader
from bridge.errors import ConfigError
from bridge.science.units import UNIT_SYSTEMS
from bridge.service.settings import ServiceSettings

__all__ = [
    "CONFIG_ENV",
    "ENV_PREFIX",
    "SAMPLE_CONFIG",
    "UNIT_SYSTEMS",
    "ServiceSettings",
    "Settings",
    "config_path",
    "flag_name",
    "load_settings",
    "parse_settings",
]

ENV_PREFIX = "DLCO_BRIDGE_"
CONFIG_ENV = ENV_PREFIX + "CONFIG"  # the configuration file, when --config is not given
# Variables of the project's own tests and benchmarks that share the prefix but are no setting.
NOT_SETTINGS = frozenset({"DLCO_BRIDGE_REGEN_GOLDEN", "DLCO_BRIDGE_FUZZ_EXAMPLES", "DLCO_BRIDGE_FHIR_SCHEMA"})


def config_path(flag: Path | None, environ: Mapping[str, str]) -> Path | None:
    """The configuration file: ``--config``, else ``DLCO_BRIDGE_CONFIG``, else none."""
    if flag is not None:
        return flag
    named = environ.get(CONFIG_ENV)
    return Path(named) if named else None


def load_settings(path: Path | None, environ: Mapping[str, str], flags: Mapping[str, Any] | None = None) -> Settings:
    """Settings from a TOML file (if any), with ``DLCO_BRIDGE_*`` variables, then ``flags`` on top."""
    if path is None:
        return parse_settings("", environ, flags, source="(no configuration file)")
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError("(file)", f"a readable configuration file ({exc.strerror})", str(path)) from exc
    return parse_settings(text, environ, flags, source=str(path), base=path.parent)


def parse_settings(
    text: str,
    environ: Mapping[str, str],
    flags: Mapping[str, Any] | None = None,
    source: str = "bridge.toml",
    base: Path = Path(),
) -> Settings:
    """:func:`load_settings` on the text of a configuration file."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError("(syntax)", f"valid TOML: {exc}", source) from exc
    origins: dict[str, str] = {}  # a key set by a variable or a flag -> its name, for the errors
    merged = _with_flags(_with_environment(data, environ, origins), flags or {}, origins)
    return SettingsReader(merged, source, base, environ, origins).settings()


def flag_name(key: str) -> str:
    """The flag of a setting: ``emit.sending_facility`` -> ``--sending-facility``, ``to`` -> ``--to``."""
    return "--" + key.rpartition(".")[2].replace("_", "-")


def _with_environment(data: dict[str, Any], environ: Mapping[str, str], origins: dict[str, str]) -> dict[str, Any]:
    """Overlay ``DLCO_BRIDGE_*`` variables (values stay text; the reader converts them).

    A variable that names no setting is refused, naming the closest one: a misspelt name would
    otherwise be ignored and its default used.
    """
    merged: dict[str, Any] = {k: (dict(v) if isinstance(v, dict) else v) for k, v in data.items()}
    destinations = {k: dict(v) for k, v in data.get("destination", {}).items() if isinstance(v, dict)}
    for name, value in sorted(environ.items()):
        if not name.startswith(ENV_PREFIX) or name == CONFIG_ENV or name in NOT_SETTINGS:
            continue
        key = name[len(ENV_PREFIX) :].lower()
        if key.startswith("destination_"):
            dest, _, dest_key = key[len("destination_") :].partition("_")
            match = next((d for d in destinations if d.lower() == dest), dest)
            if match not in destinations:  # a destination the file does not have: its errors name the variable
                origins.setdefault(f"destination.{match}", name)
            destinations.setdefault(match, {})[dest_key] = value
            origins[f"destination.{match}.{dest_key}"] = name
        elif key.startswith("emit_"):
            merged.setdefault("emit", {})[key[len("emit_") :]] = value
            origins[f"emit.{key[len('emit_') :]}"] = name
        elif key in TOP_LEVEL_KEYS:
            merged[key] = value
            origins[key] = name
        else:
            known = [ENV_PREFIX + k.upper() for k in sorted(TOP_LEVEL_KEYS)] + [CONFIG_ENV]
            near = difflib.get_close_matches(name, known, n=1, cutoff=0.6)
            hint = f" (closest: {near[0]})" if near else ""
            raise ConfigError(
                name, f"the name of a setting (DLCO_BRIDGE_<KEY>, _EMIT_<KEY>, _DESTINATION_<NAME>_<KEY>){hint}"
            )
    if destinations:
        merged["destination"] = destinations
    return merged


def _with_flags(data: dict[str, Any], flags: Mapping[str, Any], origins: dict[str, str]) -> dict[str, Any]:
    """Overlay command-line flags (``None``: not given); ``emit.x`` keys go into ``[emit]``."""
    for key, value in flags.items():
        if value is None:
            continue
        section, _, name = key.rpartition(".")
        if section:
            data.setdefault(section, {})[name] = value
        else:
            data[key] = value
        origins[key] = flag_name(key)
    return data
