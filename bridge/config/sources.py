"""Where settings come from: the configuration file, ``DLCO_BRIDGE_*`` variables, flags (shell).

Owns the three pydantic-settings sources and their order (:class:`SettingsTree`: flags over the
environment over the file, merged key by key by pydantic-settings), the documented variable names
(``DLCO_BRIDGE_<KEY>``, ``DLCO_BRIDGE_EMIT_<KEY>``, ``DLCO_BRIDGE_DESTINATION_<NAME>_<KEY>``: the
keys themselves hold ``_``, so one ``_`` cannot be the library's nested delimiter, and the names stay
as documented: :class:`EnvironmentSource` splits them itself, the name at its first ``_``), and
``origins``: which variable or flag set a key, so that ``bridge.config.reader`` names it in an error
(the file and key otherwise). Values stay as they came (text from the environment); the reader
checks and converts each one.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from typing import Any

from pydantic.fields import FieldInfo
from pydantic_settings import BaseSettings, PydanticBaseSettingsSource, SettingsConfigDict

from bridge.errors import ConfigError

ENV_PREFIX = "DLCO_BRIDGE_"
CONFIG_ENV = ENV_PREFIX + "CONFIG"  # the configuration file, when --config is not given
# Variables of the project's own tests and benchmarks that share the prefix but are no setting.
NOT_SETTINGS = frozenset({"DLCO_BRIDGE_REGEN_GOLDEN", "DLCO_BRIDGE_FUZZ_EXAMPLES", "DLCO_BRIDGE_FHIR_SCHEMA"})


def flag_name(key: str) -> str:
    """The flag of a setting: ``emit.sending_facility`` -> ``--sending-facility``, ``to`` -> ``--to``."""
    return "--" + key.rpartition(".")[2].replace("_", "-")


class TreeSource(PydanticBaseSettingsSource):
    """A source that gives a whole tree of keys at once (the settings tree has no fields to ask for)."""

    def __init__(self, settings_cls: type[BaseSettings], tree: dict[str, Any]) -> None:
        super().__init__(settings_cls)
        self.tree = tree

    def get_field_value(self, field: FieldInfo, field_name: str) -> tuple[Any, str, bool]:
        return self.tree.get(field_name), field_name, False

    def __call__(self) -> dict[str, Any]:
        return self.tree


class FileSource(TreeSource):
    """The configuration file's keys, as TOML gave them (``bridge.config`` parses the text)."""


class EnvironmentSource(TreeSource):
    """``DLCO_BRIDGE_*`` variables as a tree of keys; a variable that names no setting is refused.

    ``file`` gives the destinations the file names, so that ``DLCO_BRIDGE_DESTINATION_RECORDS_PORT``
    sets ``destination.records.port`` whatever the case of the file's name.
    """

    def __init__(
        self,
        settings_cls: type[BaseSettings],
        environ: Mapping[str, str],
        file: Mapping[str, Any],
        top_level_keys: frozenset[str],
        origins: dict[str, str],
    ) -> None:
        super().__init__(settings_cls, {})
        named = file.get("destination", {})
        names = [name for name, table in named.items() if isinstance(table, dict)] if isinstance(named, dict) else []
        for name, value in sorted(environ.items()):
            if not name.startswith(ENV_PREFIX) or name == CONFIG_ENV or name in NOT_SETTINGS:
                continue
            key = name[len(ENV_PREFIX) :].lower()
            if key.startswith("destination_"):
                dest, _, dest_key = key[len("destination_") :].partition("_")
                match = next((d for d in names if d.lower() == dest), dest)
                if match not in names:  # a destination the file does not have: its errors name the variable
                    origins.setdefault(f"destination.{match}", name)
                self.tree.setdefault("destination", {}).setdefault(match, {})[dest_key] = value
                origins[f"destination.{match}.{dest_key}"] = name
            elif key.startswith("emit_"):
                self.tree.setdefault("emit", {})[key[len("emit_") :]] = value
                origins[f"emit.{key[len('emit_') :]}"] = name
            elif key in top_level_keys:
                self.tree[key] = value
                origins[key] = name
            else:
                known = [ENV_PREFIX + k.upper() for k in sorted(top_level_keys)] + [CONFIG_ENV]
                near = difflib.get_close_matches(name, known, n=1, cutoff=0.6)
                hint = f" (closest: {near[0]})" if near else ""
                raise ConfigError(
                    name, f"the name of a setting (DLCO_BRIDGE_<KEY>, _EMIT_<KEY>, _DESTINATION_<NAME>_<KEY>){hint}"
                )


class FlagSource(TreeSource):
    """The command line's settings flags (``None``: not given); ``emit.x`` keys go into ``[emit]``."""

    def __init__(self, settings_cls: type[BaseSettings], flags: Mapping[str, Any], origins: dict[str, str]) -> None:
        super().__init__(settings_cls, {})
        for key, value in flags.items():
            if value is None:
                continue
            section, _, name = key.rpartition(".")
            (self.tree.setdefault(section, {}) if section else self.tree)[name] = value
            origins[key] = flag_name(key)


class SettingsTree(BaseSettings):
    """Every key as set, merged by pydantic-settings: flags over the environment over the file.

    It has no fields: the keys are those of the settings classes (``bridge.config.reader``), whose
    defaults are written there once; a key set nowhere is absent here and takes its default there.
    """

    model_config = SettingsConfigDict(extra="allow")


def merged_tree(
    file: dict[str, Any],
    environ: Mapping[str, str],
    flags: Mapping[str, Any],
    top_level_keys: frozenset[str],
    origins: dict[str, str],
) -> dict[str, Any]:
    """The keys of the file, the environment and the flags in one tree; ``origins`` filled on the way."""

    environment = EnvironmentSource(SettingsTree, environ, file, top_level_keys, origins)
    command_line = FlagSource(SettingsTree, flags, origins)  # after the environment: its origins win

    class _Tree(SettingsTree):
        @classmethod
        def settings_customise_sources(
            cls,
            settings_cls: type[BaseSettings],
            init_settings: PydanticBaseSettingsSource,
            env_settings: PydanticBaseSettingsSource,
            dotenv_settings: PydanticBaseSettingsSource,
            file_secret_settings: PydanticBaseSettingsSource,
        ) -> tuple[PydanticBaseSettingsSource, ...]:
            return command_line, environment, FileSource(settings_cls, file)  # the first wins

    return _Tree().model_dump()
