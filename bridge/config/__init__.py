"""The one settings object: TOML, then the environment, then command-line flags (shell).

Owns: reading ``bridge.toml``, ``DLCO_BRIDGE_*`` environment variables and the flags the CLI
passes, in that order of precedence, into one tree (pydantic-settings, with the sources of
``sources``), handed to ``reader`` (the tree -> one
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

import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from bridge.config.reader import SAMPLE_CONFIG, TOP_LEVEL_KEYS, Settings, SettingsReader
from bridge.config.sources import CONFIG_ENV, ENV_PREFIX, flag_name, merged_tree
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
    merged = merged_tree(data, environ, flags or {}, TOP_LEVEL_KEYS, origins)
    return SettingsReader(merged, source, base, environ, origins).settings()
